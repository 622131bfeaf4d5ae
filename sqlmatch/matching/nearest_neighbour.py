"""Nearest neighbours within blocks: k:1 matching on the propensity score, run entirely in SQL.

Options ([matching], our names): distance = "score" | "mahalanobis" | "rank_mahalanobis",
caliper, controls_per_treated (k), reuse_controls (with replacement), block_on (categorical
features matched exactly, shared with score_bins), max_candidate_pairs (the Mahalanobis guard).

Blocks and caliper. Units are blocked on the exact levels of `matching.block_on`. The caliper is
`matching.caliper` (default 0.2) standard deviations of the logit score, the SD pooled over the
groups, sqrt((s2_T + s2_C) / 2) (Austin 2011, Pharmaceutical Statistics 10:150, recalled; 0.2 is
common practice); for every distance a pair further apart than the caliper on the logit score is
never matched.

Distance (`matching.distance`):
  * "score": |score_t - score_c| on the logit of the propensity score. Candidates come from a sort,
    never a join of all pairs: in each block, units are numbered in score order (ties: unit key)
    and every control gets its index among the block's controls; a treated unit's k nearest
    controls are among the k just below and the k just above it (any control nearer, or as near
    and nearer in that order, lies between), found by one equality join on the index
    (`sorted_candidates` in nearest_neighbour_macros). Cost: a sort of the units and 2k rows per
    treated unit, whatever the block sizes.
  * "mahalanobis": sqrt((x_t - x_c)' S^-1 (x_t - x_c)) over the numeric features of the propensity
    model (raw values, not the model's log1p), S the covariance over all units with a score
    (treated and control together; one of the usual choices, the other being the control group's
    covariance for the effect on the treated: Stuart 2010, Statistical Science 25:1, section 2.1,
    recalled). The Cholesky factor of S's correlation matrix and its inverse are computed in SQL
    from the aggregate covariance (one row, see nearest_neighbour_whitening.sql.j2), so the plan stays one
    compiled SQL script with no number pasted in mid-run; each unit gets whitened coordinates z
    and the distance is the Euclidean distance between z's.
  * "rank_mahalanobis", the rank-based Mahalanobis distance (Rosenbaum 2010, Design of
    Observational Studies, section 8.3, recalled): each feature is replaced by its rank among all
    units with a score (ties: average rank), and the covariance of the ranks is rescaled so every
    diagonal entry is the variance of untied ranks, n (n + 1) / 12, which keeps heavily tied
    features (counts with many zeros) from counting more.
  The Mahalanobis distances have no order to sort by: candidates are every control of the treated
  unit's block in the same or an adjacent bin of the logit score one caliper wide, bin =
  CAST(FLOOR((score - lowest score) / width) AS INTEGER) (a control within the caliper is always
  there), a join whose size the guard checks first.
  Distances (and, for ranks, feature values) are compared at 10 decimal places (the score gap is
  taken between scores at 10 decimal places), so values equal in exact arithmetic tie on every
  engine whatever order it added them in.

Matching. With reuse_controls = true (default), each treated unit's match set is its k =
`matching.controls_per_treated` nearest candidates and every control as near as the k-th: the
J_M(i) of Abadie & Imbens (2006, Econometrica 74(1):235, recalled), ties included. With slots =
min(k, candidates), a control nearer than the last distance taken weighs 1 / slots and the controls
at that distance share the slots left over equally (for k = 1: 1 / #J(i), the paper's weights; for
k > 1 the paper weighs every member of J(i) 1 / #J(i), recalled, while here a tie at the k-th
distance does not dilute the nearer matches). No key, hash or row order decides which tied
control counts. On the score distance the candidates are the k groups of controls with one score
just below and the k just above the treated unit (`sorted_groups` in nearest_neighbour_macros):
each group holds at least one control, so the k nearest and all controls tied with the k-th are
among them, and a score shared by thousands of controls is one row. Without (k = 1 only),
a control serves one treated unit, so a tie cannot be shared; ties in distance go to the control
nearer in the block's score order (score distance; treated units tied in score then spread over the
controls tied with them) or to a multiplicative hash of the two units' numbers (Mahalanobis), then
the control key: the pairs do not depend on the order rows were inserted in, but may on the keys.
Greedy rounds in SQL: in
each round every treated unit and control unit both still free that are each other's nearest free
candidate are paired; each round pairs at least the closest free pair, and run to the end the
rounds give the greedy matching that takes pairs in increasing order of (distance, tiebreak,
keys). The round is one step that rewrites the table it reads; the runner repeats it until no
candidate pair is open (at most MAX_ROUNDS times; a scheduler is told so in the step's file and
manifest.json). On the score distance the rounds pick from the GREEDY_REACH controls each side in
score order; the summary counts the treated units that found every control looked at on a side
taken by others with more beyond (n_treated_cut_short): when none did, the result is the greedy
matching over every pair (the first pair where the two could differ belongs to such a unit).
Treated units still free when the rounds stop stay unmatched and are counted
(n_treated_still_open). The pairs are written to <study>_pairs(pair_id, treated_key, control_key,
distance) for paired analyses.

Weights (effect on the treated): treated 1; a control, the sum of its shares over the treated
units it serves (K_M(i) / M with ties), one row per unit and stratum. Strata group the treated
units by their number of slots (1..k); within a stratum the controls' weights may differ (ties),
so the per-stratum outcome sums are weighted (outcome_strata) and the stratified estimator equals
the matching estimator. The plan's weighted_units step sums each unit's weights for balance and plots.

Variance and bias correction (with replacement; nn_variance.py, run after <study>_weighted_units
exists): the Abadie & Imbens (2006) variance of the estimator of the population effect on the
treated, which counts how often each control is used and holds the treated units' squared
differences from their matched means, and with `matching.bias_correction` (default) the Abadie &
Imbens (2011) regression correction; all from aggregate sums in SQL (estimators/matching_variance.py). Without replacement the 1:1 pairs
get the paired-difference interval.

Guard. One aggregate query counts the pairs the Mahalanobis join would compare (from block
counts) and the treated units with a control within the caliper; the runner refuses when no
treated unit can be matched, and, for the Mahalanobis distances, when the pairs exceed
`matching.max_candidate_pairs`.
"""

