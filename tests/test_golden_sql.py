"""Golden compiled SQL, checked in under tests/golden/: one snapshot per method for DuckDB,
PostgreSQL and Spark (the demo study with coarsened exact matching, score subclasses and nearest
neighbours, and a spec with hostile names). The other dialects are checked by compiling and
parsing every statement back (no snapshot), so a one-line template edit touches a handful of files.

Regenerate after an intended change with `python -m pytest tests/test_golden_sql.py --update-golden`
and review the diff like any other code change.
"""

from __future__ import annotations

import json
import shutil
import tomllib
from pathlib import Path

import pytest
import sqlglot

from sqlmatch import api
from sqlmatch.dialects import DIALECTS
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

GOLDEN = Path(__file__).parent / "golden"


@pytest.fixture(scope="module")
def spec():
    return api.load(DEMO_SPEC)


SNAPSHOT_DIALECTS = ("duckdb", "postgres", "spark")


@pytest.mark.parametrize("dialect", SNAPSHOT_DIALECTS)
def test_compiled_plan_matches_golden(spec, dialect, update_golden, tmp_path):
    plan = api.compile_plan(spec, dialect)
    folder = GOLDEN / dialect
    if update_golden:
        shutil.rmtree(folder, ignore_errors=True)
        api.write_plan(plan, folder)
    api.write_plan(plan, tmp_path)
    expected = sorted(p.name for p in folder.iterdir())
    got = sorted(p.name for p in tmp_path.iterdir())
    assert got == expected, "step files differ from the golden set; rerun with --update-golden if intended"
    for name in got:
        assert (tmp_path / name).read_text() == (folder / name).read_text(), f"{dialect}/{name} differs from golden"


def score_plan(dialect: str, matching: dict):
    """The demo study with a score-based method, compiled with a fixed model (coefficients made
    up for the golden files: only the SQL's shape is under test here)."""
    from sqlmatch.plan import build_plan
    from sqlmatch.propensity import FittedModel, design_columns

    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["matching"] = matching
    raw["propensity"] = {"features": ["pre_trips", "pre_minutes", "age_band"], "log1p": ["pre_minutes"], "sample_controls": 0.5}
    spec = parse_spec(raw, source_path=DEMO_SPEC)
    levels = {"age_band": ["16-24", "25-34", "35-49", "50+"]}
    columns = design_columns(spec, levels)
    model = FittedModel(
        columns=columns, coefficients=[-2.5, 0.125, 0.0625, 0.25, -0.25, 0.5][: len(columns)], iterations=6,
        log_likelihood=-1234.5, n_units=5106, fingerprint="0123456789abcdef", levels=levels, fitted_on="2026-12-02",
    )
    return build_plan(spec, dialect, model=model)


@pytest.mark.parametrize("dialect", SNAPSHOT_DIALECTS)
@pytest.mark.parametrize("method", ["score_bins", "nearest_neighbour"])
def test_score_method_plan_matches_golden(spec, method, dialect, update_golden, tmp_path):
    """A method's snapshot keeps its manifest and the steps the demo's snapshot (and, for nearest
    neighbours, the score_bins one) does not already hold with the same SQL, so an edit of a shared
    template changes one file per dialect, not one per method."""
    matching = {"method": "score_bins", "bins": 5} if method == "score_bins" else {"method": method, "block_on": ["age_band"]}
    plan = score_plan(dialect, matching)
    shared = {s.name: {s.statements} for s in api.compile_plan(spec, dialect).steps}
    if method == "nearest_neighbour":  # the propensity steps are held once, by the score_bins snapshot
        for s in score_plan(dialect, {"method": "score_bins", "bins": 5}).steps:
            shared.setdefault(s.name, set()).add(s.statements)
    files = {
        name: text
        for (name, text), step in zip(plan.files().items(), list(plan.steps) + [None])
        if step is None or step.statements not in shared.get(step.name, set())
    }
    folder = GOLDEN / method / dialect
    if update_golden:
        shutil.rmtree(folder, ignore_errors=True)
        folder.mkdir(parents=True)
        for name, text in files.items():
            (folder / name).write_text(text, encoding="utf-8")
    assert sorted(files) == sorted(p.name for p in folder.iterdir()), "step files differ from the golden set; rerun with --update-golden if intended"
    for name, text in files.items():
        assert text == (folder / name).read_text(), f"{method}/{dialect}/{name} differs from golden"


