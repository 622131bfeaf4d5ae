"""Effects from a run's aggregates: per outcome the effect on the treated and its interval, the
naive comparison, relative lift, risk ratio, difference-in-differences and the sensitivity
figures, assembled into StudyResults. Pure: no database; the estimators live in estimators/."""

from __future__ import annotations

import math

import numpy as np

from sqlmatch.columns import stat
from sqlmatch import aggregates
from sqlmatch.design import provenance, study_design
from sqlmatch.diagnostics import run_warnings
from sqlmatch.estimators.adjusted import adjusted_att, adjusted_ratio
from sqlmatch.matching import method_for
from sqlmatch.estimators.att import lift_from_ratio_se, relative_lift, stratified_att, stratum_weights
from sqlmatch.estimators.binary import risk_ratio
from sqlmatch.estimators.intervals import normal_interval
from sqlmatch.estimators.matching_variance import MatchingInference
from sqlmatch.matching.nn_variance import BIAS_STEP, PAIR_STEP, bias_features, variable_numbers
from sqlmatch.matching.nn_variance import STEP as MATCHING_VARIANCE
from sqlmatch.estimators.ratio import ratio_effect
from sqlmatch.estimators.regression import wls_from_moments
from sqlmatch.plan import L1_BINS, Plan
from sqlmatch.results import Effect, Interval, MatchingSummary, StudyResults
from sqlmatch.runner import RunOutput
from sqlmatch.sensitivity import e_value, e_value_continuous, plain_words, robustness_value, rosenbaum_from_signed_rank
from sqlmatch.spec import Spec
from sqlmatch.subgroups import subgroup_effects


def study_results(spec: Spec, plan: Plan, output: RunOutput) -> StudyResults:
    """Balance and effects from the aggregates of one run (pure: no database)."""
    r = output.results
    summary = r["matching_summary"].one()
    # Units per group left in the study (after units with a NULL attribute under missing = "drop")
    sizes = {int(g["treated"]): int(g["n_units"]) - int(g.get("n_dropped") or 0) for g in r["group_sizes"].records()}
    in_cells_t, in_cells_c = int(summary["n_treated"] or 0), int(summary["n_control"] or 0)
    matching = MatchingSummary(
        method=spec.matching.method,
        n_treated=sizes.get(1, 0),
        n_treated_matched=int(summary["n_treated_matched"] or 0),
        n_control=sizes.get(0, 0),
        n_control_matched=int(summary["n_control_matched"] or 0),
        strata=int(summary["n_strata"]),
        strata_dropped=int(summary["n_cells_dropped"]),
        n_treated_outside_support=sizes.get(1, 0) - in_cells_t,
        n_control_outside_support=sizes.get(0, 0) - in_cells_c,
        effective_controls=_kish(summary, "control"),
        effective_treated=_kish(summary, "treated"),
        **_weight_range(summary, spec.matching.stabilised_weights),
    )
    balance = aggregates.numeric_balance(r["balance_numeric"], [f.name for f in spec.numeric_features])
    if "balance_levels" in r:
        balance += aggregates.level_balance(r["balance_levels"])
    numeric = [f.name for f in spec.numeric_features]
    nn = None
    if MATCHING_VARIANCE in r:
        with_bias = BIAS_STEP in r
        nn = MatchingInference(
            r[MATCHING_VARIANCE], r[BIAS_STEP] if with_bias else None, variable_numbers(plan.outcomes), len(bias_features(spec)) if with_bias else 0, r.get(PAIR_STEP)
        )
    # score_weighting: the weighted effect and its sandwich variance replace the per-stratum one
    weighting = None
    if "weighting_sandwich" in r:
        row = dict(r["weighting_sandwich"].one())
        for name in sorted(k for k in r if k.startswith("weighting_adjustment_")):  # the doubly robust sums, in parts
            row.update(r[name].one())
        weighting = (row, spec.propensity.ridge, spec.regression_adjustment, output.model)
    if "balancing_sandwich" in r:  # entropy balancing: its own stacked equations, the same fields
        weighting = (r["balancing_sandwich"].one(), 0.0, False, None, True)
    effects = [
        outcome_effect(
            o, r["outcome_strata"], r["outcome_unmatched"], r.get("outcome_regression"), numeric, spec.matching.method,
            r.get("pair_signed_rank"), spec.treatment_words, adjust=_adjust(spec), nn=nn, estimand=spec.matching.estimand, weighting=weighting,
            adjustment=(spec.adjustment_slopes, spec.adjustment_terms),
        )
        for o in plan.outcomes
    ]
    l1 = r["imbalance_l1"].one()
    imbalance = {
        "l1_before": float(l1["l1_before"]),
        "l1_after": float(l1["l1_after"]),
        "histogram": f"{L1_BINS} equal-width bins per numeric matching feature x categorical levels ({int(l1['n_cells'])} cells)",
    }
    w = spec.windows
    return StudyResults(
        study=spec.name,
        cohort=spec.cohort,
        dialect=plan.dialect,
        windows={
            "unit": w.unit,
            "pre": [w.pre_start.isoformat(), w.cohort_start.isoformat()],
            "cohort": [w.cohort_start.isoformat(), w.cohort_end.isoformat()],
            "post": [w.post_start.isoformat(), w.post_end.isoformat()],
        },
        matching=matching,
        balance=balance,
        effects=effects,
        rows_fetched=output.rows_fetched,
        min_cell_size=spec.min_cell_size,
        imbalance=imbalance,
        histograms=aggregates.histograms(r),
        warnings=run_warnings(spec, r, balance, output.model, matching),
        timings=output.timings,
        design=study_design(spec, r, output.model),
        provenance=provenance(spec, plan.dialect, output.timings),
        subgroups=subgroup_effects(spec, plan.outcomes, r),
    )


