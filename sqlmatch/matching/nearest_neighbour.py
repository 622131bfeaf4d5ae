"""Nearest neighbours within blocks: k:1 matching on the propensity score, run entirely in SQL.

Blocks. Units are blocked on the exact levels of `matching.exact` (categorical features) and on
fine bins of the logit propensity score, bin = CAST(FLOOR((score - lowest score) / width) AS
INTEGER), where the width is the caliper: `matching.caliper` (default 0.2) standard deviations of
the logit score, the SD pooled over the groups, sqrt((s2_T + s2_C) / 2) (Austin 2011,
Pharmaceutical Statistics 10:150, recalled; 0.2 is common practice). A control within the
caliper of a treated unit is always in the treated unit's bin or an adjacent one, so candidates
for a treated unit are the controls of its exact block in bins b-1, b and b+1 that are within
the caliper.

Distance (`matching.distance`):
  * "logit": |score_t - score_c|.
  * "mahalanobis": sqrt((x_t - x_c)' S^-1 (x_t - x_c)) over the numeric features of the propensity
    model (raw values, not the model's log1p), S the covariance over all units with a score
    (treated and control together; one of the usual choices, the other being the control group's
    covariance for the effect on the treated: Stuart 2010, Statistical Science 25:1, section 2.1,
    recalled). The Cholesky factor of S's correlation matrix and its inverse are computed in SQL
    from the aggregate covariance (one row, see nearest_neighbour_whitening.sql.j2), so the plan stays one
    compiled SQL script with no number pasted in mid-run; each unit gets whitened coordinates z
    and the distance is the Euclidean distance between z's.
  * "robust_mahalanobis" (Rosenbaum 2010, Design of Observational Studies, section 8.3, recalled):
    each feature is replaced by its rank among all units with a score (ties: average rank), and
    the covariance of the ranks is rescaled so every diagonal entry is the variance of untied
    ranks, n (n + 1) / 12, which keeps heavily tied features (counts with many zeros) from
    counting more.
  For every distance the caliper applies to the logit score: a pair further apart than the
  caliper on the score is never matched. Distances (and, for ranks, feature values) are compared
  at 10 decimal places, so values equal in exact arithmetic tie on every engine whatever order
  it added them in, and the unit key breaks the tie.

Matching. With replacement (default), each treated unit takes its `matching.ratio` (= k) nearest
candidates: ROW_NUMBER() OVER (PARTITION BY treated unit ORDER BY distance, control key) <= k.
Without replacement (ratio 1 only), greedy rounds in SQL: in each round every treated unit and
control unit both still free that are each other's nearest free candidate are paired (ties by
unit key); each round pairs at least the closest free pair, and run to the end the rounds give
the greedy matching that takes pairs in increasing order of (distance, treated key, control key).
The rounds are MAX_ROUNDS steps of the plan, each reading only the pairs still open; treated
units still free after the last round stay unmatched and are counted (n_treated_still_open in
the summary). The pairs are written to <study>_pairs(pair_id, treated_key, control_key,
distance) for paired analyses.

Weights (effect on the treated): treated 1; a control, 1 / (number of controls matched to that
treated unit) in each match, one row per (treated unit, control) match, so a control serving
several treated units has several rows and the stratified estimator equals the matching
estimator. Strata group the treated units by their number of controls (1..k); the plan's
weighted_units step sums each unit's weights for balance and plots.

Guard. Before the candidate join one aggregate query counts the pairs the join will compare
(from block counts) and the treated units with a control within the caliper; the runner refuses
when the pairs exceed `matching.max_candidate_pairs` or when no treated unit can be matched.
"""

from __future__ import annotations

import math

from sqlmatch.errors import DataError, SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput
from sqlmatch.spec_values import read_bool, read_choice, read_int

DESCRIPTION = (
    "nearest neighbours on the propensity score (or a Mahalanobis distance) within exact blocks and a caliper, "
    "k:1 with or without replacement"
)
MAX_ROUNDS = 50  # greedy rounds without replacement, each a step of the plan (the demo at 30,000 riders needs 34)
PIVOT_MIN = 1e-8  # 1 - R^2 of a feature on the features before it, below which the covariance is singular


