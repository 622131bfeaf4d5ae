"""Propensity-score weighting (inverse probability weights; odds weights for the effect on the treated).

From the fitted propensity model's score e, for the effect on the enrolled (ATT, the default)
treated units weigh 1 and a control its odds of enrolment e / (1 - e) = exp(logit score), so the
weighted controls have the treated units' feature distribution; on the not enrolled (ATC) treated
(1 - e) / e and controls 1; on everyone (ATE) treated 1 / e and controls 1 / (1 - e) (Hirano,
Imbens & Ridder 2003, Econometrica 71:1161; Imbens & Rubin 2015, ch. 12; recalled). Each group's
weighted mean is normalised by its weights' sum. All units form one stratum. Options (names ours):

  * matching.estimand = "att" | "atc" | "ate" (common to the methods that weight; spec.py reads it).

  * matching.score_margin = a: units whose score e lies outside [a, 1 - a] are not weighted
    (trimming; 0.1 is the rule of thumb of Crump et al. 2009, Biometrika 96:187, recalled; off by
    default). matching.common_support (true by default) also drops units outside the overlap of
    the two groups' scores, as for score_bins.
  * matching.weight_cap_quantile = q: weights above their q-quantile among the weighted units of
    their group are set to it (truncation; off by default; under ATT only the controls' vary).
  * matching.stabilised_weights = true: each group's weights times its share p of the weighted
    units (ATE: treated p / e, control (1 - p) / (1 - e); Robins, Hernan & Brumback 2000,
    Epidemiology 11:550), so they average about 1; a constant per group, so the normalised means,
    the effect and its variance do not change. The summary reports the weights' mean and range.

With effect.regression_adjustment = true the headline of a count, sum or 0/1 outcome is the doubly
robust effect (estimators/weighting.doubly_robust_effect), from the weighting_adjustment_<k> sums.
[[subgroups]] add one weighting_subgroup_<name> query: the sandwich sums per level.

The effect and its variance come from one aggregate query (score_weighting_sandwich): the
sandwich variance of the stacked estimating equations of the logit model and the weighted means
(M-estimation; Lunceford & Davidian 2004, Statistics in Medicine 23:2937), so the uncertainty of
the estimated score is counted (estimators/weighting.py). The trimming and truncation limits are
taken as fixed in that variance. The summary reports each group's effective number of units
(Kish 1965: (sum w)^2 / sum w^2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from sqlmatch.errors import SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput

DESCRIPTION = "propensity-score weighting (odds weights for the effect on the treated; or on the controls, or everyone), sandwich variance"
OPTION_KEYS = ("score_margin", "weight_cap_quantile", "stabilised_weights")
TARGETS = {"att": "enrolled", "atc": "not_enrolled", "ate": "everyone"}  # matching.estimand -> the templates' words


@dataclass(frozen=True)
class Term:
    """One estimand of the sandwich query: a weighted mean of u (or ratio of u to v)."""

    key: str  # column prefix: the outcome's name, or <outcome>__did
    u: str
    v: str | None = None  # denominator column of a ratio outcome
    minus: str | None = None  # subtracted from u (the pre-window twin, for the difference-in-differences)


def terms(spec) -> list[Term]:
    from sqlmatch.plan import measure_columns

    out = []
    for o in measure_columns(spec)[1]:
        if o.kind == "ratio":
            out.append(Term(o.name, o.num, o.den))
        else:
            out.append(Term(o.name, o.name))
            if o.twin:
                out.append(Term(f"{o.name}__did", o.name, minus=o.twin))
    return out


def steps(ctx, model):
    from sqlmatch.propensity import ETA_CLAMP

    spec = ctx.spec
    m = spec.matching
    check_full_fit(spec)
    margin_logit = None if m.score_margin == 0 else math.log((1.0 - m.score_margin) / m.score_margin)
    effect_for = TARGETS[m.estimand]
    limits = dict(
        common_support=m.common_support, margin_logit=margin_logit, margin=m.score_margin, cap_quantile=m.weight_cap_quantile, effect_for=effect_for, clamp=ETA_CLAMP,
        stabilised=m.stabilised_weights,
    )
    # the three work tables the weighting steps read (the templates name them so)
    tables = dict(weighted_table=ctx.table("weighted_units"), scores_table=ctx.table("scores"), limits_table=ctx.table("weighting_limits"))
    cap_text = f", weights truncated at their group's {m.weight_cap_quantile} quantile" if m.weight_cap_quantile is not None else ""
    weights_text = {
        "enrolled": "for the effect on the treated (treated 1, control e / (1 - e))",
        "not_enrolled": "for the effect on the controls (treated (1 - e) / e, control 1)",
        "everyone": "for the average effect (treated 1 / e, control 1 / (1 - e))",
    }[effect_for]
    margin_text = f", units with a score outside [{m.score_margin}, {1 - m.score_margin}] left out" if margin_logit is not None else ""
    if m.stabilised_weights:
        margin_text += ", stabilised (each group's weights times its marginal share, so they average about 1)"
    out = [
        ctx.score_step(model, []),
        ctx.table_step(
            "score_weighting_limits",
            "score_weighting_limits",
            writes="weighting_limits",
            reads=[ctx.display("scores")],
            purpose="Common support of the logit scores" + (" and the caps on the weights" if cap_text else "") + (" and the stabilised weights' factors." if m.stabilised_weights else "."),
            scores_table=ctx.table("scores"),
            **limits,
        ),
        ctx.table_step(
            "weighted_units",
            "score_weighting_weights",
            writes="weighted_units",
            reads=[ctx.display("measures"), ctx.display("scores"), ctx.display("weighting_limits")],
            purpose=f"Propensity-score weights {weights_text}{cap_text}{margin_text}, beside every unit's features and outcomes.",
            columns=ctx.weighted_columns(),
            measures_table=ctx.table("measures"),
            scores_table=ctx.table("scores"),
            limits_table=ctx.table("weighting_limits"),
            **limits,
        ),
        ctx.query_step(
            "matching_summary",
            "score_weighting_summary",
            reads=[ctx.display("weighted_units"), ctx.display("scores"), ctx.display("weighting_limits")],
            purpose="Units weighted per group, and each group's weights' sum, sum of squares and range (effective numbers of units).",
            **tables,
            **limits,
        ),
    ]
    design = [] if model is None else model.columns
    out += sandwich_steps(
        ctx,
        "weighting_sandwich",
        purpose="Sums for the weighted effect on the treated and its sandwich variance, which counts the estimated propensity score (one row).",
        columns=design,
        terms=terms(spec),
        level=None,
        tables=tables,
        limits=limits,
    )
    if spec.regression_adjustment and model is not None:
        chunks = adjustment_sums(model.columns, terms(spec))
        for k, chunk in enumerate(chunks, 1):
            out.append(
                ctx.query_step(
                    f"weighting_adjustment_{k}",
                    "score_weighting_adjustment",
                    reads=[ctx.display("weighted_units"), ctx.display("scores")],
                    purpose=f"Sums for the doubly robust effect (weighted regression adjustment) and its sandwich variance, part {k} of {len(chunks)} (one row).",
                    columns=model.columns,
                    terms=terms(spec),
                    sums=chunk,
                    part=k,
                    parts=len(chunks),
                    **tables,
                    **limits,
                )
            )
    from sqlmatch.plan import subgroup_level, subgroup_text

    for g in spec.subgroups:
        # each level's weighted means and their sandwich sums (the plain weighted effect per level)
        out += sandwich_steps(
            ctx,
            f"weighting_subgroup_{g.name}",
            purpose=f"Sums for the weighted effect and its sandwich variance per level of subgroup {g.name!r} ({subgroup_text(g)}).",
            columns=design,
            terms=terms(spec),
            level=subgroup_level(g),
            tables=tables,
            limits=limits,
        )
    return out


@dataclass(frozen=True)
class SandwichSum:
    """One sum of score_weighting_sandwich: an entry (i, j) of the information (what = h) or of the
    score's products (rr), or for term k (its column prefix `key`) and group t / c a weighted sum
    of u, v and their products (v, u, uu, uv, vv), or of them times x_j (ru, rv, du, dv)."""

    what: str
    i: int | None = None
    j: int | None = None
    k: int | None = None
    key: str = ""
    group: str = ""


def sandwich_sums(columns, study_terms) -> list[SandwichSum]:
    """Every sum of the sandwich query in its order (columns.weighting, information, score_products)."""
    from sqlmatch import columns as col

    out = []
    for i, j in col.upper_pairs(len(columns)):
        out += [SandwichSum("h", i, j), SandwichSum("rr", i, j)]
    for k, o in enumerate(study_terms):
        for g in ("t", "c"):
            out += [SandwichSum(w, k=k, key=o.key, group=g) for w in ("v", "u", "uu", "uv", "vv")]
            for j in range(len(columns)):
                out += [SandwichSum(w, j=j, k=k, key=o.key, group=g) for w in ("ru", "rv", "du", "dv")]
    return out


def sandwich_steps(ctx, name: str, purpose: str, columns, terms, level, tables: dict, limits: dict) -> list:
    """The sandwich query (one row, or a row per subgroup level), split into parts of at most
    columns.MAX_SUMS_PER_QUERY entries; every part repeats the subgroup level, part 1 has n_units."""
    from sqlmatch.columns import split_sums

    keyed = 1 if level else 0
    parts = split_sums(sandwich_sums(columns, terms), first_fixed=1 + keyed, later_fixed=keyed)
    return ctx.query_parts(
        name,
        "score_weighting_sandwich",
        reads=[ctx.display("weighted_units"), ctx.display("scores")],
        purpose=purpose,
        parts=[dict(sums=part, head=k == 1, part=k) for k, part in enumerate(parts, 1)],
        n_parts=len(parts),
        columns=columns,
        terms=terms,
        adjust=False,
        level=level,
        **tables,
        **limits,
    )


@dataclass(frozen=True)
class AdjustmentSum:
    """One sum of score_weighting_adjustment: SUM(share * weight * left * x_j)."""

    column: str
    share: str  # t | c | "" (every unit)
    weight: str  # a | aa | ar | g | s | sr
    left: str  # x<i> or u<k>
    j: int


def adjustment_sums(columns, study_terms) -> list[list[AdjustmentSum]]:
    """The doubly robust effect's sums (estimators/weighting.AdjustmentSums), in chunks of at most
    columns.MAX_SUMS_PER_QUERY: per group the four weighted x x' matrices, over the target units two, and per
    mean outcome a u x and a^2 u x per group (ratio outcomes and the difference-in-differences keep
    the plain weighted effect)."""
    from sqlmatch import columns as col

    p = len(columns)
    out = []
    for i, j in col.upper_pairs(p):
        for g in ("t", "c"):
            out += [AdjustmentSum(col.weighting_cross(g + w, i, j), g, w, f"x{i}", j) for w in ("a", "aa", "ar", "g")]
        out += [AdjustmentSum(col.weighting_cross(w, i, j), "", w, f"x{i}", j) for w in ("s", "sr")]
    for k, o in enumerate(study_terms):
        if o.v or o.minus:
            continue
        for g in ("t", "c"):
            for w, what in (("a", "au"), ("aa", "aau")):
                out += [AdjustmentSum(col.weighting(o.key, g, what, j), g, w, f"u{k}", j) for j in range(p)]
    return col.split_sums(out)


def check_full_fit(spec, result=None) -> None:
    """Refuse what weighting does not support: a fit on sampled controls (the sandwich counts the
    uncertainty of a fit on every unit). Also run on the first aggregate step (group_sizes), so a
    run stops before the pass over the events."""
    if spec.propensity.sample_controls < 1.0:
        raise SpecError(
            "propensity.sample_controls",
            "score_weighting needs the propensity model fitted on every unit: its variance counts the fit's uncertainty, "
            "which a fit on sampled controls changes.",
            "remove propensity.sample_controls (or set it to 1) for score_weighting, or use another matching.method.",
        )


def _read_share(table: dict, name: str, low: float, high: float, hint: str):
    value = table.get(name)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not low < value < high:
        raise SpecError(f"matching.{name}", f"must be a number strictly between {low} and {high}, got {value!r}.", hint)
    return float(value)


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.score_margin / weight_cap_quantile / stabilised_weights."""
    from sqlmatch.spec_values import read_bool

    margin = _read_share(table, "score_margin", 0.0, 0.5, "e.g. score_margin = 0.05 leaves out units with a score below 0.05 or above 0.95.")
    cap = _read_share(table, "weight_cap_quantile", 0.5, 1.0, "e.g. weight_cap_quantile = 0.99 truncates the largest 1% of control weights.")
    stabilised = read_bool(table, "matching", "stabilised_weights", default=False)
    return {"score_margin": margin or 0.0, "weight_cap_quantile": cap, "stabilised_weights": stabilised}


