"""Study spec: TOML in, validated dataclasses out. Every error names the key at fault.

The spec says which tables hold units and events, who is treated (the enrolment month
studied), who may serve as a control, the pre and post windows, the features and outcomes
to build, and the matching method. Nothing here touches a database; column existence is
checked later against the engine's catalog (preflight).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import re
import unicodedata
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import sqlglot
from sqlglot import exp

from sqlmatch import matching as _matching_methods
from sqlmatch.errors import SpecError
from sqlmatch.matching.base import OptionInput
from sqlmatch.spec_values import check_keys as _check_keys
from sqlmatch.spec_values import feature_list, read_bool
from sqlmatch.spec_values import read_choice as _choice
from sqlmatch.spec_values import read_int as _int
from sqlmatch.spec_values import read_str as _str

# Names we create columns and tables from: plain identifiers, so generated SQL stays readable.
_NAME_RE = re.compile(r"^[a-z](?!.*__)[a-z0-9_]{0,47}$")
_COHORT_RE = re.compile(r"^(\d{4})-(\d{2})$")

FEATURE_AGGREGATES = ("count", "sum", "mean", "active_days", "days_since_last", "attribute", "derived")
# "derived": an expression over features defined before it (pre_trips * pre_trips, ln(1 + pre_trips),
# pre_trips = 0, ...), computed per unit after the measures, in the same step
DERIVED = "derived"
# "missing_indicator" features are not written in specs: a numeric attribute with missing = "fill"
# adds one (1 where the attribute was NULL, else 0), so matching and balance see who was filled.
MISSING_INDICATOR = "missing_indicator"
MISSING_POLICIES = {"numeric": ("error", "fill", "drop"), "categorical": ("level", "drop")}
OUTCOME_AGGREGATES = ("count", "sum", "active_days", "ratio", "active_at_end")
CONTROL_POOLS = ("never_by_post_end", "not_yet_enrolled")
WINDOW_UNITS = ("month", "day")
ADJUSTMENT_SLOPES = ("group", "common")  # [effect] adjustment_slopes (estimators/adjusted.py)
ADJUSTMENT_TERMS = ("linear", "squares", "products")  # [effect] adjustment_terms
POST_STARTS = ("after_cohort", "cohort")
METHODS = tuple(_matching_methods.METHODS)
# Names of earlier versions, refused with the name to use now.
RENAMED_METHODS = {"nearest": "nearest_neighbour"}
RENAMED_MATCHING_KEYS = {"exact": "block_on"}  # common keys; each method lists its own (renamed_options)

# Columns the templates write into unit-level tables (study units, measures, weighted, scores,
# weights): a feature or outcome of the same name would shadow or collide with them.
RESERVED_COLUMNS = (
    "unit_key", "treated", "in_study", "first_event_at", "last_event_at", "n_events", "n_units",
    "unknown__units", "unknown__events", "match__stratum", "match__weight", "score", "score_bin",
    "stratum", "weight", "n_matches", "unit_seq", "matched_treated", "matched_control", "n_treated", "n_control",
)

# Filters are an allowlist: these node types, plus the pure scalar functions below. Anything else
# (subqueries, aggregates, windows, parameters, unknown or side-effecting functions) is refused.
_FILTER_NODES = (
    exp.Column, exp.Identifier, exp.Literal, exp.Boolean, exp.Null, exp.Paren, exp.Tuple,
    exp.And, exp.Or, exp.Not, exp.Neg, exp.Is, exp.In, exp.Between, exp.Like, exp.ILike,
    exp.EQ, exp.NEQ, exp.GT, exp.GTE, exp.LT, exp.LTE, exp.NullSafeEQ, exp.NullSafeNEQ,
    exp.Add, exp.Sub, exp.Mul, exp.Div, exp.Mod, exp.IntDiv,
    exp.Case, exp.If, exp.Cast, exp.TryCast, exp.DataType, exp.DataTypeParam, exp.Interval, exp.Var,
)
_FILTER_FUNCTIONS = {
    exp.Extract: "extract", exp.Year: "year", exp.Month: "month", exp.Day: "day", exp.Lower: "lower",
    exp.Upper: "upper", exp.Trim: "trim", exp.Length: "length", exp.Coalesce: "coalesce", exp.Nullif: "nullif",
    exp.Abs: "abs", exp.Round: "round", exp.Floor: "floor", exp.Ceil: "ceil", exp.Least: "least",
    exp.Greatest: "greatest", exp.Substring: "substr/substring", exp.Concat: "concat",
}
FILTER_FUNCTIONS_TEXT = ", ".join(sorted(_FILTER_FUNCTIONS.values()))
# Derived features also take these numeric functions; plan.derived_column guards their arguments so
# every engine gives the same value (LN(0) is an error on PostgreSQL, -inf on DuckDB, NULL on Spark).
# LOG is left out: log(x) is base 10 on DuckDB and PostgreSQL, base e on Spark.
_DERIVED_FUNCTIONS = {**_FILTER_FUNCTIONS, exp.Ln: "ln", exp.Exp: "exp", exp.Sqrt: "sqrt", exp.Pow: "power"}
_FILTER_MAX_DEPTH = 64  # nesting of parentheses; deeper is refused before parsing


@dataclass(frozen=True)
class TableRef:
    """A source table, optionally schema-qualified; names are kept verbatim and quoted on output."""

    name: str
    schema: str | None = None

    @property
    def display(self) -> str:
        return f"{self.schema}.{self.name}" if self.schema else self.name


@dataclass(frozen=True)
class Windows:
    unit: str
    pre: int
    post: int
    cohort_start: dt.date
    cohort_end: dt.date
    pre_start: dt.date
    post_start: dt.date
    post_end: dt.date
    # "after_cohort": the post window opens when the cohort month ends (no unit is half-enrolled
    # in it); "cohort": it opens with the cohort month, so outcomes include the days of that
    # month before each unit enrolled (diagnostics says so)
    post_starts: str = "after_cohort"

    @property
    def pre_days(self) -> int:
        return (self.cohort_start - self.pre_start).days


@dataclass(frozen=True)
class Feature:
    name: str
    aggregate: str
    measure: str | None = None  # events column for sum/mean
    attribute: str | None = None  # units column for attribute features
    categorical: bool = False
    fill: float | None = None  # event features: value for a unit with no events in the window; attributes: see missing
    # What a NULL attribute becomes (MISSING_POLICIES): "error" refuses the run, "fill" puts `fill` in
    # its place and flags it in the indicator feature <name>_missing, "drop" takes the unit out of
    # the study, "level" (categorical) makes it a level of its own. Event features are never NULL.
    missing: str | None = None
    key: str = field(default="", compare=False)  # the spec key naming this feature, for messages
    # attribute features: a SQL expression over unit columns instead of one column; derived
    # features: one over earlier features (parsed and allowlisted as filters are; a condition
    # counts as 1 when true, 0 when false)
    expression: exp.Expression | None = field(default=None, compare=False)
    expression_text: str | None = None

    @property
    def indicator(self) -> str | None:
        """Name of the missing-value indicator feature this feature adds (missing = "fill")."""
        return f"{self.name}_missing" if self.missing == "fill" else None

    @property
    def is_missing_indicator(self) -> bool:
        """This feature is the 0/1 indicator another feature's missing = "fill" added."""
        return self.aggregate == MISSING_INDICATOR


