"""A run killed half-way leaves nothing a reader could mistake for a result, and the next run
cleans up and gives the same numbers as an uninterrupted one."""

from __future__ import annotations

import json
import math
import os
import shutil
import signal
import subprocess
import sys

import duckdb

from sqlmatch.cli import main

from conftest import DEMO_SPEC


def assert_same_results(a, b, path="results"):
    """Counts equal exactly; estimates to 1e-9 relative (parallel floating-point sums in the engine
    may differ in the last digits from run to run). The provenance (when the run finished, its SQL
    seconds) is not a result and is left out."""
    if path == "results":
        a, b = ({k: v for k, v in x.items() if k != "provenance"} for x in (a, b))
    if isinstance(a, dict):
        assert a.keys() == b.keys(), path
        for k in a:
            assert_same_results(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            assert_same_results(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12), (path, a, b)
    else:
        assert a == b, (path, a, b)


def study_tables(database) -> list[str]:
    with duckdb.connect(str(database), read_only=True) as con:
        rows = con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch' ORDER BY 1").fetchall()
    return [r[0] for r in rows]


def setup_copy(demo_dir, folder):
    folder.mkdir()
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    shutil.copyfile(DEMO_SPEC, folder / "annual_pass.toml")
    return folder / "annual_pass.toml"


def test_sigkill_during_matching_then_rerun(demo_dir, tmp_path):
    spec = setup_copy(demo_dir, tmp_path / "killed")
    env = dict(os.environ, SQLMATCH_PAUSE_BEFORE_SWAP="weighted_units")
    proc = subprocess.Popen(
        [sys.executable, "-m", "sqlmatch.cli", "run", str(spec), "--out", str(tmp_path / "killed_out")],
        stderr=subprocess.PIPE,
        text=True,
        env=env,
    )
    for line in proc.stderr:
        if "paused before swapping in weighted_units" in line:
            break
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    assert proc.returncode == -signal.SIGKILL
    left = study_tables(spec.parent / "bikeshare.duckdb")
    assert "annual_pass_weighted_units__building" in left  # the half-built table, under its temporary name
    assert "annual_pass_weighted_units" not in left  # never visible under the real name
    assert not (tmp_path / "killed_out" / "results.json").exists()

    assert main(["run", str(spec), "--out", str(tmp_path / "rerun"), "--quiet"]) == 0
    assert study_tables(spec.parent / "bikeshare.duckdb") == []  # strays dropped; work tables dropped (no --keep)

    clean = setup_copy(demo_dir, tmp_path / "clean")
    assert main(["run", str(clean), "--out", str(tmp_path / "clean_out"), "--quiet"]) == 0
    rerun = json.loads((tmp_path / "rerun" / "results.json").read_text())
    uninterrupted = json.loads((tmp_path / "clean_out" / "results.json").read_text())
    assert_same_results(rerun, uninterrupted)


def test_keep_and_cleanup(demo_dir, tmp_path, capsys):
    spec = setup_copy(demo_dir, tmp_path / "kept")
    assert main(["run", str(spec), "--out", str(tmp_path / "out"), "--quiet", "--keep"]) == 0
    kept = study_tables(spec.parent / "bikeshare.duckdb")
    assert kept == ["annual_pass_cells", "annual_pass_measures", "annual_pass_units", "annual_pass_weighted_units"]
    assert main(["cleanup", str(spec)]) == 0
    assert "dropped 4 tables" in capsys.readouterr().out
    assert study_tables(spec.parent / "bikeshare.duckdb") == []


def test_two_studies_in_one_database_do_not_collide(demo_dir, tmp_path):
    spec = setup_copy(demo_dir, tmp_path / "two")
    other = spec.with_name("other.toml")
    other.write_text(spec.read_text().replace('name = "annual_pass"', 'name = "annual_pass_b"').replace('cohort = "2026-03"', 'cohort = "2026-04"'))
    assert main(["run", str(spec), "--out", str(tmp_path / "a"), "--quiet", "--keep"]) == 0
    assert main(["run", str(other), "--out", str(tmp_path / "b"), "--quiet", "--keep"]) == 0
    tables = study_tables(spec.parent / "bikeshare.duckdb")
    assert {t for t in tables if t.startswith("annual_pass_b_")} and {t for t in tables if not t.startswith("annual_pass_b_")}
    a = json.loads((tmp_path / "a" / "results.json").read_text())
    assert main(["run", str(spec), "--out", str(tmp_path / "a2"), "--quiet"]) == 0
    assert_same_results(json.loads((tmp_path / "a2" / "results.json").read_text()), a)


def test_a_second_writer_gets_a_clear_message(demo_dir, tmp_path, capsys):
    """DuckDB allows one writing process per file: the second one is told so, in one line."""
    spec = setup_copy(demo_dir, tmp_path / "locked")
    holder = subprocess.Popen(
        [sys.executable, "-c", "import duckdb, sys, time; c = duckdb.connect(sys.argv[1]); print('open', flush=True); time.sleep(60)", str(spec.parent / "bikeshare.duckdb")],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "open"
        code = main(["run", str(spec), "--out", str(tmp_path / "out"), "--quiet"])
        err = capsys.readouterr().err
        assert code == 2
        assert "one writer" in err and "Traceback" not in err
    finally:
        holder.kill()
        holder.wait()