def entropy_plan(dialect: str):
    """The demo study with entropy balancing on means, two stepwise terms and a variance, compiled with a fixed fit
    (coefficients made up for the golden files), and the statements of its fit: the targets and
    one Newton step of the dual."""
    from sqlmatch.matching.entropy_balancing import BalancingFit, Moment, newton_statement, targets_statement
    from sqlmatch.plan import build_plan
    from sqlmatch.propensity import DesignColumn

    # two terms as the stepwise search (the default propensity.terms) adds them
    LOG_TRIPS = DesignColumn("log1p_pre_trips", "log1p", feature="pre_trips")
    AGE_LEVEL = DesignColumn("age_band__l1", "level", feature="age_band", level="25-34")

    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["matching"] = {"method": "entropy_balancing", "on": ["pre_trips", "pre_minutes", "age_band"], "balance_variances": True}
    spec = parse_spec(raw, source_path=DEMO_SPEC)
    moments = (
        Moment("pre_trips", "numeric", centre=7.25, scale=6.5),
        Moment("pre_minutes", "numeric", centre=105.0, scale=96.5),
        Moment("age_band", "level", level="25-34", centre=0.375, scale=0.5),
        Moment("pre_trips", "term", column=LOG_TRIPS, centre=1.9, scale=0.8),
        Moment("age_band", "term", column=DesignColumn("age_band__l1__x__log1p_pre_trips", "product", factors=(AGE_LEVEL, LOG_TRIPS)), centre=0.7, scale=0.9),
        Moment("pre_trips", "square", mean=7.25, centre=52.0, scale=60.0),
    )
    fit = BalancingFit(moments=moments, lam=(0.5, -0.125, 0.25, 0.375, -0.25, -0.0625), log_normaliser=2.5, steps=6, evaluations=7, max_gap=1e-12,
                       max_share=0.01, effective_controls=2500.0, n_treated=426, n_control=4680)
    extra = {
        "fit_targets.sql": targets_statement(spec, dialect, [Moment(m.feature, m.kind, level=m.level, column=m.column) for m in moments if m.kind != "square"]) + ";\n",
        "fit_newton_step.sql": newton_statement(spec, dialect, moments, fit.lam, transient=False) + ";\n",
    }
    return build_plan(spec, dialect, model=fit), extra


@pytest.mark.parametrize("dialect", SNAPSHOT_DIALECTS)
def test_entropy_balancing_plan_matches_golden(spec, dialect, update_golden):
    """The method's snapshot: its manifest, the steps the demo snapshot does not hold with the same
    SQL, and the two statements its fit runs (the targets, a Newton step of the dual)."""
    plan, extra = entropy_plan(dialect)
    shared = {s.name: {s.statements} for s in api.compile_plan(spec, dialect).steps}
    files = {
        name: text
        for (name, text), step in zip(plan.files().items(), list(plan.steps) + [None])
        if step is None or step.statements not in shared.get(step.name, set())
    } | extra
    folder = GOLDEN / "entropy_balancing" / dialect
    if update_golden:
        shutil.rmtree(folder, ignore_errors=True)
        folder.mkdir(parents=True)
        for name, text in files.items():
            (folder / name).write_text(text, encoding="utf-8")
    assert sorted(files) == sorted(p.name for p in folder.iterdir()), "step files differ from the golden set; rerun with --update-golden if intended"
    for name, text in files.items():
        assert text == (folder / name).read_text(), f"entropy_balancing/{dialect}/{name} differs from golden"