@dataclass(frozen=True)
class Outcome:
    name: str
    aggregate: str
    measure: str | None = None
    numerator: str | None = None  # ratio: events column summed on top
    denominator: str | None = None  # ratio: events column summed below; None = count of events
    last: int = 1  # active_at_end: how many window units at the end of the post window
    twin: str | None = None  # pre-window feature measuring the same thing (difference-in-differences)
    key: str = field(default="", compare=False)  # the spec key naming this outcome, for messages

    @property
    def kind(self) -> str:
        if self.aggregate == "ratio":
            return "ratio"
        if self.aggregate == "active_at_end":
            return "binary"
        return "continuous"


@dataclass(frozen=True)
class Subgroup:
    """[[subgroups]]: effects per level of a categorical feature, or for the units a condition over
    the features holds for ("yes") and the others ("no")."""

    name: str
    feature: str | None = None
    where: exp.Expression | None = field(default=None, compare=False)
    where_text: str | None = None
    key: str = field(default="", compare=False)


@dataclass(frozen=True)
class Matching:
    """[matching]. The first five fields are read here; the rest are the options of one method
    each, read and checked by that method's module (matching/<method>.py, read_options)."""

    method: str
    on: tuple[str, ...]
    block_on: tuple[str, ...] = ()  # categorical features matched exactly on top of the score
    common_support: bool = True  # drop units outside the overlap of treated and control scores
    min_treated: int = 10  # refuse a run that matches fewer treated units than this (see _matching)
    estimand: str = "att"  # att: on the treated | atc: on the controls | ate: on everyone (methods list theirs)
    # coarsened_exact
    cut_points: dict[str, tuple[float, ...]] = field(default_factory=dict)
    coarsen: str | None = None  # automatic cut points for numeric features without explicit ones
    coarsen_bins: int = 10  # number of equal-count bins for coarsen = "quantiles"
    # score_bins
    bins: int | None = None  # subclasses at treated-score quantiles; None: chosen from the data (score_bins.py)
    # nearest_neighbour
    distance: str = "score"  # score | mahalanobis | rank_mahalanobis
    caliper: float = 0.2  # in SDs of the logit score (pooled over the two groups)
    controls_per_treated: int = 1  # k of k:1 matching
    reuse_controls: bool = True  # a control may serve several treated units (with replacement)
    max_candidate_pairs: int = 50_000_000  # refuse a candidate join larger than this
    bias_correction: bool = True  # with replacement: Abadie & Imbens (2011) regression correction
    # score_weighting
    score_margin: float = 0.0  # leave out units whose score is outside [a, 1 - a]; 0: none
    weight_cap_quantile: float | None = None  # truncate control weights at this quantile of theirs
    # entropy_balancing
    balance_variances: bool = False  # also balance the numeric features' variances
    balancing_max_steps: int = 50  # Newton steps of the dual before the targets count as unreachable
    stabilised_weights: bool = False  # weights times the group's marginal share (Robins, Hernan & Brumback 2000)


@dataclass(frozen=True)
class Propensity:
    """Logistic model of enrolment on the features (see propensity.py)."""

    features: tuple[str, ...]
    log1p: tuple[str, ...] = ()
    ridge: float = 0.0
    max_iterations: int = 25
    sample_controls: float = 1.0  # fit on all treated and this share of controls (integer unit keys)
    # linear: the base terms only; stepwise (default): terms chosen from the data (propensity.stepwise),
    # measured to cover where the linear score did not (benchmarks/RESULTS_calibration_terms.md)
    terms: str = "stepwise"


