"""Plain words for a result: one sentence per effect a reader can repeat, and the one-line headline
the command line prints. Renders StudyResults; no statistics here."""

from __future__ import annotations

import datetime as dt
import math

from sqlmatch.results import Effect, StudyResults


def number(x: float | None) -> str:
    """A figure for a sentence: three significant digits or so, thousands separated."""
    if x is None or not math.isfinite(x):
        return "–"
    a = abs(x)
    if a >= 100:
        return f"{x:,.0f}"
    if a >= 10:
        return f"{x:,.1f}"
    if a >= 0.01 or a == 0:
        return f"{x:,.2f}"
    return f"{x:.2g}"


def pct(x: float | None) -> str:
    return "–" if x is None or not math.isfinite(x) else f"{100.0 * x:+.1f}%"


def window_length(window: list[str], unit: str) -> str:
    """Length of a [start, end) window in the study's window unit ("3 months")."""
    start, end = dt.date.fromisoformat(window[0]), dt.date.fromisoformat(window[1])
    n = (end.year - start.year) * 12 + end.month - start.month if unit == "month" else (end - start).days
    return f"{n} {unit}{'s' if n != 1 else ''}"


def _includes_zero(e: Effect) -> bool:
    return e.ci_low is not None and e.ci_high is not None and e.ci_low <= 0.0 <= e.ci_high


def effect_sentence(r: StudyResults, e: Effect) -> str:
    """What the effect means, in words: "The enrolled units had 4.56 more post_trips each over the 3
    months after enrolment than comparable units that had not enrolled (9.62 against 5.07, +90.0%)."""
    w = r.windows
    span = f"over the {window_length(w['post'], w['unit'])} from {w['post'][0]}"
    interval = f"the 95% interval of the difference is {number(e.ci_low)} to {number(e.ci_high)}"
    if e.estimate is None or not math.isfinite(e.estimate):
        return f"No effect on {e.outcome} could be estimated."
    if e.kind == "binary":
        p1, p0 = e.mean_treated, e.mean_control
        text = (
            f"{_share(p1)} of the enrolled units had {e.outcome} in the post window ({window_length(w['post'], w['unit'])} from {w['post'][0]}), against {_share(p0)} of comparable units that had not "
            f"enrolled: {100 * e.estimate:+.1f} percentage points ({_points_interval(e)})"
        )
        if e.risk_ratio is not None and e.risk_ratio.estimate is not None:
            text += f", {number(e.risk_ratio.estimate)} times as likely"
        text += "."
    else:
        more = "more" if e.estimate >= 0 else "less"
        estimand = getattr(e, "estimand", "att")
        if estimand != "att":  # the effect on the comparison units (atc) or on everyone in the strata (ate)
            whom = "the units that had not enrolled" if estimand == "atc" else "all units in the matched strata"
            text = (
                f"For {whom}, enrolment went with {number(abs(e.estimate))} {'higher' if e.estimate >= 0 else 'lower'} "
                f"{e.outcome} {span}, comparing enrolled and non-enrolled units weighted to stand for them"
            )
        elif e.kind == "ratio":
            text = f"For the enrolled units, {e.outcome} {span} was {number(abs(e.estimate))} {'higher' if e.estimate >= 0 else 'lower'} than for comparable units that had not enrolled"
        else:
            text = f"The enrolled units had {number(abs(e.estimate))} {more} {e.outcome} each {span} than comparable units that had not enrolled"
        text += f" ({number(e.mean_treated)} against {number(e.mean_control)}"
        if e.lift.estimate is not None:
            text += f", {pct(e.lift.estimate)}"
        text += f"); {interval}."
    if _includes_zero(e):
        text += " The interval includes no effect: the data are also consistent with no change."
    return text


def _points_interval(e: Effect) -> str:
    if e.ci_low is None or e.ci_high is None:
        return "no interval"
    return f"95% interval {100 * e.ci_low:+.1f} to {100 * e.ci_high:+.1f}"


def _share(p: float | None) -> str:
    return "–" if p is None or not math.isfinite(p) else f"{100 * p:.1f}%"


def headline(e: Effect) -> str:
    """One line per outcome for the end of a run: effect, interval, relative lift."""
    line = figure_line(e.outcome, e.kind, e.estimate, e.ci_low, e.ci_high, getattr(e, "estimand", "att"))
    if e.lift.estimate is not None:
        line += f", {pct(e.lift.estimate)} relative to the matched comparison"
    return line


