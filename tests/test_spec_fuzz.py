"""Fuzzing the spec loader (hypothesis): any mutation of a valid spec ends in a valid run or a
clear SqlmatchError naming what to fix, never another exception."""

from __future__ import annotations

import copy
import shutil
import tomllib

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sqlmatch import api
from sqlmatch.errors import SqlmatchError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

BASE = tomllib.loads(DEMO_SPEC.read_text())

values = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-5, max_value=100),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=12),
    st.sampled_from(["2026-03", "2026-13", "count", "sum", "ratio", "categorical", "score_bins", "month", "day", "quantiles", "fare", "minutes", "rider_id"]),
    st.lists(st.integers(min_value=0, max_value=30), max_size=4),
    st.lists(st.text(max_size=6), max_size=3),
    st.dictionaries(st.text(max_size=5), st.integers(), max_size=2),
)


def paths(node, prefix=()):
    """Every (path) to a value in the nested spec."""
    if isinstance(node, dict):
        for k, v in node.items():
            yield prefix + (k,)
            yield from paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield prefix + (i,)
            yield from paths(v, prefix + (i,))


ALL_PATHS = list(paths(BASE))


@st.composite
def mutated_specs(draw):
    raw = copy.deepcopy(BASE)
    for _ in range(draw(st.integers(min_value=1, max_value=3))):
        path = draw(st.sampled_from(ALL_PATHS))
        target = raw
        try:
            for p in path[:-1]:
                target = target[p]
            if draw(st.booleans()) and isinstance(target, dict):
                target.pop(path[-1], None)
            else:
                target[path[-1]] = draw(values)
        except (KeyError, IndexError, TypeError):
            continue
    return raw


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(raw=mutated_specs())
def test_any_spec_runs_or_fails_clearly(raw, demo_dir, tmp_path_factory):
    try:
        spec = parse_spec(raw)
        api.compile_plan(spec, "postgres")
    except SqlmatchError as err:
        assert str(err).strip(), "an error must say something"
        return
    folder = tmp_path_factory.mktemp("fuzz")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    try:
        results = api.run(spec, database=str(folder / "bikeshare.duckdb"), keep_tables=False)
    except SqlmatchError as err:
        assert str(err).strip()
        return
    assert results.effects