def distance_features(spec) -> list[str]:
    """The numeric features of the propensity model: the coordinates of the Mahalanobis distances."""
    return [n for n in spec.propensity.features if not spec.feature(n).categorical]


def _distance_text(distance: str, features: list[str]) -> str:
    if distance == "logit":
        return "the gap in the logit propensity score"
    kind = "robust (rank-based) Mahalanobis distance" if distance == "robust_mahalanobis" else "Mahalanobis distance"
    return f"the {kind} on {', '.join(features)}"


def steps(ctx, model):
    spec = ctx.spec
    m = spec.matching
    exact = list(m.exact)
    features = distance_features(spec) if m.distance != "logit" else []
    if m.distance != "logit" and not features:
        raise SpecError(
            "matching.distance",
            f"{m.distance} needs numeric features in the propensity model; propensity.features has none.",
            "add numeric features to propensity.features, or use distance = \"logit\".",
        )
    dims = len(features)
    ranks = m.distance == "robust_mahalanobis"
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
    common = dict(exact=exact, dims=dims, distance_text=text, units_table=tables["units_table"], caliper_table=tables["caliper_table"])
    join_reads = [ctx.display("nearest_neighbour_units"), ctx.display("nearest_neighbour_caliper")]
    if m.replacement:
        out.append(
            ctx.table_step(
                "nearest_neighbour_matches",
                "nearest_neighbour_matches",
                writes="nearest_neighbour_matches",
                reads=join_reads,
                purpose=f"The {m.ratio} nearest control(s) of each treated unit within the caliper, with replacement.",
                ratio=m.ratio,
                **common,
            )
        )
        matches, rounds_table = "nearest_neighbour_matches", None
    else:
        out.append(
            ctx.table_step(
                "nearest_neighbour_candidates",
                "nearest_neighbour_candidates",
                writes="nearest_neighbour_candidates",
                reads=join_reads,
                purpose="Candidate pairs within the caliper, with their distance.",
                **common,
            )
        )
        previous = None
        for r in range(1, MAX_ROUNDS + 1):
            # two tables, written in turn: round r reads what round r - 1 wrote
            current = "nearest_neighbour_round_a" if r % 2 else "nearest_neighbour_round_b"
            out.append(
                ctx.table_step(
                    f"nearest_neighbour_round_{r:02d}",
                    "nearest_neighbour_round",
                    writes=current,
                    reads=[ctx.display(previous) if previous else ctx.display("nearest_neighbour_candidates")],
                    purpose=f"Greedy matching without replacement, round {r} of {MAX_ROUNDS}: mutually nearest free pairs.",
                    round=r,
                    rounds=MAX_ROUNDS,
                    candidates_table=ctx.table("nearest_neighbour_candidates"),
                    previous_table=ctx.table(previous) if previous else None,
                )
            )
            previous = current
        out.append(
            ctx.table_step(
                "pairs",
                "nearest_neighbour_pairs",
                writes="pairs",
                reads=[ctx.display(previous)],
                purpose="Matched pairs (no unit in two pairs), numbered.",
                rounds=MAX_ROUNDS,
                rounds_table=ctx.table(previous),
            )
        )
        matches, rounds_table = "pairs", previous
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
            reads=[ctx.display(matches)],
            purpose="Matching weights for the effect on the treated (matched units only).",
            ratio=m.ratio,
            matches_table=ctx.table(matches),
        ),
        ctx.query_step(
            "matching_summary",
            "nearest_neighbour_summary",
            reads=[ctx.display("nearest_neighbour_units"), ctx.display(matches), ctx.display("match_weights")] + ([ctx.display(rounds_table)] if rounds_table else []),
            purpose="Units considered and matched by nearest-neighbour matching.",
            replacement=m.replacement,
            rounds_table=ctx.table(rounds_table) if rounds_table else None,
            weights_table=ctx.table("match_weights"),
            units_table=tables["units_table"],
            matches_table=ctx.table(matches),
        ),
    ]
    return out


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
    if m.distance != "logit":
        features = distance_features(spec)
        for i, name in enumerate(features, start=1):
            pivot = row[f"pivot_{i}"]
            if pivot is None:
                raise DataError(
                    "propensity.features",
                    f"feature {name!r} takes one value for every unit, so the {m.distance} distance is undefined.",
                    f"leave {name} out of propensity.features, or use distance = \"logit\".",
                )
            if float(pivot) < PIVOT_MIN:
                before = ", ".join(features[: i - 1])
                raise DataError(
                    "propensity.features",
                    f"feature {name!r} is (almost) a linear combination of {before} (1 - R^2 = {float(pivot):.2g}), "
                    f"so their covariance cannot be inverted for the {m.distance} distance.",
                    f"leave {name} (or one of those features) out of propensity.features, or use distance = \"logit\".",
                )
    if not row["n_treated_in_reach"]:
        block = f" in its exact block ({', '.join(m.exact)})" if m.exact else ""
        raise DataError(
            "matching.caliper",
            f"no treated unit has a control unit within the caliper ({m.caliper} SD of the logit score = {float(width):.4g}){block}, "
            "so nothing can be matched.",
            "widen matching.caliper" + (", or match exactly on fewer features (matching.exact)." if m.exact else "."),
        )
    n_pairs = int(row["n_candidate_pairs"])
    if n_pairs > m.max_candidate_pairs:
        raise DataError(
            "matching.max_candidate_pairs",
            f"the candidate join would compare {n_pairs:,} (treated, control) pairs, more than the limit of {m.max_candidate_pairs:,}.",
            "block more finely (add categorical features to matching.exact), use a smaller matching.caliper "
            "(narrower score bins), or raise matching.max_candidate_pairs if the warehouse can afford the join.",
        )