from __future__ import annotations

import dataclasses
import math

from sqlmatch.errors import DataError, SpecError
from sqlmatch.matching import nn_variance
from sqlmatch.matching.base import MatchingMethod, OptionInput
from sqlmatch.spec_values import read_bool, read_choice, read_int

DESCRIPTION = (
    "nearest neighbours on the propensity score (or a Mahalanobis distance) within exact blocks and a caliper, "
    "k:1 with or without replacement"
)
MAX_ROUNDS = 500  # greedy rounds without replacement: the runner repeats one step at most this often
# Without replacement on the score: controls looked at on each side of a treated unit in score order.
# The greedy rounds over these equal the greedy matching over every pair unless a treated unit's
# controls on one side are all taken by others (the summary counts such units: n_treated_cut_short).
GREEDY_REACH = 8
PIVOT_MIN = 1e-8  # 1 - R^2 of a feature on the features before it, below which the covariance is singular


def search_route(m) -> str:
    """How candidates are found: "sorted" (the score distance: neighbours in score order, no join of
    all pairs) or "all_pairs" (Mahalanobis distances: every pair in adjacent score bins of a block,
    behind the candidate guard)."""
    return "sorted" if m.distance == "score" else "all_pairs"


def distance_features(spec) -> list[str]:
    """The numeric features of the propensity model: the coordinates of the Mahalanobis distances."""
    return [n for n in spec.propensity.features if not spec.feature(n).categorical]