AI_TEXT = ", Abadie-Imbens variance (counts control reuse)"
# Regression adjustment by default only where its coverage was measured (the stratum methods,
# benchmarks/RESULTS_calibration_stratum.md); elsewhere only when [effect] asks for it.
ADJUSTED_BY_DEFAULT = ("coarsened_exact", "score_bins")


def _adjust(spec) -> bool:
    if spec.regression_adjustment is None:
        return spec.matching.method in ADJUSTED_BY_DEFAULT
    return spec.regression_adjustment


BIAS_TEXT = ", bias-corrected by the controls' regression on the features (Abadie-Imbens 2011)"


# The adjusted effect stays beside the headline, not in it, when its standard error is more than
# this many times the plain comparison's: the within-stratum regressions then predict far from the
# units they were fitted on (cells so fine that the features hardly vary inside them), and the
# prediction is mostly the slopes' error. Our own guard (no published rule); measured: the demo with
# cut points every 3 units on every feature (20,000 riders) gave an adjusted post_trips of 111.7
# (SE 48.0) against a plain 4.82 (SE 0.24); in the calibration runs of
# benchmarks/RESULTS_calibration_adjustment_groups.md the ratio was at most 1.17.
EXTRAPOLATION_RATIO = 3.0
EXTRAPOLATION_TEXT = " (the regression-adjusted effect, kept as `adjusted`, is not the headline: its standard error was over 3 times this one, the within-stratum regressions extrapolating)"


def _extrapolates(adjusted_se, plain_se) -> bool:
    if adjusted_se is None or plain_se is None or not (plain_se > 0):
        return adjusted_se is None
    return adjusted_se > EXTRAPOLATION_RATIO * plain_se


def _adjusted_headline(fields: dict, extra: dict, a, how: str) -> None:
    """Make the regression-adjusted figure `a` the headline, the plain one kept as `unadjusted`,
    unless its SE says the within-stratum regressions extrapolate (the plain one stays, and says so)."""
    if _extrapolates(a.std_error, fields["std_error"]):
        fields["estimator"] += EXTRAPOLATION_TEXT
        return
    extra["unadjusted"] = _interval(fields["estimate"], fields["std_error"], fields["ci_low"], fields["ci_high"])
    fields.update(estimator=f"{fields['estimator']}, {how}", estimate=a.estimate, std_error=a.std_error, ci_low=a.ci_low, ci_high=a.ci_high)


def _with_matching_variance(fields: dict, mv) -> None:
    """Replace the two-sample standard error and interval by the matching-aware ones."""
    se = mv.std_error
    se = se if math.isfinite(se) else None
    lo, hi = normal_interval(fields["estimate"], se)
    fields.update(std_error=se, ci_low=lo, ci_high=hi)


