"""Turn the aggregate query results into the inputs of estimators and balance diagnostics.

Column names come from columns.py, which the templates use too. Everything here
works on a handful of rows per group or stratum.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch import columns
from sqlmatch.balance import GroupMoments, compare
from sqlmatch.engines.base import QueryResult
from sqlmatch.estimators.adjusted import CellSums
from sqlmatch.estimators.att import StratumMoments
from sqlmatch.estimators.ratio import RatioSums
from sqlmatch.columns import stat
from sqlmatch.results import BalanceRow


def _f(x) -> float:
    return math.nan if x is None else float(x)


def _opt(x: float) -> float | None:
    return None if x is None or not math.isfinite(x) else x


def _by_group(result: QueryResult) -> dict[int, dict]:
    return {int(r["treated"]): r for r in result.records()}


def numeric_balance(result: QueryResult, features: list[str]) -> list[BalanceRow]:
    groups = _by_group(result)
    t, c = groups.get(1, {}), groups.get(0, {})
    rows = []
    for f in features:
        values = {_f(t.get(stat(f, "min"))), _f(t.get(stat(f, "max"))), _f(c.get(stat(f, "min"))), _f(c.get(stat(f, "max")))}
        binary = values <= {0.0, 1.0}
        before = compare(
            GroupMoments(_f(t.get(stat(f, "n"))), _f(t.get(stat(f, "n"))), _f(t.get(stat(f, "sum"))), _f(t.get(stat(f, "sumsq")))),
            GroupMoments(_f(c.get(stat(f, "n"))), _f(c.get(stat(f, "n"))), _f(c.get(stat(f, "sum"))), _f(c.get(stat(f, "sumsq")))),
            binary,
        )
        after = compare(
            GroupMoments(_f(t.get(stat(f, "w"))), _f(t.get(stat(f, "w2"))), _f(t.get(stat(f, "wsum"))), _f(t.get(stat(f, "wsumsq")))),
            GroupMoments(_f(c.get(stat(f, "w"))), _f(c.get(stat(f, "w2"))), _f(c.get(stat(f, "wsum"))), _f(c.get(stat(f, "wsumsq")))),
            binary,
            scale=before.pooled_sd,
        )
        rows.append(_row(f, "binary" if binary else "numeric", before, after))
    return rows


def level_balance(result: QueryResult) -> list[BalanceRow]:
    """Each level of a categorical feature is compared as a 0/1 indicator (binary SMD)."""
    records = result.records()
    totals: dict[tuple[str, int], list[float]] = {}
    for r in records:
        key = (r["feature"], int(r["treated"]))
        tot = totals.setdefault(key, [0.0, 0.0])
        tot[0] += float(r["n_units"])
        tot[1] += float(r["sum_w"] or 0.0)
    cells = {(r["feature"], r["level"], int(r["treated"])): r for r in records}
    rows = []
    for feature, level in sorted({(r["feature"], r["level"]) for r in records}):
        stats = []
        for weighted in (False, True):
            moments = []
            for g in (1, 0):
                cell = cells.get((feature, level, g))
                n_total, w_total = totals.get((feature, g), [0.0, 0.0])
                if weighted:
                    share = float(cell["sum_w"] or 0.0) if cell else 0.0
                    moments.append(GroupMoments(w_total, math.nan, share, share))
                else:
                    share = float(cell["n_units"]) if cell else 0.0
                    moments.append(GroupMoments(n_total, n_total, share, share))
            # after matching, the SMD keeps the before-matching pooled SD as its denominator
            stats.append(compare(moments[0], moments[1], binary=True, scale=stats[0].pooled_sd if weighted else None))
        rows.append(_row(f"{feature}={level}", "level", stats[0], stats[1]))
    return rows


def _row(name: str, kind: str, before, after) -> BalanceRow:
    return BalanceRow(
        covariate=name,
        kind=kind,
        mean_treated_before=_opt(before.mean_treated),
        mean_control_before=_opt(before.mean_control),
        smd_before=_opt(before.smd),
        variance_ratio_before=_opt(before.variance_ratio),
        mean_treated_after=_opt(after.mean_treated),
        mean_control_after=_opt(after.mean_control),
        smd_after=_opt(after.smd),
        variance_ratio_after=_opt(after.variance_ratio),
    )


def _aligned(result: QueryResult) -> tuple[list[dict], list[dict]]:
    """Treated and control rows per stratum, in stratum order; a missing group is a zero row."""
    by_stratum: dict[int, dict[int, dict]] = {}
    for r in result.records():
        by_stratum.setdefault(int(r["stratum"]), {})[int(r["treated"])] = r
    strata = sorted(by_stratum)
    return [by_stratum[s].get(1, {}) for s in strata], [by_stratum[s].get(0, {}) for s in strata]


def outcome_moments(result: QueryResult, outcome: str, suffix: str = "") -> tuple[StratumMoments, StratumMoments]:
    """Per-stratum count, sum and sum of squares of an outcome, treated and control. `suffix`
    picks another pair of columns of the same query: "did" reads `<outcome>__did_sum` and
    `<outcome>__did_sumsq`, the sums of (outcome - its pre-window twin)."""
    treated, control = _aligned(result)
    sum_key = stat(outcome, f"{suffix}_sum" if suffix else "sum")
    sq_key = stat(outcome, f"{suffix}_sumsq" if suffix else "sumsq")

    def moments(rows):
        return StratumMoments.of(
            [_f(r.get("n_units", 0)) for r in rows],
            [_f(r.get(sum_key, 0.0)) for r in rows],
            [_f(r.get(sq_key, 0.0)) for r in rows],
        )

    return moments(treated), moments(control)


def term_names(features: list[str], terms: str = "linear") -> list[str]:
    """How the adjustment's regressors are named in reports: the feature, `<feature>^2`."""
    return ["^".join([features[t[0]], str(len(t))]) if len(set(t)) == 1 and len(t) > 1 else " * ".join(features[i] for i in t) for t in columns.adjustment_terms(len(features), terms)]


