"""Aggregate queries whose sums grow with the square of the design columns, on a spec wide enough
that one query would exceed PostgreSQL's SELECT list limit of 1,664 entries ("target lists can
have at most 1664 entries", PostgreSQL's MaxTupleAttributeNumber): they are split into parts of
at most columns.MAX_SUMS_PER_QUERY sums, merged by column name. The wide spec is the demo study
on a copy of its riders with a categorical `zone` of ZONES levels (zone dummies as design
columns / balanced moments); the checks compare PostgreSQL with DuckDB (the same numbers to 1e-9
relative), a scheduled run with a direct one, and the split rows with the one-query rows on a
small spec."""

from __future__ import annotations

import os
import secrets
import tomllib

import duckdb
import numpy as np
import pytest
import sqlglot

from sqlmatch import api, columns, propensity
from sqlmatch.engines.base import QueryResult
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import SqlmatchError
from sqlmatch.plan import build_plan, measure_columns
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from test_engines import PG_TYPES, assert_same_numbers

POSTGRES_LIMIT = 1664
ZONES = 58  # 57 dummies: a propensity design of 58 columns (its Newton step: 1,831 entries in one query), 58 moments
FEW_ZONES = 30  # a design of 30 columns: the weighting sandwich needs 2,181 entries, the Newton step 529
RIDERS = 3_000


def select_width(sql: str) -> int:
    """Entries of a statement's SELECT list (of its first branch for a UNION)."""
    return len(sqlglot.parse_one(sql, read="postgres").selects)


def plan_and_run_under(spec, limit: int):
    """The study's plan (before the fit) and a full run with the SELECT-list limit lowered to `limit`."""
    saved = columns.MAX_SUMS_PER_QUERY
    columns.MAX_SUMS_PER_QUERY = limit
    try:
        return build_plan(spec, "duckdb"), api.run(spec)
    finally:
        columns.MAX_SUMS_PER_QUERY = saved


def widest_select(sql: str) -> int:
    """The most entries of any SELECT list in the statement, its CTEs' included, with `alias.*` of a
    CTE counted as that CTE's entries (PostgreSQL's 1,664 limit applies to the expanded list)."""
    from sqlglot import exp

    tree = sqlglot.parse_one(sql, read="postgres")
    ctes = {c.alias: c.this for c in tree.find_all(exp.CTE)}
    widths: dict[str, int] = {}

    def width(select) -> int:
        n = 0
        sources = {t.alias_or_name: t.name for t in select.find_all(exp.Table)}
        for e in select.selects:
            if isinstance(e, exp.Column) and isinstance(e.this, exp.Star):
                n += cte_width(sources.get(e.table, e.table))
            else:
                n += 1
        return n

    def cte_width(name: str) -> int:
        if name not in widths:
            widths[name] = width(ctes[name]) if name in ctes else 1
        return widths[name]

    return max(width(s) for s in tree.find_all(exp.Select))


@pytest.fixture(scope="module")
def wide_db(tmp_path_factory):
    """The demo warehouse with riders_wide: riders and a zone, the treated (March 2026 buyers) and
    the others each dealt round the ZONES zones in key order, so every zone holds both groups."""
    from sqlmatch.demo_run import build_demo

    out = tmp_path_factory.mktemp("wide")
    build_demo(out, riders=RIDERS, seed=20260301)
    path = out / "bikeshare.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute(
            f"""CREATE TABLE riders_wide AS
            SELECT r.*,
              'zone_' || LPAD(CAST((ROW_NUMBER() OVER (PARTITION BY bought ORDER BY rider_id) - 1) % {ZONES} AS VARCHAR), 2, '0') AS zone,
              'zone_' || LPAD(CAST((ROW_NUMBER() OVER (PARTITION BY bought ORDER BY rider_id) - 1) % {FEW_ZONES} AS VARCHAR), 2, '0') AS few_zone
            FROM (SELECT *, COALESCE(pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01', FALSE) AS bought FROM riders) AS r"""
        )
        con.execute("ALTER TABLE riders_wide DROP COLUMN bought")
    return path