def outcome_effect(
    outcome, matched, unmatched, regression=None, features=(), method: str = "", pair_ranks=None, treatment_words: str = "enrolment",
    adjust: bool = False, nn: MatchingInference | None = None, estimand: str = "att", weighting=None, adjustment: tuple[str, str] = ("group", "linear"),
) -> Effect:
    """One outcome's effect, relative lift, risk ratio (binary), difference-in-differences (an
    outcome with a pre-window twin) and sensitivity figures, all from aggregates. With
    `nn` (nearest neighbours with replacement) the effect's variance is the Abadie-Imbens one
    (estimators/matching_variance.py) instead of the two-sample one, and the effect bias-corrected
    when the run has the correction's sums."""
    rr = None
    extra: dict = {}
    if outcome.kind == "ratio":
        t_sums, c_sums = aggregates.ratio_sums(matched, outcome.name)
        m = ratio_effect(t_sums, c_sums, weights=stratum_weights(t_sums.n, c_sums.n, estimand), singleton="pool")
        n = ratio_effect(*aggregates.ratio_sums(unmatched, outcome.name), singleton="pool")
        fields = dict(
            estimator="ratio of weighted sums, delta-method variance",
            estimate=m.estimate,
            std_error=m.std_error,
            ci_low=m.ci_low,
            ci_high=m.ci_high,
            n_treated=int(t_sums.n.sum()),
            n_control=int(c_sums.n.sum()),
            mean_treated=m.treated.estimate,
            mean_control=m.control.estimate,
        )
        # Lift R_1 / R_0 - 1, interval on the log scale (estimators/ratio.py).
        extra.update(lift=_interval(m.lift, m.lift_std_error, m.lift_ci_low, m.lift_ci_high))
        if features and nn is None and weighting is None and (not method or method_for(method).adjustable) and adjustment[0] == "group":
            # numerator and denominator adjusted by each group's within-stratum regression, then
            # their ratio, delta-method variance (estimators/adjusted.py, adjusted_ratio)
            terms = adjustment[1]
            adj = adjusted_ratio(*aggregates.ratio_cell_sums(matched, outcome.name, list(features), terms), aggregates.term_names(list(features), terms), estimand=estimand)
            extra.update(adjusted=_interval(adj.estimate, adj.std_error, adj.ci_low, adj.ci_high), adjusted_for=adj.adjusted_for)
            if adjust:
                _adjusted_headline(fields, extra, adj, f"numerator and denominator adjusted by a within-stratum regression on {', '.join(adj.adjusted_for) or 'no feature'}")
        if nn is not None:
            keep = (t_sums.n > 0) & (c_sums.n > 0)
            w = t_sums.n[keep] / t_sums.n[keep].sum()
            ybar0 = float(np.sum(w * c_sums.sum_y[keep] / c_sums.n[keep]))
            xbars = (float(np.sum(w * t_sums.sum_x[keep] / t_sums.n[keep])), float(np.sum(w * c_sums.sum_x[keep] / c_sums.n[keep])))
            r1, r0 = m.treated.estimate, m.control.estimate
            dy, dx = nn.shift(f"{outcome.name}__num"), nn.shift(f"{outcome.name}__den")
            r0_bc = r0
            if math.isfinite(dy) and math.isfinite(dx) and xbars[1] + dx > 0:
                # the controls' mean numerator and denominator, each corrected, then their ratio
                r0_bc = (ybar0 + dy) / (xbars[1] + dx)
                fields.update(estimate=r1 - r0_bc, mean_control=r0_bc)
                fields["estimator"] += BIAS_TEXT
            # linearised ratios u = (y - R x) / xbar per group (the uncorrected R: the correction is of smaller order)
            num, den = f"{outcome.name}__num", f"{outcome.name}__den"
            mv = nn.variance({1: {num: 1.0 / xbars[0], den: -r1 / xbars[0]}, 0: {num: 1.0 / xbars[1], den: -r0 / xbars[1]}})
            _with_matching_variance(fields, mv)
            fields["estimator"] += AI_TEXT
            # the lift R1 / R0 - 1 linearised as (R1 - rho R0) / R0: its matching variance counts the
            # dependence of the two means (the same controls serve many treated units)
            rho = r1 / r0_bc if r0_bc else math.nan
            lv = nn.variance({1: {num: 1.0 / (xbars[0] * r0_bc), den: -r1 / (xbars[0] * r0_bc)}, 0: {num: rho / (xbars[1] * r0_bc), den: -rho * r0 / (xbars[1] * r0_bc)}}) if r0_bc else None
            lift = lift_from_ratio_se(r1, r0_bc, lv.std_error if lv is not None else math.nan)
            extra.update(lift=_interval(lift.estimate, lift.std_error, lift.ci_low, lift.ci_high))
    else:
        t_mom, c_mom = aggregates.outcome_moments(matched, outcome.name)
        m = stratified_att(t_mom, c_mom, estimand=estimand)
        n = stratified_att(*aggregates.outcome_moments(unmatched, outcome.name))
        fields = dict(
            estimator="stratified difference in means" + (" (risk difference)" if outcome.kind == "binary" else ""),
            estimate=m.estimate,
            std_error=m.std_error,
            ci_low=m.ci_low,
            ci_high=m.ci_high,
            n_treated=m.n_treated,
            n_control=m.n_control,
            mean_treated=m.mean_treated,
            mean_control=m.mean_control,
        )
        if pair_ranks is not None and stat(outcome.name, "sum_d") in pair_ranks.columns:
            # 1:1 pairs: the paired-difference t interval (the pairs are not independent samples)
            from sqlmatch.estimators.pairs import paired_difference

            row = pair_ranks.one()
            pd_ = paired_difference(int(row["n_pairs"]), float(row[stat(outcome.name, "sum_d")]), float(row[stat(outcome.name, "sum_d2")]))
            fields.update(
                estimator="mean within-pair difference, paired t interval" + (" (risk difference)" if outcome.kind == "binary" else ""),
                estimate=pd_.estimate,
                std_error=pd_.std_error,
                ci_low=pd_.ci_low,
                ci_high=pd_.ci_high,
            )
        mv = nn.variance({1: {outcome.name: 1.0}, 0: {outcome.name: 1.0}}) if nn is not None else None
        mean_control = m.mean_control
        if nn is not None:
            shift = nn.shift(outcome.name)
            if math.isfinite(shift):
                mean_control = m.mean_control + shift
                fields.update(estimate=m.estimate - shift, mean_control=mean_control)
                fields["estimator"] += BIAS_TEXT
        if mv is not None:
            _with_matching_variance(fields, mv)
            fields["estimator"] += AI_TEXT
        if outcome.kind == "binary":
            # Events per stratum and group are the sums of the 0/1 outcome; ATT stratum weights
            # n_1s / n_1 over the strata holding both groups (estimators/binary.py).
            keep = (t_mom.n > 0) & (c_mom.n > 0)
            rr = risk_ratio(t_mom.total[keep], t_mom.n[keep], c_mom.total[keep], c_mom.n[keep], weights=stratum_weights(t_mom.n[keep], c_mom.n[keep], estimand))
            extra.update(
                risk_ratio=_interval(rr.estimate, rr.std_error, rr.ci_low, rr.ci_high),
                lift=_interval(rr.lift, rr.std_error, rr.lift_ci_low, rr.lift_ci_high),
            )
        else:
            if mv is not None and mean_control:
                # m1 / m0 - 1 linearised as (m1 - rho m0) / m0, its matching variance (the means are dependent)
                rho = m.mean_treated / mean_control
                lv = nn.variance({1: {outcome.name: 1.0 / mean_control}, 0: {outcome.name: rho / mean_control}})
                lift = lift_from_ratio_se(m.mean_treated, mean_control, lv.std_error)
            else:
                lift = relative_lift(m.mean_treated, m.var_mean_treated, mean_control, m.var_mean_control)
            extra.update(lift=_interval(lift.estimate, lift.std_error, lift.ci_low, lift.ci_high))
        if features and nn is None and (not method or method_for(method).adjustable):
            # regression adjustment within strata on the numeric features (estimators/adjusted.py);
            # nearest neighbours with replacement have the Abadie-Imbens correction instead, whose
            # variance counts control reuse (the stratified one here would not)
            slopes, terms = adjustment
            adj = adjusted_att(
                *aggregates.cell_sums(matched, outcome.name, list(features), terms), aggregates.term_names(list(features), terms), estimand=estimand, slopes=slopes,
            )
            a = adj.effect
            extra.update(adjusted=_interval(a.estimate, a.std_error, a.ci_low, a.ci_high), adjusted_for=adj.adjusted_for)
            if adjust:
                _adjusted_headline(fields, extra, a, f"adjusted by a within-stratum regression on {', '.join(adj.adjusted_for) or 'no feature'}")
        if getattr(outcome, "twin", None):
            # Difference-in-differences on the matched sample: the same stratified estimator
            # applied to (outcome - twin), per-stratum sums from the outcome_strata query.
            did = stratified_att(*aggregates.outcome_moments(matched, outcome.name, "did"), estimand=estimand)
            did_est, did_se, did_lo, did_hi = did.estimate, did.std_error, did.ci_low, did.ci_high
            if nn is not None and math.isfinite(nn.shift(f"{outcome.name}__did")):
                did_est = did.estimate - nn.shift(f"{outcome.name}__did")
            if nn is not None:
                key = f"{outcome.name}__did"
                did_se = nn.variance({1: {key: 1.0}, 0: {key: 1.0}}).std_error
                did_se = did_se if math.isfinite(did_se) else None
                did_lo, did_hi = normal_interval(did_est, did_se)
            extra.update(did_twin=outcome.twin, did=_interval(did_est, did_se, did_lo, did_hi))
    if weighting is not None:
        fields, extra, rr = _weighted_fields(outcome, fields, extra, *weighting, estimand=estimand)
    sensitivity = outcome_sensitivity(outcome, fields, rr, regression, list(features), method, pair_ranks, treatment_words)
    return Effect(
        outcome=outcome.name,
        kind=outcome.kind,
        estimand=estimand,
        **fields,
        naive=_interval(n.estimate, n.std_error, n.ci_low, n.ci_high),
        **extra,
        sensitivity=sensitivity,
    )