@dataclass(frozen=True)
class Spec:
    name: str
    work_schema: str
    database: str | None
    units: TableRef
    unit_key: str
    enrolled_on: str
    events: TableRef
    event_unit_key: str
    event_time: str
    cohort: str
    control_pool: str
    windows: Windows
    filters: tuple[exp.Expression, ...]
    filter_texts: tuple[str, ...]
    features: tuple[Feature, ...]
    outcomes: tuple[Outcome, ...]
    matching: Matching
    propensity: Propensity
    min_cell_size: int = 10
    results_table: str | None = None  # a table in work_schema keeping one row per run, cohort, method and outcome
    # Count, in the pass over the events, those whose unit is not in the units table (the pass then
    # joins the events to every unit key, not only the study's; see benchmarks/RESULTS.md).
    check_unknown_units: bool = True
    treatment_words: str = "enrolment"  # [treatment] described_as: how sentences name the treatment
    # [effect] regression_adjustment: the headline effect of count, sum and 0/1 outcomes is adjusted
    # by a within-stratum regression on the numeric features (estimators/adjusted.py); both are reported.
    # None (not given): on for coarsened_exact and score_bins (effects.ADJUSTED_BY_DEFAULT), measured to
    # cover at least as well as the plain comparison (benchmarks/RESULTS_calibration_stratum.md)
    regression_adjustment: bool | None = None
    # [effect] adjustment_slopes: "common" (default) fits one within-stratum slope on both groups;
    # "group" fits each group's own and predicts each group's stratum mean at the estimand's target
    # means (estimators/adjusted.py). The defaults stay common and linear: on the commuter
    # simulation each group's slopes with squares removed more bias but left the fares' SE too
    # small, so coverage fell (benchmarks/RESULTS_calibration_adjustment_groups.md)
    adjustment_slopes: str = "common"
    # [effect] adjustment_terms: the regressors of that adjustment: "linear" (default: the numeric
    # features), "squares" (and their squares), "products" (and their squares and pairwise products)
    adjustment_terms: str = "linear"
    source_path: Path | None = None

    @property
    def attribute_features(self) -> tuple[Feature, ...]:
        return tuple(f for f in self.features if f.aggregate == "attribute")

    @property
    def event_features(self) -> tuple[Feature, ...]:
        return tuple(f for f in self.features if f.aggregate not in ("attribute", MISSING_INDICATOR, DERIVED))

    @property
    def derived_features(self) -> tuple[Feature, ...]:
        return tuple(f for f in self.features if f.aggregate == DERIVED)

    @property
    def missing_indicators(self) -> tuple[Feature, ...]:
        return tuple(f for f in self.features if f.aggregate == MISSING_INDICATOR)

    @property
    def numeric_features(self) -> tuple[Feature, ...]:
        return tuple(f for f in self.features if not f.categorical)

    @property
    def categorical_features(self) -> tuple[Feature, ...]:
        return tuple(f for f in self.features if f.categorical)

    def feature(self, name: str) -> Feature:
        return next(f for f in self.features if f.name == name)

    def with_overrides(self, *, cohort: str | None = None, method: str | None = None) -> "Spec":
        """A copy with the cohort or method replaced (command-line overrides)."""
        raw = dict(self._raw)
        if cohort is not None:
            raw["treatment"] = {**raw.get("treatment", {}), "cohort": cohort}
        if method is not None:
            raw["matching"] = {**raw.get("matching", {}), "method": method}
        return parse_spec(raw, source_path=self.source_path)

    _raw: dict = field(default_factory=dict, repr=False, compare=False)

    # [placebo] months_before: the placebo study runs the same design this many months earlier
    placebo_months: int | None = None
    subgroups: tuple[Subgroup, ...] = ()
    # in a placebo study: the real study's windows, which still say who enrolled (treated) and
    # who is a control; `windows` then holds the shifted feature and outcome windows
    enrolment_windows_of: Windows | None = None

    @property
    def enrolment_windows(self) -> Windows:
        """The windows that define who is treated and who is a control."""
        return self.enrolment_windows_of or self.windows

    def placebo_spec(self) -> "Spec":
        """The same design placed `placebo_months` earlier: the real cohort stays the treated group,
        features and outcomes are measured in windows that end before anyone in it enrolled, so the
        true effect is zero by construction. Its tables and model file are its own."""
        windows = _placebo_windows(self.windows, self.placebo_months)
        return dataclasses.replace(
            self, name=f"{self.name}_placebo", windows=windows, enrolment_windows_of=self.windows, placebo_months=None, results_table=None
        )


# --------------------------------------------------------------------------------------------
# reading helpers: each takes the dotted key so errors can name it


def _unsafe_char(text: str, allow_whitespace: bool = False) -> str | None:
    """The first control/format character (newline, tab, NUL, bidi marks, ...) in text, if any."""
    for ch in text:
        if allow_whitespace and ch in "\n\r\t":
            continue
        if unicodedata.category(ch) in ("Cc", "Cf", "Cs", "Zl", "Zp"):
            return ch
    return None


def _check_values(value: Any, key: str) -> None:
    """Every string in the spec is free of control characters (a name can then never end a SQL
    comment line) and every number is finite; the error names the key."""
    if isinstance(value, dict):
        for k, v in value.items():
            sub = f"{key}.{k}" if key else str(k)
            bad = _unsafe_char(str(k))
            if bad is not None:
                raise SpecError(sub, f"the key contains the control character U+{ord(bad):04X}.", "remove it.")
            _check_values(v, sub)
    elif isinstance(value, list):
        for i, v in enumerate(value):
            _check_values(v, f"{key}[{i}]")
    elif isinstance(value, str):
        # a filter is re-printed by sqlglot, so line breaks between its tokens are harmless
        bad = _unsafe_char(value, allow_whitespace=key.startswith("eligibility.filters"))
        if bad is not None:
            raise SpecError(
                key,
                f"contains the control character U+{ord(bad):04X} ({unicodedata.name(bad, 'unnamed')}).",
                "names and values may not hold line breaks, tabs or other control characters; remove it.",
            )
    elif isinstance(value, float) and not math.isfinite(value):
        raise SpecError(key, f"must be a finite number, got {value!r}.", "write an ordinary number.")


def _table(raw: dict, key: str) -> dict:
    value = raw.get(key.split(".")[-1])
    if value is None:
        raise SpecError(key, "is missing.", f"add a [{key}] table to the spec.")
    if not isinstance(value, dict):
        raise SpecError(key, f"must be a table, got {type(value).__name__}.", f"write it as [{key}].")
    return value


def _name(value: Any, key: str) -> str:
    if not isinstance(value, str) or not _NAME_RE.match(value):
        raise SpecError(
            key,
            f"{value!r} is not a usable name.",
            "use lower-case letters, digits and single underscores, starting with a letter (at most 48 characters).",
        )
    return value


def _table_ref(value: str, key: str) -> TableRef:
    """'schema.table' or 'table'; names with dots or quotes must use the {schema=, name=} form."""
    if isinstance(value, dict):
        _check_keys(value, key, {"schema", "name"})
        name = _str(value, key, "name")
        schema = _str(value, key, "schema", required=False)
        return TableRef(name=name, schema=schema)
    if not isinstance(value, str) or not value.strip():
        raise SpecError(key, f"must name a table, got {value!r}.")
    parts = value.split(".")
    if len(parts) == 1:
        return TableRef(name=parts[0])
    if len(parts) == 2 and all(parts):
        return TableRef(name=parts[1], schema=parts[0])
    raise SpecError(
        key,
        f"{value!r} is not 'table' or 'schema.table'.",
        "for names containing dots write {schema = \"...\", name = \"...\"}.",
    )


def _windows(cohort: str, unit: str, pre: int, post: int, post_starts: str = "after_cohort") -> Windows:
    m = _COHORT_RE.match(cohort)
    if not m or not 1 <= int(m.group(2)) <= 12:
        raise SpecError("treatment.cohort", f"{cohort!r} is not a month.", "write the enrolment month as \"YYYY-MM\".")
    try:
        cohort_start = dt.date(int(m.group(1)), int(m.group(2)), 1)
        cohort_end = add_months(cohort_start, 1)
        post_start = cohort_start if post_starts == "cohort" else cohort_end
        if unit == "month":
            pre_start = add_months(cohort_start, -pre)
            post_end = add_months(post_start, post)
        else:
            pre_start = cohort_start - dt.timedelta(days=pre)
            post_end = post_start + dt.timedelta(days=post)
    except (ValueError, OverflowError):
        raise SpecError(
            "treatment.cohort",
            f"{cohort!r} with windows.pre = {pre} and windows.post = {post} {unit}(s) reaches outside the dates 0001-01-01 to 9999-12-31.",
            "choose a later or earlier cohort, or shorter windows.",
        ) from None
    return Windows(
        unit=unit,
        pre=pre,
        post=post,
        cohort_start=cohort_start,
        cohort_end=cohort_end,
        pre_start=pre_start,
        post_start=post_start,
        post_end=post_end,
        post_starts=post_starts,
    )