def wide_raw(schema: str, work: str, method: str, zone: str = "zone", **extra) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text(encoding="utf-8"))
    raw["study"].pop("database", None)
    raw["study"]["work_schema"] = work
    raw["units"]["table"] = {"schema": schema, "name": "riders_wide"}
    raw["events"]["table"] = {"schema": schema, "name": "trips"}
    raw["features"].append({"name": "zone", "aggregate": "attribute", "attribute": zone, "type": "categorical"})
    if method == "score_weighting":
        raw["matching"] = {"method": "score_weighting"}
        # the zone alone: the Newton steps sum over its 58 cells (PostgreSQL computes the linear
        # predictor again in each of the step's sums, so many cells would make them slow)
        raw["propensity"] = {"features": ["zone"]}
    else:
        raw["matching"] = {"method": "entropy_balancing", "on": ["pre_trips", "zone"]}
    raw.update(extra)
    return raw


@pytest.fixture(scope="module")
def wide_postgres(wide_db):
    """(engine, schema) with riders_wide and trips copied into a fresh PostgreSQL schema."""
    url = os.environ.get("SQLMATCH_TEST_POSTGRES_URL")
    if not url:
        pytest.skip("SQLMATCH_TEST_POSTGRES_URL is not set: no PostgreSQL server to run on")
    from sqlmatch.engines.postgres import PostgresEngine

    engine = PostgresEngine(url)
    tag = f"sqlmatch_wide_{os.getpid()}_{secrets.token_hex(3)}"
    engine.execute(f'CREATE SCHEMA "{tag}"')
    try:
        with duckdb.connect(str(wide_db), read_only=True) as con:
            for name in ("riders_wide", "trips"):
                cols = [(r[0], r[1]) for r in con.execute(f"DESCRIBE {name}").fetchall()]
                engine.execute(f'CREATE TABLE "{tag}"."{name}" ({", ".join(f"{c} {PG_TYPES[t]}" for c, t in cols)})')
                with engine.con.cursor() as cur, cur.copy(f'COPY "{tag}"."{name}" FROM STDIN') as copy:
                    for row in con.execute(f"SELECT * FROM {name} ORDER BY 1").fetchall():
                        copy.write_row(row)
        yield engine, tag
    finally:
        for schema in (tag, f"{tag}_work", f"{tag}_cov"):
            engine.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        engine.close()


def comparable(results) -> dict:
    out = results.to_dict()
    out.pop("dialect")
    out.pop("provenance")
    return out


def run_both(wide_db, wide_postgres, method, **extra):
    engine, tag = wide_postgres
    with DuckDBEngine(str(wide_db)) as duck:
        want = api.run(parse_spec(wide_raw("main", "sqlmatch_wide", method, **extra)), engine=duck, keep_tables=False)
    got = api.run(parse_spec(wide_raw(tag, f"{tag}_work", method, **extra)), engine=engine, keep_tables=False)
    return got, want


@pytest.mark.slow
def test_postgres_gives_duckdbs_numbers_for_a_wide_weighting_sandwich(wide_db, wide_postgres):
    """score_weighting with 30 design columns: the sandwich sums (2,181 entries in one query) and
    the per-level sums of a subgroup (2,182), each split into two parts, give on PostgreSQL every
    number of results.json DuckDB gives (1e-9 relative). Before the split PostgreSQL refused the
    sandwich query. Slow: 95 to 160 s here, most of it PostgreSQL with the wide queries."""
    got, want = run_both(wide_db, wide_postgres, "score_weighting", zone="few_zone", subgroups=[{"name": "busy", "where": "pre_trips > 3"}])
    assert want.matching.n_treated_matched > 100  # a real study, or equality would prove little
    assert_same_numbers(comparable(got), comparable(want))


