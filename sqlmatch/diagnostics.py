"""Plain-words warnings from a run's aggregates: windows the events do not cover, features that
carry no information, what the missing-value policies did, a stale propensity model, and each
matching method's own cautions. Pure: no database."""

from __future__ import annotations

import datetime as dt

from sqlmatch.columns import stat
from sqlmatch.matching import method_for
from sqlmatch.privacy import count_text, is_small, suppress_levels
from sqlmatch.results import Caution
from sqlmatch.spec import Spec

SMD_BALANCED = 0.1  # |SMD| below 0.1 read as balanced: common practice (Austin 2009)


def run_warnings(spec: Spec, r, balance, fitted_model=None, matching=None) -> list[Caution]:
    """Every warning of one run, in the order reports show them, each tagged with its kind."""
    out = data_warnings(spec, r, balance)
    if matching is not None:
        out += balance_warnings(spec, balance, matching)
    return out + [Caution(t, "model") for t in model_warnings(spec, r, fitted_model)]


def balance_warnings(spec: Spec, balance, matching) -> list[Caution]:
    """Features whose |SMD| after matching stays above 0.1: the matched groups still differ on them,
    so part of the effect may be that difference. Levels withheld for small counts are left out."""
    shown = suppress_levels(balance, matching, spec.min_cell_size)
    off = [b for b in shown if b.smd_after is not None and abs(b.smd_after) > SMD_BALANCED]
    if not off:
        return []
    listed = ", ".join(f"{b.covariate} {b.smd_after:+.3f}" for b in sorted(off, key=lambda b: -abs(b.smd_after)))
    if method_for(spec.matching.method).uses_score:
        fix = "add them to propensity.features, or block on the categorical ones (matching.block_on)"
    elif spec.matching.method == "entropy_balancing":
        fix = "add them to matching.on (the weights then balance their means too)"
    else:
        fix = "match on them too (matching.on) or on finer cut points (matching.cut_points)"
    return [
        Caution(
            f"Balance not achieved: after matching, {len(off)} feature(s) keep |SMD| above {SMD_BALANCED} ({listed}; "
            f"below {SMD_BALANCED} is common practice). The effects may partly be these differences: {fix}, and compare again.",
            "balance",
        )
    ]


STALE_BALANCE_SD = 1e-6  # a gap this large (in SDs) is no rounding: the stored weights were fitted on other data


def balancing_warnings(spec: Spec, r, fitted) -> list[str]:
    """Entropy-balancing weights read from their file (a scheduled plan) balance the units they
    were fitted on exactly; on this run's units they may not: say so, from matching_summary."""
    if spec.matching.method != "entropy_balancing" or "matching_summary" not in r:
        return []
    from sqlmatch.matching.entropy_balancing import balance_reached, fit_path, load_fit

    fitted = fitted if fitted is not None else load_fit(spec)
    if fitted is None:
        return []
    reached = balance_reached(r["matching_summary"].one(), fitted.moments)
    worst = max(reached, key=lambda m: abs(m["gap_sd"]), default=None)
    if worst is None or abs(worst["gap_sd"]) <= STALE_BALANCE_SD:
        return []
    where = fit_path(spec).name if spec.source_path is not None else "the stored fit"
    return [
        f"The entropy-balancing weights come from the fit in {where} (fitted on {fitted.fitted_on or 'an earlier run'}), and on this "
        f"run's units they no longer balance the enrolled units' means: the largest gap is {worst['gap_sd']:+.2g} SD, in "
        f"{worst['moment']}. The effect compares the enrolled with comparison units that differ by that much. Refit: "
        f"`sqlmatch run` fits the weights again and rewrites {where}; then compile again for the scheduler."
    ]