@pytest.mark.parametrize("dialect", DIALECTS)
def test_entropy_balancing_statements_parse_back(dialect):
    plan, extra = entropy_plan(dialect)
    statements = [s for step in plan.steps for s in step.statements] + [t.rstrip().rstrip(";") for t in extra.values()]
    for statement in statements:
        trees = [t for t in sqlglot.parse(statement, read=dialect) if t is not None]
        assert len(trees) == 1, statement[:200]


@pytest.mark.parametrize("dialect", DIALECTS)
def test_compiling_twice_gives_identical_bytes(spec, dialect, tmp_path):
    first, second = tmp_path / "a", tmp_path / "b"
    api.write_plan(api.compile_plan(spec, dialect), first)
    api.write_plan(api.compile_plan(api.load(DEMO_SPEC), dialect), second)
    for path in first.iterdir():
        assert path.read_bytes() == (second / path.name).read_bytes()


@pytest.mark.parametrize("dialect", DIALECTS)
def test_every_compiled_statement_parses_back(spec, dialect, tmp_path):
    folder = tmp_path / dialect
    api.write_plan(api.compile_plan(spec, dialect), folder)
    manifest = json.loads((folder / "manifest.json").read_text())
    assert [s["file"] for s in manifest["steps"]] == sorted(p.name for p in folder.glob("*.sql"))
    for step in manifest["steps"]:
        text = (folder / step["file"]).read_text()
        statements = [s for s in sqlglot.parse(text, read=dialect) if s is not None]
        # the session's time zone first (DuckDB, PostgreSQL, Spark) and, where DDL is transactional
        # (DuckDB, PostgreSQL), the swap inside BEGIN ... COMMIT: the step's own statements between
        if step["kind"] != "setup" and dialect in ("duckdb", "postgres", "spark"):
            assert isinstance(statements[0], sqlglot.exp.Set), step["file"]
            statements = statements[1:]
        if step["kind"] != "setup" and dialect == "postgres":  # then JIT off, as the engine adapter sets it
            assert isinstance(statements[0], sqlglot.exp.Set) and "jit" in statements[0].sql(dialect).lower(), step["file"]
            statements = statements[1:]
        if step["kind"] == "table" and dialect in ("duckdb", "postgres"):
            assert [type(s) for s in statements[2:3] + statements[-1:]] == [sqlglot.exp.Transaction, sqlglot.exp.Commit], step["file"]
            statements = statements[:2] + statements[3:-1]
        expected = {"setup": 1, "table": 4, "query": 1}[step["kind"]]
        assert len(statements) == expected, step["file"]
        if step["kind"] == "table":
            # build under a temporary name, then swap: DROP new, CREATE new, DROP old, RENAME new
            kinds = [type(s) for s in statements]
            assert kinds == [sqlglot.exp.Drop, sqlglot.exp.Create, sqlglot.exp.Drop, sqlglot.exp.Alter], step["file"]
            assert statements[1].this.name.endswith("__building")


def test_manifest_lists_reads_and_writes(spec):
    manifest = api.compile_plan(spec, "duckdb").manifest()
    by_name = {s["name"]: s for s in manifest["steps"]}
    assert by_name["unit_measures"]["reads"] == ["trips", "sqlmatch.annual_pass_units", "riders"]  # riders: the unknown-units count
    assert by_name["unit_measures"]["writes"] == ["sqlmatch.annual_pass_measures"]
    assert manifest["work_tables"] == [
        "sqlmatch.annual_pass_units",
        "sqlmatch.annual_pass_measures",
        "sqlmatch.annual_pass_cells",
        "sqlmatch.annual_pass_weighted_units",
    ]


def test_events_are_scanned_once(spec):
    """Features and outcomes come from one pass over the events table: it appears in exactly one
    FROM/JOIN of the whole plan, with the unknown-units count on (the default) or off."""

    def scans(plan):
        found = {}
        for step in plan.steps:
            for statement in step.statements:
                tree = sqlglot.parse_one(statement, read="duckdb")
                n = sum(1 for t in tree.find_all(sqlglot.exp.Table) if t.name == "trips")
                if n:
                    found[step.name] = n
        return found

    assert scans(api.compile_plan(spec, "duckdb")) == {"unit_measures": 1}
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["events"]["check_unknown_units"] = False
    assert scans(api.compile_plan(parse_spec(raw), "duckdb")) == {"unit_measures": 1}


