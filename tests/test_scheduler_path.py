"""The compile-only path: a scheduler runs the compiled files in manifest order, then
`sqlmatch report` reads the aggregate tables they wrote and gives the same results as `run`."""

from __future__ import annotations

import json
import math
import shutil

import duckdb
import sqlglot

from sqlmatch.cli import main

from conftest import DEMO_SPEC


def close(a, b, path=""):
    if isinstance(a, dict):
        assert a.keys() == b.keys(), path
        for k in a:
            close(a[k], b[k], f"{path}.{k}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12), (path, a, b)
    else:
        assert a == b, (path, a, b)


def test_scheduled_plan_then_report_equals_run(demo_dir, tmp_path):
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = tmp_path / "annual_pass.toml"
    shutil.copyfile(DEMO_SPEC, spec)
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql), "--for-scheduler"]) == 0
    manifest = json.loads((sql / "manifest.json").read_text())
    assert all(step["kind"] != "query" for step in manifest["steps"])  # every aggregate lands in a table

    # the "scheduler": plain DuckDB running each file in order, no sqlmatch involved
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        for step in manifest["steps"]:
            for statement in sqlglot.parse((sql / step["file"]).read_text(), read="duckdb"):
                if statement is not None:
                    con.execute(statement.sql("duckdb"))

    assert main(["report", str(spec), "--out", str(tmp_path / "from_tables")]) == 0
    assert main(["run", str(spec), "--out", str(tmp_path / "direct"), "--quiet"]) == 0
    a = json.loads((tmp_path / "from_tables" / "results.json").read_text())
    b = json.loads((tmp_path / "direct" / "results.json").read_text())
    close(a, b)
    assert (tmp_path / "from_tables" / "report.html").exists()


def test_report_refuses_what_run_refuses(demo_dir, tmp_path, capsys):
    """A scheduler runs the SQL without sqlmatch's checks; `report` applies them to the aggregate
    tables, so a run that matched too few treated units is refused there as well."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = tmp_path / "annual_pass.toml"
    spec.write_text(DEMO_SPEC.read_text().replace("[matching]\n", "[matching]\nmin_treated = 100000\n"))
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql), "--for-scheduler"]) == 0
    manifest = json.loads((sql / "manifest.json").read_text())
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        for step in manifest["steps"]:
            for statement in sqlglot.parse((sql / step["file"]).read_text(), read="duckdb"):
                if statement is not None:
                    con.execute(statement.sql("duckdb"))
    code = main(["report", str(spec), "--out", str(tmp_path / "from_tables")])
    err = capsys.readouterr().err
    assert code != 0 and "matching.min_treated" in err and "Traceback" not in err
    assert not (tmp_path / "from_tables" / "results.json").exists()