@pytest.mark.slow
def test_postgres_gives_duckdbs_numbers_for_many_balanced_moments(wide_db, wide_postgres):
    """entropy_balancing on 58 moments: the Newton steps of the dual (1,831 entries in one query) and
    the sandwich sums (7,368), split into parts, give the same numbers on PostgreSQL as on DuckDB
    (slow: about 50 s here)."""
    got, want = run_both(wide_db, wide_postgres, "entropy_balancing")
    assert want.matching.n_control_matched > 1000
    assert_same_numbers(comparable(got), comparable(want))


@pytest.mark.slow
def test_postgres_gives_duckdbs_newton_step_for_a_wide_propensity_model(wide_db, wide_postgres):
    """One Newton step of the propensity model with 58 design columns (1,831 entries in one query:
    refused by PostgreSQL before the split), in two parts over the same cells table on both engines:
    the same score vector, information matrix and log-likelihood to 1e-9 relative (slow:
    100 to 112 s here; PostgreSQL alone took 87 to 95 s to plan and run the two parts)."""
    from sqlmatch.engines.postgres import PostgresEngine  # noqa: F401 (the fixture's engine)

    pg, tag = wide_postgres
    rows = {}
    for engine, schema, work in ((DuckDBEngine(str(wide_db)), "main", "sqlmatch_wide_cells"), (pg, tag, f"{tag}_work")):
        spec = parse_spec(wide_raw(schema, work, "score_weighting"))
        for step in build_plan(spec, engine.dialect).steps:  # the partial plan: sources and the cells table
            if step.kind in ("setup", "table"):
                for statement in step.statements:
                    engine.execute(statement)
        design = propensity.design_columns(spec, {"zone": [f"zone_{k:02d}" for k in range(ZONES)]})
        beta = [0.02 * ((k % 7) - 3) for k in range(len(design))]
        statements = propensity.newton_statements(spec, engine.dialect, design, beta)
        assert len(statements) == 2
        rows[engine.dialect] = propensity.evaluate_newton(engine.fetch, statements)
    want, got = rows["duckdb"], rows["postgres"]
    assert sorted(got) == sorted(want) and len(want) > POSTGRES_LIMIT
    for name, value in want.items():
        assert float(got[name]) == pytest.approx(float(value), rel=1e-9, abs=1e-12), name


def wide_plan(method: str, dialect: str = "postgres"):
    """The wide spec's full plan with a model of the right shape (coefficients made up: only the
    SQL's shape is looked at)."""
    from sqlmatch.matching import entropy_balancing as eb

    extra = {"subgroups": [{"name": "busy", "where": "pre_trips > 3"}]} if method == "score_weighting" else {}
    spec = parse_spec(wide_raw("main", "w", method, **extra))
    levels = {"zone": [f"zone_{k:02d}" for k in range(ZONES)]}
    if method == "score_weighting":
        cols = propensity.design_columns(spec, levels)
        model = propensity.FittedModel(columns=cols, coefficients=[0.01] * len(cols), iterations=1, log_likelihood=0.0, n_units=1, fingerprint="x", levels=levels)
        return spec, build_plan(spec, dialect, model=model), cols
    moments = eb.first_moments(spec, levels)
    fit = eb.BalancingFit(moments=tuple(moments), lam=tuple([0.01] * len(moments)), log_normaliser=0.0, steps=1, evaluations=1, max_gap=0.0,
                          max_share=0.0, effective_controls=1.0, n_treated=1, n_control=1, left_out=())
    return spec, build_plan(spec, dialect, model=fit), moments