def figure_line(outcome: str, kind: str, estimate, low, high, estimand: str = "att") -> str:
    """"post_trips: +4.56 per enrolled unit, 95% interval [4.44, 4.68]"; binary outcomes in
    percentage points."""
    per = " per enrolled unit" if estimand == "att" else f" per unit ({estimand.upper()})"
    scale, unit = (100.0, " percentage points") if kind == "binary" else (1.0, per if kind == "continuous" else "")

    def scaled(x):
        return None if x is None else scale * x

    return f"{outcome}: {_signed(scaled(estimate))}{unit}, 95% interval [{number(scaled(low))}, {number(scaled(high))}]"


def _signed(x: float | None) -> str:
    s = number(x)
    return s if s == "–" or s.startswith("-") else "+" + s


# ------------------------------------------------------------------------------ who was compared

MATCHED = "#009E73"
OUTSIDE = "#999999"
NO_MATCH = "#E69F00"
NOT_PICKED = "#56B4E9"
WITHHELD = "#DDDDDD"


def _is_nearest(r: StudyResults) -> bool:
    return (r.design or {}).get("groups_word") == "matched sets" or r.matching.method == "nearest_neighbour"


def sample_rows(r: StudyResults) -> list[tuple[str, str, str]]:
    """The rows of the "who was compared" table, (label, enrolled, not enrolled), in the method's
    words: strata drop units without a counterpart in their stratum; nearest neighbours leave
    enrolled units without a control in the caliper unmatched and simply do not pick most controls.
    Counts as privacy.flow_texts gives them (small ones "<10", revealing ones "–")."""
    from sqlmatch.privacy import flow_texts

    f = flow_texts(r.matching, r.min_cell_size)
    t, c = f["treated"], f["control"]
    rows = [("in the study", t["in_study"], c["in_study"])]
    if _is_nearest(r):
        rows += [
            ("matched (comparison: used as a match)", t["matched"], c["matched"]),
            ("outside the common support", t["outside_support"], c["outside_support"]),
            ("enrolled with no control within the caliper", t["no_comparable"], ""),
            ("comparison units not picked as a match", "", c["no_comparable"]),
        ]
    else:
        rows += [
            ("matched", t["matched"], c["matched"]),
            ("dropped: outside the common support", t["outside_support"], c["outside_support"]),
            ("dropped: no comparable unit in the stratum", t["no_comparable"], c["no_comparable"]),
        ]
    return rows


def flow_segments(r: StudyResults) -> tuple[dict, dict]:
    """Parts of each group for the "who was compared" bar chart: (group -> [(label, count or
    None, colour)], group -> total). Withheld counts are drawn as one grey part of their sum."""
    from sqlmatch.privacy import sample_flow

    flow = sample_flow(r.matching, r.min_cell_size)
    nearest = _is_nearest(r)
    out, totals = {}, {}
    for group, label, total in (("treated", "enrolled", r.matching.n_treated), ("control", "not enrolled", r.matching.n_control)):
        rows = flow[group]
        if nearest:
            unmatched = "no control within the caliper" if group == "treated" else "not picked as a match"
            colour = NO_MATCH if group == "treated" else NOT_PICKED
        else:
            unmatched, colour = "no comparable unit in the stratum", NO_MATCH
        parts = [("matched (comparison: used as a match)" if nearest else "matched", rows["matched"], MATCHED), ("outside the common support", rows["outside_support"], OUTSIDE), (unmatched, rows["no_comparable"], colour)]
        if rows["in_study"] is not None:
            withheld = total - sum(v for _, v, _ in parts if v is not None)
            parts.append(("not shown (small counts)", withheld, WITHHELD))
        out[label], totals[label] = parts, total
    return out, totals