def cell_sums(result: QueryResult, outcome: str, features: list[str], terms: str = "linear", keys: tuple[str, str, str] | None = None) -> tuple[CellSums, CellSums]:
    """Per-stratum sums of the adjustment's regressors z (the numeric features, and their squares
    with `terms = "squares"`), their cross-products and their products with the outcome
    (outcome_strata, matched), treated and control. `keys`: the outcome's (sum, sum of squares,
    key of its products with z) columns, by default those of a count, sum or 0/1 outcome."""
    treated, control = _aligned(result)
    z = columns.adjustment_terms(len(features), terms)
    q = len(z)
    sum_key, sq_key, cross_key = keys or (stat(outcome, "sum"), stat(outcome, "sumsq"), outcome)

    def sums(rows):
        get = lambda r, key: _f(r.get(key, 0.0) or 0.0)  # noqa: E731
        szz = np.zeros((len(rows), q, q))
        for k, r in enumerate(rows):
            for i, j in columns.upper_pairs(q):
                szz[k, i, j] = szz[k, j, i] = get(r, columns.monomial_sum(tuple(sorted(z[i] + z[j])), features))
        return CellSums.of(
            [get(r, "n_units") for r in rows],
            [[get(r, columns.monomial_sum(t, features)) for t in z] for r in rows] if q else np.zeros((len(rows), 0)),
            szz,
            [get(r, sum_key) for r in rows],
            [get(r, sq_key) for r in rows],
            [[get(r, columns.monomial_outcome(t, features, cross_key)) for t in z] for r in rows] if q else np.zeros((len(rows), 0)),
        )

    return sums(treated), sums(control)


def ratio_cell_sums(result: QueryResult, outcome: str, features: list[str], terms: str = "linear"):
    """A ratio outcome's numerator and denominator as two outcomes of cell_sums, and the sum of
    their product per stratum, treated and control: ((num, den, sum num*den) treated, (...) control)."""
    num = cell_sums(result, outcome, features, terms, (stat(outcome, "sum_y"), stat(outcome, "sumsq_y"), f"{outcome}__num"))
    den = cell_sums(result, outcome, features, terms, (stat(outcome, "sum_x"), stat(outcome, "sumsq_x"), f"{outcome}__den"))
    treated, control = _aligned(result)
    nd = [np.array([_f(r.get(stat(outcome, "sum_xy"), 0.0) or 0.0) for r in rows]) for rows in (treated, control)]
    return (num[0], den[0], nd[0]), (num[1], den[1], nd[1])