@pytest.mark.slow
@pytest.mark.parametrize("method", ["score_weighting", "entropy_balancing"])
def test_every_query_of_a_wide_plan_fits_postgres_select_list(method):
    """Every aggregate query of the wide plans and of their fits stays within MAX_SUMS_PER_QUERY,
    and the split ones are really split (several parts, each marked as part of the first). Slow:
    compiling the wide SQL takes about 14 s per method."""
    from sqlmatch.matching import entropy_balancing as eb

    spec, plan, design = wide_plan(method)
    wide = {s.name: select_width(s.statements[0]) for s in plan.steps if s.kind == "query"}
    assert max(wide.values()) <= columns.MAX_SUMS_PER_QUERY < POSTGRES_LIMIT
    split = ["propensity_check", "weighting_sandwich", "weighting_subgroup_busy"] if method == "score_weighting" else ["balancing_sandwich"]
    for name in split:
        parts = [s for s in plan.steps if s.part_of == name]
        assert parts and [s.name for s in parts] == [f"{name}__part{k}" for k in range(2, len(parts) + 2)], name
    if method == "score_weighting":
        fit = propensity.newton_statements(spec, "postgres", design, [0.0] * len(design))
    else:
        fit = eb.newton_statements(spec, "postgres", design, [0.0] * len(design))
    assert len(fit) == 2 and max(map(select_width, fit)) <= columns.MAX_SUMS_PER_QUERY


@pytest.mark.slow
def test_split_rows_equal_the_one_query_rows(demo_db):
    """The parts' merged row is the one query's row, entry for entry (the sandwich and Newton sums
    of the small demo spec, split by lowering the limit to 40 entries; DuckDB computes both).
    Slow: about 17 s here."""
    from sqlmatch.engines.base import merged
    from sqlmatch.runner import run_plan

    raw = tomllib.loads(DEMO_SPEC.read_text(encoding="utf-8"))
    raw["study"]["database"] = str(demo_db)
    raw["matching"] = {"method": "score_weighting"}
    raw["subgroups"] = [{"name": "busy", "where": "pre_trips > 3"}]
    raw["propensity"] = {"terms": "linear"}  # the demo's two terms, split at 40 entries
    spec = parse_spec(raw)
    with DuckDBEngine(str(demo_db)) as engine:
        model = run_plan(build_plan(spec, "duckdb"), spec, engine, keep_tables=True).model
        whole = build_plan(spec, "duckdb", model=model)
        limit = columns.MAX_SUMS_PER_QUERY
        columns.MAX_SUMS_PER_QUERY = 40
        try:
            split = build_plan(spec, "duckdb", model=model)
            newton_parts = propensity.newton_statements(spec, "duckdb", model.columns, model.coefficients)
        finally:
            columns.MAX_SUMS_PER_QUERY = limit
        (newton_whole,) = propensity.newton_statements(spec, "duckdb", model.columns, model.coefficients)
        assert len(newton_parts) > 1
        assert propensity.evaluate_newton(engine.fetch, newton_parts) == engine.fetch(newton_whole).one()
        for name in ("weighting_sandwich", "weighting_subgroup_busy", "propensity_check"):
            parts = [s for s in split.steps if s.name == name or s.part_of == name]
            assert len(parts) > 1 and all(select_width(s.statements[0]) <= 40 for s in parts), name
            got = merged([engine.fetch(s.statements[0]) for s in parts], name)
            want = engine.fetch(whole.step(name).statements[0])
            assert sorted(got.columns) == sorted(want.columns), name
            assert got.records() == [{c: r[c] for c in got.columns} for r in want.records()], name


COHORTS = 29  # with the demo's 4 outcomes: 1 + 4 x 29 x 30 / 2 = 1,741 entries in one query