def model_warnings(spec: Spec, r, fitted) -> list[str]:
    """A propensity model read from its file (baked into compiled SQL, perhaps long ago) may no
    longer describe the units it scores: say so, from the propensity_check aggregates."""
    if "propensity_check" not in r:
        return balancing_warnings(spec, r, fitted)
    from sqlmatch.propensity import check_model, load_model, model_path

    model = fitted if fitted is not None else load_model(spec)
    if model is None:
        return []
    c = check_model(r["propensity_check"].one(), model)
    where = model_path(spec).name if spec.source_path is not None else "the model file"
    if c is None:
        return [
            f"The SQL that ran applied other propensity coefficients than {where} now holds: the model file was "
            "rewritten after that SQL was compiled, so the scores came from the earlier fit. Compile again and let the "
            "scheduler run the new files."
        ]
    refit = (
        f"The scores use that fit's coefficients. Unless the change is small, refit: `sqlmatch run` fits the model "
        f"again and rewrites {where}; then compile again for the scheduler."
    )
    test = (
        f" (Rao's score test of those coefficients on this run's units: chi-square {c.score_statistic:.1f} on {c.df} df, p = {c.p_value:.2g})"
        if c.score_statistic is not None
        else ""
    )
    if c.n_units_now != c.n_units_fitted:
        return [
            f"The propensity model in {where} was fitted on {model.fitted_on} on {count_text(c.n_units_fitted, spec.min_cell_size, words=True)} units; "
            f"this run applies it to {count_text(c.n_units_now, spec.min_cell_size, words=True)} units, so the data changed since the fit{test}. " + refit
        ]
    if c.p_value is not None and c.p_value < 0.001:
        return [
            f"The propensity model in {where} was fitted on {model.fitted_on} on as many units as this run has, but its "
            f"coefficients no longer fit them{test}: the data changed since the fit. " + refit
        ]
    return []


def data_warnings(spec: Spec, r, balance) -> list[str]:
    """Plain-words warnings from the aggregates: windows the events do not cover, features that
    carry no information."""
    out = []
    w = spec.windows
    if "data_coverage" in r:
        c = r["data_coverage"].one()
        last, first = c["last_event_at"], c["first_event_at"]
        if last is not None and _as_date(last) < w.post_end - dt.timedelta(days=7):
            out.append(Caution(
                f"The events end on {_as_date(last)}, more than a week before the post window ends ({w.post_end}): "
                "if the data is still arriving, the outcomes are cut short for everyone. Wait for the data or use a shorter post window.",
                "coverage",
            ))
        # a study whose features are all unit attributes reads no pre-window events
        reads_pre = bool(spec.event_features)
        if reads_pre and first is not None and _as_date(first) > w.pre_start + dt.timedelta(days=7):
            out.append(Caution(
                f"The events start on {_as_date(first)}, more than a week after the pre window starts ({w.pre_start}): "
                "pre-window features may be incomplete.",
                "coverage",
            ))
        if c["n_units"] and c["n_units_without_events"] / c["n_units"] > 0.5:
            out.append(Caution(f"{c['n_units_without_events'] / c['n_units']:.0%} of the units have no event in either window.", "coverage"))
    if w.post_starts == "cohort":
        out.append(Caution(
            f"The post window starts with the cohort month ({w.post_start}; windows.post_starts = \"cohort\"), so the "
            "outcomes include the days of that month before each unit enrolled, when it could not yet benefit. The effect "
            "is diluted toward zero by about that share of the window; post_starts = \"after_cohort\" avoids it.",
            "design",
        ))
    out += [Caution(t, "method") for t in method_for(spec.matching.method).warnings(spec, r)]
    out += [Caution(t, "missing") for t in _missing_warnings(spec, r)]
    if "data_coverage" in r and "n_events_unknown" in r["data_coverage"].columns:
        u = r["data_coverage"].one()
        events, units = int(u["n_events_unknown"] or 0), int(u["n_units_unknown"] or 0)
        if events:
            n_units = count_text(units, spec.min_cell_size, words=True)
            out.append(Caution(
                f"{events:,} events in the windows belong to {n_units} units that are not in {spec.units.display!r}: "
                "they are left out of every feature and outcome. If that is more than a few, check that events.unit_key "
                "and units.key name the same thing, and that the units table is complete.",
                "coverage",
            ))
    out += [Caution(t, "coverage") for t in _unplaced_event_warnings(spec, r)]
    out += [Caution(t, "features") for t in _pooled_level_warnings(spec, r)]
    out += [Caution(t, "coverage") for t in _incomplete_ratio_warnings(spec, r)]
    out += [Caution(t, "kept") for t in _kept_warning(spec, r, balance)]
    for b in balance:
        if b.kind != "level" and b.mean_treated_before is None and b.mean_control_before is None:
            out.append(Caution(f"Feature {b.covariate!r} is NULL for every unit: it carries no information. Fix its definition or drop it.", "features"))
        elif b.kind != "level" and b.smd_before == 0.0 and b.variance_ratio_before is None:
            out.append(Caution(f"Feature {b.covariate!r} has the same value for every unit: it carries no information and can be dropped.", "features"))
    return out


