"""The results history table: one row per run, cohort, method and outcome; re-running a cohort
replaces what the `_current` view shows and keeps the history."""

from __future__ import annotations

import shutil
import tomllib

import duckdb

from sqlmatch import api
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


def test_rerun_replaces_the_current_rows_and_keeps_history(demo_dir, tmp_path):
    db = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", db)
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"].update(database=str(db), results_table="pass_results")
    first = api.run(parse_spec(raw), keep_tables=False)
    second = api.run(parse_spec(raw), keep_tables=False)
    april = api.run(parse_spec(raw).with_overrides(cohort="2026-04"), keep_tables=False)
    n_outcomes = len(first.effects)
    with duckdb.connect(str(db), read_only=True) as con:
        history = con.execute("SELECT cohort, run_id FROM sqlmatch.pass_results").fetchall()
        current = con.execute("SELECT cohort, run_id, outcome, estimate FROM sqlmatch.pass_results_current ORDER BY cohort, outcome").fetchall()
    assert len(history) == 3 * n_outcomes
    assert len(current) == 2 * n_outcomes
    assert {r[1] for r in current if r[0] == "2026-03"} == {second.run_id}
    assert {r[1] for r in current if r[0] == "2026-04"} == {april.run_id}
    by_outcome = {r[2]: r[3] for r in current if r[0] == "2026-03"}
    assert by_outcome["post_trips"] == second.effect("post_trips").estimate