def warnings(spec, results) -> list[str]:
    """Say when a few units carry most of a group's weight."""
    from sqlmatch.estimators.weighting import kish_effective_size

    if "matching_summary" not in results:
        return []
    row = results["matching_summary"].one()
    out = []
    for group, words in (("control", "non-enrolled"), ("treated", "enrolled")):
        ess = kish_effective_size(row.get(f"{group}_weight_sum"), row.get(f"{group}_weight_sumsq"))
        n = int(row.get(f"n_{group}_matched") or 0)
        if ess is None or n == 0 or ess >= 0.1 * n:  # a tenth: a threshold of ours
            continue
        out.append(
            f"Propensity-score weighting: the weighted {words} units count as about {ess:,.0f} unweighted ones (Kish's "
            f"effective sample size), under a tenth of those weighted: a few units carry most of the weight, so the "
            "estimate leans on them. Consider matching.weight_cap_quantile (e.g. 0.99) or matching.score_margin."
        )
    return out


METHOD = MatchingMethod(
    name="score_weighting",
    description=DESCRIPTION,
    steps=steps,
    uses_score=True,
    loosen="matching.common_support = false, or a smaller matching.score_margin",
    option_keys=OPTION_KEYS,
    read_options=read_options,
    checks={"group_sizes": check_full_fit},
    warnings=warnings,
    estimands=("att", "atc", "ate"),
    adjustable=False,
    groups_word="weighted comparison",
)