def derived_spec():
    from derived import with_derived

    return parse_spec(with_derived(tomllib.loads(DEMO_SPEC.read_text())))


DERIVED_STEPS = ("unit_measures", "data_coverage")


@pytest.mark.parametrize("dialect", SNAPSHOT_DIALECTS)
def test_derived_features_compile_to_golden_sql(dialect, update_golden, tmp_path):
    """The steps that compute (unit_measures) and check (data_coverage) derived features; the other
    steps only gain their columns by name."""
    plan = api.compile_plan(derived_spec(), dialect)
    files = {name: text for (name, text), step in zip(plan.files().items(), plan.steps) if step.name in DERIVED_STEPS}
    assert len(files) == len(DERIVED_STEPS)
    folder = GOLDEN / "derived" / dialect
    if update_golden:
        shutil.rmtree(folder, ignore_errors=True)
        folder.mkdir(parents=True)
        for name, text in files.items():
            (folder / name).write_text(text, encoding="utf-8")
    assert sorted(files) == sorted(p.name for p in folder.iterdir()), "step files differ from the golden set; rerun with --update-golden if intended"
    for name, text in files.items():
        assert text == (folder / name).read_text(), f"derived/{dialect}/{name} differs from golden"


@pytest.mark.parametrize("dialect", DIALECTS)
def test_derived_features_parse_back_and_scan_the_events_once(dialect):
    plan = api.compile_plan(derived_spec(), dialect)
    scans = {}
    for step in plan.steps:
        for statement in step.statements:
            trees = [t for t in sqlglot.parse(statement, read=dialect) if t is not None]
            assert len(trees) == 1, step.name
            n = sum(1 for t in trees[0].find_all(sqlglot.exp.Table) if t.name == "trips")
            if n:
                scans[step.name] = n
    assert scans == {"unit_measures": 1}


HOSTILE = GOLDEN / "hostile_names"


def hostile_spec():
    """Source names with quotes, backticks, a semicolon, spaces, unicode and reserved words."""
    import tomllib

    from sqlmatch.spec import parse_spec

    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["units"] = {"table": {"schema": 'bike "share"', "name": "riders; DROP TABLE riders"}, "key": "select", "enrolled_on": "päss `bought` on"}
    raw["events"] = {"table": {"schema": 'bike "share"', "name": "order"}, "unit_key": "select", "time": "started at"}
    raw["features"] = [
        {"name": "pre_trips", "aggregate": "count"},
        {"name": "pre_fare", "aggregate": "sum", "measure": "fare'; --"},
        {"name": "age_band", "aggregate": "attribute", "attribute": "Age Band", "type": "categorical"},
    ]
    raw["outcomes"] = [{"name": "post_fare", "aggregate": "sum", "measure": "fare'; --"}]
    raw["eligibility"] = {"filters": ['"Age Band" <> \'50+\'']}
    raw["matching"] = {"on": ["pre_trips", "age_band"], "cut_points": {"pre_trips": [1, 5, 10]}}
    return parse_spec(raw)


@pytest.mark.parametrize("dialect", DIALECTS)
def test_hostile_names_are_quoted_on_every_dialect(dialect, update_golden, tmp_path):
    plan = api.compile_plan(hostile_spec(), dialect)
    folder = HOSTILE / dialect
    if dialect in SNAPSHOT_DIALECTS:
        if update_golden:
            shutil.rmtree(folder, ignore_errors=True)
            api.write_plan(plan, folder)
        api.write_plan(plan, tmp_path)
        for path in sorted(folder.iterdir()):
            assert (tmp_path / path.name).read_text() == path.read_text(), f"hostile_names/{dialect}/{path.name} differs"
    for step in plan.steps:
        trees = [t for t in sqlglot.parse(";\n".join(step.statements), read=dialect) if t is not None]
        assert len(trees) == len(step.statements)
