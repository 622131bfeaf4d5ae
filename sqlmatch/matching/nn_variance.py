"""Nearest-neighbour matching with replacement: the plan steps whose sums give the Abadie & Imbens
(2006, Econometrica 74(1):235, section 4) variance of the estimator of the population effect on the
treated, which counts how often each control is used (see sql_templates/nearest_neighbour_variance.sql.j2,
nearest_neighbour_pair_sums.sql.j2 and estimators/matching_variance.py). `matching_variance` reads
the units with a score (on the score distance, the grouped search, from <study>_nearest_neighbour_units
and its score_compared; otherwise from <study>_scores), <study>_weighted_units and the matches table
(each control's sum of squared shares); it groups the units into tie sets (group, block, score) and
sorts those, not the units. `pair_sums` reads the matches table and <study>_weighted_units for each
treated unit's matched mean. Neither holds a row per (treated, control) pair on the score distance
(_nearest_neighbour_links.sql.j2). Both return a fixed number of rows (two, one)."""

from __future__ import annotations

from dataclasses import dataclass

from sqlmatch import columns

STEP = "matching_variance"
BIAS_STEP = "bias_sums"
PAIR_STEP = "pair_sums"


@dataclass(frozen=True)
class Variable:
    """A per-unit quantity whose neighbour difference the step takes: a column, or column - minus."""

    column: str
    minus: str | None = None


@dataclass(frozen=True)
class Product:
    """Sums of d_a d_b / 2 over units, named p<a>_<b>__w2_dd and p<a>_<b>__dd (a <= b: 1-based variable numbers)."""

    a: int
    b: int

    @property
    def key(self) -> str:
        return product_key(self.a, self.b)


@dataclass(frozen=True)
class PairSum:
    """One product sum of the pair_sums step: sum over the treated of <left><a> * <right><b>, with
    left, right = t (the unit's own value) or c (its matches' mean); named <key>__<left><right>."""

    key: str
    a: int
    b: int
    left: str
    right: str


def pair_sums(products) -> list[PairSum]:
    return [PairSum(q.key, q.a, q.b, kind[0], kind[1]) for q in products for kind in ("tt", "tc", "ct", "cc")]


def product_key(a: int, b: int) -> str:
    return f"p{min(a, b)}_{max(a, b)}"


def variable_numbers(outcomes) -> dict[str, int]:
    """The 1-based number of each outcome quantity in variables(): `<outcome>` (continuous,
    binary), `<outcome>__did`, `<outcome>__num` and `<outcome>__den` (ratio)."""
    out, k = {}, 0
    for o in outcomes:
        keys = [f"{o.name}__num", f"{o.name}__den"] if o.kind == "ratio" else [o.name] + ([f"{o.name}__did"] if o.twin else [])
        for key in keys:
            k += 1
            out[key] = k
    return out


def variables(outcomes, features=()) -> tuple[list[Variable], list[Product]]:
    """The outcome quantities (variable_numbers' order: an outcome's column, outcome - twin for the
    difference-in-differences, a ratio's numerator and denominator), then the features; and the
    products whose neighbour-difference sums the variance needs: each outcome quantity with itself,
    a ratio's numerator with its denominator and, with features (the bias correction's), each
    quantity with each feature and the features with each other, so the variance can be taken of
    the regression residual (estimators/matching_variance.py)."""
    vs: list[Variable] = []
    ps: list[Product] = []
    for o in outcomes:
        if o.kind == "ratio":
            vs += [Variable(o.num), Variable(o.den)]
            a = len(vs) - 1
            ps += [Product(a, a), Product(a, a + 1), Product(a + 1, a + 1)]
        else:
            vs.append(Variable(o.name))
            ps.append(Product(len(vs), len(vs)))
            if o.twin:
                vs.append(Variable(o.name, o.twin))
                ps.append(Product(len(vs), len(vs)))
    n_out = len(vs)
    vs += [Variable(f) for f in features]
    xs = range(n_out + 1, len(vs) + 1)
    ps += [Product(a, j) for a in range(1, n_out + 1) for j in xs] + [Product(j, k) for j in xs for k in xs if j <= k]
    return vs, ps


def bias_features(spec) -> list[str]:
    """The covariates of the bias correction's regression: every numeric feature of the study (as
    in the outcome regression), so features left out of the score still adjust the effect."""
    return [f.name for f in spec.numeric_features]


def steps(ctx, outcomes) -> list:
    """The variance step, with replacement only: without replacement the 1:1 pairs get the paired
    interval (every control is used at most once)."""
    m = ctx.spec.matching
    if not m.reuse_controls:
        return []
    features = bias_features(ctx.spec) if m.bias_correction else []
    vs, ps = variables(outcomes, features)
    out = []
    if features:
        out.append(
            ctx.query_step(
                BIAS_STEP,
                "nearest_neighbour_bias_sums",
                reads=[ctx.display("weighted_units")],
                purpose="Abadie-Imbens bias correction: weighted sums and cross-products of the features and outcomes per group among matched units.",
                features=features,
                variables=vs[: len(vs) - len(features)],
                weighted_table=ctx.table("weighted_units"),
            )
        )
    from sqlmatch.matching import nearest_neighbour  # imports this module

    # the grouped search (with replacement on the score) stored an integer score order with the units
    ranked = nearest_neighbour.search_route(m) == "sorted"
    links = dict(
        exact=list(m.block_on),
        grouped=ranked,
        matches_table=ctx.table("nearest_neighbour_matches"),
        units_table=ctx.table("nearest_neighbour_units"),
    )
    match_reads = [ctx.display("nearest_neighbour_matches")] + ([ctx.display("nearest_neighbour_units")] if ranked else [])
    # four sums per product: split under PostgreSQL's SELECT-list limit (part 1 also has the count and t, c sums)
    parts = columns.split_sums(pair_sums(ps), first_fixed=1 + 2 * len(vs))
    # one row per group; the widest SELECT list is over the tie sets: about 6 columns per product and
    # per variable (its sums, their neighbours'), so the products are split with that cost each
    per = 6
    fixed = -(-(per * len(vs) + 12) // per)
    variance_parts = columns.split_sums(ps, first_fixed=fixed, later_fixed=fixed, limit=columns.MAX_SUMS_PER_QUERY // per)
    return out + ctx.query_parts(
        STEP,
        "nearest_neighbour_variance",
        reads=list(dict.fromkeys([ctx.display("nearest_neighbour_units" if ranked else "scores"), ctx.display("weighted_units")] + match_reads)),
        purpose="Abadie-Imbens variance sums: squared matching weights (times each control is used) times conditional "
        "variances estimated from each unit's nearest units of the same group (tied ones averaged), summed per tie set.",
        parts=[dict(products=part, head=k == 1) for k, part in enumerate(variance_parts, 1)],
        variables=vs,
        scores_table=ctx.table("scores"),
        ranked_units=ctx.table("nearest_neighbour_units") if ranked else None,
        weighted_table=ctx.table("weighted_units"),
        **links,
    ) + ctx.query_parts(
        PAIR_STEP,
        "nearest_neighbour_pair_sums",
        reads=[ctx.display("weighted_units")] + match_reads,
        purpose="Abadie-Imbens population variance sums: products of each matched treated unit's values and its matches' "
        "share-weighted means, summed over the treated units.",
        parts=[dict(sums=part, head=k == 1) for k, part in enumerate(parts, 1)],
        variables=vs,
        weighted_table=ctx.table("weighted_units"),
        **links,
    )
