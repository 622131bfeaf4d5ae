"""Subclassification on the propensity score (Rosenbaum & Rubin 1984, JASA 79:516; five
subclasses remove about 90% of the bias of a covariate, Cochran 1968, Biometrics 24:295).

Scores are on the logit scale. The number of subclasses is chosen from the data by default
(`matching.bins` not given): starting from one subclass, every subclass whose treated and
control units still differ on the score or on a numeric feature of the propensity model
(|t| > 1.96) is split at its median while each half keeps
3 treated, 3 control units and (features + 2) units (Imbens & Rubin 2015, Causal Inference for
Statistics, Social, and Biomedical Sciences, ch. 17, recalled), for at most BLOCK_ROUNDS rounds.
Differences under 1.96 per subclass can share a sign and add up (measured on the commuter
simulation: pooled t of pre_trips +1.3 to +2.8 with every subclass at |t| <= 1.96), so while the
pooled ATT-weighted difference on a variable exceeds 1.96 of its SE, every subclass whose
difference has the same sign is split too;
a fixed `matching.bins` puts boundaries at quantiles of the treated units' scores (Cochran's five
leave about 10% of a covariate's bias). Optionally the subclasses are crossed with exact levels of
categorical features, and units outside the common support are dropped first. Strata and
weights: see strata.py.
"""

from __future__ import annotations

from sqlmatch.errors import SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput
from sqlmatch.spec_values import read_int
from sqlmatch.matching.strata import Axis, strata_steps

DESCRIPTION = "subclassification on the propensity score (logit scale), subclasses split until the score is balanced within each"
BLOCK_ROUNDS = 8  # splitting rounds, each a step of the plan: at most 2^8 = 256 subclasses
T_MAX = 1.96  # split while |t| of the score difference exceeds this (Imbens & Rubin 2015, recalled)
MIN_GROUP = 3  # treated and control units each half of a split keeps (Imbens & Rubin 2015, recalled)


def block_steps(ctx, exact: list[str]) -> list:
    """Subclasses chosen from the data: BLOCK_ROUNDS steps, each splitting the subclasses still
    unbalanced on the score; the last writes <study>_score_strata."""
    spec = ctx.spec
    features = [n for n in spec.propensity.features if not spec.feature(n).categorical]
    out = []
    previous = None
    for r in range(1, BLOCK_ROUNDS + 1):
        current = "score_strata" if r == BLOCK_ROUNDS else ("score_blocks_a" if r % 2 else "score_blocks_b")
        out.append(
            ctx.table_step(
                f"score_blocks_{r:02d}",
                "score_blocks",
                writes=current,
                reads=[ctx.display(previous) if previous else ctx.display("scores")],
                purpose=f"Score subclasses from the data, round {r} of {BLOCK_ROUNDS}: split each subclass still unbalanced on the score at its median.",
                round=r,
                rounds=BLOCK_ROUNDS,
                t_max=T_MAX,
                min_group=MIN_GROUP,
                min_units=len(spec.propensity.features) + 2,
                exact=exact,
                features=features,
                common_support=spec.matching.common_support,
                scores_table=ctx.table("scores"),
                measures_table=ctx.table("measures"),
                previous_table=ctx.table(previous) if previous else None,
            )
        )
        previous = current
    return out


def steps(ctx, model):
    spec = ctx.spec
    m = spec.matching
    exact = list(m.block_on)
    if m.bins is None:
        out = [ctx.score_step(model, exact)] + block_steps(ctx, exact)
        axes = [Axis(feature="score_bin", kind="given")] + [Axis(feature=f, kind="exact") for f in exact]
        text = "its propensity-score subclass (split until balanced on the score)" + (f" and its levels of {', '.join(exact)}" if exact else "")
        return out + strata_steps(ctx, axes, source="score_strata", title="Propensity-score subclassification", cell_text=text)
    out = [
        ctx.score_step(model, exact),
        ctx.table_step(
            "score_edges",
            "score_edges",
            writes="score_edges",
            reads=[ctx.display("scores")],
            purpose=f"Boundaries of {m.bins} score subclasses at quantiles of the treated units' scores.",
            bins=m.bins,
            scores_table=ctx.table("scores"),
        ),
        ctx.table_step(
            "score_strata",
            "score_strata",
            writes="score_strata",
            reads=[ctx.display("scores"), ctx.display("score_edges")],
            purpose="Score subclass of every unit" + (" inside the common support." if m.common_support else "."),
            bins=m.bins,
            exact=exact,
            common_support=m.common_support,
            scores_table=ctx.table("scores"),
            edges_table=ctx.table("score_edges"),
        ),
    ]
    axes = [Axis(feature="score_bin", kind="given")] + [Axis(feature=f, kind="exact") for f in exact]
    text = f"its propensity-score subclass (1 of {m.bins})" + (f" and its levels of {', '.join(exact)}" if exact else "")
    out += strata_steps(ctx, axes, source="score_strata", title="Propensity-score subclassification", cell_text=text)
    return out


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.bins: the number of score subclasses at treated-score quantiles; not given (or
    "auto"): chosen from the data by splitting until the score and features are balanced."""
    if "bins" not in table or table["bins"] == "auto":
        return {"bins": None}
    bins = read_int(table, "matching", "bins", default=5, low=2, high=50)
    if not 5 <= bins <= 50:
        raise SpecError(
            "matching.bins",
            f"must be between 5 and 50, or \"auto\", got {bins}.",
            "leave it out (or write \"auto\") to split subclasses until the score is balanced in each; 5 subclasses leave about 10% of a covariate's bias (Cochran 1968).",
        )
    return {"bins": bins}


METHOD = MatchingMethod(
    name="score_bins",
    description=DESCRIPTION,
    steps=steps,
    uses_score=True,
    loosen="fewer exact features (matching.block_on) or fewer matching.bins",
    option_keys=("bins",),
    read_options=read_options,
    estimands=("att", "atc", "ate"),
)