def warnings(spec, results) -> list[str]:
    """With replacement, say how often controls were reused: the variance treats each use as a new control."""
    if not spec.matching.replacement or "matching_summary" not in results:
        return []
    m = results["matching_summary"].one()
    return [
        f"Nearest-neighbour matching with replacement used {int(m['n_control_matched'] or 0):,} distinct controls for "
        f"{int(m['n_treated_matched'] or 0):,} matched enrolled units. The standard errors treat a reused control as if it "
        "were a new one, so they are too small when controls are reused often (Abadie & Imbens 2006 give a variance "
        "that accounts for reuse); read the intervals as too narrow, or match without replacement."
    ]


DISTANCES = ("logit", "mahalanobis", "robust_mahalanobis")


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.distance / caliper / ratio / replacement / max_candidate_pairs."""
    distance = read_choice(table, "matching", "distance", DISTANCES, default="logit")
    caliper = table.get("caliper", 0.2)
    if isinstance(caliper, bool) or not isinstance(caliper, (int, float)) or not 0.0001 <= caliper <= 10:
        raise SpecError(
            "matching.caliper",
            f"must be a number of standard deviations of the logit score between 0.0001 and 10, got {caliper!r}.",
            "0.2 is common practice (Austin 2011).",
        )
    ratio = read_int(table, "matching", "ratio", default=1, low=1, high=20)
    replacement = read_bool(table, "matching", "replacement", default=True)
    if not replacement and ratio != 1:
        raise SpecError("matching.ratio", f"must be 1 when matching.replacement = false, got {ratio}.", "set ratio = 1, or replacement = true for k:1 matching.")
    max_pairs = read_int(table, "matching", "max_candidate_pairs", default=50_000_000, low=1, high=10**12)
    return {"distance": distance, "caliper": float(caliper), "ratio": ratio, "replacement": replacement, "max_candidate_pairs": max_pairs}


METHOD = MatchingMethod(
    name="nearest_neighbour",
    description=DESCRIPTION,
    steps=steps,
    uses_score=True,
    loosen="a wider matching.caliper or fewer exact features (matching.exact)",
    option_keys=("distance", "caliper", "ratio", "replacement", "max_candidate_pairs"),
    read_options=read_options,
    checks={"candidate_pairs": check_candidates},
    warnings=warnings,
    groups_word="matched sets",
)
