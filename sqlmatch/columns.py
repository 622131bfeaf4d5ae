"""Names of the aggregate columns: the one contract between the templates that write them and
the Python that reads them (aggregates.py, propensity.py). Templates call these through the
`col` global (render.environment); nothing else spells a column name of an aggregate row.

Every name is ours and is quoted by the `name` filter when it is printed, so a feature called
`select` still gives a usable column.
"""

from __future__ import annotations

from dataclasses import dataclass

# The statistics in use (the part after `__`): balance_numeric n, sum, sumsq, min, max and, after
# matching, w (sum of weights), w2 (of squared weights), wsum, wsumsq; outcome_strata sum, sumsq,
# did_sum, did_sumsq and for ratios sum_y, sum_x, sumsq_y, sumsq_x, sum_xy; group_sizes null;
# outcome_regression centre, yty, tyy; pair_signed_rank sum_d, sum_d2, t_plus, n_nonzero, tie_term;
# data_coverage total (of a measure column); the measures' <ratio outcome>__incomplete (events left out).


def stat(name: str, what: str) -> str:
    """A per-feature or per-outcome statistic: `<name>__<what>` (e.g. pre_trips__sumsq). Feature
    and outcome names have no double underscore (spec._NAME_RE), so the split is unambiguous."""
    return f"{name}__{what}"


@dataclass(frozen=True)
class DesignColumn:
    """One column of outcome_regression's design: x<index>."""

    index: int
    describes: str
    feature: str | None = None  # the numeric feature, None for the intercept and treatment

    @property
    def column(self) -> str:
        return f"x{self.index}"


def regression_design(features: list[str]) -> list[DesignColumn]:
    """x0 = 1, x1 = treated, then one column per numeric feature (aggregates.regression_sums
    reads X'WX and X'Wy in this order)."""
    return [DesignColumn(0, "1"), DesignColumn(1, "treated")] + [DesignColumn(i + 2, f, f) for i, f in enumerate(features)]


def upper_pairs(p: int) -> list[tuple[int, int]]:
    """(i, j) with i <= j < p: the upper triangle of a symmetric p x p matrix of sums."""
    return [(i, j) for i in range(p) for j in range(i, p)]


def cross(a: str, b: str) -> str:
    """Sum of the product of two columns (a feature with a feature or with an outcome), outcome_strata."""
    return f"{a}__x__{b}"


def adjustment_terms(p: int, terms: str = "linear") -> list[tuple[int, ...]]:
    """The regressors of the within-stratum adjustment (estimators/adjusted.py) over p numeric
    features, each as the sorted indices of the features it multiplies: (i,) for feature i, then
    with `terms = "squares"` (i, i) for its square, with "products" also (i, j), i < j, for every
    pair."""
    out = [(i,) for i in range(p)]
    if terms in ("squares", "products"):
        out += [(i, i) for i in range(p)]
    if terms == "products":
        out += [(i, j) for i in range(p) for j in range(i + 1, p)]
    return out


# The most sums outcome_strata may carry for the adjustment (every part's together): beyond it
# [effect] adjustment_terms is refused, naming the count (products of many features grow with
# the fourth power of their number).
MAX_ADJUSTMENT_SUMS = 6000


def adjustment_monomials(terms: list[tuple[int, ...]]) -> list[tuple[int, ...]]:
    """The products of features whose per-cell sums the adjustment needs: every term (sum z) and
    every product of two terms (sum z z'), each once (x_i * x_i is also the square term (i, i)),
    in the order first needed."""
    seen: dict[tuple[int, ...], None] = {}
    for t in terms:
        seen.setdefault(t, None)
    for a, b in upper_pairs(len(terms)):
        seen.setdefault(tuple(sorted(terms[a] + terms[b])), None)
    return list(seen)


def monomial_sum(mono: tuple[int, ...], names) -> str:
    """outcome_strata's sum of a product of features: `<f>__xsum` for one, cross(f, g) for two,
    `adj_<i>_<j>_<k>...` (feature indices) for three or four, short enough for PostgreSQL's
    63-character identifiers."""
    if len(mono) == 1:
        return stat(names[mono[0]], "xsum")
    if len(mono) == 2:
        return cross(names[mono[0]], names[mono[1]])
    return "adj_" + "_".join(str(i) for i in mono)


def monomial_outcome(mono: tuple[int, ...], names, key: str) -> str:
    """outcome_strata's sum of a term times an outcome column `key` (an outcome, or for a ratio
    outcome `<name>__num` / `<name>__den`): cross(f, key) for a feature, `adj_<i>_<j>__x__<key>`."""
    if len(mono) == 1:
        return cross(names[mono[0]], key)
    return "adj_" + "_".join(str(i) for i in mono) + "__x__" + key


def xtx(i: int, j: int) -> str:
    """Entry (i, j), i <= j, of X'WX in outcome_regression (shared by every outcome)."""
    return f"xtx_{i}_{j}"


def xty(outcome: str, i: int) -> str:
    return f"{outcome}__xty_{i}"


def weight_total(what: str) -> str:
    """n_units, sum_w2, sum_w2_t of outcome_regression."""
    return what