def _distance_text(distance: str, features: list[str]) -> str:
    if distance == "score":
        return "the gap in the logit propensity score"
    kind = "rank-based Mahalanobis distance" if distance == "rank_mahalanobis" else "Mahalanobis distance"
    return f"the {kind} on {', '.join(features)}"


def steps(ctx, model):
    from sqlmatch import dialects, render  # render imports spec, which imports the method registry

    spec = ctx.spec
    m = spec.matching
    exact = list(m.block_on)
    features = distance_features(spec) if m.distance != "score" else []
    if m.distance != "score" and not features:
        raise SpecError(
            "matching.distance",
            f"{m.distance} needs numeric features in the propensity model; propensity.features has none.",
            "add numeric features to propensity.features, or use distance = \"score\".",
        )
    dims = len(features)
    ranks = m.distance == "rank_mahalanobis"
    text = _distance_text(m.distance, features)
    tables = {
        "scores_table": ctx.table("scores"),
        "caliper_table": ctx.table("nearest_neighbour_caliper"),
        "units_table": ctx.table("nearest_neighbour_units"),
    }
    out = [
        ctx.score_step(model, exact),
        ctx.table_step(
            "nearest_neighbour_caliper",
            "nearest_neighbour_caliper",
            writes="nearest_neighbour_caliper",
            reads=[ctx.display("scores")],
            purpose=f"Caliper: {m.caliper} pooled SDs of the logit score (also the width of the score bins).",
            caliper=m.caliper,
            scores_table=tables["scores_table"],
        ),
    ]
    if dims:
        out += [
            ctx.table_step(
                "nearest_neighbour_features",
                "nearest_neighbour_features",
                writes="nearest_neighbour_features",
                reads=[ctx.display("scores"), ctx.display("measures")],
                purpose="Features of the Mahalanobis distance" + (" as average ranks." if ranks else "."),
                features=features,
                ranks=ranks,
                scores_table=tables["scores_table"],
                measures_table=ctx.table("measures"),
            ),
            ctx.table_step(
                "nearest_neighbour_whitening",
                "nearest_neighbour_whitening",
                writes="nearest_neighbour_whitening",
                reads=[ctx.display("nearest_neighbour_features")],
                purpose="Means, scales and the inverse Cholesky factor of the features' correlation (one row).",
                features=features,
                ranks=ranks,
                features_table=ctx.table("nearest_neighbour_features"),
            ),
        ]
    search = search_route(m)
    # with replacement on the score, controls tied in score are found (and weighted) as one group
    grouped = m.reuse_controls and search == "sorted"
    unit_reads = [ctx.display("scores"), ctx.display("nearest_neighbour_caliper")] + ([ctx.display("nearest_neighbour_features"), ctx.display("nearest_neighbour_whitening")] if dims else [])
    out += [
        ctx.table_step(
            "nearest_neighbour_units",
            "nearest_neighbour_units",
            writes="nearest_neighbour_units",
            reads=unit_reads,
            purpose="Units with a score: exact block, score bin" + (" and whitened coordinates." if dims else "."),
            exact=exact,
            dims=dims,
            ranks=ranks,
            groups=grouped,
            features=features,
            features_table=ctx.table("nearest_neighbour_features") if dims else None,
            whitening_table=ctx.table("nearest_neighbour_whitening") if dims else None,
            **{k: tables[k] for k in ("scores_table", "caliper_table")},
        ),
        ctx.query_step(
            "candidate_pairs",
            "nearest_neighbour_candidate_pairs",
            reads=[ctx.display("nearest_neighbour_units"), ctx.display("nearest_neighbour_caliper")] + ([ctx.display("nearest_neighbour_whitening")] if dims else []),
            purpose="Size of the candidate join (from block counts) and treated units with a control within the caliper.",
            exact=exact,
            dims=dims,
            max_pairs=m.max_candidate_pairs,
            whitening_table=ctx.table("nearest_neighbour_whitening") if dims else None,
            **{k: tables[k] for k in ("units_table", "caliper_table")},
        ),
    ]
    common = dict(exact=exact, dims=dims, distance_text=text, search=search, units_table=tables["units_table"], caliper_table=tables["caliper_table"])
    join_reads = [ctx.display("nearest_neighbour_units"), ctx.display("nearest_neighbour_caliper")]
    looked_at = (
        "the controls just below and above each treated unit in score order"
        if search == "sorted"
        else "the controls in the same or an adjacent score bin"
    )
    if m.reuse_controls:
        out.append(
            ctx.table_step(
                "nearest_neighbour_matches",
                "nearest_neighbour_matches",
                writes="nearest_neighbour_matches",
                reads=join_reads,
                purpose=f"The {m.controls_per_treated} nearest control(s) of each treated unit within the caliper, with replacement ({looked_at}).",
                ratio=m.controls_per_treated,
                **common,
            )
        )
        matches, rounds_table = "nearest_neighbour_matches", None
    else:
        out.append(
            ctx.table_step(
                "nearest_neighbour_candidates",
                "nearest_neighbour_candidates",
                writes="nearest_neighbour_rounds",
                reads=join_reads,
                purpose=f"Candidate pairs within the caliper, with their distance ({looked_at}); none matched yet.",
                reach=GREEDY_REACH,
                **common,
            )
        )
        rounds = ctx.table("nearest_neighbour_rounds")
        check = None
        if not ctx.names_only:
            check_sql, written_in = render.render("nearest_neighbour_round_check", ctx.dialect, rounds_table=rounds)
            (parsed,) = dialects.parse(check_sql, written_in)
            check = dialects.generate(parsed, ctx.dialect)
        round_step = ctx.table_step(
            "nearest_neighbour_rounds",
            "nearest_neighbour_round",
            writes="nearest_neighbour_rounds",
            reads=[ctx.display("nearest_neighbour_rounds")],
            purpose=f"Greedy matching without replacement: one round of mutually nearest open pairs, repeated until none is open (at most {MAX_ROUNDS}).",
            rounds=MAX_ROUNDS,
            rounds_table=rounds,
        )
        out.append(dataclasses.replace(round_step, repeat_check=check, max_repeats=MAX_ROUNDS))
        out.append(
            ctx.table_step(
                "pairs",
                "nearest_neighbour_pairs",
                writes="pairs",
                reads=[ctx.display("nearest_neighbour_rounds")],
                purpose="Matched pairs (no unit in two pairs), numbered.",
                rounds_table=rounds,
            )
        )
        matches, rounds_table = "pairs", "nearest_neighbour_rounds"
        pair_outcomes = [o.name for o in ctx.spec.outcomes if o.kind != "ratio"]
        if pair_outcomes:
            out.append(
                ctx.query_step(
                    "pair_signed_rank",
                    "pair_signed_rank",
                    reads=[ctx.display("pairs"), ctx.display("measures")],
                    purpose="Within-pair differences per outcome: sums for the paired t interval, signed-rank statistic for Rosenbaum bounds.",
                    outcomes=pair_outcomes,
                    pairs_table=ctx.table("pairs"),
                    measures_table=ctx.table("measures"),
                )
            )
    out += [
        ctx.table_step(
            "match_weights",
            "nearest_neighbour_weights",
            writes="match_weights",
            reads=[ctx.display(matches)] + ([ctx.display("nearest_neighbour_units")] if grouped else []),
            purpose="Matching weights for the effect on the treated (matched units only; tied controls share).",
            ratio=m.controls_per_treated,
            mode="groups" if grouped else ("controls" if m.reuse_controls else "pairs"),
            exact=exact,
            matches_table=ctx.table(matches),
            units_table=tables["units_table"],
        ),
        ctx.query_step(
            "matching_summary",
            "nearest_neighbour_summary",
            reads=[ctx.display("nearest_neighbour_units"), ctx.display(matches), ctx.display("match_weights")] + ([ctx.display(rounds_table)] if rounds_table else []),
            purpose="Units considered and matched by nearest-neighbour matching.",
            replacement=m.reuse_controls,
            grouped=grouped,
            rounds_table=ctx.table(rounds_table) if rounds_table else None,
            weights_table=ctx.table("match_weights"),
            units_table=tables["units_table"],
            matches_table=ctx.table(matches),
        ),
    ]
    return out


