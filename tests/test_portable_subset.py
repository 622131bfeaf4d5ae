"""The templates stay inside the SQL subset that means the same on DuckDB, PostgreSQL and Spark
(see DEVELOPERS.md). sqlglot raises nothing when it changes a construct's meaning, so this test
walks every compiled statement of every method and fails on constructs known to drift."""

from __future__ import annotations

import tomllib
from collections import Counter

import pytest
import sqlglot
from sqlglot import exp

from sqlmatch import api
from sqlmatch.dialects import DIALECTS
from sqlmatch import render
from sqlmatch.plan import build_plan
from sqlmatch.propensity import DesignColumn, FittedModel
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


def demo_plans():
    """The demo study under every stratum method, with a stand-in fitted model so the plan is complete."""
    raw = tomllib.loads(DEMO_SPEC.read_text())
    plans = {"coarsened_exact": build_plan(parse_spec(raw), "duckdb")}
    auto = dict(raw, matching={"method": "coarsened_exact", "on": ["pre_trips", "pre_minutes", "age_band"], "coarsen": "quantiles"})
    plans["coarsened_auto"] = build_plan(parse_spec(auto), "duckdb")
    sturges = dict(raw, matching={"method": "coarsened_exact", "on": ["pre_minutes"], "coarsen": "sturges"})
    plans["coarsened_sturges"] = build_plan(parse_spec(sturges), "duckdb")
    scored = dict(raw, matching={"method": "score_bins", "bins": 5, "block_on": ["age_band"]})
    model = FittedModel(
        columns=[DesignColumn("intercept", "intercept"), DesignColumn("pre_trips", "numeric", "pre_trips")],
        coefficients=[-2.0, 0.1],
        iterations=6,
        log_likelihood=-1.0,
        n_units=1,
        fingerprint="0",
        levels={},
    )
    plans["score_bins"] = build_plan(parse_spec(scored), "duckdb", model=model)
    blocks = dict(raw, matching={"method": "score_bins", "block_on": ["age_band"]})  # subclasses chosen from the data
    plans["score_bins_auto"] = build_plan(parse_spec(blocks), "duckdb", model=model)
    for distance in ("score", "mahalanobis", "rank_mahalanobis"):
        nearest = dict(raw, matching={"method": "nearest_neighbour", "distance": distance, "block_on": ["age_band"]})
        plans[f"nearest_{distance}"] = build_plan(parse_spec(nearest), "duckdb", model=model)
    pairs = dict(raw, matching={"method": "nearest_neighbour", "reuse_controls": False})
    plans["nearest_pairs"] = build_plan(parse_spec(pairs), "duckdb", model=model)
    weighting = dict(raw, matching={"method": "score_weighting", "score_margin": 0.01, "weight_cap_quantile": 0.99})
    plans["score_weighting"] = build_plan(parse_spec(weighting), "duckdb", model=model)
    # stabilised weights, the doubly robust sums and a weighted subgroup
    options = dict(
        raw,
        matching={"method": "score_weighting", "weight_cap_quantile": 0.99, "stabilised_weights": True, "estimand": "ate"},
        effect={"regression_adjustment": True},
        subgroups=[{"feature": "age_band"}],
    )
    plans["score_weighting_options"] = build_plan(parse_spec(options), "duckdb", model=model)
    return plans


PLANS = demo_plans()

FORBIDDEN = {
    exp.Qualify: "QUALIFY (sqlglot's rewrite adds a column to SELECT *)",
    exp.IntDiv: "// (divides on DuckDB doubles, truncates or fails elsewhere)",
    exp.PercentileCont: "percentile_cont (approximate on Spark and Trino after sqlglot)",
    exp.PercentileDisc: "percentile_disc",
    exp.Quantile: "quantile (fails on Spark)",
    exp.ApproxQuantile: "approximate quantiles",
}


def statements(plan):
    for step in plan.steps:
        for sql in step.statements:
            yield step.name, sqlglot.parse_one(sql, read="duckdb")


