"""Effects per subgroup on the demo: each level's estimate and SE recomputed with pandas from the
matched units' rows by the subclassification formula (Imbens & Rubin 2015, ch. 17), Cochran's Q
against statsmodels' meta-analysis (combine_effects), small levels withheld."""

from __future__ import annotations

import json
import math
import tomllib

import duckdb
import numpy as np
import pytest

from sqlmatch import api
from sqlmatch.errors import SpecError
from sqlmatch.report.markdown import render_markdown
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC


@pytest.fixture
def db(demo_db):
    return demo_db


def raw_spec(db, subgroups) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["subgroups"] = subgroups
    return raw


def reference(rows, outcome):
    """tau = sum_s w_s (ybar_1s - ybar_0s), V = sum_s w_s^2 (s2_1s/n_1s + s2_0s/n_0s) over strata with both groups."""
    every = rows.groupby(["match__stratum", "treated"])[outcome].agg(["count", "var"])
    both = rows.groupby("match__stratum").treated.nunique() == 2
    rows = rows[rows.match__stratum.isin(both[both].index)]
    g = rows.groupby(["match__stratum", "treated"])[outcome].agg(["count", "mean", "var"]).unstack("treated")
    w = g["count"][1] / g["count"][1].sum()
    tau = float((w * (g["mean"][1] - g["mean"][0])).sum())
    var = 0.0
    for t in (1, 0):
        n, v = g["count"][t], g["var"][t].copy()
        # a one-unit cell has no variance of its own: it takes the group's pooled within-cell
        # variance (the rule stated in sqlmatch/estimators/att.py)
        e = every.xs(t, level="treated")  # pooled over the group's cells of two or more, kept or not
        pooled = float(((e["count"] - 1) * e["var"])[e["count"] >= 2].sum() / (e["count"] - 1)[e["count"] >= 2].sum())
        v[n < 2] = pooled
        var += float((w**2 * v / n).sum())
    return tau, math.sqrt(var)


def test_levels_equal_pandas_and_q_equals_statsmodels(db):
    from statsmodels.stats.meta_analysis import combine_effects

    spec = parse_spec(raw_spec(db, [{"feature": "home_district"}, {"name": "frequent", "where": "pre_trips >= 10"}]))
    results = api.run(spec, keep_tables=True)
    with duckdb.connect(str(db), read_only=True) as con:
        rows = con.execute("SELECT * FROM sqlmatch.annual_pass_weighted_units WHERE match__weight IS NOT NULL").df()
    by = {(s.subgroup, s.outcome): s for s in results.subgroups}
    for (name, column) in (("home_district", "home_district"), ("frequent", None)):
        level_of = rows[column] if column else np.where(rows.pre_trips >= 10, "yes", "no")
        s = by[(name, "post_trips")]
        for x in s.levels:
            if x.withheld:
                continue
            part = rows[level_of == x.level]
            tau, se = reference(part, "post_trips")
            assert x.effect.estimate == pytest.approx(tau, rel=1e-9)
            assert x.effect.std_error == pytest.approx(se, rel=1e-6)
        shown = [x.effect for x in s.levels if not x.withheld]
        ref = combine_effects(np.array([e.estimate for e in shown]), np.array([e.std_error for e in shown]) ** 2)
        assert s.q == pytest.approx(ref.q, rel=1e-9) and s.df == len(shown) - 1
    text = render_markdown(results)
    assert "## Effects by subgroup" in text and "Cochran's Q" in text
    out = json.loads(results.to_json())["subgroups"]
    assert {o["subgroup"] for o in out} == {"home_district", "frequent"}


def test_a_small_level_and_one_more_are_withheld(db):
    # a district of 3 enrolled riders (and 300 others): its level is withheld, and so is one more (else it follows by subtraction)
    with duckdb.connect(str(db)) as con:
        cohort = "pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01'"
        ids = [r for (r,) in con.execute(f"SELECT rider_id FROM riders WHERE {cohort} ORDER BY rider_id LIMIT 3").fetchall()]
        ids += [r for (r,) in con.execute("SELECT rider_id FROM riders WHERE pass_bought_on IS NULL ORDER BY rider_id LIMIT 300").fetchall()]
        con.execute(f"UPDATE riders SET home_district = 'Tiny Quay' WHERE rider_id IN ({', '.join(map(str, ids))})")
    raw = raw_spec(db, [{"feature": "home_district"}])
    raw["report"] = {"min_cell_size": 5}
    results = api.run(parse_spec(raw))
    shown = results.subgroups[0].shown(5)
    withheld = [x for x in shown if x["withheld"]]
    assert len(withheld) >= 2 and all(x["estimate"] is None and x["n_treated"] is None for x in withheld)
    text = json.dumps(json.loads(results.to_json())["subgroups"])
    tiny = [x for x in shown if x["level"] == "Tiny Quay" or x["level"] == "(other)"]
    assert all(x["withheld"] for x in tiny)
    assert '"n_treated": 3' not in text


@pytest.mark.parametrize(
    "subgroup, key",
    [
        ({"feature": "pre_trips"}, "subgroups[0].feature"),
        ({"name": "x", "where": "nosuch > 1"}, "subgroups[0].where"),
        ({"where": "pre_trips > 1"}, "subgroups[0].name"),
        ({"feature": "age_band", "where": "pre_trips > 1"}, "subgroups[0]"),
    ],
)
def test_bad_subgroups_name_the_key(db, subgroup, key):
    with pytest.raises(SpecError) as err:
        parse_spec(raw_spec(db, [subgroup]))
    assert err.value.key == key