def one_weight_row_per_unit(spec) -> bool:
    """With one control slot (k = 1) every matched treated unit is in stratum 1, so match_weights holds
    one row per treated unit and one per control (its shares summed over the treated units it serves,
    or its one pair): at most one row per unit, which weighted_units then joins without summing."""
    return spec.matching.controls_per_treated == 1


def check_candidates(spec, result) -> None:
    """Refuse, before the candidate join, a study that cannot or should not run it (the runner calls
    this on the result of the `candidate_pairs` step)."""
    row = result.one()
    m = spec.matching
    width = row["width"]
    if width is None or not math.isfinite(float(width)) or float(width) <= 0:
        raise DataError(
            "matching.caliper",
            f"the logit propensity score does not vary (pooled SD {row['score_sd']}), so a caliper in SDs of it is empty.",
            "check the propensity model's features (propensity.features) vary between units.",
        )
    if m.distance != "score":
        features = distance_features(spec)
        for i, name in enumerate(features, start=1):
            pivot = row[f"pivot_{i}"]
            if pivot is None:
                raise DataError(
                    "propensity.features",
                    f"feature {name!r} takes one value for every unit, so the {m.distance} distance is undefined.",
                    f"leave {name} out of propensity.features, or use distance = \"score\".",
                )
            if float(pivot) < PIVOT_MIN:
                before = ", ".join(features[: i - 1])
                raise DataError(
                    "propensity.features",
                    f"feature {name!r} is (almost) a linear combination of {before} (1 - R^2 = {float(pivot):.2g}), "
                    f"so their covariance cannot be inverted for the {m.distance} distance.",
                    f"leave {name} (or one of those features) out of propensity.features, or use distance = \"score\".",
                )
    if not row["n_treated_in_reach"]:
        block = f" in its exact block ({', '.join(m.block_on)})" if m.block_on else ""
        raise DataError(
            "matching.caliper",
            f"no treated unit has a control unit within the caliper ({m.caliper} SD of the logit score = {float(width):.4g}){block}, "
            "so nothing can be matched.",
            "widen matching.caliper" + (", or match exactly on fewer features (matching.block_on)." if m.block_on else "."),
        )
    n_pairs = int(row["n_candidate_pairs"])
    # the sorted search looks at a fixed number of controls per treated unit: no join to guard
    if search_route(m) == "all_pairs" and n_pairs > m.max_candidate_pairs:
        raise DataError(
            "matching.max_candidate_pairs",
            f"the candidate join would compare {n_pairs:,} (treated, control) pairs, more than the limit of {m.max_candidate_pairs:,}.",
            "block more finely (add categorical features to matching.block_on), use a smaller matching.caliper "
            "(narrower score bins), or raise matching.max_candidate_pairs if the warehouse can afford the join.",
        )


