"""The plan: the one place that knows the pipeline's order.

A plan is an ordered list of named SQL steps, each saying what it reads and writes. Table
steps write a work table (DROP + CREATE TABLE AS); query steps return aggregates to Python.
The plan is pure: compiling it never touches a database, and compiling twice gives the same
bytes.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
from dataclasses import dataclass, field

from sqlglot import exp

from sqlmatch import dialects, render
from sqlmatch.columns import MAX_ADJUSTMENT_SUMS, part_name, regression_design, split_sums, stat, upper_pairs
from sqlmatch.matching import method_for
from sqlmatch.spec import DERIVED, MISSING_INDICATOR, Spec, is_boolean, last_period_start

MANIFEST_VERSION = 1
HISTOGRAM_BINS = 60  # bins of the report's distribution plots: fine enough that a plot cut at the 99th percentile keeps a dozen or more
L1_BINS = 10  # equal-width bins per numeric feature in the fixed histogram of the L1 imbalance
FINGERPRINT_COLUMN = "plan__fingerprint"  # on every row of a scheduled aggregate table
# Days are cut in UTC: the runner sets the session's time zone to it for a run (engines'
# session_time_zone), so a TIMESTAMPTZ event or enrolment time falls on its UTC day on every
# engine, whatever the machine's or the session's own zone. Compiled files say so in the steps
# that read times; a scheduler runs them in a session set to it.
TIME_ZONE = "UTC"
_UTC_NOTE = f"Days are cut in {TIME_ZONE}: the session's time zone must be {TIME_ZONE} (a compiled file sets it where its dialect has the statement), or times with a time zone fall on the session's days."
# What a compiled file adds around its step's own statements, per dialect, each run on the engine
# (tests/test_scheduler_files.py): the session's time zone, so a scheduler's session cuts days as
# the runner's does, and a transaction around the swap (DROP old, RENAME new) where DDL is
# transactional, so a failure mid-swap leaves the old table. Spark's DDL is not transactional:
# there a failure between the two statements leaves only the __building table.
FILE_TIME_ZONE = {"duckdb": f"SET TimeZone = '{TIME_ZONE}'", "postgres": f"SET TimeZone = '{TIME_ZONE}'", "spark": f"SET spark.sql.session.timeZone = {TIME_ZONE}"}
FILE_TRANSACTIONS = ("duckdb", "postgres")
# Session settings a compiled file sets after the time zone, as the engine adapter does for the
# sessions sqlmatch opens: PostgreSQL's JIT compiles the wide one-row aggregates slower than it runs
# them (engines/postgres.py: 820 sums over 500,000 rows took 58-70 s with JIT, 4-5 s without).
FILE_SESSION = {"postgres": ("SET jit = off", "-- jit: the next statement turns PostgreSQL's JIT compilation off for this session (the wide aggregates run many times slower compiled; `sqlmatch run` does the same)")}
# The level that categorical levels held by fewer than report.min_cell_size units of the study are
# pooled into, in unit_measures: every later step (balance, propensity levels, exact matching,
# L1 cells) sees it, so the rows fetched stay fixed by the spec and no small level is named.
POOLED_LEVEL = "(other)"
_KIND_TEXT = {"setup": "prepares the work schema", "table": "writes a table", "query": "returns aggregates to sqlmatch"}


def spec_fingerprint(spec: Spec) -> str:
    """A short hash per section of the spec (and one of sqlmatch's version), "section:hash,...":
    stored on every row of a scheduled aggregate table, so `sqlmatch report` can refuse tables an
    earlier spec wrote and name the sections that changed. The database path does not change what
    the SQL computes and is left out ([report] does: min_cell_size pools small categorical levels
    in SQL); the propensity model file is not part of it (report checks the coefficients that ran
    separately)."""
    import hashlib

    from sqlmatch import __version__

    raw = dict(spec._raw)
    if isinstance(raw.get("study"), dict):
        raw["study"] = {k: v for k, v in raw["study"].items() if k != "database"}
    if spec.cohort != (raw.get("treatment") or {}).get("cohort"):
        raw["treatment"] = {**(raw.get("treatment") or {}), "cohort": spec.cohort}
    parts = {"sqlmatch": __version__} | {k: json.dumps(v, sort_keys=True, default=str) for k, v in sorted(raw.items())}
    return ",".join(f"{k}:{hashlib.sha256(v.encode('utf-8')).hexdigest()[:8]}" for k, v in parts.items())


def changed_sections(stored: str, current: str) -> list[str]:
    """The spec sections (or "sqlmatch") whose hash differs between two fingerprints."""
    def split(text):
        return dict(item.split(":", 1) for item in text.split(",") if ":" in item)

    a, b = split(stored or ""), split(current)
    return [k for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)]


@dataclass(frozen=True)
class Step:
    name: str
    kind: str  # "setup": prepares the schema; "table": writes a work table; "query": returns aggregates
    purpose: str
    reads: tuple[str, ...]
    writes: tuple[str, ...]
    statements: tuple[str, ...]
    # A table step run again until `repeat_check` (a one-row query) returns n_open = 0, at most
    # `max_repeats` times: one templated statement iterated instead of one file per iteration. The
    # step rewrites the table it reads, and once nothing is open another run changes nothing.
    repeat_check: str | None = None
    max_repeats: int = 1
    # A later part of a one-row aggregate query split under the SELECT-list limit
    # (columns.MAX_SUMS_PER_QUERY): the name of the step holding part 1, whose result this step's
    # columns join (columns.merge_parts); the runner and `sqlmatch report` merge them.
    part_of: str | None = None


BITMASK_LANE_DAYS = 63  # days per BIGINT lane: the sign bit is never set
BITMASK_MAX_LANES = 8  # windows up to 504 days; longer ones count distinct days


@dataclass(frozen=True)
class MeasureColumn:
    """One per-unit aggregate of events in a window (rendered by _macros.event_aggregate)."""

    name: str
    agg: str
    start: dt.date
    end: dt.date
    fill: float
    measure: str | None = None
    # events columns that must hold a value for an event to count (a ratio's two parts); agg
    # "count_missing" counts the events in the window lacking one of them instead
    require: tuple[str, ...] = ()
    carried: bool = True  # into <study>_weighted_units (False: a diagnostic count only)

    @property
    def days(self) -> int:
        return (self.end - self.start).days

    @property
    def day_lanes(self) -> tuple[tuple[int, int], ...]:
        """[low, high) day offsets of the 63-day BIGINT lanes the DuckDB active-days bitmask ORs
        into (sql_templates/duckdb/_active_days.sql.j2); none for a window longer than
        BITMASK_MAX_LANES lanes, which is counted with COUNT(DISTINCT day) instead."""
        lanes = (self.days + BITMASK_LANE_DAYS - 1) // BITMASK_LANE_DAYS
        if lanes > BITMASK_MAX_LANES:
            return ()
        return tuple((BITMASK_LANE_DAYS * k, BITMASK_LANE_DAYS * (k + 1)) for k in range(lanes))


@dataclass(frozen=True)
class OutcomeColumns:
    name: str
    kind: str  # continuous | binary | ratio
    num: str | None = None
    den: str | None = None
    twin: str | None = None  # pre-window feature subtracted for the difference-in-differences


@dataclass
class PlanContext:
    """What templates of every step may use: the spec, dialect and work-table names."""

    spec: Spec
    dialect: str
    # list what the steps write without rendering SQL (writable_tables): a score-based plan then
    # needs no fitted model, since no table name depends on its coefficients
    names_only: bool = False
    # statements the runner sends once and never writes to a file (a fit's Newton steps): on the
    # source dialect they run as rendered, without the parse-and-print pass that formats plan files
    # (that pass is most of a Newton step's cost in Python; tests/test_filled_statements.py checks
    # both give the same aggregates)
    transient: bool = False
    tables: dict[str, str] = field(default_factory=dict)  # logical name -> quoted SQL name
    table_names: dict[str, str] = field(default_factory=dict)  # logical name -> schema.table (display)

    def table(self, logical: str) -> str:
        if logical not in self.tables:
            name = f"{self.spec.name}_{logical}"
            self.tables[logical] = render.work_table_sql(self.spec.work_schema, name)
            self.table_names[logical] = f"{self.spec.work_schema}.{name}"
        return self.tables[logical]

    def display(self, logical: str) -> str:
        self.table(logical)
        return self.table_names[logical]

    def weighted_columns(self) -> list[str]:
        """The measures carried into <study>_weighted_units: every feature and outcome column."""
        columns, _ = measure_columns(self.spec)
        attributes = [f.name for f in self.spec.features if f.aggregate in ("attribute", MISSING_INDICATOR, DERIVED)]
        return [c.name for c in columns if c.carried] + attributes

    def table_node(self, logical: str) -> exp.Table:
        return exp.to_table(self.table(logical), dialect=render.SOURCE_DIALECT)

    # -- building steps from templates

    def table_step(self, name: str, template: str, writes: str, reads: list[str], purpose: str, **context) -> Step:
        if self.names_only:
            return Step(name=name, kind="table", purpose=purpose, reads=tuple(reads), writes=(self.display(writes),), statements=())
        sql, written_in = render.render(template, self.dialect, **context)
        (query,) = dialects.parse(sql, written_in)
        statements = dialects.create_table_as(self.table_node(writes), query, self.dialect)
        return Step(
            name=name,
            kind="table",
            purpose=purpose,
            reads=tuple(reads),
            writes=(self.display(writes),),
            statements=tuple(dialects.generate(s, self.dialect) for s in statements),
        )

    def score_step(self, model, exact: list[str]) -> Step:
        """Propensity scores (logit scale) of every unit, from a fitted model."""
        fitted = {} if self.names_only else dict(
            columns=model.columns, beta=model.coefficients, fitted_on=model.fitted_on, iterations=model.iterations, fingerprint=model.fingerprint
        )
        return self.table_step(
            "propensity_scores",
            "propensity_scores",
            writes="scores",
            reads=[self.display("measures")],
            purpose="Propensity score (logit scale) of every unit in the study.",
            exact=exact,
            measures_table=self.table("measures"),
            **fitted,
        )

    def materialized(self, step: Step) -> Step:
        """An aggregate query turned into a table step writing <study>_agg_<step name>. Every row
        carries the spec's fingerprint, so `sqlmatch report` can refuse tables a different spec
        (or sqlmatch version) compiled."""
        logical = f"agg_{step.name}"
        if self.names_only:
            return Step(name=step.name, kind="table", purpose=step.purpose, reads=step.reads, writes=(self.display(logical),), statements=(), part_of=step.part_of)
        (sql,) = step.statements
        (query,) = dialects.parse(sql, self.dialect)
        mark = exp.alias_(exp.Literal.string(spec_fingerprint(self.spec)), FINGERPRINT_COLUMN)
        query = query.select(mark) if isinstance(query, exp.Select) else exp.select("*", mark).from_(query.subquery("q"))
        statements = dialects.create_table_as(self.table_node(logical), query, self.dialect)
        return Step(
            name=step.name,
            kind="table",
            part_of=step.part_of,
            purpose=step.purpose + " Written to a table for `sqlmatch report`; plan__fingerprint (a hash per spec section) lets report refuse tables an earlier spec wrote.",
            reads=step.reads,
            writes=(self.display(logical),),
            statements=tuple(dialects.generate(s, self.dialect) for s in statements),
        )

    def query_step(self, name: str, template: str, reads: list[str], purpose: str, kind: str = "query", numbers: dict | None = None, **context) -> Step:
        """One query step. `numbers` ({context key: list of floats}) are the values that change
        from one call to the next with everything else the same (a Newton step's coefficients):
        the template is rendered and parsed once with placeholders there, and each call fills the
        parsed statements with the numbers' literals (the same SQL as rendering them, faster)."""
        if self.names_only:
            return Step(name=name, kind=kind, purpose=purpose, reads=tuple(reads), writes=(), statements=())
        if numbers and self.transient and self.dialect == render.SOURCE_DIALECT:
            sql, written_in = render.render(template, self.dialect, **context, **numbers)
            if written_in == render.SOURCE_DIALECT:
                return Step(name=name, kind=kind, purpose=purpose, reads=tuple(reads), writes=(), statements=(sql,))
            statements = dialects.parse(sql, written_in)
        elif numbers:
            statements = _filled(template, self.dialect, context, numbers)
        else:
            sql, written_in = render.render(template, self.dialect, **context)
            statements = dialects.parse(sql, written_in)
        return Step(
            name=name,
            kind=kind,
            purpose=purpose,
            reads=tuple(reads),
            writes=(),
            statements=tuple(dialects.generate(s, self.dialect) for s in statements),
        )

    def query_parts(self, name: str, template: str, reads: list[str], purpose: str, parts: list[dict], **context) -> list[Step]:
        """One aggregate query split into parts (columns.split_sums): a step per part, rendered
        with `context` and that part's own entries. Part 1 keeps `name` (and, alone, the step it
        always was); part k is `<name>__part<k>`, marked part_of `name`."""
        out = []
        for k, own in enumerate(parts, 1):
            step = self.query_step(
                part_name(name, k), template, reads=reads, purpose=purpose if len(parts) == 1 else f"{purpose} Part {k} of {len(parts)} (split under PostgreSQL's 1,664-entry SELECT list).",
                **context, **own,
            )
            out.append(step if k == 1 else dataclasses.replace(step, part_of=name))
        return out


_PARSED_WITH_SLOTS: dict = {}  # (template, dialect, context) -> (parsed statements, the dialect written in)
_PARSED_WITH_SLOTS_MAX = 32


def _frozen(value):
    """A hashable copy of a template context value (lists and dicts of frozen dataclasses, numbers, strings)."""
    if isinstance(value, dict):
        return tuple(sorted((k, _frozen(v)) for k, v in value.items()))
    if isinstance(value, (list, tuple)):
        return tuple(_frozen(v) for v in value)
    return value


def _filled(template: str, dialect: str, context: dict, numbers: dict) -> list:
    """The template's statements with `numbers` filled in: parsed once per shape (the context and
    the count of each number), every later call only copies the trees and sets the literals."""
    from sqlglot import parse_one

    slots = {key: [render.NumberSlot(f"sqlmatch__{key}__{i}") for i in range(len(values))] for key, values in numbers.items()}
    key = (template, dialect, _frozen(context), tuple((k, len(v)) for k, v in sorted(numbers.items())))
    try:
        hash(key)
    except TypeError:  # a context value that cannot be a key: render as usual
        sql, written_in = render.render(template, dialect, **context, **numbers)
        return dialects.parse(sql, written_in)
    if key not in _PARSED_WITH_SLOTS:
        if len(_PARSED_WITH_SLOTS) >= _PARSED_WITH_SLOTS_MAX:
            _PARSED_WITH_SLOTS.pop(next(iter(_PARSED_WITH_SLOTS)))
        sql, written_in = render.render(template, dialect, **context, **slots)
        _PARSED_WITH_SLOTS[key] = (dialects.parse(sql, written_in), written_in)
    trees, written_in = _PARSED_WITH_SLOTS[key]
    # each literal as rendering it would give: the filter's text, parsed in the template's dialect
    values = {slot.name: parse_one(render.literal(v), read=written_in) for k, vs in numbers.items() for slot, v in zip(slots[k], vs)}

    def fill(node):
        if isinstance(node, exp.Placeholder) and node.this in values:
            return values[node.this].copy()
        return node

    return [tree.transform(fill) for tree in trees]


@dataclass(frozen=True)
class Plan:
    study: str
    dialect: str
    steps: tuple[Step, ...]
    work_tables: tuple[str, ...]  # display names of every table the plan writes, in order
    outcomes: tuple[OutcomeColumns, ...]
    complete: bool = True  # False: the plan stops where a propensity model must be fitted first

    def step(self, name: str) -> Step:
        for s in self.steps:
            if s.name == name:
                return s
        raise KeyError(name)

    def file_name(self, index: int) -> str:
        return f"{index:02d}_{self.steps[index].name}.sql"

    def files(self) -> dict[str, str]:
        """File name -> contents: a header comment, then the statements, each ending in ';'."""
        out = {}
        for i, step in enumerate(self.steps):
            header = [
                f"-- sqlmatch study {self.study!r}, step {i:02d}: {step.name} ({self.dialect})",
                f"-- {step.purpose}",
                f"-- kind: {_KIND_TEXT[step.kind]}",
                f"-- reads: {', '.join(step.reads) or '-'}",
            ]
            if step.writes:
                header.append(f"-- writes: {', '.join(step.writes)}")
            if step.repeat_check:
                header.append(
                    f"-- repeat: run this file again until the query below returns n_open = 0 (at most {step.max_repeats} "
                    "times; once it does, another run changes nothing): " + step.repeat_check.replace("\n", " ")
                )
            header += self._session_lines(step)
            # names come from the spec: a line break in one would end the comment line
            header = [render.comment_text(line) for line in header]
            body = "\n\n".join(s + ";" for s in self.file_statements(step))
            out[self.file_name(i)] = "\n".join(header) + "\n\n" + body + "\n"
        out["manifest.json"] = json.dumps(self.manifest(), indent=2, sort_keys=False) + "\n"
        return out

    def file_statements(self, step: Step) -> list[str]:
        """The statements of a step's compiled file: its own, after the session's time zone and
        with the swap in a transaction where the dialect allows (FILE_TIME_ZONE, FILE_TRANSACTIONS).
        The runner runs a step's own statements and does both itself."""
        statements = list(step.statements)
        if step.kind == "table" and self.dialect in FILE_TRANSACTIONS:
            statements = statements[:2] + ["BEGIN TRANSACTION"] + statements[2:] + ["COMMIT"]
        if step.kind != "setup" and self.dialect in FILE_SESSION:
            statements = [FILE_SESSION[self.dialect][0]] + statements
        if step.kind != "setup" and self.dialect in FILE_TIME_ZONE:
            statements = [FILE_TIME_ZONE[self.dialect]] + statements
        return statements

    def _session_lines(self, step: Step) -> list[str]:
        if step.kind == "setup":
            return [
                "-- skip this file when the schema exists: PostgreSQL refuses CREATE SCHEMA, even with IF NOT EXISTS, "
                "to a role without CREATE on the database (`sqlmatch run` skips it the same way)"
            ]
        if self.dialect in FILE_TIME_ZONE:
            lines = [f"-- time zone: the first statement sets this session's time zone to {TIME_ZONE} (it stays so for the rest of the session)"]
        else:
            lines = [f"-- time zone: run it in a session whose time zone is {TIME_ZONE} (no statement for it is written for {self.dialect})"]
        if self.dialect in FILE_SESSION:
            lines.append(FILE_SESSION[self.dialect][1])
        if step.kind == "table" and self.dialect in FILE_TRANSACTIONS:
            lines.append("-- swap: the DROP of the old table and the RENAME of the new one run in one transaction: a failure before COMMIT leaves the old table as it was")
        elif step.kind == "table":
            lines.append(
                f"-- swap: {self.dialect} DDL is not written in a transaction here, so between the DROP of the old table and the RENAME "
                "the table is absent; a failure there leaves only the __building table: run this file again"
            )
        return lines

    def manifest(self) -> dict:
        return {
            "sqlmatch_manifest": MANIFEST_VERSION,
            "study": self.study,
            "dialect": self.dialect,
            "steps": [
                {
                    "order": i,
                    "name": s.name,
                    "file": self.file_name(i),
                    "kind": s.kind,
                    "reads": list(s.reads),
                    "writes": list(s.writes),
                    "purpose": s.purpose,
                    **({"repeat": {"until": "n_open = 0", "check": s.repeat_check, "max": s.max_repeats}} if s.repeat_check else {}),
                    **({"part_of": s.part_of} if s.part_of else {}),
                    **({"skip_when_schema_exists": True} if s.kind == "setup" else {}),
                }
                for i, s in enumerate(self.steps)
            ],
            "work_tables": list(self.work_tables),
            "session_time_zone": {"zone": TIME_ZONE, "set_by_each_file": self.dialect in FILE_TIME_ZONE},
            "swap": "one transaction per file" if self.dialect in FILE_TRANSACTIONS else "separate statements (a failure mid-swap leaves only the __building table)",
            "complete": self.complete,
            **(
                {}
                if self.complete
                else {
                    "continues_after": "the propensity model is fitted: `sqlmatch run` fits it (one aggregate query per "
                    "Newton step) and writes <spec>.model.json beside the spec; compile again to get the remaining steps."
                }
            ),
        }


# --------------------------------------------------------------------------------------------


def measure_columns(spec: Spec) -> tuple[list[MeasureColumn], list[OutcomeColumns]]:
    w = spec.windows
    cols: list[MeasureColumn] = []
    for f in spec.event_features:
        cols.append(MeasureColumn(name=f.name, agg=f.aggregate, start=w.pre_start, end=w.cohort_start, fill=float(f.fill), measure=f.measure))
    outcomes: list[OutcomeColumns] = []
    for o in spec.outcomes:
        if o.aggregate == "ratio":
            num, den = f"{o.name}__num", f"{o.name}__den"
            # An event counts in both parts or in neither: a trip without a fare must not lower
            # the fare per trip. The events left out are counted for the run's warnings.
            both = tuple(c for c in (o.numerator, o.denominator) if c)
            cols.append(MeasureColumn(name=num, agg="sum", start=w.post_start, end=w.post_end, fill=0.0, measure=o.numerator, require=both))
            den_agg = "sum" if o.denominator else "count"
            cols.append(MeasureColumn(name=den, agg=den_agg, start=w.post_start, end=w.post_end, fill=0.0, measure=o.denominator, require=both))
            cols.append(MeasureColumn(name=stat(o.name, "incomplete"), agg="count_missing", start=w.post_start, end=w.post_end, fill=0.0, require=both, carried=False))
            outcomes.append(OutcomeColumns(name=o.name, kind="ratio", num=num, den=den))
        elif o.aggregate == "active_at_end":
            start = last_period_start(w, o.last)
            cols.append(MeasureColumn(name=o.name, agg="any", start=start, end=w.post_end, fill=0.0))
            outcomes.append(OutcomeColumns(name=o.name, kind="binary"))
        else:
            cols.append(MeasureColumn(name=o.name, agg=o.aggregate, start=w.post_start, end=w.post_end, fill=0.0, measure=o.measure))
            outcomes.append(OutcomeColumns(name=o.name, kind="continuous", twin=o.twin))
    return cols, outcomes


@dataclass(frozen=True)
class AttributeColumn:
    """An attribute feature as study_units selects it: `value` is SQL built by sqlglot, the quoted
    column or the feature's expression (a condition made 1 / 0, NULL staying NULL)."""

    name: str
    categorical: bool
    value: str
    condition: bool = False  # a boolean expression: the template makes it 1 / 0 (NULL stays NULL)


def attribute_column(f) -> AttributeColumn:
    if f.expression is None:
        return AttributeColumn(f.name, f.categorical, exp.column(exp.to_identifier(f.attribute, quoted=True), table=exp.to_identifier("u")).sql(render.SOURCE_DIALECT))
    return AttributeColumn(f.name, f.categorical, render.expression_sql(f.expression, alias="u"), condition=is_boolean(f.expression))


@dataclass(frozen=True)
class DerivedColumn:
    """A derived feature as unit_measures computes it over the unit's row `r`: `value` is SQL built
    by sqlglot from the spec's expression, with the guards below."""

    name: str
    key: str
    value: str
    condition: bool = False  # a boolean expression: the template makes it 1 / 0 (NULL stays NULL)
    fill: float | None = None


def derived_column(f, spec: Spec) -> DerivedColumn:
    """The expression over earlier features, rewritten so every engine gives the same value:
    numeric features read as DOUBLE (no integer division on PostgreSQL), x / y as x / NULLIF(y, 0),
    LN and SQRT of an argument outside their domain as NULL (LN(0): an error on PostgreSQL, -inf on
    DuckDB, NULL on Spark), ROUND through DECIMAL (half away from zero everywhere: PostgreSQL
    rounds a double half to even and has no ROUND(double, digits)). NULL then takes the feature's fill."""
    categorical = {g.name for g in spec.categorical_features}
    tree = f.expression.copy()

    def read(node):
        if isinstance(node, exp.Column):
            col = exp.column(exp.to_identifier(node.name, quoted=True), table=exp.to_identifier("r"))
            return col if node.name in categorical else exp.cast(col, exp.DataType.build("DOUBLE"))
        return node

    def guard(node):
        if isinstance(node, exp.Div):
            node.set("expression", exp.Nullif(this=node.expression, expression=exp.Literal.number(0)))
        elif isinstance(node, (exp.Ln, exp.Sqrt)):
            low = exp.GT if isinstance(node, exp.Ln) else exp.GTE
            arg = node.this
            node.set("this", exp.Case(ifs=[exp.If(this=low(this=arg.copy(), expression=exp.Literal.number(0)), true=arg)]))
        return node

    def round_half_away(node):
        if isinstance(node, exp.Round):
            digits = node.args.get("decimals") or exp.Literal.number(0)
            decimal = exp.DataType.build("DECIMAL(38, 10)")
            return exp.cast(exp.Round(this=exp.cast(node.this, decimal), decimals=digits), exp.DataType.build("DOUBLE"))
        return node

    # ROUND last, in a pass of its own: transform does not descend into a node it replaced, so a
    # division or ln inside ROUND would keep no guard if ROUND were rewritten in the same pass
    tree = tree.transform(read, copy=False).transform(guard, copy=False).transform(round_half_away, copy=False)
    return DerivedColumn(f.name, f.key, tree.sql(render.SOURCE_DIALECT), condition=is_boolean(f.expression), fill=f.fill)


def source_steps(ctx: PlanContext, outcomes, columns) -> list[Step]:
    """The study's units, the checks on them, and one pass over the events for every feature and outcome."""
    spec = ctx.spec
    w = spec.windows
    # who is treated and who is a control: the real study's windows, also in a placebo study
    e = spec.enrolment_windows
    control_from = e.post_end if spec.control_pool == "never_by_post_end" else e.cohort_end
    pool_text = (
        f"never enrolled, or enrolled on or after {e.post_end} (after the post window)"
        if spec.control_pool == "never_by_post_end"
        else f"never enrolled, or enrolled on or after {e.cohort_end} (not yet enrolled at the cohort month)"
    )
    units_src, events_src = spec.units.display, spec.events.display

    steps = [
        ctx.query_step("work_schema", "work_schema", reads=[], purpose="Create the study's work schema if needed.", kind="setup", schema=spec.work_schema),
        ctx.table_step(
            "study_units",
            "study_units",
            writes="units",
            reads=[units_src],
            purpose=f"Treated cohort ({spec.cohort}) and control pool, after eligibility filters. {_UTC_NOTE}",
            units=spec.units,
            key=spec.unit_key,
            enrolled=spec.enrolled_on,
            enrolment=e,
            cohort=spec.cohort,
            control_from=control_from,
            pool_text=pool_text,
            attributes=[attribute_column(f) for f in spec.attribute_features],
            filters=[render.expression_sql(f, alias="u") for f in spec.filters],
        ),
        ctx.query_step(
            "group_sizes",
            "group_sizes",
            reads=[ctx.display("units")],
            purpose="Count treated and control units (refuse an empty cohort or control pool), and NULL attributes.",
            units_table=ctx.table("units"),
            attributes=spec.attribute_features,
            dropped=[f for f in spec.attribute_features if f.missing == "drop"],
        ),
        ctx.query_step(
            "unit_key_check",
            "unit_key_check",
            reads=[ctx.display("units")],
            purpose="Rows and distinct keys among the study's units (refuse duplicate keys).",
            key=spec.unit_key,
            units_source=spec.units,
            units_table=ctx.table("units"),
        ),
        ctx.table_step(
            "unit_measures",
            "unit_measures",
            writes="measures",
            reads=[events_src, ctx.display("units")] + ([units_src] if spec.check_unknown_units else []),
            purpose=f"Per-unit pre-window features and post-window outcomes, one pass over the events (which also counts events of unknown units). {_UTC_NOTE}",
            events=spec.events,
            event_key=spec.event_unit_key,
            event_time=spec.event_time,
            windows=w,
            columns=columns,
            attributes=spec.attribute_features,
            derived=[derived_column(f, spec) for f in spec.derived_features],
            units_table=ctx.table("units"),
            check_unknown=spec.check_unknown_units,
            units_source=spec.units,
            units_key=spec.unit_key,
            min_cell=spec.min_cell_size,
            pooled_level=POOLED_LEVEL,
            categorical_index={f.name: i for i, f in enumerate(f for f in spec.attribute_features if f.categorical)},
        ),
    ]
    steps.append(
        ctx.query_step(
            "data_coverage",
            "data_coverage",
            reads=[ctx.display("measures")],
            purpose="First and last event within the windows, units without events (warn on gaps), events of unknown units, sums of the measures (refuse NaN).",
            windows=w,
            totals=[c.name for c in columns if c.agg in ("sum", "mean", "count_missing")]
            + [f.name for f in spec.attribute_features if not f.categorical]
            + [f.name for f in spec.derived_features],
            derived=[f.name for f in spec.derived_features],
            check_unknown=spec.check_unknown_units,
            measures_table=ctx.table("measures"),
        )
    )
    return steps


def matching_steps(ctx: PlanContext, model) -> list[Step]:
    """The method's steps; a method that lists matches (one row per match) gets the step that sums
    them per unit into <study>_weighted_units, which every later step reads."""
    method = method_for(ctx.spec.matching.method)
    steps = list(method.steps(ctx, model))
    if not any(ctx.display("weighted_units") in s.writes for s in steps):
        one_row = bool(method.one_weight_row_per_unit and method.one_weight_row_per_unit(ctx.spec))
        steps.append(
            ctx.table_step(
                "weighted_units",
                "weighted_units",
                writes="weighted_units",
                reads=[ctx.display("measures"), ctx.display("match_weights")],
                purpose="Every unit's features and outcomes with its matching weight (NULL if unmatched), joined once for the steps after.",
                measures_table=ctx.table("measures"),
                weights_table=ctx.table("match_weights"),
                columns=ctx.weighted_columns(),
                one_row_per_unit=one_row,
            )
        )
    return steps


def balance_steps(ctx: PlanContext) -> list[Step]:
    """Balance before and after matching, the L1 imbalance and the binned distributions for plots."""
    spec = ctx.spec
    method = method_for(spec.matching.method)
    steps: list[Step] = []
    numeric = [f.name for f in spec.numeric_features]
    categorical = [f.name for f in spec.categorical_features]
    weighted = [ctx.display("weighted_units")]
    steps.append(
        ctx.query_step(
            "balance_numeric",
            "balance_numeric",
            reads=weighted,
            purpose="Per-group counts, sums and sums of squares of numeric features, before and after matching.",
            features=numeric,
            weighted_table=ctx.table("weighted_units"),
        )
    )
    if categorical:
        steps.append(
            ctx.query_step(
                "balance_levels",
                "balance_levels",
                reads=weighted,
                purpose="Per-level counts of categorical features, before and after matching.",
                features=categorical,
                weighted_table=ctx.table("weighted_units"),
            )
        )
    on = [spec.feature(n) for n in spec.matching.on]
    steps.append(
        ctx.query_step(
            "imbalance_l1",
            "imbalance_l1",
            reads=weighted,
            purpose="Multivariate L1 imbalance on a fixed histogram, before and after matching.",
            bins=L1_BINS,
            numeric=[f.name for f in on if not f.categorical],
            categorical=[f.name for f in on if f.categorical],
            weighted_table=ctx.table("weighted_units"),
        )
    )
    numeric = [f.name for f in spec.numeric_features]
    if numeric:
        steps.append(
            ctx.query_step(
                "feature_histograms",
                "feature_histograms",
                reads=weighted,
                purpose="Binned distribution of each numeric feature by group, before and after matching (for plots).",
                bins=HISTOGRAM_BINS,
                features=numeric,
                weighted_table=ctx.table("weighted_units"),
            )
        )
    if method.uses_score:
        steps.append(
            ctx.query_step(
                "score_histogram",
                "score_histogram",
                reads=[ctx.display("scores"), ctx.display("weighted_units")],
                purpose="Binned propensity scores by group, before and after matching (overlap plot).",
                bins=HISTOGRAM_BINS,
                scores_table=ctx.table("scores"),
                weighted_table=ctx.table("weighted_units"),
            )
        )
    return steps


def subgroup_text(g) -> str:
    return f"the levels of {g.feature}" if g.feature else f"{g.where_text}: yes / no"


@dataclass(frozen=True)
class SubgroupLevel:
    """What outcome_strata groups a subgroup by: a categorical feature, or a condition (its SQL
    re-printed by sqlglot from the parsed spec, columns qualified with the alias m)."""

    feature: str | None = None
    condition: str | None = None


def subgroup_level(g) -> SubgroupLevel:
    return SubgroupLevel(feature=g.feature) if g.feature else SubgroupLevel(condition=render.expression_sql(g.where, alias="m"))


def adjustment_sums(numeric: list[str], outcomes, terms: str = "linear", ratios: bool = True) -> list[tuple[str, tuple[str, ...]]]:
    """outcome_strata's sums for the within-stratum regression adjustment, as (column, the measure
    columns it multiplies): every product of features the regressors z need (sum z, sum z z'),
    then sum z y per outcome (a ratio outcome: its numerator and its denominator, when `ratios`:
    only each group's own slopes adjust ratio outcomes)."""
    from sqlmatch import columns as col

    z = col.adjustment_terms(len(numeric), terms)
    out = [(col.monomial_sum(m, numeric), tuple(numeric[i] for i in m)) for m in col.adjustment_monomials(z)]
    for o in outcomes:
        if o.kind == "ratio" and not ratios:
            continue
        keys = [(f"{o.name}__num", o.num), (f"{o.name}__den", o.den)] if o.kind == "ratio" else [(o.name, o.name)]
        for key, column in keys:
            out += [(col.monomial_outcome(t, numeric, key), tuple(numeric[i] for i in t) + (column,)) for t in z]
    return out


def outcome_steps(ctx: PlanContext, outcomes, per_match: bool) -> list[Step]:
    """Outcome sums per stratum and group (matched and naive) and the regression cross-products."""
    spec = ctx.spec
    weighted = [ctx.display("weighted_units")]
    numeric = [f.name for f in spec.numeric_features]
    # the regression adjustment's sums, for methods whose strata weigh a group's units alike
    adjust = method_for(spec.matching.method).adjustable
    steps: list[Step] = []
    common = dict(
        per_match=per_match,
        outcomes=outcomes,
        level=None,
        measures_table=ctx.table("measures"),
        weights_table=ctx.table("match_weights"),
        weighted_table=ctx.table("weighted_units"),
    )
    # the regression adjustment's sums (estimators/adjusted.py), split under PostgreSQL's SELECT limit
    sums = adjustment_sums(numeric, outcomes, spec.adjustment_terms, ratios=spec.adjustment_slopes == "group") if adjust else []
    if len(sums) > MAX_ADJUSTMENT_SUMS:
        from sqlmatch.errors import SpecError

        raise SpecError(
            "effect.adjustment_terms",
            f"{spec.adjustment_terms!r} over {len(numeric)} numeric features needs {len(sums):,} sums per stratum and group, over the "
            f"{MAX_ADJUSTMENT_SUMS:,} the adjustment may fetch.",
            'set [effect] adjustment_terms = "squares" or "linear", or use fewer numeric features.',
        )
    fixed = 4 + sum(5 if o.kind == "ratio" else (4 if o.twin else 2) for o in outcomes)  # part 1: stratum, treated, n_units, sum_w, the outcomes' own sums
    parts = split_sums(sums, first_fixed=fixed, later_fixed=3)
    steps += ctx.query_parts(
        "outcome_strata",
        "outcome_strata",
        reads=[ctx.display("measures"), ctx.display("match_weights")] if per_match else weighted,
        purpose="Outcome sums per stratum and group among matched units, with the sums of the regressors, their cross-products and products with the outcomes that adjust them by regression.",
        parts=[dict(adjust_sums=own, first_part=k == 0) for k, own in enumerate(parts)],
        matched=True,
        adjust_terms=spec.adjustment_terms,
        adjust_ratios=spec.adjustment_slopes == "group",
        **common,
    )
    steps.append(
        ctx.query_step(
            "outcome_unmatched",
            "outcome_strata",
            reads=[ctx.display("measures")],
            purpose="Outcome sums per group before matching (the naive comparison).",
            matched=False,
            adjust_sums=[],
            adjust_terms="",
            first_part=True,
            **common,
        )
    )
    for g in spec.subgroups:
        steps.append(
            ctx.query_step(
                f"subgroup_{g.name}",
                "outcome_strata",
                reads=[ctx.display("measures"), ctx.display("match_weights")] if per_match else weighted,
                purpose=f"Outcome sums per level of subgroup {g.name!r} ({subgroup_text(g)}), stratum and group among matched units.",
                matched=True,
                per_match=per_match,
                outcomes=outcomes,
                adjust_sums=[],
                adjust_terms="",
                first_part=True,
                level=subgroup_level(g),
                measures_table=ctx.table("measures"),
                weights_table=ctx.table("match_weights"),
                weighted_table=ctx.table("weighted_units"),
            )
        )
    design = regression_design(numeric)
    # the sums in the order the one query has them; split under PostgreSQL's SELECT-list limit
    # (one row, so later parts repeat nothing; part 1 also has the three weight totals)
    sums = [dict(kind="xtx", i=i, j=j) for i, j in upper_pairs(len(design))]
    sums += [dict(kind="feature_centre", k=k, name=f) for k, f in enumerate(numeric)]
    for k, o in enumerate(outcomes):
        sums += [dict(kind="xty", k=k, i=d.index, name=o.name) for d in design]
        sums += [dict(kind=kind, k=k, name=o.name) for kind in ("yty", "tyy", "outcome_centre")]
    steps += ctx.query_parts(
        "outcome_regression",
        "outcome_regression",
        reads=weighted,
        purpose="Weighted regression of each outcome on treatment and the numeric features among matched units, as sums (X'WX, X'Wy, y'Wy) for the sensitivity analysis.",
        parts=[dict(sums=part, head=k == 1) for k, part in enumerate(split_sums(sums, first_fixed=3), 1)],
        features=numeric,
        design=design,
        outcomes=outcomes,
        weighted_table=ctx.table("weighted_units"),
    )
    method = method_for(spec.matching.method)
    if method.outcome_steps is not None:
        steps += method.outcome_steps(ctx, outcomes)
    return steps


def build_plan(spec: Spec, dialect: str = "duckdb", model=None, materialize: bool = False, names_only: bool = False) -> Plan:
    """The study's steps, stage by stage: sources, propensity model (score-based methods),
    matching, balance, outcomes. For a score-based method without a fitted `model` the plan is
    partial: it ends with the propensity model's data, and the runner fits the model and then
    builds the full plan.

    With `materialize`, every aggregate query instead writes a small table `<study>_agg_<step>`,
    so a scheduler can run the whole plan and `sqlmatch report` read the results afterwards.
    With `names_only`, the steps carry no SQL: the full plan's table names, no model needed."""
    from sqlmatch import propensity

    dialect = dialects.check_dialect(dialect)
    ctx = PlanContext(spec=spec, dialect=dialect, names_only=names_only)
    columns, outcomes = measure_columns(spec)
    method = method_for(spec.matching.method)
    steps = source_steps(ctx, outcomes, columns)
    if method.uses_score:
        steps += propensity.plan_steps(ctx, model)
        if model is None and not names_only:
            work_tables = tuple(t for s in steps for t in s.writes)
            check_work_tables(spec, work_tables)
            return Plan(study=spec.name, dialect=dialect, steps=tuple(steps), work_tables=work_tables, outcomes=tuple(outcomes), complete=False)
    elif method.fit is not None:  # fitted in the warehouse by the runner (method.fit), then the full plan
        steps += method.fit_steps(ctx, model)
        if model is None and not names_only:
            work_tables = tuple(t for s in steps for t in s.writes)
            check_work_tables(spec, work_tables)
            return Plan(study=spec.name, dialect=dialect, steps=tuple(steps), work_tables=work_tables, outcomes=tuple(outcomes), complete=False)
    matched = matching_steps(ctx, model)
    # per-match methods are read from <study>_match_weights by the per-stratum outcome query
    per_match = any(s.name == "weighted_units" and ctx.display("match_weights") in s.reads for s in matched)
    steps += matched + balance_steps(ctx) + outcome_steps(ctx, outcomes, per_match)
    if materialize:
        steps = [ctx.materialized(s) if s.kind == "query" else s for s in steps]
    work_tables = tuple(t for s in steps for t in s.writes)
    check_work_tables(spec, work_tables)
    return Plan(study=spec.name, dialect=dialect, steps=tuple(steps), work_tables=work_tables, outcomes=tuple(outcomes))


def check_work_tables(spec: Spec, work_tables) -> None:
    """Refuse a study whose work tables would overwrite a table sqlmatch does not own: a source
    table, or the results history. Names are compared without regard to case (DuckDB and unquoted
    names elsewhere fold case), and a source named without a schema is assumed to be anywhere."""
    from sqlmatch.errors import SpecError

    if "." in spec.work_schema:
        raise SpecError("study.work_schema", f"{spec.work_schema!r} names more than one level (a dot).", "name one schema, e.g. work_schema = \"sqlmatch\".")
    mine = {}
    for table in work_tables:
        schema, name = table.split(".", 1)
        for n in (name, name + dialects.BUILDING_SUFFIX):
            mine[(schema.lower(), n.lower())] = f"{schema}.{n}"
    sources = [("units.table", spec.units), ("events.table", spec.events)]
    for key, ref in sources:
        hits = [t for (schema, n), t in mine.items() if n == ref.name.lower() and (ref.schema is None or ref.schema.lower() == schema)]
        if hits:
            raise SpecError(
                key,
                f"{ref.display!r} has the name of a table this study writes ({hits[0]}): the run would overwrite it.",
                "rename the study (study.name) or use another study.work_schema, so sqlmatch's tables cannot meet yours.",
            )
    if spec.results_table and (spec.work_schema.lower(), spec.results_table.lower()) in mine:
        raise SpecError(
            "study.results_table",
            f"{spec.results_table!r} is the name of a table this study rewrites on every run, so the history would be lost.",
            f"name the results table differently, e.g. results_table = \"{spec.name}_history\".",
        )


def writable_tables(spec: Spec, dialect: str = "duckdb") -> tuple[str, ...]:
    """Every work table this study's plan can write, run directly or by a scheduler: what
    cleanup may drop. Table names do not depend on the propensity coefficients, so a score-based
    plan's steps are listed without rendering their SQL (no fitted model is needed)."""
    names = [t for materialize in (False, True) for t in build_plan(spec, dialect, materialize=materialize, names_only=True).work_tables]
    return tuple(dict.fromkeys(names))


def part_tables(spec: Spec, present, dialect: str = "duckdb") -> list[str]:
    """Tables of later parts of split queries (`<study>_agg_<step>__part<k>`, PlanContext.query_parts)
    of a scheduled plan, found among `present` (names in the work schema): their number depends on
    the fitted model, so writable_tables cannot list them; cleanup drops them by this pattern."""
    import re

    from sqlmatch.dialects import BUILDING_SUFFIX

    bases = [t.split(".", 1)[1] for t in writable_tables(spec, dialect) if t.split(".", 1)[1].startswith(f"{spec.name}_agg_")]
    if not bases:
        return []
    pattern = re.compile("(" + "|".join(re.escape(b) for b in bases) + r")__part\d+(" + re.escape(BUILDING_SUFFIX) + ")?", re.IGNORECASE)
    found = {n[: -len(BUILDING_SUFFIX)] if n.lower().endswith(BUILDING_SUFFIX.lower()) else n for n in present if pattern.fullmatch(n)}
    return sorted(found)