@pytest.mark.slow
def test_cohort_covariances_of_many_months_on_postgres_and_duckdb_equal_numpy(wide_postgres, tmp_path):
    """The covariance query over 29 months' influence tables (made-up terms; a unit missing from a
    month adds 0 there), split into parts: PostgreSQL and DuckDB give the sums over units of the
    products of every two months' terms, as numpy computes them from the same terms (slow: 6 to
    13 s here, most of it PostgreSQL with the 1,500-entry parts)."""
    from sqlmatch.cohorts import covariance_matrices, covariance_row, covariance_steps

    pg, tag = wide_postgres
    spec = parse_spec(wide_raw("main", "w", "score_weighting"))
    outcomes = measure_columns(spec)[1]
    units = range(1, 121)
    terms = np.zeros((len(outcomes), len(units), COHORTS))
    tables = {}
    for c in range(COHORTS):
        rows = []
        for u in units:
            if (u + c) % 5 == 0:
                continue
            values = [((u * 31 + c * 17 + o * 7) % 23 - 11) / 7.0 for o in range(len(outcomes))]
            terms[:, u - 1, c] = values
            rows.append((u, *values))
        tables[f"annual_pass_influence_2024_{c:02d}"] = rows
    influence_columns = [columns.stat(o.name, "influence") for o in outcomes]
    ddl = ", ".join(["unit_key bigint"] + [f'"{c}" double precision' for c in influence_columns])
    path = tmp_path / "influence.duckdb"
    with duckdb.connect(str(path)) as con:
        con.execute("CREATE SCHEMA w")
        for name, rows in tables.items():
            con.execute(f"CREATE TABLE w.{name} ({ddl})")
            con.executemany(f"INSERT INTO w.{name} VALUES ({', '.join('?' * (1 + len(outcomes)))})", rows)
    pg.execute(f'CREATE SCHEMA "{tag}_cov"')
    for name, rows in tables.items():
        pg.execute(f'CREATE TABLE "{tag}_cov".{name} ({ddl})')
        with pg.con.cursor() as cur, cur.copy(f'COPY "{tag}_cov".{name} FROM STDIN') as copy:
            for row in rows:
                copy.write_row(row)
    want = {o.name: terms[k].T @ terms[k] for k, o in enumerate(outcomes)}  # numpy: sum over units of t_a t_b
    for engine, schema in ((DuckDBEngine(str(path)), "w"), (pg, f"{tag}_cov")):
        steps = covariance_steps(spec, engine.dialect, [f"{schema}.{t}" for t in tables])
        assert len(steps) > 1 and max(select_width(s.statements[0]) for s in steps) <= columns.MAX_SUMS_PER_QUERY
        row = covariance_row(engine.fetch, steps)
        assert row["n_units"] == len(units)
        got = covariance_matrices(row, outcomes, COHORTS)
        for name, matrix in want.items():
            assert got[name] == pytest.approx(matrix, rel=1e-9, abs=1e-9), (engine.dialect, name)


def test_merging_refuses_parts_computed_apart():
    from sqlmatch.engines.base import merged

    a = QueryResult(("n_units", "g_0", "b_0"), ((10.0, 1.0, 0.5),))
    b = QueryResult(("h_0_0", "b_0"), ((2.0, 0.25),))
    with pytest.raises(SqlmatchError, match="b_0"):
        merged([a, b], "propensity_check")
    ok = merged([a, QueryResult(("h_0_0", "b_0"), ((2.0, 0.5),))], "propensity_check")
    assert ok.one() == {"n_units": 10.0, "g_0": 1.0, "b_0": 0.5, "h_0_0": 2.0}
    with pytest.raises(SqlmatchError, match="rows"):
        merged([a, QueryResult(("h_0_0",), ((1.0,), (2.0,)))], "x")


def test_split_sums_keeps_a_small_query_whole_and_counts_the_fixed_columns():
    assert columns.split_sums(list(range(10)), first_fixed=2, later_fixed=1, limit=12) == [list(range(10))]
    parts = columns.split_sums(list(range(30)), first_fixed=4, later_fixed=2, limit=10)
    assert [len(p) for p in parts] == [6, 8, 8, 8] and sum(parts, []) == list(range(30))