def _kish(summary: dict, group: str) -> float | None:
    """Kish's effective number of units of a group, from a summary that returns their weights' sum
    and sum of squares (score_weighting's)."""
    from sqlmatch.estimators.weighting import kish_effective_size

    return kish_effective_size(summary.get(f"{group}_weight_sum"), summary.get(f"{group}_weight_sumsq"))


def _weight_range(summary: dict, stabilised: bool) -> dict:
    """The weights' mean and range over every weighted unit, from a summary that returns each
    group's weights' sum, minimum and maximum (score_weighting's); empty for other methods."""
    if summary.get("treated_weight_sum") is None or summary.get("control_weight_sum") is None:
        return {}
    n = int(summary["n_treated_matched"] or 0) + int(summary["n_control_matched"] or 0)
    if n == 0:
        return {}
    total = float(summary["treated_weight_sum"]) + float(summary["control_weight_sum"])
    return dict(
        weight_mean=total / n,
        weight_min=min(float(summary["treated_weight_min"]), float(summary["control_weight_min"])),
        weight_max=max(float(summary["treated_weight_max"]), float(summary["control_weight_max"])),
        stabilised_weights=stabilised,
    )


def _weighted_fields(outcome, fields: dict, extra: dict, row: dict, ridge: float, adjust: bool = False, model=None, balancing: bool = False, estimand: str = "att"):
    """Propensity-score weighting: the weighted difference (of means, or of ratios) with the
    sandwich variance that counts the estimated score (estimators/weighting.py); the lift (and a
    binary outcome's risk ratio) from the same covariance of the two weighted means. With
    effect.regression_adjustment the headline of a count, sum or 0/1 outcome is the doubly robust
    one (weighted regression adjustment), the plain weighted difference kept as `unadjusted`."""
    from types import SimpleNamespace

    from sqlmatch.estimators.weighting import adjustment_sums_from_row, doubly_robust_effect, sums_from_row, weighted_effect

    what = "ratios" if outcome.kind == "ratio" else "means"
    if balancing:  # entropy balancing (matching/entropy_balancing.py)
        from sqlmatch.matching.entropy_balancing import effect_of

        effect = effect_of(row)
        words = f"entropy-balancing weighted difference in {what}, sandwich variance counting the estimated weights and targets"
    else:
        effect = lambda key: weighted_effect(sums_from_row(row, key), ridge)  # noqa: E731
        words = f"propensity-weighted difference in {what}, sandwich variance counting the estimated score"
    w = effect(outcome.name)
    fields = dict(
        fields,
        estimator=words + (" (risk difference)" if outcome.kind == "binary" else ""),
        estimate=w.estimate,
        std_error=w.std_error,
        ci_low=w.ci_low,
        ci_high=w.ci_high,
        mean_treated=w.mean_treated,
        mean_control=w.mean_control,
    )
    ratio, ratio_se, lo, hi = w.ratio()
    lift = _interval(ratio - 1.0, ratio_se, None if lo is None else lo - 1.0, None if hi is None else hi - 1.0)
    extra = dict(extra, lift=lift)
    rr = None
    if outcome.kind == "binary":
        rr = SimpleNamespace(estimate=ratio, std_error=ratio_se, ci_low=lo, ci_high=hi)
        extra["risk_ratio"] = _interval(ratio, ratio_se, lo, hi)
    if extra.get("did_twin"):
        did = effect(f"{outcome.name}__did")
        extra["did"] = _interval(did.estimate, did.std_error, did.ci_low, did.ci_high)
    adj = adjustment_sums_from_row(row, outcome.name) if adjust and outcome.kind != "ratio" else None
    if adj is not None:
        dr = doubly_robust_effect(sums_from_row(row, outcome.name), adj, estimand, ridge)
        names = tuple(c.name for c in model.columns if c.kind != "intercept") if model is not None else ()
        extra.update(
            adjusted=_interval(dr.estimate, dr.std_error, dr.ci_low, dr.ci_high),
            adjusted_for=names,
            unadjusted=_interval(fields["estimate"], fields["std_error"], fields["ci_low"], fields["ci_high"]),
        )
        fields.update(
            estimator=f"{fields['estimator']}, doubly robust: adjusted by a weighted regression on the score model's columns in each group, sandwich variance at the fitted slopes",
            estimate=dr.estimate,
            std_error=dr.std_error,
            ci_low=dr.ci_low,
            ci_high=dr.ci_high,
            mean_treated=dr.mean_treated,
            mean_control=dr.mean_control,
        )
    return fields, extra, rr