def _subgroups(value: Any, features: tuple[Feature, ...]) -> tuple[Subgroup, ...]:
    if value is None:
        return ()
    out: list[Subgroup] = []
    names = [f.name for f in features]
    for i, item in enumerate(_list_of_tables(value, "subgroups")):
        key = f"subgroups[{i}]"
        _check_keys(item, key, {"name", "feature", "where"})
        feature, where_text = item.get("feature"), item.get("where")
        if (feature is None) == (where_text is None):
            raise SpecError(key, "needs exactly one of feature (a categorical feature) or where (a condition over the features).",
                            'e.g. feature = "age_band", or name = "frequent" with where = "pre_trips >= 10".')
        if feature is not None:
            f = next((f for f in features if f.name == feature), None)
            if f is None or not f.categorical:
                cats = ", ".join(f.name for f in features if f.categorical) or "(none)"
                raise SpecError(f"{key}.feature", f"{feature!r} is not a categorical feature.", f"use one of: {cats}; or a condition with where = \"...\".")
            name = _name(item.get("name", feature), f"{key}.name")
            out.append(Subgroup(name=name, feature=feature, key=key))
        else:
            where = parse_filter(where_text, f"{key}.where")
            unknown = [c for c in filter_columns(where) if c not in names]
            if unknown:
                raise SpecError(f"{key}.where", f"names {unknown[0]!r}, which is not a feature.", f"a subgroup condition reads the features: {', '.join(names)}.")
            name = _name(_str(item, key, "name"), f"{key}.name")
            out.append(Subgroup(name=name, where=where, where_text=where_text, key=key))
    seen = [s.name for s in out]
    for s in out:
        if seen.count(s.name) > 1:
            raise SpecError(f"{s.key}.name", f"{s.name!r} names two subgroups.", "give each subgroup its own name.")
    return tuple(out)


def _placebo_windows(windows: Windows, months: int) -> Windows:
    """The same windows around the cohort month `months` earlier."""
    shifted = add_months(windows.cohort_start, -months)
    return _windows(f"{shifted.year:04d}-{shifted.month:02d}", windows.unit, windows.pre, windows.post, windows.post_starts)


def _placebo(value: Any, windows: Windows) -> int | None:
    """[placebo] months_before: far enough back that the placebo's post window ends before the
    cohort month begins (nobody in the cohort has enrolled during any window it reads)."""
    if value is None:
        return None
    if not isinstance(value, dict):
        raise SpecError("placebo", "must be a table.", "write it as [placebo] with months_before = <whole number>.")
    _check_keys(value, "placebo", {"months_before"})
    months = _int(value, "placebo", "months_before", low=1, high=120)
    placebo = _placebo_windows(windows, months)
    if placebo.post_end > windows.cohort_start:
        need = next(k for k in range(months + 1, months + 200) if _placebo_windows(windows, k).post_end <= windows.cohort_start)
        raise SpecError(
            "placebo.months_before",
            f"{months} months back, the placebo's post window ends on {placebo.post_end}, after the cohort month begins ({windows.cohort_start}).",
            f"use months_before = {need} or more, so every window the placebo reads ends before anyone in the cohort enrolled.",
        )
    return months