def gradient(i: int) -> str:
    """Entry i of the propensity model's score vector (propensity_newton)."""
    return f"g_{i}"


def information(i: int, j: int) -> str:
    """Entry (i, j), i <= j, of the propensity model's information matrix."""
    return f"h_{i}_{j}"


def coefficient(i: int) -> str:
    """The coefficient a propensity_newton row was computed at."""
    return f"b_{i}"


def score_products(i: int, j: int) -> str:
    """Entry (i, j), i <= j, of sum (t - e)^2 x x' (the propensity score's part of the sandwich)."""
    return f"rr_{i}_{j}"


def weighting(key: str, group: str, what: str, j: int | None = None) -> str:
    """A sum of score_weighting_sandwich for one outcome (or `<outcome>__did`) and group (t, c):
    u, v, uu, uv, vv, and per design column j: ru, rv (times the score residual), du, dv."""
    return f"{key}__w{group}_{what}" + ("" if j is None else f"_{j}")


def balancing(what: str, i: int | None = None, j: int | None = None) -> str:
    """A sum of the entropy-balancing queries (targets, Newton step, summary, sandwich): `eb_<what>`,
    per moment function i (and pair i <= j)."""
    return f"eb_{what}" + ("" if i is None else f"_{i}") + ("" if j is None else f"_{j}")


def balancing_term(key: str, group: str, what: str, j: int | None = None) -> str:
    """A sum of entropy_balancing_sandwich for one outcome (or `<outcome>__did`) and group (t, c)."""
    return f"{key}__e{group}_{what}" + ("" if j is None else f"_{j}")


def weighting_cross(what: str, i: int, j: int) -> str:
    """Entry (i, j), i <= j, of a matrix of sums over design columns for the doubly robust effect of
    score_weighting_sandwich: per group (t, c) a = sum a x x', aa = sum a^2 x x', ar = sum a (t - e) x x',
    g = sum g x x'; over the target units s = sum x x', sr = sum (t - e) x x'."""
    return f"dr_{what}_{i}_{j}"


# PostgreSQL refuses a SELECT list longer than 1,664 entries ("target lists can have at most 1664
# entries"); a one-row aggregate query whose sums grow with the square of the design columns is
# split into several queries of at most this many entries each, merged by column name
# (merge_parts). A margin below the limit; a scheduled part is also a table, and PostgreSQL tables
# hold at most 1,600 columns (the part's entries plus plan__fingerprint).
MAX_SUMS_PER_QUERY = 1500


def split_sums(items: list, first_fixed: int = 0, later_fixed: int = 0, limit: int | None = None) -> list[list]:
    """`items` (the sums of one query, in order) cut into consecutive parts such that each part's
    SELECT list, its items plus the columns every part of that kind repeats (`first_fixed` in the
    first part, `later_fixed` in the others), has at most `limit` entries. One part (the whole list)
    when it fits, so a small query is the query it always was. `limit` defaults to
    MAX_SUMS_PER_QUERY, read at the call."""
    limit = MAX_SUMS_PER_QUERY if limit is None else limit
    if first_fixed >= limit or later_fixed >= limit:
        raise ValueError(f"{max(first_fixed, later_fixed)} fixed columns leave no room under {limit}")
    parts, rest, room = [], list(items), limit - first_fixed
    while True:
        parts.append(rest[:room])
        rest = rest[room:]
        if not rest:
            return parts
        room = limit - later_fixed


def part_name(name: str, k: int) -> str:
    """The step (and scheduled table) of part k >= 2 of a split query `name`; part 1 keeps `name`."""
    return name if k == 1 else f"{name}__part{k}"


def merge_parts(parts: list[tuple[tuple[str, ...], tuple[tuple, ...]]], what: str = "query") -> tuple[tuple[str, ...], tuple[tuple, ...]]:
    """The (columns, rows) of the parts of one split query, as the one result the query would have
    given: rows are matched in order (each part returns the same rows: one, or one per subgroup
    level in the same ORDER BY), columns are joined by name. A column several parts return (the
    coefficients a row was computed at, a subgroup level, a maximum) must have equal values in all
    of them, or the parts were not computed together and are refused."""
    from sqlmatch.errors import SqlmatchError

    columns, rows = parts[0]
    columns, rows = list(columns), [list(r) for r in rows]
    for k, (more_columns, more_rows) in enumerate(parts[1:], 2):
        if len(more_rows) != len(rows):
            raise SqlmatchError(f"{what}: part {k} returned {len(more_rows)} rows, part 1 {len(rows)}. Fix: run every part of the step from the same plan.")
        index = {c: i for i, c in enumerate(columns)}
        for r, more in zip(rows, more_rows):
            for c, value in zip(more_columns, more):
                if c in index:
                    if r[index[c]] != value:
                        raise SqlmatchError(
                            f"{what}: part {k} has {c} = {value!r} where part 1 has {r[index[c]]!r}: the parts were computed "
                            "at different coefficients or on different data. Fix: run every part of the step from the same plan."
                        )
                else:
                    r.append(value)
        columns += [c for c in more_columns if c not in index]
    return tuple(columns), tuple(tuple(r) for r in rows)