@pytest.mark.parametrize("method", sorted(PLANS))
def test_no_construct_outside_the_portable_subset(method):
    for step, tree in statements(PLANS[method]):
        for node in tree.walk():
            for kind, why in FORBIDDEN.items():
                assert not isinstance(node, kind), f"{method}/{step}: {why}"
            if isinstance(node, exp.Create):
                assert not node.args.get("replace"), f"{method}/{step}: CREATE OR REPLACE fails on PostgreSQL and Spark"
            if isinstance(node, exp.Group):
                assert not node.args.get("all"), f"{method}/{step}: GROUP BY ALL fails on PostgreSQL 15"
            if isinstance(node, exp.Anonymous):
                assert node.name.lower() not in {"hash", "random", "qualify"}, f"{method}/{step}: {node.name}() differs per engine"
            if isinstance(node, exp.Window) and isinstance(node.this, (exp.RowNumber, exp.Anonymous)):
                order = node.args.get("order")
                keys = [o.this.name for o in order.expressions] if order else []
                assert {"unit_key", "treated_key", "control_key"} & set(keys), f"{method}/{step}: ROW_NUMBER needs a unit key as tiebreak, got {keys}"
            if isinstance(node, exp.Div):
                # every division is either by a literal, by NULLIF(...) or by a value proven non-zero in a CASE
                right = node.expression
                ok = isinstance(right, (exp.Literal, exp.Nullif)) or (isinstance(right, exp.Paren) and isinstance(right.this, exp.Literal))
                ok = ok or _guarded(node)
                assert ok, f"{method}/{step}: division by {right.sql()} without NULLIF (Spark's ANSI mode raises on zero)"


def _guarded(div: exp.Div) -> bool:
    """Divisions by counts of a group that is non-empty by construction (documented at the call)."""
    text = div.expression.sql()
    # LN(2), 1 + EXP(..) >= 1, and the Sturges bin count CEIL(log2 n + 1) >= 1 are never zero
    return text == "LN(2.0)" or text.startswith(("CEIL(", "(1.0 + EXP("))


def function_names(tree) -> Counter:
    return Counter(type(n).__name__ for n in tree.walk() if isinstance(n, exp.Func))


# What sqlglot rewrites when printing the demo plan for each dialect: functions that exist in the
# DuckDB source but not after a round trip through the target dialect. Reviewed by hand; a change
# here means a template or sqlglot changed, and the new rewrite must be checked for meaning.
EXPECTED_REWRITES = {
    "duckdb": set(),
    # DATE_DIFF('day', a, b) on DATEs becomes b - a: the same whole number of days
    "postgres": {"DateDiff"},
    # printed as DATEDIFF(DAY, a, b), read back as another node; counts day boundaries on DATEs, as DuckDB does
    "redshift": {"DateDiff"},
    # the text is CAST(...) unchanged; sqlglot reads Spark's CAST back as TRY_CAST (NULL on failure
    # without ANSI mode); our casts are of numbers and dates that always convert
    "spark": {"Cast"},
    "databricks": set(),
    "snowflake": set(),
    "bigquery": set(),
    "trino": set(),
}


@pytest.mark.parametrize("dialect", DIALECTS)
def test_rewrites_per_dialect_are_the_reviewed_ones(dialect, monkeypatch):
    spec = api.load(DEMO_SPEC)
    target = build_plan(spec, dialect)
    # The source is the portable template text every dialect is transpiled from, so DuckDB's own
    # fast path (sql_templates/duckdb/, active days by bitmask) is not used for it.
    real_template_for = render.template_for
    monkeypatch.setattr(render, "template_for", lambda step, d: real_template_for(step, "portable"))
    source = build_plan(spec, "duckdb")
    lost = set()
    for s_step, t_step in zip(source.steps, target.steps):
        for s_sql, t_sql in zip(s_step.statements, t_step.statements):
            before = function_names(sqlglot.parse_one(s_sql, read="duckdb"))
            after = function_names(sqlglot.parse_one(t_sql, read=dialect))
            lost |= {name for name in before if name not in after}
    assert lost == EXPECTED_REWRITES[dialect], f"{dialect}: functions rewritten by sqlglot: {sorted(lost)}"