def _interval(estimate, std_error, ci_low, ci_high) -> Interval:
    return Interval(*(_finite(x) for x in (estimate, std_error, ci_low, ci_high)))


def _finite(x):
    if isinstance(x, float) and not math.isfinite(x):
        return None
    return x


def outcome_sensitivity(outcome, fields: dict, rr, regression, features: list[str], method: str, pair_ranks, treatment_words: str = "enrolment") -> dict:
    """E-value, robustness value and (when the method gives 1:1 pairs) Rosenbaum bounds."""
    out: dict = {}
    words: list[str] = []
    reg = fit = None
    rv_reason = None
    if regression is None:
        rv_reason = "the run has no outcome_regression step"
    else:
        try:
            reg = aggregates.regression_sums(regression, outcome.name, outcome.kind, features)
            fit = wls_from_moments(reg.xtx, reg.xty, reg.yty, reg.n, reg.names)
        except (ValueError, KeyError, np.linalg.LinAlgError) as err:
            rv_reason = f"the weighted regression could not be fitted ({err})"
            reg = reg if reg is not None and reg.n > 0 else None

    # E-value (VanderWeele & Ding 2017). Binary outcomes: the risk ratio and its interval.
    # Continuous and ratio outcomes: RR ~= exp(0.91 d), d = effect / SD, where SD is the pooled
    # SD sqrt((s2_1 + s2_0) / 2) of the outcome among the matched units, each group's variance
    # weighted by the matching weights (reliability-weight form, as in the balance table; ratio
    # outcomes: the linearised value z of outcome_regression, whose group means are the ratios).
    ev = None
    sd = None
    if outcome.kind == "binary":
        if rr is not None and all(math.isfinite(x) and x > 0 for x in (rr.estimate, rr.ci_low, rr.ci_high)):
            ev = e_value(rr.estimate, rr.ci_low, rr.ci_high)
            out["e_value_basis"] = "risk ratio"
    elif reg is not None:
        v1, v0 = reg.treated.variance, reg.control.variance
        sd = math.sqrt((v1 + v0) / 2.0) if math.isfinite(v1 + v0) else math.nan
        se = fields["std_error"]
        if sd > 0 and se is not None and math.isfinite(se):
            ev = e_value_continuous(fields["estimate"], se, sd)
            out["e_value_basis"] = "RR ~= exp(0.91 d), d = effect / pooled SD of the outcome in the matched sample"
    out["e_value"] = ev.point if ev else None
    out["e_value_ci"] = ev.ci if ev else None
    out["e_value_rr"] = ev.rr if ev else None
    out["e_value_sd"] = sd if ev and sd is not None else None
    if ev:
        words.append(plain_words(ev, treatment=treatment_words, outcome=outcome.name))

    # Robustness value (Cinelli & Hazlett 2020) of the treatment coefficient of the weighted
    # regression of the outcome on treatment and the numeric features (matched units, matching
    # weights as analytic weights); categorical features are not in that regression. A ratio
    # outcome enters linearised (z = R_g + (y - R_g x) / xbar_g; Cochran 1977 §6.3, Woodruff 1971,
    # recalled), so its coefficient is about the headline R_1 - R_0, not the effect on units' own ratios.
    rv = None
    if fit is not None and "treated" in fit.names and math.isfinite(fit.t("treated")) and fit.df > 1:
        rv = robustness_value(fit.t("treated"), fit.df)
    elif fit is not None and rv_reason is None:
        rv_reason = "the treatment coefficient of the weighted regression is not estimable"
    out["robustness_value"] = rv.rv_q if rv else None
    out["robustness_value_alpha"] = rv.rv_q_alpha if rv else None
    out["partial_r2"] = rv.partial_r2 if rv else None
    out["t_statistic"] = rv.t_stat if rv else None
    out["df"] = int(fit.df) if rv else None
    out["regression_estimate"] = fit.coef("treated") if rv else None
    out["regression_std_error"] = fit.se("treated") if rv else None
    out["regression_units"] = int(fit.n) if rv else None
    out["adjusted_for"] = [f for f in fit.names if f not in ("intercept", "treated")] if rv else []
    if rv:
        words.append(plain_words(rv, treatment=treatment_words, outcome=outcome.name))
    else:
        out["robustness_reason"] = rv_reason

    # Rosenbaum bounds need 1:1 matched pairs and their signed-rank aggregates (a `pair_signed_rank`
    # query with <outcome>__t_plus, __n_nonzero, __tie_term); stratum-based methods have none.
    scan = None
    if pair_ranks is not None and stat(outcome.name, "t_plus") in pair_ranks.columns:
        row = pair_ranks.one()
        n_nonzero = int(row[stat(outcome.name, "n_nonzero")] or 0)
        if n_nonzero > 0:
            alternative = "greater" if fields["estimate"] >= 0 else "less"
            scan = rosenbaum_from_signed_rank(
                float(row[stat(outcome.name, "t_plus")]), n_nonzero, float(row[stat(outcome.name, "tie_term")] or 0.0), alternative=alternative
            )
    if scan is not None:
        out["rosenbaum"] = {
            "alpha": scan.alpha,
            "alternative": scan.alternative,
            "gamma_at_alpha": scan.gamma_at_alpha,
            "first_gamma_above_alpha": scan.first_gamma_above_alpha,
            "gamma_max": scan.gamma_max,
            "p_upper_at_gamma_1": scan.rows[0].p_upper,
        }
        words.append(plain_words(scan, treatment=treatment_words, outcome=outcome.name))
    else:
        out["rosenbaum"] = None
        out["rosenbaum_reason"] = (
            f"They need 1:1 matched pairs and the signed-rank aggregates of their differences; this run's method "
            f"({method or 'unknown'}) returned none."
            if pair_ranks is None
            else "no matched pair differs in this outcome, so there is no signed-rank statistic to bound."
        )
    out["sentence"] = " ".join(words) if words else None
    return out
