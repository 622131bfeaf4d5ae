"""Coarsened exact matching (Iacus, King & Porro 2012, Political Analysis 20:1).

Numeric features are cut into bins, categorical features are kept exact; units sharing every
bin form a cell (see strata.py for strata and weights). Cut points come from the spec, or, for a
numeric feature without them, are computed in the warehouse by `matching.coarsen`: "quantiles"
(the default: `coarsen_bins` equal-count bins, 10 by default, where Cochran's 1968 table, recalled,
puts the bias removed near 96% against 90% for 5) or "sturges" (equal-width bins,
ceil(log2 n + 1) of them; Sturges 1926, JASA 21:65). A feature with no more distinct values than
bins (a 0/1 feature above all) is matched exactly by either rule. A quantile-cut feature that
keeps |SMD| > 0.1 after matching gets twice its bins (equal-count by rank), up to REFINE_ROUNDS
times, as long as the finer cells still match KEEP_SHARE of the treated; the report's design says
how many bins each feature ended with.
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlmatch.errors import SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput
from sqlmatch.spec_values import read_int
from sqlmatch.matching.strata import Axis, strata_steps

COARSEN_RULES = ("quantiles", "sturges")
DEFAULT_BINS = 10  # equal-count bins per numeric feature without cut points
REFINE_ROUNDS = 2  # a quantile-cut feature left at |SMD| > SMD_LIMIT gets 2x, then 4x its bins at most
SMD_LIMIT = 0.1  # |SMD| after matching read as balanced (common practice; Stuart 2010)
KEEP_SHARE = 0.9  # finer cells must still match this share of the treated (the report's "kept" line)
CUTS_STEP = "coarsened_exact_cuts"
OPTION_KEYS = ("cut_points", "coarsen", "coarsen_bins")

DESCRIPTION = "coarsened exact matching: strata from cut points (given, or quantile/Sturges bins computed in SQL) and exact categorical levels"


@dataclass(frozen=True)
class Coarsening:
    feature: str
    kind: str  # cuts | quantiles | sturges | exact
    cuts: tuple[float, ...] | None = None
    bins: int = 0

    @property
    def column(self) -> str:
        return f"{self.feature}__bin"


def coarsenings(spec) -> list[Coarsening]:
    m = spec.matching
    out = []
    for name in m.on:
        if spec.feature(name).categorical:
            out.append(Coarsening(name, "exact"))
        elif name in m.cut_points:
            out.append(Coarsening(name, "cuts", cuts=m.cut_points[name]))
        else:
            out.append(Coarsening(name, m.coarsen, bins=m.coarsen_bins))
    return out


def steps(ctx, model=None):
    spec = ctx.spec
    on = ", ".join(spec.matching.on)
    plan = coarsenings(spec)
    if all(c.kind in ("cuts", "exact") for c in plan):
        # every cut point is known when compiling: coarsen inline, no extra table
        axes = [Axis(c.feature, "cuts", c.cuts) if c.kind == "cuts" else Axis(c.feature, "exact") for c in plan]
        return strata_steps(ctx, axes, source="measures", title="Coarsened exact matching", cell_text=f"its coarsened features ({on})")
    quantiles = [c for c in plan if c.kind == "quantiles"]
    coarsen = ctx.table_step(
        "coarsened_exact_bins",
        "coarsened_exact_bins",
        writes="coarsened_r0" if quantiles and REFINE_ROUNDS else "coarsened",
        reads=[ctx.display("measures")],
        purpose="Coarsened exact matching: each unit's bin on every matching feature (cut points computed in SQL).",
        axes=plan,
        measures_table=ctx.table("measures"),
    )
    # computed quantile bins can leave a matched feature unbalanced: refine_steps doubles its bins
    refine = refine_steps(ctx, plan, quantiles) if quantiles and REFINE_ROUNDS else []
    axes = [Axis(c.column, "given") for c in plan]
    return [coarsen, *refine] + strata_steps(ctx, axes, source="coarsened", title="Coarsened exact matching", cell_text=f"its coarsened features ({on})") + (
        [cuts_step(ctx, quantiles)] if quantiles else []
    )


def refine_steps(ctx, plan: list[Coarsening], quantiles: list[Coarsening]) -> list:
    """REFINE_ROUNDS steps: in each, a quantile-cut feature with |SMD| > SMD_LIMIT after matching
    gets twice its bins, if the finer cells still match KEEP_SHARE of the treated units; the last
    writes <study>_coarsened."""
    out = []
    previous = "coarsened_r0"
    for r in range(1, REFINE_ROUNDS + 1):
        current = "coarsened" if r == REFINE_ROUNDS else f"coarsened_r{r}"
        out.append(
            ctx.table_step(
                f"coarsened_exact_refine_{r}",
                "coarsened_exact_refine",
                writes=current,
                reads=[ctx.display(previous), ctx.display("measures")],
                purpose=f"Coarsened exact matching, refinement {r} of {REFINE_ROUNDS}: twice the bins of a quantile-cut feature still at |SMD| > {SMD_LIMIT} after matching.",
                round=r,
                rounds=REFINE_ROUNDS,
                features=[c.feature for c in quantiles],
                columns=[c.column for c in plan],
                refinable={c.column: c.feature for c in quantiles},
                smd_limit=SMD_LIMIT,
                keep_share=KEEP_SHARE,
                estimand=ctx.spec.matching.estimand,
                previous_table=ctx.table(previous),
                measures_table=ctx.table("measures"),
            )
        )
        previous = current
    return out


def cuts_step(ctx, quantiles: list[Coarsening]):
    """One row: the number of bins each quantile-cut feature ended with (for the report)."""
    return ctx.query_step(
        CUTS_STEP,
        "coarsened_exact_cuts",
        reads=[ctx.display("coarsened")],
        purpose="Coarsened exact matching: the number of equal-count bins each feature without cut points ended with.",
        features=[c.feature for c in quantiles],
        coarsened_table=ctx.table("coarsened"),
    )


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.cut_points / coarsen / coarsen_bins."""
    names = [f.name for f in given.features]
    cuts_raw = table.get("cut_points", {})
    if not isinstance(cuts_raw, dict):
        raise SpecError("matching.cut_points", "must be a table of feature name = [cut points].")
    cut_points: dict[str, tuple[float, ...]] = {}
    for n, pts in cuts_raw.items():
        key = f"matching.cut_points.{n}"
        if n not in names:
            raise SpecError(key, f"{n!r} is not a feature.", f"use names from [[features]]: {', '.join(names)}.")
        if not isinstance(pts, list) or not pts or not all(isinstance(p, (int, float)) and not isinstance(p, bool) for p in pts):
            raise SpecError(key, "must be a non-empty list of numbers.")
        if any(b <= a for a, b in zip(pts, pts[1:])):
            raise SpecError(key, f"cut points {pts} are not strictly increasing.", "sort them and remove repeats.")
        cut_points[n] = tuple(float(p) for p in pts)
    for f in given.features:
        if f.is_missing_indicator and f.name in given.on:
            cut_points.setdefault(f.name, (0.5,))  # 0 = observed, 1 = filled: matched exactly
    coarsen = table.get("coarsen")
    if coarsen is not None and coarsen not in COARSEN_RULES:
        raise SpecError("matching.coarsen", f"must be one of {', '.join(COARSEN_RULES)}; got {coarsen!r}.")
    coarsen_bins = read_int(table, "matching", "coarsen_bins", default=DEFAULT_BINS, low=2, high=100)
    if coarsen is None:
        # a numeric feature without cut points gets equal-count cuts computed in the warehouse
        coarsen = "quantiles"
    return {"cut_points": cut_points, "coarsen": coarsen, "coarsen_bins": coarsen_bins}


METHOD = MatchingMethod(
    name="coarsened_exact",
    description=DESCRIPTION,
    steps=steps,
    uses_score=False,
    loosen="coarser cut points (matching.cut_points or matching.coarsen_bins) or fewer features in matching.on",
    option_keys=OPTION_KEYS,
    read_options=read_options,
    estimands=("att", "atc", "ate"),
)
