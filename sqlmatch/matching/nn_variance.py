"""Nearest-neighbour matching with replacement: the plan step whose sums give the Abadie & Imbens
(2006, Econometrica 74(1):235) variance of the effect on the treated, which counts how often each
control is used (see sql_templates/nearest_neighbour_variance.sql.j2 and
estimators/matching_variance.py). It reads only <study>_scores and <study>_weighted_units, so it
does not depend on how the matches were found."""

from __future__ import annotations

from dataclasses import dataclass

STEP = "matching_variance"
BIAS_STEP = "bias_sums"


@dataclass(frozen=True)
class Variable:
    """A per-unit quantity whose neighbour difference the step takes: a column, or column - minus."""

    column: str
    minus: str | None = None


@dataclass(frozen=True)
class Product:
    """Sums of d_a d_b / 2 over units, named <key>__w2_dd and <key>__dd (a, b: 1-based variable numbers)."""

    key: str
    a: int
    b: int


def variable_numbers(outcomes) -> dict[str, int]:
    """The 1-based number of each quantity in variables(): `<outcome>` (continuous, binary),
    `<outcome>__did`, `<outcome>__num` and `<outcome>__den` (ratio)."""
    out, k = {}, 0
    for o in outcomes:
        keys = [f"{o.name}__num", f"{o.name}__den"] if o.kind == "ratio" else [o.name] + ([f"{o.name}__did"] if o.twin else [])
        for key in keys:
            k += 1
            out[key] = k
    return out


def variables(outcomes) -> tuple[list[Variable], list[Product]]:
    """Per outcome: its column (continuous, binary), outcome - twin for the difference-in-differences,
    and for a ratio outcome its numerator and denominator with their three cross-products (the
    ratio's linearised variance combines them with the ratio, estimators/matching_variance.py)."""
    vs: list[Variable] = []
    ps: list[Product] = []

    def add(v: Variable) -> int:
        vs.append(v)
        return len(vs)

    for o in outcomes:
        if o.kind == "ratio":
            a, b = add(Variable(o.num)), add(Variable(o.den))
            ps += [Product(f"{o.name}__yy", a, a), Product(f"{o.name}__xy", a, b), Product(f"{o.name}__xx", b, b)]
        else:
            a = add(Variable(o.name))
            ps.append(Product(o.name, a, a))
            if o.twin:
                b = add(Variable(o.name, o.twin))
                ps.append(Product(f"{o.name}__did", b, b))
    return vs, ps


def bias_features(spec) -> list[str]:
    """The covariates of the bias correction's regression: the numeric features of the propensity model."""
    return [n for n in spec.propensity.features if not spec.feature(n).categorical]


def steps(ctx, outcomes) -> list:
    """The variance step, with replacement only: without replacement the 1:1 pairs get the paired
    interval (every control is used at most once)."""
    m = ctx.spec.matching
    if not m.replacement:
        return []
    vs, ps = variables(outcomes)
    out = []
    features = bias_features(ctx.spec)
    if getattr(m, "bias_correction", True) and features:
        out.append(
            ctx.query_step(
                BIAS_STEP,
                "nearest_neighbour_bias_sums",
                reads=[ctx.display("weighted_units")],
                purpose="Abadie-Imbens bias correction: weighted sums and cross-products of the features and outcomes per group among matched units.",
                features=features,
                variables=vs,
                weighted_table=ctx.table("weighted_units"),
            )
        )
    return out + [
        ctx.query_step(
            STEP,
            "nearest_neighbour_variance",
            reads=[ctx.display("scores"), ctx.display("weighted_units")],
            purpose="Abadie-Imbens variance sums: squared matching weights (times each control is used) times conditional "
            "variances estimated by matching each unit to its nearest unit of the same group.",
            exact=list(m.exact),
            variables=vs,
            products=ps,
            scores_table=ctx.table("scores"),
            weighted_table=ctx.table("weighted_units"),
        )
    ]