def add_months(day: dt.date, months: int) -> dt.date:
    """First-of-month arithmetic (windows always start on the first of a month)."""
    index = day.year * 12 + (day.month - 1) + months
    return dt.date(index // 12, index % 12 + 1, 1)


def last_period_start(windows: Windows, last: int) -> dt.date:
    """Start of the final `last` window units of the post window."""
    if windows.unit == "month":
        return add_months(windows.post_end, -last)
    return windows.post_end - dt.timedelta(days=last)


def parse_filter(text: Any, key: str) -> exp.Expression:
    """Parse one boolean SQL expression over unit columns; refuse anything else.

    The filter is parsed with sqlglot as exactly one expression, then every node is checked
    against an allowlist (_FILTER_NODES, _FILTER_FUNCTIONS): comparisons, AND/OR/NOT, arithmetic,
    CASE, IN over literals, BETWEEN, IS NULL, LIKE, CAST, literals, unit columns and a few pure
    scalar functions. Comments are dropped so nothing can hide inside them in the compiled SQL.
    """
    tree = _parse_unit_expression(text, key, "filter", "a SQL boolean expression")
    if not is_boolean(tree):
        raise SpecError(
            key,
            f"{text!r} is not a boolean expression.",
            "write a condition such as signup_date < DATE '2025-09-01'.",
        )
    return tree


def parse_attribute_expression(text: Any, key: str) -> exp.Expression:
    """One SQL expression over unit columns that gives a feature's value (e.g. re74 * re74, or a
    condition such as re74 = 0, which counts as 1 / 0): the same parse and allowlist as filters."""
    return _parse_unit_expression(text, key, "feature expression", "a SQL expression")


def is_boolean(tree: exp.Expression) -> bool:
    return isinstance(tree, (exp.Predicate, exp.Connector, exp.Not, exp.Boolean, exp.Is, exp.In, exp.Between)) or (
        isinstance(tree, exp.Paren) and is_boolean(tree.this)
    )


# where a categorical feature may appear in a derived feature: compared with its levels
_LEVEL_TESTS = (exp.EQ, exp.NEQ, exp.NullSafeEQ, exp.NullSafeNEQ, exp.In, exp.Like, exp.ILike, exp.Is)


def parse_derived_expression(text: Any, key: str, name: str, earlier: list[str], later: list[str], categorical=()) -> exp.Expression:
    """One SQL expression over the features defined before this one (pre_trips * pre_trips,
    ln(1 + pre_trips), pre_trips = 0, ...): the parse and allowlist of filters plus a few numeric
    functions; a column must name an earlier feature."""
    tree = _parse_unit_expression(text, key, "derived feature expression", "a SQL expression", functions=_DERIVED_FUNCTIONS, over="earlier features")
    categorical = set(categorical)
    for col in tree.find_all(exp.Column):
        parent = col.parent
        while isinstance(parent, exp.Paren):
            parent = parent.parent
        if col.name in categorical and not isinstance(parent, _LEVEL_TESTS):
            raise SpecError(key, f"uses the categorical feature {col.name!r} as a number.", f"compare it with a level, e.g. CASE WHEN {col.name} = '<level>' THEN 1 ELSE 0 END.")
    for node in tree.find_all(exp.Mod, exp.IntDiv):
        # on doubles, % does not exist on PostgreSQL and // divides on DuckDB but truncates elsewhere
        raise SpecError(key, f"{node.sql(dialect='duckdb')[:40]!r} uses {'%' if isinstance(node, exp.Mod) else '//'}, which engines compute differently.",
                        "write floor(x / y) for a whole quotient, or x - y * floor(x / y) for a remainder.")
    for col in filter_columns(tree):
        if col in earlier:
            continue
        if col == name:
            raise SpecError(key, f"refers to {col!r}, the feature it defines.", f"build it from features defined before it: {', '.join(earlier) or '(none)'}.")
        if col in later:
            raise SpecError(key, f"refers to {col!r}, which is defined after this feature.", f"move [[features]] {col!r} above this one, or use features defined before it: {', '.join(earlier) or '(none)'}.")
        raise SpecError(key, f"refers to {col!r}, which is not a feature.", f"a derived feature reads features defined before it: {', '.join(earlier) or '(none)'}.")
    return tree


def _parse_unit_expression(text: Any, key: str, what_kind: str, wanted: str, functions: dict | None = None, over: str = "unit columns") -> exp.Expression:
    functions = _FILTER_FUNCTIONS if functions is None else functions
    if not isinstance(text, str) or not text.strip():
        raise SpecError(key, f"must be {wanted} as a string, got {text!r}.")
    depth = deepest = 0
    for ch in text:  # sqlglot recurses per nesting level: refuse deep nesting before it overflows
        depth += ch == "("
        depth -= ch == ")"
        deepest = max(deepest, depth)
    if deepest > _FILTER_MAX_DEPTH:
        raise SpecError(key, f"nests parentheses {deepest} deep (at most {_FILTER_MAX_DEPTH}).", "write a flatter expression.")
    try:
        statements = sqlglot.parse(text, read="duckdb")
    except sqlglot.errors.SqlglotError as err:
        first = str(err).splitlines()[0]
        raise SpecError(key, f"could not be parsed as SQL: {first}", f"write one {wanted[2:]} over {over}.") from None
    except RecursionError:
        raise SpecError(key, "is nested too deeply to parse.", "write a flatter expression.") from None
    statements = [s for s in statements if s is not None]
    if len(statements) != 1:
        raise SpecError(
            key,
            f"holds {len(statements)} statements.",
            f"write exactly one {wanted[2:]}, with no semicolon, e.g. signup_date < DATE '2025-09-01'.",
        )
    tree = statements[0]
    names = ", ".join(sorted(set(functions.values())))
    allowed_fix = f"{what_kind}s may use {over}, literals, comparisons, AND/OR/NOT, arithmetic, CASE, IN (...), BETWEEN, IS NULL, LIKE, CAST and the functions {names}."
    for node in tree.walk():
        if isinstance(node, tuple(functions)) or isinstance(node, _FILTER_NODES):
            if isinstance(node, exp.In) and (node.args.get("query") or node.args.get("field") or node.args.get("unnest")):
                raise SpecError(key, "uses IN with something other than a list of values.", "remove the statement or subquery; " + allowed_fix)
            if isinstance(node, exp.Column) and not isinstance(node.this, exp.Identifier):
                raise SpecError(key, f"refers to {node.sql()!r}, which is not a column name.", allowed_fix)
            continue
        if isinstance(node, exp.Func):
            fname = node.sql_name() if not isinstance(node, exp.Anonymous) else node.name
            what = f"function {fname.lower()}"
        else:
            what = f"{type(node).__name__.upper()} ({node.sql(dialect='duckdb')[:40]!r})"
        statement = isinstance(node, (exp.Query, exp.Subquery, exp.DML, exp.DDL, exp.Command))
        fix = ("remove the statement or subquery; " if statement else "") + allowed_fix
        raise SpecError(key, f"{what} is not allowed in a {what_kind}; only {wanted} over {over} is.", fix)
    for node in tree.walk():
        node.comments = None
        if isinstance(node, exp.Column) and node.table:
            raise SpecError(key, f"refers to {node.sql()!r} with a table prefix.", f"name {over} without a prefix.")
    return tree


def filter_columns(tree: exp.Expression) -> list[str]:
    return sorted({c.name for c in tree.find_all(exp.Column)})


# --------------------------------------------------------------------------------------------


def load_spec(path: str | Path) -> Spec:
    """Read and validate a study spec file."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SpecError("(file)", f"{path} does not exist.", "pass the path of a study spec (.toml).") from None
    except IsADirectoryError:
        raise SpecError("(file)", f"{path} is a folder, not a spec file.", "pass the path of a study spec (.toml).") from None
    except PermissionError:
        raise SpecError("(file)", f"{path} cannot be read (permission denied).", "check the file's permissions.") from None
    except UnicodeDecodeError as err:
        raise SpecError("(file)", f"{path} is not UTF-8 text (byte {err.start}).", "save the spec as UTF-8.") from None
    except OSError as err:
        raise SpecError("(file)", f"{path} cannot be read: {err.strerror}.", "pass the path of a study spec (.toml).") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise SpecError("(file)", f"{path} is not valid TOML: {err}.") from None
    return parse_spec(raw, source_path=path.resolve())


def parse_spec(raw: dict, source_path: Path | None = None) -> Spec:
    _check_values(raw, "")
    _check_keys(raw, "", {"study", "units", "events", "treatment", "windows", "eligibility", "features", "outcomes", "matching", "propensity", "effect", "placebo", "subgroups", "report"})

    study = _table(raw, "study")
    _check_keys(study, "study", {"name", "work_schema", "database", "results_table"})
    name = _name(_str(study, "study", "name"), "study.name")
    work_schema = _str(study, "study", "work_schema", default="sqlmatch")
    database = _str(study, "study", "database", required=False)
    results_table = _str(study, "study", "results_table", required=False)
    if results_table is not None:
        results_table = _name(results_table, "study.results_table")

    units = _table(raw, "units")
    _check_keys(units, "units", {"table", "key", "enrolled_on"})
    units_ref = _table_ref(units.get("table"), "units.table") if "table" in units else _missing("units.table")
    unit_key = _str(units, "units", "key")
    enrolled_on = _str(units, "units", "enrolled_on")

    events = _table(raw, "events")
    _check_keys(events, "events", {"table", "unit_key", "time", "check_unknown_units"})
    events_ref = _table_ref(events.get("table"), "events.table") if "table" in events else _missing("events.table")
    event_unit_key = _str(events, "events", "unit_key", default=unit_key)
    event_time = _str(events, "events", "time")
    check_unknown = events.get("check_unknown_units", True)
    if not isinstance(check_unknown, bool):
        raise SpecError("events.check_unknown_units", f"must be true or false, got {check_unknown!r}.")

    treatment = _table(raw, "treatment")
    _check_keys(treatment, "treatment", {"cohort", "control_pool", "described_as"})
    cohort = _str(treatment, "treatment", "cohort")
    control_pool = _choice(treatment, "treatment", "control_pool", CONTROL_POOLS, default="never_by_post_end")
    # How sentences name the treatment ("buying the annual pass"); plain "enrolment" by default.
    described_as = _str(treatment, "treatment", "described_as", required=False, default="enrolment")
    if not described_as.strip() or len(described_as) > 80 or any(not ch.isprintable() for ch in described_as):
        raise SpecError("treatment.described_as", "must be a short phrase of printable characters (at most 80).", 'e.g. described_as = "buying the annual pass".')

    windows_raw = _table(raw, "windows")
    _check_keys(windows_raw, "windows", {"unit", "pre", "post", "post_starts"})
    unit = _choice(windows_raw, "windows", "unit", WINDOW_UNITS, default="month")
    high = 36 if unit == "month" else 1100
    pre = _int(windows_raw, "windows", "pre", high=high)
    post = _int(windows_raw, "windows", "post", high=high)
    post_starts = _choice(windows_raw, "windows", "post_starts", POST_STARTS, default="after_cohort")
    windows = _windows(cohort, unit, pre, post, post_starts)

    eligibility = raw.get("eligibility", {})
    if not isinstance(eligibility, dict):
        raise SpecError("eligibility", "must be a table.", "write it as [eligibility] with filters = [...].")
    _check_keys(eligibility, "eligibility", {"filters"})
    filter_texts = eligibility.get("filters", [])
    if isinstance(filter_texts, str):
        filter_texts = [filter_texts]
    if not isinstance(filter_texts, list):
        raise SpecError("eligibility.filters", "must be a list of SQL boolean expressions.")
    filters = tuple(parse_filter(t, f"eligibility.filters[{i}]") for i, t in enumerate(filter_texts))

    features = tuple(_features(raw.get("features"), windows))
    outcomes = tuple(_outcomes(raw.get("outcomes"), windows, features))
    names = [f.name for f in features] + [o.name for o in outcomes]
    reserved = {r.lower() for r in RESERVED_COLUMNS}
    for i, item in enumerate([("features", f) for f in features] + [("outcomes", o) for o in outcomes]):
        kind, obj = item
        if obj.name.lower() in reserved:
            where = obj.key if kind == "features" and obj.key else f"{kind} ({obj.name})"
            raise SpecError(
                where,
                f"the name {obj.name!r} is a column sqlmatch writes into its unit tables.",
                f"rename it; reserved names: {', '.join(RESERVED_COLUMNS)}.",
            )
    for n in names:
        if names.count(n) > 1:
            raise SpecError("features/outcomes", f"the name {n!r} is used twice.", "give every feature and outcome its own name.")

    matching = _matching(raw.get("matching", {}), features)
    propensity = _propensity(raw.get("propensity", {}), features, matching)

    report = raw.get("report", {})
    if not isinstance(report, dict):
        raise SpecError("report", "must be a table.")
    _check_keys(report, "report", {"min_cell_size"})
    min_cell = _int(report, "report", "min_cell_size", default=10, low=1, high=1000)

    effect = raw.get("effect", {})
    if not isinstance(effect, dict):
        raise SpecError("effect", "must be a table.", "write it as [effect] with regression_adjustment = true or false.")
    _check_keys(effect, "effect", {"regression_adjustment", "adjustment_slopes", "adjustment_terms"})
    regression_adjustment = read_bool(effect, "effect", "regression_adjustment", default=False) if "regression_adjustment" in effect else None
    adjustment_slopes = _choice(effect, "effect", "adjustment_slopes", ADJUSTMENT_SLOPES, default="common")
    adjustment_terms = _choice(effect, "effect", "adjustment_terms", ADJUSTMENT_TERMS, default="linear")
    placebo_months = _placebo(raw.get("placebo"), windows)
    subgroups = _subgroups(raw.get("subgroups"), features)

    spec = Spec(
        name=name,
        work_schema=work_schema,
        database=database,
        units=units_ref,
        unit_key=unit_key,
        enrolled_on=enrolled_on,
        events=events_ref,
        event_unit_key=event_unit_key,
        event_time=event_time,
        check_unknown_units=check_unknown,
        cohort=cohort,
        control_pool=control_pool,
        treatment_words=described_as,
        regression_adjustment=regression_adjustment,
        adjustment_slopes=adjustment_slopes,
        adjustment_terms=adjustment_terms,
        placebo_months=placebo_months,
        subgroups=subgroups,
        windows=windows,
        filters=filters,
        filter_texts=tuple(filter_texts),
        features=features,
        outcomes=outcomes,
        matching=matching,
        propensity=propensity,
        min_cell_size=min_cell,
        results_table=results_table,
        source_path=source_path,
        _raw=raw,
    )
    return spec


def _missing(key: str):
    raise SpecError(key, "is missing.", "name the table, e.g. table = \"trips\" or \"analytics.trips\".")


def _list_of_tables(value: Any, key: str) -> list[dict]:
    if value is None:
        raise SpecError(key, "is missing.", f"add at least one [[{key}]] entry.")
    if not isinstance(value, list) or not value or not all(isinstance(v, dict) for v in value):
        raise SpecError(key, "must be a non-empty array of tables.", f"write each as [[{key}]].")
    return value


def _features(value: Any, windows: Windows) -> list[Feature]:
    out = []
    items = _list_of_tables(value, "features")
    for i, item in enumerate(items):
        key = f"features[{i}]"
        _check_keys(item, key, {"name", "aggregate", "measure", "attribute", "expression", "type", "fill", "missing"})
        name = _name(_str(item, key, "name"), f"{key}.name")
        key = f"features[{i}] ({name})"
        agg = _choice(item, key, "aggregate", FEATURE_AGGREGATES)
        measure = _str(item, key, "measure", required=agg in ("sum", "mean"))
        if measure and agg not in ("sum", "mean"):
            raise SpecError(f"{key}.measure", f"is only used with aggregate sum or mean, not {agg}.", "remove it.")
        expression_text = item.get("expression")
        if agg == DERIVED:
            out.append(_derived(item, key, name, out, [x.get("name") for x in items[i + 1:]]))
            continue
        if expression_text is not None and agg != "attribute":
            raise SpecError(
                f"{key}.expression",
                "is only used with aggregate = \"attribute\" (an expression over unit columns) or \"derived\" (one over earlier features).",
                "remove it, or make the feature an attribute or derived.",
            )
        if expression_text is not None and "attribute" in item:
            raise SpecError(f"{key}.expression", "is given with attribute: a feature is one column or one expression.", "remove one of them.")
        expression = parse_attribute_expression(expression_text, f"{key}.expression") if expression_text is not None else None
        attribute = _str(item, key, "attribute", required=agg == "attribute" and expression is None)
        if attribute and agg != "attribute":
            raise SpecError(f"{key}.attribute", "is only used with aggregate = \"attribute\".", "remove it.")
        kind = _choice(item, key, "type", ("numeric", "categorical"), default="numeric")
        if kind == "categorical" and agg != "attribute":
            raise SpecError(f"{key}.type", "only unit attributes can be categorical.", "remove type or use aggregate = \"attribute\".")
        fill = item.get("fill")
        if fill is not None and (isinstance(fill, bool) or not isinstance(fill, (int, float))):
            raise SpecError(f"{key}.fill", f"must be a number, got {fill!r}.")
        if fill is None:
            if agg in ("count", "sum", "active_days", "mean"):
                fill = 0.0
            elif agg == "days_since_last":
                fill = float(windows.pre_days)
        missing = None
        if agg == "attribute":
            missing = _missing_policy(item, key, kind, fill)
        elif "missing" in item:
            raise SpecError(
                f"{key}.missing",
                "only applies to attribute features: a feature built from events is never NULL (a unit without events in the window gets `fill`).",
                "remove it, or set fill = <number> for units without events.",
            )
        feature = Feature(
            name=name, aggregate=agg, measure=measure, attribute=attribute, categorical=kind == "categorical", fill=fill, missing=missing, key=key,
            expression=expression, expression_text=expression_text,
        )
        out.append(feature)
        if feature.indicator:
            out.append(Feature(
                name=feature.indicator, aggregate=MISSING_INDICATOR, attribute=attribute, key=f"{key}.missing", expression=expression, expression_text=expression_text
            ))
    names = [f.name for f in out]
    for f in out:
        if f.aggregate == MISSING_INDICATOR and names.count(f.name) > 1:
            raise SpecError(f.key, f"the indicator feature {f.name!r} it adds has the name of another feature.", "rename that feature.")
    return out


def _derived(item: dict, key: str, name: str, earlier: list[Feature], later: list) -> Feature:
    """A derived feature: expression over the features before it, numeric; `fill` stands in
    where the expression gives no value (NULL, e.g. a division by zero), else such a unit refuses the run."""
    for other in ("measure", "attribute", "missing"):
        if other in item:
            raise SpecError(f"{key}.{other}", 'is not used by a derived feature (aggregate = "derived"), which is computed from other features.', "remove it.")
    if item.get("type", "numeric") != "numeric":
        raise SpecError(f"{key}.type", "a derived feature is numeric.", 'remove type; to group values into levels, use an attribute expression (aggregate = "attribute") over unit columns.')
    if "expression" not in item:
        raise SpecError(f"{key}.expression", "is missing.", 'write the feature as an expression over features defined before it, e.g. expression = "pre_trips * pre_trips".')
    fill = item.get("fill")
    if fill is not None and (isinstance(fill, bool) or not isinstance(fill, (int, float))):
        raise SpecError(f"{key}.fill", f"must be a number, got {fill!r}.")
    text = item["expression"]
    tree = parse_derived_expression(
        text, f"{key}.expression", name, [f.name for f in earlier], [n for n in later if isinstance(n, str)], [f.name for f in earlier if f.categorical]
    )
    return Feature(name=name, aggregate=DERIVED, fill=None if fill is None else float(fill), key=key, expression=tree, expression_text=text)


def _missing_policy(item: dict, key: str, kind: str, fill: Any) -> str:
    """The NULL policy of an attribute feature: explicit, with a default that never guesses for a
    number (refuse the run if any value is NULL) and keeps NULL as a level of a category."""
    choices = MISSING_POLICIES[kind]
    default = "level" if kind == "categorical" else ("fill" if fill is not None else "error")
    missing = _choice(item, key, "missing", choices, default=default)
    if kind == "categorical" and fill is not None:
        raise SpecError(f"{key}.fill", "is not used by a categorical attribute.", 'remove it; NULL is a level of its own (missing = "level") or the unit is dropped (missing = "drop").')
    if missing == "fill" and fill is None:
        raise SpecError(f"{key}.fill", 'is needed with missing = "fill".', "add fill = <number>, the value given to units where the attribute is NULL.")
    if missing != "fill" and fill is not None:
        raise SpecError(f"{key}.fill", f'is only used with missing = "fill", not {missing!r}.', 'remove fill, or set missing = "fill".')
    return missing


def _outcomes(value: Any, windows: Windows, features: tuple[Feature, ...] = ()) -> list[Outcome]:
    out = []
    for i, item in enumerate(_list_of_tables(value, "outcomes")):
        key = f"outcomes[{i}]"
        _check_keys(item, key, {"name", "aggregate", "measure", "numerator", "denominator", "last", "twin"})
        name = _name(_str(item, key, "name"), f"{key}.name")
        key = f"outcomes[{i}] ({name})"
        agg = _choice(item, key, "aggregate", OUTCOME_AGGREGATES)
        measure = _str(item, key, "measure", required=agg == "sum")
        numerator = _str(item, key, "numerator", required=agg == "ratio")
        denominator = _str(item, key, "denominator", required=False)
        if agg != "ratio" and (numerator or denominator):
            raise SpecError(f"{key}.numerator", "numerator/denominator are only used with aggregate = \"ratio\".")
        last = _int(item, key, "last", default=1, high=max(windows.post, 1))
        if agg != "active_at_end" and "last" in item:
            raise SpecError(f"{key}.last", "is only used with aggregate = \"active_at_end\".", "remove it.")
        twin = _str(item, key, "twin", required=False)
        if twin is not None:
            # The twin is the same measure over the pre window: the outcome minus its twin is
            # compared between groups (difference-in-differences on the matched sample).
            if agg not in ("count", "sum", "active_days"):
                raise SpecError(f"{key}.twin", f"is only used with count, sum or active_days outcomes, not {agg}.", "remove it.")
            event_numeric = [f.name for f in features if f.aggregate not in ("attribute", DERIVED) and not f.categorical]
            twin_feature = next((f for f in features if f.name == twin), None)
            if twin_feature is None or twin not in event_numeric:
                what = "is not a feature" if twin_feature is None else "is not a numeric pre-window event feature"
                raise SpecError(
                    f"{key}.twin",
                    f"{twin!r} {what}.",
                    f"name a pre-window feature built from events that measures the same thing: {', '.join(event_numeric) or '(none)'}.",
                )
        out.append(Outcome(name=name, aggregate=agg, measure=measure, numerator=numerator, denominator=denominator, last=last, twin=twin, key=key))
    return out


def _matching(value: Any, features: tuple[Feature, ...]) -> Matching:
    if not isinstance(value, dict):
        raise SpecError("matching", "must be a table.", "write it as [matching].")
    method_keys = {k for m in _matching_methods.METHODS.values() for k in m.option_keys}
    renamed = dict(RENAMED_MATCHING_KEYS)
    for m in _matching_methods.METHODS.values():
        renamed.update(m.renamed_options)
    for old_key, new_key in renamed.items():
        if old_key in value:
            raise SpecError(f"matching.{old_key}", f"is now called matching.{new_key}.", f"write {new_key} = ... under [matching] instead of {old_key}.")
    _check_keys(value, "matching", {"method", "on", "block_on", "common_support", "min_treated", "estimand"} | method_keys)
    old = value.get("method")
    if isinstance(old, str) and old in RENAMED_METHODS:
        raise SpecError("matching.method", f"{old!r} is now called {RENAMED_METHODS[old]!r}.", f"write method = \"{RENAMED_METHODS[old]}\".")
    method = _choice(value, "matching", "method", METHODS, default="coarsened_exact")
    names = [f.name for f in features]
    on = value.get("on", names)
    if not isinstance(on, list) or not all(isinstance(x, str) for x in on) or not on:
        raise SpecError("matching.on", "must be a non-empty list of feature names.")
    for n in on:
        if n not in names:
            raise SpecError("matching.on", f"{n!r} is not a feature.", f"use names from [[features]]: {', '.join(names)}.")
    on = _with_indicators(on, features)
    feats = {f.name: f for f in features}
    exact = value.get("block_on", [])
    if not isinstance(exact, list) or not all(isinstance(x, str) for x in exact):
        raise SpecError("matching.block_on", "must be a list of categorical feature names.")
    for n in exact:
        if n not in feats or not feats[n].categorical:
            cats = ", ".join(f.name for f in features if f.categorical) or "(none)"
            raise SpecError("matching.block_on", f"{n!r} is not a categorical feature.", f"use categorical features: {cats}.")
    support = read_bool(value, "matching", "common_support", default=True)
    # Fewest matched treated units a run may report an effect for (runner._check_matched). Default 10,
    # common practice: below about ten units per group the per-stratum variances behind the standard
    # error and the normal-approximation interval are too unstable to report (no single source).
    min_treated = value.get("min_treated", 10)
    if isinstance(min_treated, bool) or not isinstance(min_treated, int) or min_treated < 1:
        raise SpecError(
            "matching.min_treated",
            f"must be a whole number of treated units >= 1, got {min_treated!r}.",
            "write e.g. min_treated = 10 under [matching] (1 accepts any run that matches a treated unit).",
        )
    estimand = _choice(value, "matching", "estimand", ("att", "atc", "ate"), default="att")
    supported = _matching_methods.METHODS[method].estimands
    if estimand not in supported:
        raise SpecError("matching.estimand", f"{method} estimates {', '.join(e.upper() for e in supported)} only, not {estimand.upper()}.",
                        f"use estimand = \"att\", or a method that weights strata: {', '.join(m.name for m in _matching_methods.METHODS.values() if estimand in m.estimands)}.")
    # each method reads and checks its own keys (matching/<method>.py read_options)
    options: dict[str, Any] = {}
    for m in _matching_methods.METHODS.values():
        options.update(m.read_options(value, OptionInput(features=features, on=tuple(on), chosen=m.name == method)))
    return Matching(method=method, on=tuple(on), block_on=tuple(exact), common_support=support, min_treated=min_treated, estimand=estimand, **options)


def _with_indicators(names: list[str], features: tuple[Feature, ...]) -> list[str]:
    """A filled attribute brings its missing-value indicator along wherever it is used."""
    out = list(names)
    for f in features:
        if f.indicator and f.name in out and f.indicator not in out:
            out.insert(out.index(f.name) + 1, f.indicator)
    return out


def _propensity(value: Any, features: tuple[Feature, ...], matching: Matching) -> Propensity:
    if not isinstance(value, dict):
        raise SpecError("propensity", "must be a table.", "write it as [propensity].")
    _check_keys(value, "propensity", {"features", "log1p", "ridge", "max_iterations", "sample_controls", "terms"})
    names = [f.name for f in features]
    chosen = value.get("features", [n for n in matching.on if n not in matching.block_on])
    for key, items in (("propensity.features", chosen), ("propensity.log1p", value.get("log1p", []))):
        feature_list(items, key, names)
    if not chosen:
        raise SpecError("propensity.features", "is empty.", "list the features the propensity model uses.")
    chosen = _with_indicators(chosen, features)
    log1p = value.get("log1p", [])
    for n in log1p:
        if next(f for f in features if f.name == n).categorical:
            raise SpecError("propensity.log1p", f"{n!r} is categorical; log1p applies to numeric features.")
    ridge = value.get("ridge", 0.0)
    if isinstance(ridge, bool) or not isinstance(ridge, (int, float)) or ridge < 0:
        raise SpecError("propensity.ridge", f"must be a number >= 0, got {ridge!r}.")
    iterations = _int(value, "propensity", "max_iterations", default=25, low=1, high=200)
    sample = value.get("sample_controls", 1.0)
    if isinstance(sample, bool) or not isinstance(sample, (int, float)) or not 0.0001 <= sample <= 1.0:
        raise SpecError("propensity.sample_controls", f"must be a share between 0.0001 and 1, got {sample!r}.", "e.g. 0.1 fits on a tenth of the controls.")
    terms = value.get("terms", "stepwise")
    if terms not in ("linear", "stepwise"):
        raise SpecError("propensity.terms", f"must be \"linear\" or \"stepwise\", got {terms!r}.", "\"stepwise\" chooses log, square and product terms from the data.")
    return Propensity(features=tuple(chosen), log1p=tuple(log1p), ridge=float(ridge), max_iterations=iterations, sample_controls=float(sample), terms=terms)
