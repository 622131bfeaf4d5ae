"""Runs at the same time on one PostgreSQL database.

Two different studies run at once (two `sqlmatch run` processes) both succeed, give the numbers
they give when run one after the other, and leave no `__building` or stray table. Two runs of the
SAME study at once would drop and swap each other's tables, so the PostgreSQL adapter holds an
advisory lock per study (work schema + name) for the whole run: the second run fails fast with one
line naming the study, drops nothing, and the study runs again once the first run has ended.

The small demo warehouse (conftest's demo_dir) is copied into a fresh PostgreSQL schema; the server
is SQLMATCH_TEST_POSTGRES_URL (.ci/run starts one). Without it the tests skip, and under CI they
fail (test_engines._unavailable).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.errors import EngineError

from conftest import DEMO_SPEC, REPO
from test_engines import PG_TYPES, _session_tag, assert_same_numbers, postgres_url  # noqa: F401 (a fixture, shared)
from test_spec_errors import base_spec, write_spec

TABLES = ("riders", "trips")
# A guard against a hung test, never a measurement: how long to wait for a server-side state.
WAIT_LIMIT_SECONDS = 300


@pytest.fixture(scope="module")
def pg(postgres_url, demo_dir):
    """(url, data schema, psycopg module) with riders and trips copied into a fresh schema; every
    schema named after it is dropped afterwards."""
    import psycopg

    url = postgres_url
    tag = _session_tag()
    con = psycopg.connect(url, autocommit=True)
    try:
        con.execute(f'CREATE SCHEMA "{tag}"')
        with duckdb.connect(str(demo_dir / "bikeshare.duckdb"), read_only=True) as source:
            for name in TABLES:
                cols = [(r[0], r[1]) for r in source.execute(f"DESCRIBE {name}").fetchall()]
                rows = source.execute(f"SELECT * FROM {name} ORDER BY 1").fetchall()
                con.execute(f'CREATE TABLE "{tag}"."{name}" (' + ", ".join(f'"{c}" {PG_TYPES[t]}' for c, t in cols) + ")")
                with con.cursor() as cur, cur.copy(f'COPY "{tag}"."{name}" FROM STDIN') as copy:
                    for row in rows:
                        copy.write_row(row)
        yield url, tag, psycopg
    finally:
        schemas = [r[0] for r in con.execute("SELECT nspname FROM pg_namespace WHERE starts_with(nspname, %s)", (tag,)).fetchall()]
        for schema in schemas:
            con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        con.close()


def study_spec(folder, tag: str, name: str, work_schema: str):
    """The demo study under another name, reading the copied tables, as a TOML file in `folder`."""
    raw = base_spec()
    raw["study"] = {**raw["study"], "name": name, "work_schema": work_schema}
    raw["units"]["table"] = {"schema": tag, "name": "riders"}
    raw["events"]["table"] = {"schema": tag, "name": "trips"}
    folder.mkdir(parents=True, exist_ok=True)
    # study.database is written but unused: --engine wins over it
    return write_spec(folder, raw, folder / "unused.duckdb")


def sqlmatch_cli(*args: str, env: dict | None = None) -> subprocess.Popen:
    """`python3 -m sqlmatch.cli ...` in a new process, importing this checkout's sqlmatch."""
    environment = dict(os.environ if env is None else env)
    environment["PYTHONPATH"] = os.pathsep.join([str(REPO), environment.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    return subprocess.Popen([sys.executable, "-m", "sqlmatch.cli", *args], cwd=REPO, env=environment, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def finish(proc: subprocess.Popen) -> tuple[int, str]:
    _, err = proc.communicate(timeout=WAIT_LIMIT_SECONDS)
    return proc.returncode, err


def tables_in(con, schema: str) -> list[str]:
    rows = con.execute("SELECT tablename FROM pg_tables WHERE schemaname = %s ORDER BY 1", (schema,)).fetchall()
    return [r[0] for r in rows]


def wait_until(condition, what: str, procs=()) -> None:
    """Poll the server until `condition()` holds; fail if a process ends first or the guard runs out."""
    deadline = time.monotonic() + WAIT_LIMIT_SECONDS
    while not condition():
        for proc in procs:
            if proc.poll() is not None:
                pytest.fail(f"a run ended (exit {proc.returncode}) before {what}: {proc.stderr.read()}")
        if time.monotonic() > deadline:
            pytest.fail(f"gave up waiting for {what}")
        time.sleep(0.1)


def plan_tables(spec_path) -> set[str]:
    return {t.split(".", 1)[1] for t in api.compile_plan(api.load(spec_path), "postgres").work_tables}


def test_two_different_studies_at_once_match_the_same_studies_run_one_after_the_other(pg, tmp_path):
    url, tag, psycopg = pg
    work = f"{tag}_work"  # not created yet: both runs create it (CREATE SCHEMA IF NOT EXISTS)
    specs = {name: study_spec(tmp_path / name, tag, name, work) for name in ("pass_a", "pass_b")}

    # Both runs are made to overlap: the test holds an exclusive lock on the riders table, so each
    # run stops at its first read of it; once both are waiting there, the lock is let go.
    watch = psycopg.connect(url, autocommit=True)
    blocker = psycopg.connect(url)
    try:
        blocker.execute(f'LOCK TABLE "{tag}"."riders" IN ACCESS EXCLUSIVE MODE')
        procs = {
            name: sqlmatch_cli("run", str(spec), "--engine", url, "--out", str(tmp_path / f"{name}_together"), "--quiet", "--keep")
            for name, spec in specs.items()
        }
        waiting = f"SELECT COUNT(*) FROM pg_locks WHERE relation = '\"{tag}\".\"riders\"'::regclass AND NOT granted"
        wait_until(lambda: watch.execute(waiting).fetchone()[0] == 2, "both runs were waiting on the riders table", procs.values())
        blocker.rollback()
        for name, proc in procs.items():
            code, err = finish(proc)
            assert code == 0, f"{name}: {err}"
            assert "Traceback" not in err

        # --keep: each study's work tables are all there, under their real names, and nothing else
        present = set(tables_in(watch, work))
        expected = plan_tables(specs["pass_a"]) | plan_tables(specs["pass_b"])
        assert present == expected, sorted(present ^ expected)
        assert not [t for t in present if t.endswith("__building")]
        assert all(t.startswith(("pass_a_", "pass_b_")) for t in present)

        # the same studies one after the other, in this process (each drops its tables when done)
        results = {}
        for name, spec in specs.items():
            alone = api.run(api.load(spec), engine_url=url, keep_tables=False)
            results[(name, "alone")] = json.loads(alone.to_json())  # as `run` writes results.json
            results[(name, "together")] = json.loads((tmp_path / f"{name}_together" / "results.json").read_text())
            for run in ("alone", "together"):
                results[(name, run)].pop("provenance")  # when and from which spec file: not a result
        assert tables_in(watch, work) == []
    finally:
        blocker.close()
        watch.close()

    for name in specs:
        # counts exactly, every other number to 1e-9 relative (test_engines.assert_same_numbers)
        assert_same_numbers(results[(name, "together")], results[(name, "alone")], name)
    # both are real studies of the same data: the two names give the same numbers
    a, b = results[("pass_a", "together")], results[("pass_b", "together")]
    assert a["matching"]["n_treated_matched"] > 50
    assert_same_numbers({**a, "study": "-"}, {**b, "study": "-"}, "pass_a vs pass_b")


def test_the_same_study_twice_at_once_the_second_run_is_refused(pg, tmp_path):
    url, tag, psycopg = pg
    work = f"{tag}_same"
    spec = study_spec(tmp_path / "same", tag, "pass_same", work)
    watch = psycopg.connect(url, autocommit=True)
    first = None
    try:
        # the first run stops with its weighted table half-built in the weights step (the test hook in runner.py)
        first = sqlmatch_cli(
            "run", str(spec), "--engine", url, "--out", str(tmp_path / "first"), "--quiet",
            env=dict(os.environ, SQLMATCH_PAUSE_BEFORE_SWAP="weighted_units"),
        )
        for line in first.stderr:
            if "paused before swapping in weighted_units" in line:
                break
        else:
            pytest.fail(f"the first run ended (exit {first.wait()}) without pausing")
        before = tables_in(watch, work)
        assert "pass_same_weighted_units__building" in before and "pass_same_weighted_units" not in before

        # the second run: one line naming the study, exit 2, and the first run's tables untouched
        code, err = finish(sqlmatch_cli("run", str(spec), "--engine", url, "--out", str(tmp_path / "second"), "--quiet"))
        lines = [line for line in err.splitlines() if line.strip()]
        assert code == 2, err
        assert len(lines) == 1 and lines[0].startswith("sqlmatch: error:"), err
        assert "'pass_same'" in lines[0] and "already being run" in lines[0] and "Fix:" in lines[0]
        assert "Traceback" not in err
        assert tables_in(watch, work) == before
        assert not (tmp_path / "second" / "results.json").exists()

        # interrupting the first run drops its tables and releases the study
        first.send_signal(signal.SIGINT)
        assert first.wait(timeout=WAIT_LIMIT_SECONDS) == 130
        assert tables_in(watch, work) == []
        code, err = finish(sqlmatch_cli("run", str(spec), "--engine", url, "--out", str(tmp_path / "third"), "--quiet"))
        assert code == 0, err
        assert (tmp_path / "third" / "results.json").exists()
        assert tables_in(watch, work) == []
    finally:
        if first is not None and first.poll() is None:
            first.kill()
            first.wait()
        watch.close()


def test_study_lock_is_per_study_and_released_with_the_run_or_the_session(pg):
    from sqlmatch.engines.postgres import PostgresEngine

    url, _, psycopg = pg
    one, two = PostgresEngine(url), PostgresEngine(url)
    try:
        with one.study_lock("work", "pass_x"):
            with pytest.raises(EngineError) as info:
                with two.study_lock("work", "pass_x"):
                    pytest.fail("a second session entered a study's lock")
            text = str(info.value)
            assert "'pass_x'" in text and "'work'" in text and "already being run" in text and "Fix:" in text
            assert "backend pid" in text and "\n" not in text
            # another study, or the same name in another work schema, is not held up
            with two.study_lock("work", "pass_y"), two.study_lock("other_work", "pass_x"):
                pass
        with two.study_lock("work", "pass_x"):  # released when the run ends
            pass

        # released when the session ends without unlocking (a run killed mid-way)
        lock = one.study_lock("work", "pass_z")
        lock.__enter__()
        held = one.con.info.backend_pid
        one.con.close()
        with psycopg.connect(url, autocommit=True) as watch:
            wait_until(lambda: not watch.execute("SELECT 1 FROM pg_stat_activity WHERE pid = %s", (held,)).fetchall(), "the closed session to end")
        with two.study_lock("work", "pass_z"):
            pass
    finally:
        one.close()
        two.close()


def test_study_lock_key_is_the_same_in_every_process():
    """Python's hash() is salted per process; the lock key must not be, or two runs would not see
    each other's lock."""
    from sqlmatch.engines.postgres import study_lock_key

    code = "from sqlmatch.engines.postgres import study_lock_key; print(study_lock_key('sqlmatch', 'annual_pass'))"
    keys = {
        subprocess.run(
            [sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, check=True,
            env=dict(os.environ, PYTHONPATH=str(REPO), PYTHONHASHSEED=seed),
        ).stdout.strip()
        for seed in ("1", "2")
    }
    assert keys == {str(study_lock_key("sqlmatch", "annual_pass"))}
    assert -(2**63) <= study_lock_key("sqlmatch", "annual_pass") < 2**63
    assert study_lock_key("sqlmatch", "annual_pass") != study_lock_key("sqlmatch", "annual_pass_b")
    assert study_lock_key("a", "b_c") != study_lock_key("a_b", "c")


def test_two_sessions_creating_the_same_schema_at_once_both_succeed(pg):
    """CREATE SCHEMA IF NOT EXISTS is not atomic in PostgreSQL: a session that checked before
    another's CREATE committed fails on the catalog's unique index. Forced here: the test creates the
    schema in an open transaction, the engine's statement waits on it, then the test commits."""
    from sqlmatch.engines.postgres import PostgresEngine

    url, tag, psycopg = pg
    schema = f"{tag}_race"
    engine = PostgresEngine(url)
    other = psycopg.connect(url)
    outcome: dict[str, BaseException | None] = {}

    def create():
        try:
            engine.execute(f'/* the work schema */\nCREATE SCHEMA IF NOT EXISTS "{schema}"')
            outcome["error"] = None
        except BaseException as err:  # reported by the assertion below
            outcome["error"] = err

    pid = engine.con.info.backend_pid
    try:
        other.execute(f'CREATE SCHEMA "{schema}"')  # not committed yet
        worker = threading.Thread(target=create)
        worker.start()
        with psycopg.connect(url, autocommit=True) as watch:
            wait_until(
                lambda: watch.execute("SELECT wait_event_type FROM pg_stat_activity WHERE pid = %s", (pid,)).fetchone()[0] == "Lock",
                "the engine's CREATE SCHEMA to wait on the open transaction",
            )
            other.commit()
            worker.join(timeout=WAIT_LIMIT_SECONDS)
            assert not worker.is_alive()
            assert outcome["error"] is None, outcome["error"]
            assert watch.execute("SELECT COUNT(*) FROM pg_namespace WHERE nspname = %s", (schema,)).fetchone()[0] == 1
        # a unique violation from anything else is still an error
        engine.execute(f'CREATE TABLE "{schema}".t (k integer PRIMARY KEY)')
        engine.execute(f'INSERT INTO "{schema}".t VALUES (1)')
        with pytest.raises(EngineError, match="duplicate key"):
            engine.execute(f'INSERT INTO "{schema}".t VALUES (1)')
    finally:
        other.close()
        engine.close()
