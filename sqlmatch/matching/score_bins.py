"""Subclassification on the propensity score (Rosenbaum & Rubin 1984, JASA 79:516; five
subclasses remove about 90% of the bias of a covariate, Cochran 1968, Biometrics 24:295).

Scores are on the logit scale; subclass boundaries are quantiles of the treated units' scores;
optionally the subclasses are crossed with exact levels of categorical features, and units
outside the common support are dropped first. Strata and weights: see strata.py.
"""

from __future__ import annotations

from sqlmatch.errors import SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput
from sqlmatch.spec_values import read_int
from sqlmatch.matching.strata import Axis, strata_steps

DESCRIPTION = "subclassification on the propensity score (logit scale), boundaries at treated-score quantiles"


def steps(ctx, model):
    spec = ctx.spec
    m = spec.matching
    exact = list(m.exact)
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
    """matching.bins: the number of score subclasses."""
    bins = read_int(table, "matching", "bins", default=5, low=2, high=50)
    if "bins" in table and not 5 <= bins <= 50:
        raise SpecError("matching.bins", f"must be between 5 and 50, got {bins}.", "5 subclasses remove most of the bias (Cochran 1968); use more for large samples.")
    return {"bins": bins}


METHOD = MatchingMethod(
    name="score_bins",
    description=DESCRIPTION,
    steps=steps,
    uses_score=True,
    loosen="fewer exact features (matching.exact) or fewer matching.bins",
    option_keys=("bins",),
    read_options=read_options,
    estimands=("att", "atc", "ate"),
)