def test_a_scheduled_plan_holds_every_part_and_report_reads_them(demo_dir, tmp_path, monkeypatch):
    """The scheduler path with the split queries (the limit lowered to 25 entries, so the small demo
    study splits its stored-model check, sandwich and subgroup sums): the compiled plan has a file
    per part, each marked part_of in the manifest; plain DuckDB runs the files; `report` reads every
    part's table and gives the numbers of a direct run."""
    import json
    import shutil

    monkeypatch.setattr(columns, "MAX_SUMS_PER_QUERY", 25)
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    text = DEMO_SPEC.read_text(encoding="utf-8").replace('method = "coarsened_exact"', 'method = "score_weighting"')
    text += '\n[[subgroups]]\nname = "busy"\nwhere = "pre_trips > 3"\n'
    text += '\n[propensity]\nterms = "linear"\n'  # a design small enough for parts of 25 entries
    (tmp_path / "annual_pass.toml").write_text(text, encoding="utf-8")
    spec = api.load(tmp_path / "annual_pass.toml")
    direct = api.run(spec)  # writes the model file a scheduled plan needs
    plan = api.compile_for_scheduler(spec, "duckdb")
    api.write_plan(plan, tmp_path / "sql")
    manifest = json.loads((tmp_path / "sql" / "manifest.json").read_text())
    for name in ("propensity_check", "weighting_sandwich", "weighting_subgroup_busy"):
        parts = [s for s in manifest["steps"] if s["name"] == name or s.get("part_of") == name]
        assert len(parts) >= 2 and all((tmp_path / "sql" / s["file"]).is_file() for s in parts), name
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        for step in manifest["steps"]:
            for statement in sqlglot.parse((tmp_path / "sql" / step["file"]).read_text(), read="duckdb"):
                if statement is not None:
                    con.execute(statement.sql("duckdb"))
    reported = api.report_from_tables(spec).to_dict()
    want = direct.to_dict()
    for out in (reported, want):
        out.pop("provenance")
        out.pop("rows_fetched")  # the report reads tables, the run its queries
    assert_same_numbers(reported, want)
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        assert any("__part" in t for (t,) in con.execute("SELECT table_name FROM information_schema.tables").fetchall())
    api.cleanup(spec)  # the parts' tables are the study's too
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        assert not [t for (t,) in con.execute("SELECT table_name FROM information_schema.tables").fetchall() if t.startswith("annual_pass_")]


def test_nearest_neighbour_pair_sums_split_give_the_whole_querys_effects(demo_db, monkeypatch):
    """The nearest-neighbour population-variance sums (four per product of the variables in pair_sums;
    in matching_variance one row per group, its widest SELECT list over the tie sets) split under a
    lowered limit: several parts of each, no SELECT list of any part (CTEs included, stars expanded)
    wider than the limit, and the study's effects and standard errors equal the unsplit run's."""
    from sqlmatch import api

    raw = tomllib.loads(DEMO_SPEC.read_text(encoding="utf-8"))
    raw["study"]["database"] = str(demo_db)
    raw["matching"] = {"method": "nearest_neighbour", "on": ["pre_trips", "pre_minutes", "age_band"]}
    spec = parse_spec(raw)
    whole = api.run(spec)
    monkeypatch.setattr(columns, "MAX_SUMS_PER_QUERY", 150)
    split = api.run(spec)
    from sqlmatch.runner import run_plan

    with DuckDBEngine(str(demo_db)) as engine:
        model = run_plan(build_plan(spec, "duckdb"), spec, engine).model
    compiled = build_plan(spec, "duckdb", model=model)
    for name in ("pair_sums", "matching_variance"):
        parts = [s for s in compiled.steps if s.name == name or s.part_of == name]
        queries = [q for s in parts for q in s.statements if not q.lstrip().upper().startswith("SET ")]
        assert len(parts) > 1 and len(queries) == len(parts) and all(widest_select(q) <= 150 for q in queries), (name, [widest_select(q) for q in queries])
    for a, b in zip(whole.effects, split.effects):
        assert a.outcome == b.outcome
        assert b.estimate == pytest.approx(a.estimate, rel=1e-12)
        assert b.std_error == pytest.approx(a.std_error, rel=1e-9)


