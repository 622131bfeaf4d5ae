"""Entropy balancing (Hainmueller 2012, Political Analysis 20:25): weights for the non-enrolled
units that make their weighted means of the matching features (the moment functions: each
numeric feature, each level of a categorical one but the first; with matching.balance_variances
also each numeric feature's variance) equal the enrolled units' means exactly, while staying as
close to uniform as possible. Enrolled units weigh 1; one stratum; the effect on the treated.

The weights are w_j proportional to exp(lam' z_j), z the moment functions centred at the targets
and scaled by the controls' SD. lam minimises the smooth convex dual log sum exp(lam' z)
(estimators/entropy_balancing.py); its gradient and Hessian are sums over the controls, so each
Newton step is one aggregate query (entropy_balancing_newton), as for the propensity model, and
the runner fits lam between the source steps and the weights (MatchingMethod.fit). Options (names
ours):

  * matching.balance_variances = true: also balance each numeric feature's variance (the
    enrolled units' variance, divisor n).
  * matching.balancing_max_steps = 50: Newton steps before the constraints count as unreachable.

Which functions of the features are balanced follows `[propensity] terms`: with "stepwise" (the
default) the propensity model's stepwise search (propensity.stepwise, Imbens & Rubin 2015, 13.3) is
run on the features first and every term it adds (log(1 + x), squares, products) is balanced too,
beside the means of matching.on; with "linear" only those means. Zhao & Percival (2017, Journal of
Causal Inference 5(1)) show the weights are consistent when the odds of enrolment are log-linear in
the balanced terms or the outcome is linear in them: the means of matching.on alone left the
simulated confounding (benchmarks/RESULTS_calibration_entropy.md, 10-89% coverage). A term the
search adds whose target the weights cannot reach is left out, and the report says so.

A target outside the controls' range, or (jointly) outside their convex hull, cannot be met: the
run is refused naming matching.on and the feature. The effect's variance is the sandwich of the
stacked estimating equations (entropy_balancing_sandwich), which counts the estimated weights and
targets.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np

from sqlmatch import columns as col
from sqlmatch.errors import DataError, SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput

NAME = "entropy_balancing"
DESCRIPTION = "non-enrolled units weighted so their means of the matching features (and of the stepwise terms) equal the enrolled units' exactly (Hainmueller 2012), sandwich variance"
OPTION_KEYS = ("balance_variances", "balancing_max_steps")
TOLERANCE = 1e-10  # largest weighted-mean gap left, in SDs of the controls' moment


@dataclass(frozen=True)
class Moment:
    """One moment function c(x): a numeric feature, a level's indicator, or (square) the squared
    distance of a feature from the enrolled mean `mean`. `centre` is its target (the enrolled
    units' mean of c) and `scale` the controls' spread of c; the SQL works with (c - centre) / scale."""

    feature: str
    kind: str  # numeric | level | square | term (a propensity.DesignColumn the stepwise search added)
    level: str | None = None
    mean: float | None = None  # square: the enrolled units' mean of the feature
    centre: float = 0.0
    scale: float = 1.0
    column: object | None = None  # term: the design column (log1p or product), rendered as the score model does

    @property
    def label(self) -> str:
        if self.kind == "term":
            from sqlmatch.propensity import describe_column

            return describe_column(self.column)
        if self.kind == "level":
            return f"{self.feature} = {self.level!r}"
        if self.kind == "square":
            return f"the variance of {self.feature}"
        return self.feature

    @property
    def describes(self) -> str:
        """For SQL comments: a level value from the data can never close the comment."""
        text = f"({self.feature} - {self.mean})^2" if self.kind == "square" else self.label
        return text.replace("*/", "* /").replace("/*", "/ *")


@dataclass
class BalancingFit:
    """The dual's solution, baked into the weights' SQL (what `model` is for this method)."""

    moments: tuple[Moment, ...]
    lam: tuple[float, ...]
    log_normaliser: float  # a control's weight is exp(lam'z - log_normaliser); they sum to n_treated
    steps: int  # Newton steps
    evaluations: int  # aggregate queries of the dual (steps plus halvings plus the first)
    max_gap: float  # largest |weighted control mean - target| over the moments, in their own units
    max_share: float  # the largest control weight's share of the controls' total
    effective_controls: float  # Kish's effective number of controls
    n_treated: int
    n_control: int
    left_out: tuple[str, ...] = ()  # moments with nothing to balance (constant and equal; a 0/1 feature's variance), and why
    terms: str = "linear"  # propensity.terms: "stepwise" balances the terms its search added too
    added_terms: tuple[dict, ...] = ()  # the search's additions, as propensity.stepwise records them (term, order, statistic)
    unreachable: tuple[str, ...] = ()  # added terms left out because the weights could not reach their targets
    fitted_on: str = field(default_factory=lambda: dt.date.today().isoformat())

    def to_json(self) -> str:
        """The fit a scheduled plan bakes into its SQL (`<spec>.balancing.json`, beside the spec)."""
        body = {
            "sqlmatch_balancing_fit": FIT_VERSION,
            "fitted_on": self.fitted_on,
            "newton_steps": self.steps,
            "dual_queries": self.evaluations,
            "log_normaliser": self.log_normaliser,
            "max_gap": self.max_gap,
            "max_share": self.max_share,
            "effective_controls": self.effective_controls,
            "n_treated": self.n_treated,
            "n_control": self.n_control,
            "terms": self.terms,
            "added_terms": list(self.added_terms),
            "unreachable_terms": list(self.unreachable),
            "left_out": list(self.left_out),
            "moments": [
                {**{k: v for k, v in asdict(m).items() if k != "column"}, "column": None if m.column is None else asdict(m.column), "describes": m.label, "lam": b}
                for m, b in zip(self.moments, self.lam)
            ],
        }
        return json.dumps(body, indent=2) + "\n"

    @classmethod
    def from_json(cls, text: str, source: str = "balancing fit file") -> "BalancingFit":
        from sqlmatch.errors import SqlmatchError
        from sqlmatch.propensity import column_from_json

        try:
            body = json.loads(text)
            if body.get("sqlmatch_balancing_fit") != FIT_VERSION:
                raise ValueError("not a sqlmatch entropy-balancing fit file")
            moments = tuple(
                Moment(
                    feature=str(m["feature"]), kind=str(m["kind"]), level=m.get("level"), mean=m.get("mean"),
                    centre=float(m["centre"]), scale=float(m["scale"]), column=None if m.get("column") is None else column_from_json(m["column"]),
                )
                for m in body["moments"]
            )
            return cls(
                moments=moments,
                lam=tuple(float(m["lam"]) for m in body["moments"]),
                log_normaliser=float(body["log_normaliser"]),
                steps=int(body["newton_steps"]),
                evaluations=int(body["dual_queries"]),
                max_gap=float(body["max_gap"]),
                max_share=float(body["max_share"]),
                effective_controls=float(body["effective_controls"]),
                n_treated=int(body["n_treated"]),
                n_control=int(body["n_control"]),
                left_out=tuple(body.get("left_out", ())),
                terms=str(body.get("terms", "linear")),
                added_terms=tuple(body.get("added_terms", ())),
                unreachable=tuple(body.get("unreachable_terms", ())),
                fitted_on=str(body.get("fitted_on", "")),
            )
        except (ValueError, KeyError, TypeError) as err:
            raise SqlmatchError(f"{source}: not a readable entropy-balancing fit ({err}). Fix: delete it and run the study to fit again.") from None


FIT_VERSION = 1


def fit_path(spec) -> Path | None:
    """Where a study keeps its entropy-balancing fit: beside the spec, `<spec name>.balancing.json`."""
    if spec.source_path is None:
        return None
    suffix = ".placebo.balancing.json" if spec.enrolment_windows_of is not None else ".balancing.json"
    return spec.source_path.with_name(spec.source_path.stem + suffix)


def save_fit(spec, fitted: BalancingFit) -> Path | None:
    path = fit_path(spec)
    if path is not None:
        path.write_text(fitted.to_json(), encoding="utf-8")
    return path


def load_fit(spec) -> BalancingFit | None:
    path = fit_path(spec)
    if path is None or not path.is_file():
        return None
    return BalancingFit.from_json(path.read_text(encoding="utf-8"), source=str(path))


# ---------------------------------------------------------------- options


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.balance_variances / balancing_max_steps."""
    from sqlmatch.spec_values import read_bool, read_int

    return {
        "balance_variances": read_bool(table, "matching", "balance_variances", default=False),
        "balancing_max_steps": read_int(table, "matching", "balancing_max_steps", default=50, low=1, high=1000),
    }


def check_supported(spec, result=None) -> None:
    """What entropy balancing does not support yet; also run on group_sizes, before the events pass."""
    if spec.regression_adjustment:
        raise SpecError(
            "effect.regression_adjustment",
            "entropy_balancing has no regression-adjusted effect: the adjustment works within strata where every unit of a group weighs the same.",
            "set regression_adjustment = false, or use coarsened_exact or score_bins.",
        )


# ---------------------------------------------------------------- moments and the fit


def first_moments(spec, levels: dict[str, list[str]]) -> list[Moment]:
    """Each numeric matching feature, and each level but the first of a categorical one."""
    out = []
    for name in spec.matching.on:
        f = spec.feature(name)
        if f.categorical:
            out += [Moment(feature=name, kind="level", level=lv) for lv in levels.get(name, [])[1:]]
        else:
            out.append(Moment(feature=name, kind="numeric"))
    return out


def categorical_on(spec) -> list[str]:
    """The categorical features whose levels the fit needs: of matching.on, and with stepwise terms
    of the propensity features the search runs on."""
    names = list(spec.matching.on) + (list(spec.propensity.features) if spec.propensity.terms == "stepwise" else [])
    return [n for n in dict.fromkeys(names) if spec.feature(n).categorical]


def _term_feature(c) -> str:
    """The feature a design column is built from (a product's first factor's): errors name it."""
    while c.kind == "product":
        c = c.factors[0]
    return c.feature


def searched_terms(spec, engine, out, progress, first: list[Moment]) -> tuple[list[Moment], tuple[dict, ...]]:
    """Run the propensity model's stepwise search (the runner's fit, on the propensity_cells table)
    and return its columns beyond the first moments, in the order it added them, as term moments."""
    from sqlmatch.runner import fit_propensity

    model = fit_propensity(spec, engine, out, progress)
    have = {(m.kind, m.feature, m.level) for m in first}
    added = [
        Moment(feature=_term_feature(c), kind="term", column=c)
        for c in model.columns
        if c.kind != "intercept" and (c.kind, c.feature, c.level) not in have
    ]
    return added, tuple(model.selection or ())


def _fix(feature: str) -> str:
    return (
        f"remove {feature} from matching.on (or coarsen it), restrict eligibility.filters so both groups cover the same "
        "values, or use another matching.method (score_weighting or coarsened_exact drop the units without counterparts)."
    )


def standardised(spec, moments: list[Moment], row: dict) -> tuple[list[Moment], list[str], int, int]:
    """The moments centred at the enrolled means and scaled by the controls' SD, with the variance
    moments added (balance_variances); refuses a target outside the controls' range. Returns
    (moments, the moments left out and why, n_treated, n_control)."""
    n_t, n_c = int(row[col.balancing("n_treated")] or 0), int(row[col.balancing("n_control")] or 0)
    out, left_out, variances = [], [], []
    for k, c in enumerate(moments):
        present = int(row[col.balancing("present", k)] or 0)
        if present < n_t + n_c:
            raise DataError(
                "matching.on",
                f"{n_t + n_c - present:,} study units have no value of {c.feature}, so its mean cannot be balanced.",
                f"give {c.feature} a missing-value policy (missing = \"fill\" or \"drop\"), or remove it from matching.on.",
            )
        f = lambda what: float(row[col.balancing(what, k)] or 0.0)  # noqa: E731
        target = f("t_sum") / n_t
        t_var = max(f("t_sumsq") / n_t - target**2, 0.0)
        c_mean = f("c_sum") / n_c
        c_sd = math.sqrt(max(f("c_sumsq") / n_c - c_mean**2, 0.0))
        lo, hi = f("c_min"), f("c_max")
        spread = max(abs(lo), abs(hi), 1.0) * 1e-12
        if hi - lo <= spread:  # controls constant in this moment
            if f("t_max") - f("t_min") <= spread and abs(target - lo) <= spread:
                left_out.append(f"{c.label} (constant, equal in both groups)")
                continue
            if c.kind == "term":
                left_out.append(f"{c.label} (added by the stepwise search; constant among the non-enrolled units)")
                continue
        if not lo + spread < target < hi - spread:
            where = "equals the edge of" if lo - spread <= target <= hi + spread else "lies outside"
            if c.kind == "term":  # added by the stepwise search, not asked for: leave it out and say so
                left_out.append(f"{c.label} (added by the stepwise search; the enrolled mean {target:.6g} {where} the non-enrolled units' range)")
                continue
            raise DataError(
                "matching.on",
                f"entropy balancing cannot reach the enrolled units' mean of {c.label} ({target:.6g}): it {where} the range of the "
                f"non-enrolled units' values [{lo:.6g}, {hi:.6g}], so no positive weights on them give that mean.",
                _fix(c.feature),
            )
        out.append(replace(c, centre=target, scale=c_sd))
        if c.kind == "numeric" and spec.matching.balance_variances and _two_valued(row, k, n_t + n_c):
            # (x - a)^2 of a two-valued x is linear in x: its mean fixes its variance
            left_out.append(f"the variance of {c.feature} (two values only: its mean fixes it)")
        elif c.kind == "numeric" and spec.matching.balance_variances:
            # (x - a)^2 around the enrolled mean a: its enrolled mean is their variance (divisor n)
            reach = max((hi - target) ** 2, (lo - target) ** 2)
            if not 0 < t_var < reach:
                raise DataError(
                    "matching.balance_variances",
                    f"entropy balancing cannot reach the enrolled units' variance of {c.feature} ({t_var:.6g}) with the non-enrolled "
                    f"units' values in [{lo:.6g}, {hi:.6g}] around the enrolled mean {target:.6g}.",
                    f"set balance_variances = false, or {_fix(c.feature)}",
                )
            variances.append(Moment(feature=c.feature, kind="square", mean=target, centre=t_var, scale=c_sd**2 + (c_mean - target) ** 2))
    return out + variances, left_out, n_t, n_c


def _two_valued(row: dict, k: int, n: int) -> bool:
    """Every value of moment k is its minimum or its maximum: sum (x - lo)(hi - x) = 0."""
    f = lambda what: float(row[col.balancing(what, k)] or 0.0)  # noqa: E731
    lo, hi = min(f("t_min"), f("c_min")), max(f("t_max"), f("c_max"))
    total, squares = f("t_sum") + f("c_sum"), f("t_sumsq") + f("c_sumsq")
    inside = -squares + (lo + hi) * total - n * lo * hi
    return abs(inside) <= 1e-9 * max(1.0, squares, n * abs(lo * hi))


def dual_value(row: dict, p: int):
    from sqlmatch.estimators.entropy_balancing import dual_from_sums

    s1 = np.array([float(row[col.balancing("s1", i)]) for i in range(p)])
    s2 = np.empty((p, p))
    for i, j in col.upper_pairs(p):
        s2[i, j] = s2[j, i] = float(row[col.balancing("s2", i, j)])
    return dual_from_sums(float(row[col.balancing("top")]), float(row[col.balancing("s0")]), s1, s2, float(row[col.balancing("s0_sq")]))


def _context(spec, dialect, transient=False):
    from sqlmatch.plan import PlanContext

    return PlanContext(spec=spec, dialect=dialect, transient=transient)


def targets_statement(spec, dialect: str, moments) -> str:
    ctx = _context(spec, dialect)
    return ctx.query_step(
        "balancing_targets", "entropy_balancing_targets", reads=[], purpose="", moments=list(moments), measures_table=ctx.table("measures")
    ).statements[0]


def newton_statements(spec, dialect: str, moments, lam, transient: bool = True) -> list[str]:
    """The aggregate queries of one Newton step of the dual at `lam`: one, or parts of at most
    columns.MAX_SUMS_PER_QUERY entries (the s2 entries split; every part returns top and lam,
    part 1 the count, s0 and s1), whose rows `evaluate_newton` merges."""
    ctx = _context(spec, dialect, transient=transient)
    p = len(moments)
    parts = col.split_sums(col.upper_pairs(p), first_fixed=2 * p + 4, later_fixed=p + 1)
    steps = ctx.query_parts(
        "balancing_newton", "entropy_balancing_newton", reads=[], purpose="",
        parts=[dict(pairs=part, head=k == 1, part=k) for k, part in enumerate(parts, 1)], n_parts=len(parts),
        moments=list(moments), numbers={"lam": [float(b) for b in lam]}, measures_table=ctx.table("measures"),
    )
    return [s.statements[0] for s in steps]


def newton_statement(spec, dialect: str, moments, lam, transient: bool = True) -> str:
    """The one query of a Newton step of the dual at `lam` (a dual small enough for one);
    transient=False: formatted as a plan file is (for review)."""
    (statement,) = newton_statements(spec, dialect, moments, lam, transient)
    return statement


def evaluate_newton(fetch, statements: list[str]) -> dict:
    """One Newton step's row from its queries (`fetch(sql)` returns a QueryResult), parts merged."""
    from sqlmatch.engines.base import merged

    return merged([fetch(s) for s in statements], "entropy_balancing_newton").one()


def fit(spec, engine, out, progress) -> BalancingFit:
    """lam by Newton steps in the warehouse: one query for the targets, one per evaluation of the dual."""
    import time

    from sqlmatch.estimators.entropy_balancing import BalanceFailed, solve

    t0 = time.perf_counter()
    levels: dict[str, list[str]] = {}
    if "categorical_levels" in out.results:
        for r in out.results["categorical_levels"].records():
            levels.setdefault(r["feature"], []).append(str(r["level"]))
    levels = {k: sorted(v) for k, v in levels.items()}
    first = first_moments(spec, levels)
    added, selection = searched_terms(spec, engine, out, progress, first) if spec.propensity.terms == "stepwise" else ([], ())
    row = engine.fetch(targets_statement(spec, engine.dialect, first + added)).one()
    moments, left_out, n_t, n_c = standardised(spec, first + added, row)
    if not moments:
        raise DataError("matching.on", "every matching feature is constant and equal in both groups: there is nothing to balance.", "match on features that vary.")
    unreachable: list[str] = []
    while True:
        p = len(moments)
        try:
            sol = solve(lambda lam: dual_value(evaluate_newton(engine.fetch, newton_statements(spec, engine.dialect, moments, lam)), p), p, spec.matching.balancing_max_steps, TOLERANCE)
            break
        except BalanceFailed as err:
            terms = [k for k, c in enumerate(moments) if c.kind == "term"]
            if not terms:
                raise _failed(spec, moments, err) from None
            # an added term the weights cannot reach together with the rest: drop the last one the search added
            unreachable.append(moments[terms[-1]].label)
            progress.note(f"entropy balancing: left out {moments[terms[-1]].label} (its target cannot be reached with the others)")
            moments = moments[: terms[-1]] + moments[terms[-1] + 1 :]
    gaps = np.abs(sol.dual.gradient) * np.array([c.scale for c in moments])
    # weights exp(lam'z - top) / s0 sum to 1; times n_treated: exp(lam'z - (top + log s0 - log n_t))
    fitted = BalancingFit(
        moments=tuple(moments),
        lam=tuple(float(b) for b in sol.lam),
        log_normaliser=float(sol.dual.value - math.log(n_t)),
        steps=sol.steps,
        evaluations=sol.evaluations,
        max_gap=float(np.max(gaps)),
        max_share=sol.dual.max_share,
        effective_controls=sol.dual.effective,
        n_treated=n_t,
        n_control=n_c,
        left_out=tuple(left_out),
        terms=spec.propensity.terms,
        added_terms=selection,
        unreachable=tuple(unreachable),
    )
    out.timings["balancing_fit"] = time.perf_counter() - t0
    progress.note(f"entropy balancing: {sol.steps} Newton steps ({sol.evaluations} queries), {out.timings['balancing_fit']:.2f}s")
    return fitted


def _failed(spec, moments, err) -> DataError:
    """Name the moments whose weighted means stayed furthest from their targets."""
    gap = np.abs(err.dual.gradient)
    order = [int(i) for i in np.argsort(-gap)[:3] if gap[i] > TOLERANCE]
    if err.reason == "singular":
        w, v = np.linalg.eigh(err.dual.hessian)
        vec = v[:, int(np.argmin(np.abs(w)))]
        # the (up to 3) moments carrying the null direction, named in the spec's order: scaled copies of one
        # feature carry equal shares, and ranking those by size would let rounding pick the order
        top = np.argsort(-np.round(np.abs(vec), 6), kind="stable")[:3]
        names = ", ".join(moments[i].label for i in sorted(int(i) for i in top if abs(vec[i]) > 1e-3))
        return DataError(
            "matching.on",
            f"entropy balancing cannot separate the moments {names}: among the weighted non-enrolled units they are collinear (or one is constant).",
            "remove one of those features from matching.on.",
        )
    names = ", ".join(f"{moments[i].label} (off by {gap[i]:.2g} SD)" for i in order) or "(none left)"
    limit = f" = matching.balancing_max_steps" if err.steps >= spec.matching.balancing_max_steps else ""
    return DataError(
        "matching.on",
        f"entropy balancing did not reach balance (stopped after {err.steps} Newton steps{limit}): the enrolled units' "
        f"means of {names} lie outside (or at the edge of) what weighting the non-enrolled units can reach together, "
        "so the weights collapse onto a few units.",
        "remove or coarsen those features in matching.on, restrict eligibility.filters so both groups overlap, or use another matching.method.",
    )


# ---------------------------------------------------------------- plan steps


def fit_steps(ctx, fitted) -> list:
    """What the fit reads before its Newton steps: with stepwise terms the units grouped by the
    propensity features (what the search's Newton steps sum over), and the levels of the
    categorical features."""
    from sqlmatch import propensity

    cells = [propensity.cells_step(ctx)] if ctx.spec.propensity.terms == "stepwise" else []
    cats = categorical_on(ctx.spec)
    if not cats:
        return cells
    return cells + [
        ctx.query_step(
            "categorical_levels",
            "categorical_levels",
            reads=[ctx.display("measures")],
            purpose="Levels of the categorical matching features (each level but the first is a balanced share).",
            features=cats,
            measures_table=ctx.table("measures"),
        )
    ]


def steps(ctx, fitted):
    from sqlmatch.matching.score_weighting import terms

    check_supported(ctx.spec)
    named = {} if ctx.names_only else dict(moments=list(fitted.moments), lam=list(fitted.lam))
    return [
        ctx.table_step(
            "weighted_units",
            "entropy_balancing_weights",
            writes="weighted_units",
            reads=[ctx.display("measures")],
            purpose="Entropy-balancing weights (enrolled 1, non-enrolled exp(lam'z), summing to the enrolled count), beside every unit's features and outcomes.",
            columns=ctx.weighted_columns(),
            measures_table=ctx.table("measures"),
            log_normaliser=None if ctx.names_only else fitted.log_normaliser,
            steps=None if ctx.names_only else fitted.steps,
            **named,
        ),
        ctx.query_step(
            "matching_summary",
            "entropy_balancing_summary",
            reads=[ctx.display("weighted_units")],
            purpose="Units weighted per group, each group's weights' sum, sum of squares and range, and the weighted means the balance reached.",
            weighted_table=ctx.table("weighted_units"),
            **({} if ctx.names_only else dict(moments=list(fitted.moments))),
        ),
    ] + sandwich_steps(ctx, fitted, terms(ctx.spec)) + subgroup_steps(ctx, fitted, terms(ctx.spec))


@dataclass(frozen=True)
class SandwichSum:
    """One sum of entropy_balancing_sandwich: of the moments (key None: n_treated, w, w2; per moment
    i tz, wz, w2z; per pair i <= j tzz, wzz, w2zz), or of term k (column prefix `key`) for group
    t / c (v, u, uu, uv, vv, w2u, w2v; per moment j uz, vz, w2uz, w2vz)."""

    what: str
    i: int | None = None
    j: int | None = None
    k: int | None = None
    key: str | None = None
    group: str = ""


def sandwich_sums(p: int, study_terms) -> list[SandwichSum]:
    """Every sum of the sandwich query, in its order (columns.balancing, balancing_term)."""
    out = [SandwichSum(w) for w in ("n_treated", "w", "w2")]
    for i in range(p):
        out += [SandwichSum(w, i) for w in ("tz", "wz", "w2z")]
        for j in range(i, p):
            out += [SandwichSum(w, i, j) for w in ("tzz", "wzz", "w2zz")]
    for k, o in enumerate(study_terms):
        out += [SandwichSum(w, k=k, key=o.key, group="t") for w in ("v", "u", "uu", "uv", "vv")]
        out += [SandwichSum(w, k=k, key=o.key, group="c") for w in ("v", "u", "uu", "uv", "vv", "w2u", "w2v")]
        for j in range(p):
            out += [SandwichSum(w, j=j, k=k, key=o.key, group=g) for g, w in (("t", "uz"), ("t", "vz"), ("c", "uz"), ("c", "vz"), ("c", "w2uz"), ("c", "w2vz"))]
    return out


def sandwich_steps(ctx, fitted, study_terms, name: str = "balancing_sandwich", level=None, purpose: str | None = None) -> list:
    """The sandwich query (one row, or with `level` a row per subgroup level), in parts of at most
    columns.MAX_SUMS_PER_QUERY sums (one part when it fits); every part repeats the level."""
    moments = [] if ctx.names_only else list(fitted.moments)
    keyed = 1 if level else 0
    parts = col.split_sums(sandwich_sums(len(moments), study_terms), first_fixed=keyed, later_fixed=keyed)
    return ctx.query_parts(
        name,
        "entropy_balancing_sandwich",
        reads=[ctx.display("weighted_units")],
        purpose=purpose or "Sums for the weighted effect on the treated and its sandwich variance, which counts the estimated weights and targets (one row).",
        parts=[dict(sums=part, part=k) for k, part in enumerate(parts, 1)],
        n_parts=len(parts),
        terms=study_terms,
        level=level,
        weighted_table=ctx.table("weighted_units"),
        **({} if ctx.names_only else dict(moments=moments)),
    )


def subgroup_steps(ctx, fitted, study_terms) -> list:
    """Per [[subgroups]] entry, the sandwich sums per level (subgroups.py: each level's weighted
    effect, with the covariance the levels share through the study-wide weights)."""
    from sqlmatch.plan import subgroup_level, subgroup_text

    out = []
    for g in ctx.spec.subgroups:
        out += sandwich_steps(
            ctx,
            fitted,
            study_terms,
            name=f"balancing_subgroup_{g.name}",
            level=subgroup_level(g),
            purpose=f"Sums for the weighted effect and its sandwich variance per level of subgroup {g.name!r} ({subgroup_text(g)}).",
        )
    return out


# ---------------------------------------------------------------- results


def balance_reached(row: dict, moments) -> list[dict]:
    """Per moment the gap left, weighted control mean - enrolled mean from the stored weights, in
    the moment's units and in SDs of the controls' values. The means themselves are not kept: a
    level's enrolled share times the enrolled count is a count, perhaps under min_cell_size (the
    balance table withholds those levels)."""
    out = []
    for k, c in enumerate(moments):
        target, reached = row.get(col.balancing("target", k)), row.get(col.balancing("reached", k))
        if target is None or reached is None:
            continue
        gap = float(reached) - float(target)
        out.append({"moment": c.label, "gap": gap, "gap_sd": gap / c.scale})
    return out


def sums_from_row(row: dict, key: str, p: int):
    """Unpack the entropy_balancing_sandwich row for one term (see estimators/entropy_balancing.py)."""
    from sqlmatch.estimators.entropy_balancing import MomentSums, TermSums

    def f(name):
        x = row[name]
        return 0.0 if x is None else float(x)

    def vec(what):
        return np.array([f(col.balancing(what, i)) for i in range(p)])

    def mat(what):
        out = np.empty((p, p))
        for i, j in col.upper_pairs(p):
            out[i, j] = out[j, i] = f(col.balancing(what, i, j))
        return out

    moments = MomentSums(
        n_treated=f(col.balancing("n_treated")), treated_z=vec("tz"), treated_zz=mat("tzz"), control_w=f(col.balancing("w")), control_w2=f(col.balancing("w2")),
        control_wz=vec("wz"), control_wzz=mat("wzz"), control_w2z=vec("w2z"), control_w2zz=mat("w2zz"),
    )

    def t(g, what, j=None):
        return f(col.balancing_term(key, g, what, j))

    def tv(g, what):
        return np.array([t(g, what, j) for j in range(p)])

    term = TermSums(
        t_v=t("t", "v"), t_u=t("t", "u"), t_uu=t("t", "uu"), t_uv=t("t", "uv"), t_vv=t("t", "vv"), t_uz=tv("t", "uz"), t_vz=tv("t", "vz"),
        c_wv=t("c", "v"), c_wu=t("c", "u"), c_w2uu=t("c", "uu"), c_w2uv=t("c", "uv"), c_w2vv=t("c", "vv"), c_w2u=t("c", "w2u"), c_w2v=t("c", "w2v"),
        c_wuz=tv("c", "uz"), c_wvz=tv("c", "vz"), c_w2uz=tv("c", "w2uz"), c_w2vz=tv("c", "w2vz"),
    )
    return moments, term


def moment_count(row: dict) -> int:
    p = 0
    while col.balancing("wz", p) in row:
        p += 1
    return p


def effect_of(row: dict):
    """key -> WeightedEffect, from the balancing_sandwich row."""
    from sqlmatch.estimators.entropy_balancing import weighted_effect

    p = moment_count(row)
    return lambda key: weighted_effect(*sums_from_row(row, key, p))


def warnings(spec, results) -> list[str]:
    """Say when a few controls carry most of the weight."""
    from sqlmatch.estimators.weighting import kish_effective_size

    if "matching_summary" not in results:
        return []
    row = results["matching_summary"].one()
    ess = kish_effective_size(row.get("control_weight_sum"), row.get("control_weight_sumsq"))
    n = int(row.get("n_control_matched") or 0)
    if ess is None or n == 0 or ess >= 0.1 * n:  # a tenth: a threshold of ours, as for score_weighting
        return []
    return [
        f"Entropy balancing: the weighted non-enrolled units count as about {ess:,.0f} unweighted ones (Kish's effective "
        "sample size), under a tenth of those weighted: the enrolled units' means are reached only by leaning on a few "
        "non-enrolled units. Consider fewer or coarser features in matching.on, or balance_variances = false."
    ]


METHOD = MatchingMethod(
    name=NAME,
    description=DESCRIPTION,
    steps=steps,
    uses_score=False,
    loosen="fewer features in matching.on",
    option_keys=OPTION_KEYS,
    read_options=read_options,
    checks={"group_sizes": check_supported},
    warnings=warnings,
    adjustable=False,
    groups_word="weighted comparison",
    fit=fit,
    fit_steps=fit_steps,
    save_fit=save_fit,
    load_fit=load_fit,
)


def design_entry(spec, r: dict, fitted) -> dict:
    """What the reports and results.json say of the balancing: each feature's constraint, and the
    balance and weight dispersion reached (from the stored weights, matching_summary)."""
    from sqlmatch.estimators.weighting import kish_effective_size

    out: dict = {
        "matched_on": [
            {
                "feature": n,
                "how": "weighted non-enrolled share of each level equal to the enrolled share"
                if spec.feature(n).categorical
                else "weighted non-enrolled mean equal to the enrolled mean" + (" and variance" if spec.matching.balance_variances else ""),
            }
            for n in spec.matching.on
        ]
    }
    if fitted is None or "matching_summary" not in r:
        return out
    row = r["matching_summary"].one()
    reached = balance_reached(row, fitted.moments)
    total, top = row.get("control_weight_sum"), row.get("control_weight_max")
    out["balancing"] = {
        "moments": reached,
        "max_gap": max((abs(m["gap"]) for m in reached), default=0.0),
        "max_gap_sd": max((abs(m["gap_sd"]) for m in reached), default=0.0),
        "max_weight_share": float(top) / float(total) if total else None,
        "effective_controls": kish_effective_size(total, row.get("control_weight_sumsq")),
        "newton_steps": fitted.steps,
        "dual_queries": fitted.evaluations,
        "left_out": list(fitted.left_out),
        "terms": fitted.terms,
        "added_terms": [dict(t) for t in fitted.added_terms],
        "unreachable_terms": list(fitted.unreachable),
    }
    return out
