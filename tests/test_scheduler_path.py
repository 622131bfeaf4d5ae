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
    # provenance says when and how each was made: the same spec and plan, SQL seconds only for the run
    pa, pb = a.pop("provenance"), b.pop("provenance")
    assert (pa["spec_sha256"], pa["plan_fingerprint"]) == (pb["spec_sha256"], pb["plan_fingerprint"])
    assert pa["sql_seconds"] is None and pb["sql_seconds"] > 0
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


def _run_files(sql, database):
    manifest = json.loads((sql / "manifest.json").read_text())
    with duckdb.connect(str(database)) as con:
        for step in manifest["steps"]:
            for statement in sqlglot.parse((sql / step["file"]).read_text(), read="duckdb"):
                if statement is not None:
                    con.execute(statement.sql("duckdb"))


def test_scheduled_score_plan_reports_when_the_stored_model_no_longer_fits(demo_dir, tmp_path):
    """Subclassification on the propensity score, the way a scheduler runs it: `run` fits the model
    once, `compile --for-scheduler` bakes it, the files run without sqlmatch, `report` reads the
    tables. Same data: the report equals `run` and says nothing about the model; with the model file
rewritten after compiling, it says the SQL ran other coefficients. After a fifth of
    the never-enrolled riders leave the units table and the files run again, the report says the
    stored model was fitted on other units."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = tmp_path / "annual_pass.toml"
    spec.write_text(DEMO_SPEC.read_text().replace('method = "coarsened_exact"', 'method = "score_bins"'))
    assert main(["run", str(spec), "--out", str(tmp_path / "direct"), "--quiet"]) == 0
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql), "--for-scheduler"]) == 0
    _run_files(sql, tmp_path / "bikeshare.duckdb")
    assert main(["report", str(spec), "--out", str(tmp_path / "same")]) == 0
    same = json.loads((tmp_path / "same" / "results.json").read_text())
    close(same["effects"], json.loads((tmp_path / "direct" / "results.json").read_text())["effects"])
    assert not any("propensity model" in w for w in same["warnings"])

    # The model file is rewritten after the files were compiled and run: the report says the SQL that
    # ran used other coefficients (each Newton-step row returns the coefficients it was computed at).
    model_file = tmp_path / "annual_pass.model.json"
    original = model_file.read_text()
    body = json.loads(original)
    body["coefficients"][0]["coefficient"] += 0.5
    model_file.write_text(json.dumps(body))
    assert main(["report", str(spec), "--out", str(tmp_path / "rewritten")]) == 0
    rewritten = json.loads((tmp_path / "rewritten" / "results.json").read_text())
    (warning,) = [w for w in rewritten["warnings"] if "propensity coefficients" in w]
    assert "annual_pass.model.json" in warning and "Compile again" in warning
    model_file.write_text(original)

    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        con.execute("DELETE FROM riders WHERE pass_bought_on IS NULL AND rider_id % 5 = 0")
    _run_files(sql, tmp_path / "bikeshare.duckdb")
    assert main(["report", str(spec), "--out", str(tmp_path / "changed")]) == 0
    changed = json.loads((tmp_path / "changed" / "results.json").read_text())
    (warning,) = [w for w in changed["warnings"] if "propensity model" in w]
    assert "annual_pass.model.json" in warning and "refit" in warning
    assert "propensity model" in (tmp_path / "changed" / "report.md").read_text()


def test_report_refuses_tables_of_an_earlier_spec(demo_dir, tmp_path, capsys):
    """After the scheduler ran the files, the spec is edited (an outcome renamed): the aggregate
    tables are those of the old spec, so `report` refuses, naming the steps, instead of showing
    effects from them."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = tmp_path / "annual_pass.toml"
    shutil.copyfile(DEMO_SPEC, spec)
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql), "--for-scheduler"]) == 0
    _run_files(sql, tmp_path / "bikeshare.duckdb")
    assert main(["report", str(spec), "--out", str(tmp_path / "before")]) == 0  # same spec: accepted
    spec.write_text(spec.read_text().replace('name = "post_trips"', 'name = "trips_after"'))
    code = main(["report", str(spec), "--out", str(tmp_path / "after")])
    err = capsys.readouterr().err
    assert code == 2 and "outcome_strata" in err and "outcomes" in err and "compile the spec again" in err
    assert not (tmp_path / "after" / "results.json").exists()


def test_scheduled_greedy_rounds_repeat_as_the_manifest_says(demo_dir, tmp_path):
    """Nearest neighbours without replacement: the greedy round is one file the manifest marks to
    repeat until its check returns n_open = 0. A scheduler that runs it once leaves pairs undone and
    `report` warns, naming the step; one that repeats it as told gives the results of `run`."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    spec = tmp_path / "annual_pass.toml"
    spec.write_text(DEMO_SPEC.read_text().replace('method = "coarsened_exact"', 'method = "nearest_neighbour"\nreuse_controls = false'))
    assert main(["run", str(spec), "--out", str(tmp_path / "direct"), "--quiet"]) == 0
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql), "--for-scheduler"]) == 0
    manifest = json.loads((sql / "manifest.json").read_text())
    (repeated,) = [s for s in manifest["steps"] if "repeat" in s]
    assert repeated["name"] == "nearest_neighbour_rounds" and repeated["repeat"]["until"] == "n_open = 0"

    _run_files(sql, tmp_path / "bikeshare.duckdb")  # every file once
    assert main(["report", str(spec), "--out", str(tmp_path / "once")]) == 0
    once = json.loads((tmp_path / "once" / "results.json").read_text())
    (warning,) = [w for w in once["warnings"] if "greedy rounds" in w]
    assert "nearest_neighbour_rounds" in warning and "n_open = 0" in warning

    rounds = 0
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        for step in manifest["steps"]:
            while True:
                for statement in sqlglot.parse((sql / step["file"]).read_text(), read="duckdb"):
                    if statement is not None:
                        con.execute(statement.sql("duckdb"))
                if "repeat" not in step:
                    break
                rounds += 1
                n_open = con.execute(step["repeat"]["check"]).fetchone()[1]
                if n_open == 0 or rounds >= step["repeat"]["max"]:
                    break
    assert rounds > 1
    assert main(["report", str(spec), "--out", str(tmp_path / "repeated")]) == 0
    repeated_results = json.loads((tmp_path / "repeated" / "results.json").read_text())
    assert not any("greedy rounds" in w for w in repeated_results["warnings"])
    direct = json.loads((tmp_path / "direct" / "results.json").read_text())
    close(repeated_results["effects"], direct["effects"])
    close(repeated_results["matching"], direct["matching"])
