"""Small-count suppression: the one rule every output (JSON, Markdown, HTML, warnings) applies.

A count of units between 1 and min_cell_size - 1 could single out a few people, so it is never
written: JSON gets null, reports get "<10" (or "fewer than 10" in a sentence)."""

from __future__ import annotations


def is_small(n: int | None, min_cell: int) -> bool:
    return n is not None and 0 < n < min_cell


def count_text(n: int | None, min_cell: int, words: bool = False) -> str:
    """A unit count for a table cell ("<10") or a sentence ("fewer than 10"); "–" when unknown."""
    if n is None:
        return "–"
    if is_small(n, min_cell):
        return f"fewer than {min_cell}" if words else f"<{min_cell}"
    return f"{n:,}"


def suppress_counts(record: dict, min_cell: int) -> dict:  # noqa: D401
    """Unit counts (keys n_...) below the minimum cell size become null."""
    return {k: (None if k.startswith("n_") and isinstance(v, int) and is_small(v, min_cell) else v) for k, v in record.items()}


FLOW_ROWS = ("matched", "outside_support", "no_comparable")


def hidden_parts(parts: dict[str, int], total: int, min_cell: int) -> set[str]:
    """Which parts of a visible total to hide: the small ones, and, when exactly one is small, the
    smallest other non-zero part too, so the small one cannot be recovered by subtraction
    (complementary suppression). A small total hides everything."""
    if is_small(total, min_cell):
        return set(parts)
    hidden = {k for k, v in parts.items() if is_small(v, min_cell)}
    if len(hidden) == 1:
        others = sorted((v, k) for k, v in parts.items() if k not in hidden and v > 0)
        if others:
            hidden.add(others[0][1])
    return hidden


def sample_flow(matching, min_cell: int) -> dict[str, dict[str, int | None]]:
    """Per group ("treated", "control"): units in the study and how many were matched, fell
    outside the common support, or found no comparable unit, with None for every count that is
    small or would reveal a small one by subtraction from the total."""
    out = {}
    for group in ("treated", "control"):
        total = int(getattr(matching, f"n_{group}"))
        matched = int(getattr(matching, f"n_{group}_matched"))
        outside = int(getattr(matching, f"n_{group}_outside_support"))
        parts = {"matched": matched, "outside_support": outside, "no_comparable": total - matched - outside}
        hidden = hidden_parts(parts, total, min_cell)
        out[group] = {"in_study": None if is_small(total, min_cell) else total, **{k: (None if k in hidden else v) for k, v in parts.items()}}
    return out


def flow_texts(matching, min_cell: int) -> dict[str, dict[str, str]]:
    """sample_flow as report cells: "<10" for a small count, "–" for one withheld so that a small
    count cannot be worked out, the number otherwise."""
    flow = sample_flow(matching, min_cell)
    out = {}
    for group, rows in flow.items():
        total = int(getattr(matching, f"n_{group}"))
        matched = int(getattr(matching, f"n_{group}_matched"))
        outside = int(getattr(matching, f"n_{group}_outside_support"))
        raw = {"in_study": total, "matched": matched, "outside_support": outside, "no_comparable": total - matched - outside}
        out[group] = {k: (f"<{min_cell}" if is_small(raw[k], min_cell) else "–" if v is None else f"{v:,}") for k, v in rows.items()}
    return out


def suppress_histograms(histograms: dict | None, min_cell: int) -> dict | None:
    """Bins whose unit count is small lose their counts and weights; when a group of a feature
    has one such bin, its smallest other non-empty bin is hidden too, since the group's total is
    shown elsewhere."""
    if histograms is None:
        return None
    out = {}
    for name, bins in histograms.items():
        hide = set()
        for group in {b["treated"] for b in bins}:
            idx = [i for i, b in enumerate(bins) if b["treated"] == group and b["n_units"] is not None]
            # before matching: unit counts; after: summed weights, a count for treated units (weight 1)
            for key in ("n_units", "sum_w") if group == 1 else ("n_units",):
                parts = {i: int(round(bins[i][key] or 0)) for i in idx}
                if sum(parts.values()):
                    hide |= hidden_parts(parts, sum(parts.values()), min_cell)
        out[name] = [{**b, "n_units": None, "sum_w": None} if i in hide else b for i, b in enumerate(bins)]
    return out


def suppress_levels(balance: list, matching, min_cell: int) -> list:
    """Categorical levels held by few units of a group: their shares (share x group size = a
    count) and SMDs are withheld; when one level of a feature is withheld, its smallest other
    level is too (the shares add up to one)."""
    from dataclasses import replace

    levels: dict[str, list[int]] = {}
    for i, b in enumerate(balance):
        if b.kind == "level":
            levels.setdefault(b.covariate.split("=", 1)[0], []).append(i)
    hide: set[int] = set()
    for idx in levels.values():
        for attr, n in (
            ("mean_treated_before", matching.n_treated),
            ("mean_control_before", matching.n_control),
            ("mean_treated_after", matching.n_treated_matched),
        ):
            parts = {i: int(round((getattr(balance[i], attr) or 0.0) * n)) for i in idx}
            hide |= hidden_parts(parts, n, min_cell)
    blank = dict(mean_treated_before=None, mean_control_before=None, smd_before=None, variance_ratio_before=None,
                 mean_treated_after=None, mean_control_after=None, smd_after=None, variance_ratio_after=None)
    return [replace(b, **blank) if i in hide else b for i, b in enumerate(balance)]