def warnings(spec, results) -> list[str]:
    """With replacement, say how often controls were reused (the Abadie-Imbens variance counts it).
    Without, say when the greedy rounds stopped early or may differ from the greedy matching over
    every pair."""
    if "matching_summary" not in results:
        return []
    m = results["matching_summary"].one()
    if not spec.matching.reuse_controls:
        out = []
        still_open = int(m.get("n_treated_still_open") or 0)
        if still_open:
            out.append(
                f"The greedy rounds of nearest-neighbour matching without replacement stopped with {still_open:,} enrolled units "
                f"still holding a free candidate control (at most {MAX_ROUNDS} rounds; a scheduler runs the rounds step once "
                "unless told to repeat it): they count as unmatched. Run the nearest_neighbour_rounds step again until its "
                "check returns n_open = 0 (see the step's file or manifest.json), then the steps after it, then report again."
            )
        cut = int(m.get("n_treated_cut_short") or 0)
        if cut:
            out.append(
                f"For {cut:,} enrolled units the {GREEDY_REACH} controls looked at on one side in score order were all taken by "
                "other enrolled units, so the matching may differ from the greedy matching over every pair (first for them, "
                "then for units whose controls they would have taken); with none such it is the same. With many ties in the "
                "score, add the features that tell the units apart to the propensity model, block on a categorical feature "
                "(matching.block_on) or set matching.reuse_controls = true."
            )
        return out
    return [
        f"Nearest-neighbour matching with replacement used {int(m['n_control_matched'] or 0):,} distinct controls for "
        f"{int(m['n_treated_matched'] or 0):,} matched enrolled units. The standard errors are Abadie & Imbens's (2006), "
        "which weight each control by how often it is used; the fewer distinct controls, the wider the intervals."
    ]