def test_outcome_regression_split_into_parts_gives_the_same_row_and_sensitivity(demo_db):
    """outcome_regression (one row: X'WX over the design, X'Wy, y'Wy per outcome) split by lowering the
    limit to 40 entries: several parts, every part's SELECT lists (CTEs included) within it, the merged row
    equal to the one query's entry for entry (DuckDB computes both), and a run with the parts gives the
    same robustness values and E-values as a run without."""
    from sqlmatch.engines.base import merged

    raw = tomllib.loads(DEMO_SPEC.read_text(encoding="utf-8"))
    raw["study"]["database"] = str(demo_db)
    spec = parse_spec(raw)
    whole_run = api.run(spec)
    whole = build_plan(spec, "duckdb").step("outcome_regression")
    split, split_run = plan_and_run_under(spec, 40)
    parts = [s for s in split.steps if s.name == "outcome_regression" or s.part_of == "outcome_regression"]
    queries = [q for s in parts for q in s.statements if not q.lstrip().upper().startswith("SET ")]
    assert len(parts) > 1 and len(queries) == len(parts) and all(widest_select(q) <= 40 for q in queries)
    (whole_query,) = [q for q in whole.statements if not q.lstrip().upper().startswith("SET ")]
    assert select_width(whole_query) > 40
    with DuckDBEngine(str(demo_db)) as engine:
        one = engine.fetch(whole_query)
        pieces = merged([engine.fetch(q) for q in queries], "outcome_regression")
    assert list(pieces.columns) == list(one.columns)
    for a, b in zip(one.rows[0], pieces.rows[0]):
        # sums of centred columns are 0 up to summation order (about 1e-10 against sums of 1e6)
        assert b == pytest.approx(a, rel=1e-9, abs=1e-6)
    compared = 0
    for a, b in zip(whole_run.effects, split_run.effects):
        assert a.outcome == b.outcome
        for key in ("robustness_value", "partial_r2", "e_value"):
            x, y = a.sensitivity.get(key), b.sensitivity.get(key)
            assert (x is None) == (y is None), key
            if x is not None:
                assert y == pytest.approx(x, rel=1e-9), key
                compared += 1
    assert compared >= 2 * len(whole_run.effects)  # the figures exist, so the comparison can fail


def test_outcome_strata_split_into_parts_gives_the_same_rows_and_effects(demo_db):
    """outcome_strata (one row per stratum and group) with the adjustment's sums of the features and
    their squares, split by lowering the limit to 60 entries: every part within it, the merged rows
    equal the one query's rows entry for entry (DuckDB computes both), and a run with the parts
    gives the same effects as a run without."""
    from sqlmatch.engines.base import merged

    raw = tomllib.loads(DEMO_SPEC.read_text(encoding="utf-8"))
    raw["study"]["database"] = str(demo_db)
    raw["effect"] = {"adjustment_slopes": "group", "adjustment_terms": "squares"}
    spec = parse_spec(raw)
    whole = build_plan(spec, "duckdb")
    split, split_run = plan_and_run_under(spec, 60)
    parts = [s for s in split.steps if s.name == "outcome_strata" or s.part_of == "outcome_strata"]
    assert len(parts) > 2 and all(select_width(s.statements[0]) <= 60 for s in parts)
    assert [s.name for s in parts[1:]] == [f"outcome_strata__part{k}" for k in range(2, len(parts) + 1)]
    assert select_width(whole.step("outcome_strata").statements[0]) > 60
    one_run = api.run(spec, keep_tables=True)
    with DuckDBEngine(str(demo_db)) as engine:
        got = merged([engine.fetch(s.statements[0]) for s in parts], "outcome_strata")
        want = engine.fetch(whole.step("outcome_strata").statements[0])
    assert sorted(got.columns) == sorted(want.columns)
    # to 1e-12 relative, not to the bit: DuckDB's parallel aggregation may add the rows in another order
    assert len(got.records()) == len(want.records())
    for g, w in zip(got.records(), want.records()):
        assert g == pytest.approx({c: w[c] for c in got.columns}, rel=1e-12)
    for a, b in zip(split_run.effects, one_run.effects):
        assert a.estimate == pytest.approx(b.estimate, rel=1e-12) and a.std_error == pytest.approx(b.std_error, rel=1e-12), a.outcome