def ratio_sums(result: QueryResult, outcome: str) -> tuple[RatioSums, RatioSums]:
    treated, control = _aligned(result)

    def sums(rows):
        get = lambda key: np.array([_f(r.get(key, 0.0)) for r in rows])  # noqa: E731
        return RatioSums(
            n=np.array([_f(r.get("n_units", 0)) for r in rows]),
            sum_y=get(stat(outcome, "sum_y")),
            sum_x=get(stat(outcome, "sum_x")),
            sum_yy=get(stat(outcome, "sumsq_y")),
            sum_xx=get(stat(outcome, "sumsq_x")),
            sum_xy=get(stat(outcome, "sum_xy")),
        )

    return sums(treated), sums(control)


@dataclass(frozen=True)
class RegressionSums:
    """One outcome's weighted regression on treatment and the numeric features, as sums over the
    matched units (see sql_templates/outcome_regression.sql.j2): X'WX, X'Wy, y'Wy on centred
    columns, the centres, and the outcome's weighted moments per group (for its SD)."""

    names: tuple[str, ...]  # "intercept", "treated", then the numeric features
    xtx: np.ndarray
    xty: np.ndarray
    yty: float
    n: int
    x_centres: dict[str, float]
    y_centre: float
    treated: GroupMoments  # weights, squared weights, weighted sums and squares of the centred outcome
    control: GroupMoments


def regression_sums(result: QueryResult, outcome: str, kind: str, features: list[str]) -> RegressionSums:
    """Unpack one outcome from the one-row regression query (a ratio outcome as its linearised
    value, with the same weights and design sums as every other outcome)."""
    row = result.one()
    design = columns.regression_design(features)
    names = ("intercept", "treated", *features)
    p = len(design)
    xtx = np.empty((p, p))
    for i, j in columns.upper_pairs(p):
        xtx[i, j] = xtx[j, i] = _f(row[columns.xtx(i, j)])
    xty = np.array([_f(row[columns.xty(outcome, i)]) for i in range(p)])
    yty = _f(row[stat(outcome, "yty")])
    n = int(row[columns.weight_total("n_units")] or 0)
    sum_w, sum_w_t = xtx[0, 0], xtx[0, 1]  # treated is 0/1, so sum w t is the treated weight
    sum_w2, sum_w2_t = _f(row[columns.weight_total("sum_w2")]), _f(row[columns.weight_total("sum_w2_t")])
    sum_y, sum_ty = xty[0], xty[1]
    sum_yy, sum_tyy = yty, _f(row[stat(outcome, "tyy")])
    return RegressionSums(
        names=names,
        xtx=xtx,
        xty=xty,
        yty=yty,
        n=n,
        x_centres={f: _f(row[stat(f, "centre")]) for f in features},
        y_centre=_f(row[stat(outcome, "centre")]),
        treated=GroupMoments(sum_w_t, sum_w2_t, sum_ty, sum_tyy),
        control=GroupMoments(sum_w - sum_w_t, sum_w2 - sum_w2_t, sum_y - sum_ty, sum_yy - sum_tyy),
    )


def histograms(r) -> dict:
    """feature name (or "propensity score") -> bins with low edge, width, group, count and weight."""
    out: dict[str, list[dict]] = {}
    if "feature_histograms" in r:
        for row in r["feature_histograms"].records():
            if row["low"] is not None:  # a feature NULL for every unit has no distribution to draw
                out.setdefault(row["feature"], []).append(_bin(row))
    if "score_histogram" in r:
        out["propensity score (logit)"] = [_bin(row) for row in r["score_histogram"].records() if row["low"] is not None]
    return out


def _bin(row: dict) -> dict:
    low, width, b = float(row["low"]), float(row["width"] or 0.0), int(row["bin"])
    return {
        "low": low + b * width,
        "high": low + (b + 1) * width,
        "treated": int(row["treated"]),
        "n_units": int(row["n_units"]),
        "sum_w": float(row["sum_w"] or 0.0),
    }
