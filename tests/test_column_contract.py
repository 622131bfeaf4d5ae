"""The aggregate columns a template writes are the ones columns.py names and the Python reads:
the output names of the compiled SELECTs are parsed back with sqlglot and compared."""

from __future__ import annotations

import sqlglot

from sqlmatch import api, columns
from sqlmatch.plan import build_plan

from conftest import DEMO_SPEC


def output_names(sql: str) -> list[str]:
    tree = sqlglot.parse_one(sql, read="duckdb")
    return [e.alias_or_name for e in tree.expressions]


def steps():
    spec = api.load(DEMO_SPEC)
    return spec, {s.name: s for s in build_plan(spec, "duckdb").steps}


def test_balance_columns_are_the_contract():
    spec, by_name = steps()
    features = [f.name for f in spec.numeric_features]
    names = output_names(by_name["balance_numeric"].statements[-1])
    stats = ("n", "sum", "sumsq", "min", "max", "w", "w2", "wsum", "wsumsq")
    assert names == ["treated", "n_units", "n_matched"] + [columns.stat(f, s) for f in features for s in stats]


def test_regression_columns_are_the_contract():
    spec, by_name = steps()
    features = [f.name for f in spec.numeric_features]
    names = set(output_names(by_name["outcome_regression"].statements[-1]))
    design = columns.regression_design(features)
    assert [d.column for d in design] == [f"x{i}" for i in range(len(features) + 2)]
    for i, j in columns.upper_pairs(len(design)):
        assert columns.xtx(i, j) in names
    for o in spec.outcomes:
        for d in design:
            assert columns.xty(o.name, d.index) in names
        assert {columns.stat(o.name, "yty"), columns.stat(o.name, "tyy"), columns.stat(o.name, "centre")} <= names
    assert {columns.weight_total(w) for w in ("n_units", "sum_w2", "sum_w2_t")} <= names


def test_upper_pairs_cover_a_symmetric_matrix_once():
    pairs = columns.upper_pairs(4)
    assert len(pairs) == 4 * 5 // 2 and len(set(pairs)) == len(pairs) and all(i <= j for i, j in pairs)