def groups_sentence(r: StudyResults) -> str:
    """What the matching built, in the method's words."""
    from sqlmatch.privacy import flow_texts

    m, d = r.matching, r.design or {}
    if d.get("balancing"):
        return balancing_sentence(r)
    if _is_nearest(r):
        f = flow_texts(m, r.min_cell_size)
        k = d.get("controls_per_treated", 1)
        cal = d.get("caliper") or {}
        width = f" = {cal['width']:.3g} on the logit scale" if cal.get("width") is not None else ""
        reuse = "with replacement (a control may serve several enrolled units)" if d.get("reuse_controls", True) else "without replacement"
        return (
            f"Matched sets: each matched enrolled unit with its {k} nearest comparison unit{'s' if k != 1 else ''} within the caliper "
            f"({cal.get('sd', '?')} SD of the logit propensity score{width}), {reuse}: {counted(f['control']['matched'], 'distinct comparison units')} "
            f"serve {counted(f['treated']['matched'], 'matched enrolled units')}."
        )
    if m.effective_controls is not None:
        return weighting_sentence(m, flow_texts(m, r.min_cell_size), r.effects[0].estimand if r.effects else "att")
    return f"Strata used: {m.strata:,}; cells dropped for lacking an enrolled or a non-enrolled unit: {m.strata_dropped:,}."


def counted(cell: str, noun: str) -> str:
    """A count cell of the sample table before its noun, in a sentence: a withheld count ("–") is
    left out rather than printed as a dash, a small one reads "fewer than N"."""
    if cell == "–":
        return f"the {noun} (count withheld, see the sample table)"
    if cell.startswith("<"):
        return f"fewer than {cell[1:]} {noun}"
    return f"the {cell} {noun}"


def balancing_sentence(r: StudyResults) -> str:
    """Entropy balancing: whom the weights cover, the balance they reached and how spread they are."""
    from sqlmatch.privacy import flow_texts

    b, m = r.design["balancing"], r.matching
    f = flow_texts(m, r.min_cell_size)
    ess = f"about {m.effective_controls:,.0f}" if m.effective_controls is not None else "–"
    share = f"{100 * b['max_weight_share']:.2g}%" if b.get("max_weight_share") is not None else "–"
    return (
        f"Weighted comparison (entropy balancing; one group, no strata): {counted(f['control']['matched'], 'weighted non-enrolled units')} "
        f"have the enrolled units' means of the matching features{_added_words(b)} (largest gap left {b['max_gap_sd']:.1g} SD, after "
        f"{b['newton_steps']} Newton steps); the weighted controls count as {ess} unweighted ones (Kish's effective sample "
        f"size, (sum w)² / sum w²), and the largest weight is {share} of their total."
    )


def _added_words(b: dict) -> str:
    added = [t for t in b.get("added_terms") or [] if t["term"] not in (b.get("unreachable_terms") or [])]
    if b.get("terms") != "stepwise" or not added:
        return ""
    return f" and of the {len(added)} term{'s' if len(added) != 1 else ''} the stepwise search added"


def _weights_words(m) -> str:
    """The weights' mean and range (weighting methods), as Cole & Hernan 2008 advise reporting them."""
    if m.weight_mean is None:
        return ""
    kind = "stabilised weights" if m.stabilised_weights else "Weights"
    return f" {kind[0].upper() + kind[1:]}: mean {m.weight_mean:.3g}, from {m.weight_min:.3g} to {m.weight_max:.3g} over the weighted units."


def weighting_sentence(m, flow: dict, estimand: str = "att") -> str:
    """Weighting: the weighted groups' effective numbers of units, then the weights' mean and range."""
    # the counts as the sample table shows them: withheld there, withheld here
    treated = (
        f" and {counted(flow['treated']['matched'], 'weighted enrolled units')} as about {m.effective_treated:,.0f}"
        if estimand != "att" and m.effective_treated is not None
        else ""
    )
    return (
        f"Weighted comparison (one group, no strata): {counted(flow['control']['matched'], 'weighted non-enrolled units')} count as "
        f"about {m.effective_controls:,.0f} unweighted ones{treated} (Kish's effective sample size, (sum w)² / sum w²)."
        + _weights_words(m)
    )


