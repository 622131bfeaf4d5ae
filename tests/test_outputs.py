"""Output files: an --out that is a file is refused before any work, and a result set is
written whole or not at all (a failed rerun leaves the previous set intact)."""

from __future__ import annotations

import json
import shutil

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.cli import main

from conftest import DEMO_SPEC


@pytest.fixture
def study(demo_dir, tmp_path):
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    shutil.copyfile(DEMO_SPEC, tmp_path / "annual_pass.toml")
    return tmp_path / "annual_pass.toml"


def test_out_that_is_a_file_exits_2_before_any_work(study, capsys):
    target = study.parent / "results.txt"
    target.write_text("keep me")
    before = tables(study.parent / "bikeshare.duckdb")
    assert main(["run", str(study), "--out", str(target)]) == 2
    assert "--out" in capsys.readouterr().err
    assert target.read_text() == "keep me"
    assert tables(study.parent / "bikeshare.duckdb") == before  # nothing ran: no table written or dropped


def tables(database) -> list[tuple[str, str]]:
    with duckdb.connect(str(database), read_only=True) as con:
        return sorted(con.execute("SELECT table_schema, table_name FROM information_schema.tables").fetchall())


def test_a_failed_rewrite_leaves_the_previous_result_set_whole(study, tmp_path, monkeypatch):
    results = api.run(api.load(study))
    out = tmp_path / "out"
    api.write_results(results, out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}

    import sqlmatch.report.html as html

    results.cohort = "2026-04"  # a different run's results
    monkeypatch.setattr(html, "render_html", lambda r: (_ for _ in ()).throw(RuntimeError("rendering failed")))
    with pytest.raises(RuntimeError):
        api.write_results(results, out)
    after = {p.name: p.read_bytes() for p in out.iterdir()}
    assert after == before  # no partial files, results.json still the earlier run's
    assert json.loads(after["results.json"])["cohort"] == "2026-03"