DISTANCES = ("score", "mahalanobis", "rank_mahalanobis")
# Names of earlier versions, refused with the name to use now.
RENAMED_DISTANCES = {"logit": "score", "robust_mahalanobis": "rank_mahalanobis"}
RENAMED_OPTIONS = {"ratio": "controls_per_treated", "replacement": "reuse_controls"}


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.distance / caliper / controls_per_treated / reuse_controls / max_candidate_pairs / bias_correction."""
    old = table.get("distance")
    if isinstance(old, str) and old in RENAMED_DISTANCES:
        new = RENAMED_DISTANCES[old]
        raise SpecError("matching.distance", f"{old!r} is now called {new!r}.", f'write distance = "{new}".')
    distance = read_choice(table, "matching", "distance", DISTANCES, default="score")
    caliper = table.get("caliper", 0.2)
    if isinstance(caliper, bool) or not isinstance(caliper, (int, float)) or not 0.0001 <= caliper <= 10:
        raise SpecError(
            "matching.caliper",
            f"must be a number of standard deviations of the logit score between 0.0001 and 10, got {caliper!r}.",
            "0.2 is common practice (Austin 2011).",
        )
    ratio = read_int(table, "matching", "controls_per_treated", default=1, low=1, high=20)
    reuse = read_bool(table, "matching", "reuse_controls", default=True)
    if not reuse and ratio != 1:
        raise SpecError(
            "matching.controls_per_treated",
            f"must be 1 when matching.reuse_controls = false, got {ratio}.",
            "set controls_per_treated = 1, or reuse_controls = true for k:1 matching.",
        )
    max_pairs = read_int(table, "matching", "max_candidate_pairs", default=50_000_000, low=1, high=10**12)
    bias_correction = read_bool(table, "matching", "bias_correction", default=True)
    return {
        "distance": distance, "caliper": float(caliper), "controls_per_treated": ratio, "reuse_controls": reuse, "max_candidate_pairs": max_pairs,
        "bias_correction": bias_correction,
    }


METHOD = MatchingMethod(
    name="nearest_neighbour",
    description=DESCRIPTION,
    steps=steps,
    uses_score=True,
    loosen="a wider matching.caliper or fewer exact features (matching.block_on)",
    option_keys=("distance", "caliper", "controls_per_treated", "reuse_controls", "max_candidate_pairs", "bias_correction"),
    renamed_options=RENAMED_OPTIONS,
    read_options=read_options,
    checks={"candidate_pairs": check_candidates},
    warnings=warnings,
    groups_word="matched sets",
    outcome_steps=nn_variance.steps,
    one_weight_row_per_unit=one_weight_row_per_unit,
)