def design_lines(r: StudyResults) -> list[tuple[str, str]]:
    """The study's design as (heading, text) pairs, for both reports."""
    d = r.design or {}
    w = r.windows
    out = [
        ("Treatment", f"{d.get('treatment', 'enrolment')} in {r.cohort} ({w['cohort'][0]} to {w['cohort'][1]}, exclusive); comparison pool: {d.get('control_pool', '–')}"),
        ("Pre window (features)", f"{w['pre'][0]} to {w['pre'][1]} (exclusive), {window_length(w['pre'], w['unit'])}"),
        ("Post window (outcomes)", f"{w['post'][0]} to {w['post'][1]} (exclusive), {window_length(w['post'], w['unit'])}"),
    ]
    if d.get("eligibility"):
        out.append(("Eligibility", "; ".join(d["eligibility"])))
    if d.get("features"):
        out.append(("Features", ", ".join(f"{f['name']} ({_feature_text(f)})" for f in d["features"])))
    out.append(("Method", f"{r.matching.method}: {d.get('method_description', '')}".rstrip(": ")))
    for item in d.get("matched_on", []):
        text = item["how"]
        if item.get("cut_points"):
            text += ": " + ", ".join(f"{c:g}" for c in item["cut_points"])
        out.append((f"Matched on {item['feature']}", text))
    if "caliper" in d:
        cal = d["caliper"]
        width = f" = {cal['width']:.4g} on the logit scale" if cal.get("width") is not None else ""
        out.append(("Caliper", f"{cal['sd']} SD of the logit propensity score (pooled over the groups){width}"))
        out.append(("Controls per enrolled unit", f"{d.get('ratio', 1)}, {'with' if d.get('replacement', True) else 'without'} replacement"))
    if "common_support" in d:
        out.append(("Common support", "units outside the overlap of the two groups' scores are dropped" if d["common_support"] else "not enforced"))
    p = d.get("propensity")
    if p:
        text = f"logistic regression of {d.get('treatment', 'enrolment')} on {', '.join(p['features'])}"
        if p.get("log1p"):
            text += f" (log(1 + x) of {', '.join(p['log1p'])})"
        if p.get("ridge"):
            text += f", ridge {p['ridge']:g}"
        if p.get("sample_controls", 1.0) < 1.0:
            text += f", fitted on {100 * p['sample_controls']:g}% of the comparison units"
        if p.get("terms") == "stepwise":
            added = p.get("selection") or []
            text += "; terms chosen stepwise (Imbens & Rubin 2015, 13.3; score statistic > 1 for first-order, > 2.71 for second-order terms): "
            text += ", ".join(f"{c['term']} ({c['statistic']:.1f})" for c in added) if added else "none added to the base terms"
        if p.get("coefficients"):
            text += "; coefficients: " + ", ".join(f"{c['term']} {c['coefficient']:+.3g}" for c in p["coefficients"])
            text += f" (fitted {p.get('fitted_on', '?')}, {p.get('iterations', '?')} Newton steps)"
        out.append(("Propensity model", text))
    b = d.get("balancing")
    if b:
        gaps = ", ".join(f"{x['moment']} {x['gap']:+.1g}" for x in b["moments"])
        text = f"weighted non-enrolled mean − enrolled mean: {gaps}; {b['newton_steps']} Newton steps ({b['dual_queries']} aggregate queries of the dual)"
        if b.get("terms") == "stepwise":
            added = b.get("added_terms") or []
            text += "; terms chosen stepwise (propensity.terms; Imbens & Rubin 2015, 13.3; score statistic > 1 for first-order, > 2.71 for second-order terms) and balanced beside the features: "
            text += ", ".join(f"{c['term']} ({c['statistic']:.1f})" for c in added) if added else "none added"
        if b.get("unreachable_terms"):
            text += "; added terms left out (the weights could not reach them together with the rest): " + ", ".join(b["unreachable_terms"])
        if b.get("left_out"):
            text += "; not balanced: " + "; ".join(b["left_out"])
        out.append(("Balance reached", text))
    return out


def _feature_text(f: dict) -> str:
    if f["aggregate"] == "attribute":
        return f"{'categorical ' if f.get('categorical') else ''}attribute {f.get('attribute', f['name'])}"
    return f"{f['aggregate']} of {f['measure']}" if f.get("measure") else f["aggregate"].replace("_", " ")


def provenance_text(r: StudyResults) -> str:
    p = r.provenance or {}
    if not p:
        return ""
    return (
        f"sqlmatch {p.get('sqlmatch_version')}, engine {p.get('engine')}, finished {p.get('finished_at')} "
        + (f"({p['sql_seconds']} s of SQL); " if p.get("sql_seconds") is not None else "(from the tables a scheduled run wrote); ")
        + f"spec sha256 {str(p.get('spec_sha256'))[:12]}…, plan fingerprint {str(p.get('plan_fingerprint')).replace(',', ', ')}."
    )