def _pooled_level_warnings(spec: Spec, r) -> list[str]:
    """Say which categorical features had levels pooled into '(other)' (unit_measures) and how
    many units that holds. Exact matching on such a feature matches within the pooled level
    rather than being refused: grouping rare categories is a coarsening like any other in
    coarsened exact matching, refusing would stop any study with one rare level, and keeping the
    rare levels apart would make strata of fewer than min_cell_size units whose sums leave the
    warehouse, and rows fetched that grow with the data."""
    from sqlmatch.plan import POOLED_LEVEL

    if "balance_levels" not in r:
        return []
    pooled: dict[str, int] = {}
    for row in r["balance_levels"].records():
        if row["level"] == POOLED_LEVEL:
            pooled[row["feature"]] = pooled.get(row["feature"], 0) + int(row["n_units"] or 0)
    out = []
    matched_on = set(spec.matching.on) | set(spec.matching.block_on)
    for f in spec.categorical_features:
        if f.name not in pooled:
            continue
        text = (
            f"Levels of {f.name!r} held by fewer than {spec.min_cell_size} units of the study are pooled into one level, "
            f"'{POOLED_LEVEL}' ({count_text(pooled[f.name], spec.min_cell_size, words=True)} units), so that no small level is named "
            "or measured on its own (report.min_cell_size)."
        )
        if f.name in matched_on:
            text += (
                f" Matching on it treats them as one level: units of different rare levels can share a stratum. To keep them apart, "
                f"group the levels yourself (e.g. in a view on {spec.units.display!r}) into groups of at least {spec.min_cell_size} units."
            )
        out.append(text)
    return out


def _incomplete_ratio_warnings(spec: Spec, r) -> list[str]:
    """A ratio outcome counts an event in both parts or in neither; say how many events of the
    post window it left out for lacking a value."""
    if "data_coverage" not in r:
        return []
    c = r["data_coverage"].one()
    out = []
    for o in spec.outcomes:
        n = int(c.get(stat(stat(o.name, "incomplete"), "total")) or 0) if o.aggregate == "ratio" else 0
        if n:
            parts = " or ".join(repr(x) for x in (o.numerator, o.denominator) if x)
            out.append(
                f"{o.key}: {n:,} events of the study's units in the post window have no value in {parts}: the ratio "
                "uses only the events with a value in both parts (they count in neither). If those events should count, "
                "fill the values in the events table."
            )
    return out


