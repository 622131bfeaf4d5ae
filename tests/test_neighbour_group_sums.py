"""The population variance's steps of nearest neighbours with replacement never hold one row per
(treated unit, control unit) pair.

With the tie rule a match names a group of controls tied on the score; here the score is a model of
two categorical features, so thousands of riders share a score and expanding each match into its group's controls gives
far more rows than there are units. The steps `matching_variance` and `pair_sums` aggregate per
group first: here each of their queries runs under DuckDB's JSON profiler and no operator may emit
more rows than the units and match rows together. The check has teeth: the same demo run's
per-pair expansion (sum over the match rows of their group's size) is asserted to be larger."""

from __future__ import annotations

import json
import shutil

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.spec import parse_spec

from sqlmatch.plan import build_plan

from test_neighbours import STAND_IN_MODEL, demo_raw


def _max_rows(node) -> int:
    if isinstance(node, list):
        return max((_max_rows(n) for n in node), default=0)
    rows = int(node.get("operator_cardinality", node.get("intermediate_rows")) or 0)
    return max([rows] + [_max_rows(c) for c in node.get("children", [])])


@pytest.fixture(scope="module")
def nn_run(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("nn_group_sums")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    database = str(folder / "bikeshare.duckdb")
    raw = demo_raw(database, "nn_groups")
    # a score of one categorical feature takes a handful of values: thousands of controls tie
    raw["propensity"] = {"features": ["age_band", "home_district"], "terms": "linear"}
    spec = parse_spec(raw)
    api.run(spec)
    return spec, database, folder


def test_variance_steps_aggregate_per_group_not_per_pair(nn_run):
    spec, database, folder = nn_run
    # these two steps' SQL does not depend on the fitted score model (they read the stored tables)
    plan = build_plan(spec, "duckdb", model=STAND_IN_MODEL)
    steps = [s for s in plan.steps if s.name == "matching_variance" or s.name.startswith("pair_sums")]
    assert {s.name.split("__")[0] for s in steps} == {"matching_variance", "pair_sums"}
    with duckdb.connect(database) as con:
        units = con.execute(f"SELECT COUNT(*) FROM sqlmatch.{spec.name}_nearest_neighbour_units").fetchone()[0]
        match_rows, expanded = con.execute(f"SELECT COUNT(*), SUM(n_controls) FROM sqlmatch.{spec.name}_nearest_neighbour_matches").fetchone()
        # the ties make a per-pair expansion much larger than the bound below
        assert expanded > 2 * (units + match_rows), (expanded, units, match_rows)
        for step in steps:
            profile = folder / f"{step.name}.json"
            (query,) = [q for q in step.statements if q.lstrip().upper().startswith(("WITH", "SELECT", "/*"))]
            for statement in step.statements:
                if statement is not query:
                    con.execute(statement)
            con.execute("SET enable_profiling = 'json'")
            con.execute(f"SET profiling_output = '{profile}'")
            con.execute(query).fetchall()
            con.execute("PRAGMA disable_profiling")
            tree = json.loads(profile.read_text())
            biggest = _max_rows(tree.get("operator", tree.get("children", [])))
            assert biggest > 0, f"{step.name}: the profile recorded no operator rows"
            assert biggest <= units + match_rows, (step.name, biggest, units, match_rows, expanded)
