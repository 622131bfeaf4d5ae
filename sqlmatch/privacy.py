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


def suppress_counts(record: dict, min_cell: int) -> dict:
    """Unit counts (keys n_...) below the minimum cell size become null."""
    return {k: (None if k.startswith("n_") and isinstance(v, int) and is_small(v, min_cell) else v) for k, v in record.items()}


def suppress_histograms(histograms: dict | None, min_cell: int) -> dict | None:
    """Bins whose unit count is below the minimum cell size lose their counts and weights."""
    if histograms is None:
        return None
    return {
        name: [{**b, "n_units": None, "sum_w": None} if is_small(b["n_units"], min_cell) else b for b in bins]
        for name, bins in histograms.items()
    }