def _unplaced_event_warnings(spec: Spec, r) -> list[str]:
    """Events the pass over the events could not place: a NULL time fits no window, a NULL unit
    key no unit. Both are left out of every measure; a share that differs between the groups
    moves the effect, so they are counted (per group for the times) and said."""
    if "data_coverage" not in r or "n_events_without_key" not in r["data_coverage"].columns:
        return []
    c = r["data_coverage"].one()
    treated, control = int(c["n_events_without_time_treated"] or 0), int(c["n_events_without_time_control"] or 0)
    keyless = int(c["n_events_without_key"] or 0)
    out = []
    if treated + control:
        out.append(
            f"{treated + control:,} events of the study's units have no time ({treated:,} of treated units, {control:,} of control units): "
            f"events.time ({spec.event_time!r} of {spec.events.display!r}) is NULL on them, so no window holds them and they are left out "
            "of every feature and outcome. Unless that is a few, fill in the times (or leave those rows out in a view on purpose): "
            "if one group lost more of its events, the effect is biased."
        )
    if keyless:
        out.append(
            f"{keyless:,} events have no unit key: events.unit_key ({spec.event_unit_key!r} of {spec.events.display!r}) is NULL on them "
            "(counted within the windows, and without a time), so they belong to no unit and are left out. Unless that is a few, "
            "fix the key in the events table."
        )
    return out


# Below this share of the cohort matched, say the effect describes the kept units only. Our own
# threshold (no published rule): a tenth of the cohort left out can already change who the
# effect is about, when the units left out are the unusual ones.
KEPT_SHARE_WARN = 0.9


def _kept_warning(spec: Spec, r, balance) -> list[str]:
    """When matching kept few of the treated, the effect is for those units only: say so, with the
    kept units' feature means beside the whole cohort's where they differ most."""
    if "matching_summary" not in r:
        return []
    m = r["matching_summary"].one()
    n_t, kept = int(m.get("n_treated") or 0), int(m.get("n_treated_matched") or 0)
    if not n_t or kept >= KEPT_SHARE_WARN * n_t:
        return []
    shifts = []
    for b in balance:
        before, after = b.mean_treated_before, b.mean_treated_after
        if b.kind == "level" or before is None or after is None:
            continue
        scale = abs(before) if before else 1.0
        shifts.append((abs(after - before) / scale, b.covariate, after, before))
    shifts.sort(reverse=True)
    means = "; ".join(f"{name} {after:.3g} (cohort {before:.3g})" for rel, name, after, before in shifts[:3] if rel >= 0.05)
    n = count_text(kept, spec.min_cell_size, words=True)
    # the share would give back a suppressed count (or the count of those left out)
    share = "" if is_small(kept, spec.min_cell_size) or is_small(n_t - kept, spec.min_cell_size) else f" ({kept / n_t:.0%})"
    text = (
        f"Only {n} of the {count_text(n_t, spec.min_cell_size, words=True)} enrolled units{share} were matched: every effect "
        f"below is for those units only, not for the whole cohort."
    )
    if means:
        text += f" The kept units differ from the cohort in their means: {means}."
    return [text + f" To describe more of the cohort: {method_for(spec.matching.method).loosen}."]


def _missing_warnings(spec: Spec, r) -> list[str]:
    """What each attribute's `missing` policy did, in counts (a count under the minimum cell size
    is not printed: it could single out a few people)."""
    if "group_sizes" not in r or not spec.attribute_features:
        return []
    groups = {int(g["treated"]): g for g in r["group_sizes"].records()}

    def count(n: int) -> str:
        return count_text(n, spec.min_cell_size, words=True)

    out = []
    for f in spec.attribute_features:
        t, c = (int(groups.get(g, {}).get(stat(f.name, "null")) or 0) for g in (1, 0))
        if not t + c:
            continue
        who = f"{count(t + c)} units ({count(t)} treated, {count(c)} control) have no value for {f.name!r}"
        if f.missing == "fill":
            out.append(f"{who}: filled with {f.fill:g} and flagged in the feature {f.indicator!r} ({f.key}.missing = \"fill\").")
        elif f.missing == "drop":
            out.append(f"{who}: they were left out of the study ({f.key}.missing = \"drop\"); the effect is for units with a value.")
        elif f.missing == "level":
            out.append(f"{who}: they form a level of their own, '(missing)' ({f.key}.missing = \"level\").")
    return out


def _as_date(value):
    return value if isinstance(value, dt.date) and not isinstance(value, dt.datetime) else dt.date.fromisoformat(str(value)[:10])
