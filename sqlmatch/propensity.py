"""Propensity score: logistic regression of treatment on the features, fitted in the warehouse.

Newton-Raphson where each iteration is ONE aggregate query: for coefficients b, the engine
returns the score vector  g = sum (t - p) x  and the information matrix  H = sum p (1 - p) x x'
(p + p(p+1)/2 numbers, p = number of design columns) plus the log-likelihood; Python solves
H d = g with numpy and updates b <- b + d. An optional ridge penalty lam * |b|^2 / 2 (intercept
not penalised) adds -lam*b to g and lam*I to H.

The fitted model is a small JSON file (design columns, coefficients, a fingerprint of the data
it was fitted on, the date) that a reviewer can read and `compile` can bake into pure SQL.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from sqlmatch import columns
from sqlmatch.columns import split_sums, upper_pairs
from sqlmatch.errors import DataError, SqlmatchError

MODEL_VERSION = 1
ETA_CLAMP = 30.0  # |linear predictor| cap inside exp(): p stays in (1e-13, 1 - 1e-13), no overflow anywhere
SEPARATION_P = 1e-12  # a fitted p this close to 0 or 1 means |b'x| > 27.6: separation


@dataclass(frozen=True)
class DesignColumn:
    """One column of the design matrix, built in SQL from the per-unit measures table."""

    name: str
    kind: str  # intercept | numeric | log1p | level | product (of the two `factors`)
    feature: str | None = None
    level: str | None = None
    factors: tuple = ()  # product: two first-order DesignColumns (the same one twice for a square)

    @property
    def describes(self) -> str:
        """For SQL comments: a level value from the data can never close the comment."""
        return describe_column(self).replace("*/", "* /").replace("/*", "/ *")


def design_columns(spec, levels: dict[str, list[str]]) -> list[DesignColumn]:
    """Intercept, numeric features (log1p where asked), and one indicator per categorical level
    except the first (the reference level), in a fixed order."""
    cols = [DesignColumn(name="intercept", kind="intercept")]
    for name in spec.propensity.features:
        feature = spec.feature(name)
        if feature.categorical:
            found = levels.get(name, [])
            if len(found) < 2:
                continue  # a single level carries no information
            for i, level in enumerate(found[1:], start=1):
                cols.append(DesignColumn(name=f"{name}__l{i}", kind="level", feature=name, level=level))
        elif name in spec.propensity.log1p:
            cols.append(DesignColumn(name=f"log1p_{name}", kind="log1p", feature=name))
        else:
            cols.append(DesignColumn(name=name, kind="numeric", feature=name))
    return cols


def describe_column(col: DesignColumn) -> str:
    if col.kind == "product":
        a, b = col.factors
        return f"({describe_column(a)})^2" if a == b else f"({describe_column(a)}) * ({describe_column(b)})"
    if col.kind == "level":
        return f"{col.feature} = {col.level!r}"
    if col.kind == "log1p":
        return f"log(1 + {col.feature})"
    return col.feature or "intercept"


@dataclass
class FittedModel:
    columns: list[DesignColumn]
    coefficients: list[float]
    iterations: int
    log_likelihood: float
    n_units: int
    fingerprint: str
    levels: dict[str, list[str]]
    ridge: float = 0.0
    fitted_on: str = field(default_factory=lambda: dt.date.today().isoformat())
    sampled_controls: float = 1.0  # share of controls the fit used; the intercept is corrected for it
    selection: list = field(default_factory=list)  # stepwise terms: [{"term", "order", "statistic"}] in the order added
    refused: list = field(default_factory=list)  # stepwise candidates left out because their refit separated the groups

    def to_json(self) -> str:
        body = {
            "sqlmatch_propensity_model": MODEL_VERSION,
            "fitted_on": self.fitted_on,
            "data_fingerprint": self.fingerprint,
            "n_units": self.n_units,
            "iterations": self.iterations,
            "log_likelihood": self.log_likelihood,
            "ridge": self.ridge,
            "sampled_controls": self.sampled_controls,
            "levels": self.levels,
            "selection": self.selection,
            "refused_terms": self.refused,
            "coefficients": [
                {**asdict(c), "describes": describe_column(c), "coefficient": b} for c, b in zip(self.columns, self.coefficients)
            ],
        }
        return json.dumps(body, indent=2) + "\n"

    @classmethod
    def from_json(cls, text: str, source: str = "model file") -> "FittedModel":
        try:
            body = json.loads(text)
            if body.get("sqlmatch_propensity_model") != MODEL_VERSION:
                raise ValueError("not a sqlmatch propensity model file")
            cols = [column_from_json(c) for c in body["coefficients"]]
            coefs = [float(c["coefficient"]) for c in body["coefficients"]]
            return cls(
                columns=cols,
                coefficients=coefs,
                iterations=int(body["iterations"]),
                log_likelihood=float(body["log_likelihood"]),
                n_units=int(body["n_units"]),
                fingerprint=str(body["data_fingerprint"]),
                levels={k: list(v) for k, v in body.get("levels", {}).items()},
                ridge=float(body.get("ridge", 0.0)),
                sampled_controls=float(body.get("sampled_controls", 1.0)),
                selection=list(body.get("selection", [])),
                refused=list(body.get("refused_terms", [])),
                fitted_on=str(body.get("fitted_on", "")),
            )
        except (ValueError, KeyError, TypeError) as err:
            raise SqlmatchError(f"{source}: not a readable propensity model ({err}). Fix: delete it and run the study to fit a new one.") from None

    def save(self, path: str | Path) -> Path:
        path = Path(path)
        path.write_text(self.to_json(), encoding="utf-8")
        return path


def column_from_json(c: dict) -> DesignColumn:
    factors = tuple(column_from_json(f) for f in c.get("factors", ()))
    return DesignColumn(name=c["name"], kind=c["kind"], feature=c.get("feature"), level=c.get("level"), factors=factors)


def model_path(spec) -> Path | None:
    """Where a study keeps its fitted model: beside the spec, `<spec name>.model.json`."""
    if spec.source_path is None:
        return None
    suffix = ".placebo.model.json" if spec.enrolment_windows_of is not None else ".model.json"
    return spec.source_path.with_name(spec.source_path.stem + suffix)


def load_model(spec) -> FittedModel | None:
    path = model_path(spec)
    if path is None or not path.is_file():
        return None
    return FittedModel.from_json(path.read_text(encoding="utf-8"), source=str(path))


# --------------------------------------------------------------------------------------------
# Newton-Raphson on aggregates


def unpack(row: dict, p: int, pairs=None) -> tuple[float, np.ndarray, np.ndarray, float, float, float]:
    """n, gradient, information matrix, log-likelihood, min and max fitted p from one result row
    (`pairs`: the entries of the information matrix the query returned; the others are NaN)."""
    g = np.array([float(row[columns.gradient(i)]) for i in range(p)])
    h = np.full((p, p), np.nan)
    for i, j in pairs if pairs is not None else columns.upper_pairs(p):
        h[i, j] = h[j, i] = float(row[columns.information(i, j)])
    return float(row["n_units"]), g, h, float(row["log_likelihood"]), float(row["p_min"]), float(row["p_max"])


def fingerprint(n: float, h0: np.ndarray) -> str:
    """A digest of the data the model was fitted on: the unit count and the cross-products at the
    start (sum x x' / 4), rounded so that engines' last-digit differences do not change it."""
    rounded = [float(f"{v:.10g}") for v in h0.ravel()]
    return hashlib.sha256(json.dumps([n, rounded]).encode()).hexdigest()[:16]


def newton(evaluate, columns: list[DesignColumn], ridge: float = 0.0, max_iterations: int = 25, tolerance: float = 1e-10, start=None):
    """Fit by Newton-Raphson; `evaluate(beta)` runs the aggregate query and returns its row.

    Stops when the largest step is below `tolerance` (relative to the coefficient size).
    `start`: the coefficients to begin from (the stepwise search begins each refit at the previous
    fit with 0 for the added term: the same optimum, fewer queries); the fingerprint is then the
    caller's to set, as the first evaluation is no longer at zero.
    Raises DataError naming the features on (quasi-)complete separation or non-convergence."""
    p = len(columns)
    beta = np.zeros(p) if start is None else np.array(start, dtype=float)
    penalty = _ridge_penalty(p, ridge)
    first = None
    for iteration in range(1, max_iterations + 1):
        n, g, h, loglik, p_min, p_max = unpack(evaluate(beta), p)
        if first is None:
            first = (n, h.copy())
        g = g - penalty @ beta
        h = h + penalty
        try:
            step = _scaled_solve(h, g)
        except np.linalg.LinAlgError:
            raise DataError(
                "propensity.features",
                f"the propensity model cannot be fitted: the features {_collinear(h, columns)} are collinear or constant.",
                "drop one of them from propensity.features, or set propensity.ridge > 0.",
            ) from None
        beta = beta + step
        if np.max(np.abs(step)) < tolerance * max(1.0, np.max(np.abs(beta))):
            break
    else:
        _raise_not_converged(beta, columns, max_iterations)
    n, g, h, loglik, p_min, p_max = unpack(evaluate(beta), p)
    # Separation pushes some scores to the cap of the linear predictor (|b'x| ~ 30, p ~ 1e-13);
    # a legitimately tiny score (a high earner who would never enrol) stays far from it.
    if p_min < SEPARATION_P or p_max > 1 - SEPARATION_P:
        _raise_separation(beta, columns)
    return FittedModel(
        columns=columns,
        coefficients=[float(b) for b in beta],
        iterations=iteration,
        log_likelihood=loglik,
        n_units=int(n),
        fingerprint=fingerprint(*first) if start is None else "",
        levels={},
        ridge=ridge,
    )


def _scaled_solve(h: np.ndarray, g: np.ndarray) -> np.ndarray:
    """Solve h d = g after scaling h to unit diagonal: the squares of large counts make h span many
    orders of magnitude; the scaled system has the same solution and a far smaller condition number."""
    d = np.sqrt(np.abs(np.diag(h)))
    if np.any(d == 0):
        raise np.linalg.LinAlgError("constant column")
    hs = h / np.outer(d, d)
    return np.linalg.solve(hs, g / d) / d


# --------------------------------------------------------------------------------------------
# Stepwise choice of the model's terms (Imbens & Rubin 2015, Causal Inference for Statistics,
# Social, and Biomedical Sciences, section 13.3): from the base model, add first-order terms while
# the best statistic exceeds C_LIN, then second-order terms while it exceeds C_QUA.

C_LIN = 1.0
C_QUA = 2.71
MAX_CANDIDATE_SUMS = 1400  # one selection query stays under PostgreSQL's 1,664-column SELECT list


def first_order_candidates(current: list[DesignColumn]) -> list[DesignColumn]:
    """log(1 + x) beside each numeric term x: lets a skewed count enter on its log scale. The SQL
    clips x at 0 inside the log, so for a feature with negative values it is a hinge-like term."""
    have = {(c.kind, c.feature) for c in current}
    return [
        DesignColumn(name=f"log1p_{c.feature}", kind="log1p", feature=c.feature)
        for c in current
        if c.kind == "numeric" and ("log1p", c.feature) not in have
    ]


def second_order_candidates(current: list[DesignColumn]) -> list[DesignColumn]:
    """Squares of numeric terms, products of pairs of numeric terms, numeric x level products and
    products of levels of two different categorical features."""
    first = [c for c in current if c.kind in ("numeric", "log1p", "level")]
    have = {c.factors for c in current if c.kind == "product"}
    out = []
    for i, a in enumerate(first):
        for b in first[i:]:
            if a.kind == "level" and b.kind == "level" and a.feature == b.feature:
                continue  # a level times itself is itself; two levels of one feature never co-occur
            if a.feature == b.feature and a != b:
                continue  # x * log(1 + x): too close to the square to be worth a term
            if (a, b) in have:
                continue
            name = f"{a.name}__sq" if a == b else f"{a.name}__x__{b.name}"
            out.append(DesignColumn(name=name, kind="product", factors=(a, b)))
    return out


def score_statistics(row: dict, n_current: int, n_candidates: int) -> np.ndarray:
    """Rao's score statistic for adding each candidate alone to the current model, from one
    aggregate row at the current fit: U_c^2 / (I_cc - I_cb I_bb^-1 I_bc), with U_c = sum (t - p) x_c
    and I = sum p (1 - p) x x'. It is asymptotically equivalent to the likelihood-ratio statistic
    (Rao 1948) and needs no refit per candidate: one query scores every candidate at once."""
    p = n_current + n_candidates
    _, g, h, _, _, _ = unpack(row, p, selection_pairs(n_current, n_candidates))
    hbb = h[:n_current, :n_current]
    out = np.empty(n_candidates)
    for k in range(n_candidates):
        c = n_current + k
        hcb = h[c, :n_current]
        v = h[c, c] - hcb @ np.linalg.solve(hbb, hcb)
        out[k] = g[c] ** 2 / v if v > 1e-12 * max(h[c, c], 1e-300) else 0.0
    return out


def selection_pairs(n_current: int, n_candidates: int) -> list[tuple[int, int]]:
    """The information entries a selection query needs: current x current, candidate x current
    and each candidate's own square (no candidate x candidate products)."""
    pairs = [(i, j) for i in range(n_current) for j in range(i, n_current)]
    for c in range(n_current, n_current + n_candidates):
        pairs += [(i, c) for i in range(n_current)] + [(c, c)]
    return pairs


def stepwise(fit, evaluate, base: list[DesignColumn], progress=None):
    """Choose the terms: `fit(columns, start=None)` returns a FittedModel, `evaluate(columns, beta, pairs)` the
    selection query's row. Returns the final model with `selection` filled in."""
    model = fit(base)
    base_fingerprint = model.fingerprint
    chosen: list[dict] = []
    refused: set = set()  # terms whose refit separates the groups: never offered again
    for order, threshold, candidates_of in ((1, C_LIN, first_order_candidates), (2, C_QUA, second_order_candidates)):
        while True:
            cands = [c for c in candidates_of(model.columns) if c not in refused]
            if not cands:
                break
            p = len(model.columns)
            batch = max(1, MAX_CANDIDATE_SUMS // (p + 2) - 1)
            stats = []
            for start in range(0, len(cands), batch):
                part = cands[start:start + batch]
                cols = model.columns + part
                row = evaluate(cols, list(model.coefficients) + [0.0] * len(part), selection_pairs(p, len(part)))
                stats.extend(score_statistics(row, p, len(part)))
            best = int(np.argmax(stats))
            if stats[best] <= threshold:
                break
            try:
                # begin at the current fit, the new term at 0 (it is the point the statistic was taken at)
                refit = fit(model.columns + [cands[best]], start=list(model.coefficients) + [0.0])
            except DataError:
                refused.add(cands[best])  # separation or collinearity with this term: the next best may fit
                continue
            refit.fingerprint = base_fingerprint  # a digest of the data: the base fit's, taken at zero
            model = refit
            chosen.append({"term": describe_column(cands[best]), "order": order, "statistic": float(stats[best])})
            if progress is not None:
                progress.note(f"propensity term added: {describe_column(cands[best])} (score statistic {stats[best]:.2f})")
    model.selection = chosen
    model.refused = [describe_column(c) for c in refused]
    return model


@dataclass(frozen=True)
class ModelCheck:
    """A stored model applied to the units of this run: their count, and Rao's score statistic
    for the stored coefficients on these units (None when the fit sampled the controls: the
    corrected intercept is not the sample's optimum)."""

    n_units_fitted: int
    n_units_now: int
    score_statistic: float | None
    df: int
    p_value: float | None


def _ridge_penalty(p: int, ridge: float) -> np.ndarray:
    """ridge * I, the intercept unpenalised."""
    penalty = np.eye(p) * ridge
    penalty[0, 0] = 0.0
    return penalty


def check_model(row: dict, model: FittedModel) -> ModelCheck | None:
    """From the propensity_check row (score vector g and information matrix H at the stored
    coefficients b, over this run's units): Rao's score statistic g' H^-1 g, chi-square on p
    degrees of freedom if these units follow the model with coefficients b (Rao 1948, Proc.
    Cambridge Philos. Soc. 44:50; as recalled from memory). It is 0 on the units the model was
    fitted on, where g = 0; with a ridge the penalised score g - ridge * b is used (the fit's
    optimum), so the same holds.

    None when the row was computed at other coefficients than `model`'s (the model file was
    rewritten after the SQL that ran was compiled): the row's b_i say which ones it used."""
    p = len(model.columns)
    used = [row.get(columns.coefficient(i)) for i in range(p + 1)]
    if used[p] is not None or any(b is None for b in used[:p]):
        return None
    if not np.allclose([float(b) for b in used[:p]], model.coefficients, rtol=1e-9, atol=1e-12):
        return None
    n, g, h, *_ = unpack(row, p)
    statistic = p_value = None
    if model.sampled_controls >= 1.0:
        beta = np.asarray(model.coefficients, dtype=float)
        penalty = _ridge_penalty(p, model.ridge)
        g, h = g - penalty @ beta, h + penalty
        try:
            statistic = float(max(g @ np.linalg.solve(h, g), 0.0))
        except np.linalg.LinAlgError:
            statistic = None
        if statistic is not None:
            from scipy import stats  # installed with statsmodels

            p_value = float(stats.chi2.sf(statistic, p))
    return ModelCheck(n_units_fitted=model.n_units, n_units_now=int(round(n)), score_statistic=statistic, df=p, p_value=p_value)


def _suspects(beta: np.ndarray, columns: list[DesignColumn]) -> str:
    order = np.argsort(-np.abs(beta[1:]))[:3] + 1
    return ", ".join(describe_column(columns[i]) for i in order)


def _raise_separation(beta, columns):
    raise DataError(
        "propensity.features",
        f"enrolment is (almost) perfectly predicted by the features, so scores reach 0 or 1 "
        f"(separation); the largest coefficients are on: {_suspects(beta, columns)}.",
        "remove or coarsen those features, restrict eligibility to units that could enrol, or set propensity.ridge > 0.",
    )


def _raise_not_converged(beta, columns, iterations):
    raise DataError(
        "propensity.max_iterations",
        f"the propensity model did not converge in {iterations} Newton steps; coefficients keep growing on: {_suspects(beta, columns)}.",
        "this usually means separation: remove or coarsen those features, or set propensity.ridge > 0.",
    )


def _collinear(h: np.ndarray, columns: list[DesignColumn]) -> str:
    w, v = np.linalg.eigh(h)
    vec = v[:, int(np.argmin(np.abs(w)))]
    order = np.argsort(-np.abs(vec))[:3]
    return ", ".join(describe_column(columns[i]) for i in order if abs(vec[i]) > 1e-3)


def logit(p: float) -> float:
    return math.log(p / (1 - p))


# ---------------------------------------------------------------- plan steps


def newton_statements(spec, dialect: str, columns, beta, pairs=None, transient: bool = True) -> list[str]:
    """The aggregate queries of one Newton step of the propensity model at coefficients `beta`
    (`pairs`: only these information entries, for the stepwise selection query): one, or several
    parts whose rows `evaluate_newton` merges, when the sums exceed columns.MAX_SUMS_PER_QUERY."""
    from sqlmatch.plan import PlanContext

    ctx = PlanContext(spec=spec, dialect=dialect, transient=transient)
    return [s.statements[0] for s in newton_steps(ctx, columns, beta, pairs=pairs)]


def evaluate_newton(fetch, statements: list[str]) -> dict:
    """One Newton step's row from its queries (`fetch(sql)` returns a QueryResult), parts merged."""
    from sqlmatch.engines.base import merged

    return merged([fetch(s) for s in statements], "propensity_newton").one()


def newton_steps(ctx, columns, beta, name: str = "propensity_newton", pairs=None) -> list:
    """The Newton step's query steps: part 1 returns n, the score vector, the log-likelihood, the
    fitted range and the first information entries; each later part more entries; every part the
    coefficients b (so a row's parts are known to belong together)."""
    p = len(columns)
    pairs = list(pairs if pairs is not None else upper_pairs(p))
    parts = split_sums(pairs, first_fixed=2 * p + 4, later_fixed=p)
    return ctx.query_parts(
        name,
        "propensity_newton",
        reads=[ctx.display("score_cells")],
        purpose="Propensity model: score vector, information matrix and log-likelihood at the coefficients shown.",
        parts=[dict(pairs=part, head=k == 1, part=k) for k, part in enumerate(parts, 1)],
        n_parts=len(parts),
        columns=columns,
        numbers={"beta": [float(b) for b in beta]},
        clamp=ETA_CLAMP,
        sample_per_10000=_sample_per_10000(ctx.spec),
        cells_table=ctx.table("score_cells"),
    )


def _sample_per_10000(spec) -> int:
    return int(round(spec.propensity.sample_controls * 10000))


def cells_step(ctx):
    """The units grouped by their propensity features' values: every Newton step reads this."""
    return ctx.table_step(
        "propensity_cells",
        "propensity_cells",
        writes="score_cells",
        reads=[ctx.display("measures")],
        purpose="Units grouped by their values of the propensity features, with unit and treated counts (the data each Newton step sums over).",
        features=list(ctx.spec.propensity.features),
        sample_per_10000=_sample_per_10000(ctx.spec),
        measures_table=ctx.table("measures"),
    )


def levels_step(ctx):
    spec = ctx.spec
    cats = [n for n in spec.propensity.features if spec.feature(n).categorical]
    if not cats:
        return None
    return ctx.query_step(
        "categorical_levels",
        "categorical_levels",
        reads=[ctx.display("measures")],
        purpose="Levels of the categorical features of the propensity model.",
        features=cats,
        measures_table=ctx.table("measures"),
    )


def plan_steps(ctx, model) -> list:
    """The propensity model's steps in a plan: the units grouped by feature values (what every
    Newton step sums over), then, without a fitted model, the categorical levels the runner needs
    to fit one; with one, the Newton-step aggregates at its coefficients (the stored-model check)."""
    steps = [cells_step(ctx)]
    if ctx.names_only:  # the steps' names and tables only (plan.writable_tables)
        return steps + newton_steps(ctx, (), (), name="propensity_check")
    if model is None:
        levels = levels_step(ctx)
        return steps + ([levels] if levels else [])
    return steps + newton_steps(ctx, model.columns, model.coefficients, name="propensity_check")
