"""Nearest neighbours within blocks (sqlmatch/matching/neighbours.py): the matches SQL finds are
checked against brute-force numpy, the Mahalanobis distances against scipy, the ranks against
scipy.stats.rankdata, and the effect against the NSW job-training data (Dehejia & Wahba 1999).

Row-level reads of the work tables happen here, in the tests, only to check the SQL; sqlmatch
itself fetches aggregates only."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy.spatial.distance import cdist, mahalanobis
from scipy.stats import rankdata

from sqlmatch import aggregates, api
from sqlmatch.demo_run import build_demo
from sqlmatch.dialects import DIALECTS
from sqlmatch.engines.base import QueryResult
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import DataError, SpecError
from sqlmatch.matching import nearest_neighbour as neighbours
from sqlmatch.plan import build_plan
from sqlmatch.propensity import DesignColumn, FittedModel
from sqlmatch.runner import run_plan
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from nsw import DW_MATCHING, EXPERIMENTAL_INTERVAL, load_nsw, nsw_spec

MODEL_FEATURES = ["pre_trips", "pre_minutes", "pre_active_days"]  # numeric features of the demo's propensity model


def demo_raw(database: str, study: str, **matching) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = database
    raw["study"]["name"] = study
    raw["matching"] = {"method": "nearest_neighbour", **matching}
    # a model shaped by hand (log1p chosen), fitted as written
    raw["propensity"] = {"features": [*MODEL_FEATURES, "age_band", "home_district"], "log1p": ["pre_trips", "pre_minutes"], "terms": "linear"}
    return raw


def run(raw: dict, tables: tuple[str, ...] = ()):
    """Run the study with the runner (no estimation) and read the named work tables back."""
    spec = parse_spec(raw)
    database = raw["study"]["database"]
    with DuckDBEngine(database) as engine:
        out = run_plan(build_plan(spec, "duckdb"), spec, engine)
    read = {}
    with duckdb.connect(database, read_only=True) as con:
        for t in tables:
            read[t] = con.execute(f"SELECT * FROM sqlmatch.{spec.name}_{t}").df()
    return spec, out, read


def study_tables(database: str, study: str) -> list[str]:
    with duckdb.connect(database, read_only=True) as con:
        rows = con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()
    return [r[0] for r in rows if r[0].startswith(study + "_")]


@pytest.fixture(scope="module")
def demo_db(demo_dir, tmp_path_factory) -> str:
    folder = tmp_path_factory.mktemp("neighbours")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    return str(folder / "bikeshare.duckdb")


CONFIGS = {
    "logit": {},
    "logit_blocks_k3": {"block_on": ["age_band"], "controls_per_treated": 3},
    "mahalanobis": {"distance": "mahalanobis"},
    "robust": {"distance": "rank_mahalanobis", "block_on": ["home_district"]},
    "greedy": {"reuse_controls": False},
}
TABLES = ("scores", "nearest_neighbour_caliper", "nearest_neighbour_units", "measures", "match_weights", "weighted_units")


@pytest.fixture(scope="module")
def runs(demo_db):
    """Each configuration once, on the small demo (6,000 riders), under its own study name."""
    out = {}
    for name, matching in CONFIGS.items():
        extra = ("nearest_neighbour_features", "nearest_neighbour_whitening") if "distance" in matching else ()
        matches = "pairs" if matching.get("reuse_controls") is False else "nearest_neighbour_matches"
        out[name] = run(demo_raw(demo_db, f"nearest_neighbour_{name}", **matching), TABLES + extra + (matches,))
        out[name][2]["found_matches"] = out[name][2][matches]
    return out


def brute_force_candidates(tables: dict, spec) -> tuple[pd.DataFrame, pd.DataFrame, float]:
    """Treated and control units with a score, and the caliper width computed in numpy: 0.2 pooled SDs
    of the logit score, sqrt((s2_T + s2_C) / 2) (Austin 2011, Pharm Stat 10:150, recalled)."""
    s = tables["scores"].dropna(subset=["score"])
    t, c = s[s.treated == 1].reset_index(drop=True), s[s.treated == 0].reset_index(drop=True)
    sd = np.sqrt((np.var(t.score, ddof=1) + np.var(c.score, ddof=1)) / 2)
    return t, c, spec.matching.caliper * sd


def hash_tiebreak(t: pd.DataFrame, c: pd.DataFrame) -> np.ndarray:
    """The SQL's tiebreak among equal distances: a multiplicative hash of the two units' numbers
    (their 1-based position in unit-key order among all scored units), computed here in numpy."""
    s = pd.concat([t, c]).sort_values("unit_key")
    seq = pd.Series(np.arange(1, len(s) + 1, dtype=np.int64), index=s.unit_key.to_numpy())
    ts, cs = seq.loc[t.unit_key].to_numpy(), seq.loc[c.unit_key].to_numpy()
    return (ts[:, None] * 2654435761 + cs[None, :] * 40503) % 4294967296


def position_tiebreak(t: pd.DataFrame, c: pd.DataFrame, exact: list[str]) -> np.ndarray:
    """The SQL's tiebreak among equal score distances: the gap between the two units' places in
    their exact block's score order (ties in score: unit key), computed here in pandas."""
    both = pd.concat([t.assign(_side="t", _i=np.arange(len(t))), c.assign(_side="c", _i=np.arange(len(c)))], ignore_index=True)
    blocks = [both[f].fillna("(missing)").astype(str) for f in exact]
    both["_block"] = pd.Series(list(zip(*blocks)), index=both.index) if exact else 0
    both = both.sort_values(["score", "unit_key"])
    both["_pos"] = both.groupby("_block").cumcount() + 1
    tp = both[both._side == "t"].sort_values("_i")._pos.to_numpy()
    cp = both[both._side == "c"].sort_values("_i")._pos.to_numpy()
    return np.abs(tp[:, None] - cp[None, :])


def match_shares(matches: pd.DataFrame, units: pd.DataFrame | None = None) -> dict[tuple[int, int], float]:
    """{(treated key, control key): the control's share of the treated unit's match} from the matches
    table: one row per control (share), or one row per group of controls tied in score
    (control_group, expanded here with the units table's controls)."""
    if "control_group" in matches.columns:
        blocks = [c for c in matches.columns if c not in ("treated_key", "control_group", "n_controls", "distance", "slots", "share")]
        controls = units[units.treated == 0][["unit_key", "control_group", *blocks]]
        rows = matches.merge(controls, on=["control_group", *blocks])
        assert len(rows) == matches.n_controls.sum()  # every group holds the controls it counts
        return {(int(a), int(b)): float(w) for a, b, w in zip(rows.treated_key, rows.unit_key, rows.share)}
    return {(int(a), int(b)): float(w) for a, b, w in zip(matches.treated_key, matches.control_key, matches.share)}


def reference_shares(t: pd.DataFrame, c: pd.DataFrame, width: float, exact: list[str], k: int) -> tuple[dict[tuple[int, int], float], int]:
    """Brute force over every pair in numpy: each treated unit's match set J(i) is every control of its
    exact block within the caliper at most as far (score gap at 10 decimal places) as its k-th
    nearest, all ties included (Abadie & Imbens 2006, Econometrica 74(1):235, the definition of
    J_M(i), recalled); with slots = min(k, controls within the caliper), a control strictly nearer
    than the last distance taken weighs 1 / slots and the controls at that distance share the
    slots left over equally. Returns the shares and the number of treated units with a tie at the
    last distance taken that crosses the slots (where a tiebreak would have decided)."""
    tq = np.rint(t.score.to_numpy(float) * 1e10).astype(np.int64)
    cq = np.rint(c.score.to_numpy(float) * 1e10).astype(np.int64)
    gap = np.abs(tq[:, None] - cq[None, :])
    ok = in_block(t, c, exact) & (gap <= width * 1e10)
    shares: dict[tuple[int, int], float] = {}
    n_split = 0
    for i in range(len(t)):
        idx = np.flatnonzero(ok[i])
        if not len(idx):
            continue
        g = gap[i, idx]
        slots = min(k, len(idx))
        last = np.sort(g)[slots - 1]
        nearer, tied = g < last, g == last
        n_split += int(tied.sum() > slots - nearer.sum())
        for j, near, tie in zip(idx, nearer, tied):
            if near:
                shares[int(t.unit_key[i]), int(c.unit_key[j])] = 1.0 / slots
            elif tie:
                shares[int(t.unit_key[i]), int(c.unit_key[j])] = (slots - nearer.sum()) / (slots * tied.sum())
    return shares, n_split


def in_block(t: pd.DataFrame, c: pd.DataFrame, exact: list[str]) -> np.ndarray:
    ok = np.ones((len(t), len(c)), dtype=bool)
    for f in exact:
        ok &= t[f].to_numpy()[:, None] == c[f].to_numpy()[None, :]
    return ok


# ---------------------------------------------------------------------------------------------
# matches against brute force


@pytest.mark.parametrize("name", ["logit", "logit_blocks_k3"])
def test_logit_matches_equal_brute_force_nearest_neighbours(runs, name):
    """Each treated unit's match set is its k nearest controls on the logit score among controls of
    its exact block within the caliper, with every control tied with the k-th (gaps compared at 10
    decimal places) sharing the slots left over, found by brute force in numpy over every pair
    (reference_shares): the sorted search (k groups of tied controls each side in score order) never
    misses one. The demo's scores have ties (riders with the same counts). Weights: treated 1, a
    control the sum of its shares over the treated units it serves (1/k_i without ties: the usual
    weights of k:1 matching with replacement for the effect on the treated, e.g. Stuart 2010,
    Statistical Science 25:1, recalled; with ties the K_M(i) / M of Abadie & Imbens 2006)."""
    spec, out, tables = runs[name]
    t, c, width = brute_force_candidates(tables, spec)
    assert tables["nearest_neighbour_caliper"].width[0] == pytest.approx(width, rel=1e-12)
    k = spec.matching.controls_per_treated
    expected, n_split = reference_shares(t, c, width, list(spec.matching.block_on), k)
    assert n_split > 0  # ties across the last slot exist, so the tie rule is exercised
    got = match_shares(tables["found_matches"], tables["nearest_neighbour_units"])
    assert set(got) == set(expected)
    np.testing.assert_allclose([got[p] for p in expected], list(expected.values()), rtol=1e-12)
    treated = {a for a, _ in expected}
    assert len(treated) > 300  # a real matching, not an empty one
    # the guard's count of candidate pairs: same block and score bins at most one apart (numpy)
    bins = np.floor((np.r_[t.score, c.score] - tables["nearest_neighbour_caliper"].score_min[0]) / tables["nearest_neighbour_caliper"].width[0])
    tb, cb = bins[: len(t)], bins[len(t) :]
    pairs = (in_block(t, c, list(spec.matching.block_on)) & (np.abs(tb[:, None] - cb[None, :]) <= 1)).sum()
    assert out.results["candidate_pairs"].one()["n_candidate_pairs"] == pairs
    # weights: a unit's weight is the sum of its rows (one per stratum)
    w = tables["match_weights"].groupby(["unit_key", "treated"], as_index=False).weight.sum().set_index("unit_key")
    assert (w[w.treated == 1].weight == 1.0).all() and set(w[w.treated == 1].index) == treated
    control_w: dict[int, float] = {}
    for (_, key), share in expected.items():
        control_w[key] = control_w.get(key, 0.0) + share
    got_w = w[w.treated == 0].weight
    assert set(got_w.index) == set(control_w)
    np.testing.assert_allclose([got_w[key] for key in control_w], list(control_w.values()), rtol=1e-12)
    summary = out.results["matching_summary"].one()
    assert summary["n_treated_matched"] == len(treated)
    assert summary["n_matches"] == len(expected)
    assert summary["n_control_matched"] == len(control_w)
    # strata: treated units grouped by their number of slots, min(k, controls within the caliper)
    slots = {}
    for a, _ in expected:
        slots[a] = slots.get(a, 0) + 1
    t_ok = in_block(t, c, list(spec.matching.block_on)) & (np.abs(np.rint(t.score.to_numpy()[:, None] * 1e10) - np.rint(c.score.to_numpy()[None, :] * 1e10)) <= width * 1e10)
    n_slots = {int(t.unit_key[i]): min(k, int(t_ok[i].sum())) for i in range(len(t)) if t_ok[i].any()}
    assert summary["n_strata"] == len(set(n_slots.values()))
    assert summary["n_cells_dropped"] == summary["n_treated"] - len(treated)


@pytest.mark.parametrize("name", ["logit", "logit_blocks_k3"])
def test_control_group_counts_distinct_control_scores(runs, name):
    """The units table's control_group, recomputed in pandas from the scores at 10 decimal places: for a
    control, the index of its score among the distinct control scores of its block (1-based); for a
    treated unit, how many distinct control scores of its block are at or below its own."""
    spec, _, tables = runs[name]
    units = tables["nearest_neighbour_units"]
    exact = list(spec.matching.block_on)
    scores = tables["scores"].dropna(subset=["score"]).copy()
    scores["compared"] = np.rint(scores.score.to_numpy() * 1e10).astype(np.int64)  # 10 decimal places, as integers
    for f in exact:
        scores[f] = tables["measures"].set_index("unit_key").loc[scores.unit_key, f].fillna("(missing)").to_numpy()
    blocks = scores.groupby(exact) if exact else [((), scores)]
    expected = {}
    for _, b in blocks:
        distinct = np.unique(b[b.treated == 0].compared.to_numpy())
        side = np.where(b.treated.to_numpy() == 0, "left", "right")
        for key, value, how in zip(b.unit_key, b.compared, side):
            expected[int(key)] = int(np.searchsorted(distinct, value, side=how)) + (1 if how == "left" else 0)
    got = dict(zip(units.unit_key.astype(int), units.control_group.astype(int)))
    assert len(got) == len(expected) > 1000
    assert got == expected
    assert units[units.treated == 0].control_group.min() == 1


def test_grouped_units_step_has_one_window():
    """With controls reused on the score, the units step sorts once: one window function, the running
    count over the treated units and the distinct control scores (it had three orders: a ROW_NUMBER per
    score, the score order of every unit, the running count; then a second function over the same order,
    the place in it, which the variance step read until it sorted tie sets instead)."""
    import sqlglot
    from sqlglot import exp

    spec = parse_spec(demo_raw("unused.duckdb", "nearest_neighbour_compile", distance="score", block_on=["home_district"], reuse_controls=True))
    plan = build_plan(spec, "duckdb", model=STAND_IN_MODEL)
    (create,) = [sql for sql in plan.step("nearest_neighbour_units").statements if sql.lstrip().upper().startswith("CREATE")]
    windows = list(sqlglot.parse_one(create, read="duckdb").find_all(exp.Window))
    orders = {(w.args["partition_by"] and tuple(p.sql() for p in w.args["partition_by"]), w.args["order"].sql()) for w in windows}
    assert len(windows) == 1 and len(orders) == 1


@pytest.mark.parametrize("name", list(CONFIGS))
def test_weighted_units_weight_is_the_sum_of_match_weights(runs, name):
    """Each unit's match__weight in weighted_units is the sum of its match_weights rows (pandas), NULL when it
    has none; with one control slot the matching writes at most one row per unit, so the step joins the rows
    as they are (no GROUP BY), and with k = 3 it sums them."""
    spec, _, tables = runs[name]
    mw, wu = tables["match_weights"], tables["weighted_units"]
    k = spec.matching.controls_per_treated
    if k == 1:
        assert mw.unit_key.is_unique
    summed = mw.groupby("unit_key").weight.sum()
    got = wu.set_index("unit_key").match__weight
    assert len(got) == len(tables["measures"]) and got.index.is_unique
    assert got.isna().sum() == len(got) - len(summed)
    np.testing.assert_allclose(got.loc[summed.index].to_numpy(), summed.to_numpy(), rtol=1e-12)
    plan = build_plan(spec, "duckdb", model=STAND_IN_MODEL)
    (create,) = [sql for sql in plan.step("weighted_units").statements if sql.lstrip().upper().startswith("CREATE")]
    assert ("GROUP BY" in create.upper()) == (k > 1)


def test_greedy_without_replacement_equals_greedy_by_distance(runs):
    """Without replacement: the SQL rounds of mutually nearest pairs over the sorted candidates
    (8 controls each side in score order) give the greedy matching that takes pairs in increasing
    order of (distance at 10 decimal places, the score-order tiebreak, treated key, control key)
    while both units are free, computed here by brute force over every candidate pair in numpy."""
    spec, out, tables = runs["greedy"]
    t, c, width = brute_force_candidates(tables, spec)
    gap = np.abs(t.score.to_numpy()[:, None] - c.score.to_numpy()[None, :])
    ii, jj = np.nonzero(gap <= width)
    tk, ck = t.unit_key.to_numpy()[ii], c.unit_key.to_numpy()[jj]
    tie = position_tiebreak(t, c, [])[ii, jj]
    order = np.lexsort((ck, tk, tie, np.round(gap[ii, jj], 10)))
    used_t, used_c, expected = set(), set(), set()
    for o in order:
        if tk[o] not in used_t and ck[o] not in used_c:
            used_t.add(tk[o])
            used_c.add(ck[o])
            expected.add((int(tk[o]), int(ck[o])))
    pairs = tables["found_matches"]
    assert set(zip(pairs.treated_key.astype(int), pairs.control_key.astype(int))) == expected
    assert pairs.treated_key.is_unique and pairs.control_key.is_unique
    assert sorted(pairs.pair_id) == list(range(1, len(pairs) + 1))
    assert list(pairs.sort_values("pair_id").treated_key) == sorted(pairs.treated_key)
    assert len(expected) > 300
    summary = out.results["matching_summary"].one()
    assert summary["n_treated_matched"] == summary["n_control_matched"] == len(expected)
    assert summary["n_treated_still_open"] == 0  # the rounds ran to the end
    assert summary["n_treated_cut_short"] == 0
    assert 1 < out.repeats["nearest_neighbour_rounds"] < neighbours.MAX_ROUNDS


# ---------------------------------------------------------------------------------------------
# Mahalanobis distances


def scored_features(tables: dict) -> pd.DataFrame:
    units = tables["nearest_neighbour_units"][["unit_key", "treated"]]
    return units.merge(tables["measures"][["unit_key", *MODEL_FEATURES]], on="unit_key").set_index("unit_key")


def test_mahalanobis_distances_equal_scipy(runs):
    """The distance of every match equals scipy.spatial.distance.mahalanobis with the covariance of
    the features over the same units (numpy.cov), to 1e-9; the SQL whitening matrix equals the
    inverse of numpy's Cholesky factor of their correlation; and every match is a nearest candidate."""
    spec, _, tables = runs["mahalanobis"]
    x = scored_features(tables)
    X = x[MODEL_FEATURES].to_numpy(float)
    cov = np.cov(X, rowvar=False)
    vi = np.linalg.inv(cov)
    m = tables["found_matches"]
    xs = x[MODEL_FEATURES]
    expected = [mahalanobis(xs.loc[a].to_numpy(float), xs.loc[b].to_numpy(float), vi) for a, b in zip(m.treated_key, m.control_key)]
    # stored at 10 decimal places, the precision ties are compared at
    np.testing.assert_allclose(m.distance.astype(float), expected, rtol=1e-9, atol=1e-10)
    sd = np.sqrt(np.diag(cov))
    w_numpy = np.linalg.inv(np.linalg.cholesky(cov / np.outer(sd, sd)))
    w_row = tables["nearest_neighbour_whitening"].iloc[0]
    p = len(MODEL_FEATURES)
    w_sql = np.array([[w_row[f"w_{i}_{j}"] if j <= i else 0.0 for j in range(1, p + 1)] for i in range(1, p + 1)])
    np.testing.assert_allclose(w_sql, w_numpy, rtol=1e-9, atol=1e-12)
    # nearest among the candidates (caliper on the logit score), up to rounding in the last digits
    t, c, width = brute_force_candidates(tables, spec)
    gap = np.abs(t.score.to_numpy()[:, None] - c.score.to_numpy()[None, :])
    d = cdist(xs.loc[t.unit_key].to_numpy(float), xs.loc[c.unit_key].to_numpy(float), "mahalanobis", VI=vi)
    best = np.where(gap <= width, d, np.inf).min(axis=1)
    got = m.astype({"distance": float}).groupby("treated_key").distance.max()  # several rows: controls tied at one distance
    for i, key in enumerate(t.unit_key):
        if np.isfinite(best[i]):
            assert got[key] <= best[i] * (1 + 1e-9) + 1e-10
        else:
            assert key not in got.index


def test_robust_ranks_equal_scipy_rankdata(runs):
    """Ranks among all units with a score, ties sharing their average rank: scipy.stats.rankdata
    (method="average") on the same values, exactly (the demo's counts have many ties). Values are
    compared at 10 decimal places, as in the SQL: sums of minutes that are equal in exact arithmetic
    differ in their last bits depending on the order they were added in."""
    _, _, tables = runs["robust"]
    x = scored_features(tables)
    ranks = tables["nearest_neighbour_features"].set_index("unit_key").loc[x.index]
    for f in MODEL_FEATURES:
        np.testing.assert_array_equal(ranks[f].to_numpy(), rankdata(np.round(x[f].to_numpy(), 10), method="average"))
        assert ranks[f].nunique() < len(ranks)  # ties are exercised


def test_rank_mahalanobis_distance_follows_rosenbaum(runs):
    """Robust Mahalanobis distance (Rosenbaum 2010, Design of Observational Studies, section 8.3,
    recalled): Mahalanobis distance between rank vectors, with the covariance of the ranks rescaled
    so that every variance equals that of untied ranks 1..n; computed in numpy/scipy, to 1e-9."""
    _, _, tables = runs["robust"]
    x = scored_features(tables)
    r = np.column_stack([rankdata(np.round(x[f].to_numpy(), 10), method="average") for f in MODEL_FEATURES])
    cv = np.cov(r, rowvar=False)
    untied = np.var(np.arange(1, len(r) + 1), ddof=1)
    rat = np.sqrt(untied / np.diag(cv))
    vi = np.linalg.inv(np.diag(rat) @ cv @ np.diag(rat))
    ranks = pd.DataFrame(r, index=x.index)
    m = tables["found_matches"]
    expected = [mahalanobis(ranks.loc[a].to_numpy(), ranks.loc[b].to_numpy(), vi) for a, b in zip(m.treated_key, m.control_key)]
    np.testing.assert_allclose(m.distance.astype(float), expected, rtol=1e-9, atol=1e-10)
    # exact blocks hold: every match is within one home district
    measures = tables["measures"].set_index("unit_key")
    assert (measures.loc[m.treated_key, "home_district"].to_numpy() == measures.loc[m.control_key, "home_district"].to_numpy()).all()


# ---------------------------------------------------------------------------------------------
# balance, errors, guards


def test_demo_balance_after_matching_on_the_logit_score(runs):
    """|SMD| < 0.1 after 1:1 matching with replacement on the logit score, for every feature of the
    propensity model (0.1: common practice, Austin 2009, Stat Med 28:3083)."""
    spec, out, _ = runs["logit"]
    balance = aggregates.numeric_balance(out.results["balance_numeric"], [f.name for f in spec.numeric_features])
    balance += aggregates.level_balance(out.results["balance_levels"])
    after = {b.covariate: b.smd_after for b in balance}
    before = {b.covariate: b.smd_before for b in balance}
    for name in MODEL_FEATURES:
        assert abs(after[name]) < 0.1, (name, after[name])
        assert abs(before[name]) > 0.3  # matching had something to remove
    levels = {k: v for k, v in after.items() if k.startswith(("age_band=", "home_district="))}
    assert len(levels) == 10 and all(abs(v) < 0.1 for v in levels.values()), levels


def test_candidate_guard_refuses_a_large_join(demo_db):
    """The Mahalanobis distances compare every pair of a block in adjacent score bins: guarded."""
    raw = demo_raw(demo_db, "nearest_neighbour_guard", distance="mahalanobis", max_candidate_pairs=1000)
    with pytest.raises(DataError) as info:
        run(raw)
    assert info.value.key == "matching.max_candidate_pairs"
    assert "more than the limit of 1,000" in str(info.value) and "matching.block_on" in str(info.value)
    assert study_tables(demo_db, "nearest_neighbour_guard") == []


def test_score_distance_needs_no_candidate_join(demo_db):
    """The score distance looks at k controls each side of a treated unit in score order, so a study
    whose candidate join the guard would refuse (more than 1,000 pairs) runs, and never writes more
    than 2k candidate rows per treated unit."""
    raw = demo_raw(demo_db, "nearest_neighbour_noguard", max_candidate_pairs=1000)
    _, out, tables = run(raw, ("nearest_neighbour_matches", "nearest_neighbour_units"))
    assert out.results["candidate_pairs"].one()["n_candidate_pairs"] > 1000
    summary = out.results["matching_summary"].one()
    m = tables["nearest_neighbour_matches"]
    assert summary["n_treated_matched"] == m.treated_key.nunique() > 300
    assert summary["n_matches"] == len(match_shares(m, tables["nearest_neighbour_units"]))


@pytest.fixture(scope="module")
def nsw_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw_nearest") / "nsw.duckdb"
    load_nsw(str(db))
    return str(db)


def test_a_caliper_that_drops_every_unit_is_refused(nsw_db):
    """NSW men with earnings in both years and a 1-in-50 sample of the comparison men, a model on
    age, education and earnings, and a caliper of 0.0001 SD: no treated man has a comparison man that
    close (checked independently with statsmodels' Logit on the same rows), so sqlmatch refuses,
    names matching.caliper, and leaves no table behind."""
    raw = nsw_spec(nsw_db, "nearest_neighbour", caliper=0.0001)
    filters = ["re74 > 0 AND re75 > 0", "(enrolled_on IS NOT NULL OR person_id % 50 = 0)"]
    raw["eligibility"] = {"filters": filters}
    raw["propensity"] = {"features": ["age", "educ", "re74", "re75"]}
    with pytest.raises(DataError) as info:
        run(raw)
    assert info.value.key == "matching.caliper" and "nothing can be matched" in str(info.value)
    assert study_tables(nsw_db, "nsw") == []
    with duckdb.connect(nsw_db, read_only=True) as con:
        men = con.execute(f"SELECT * FROM men WHERE {filters[0]} AND {filters[1]}").df()
    treated = men.enrolled_on.notna().to_numpy()
    fit = sm.Logit(treated.astype(float), sm.add_constant(men[["age", "educ", "re74", "re75"]])).fit(disp=0, tol=1e-12, maxiter=200)
    score = fit.fittedvalues.to_numpy()  # the linear predictor
    sd = np.sqrt((np.var(score[treated], ddof=1) + np.var(score[~treated], ddof=1)) / 2)
    assert np.abs(score[treated][:, None] - score[~treated][None, :]).min() > 0.0001 * sd


def test_check_candidates_names_a_constant_or_collinear_feature():
    spec = parse_spec(demo_raw("unused.duckdb", "nearest_neighbour_check", distance="mahalanobis"))
    base = {"n_candidate_pairs": 10, "n_treated": 5, "n_control": 50, "n_treated_in_reach": 5, "score_sd": 1.0, "width": 0.2, "pivot_1": 1.0, "pivot_2": 0.5, "pivot_3": 0.2}

    def check(**row):
        values = {**base, **row}
        neighbours.check_candidates(spec, QueryResult(tuple(values), (tuple(values.values()),)))

    check()  # passes
    with pytest.raises(DataError, match="'pre_minutes' takes one value"):
        check(pivot_2=None)
    with pytest.raises(DataError, match="'pre_active_days' is \\(almost\\) a linear combination of pre_trips, pre_minutes"):
        check(pivot_3=1e-12)
    with pytest.raises(DataError, match="does not vary"):
        check(width=0.0)


@pytest.mark.parametrize(
    "matching, key",
    [
        ({"distance": "euclid"}, "matching.distance"),
        ({"caliper": 0}, "matching.caliper"),
        ({"caliper": True}, "matching.caliper"),
        ({"controls_per_treated": 0}, "matching.controls_per_treated"),
        ({"reuse_controls": "no"}, "matching.reuse_controls"),
        ({"reuse_controls": False, "controls_per_treated": 2}, "matching.controls_per_treated"),
        ({"max_candidate_pairs": 0}, "matching.max_candidate_pairs"),
    ],
)
def test_spec_errors_name_the_key(matching, key):
    with pytest.raises(SpecError) as info:
        parse_spec(demo_raw("unused.duckdb", "nearest_neighbour_spec", **matching))
    assert info.value.key == key


@pytest.mark.parametrize(
    "matching, key, new",
    [
        ({"exact": ["age_band"]}, "matching.exact", "block_on"),
        ({"ratio": 2}, "matching.ratio", "controls_per_treated"),
        ({"replacement": False}, "matching.replacement", "reuse_controls"),
        ({"distance": "logit"}, "matching.distance", '"score"'),
        ({"distance": "robust_mahalanobis"}, "matching.distance", '"rank_mahalanobis"'),
    ],
)
def test_earlier_option_names_are_refused_with_the_new_name(matching, key, new):
    with pytest.raises(SpecError) as info:
        parse_spec(demo_raw("unused.duckdb", "nearest_neighbour_spec", **matching))
    assert info.value.key == key
    assert new in str(info.value)


STAND_IN_MODEL = FittedModel(
    columns=[DesignColumn("intercept", "intercept"), DesignColumn("pre_trips", "numeric", "pre_trips"), DesignColumn("pre_minutes", "numeric", "pre_minutes")],
    coefficients=[-2.0, 0.1, 0.01],
    iterations=6,
    log_likelihood=-1.0,
    n_units=1,
    fingerprint="0",
    levels={},
)


def test_plan_compiles_for_every_dialect():
    """Every dialect prints the plan (one configuration that uses every nearest_neighbour_ template); the greedy
    rounds are one step the runner repeats (its check query in the step), and the guard runs before the candidate join."""
    spec = parse_spec(demo_raw("unused.duckdb", "nearest_neighbour_compile", distance="rank_mahalanobis", block_on=["home_district"], reuse_controls=False))
    for dialect in DIALECTS:
        plan = build_plan(spec, dialect, model=STAND_IN_MODEL)
        names = [s.name for s in plan.steps]
        assert names.index("candidate_pairs") < names.index("nearest_neighbour_candidates")
        assert [n for n in names if n.startswith("nearest_neighbour_round")] == ["nearest_neighbour_rounds"]
        rounds = plan.step("nearest_neighbour_rounds")
        assert rounds.max_repeats == neighbours.MAX_ROUNDS and "n_open" in rounds.repeat_check
        assert len(plan.files()) <= 30  # 76 with one file per greedy round
        assert {"nearest_neighbour_features", "nearest_neighbour_whitening", "pairs", "match_weights", "matching_summary"} <= set(names)
        assert all("QUALIFY" not in sql.upper() for s in plan.steps for sql in s.statements)


@pytest.mark.parametrize("distance", ["score", "mahalanobis"])
def test_plan_with_reused_controls_compiles_for_every_dialect(distance):
    """With controls reused, the running sums over score order and over distance print for every
    dialect (sqlglot refuses a NULLS LAST running sum for BigQuery, so the order is spelled out)."""
    spec = parse_spec(demo_raw("unused.duckdb", "nearest_neighbour_compile", distance=distance, block_on=["home_district"], reuse_controls=True))
    for dialect in DIALECTS:
        plan = build_plan(spec, dialect, model=STAND_IN_MODEL)
        units = "\n".join(plan.step("nearest_neighbour_units").statements)
        matches = "\n".join(plan.step("nearest_neighbour_matches").statements)
        assert "ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW" in units.upper() and "n_within" in matches, dialect
        assert ("control_group" in units) == (distance == "score"), dialect


# ---------------------------------------------------------------------------------------------
# NSW and rows fetched


@pytest.mark.parametrize("replacement", [True, False])
def test_nsw_att_inside_the_experimental_interval(nsw_db, replacement):
    """NSW treated vs CPS comparison men (Dehejia & Wahba 1999, Table 3): nearest-neighbour matching
    on the logit score, caliper 0.2 SD, 1:1, with or without replacement. Both sqlmatch's reported
    ATT on 1978 earnings and the matching estimator (mean over matched treated men of their
    earnings minus the mean of their matches', computed here from the tables) lie inside the
    experimental 95% interval [479, 3110]; the naive difference (-8,498) does not. Beside DW's
    matching estimate 1,582 (SE 1,069): see the report of this change for the values."""
    results = api.run(parse_spec(nsw_spec(nsw_db, "nearest_neighbour", reuse_controls=replacement)))
    effect = results.effect("earnings_after")
    low, high = EXPERIMENTAL_INTERVAL
    assert low <= effect.estimate <= high, (effect.estimate, DW_MATCHING)
    assert effect.naive.estimate == pytest.approx(-8498, abs=1)
    assert not low <= effect.naive.estimate <= high
    with duckdb.connect(nsw_db, read_only=True) as con:
        if replacement:
            shares = match_shares(con.execute("SELECT * FROM sqlmatch.nsw_nearest_neighbour_matches").df(), con.execute("SELECT * FROM sqlmatch.nsw_nearest_neighbour_units").df())
            m = pd.DataFrame([(a, b, w) for (a, b), w in shares.items()], columns=["treated_key", "control_key", "share"])
        else:
            m = con.execute("SELECT treated_key, control_key, 1.0 AS share FROM sqlmatch.nsw_pairs").df()
        y = con.execute("SELECT unit_key, earnings_after FROM sqlmatch.nsw_measures").df().set_index("unit_key").earnings_after
    m["yc"] = y.loc[m.control_key].to_numpy() * m.share.to_numpy()
    per_treated = m.groupby("treated_key").yc.sum()
    matching_estimate = float(np.mean(y.loc[per_treated.index].to_numpy() - per_treated.to_numpy()))
    assert low <= matching_estimate <= high, matching_estimate
    assert results.matching.n_treated_matched == len(per_treated)


def test_rows_fetched_at_two_sizes(tmp_path):
    """The demo at 3,000 and 30,000 riders: strata by number of matches and one weights row per
    match, so every query, the per-stratum outcome query included, returns as many rows at both
    sizes (ratio 1: one stratum)."""
    fetched = {}
    for riders in (3_000, 30_000):
        folder = tmp_path / str(riders)
        build_demo(folder, riders=riders, seed=7)
        raw = demo_raw(str(folder / "bikeshare.duckdb"), "nearest_neighbour_rows")
        _, out, _ = run(raw)
        fetched[riders] = (out.rows_fetched, out.results["matching_summary"].one()["n_strata"])
    assert fetched[3_000][0] == fetched[30_000][0]
    assert fetched[3_000][1] == fetched[30_000][1] == 1


def test_pairs_give_paired_t_and_rosenbaum_bounds_equal_to_scipy(demo_dir, tmp_path):
    """1:1 pairs without replacement: the effect's interval is the paired t interval (scipy's
    one-sample t on the within-pair differences), and the Rosenbaum bound at Gamma = 1 equals the
    one-sided Wilcoxon signed-rank p-value (scipy.stats.wilcoxon, normal approximation; Rosenbaum
    2002, §4.3)."""
    import shutil
    import tomllib

    import duckdb
    from scipy import stats

    from sqlmatch import api
    from sqlmatch.spec import parse_spec

    from conftest import DEMO_SPEC

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(tmp_path / "bikeshare.duckdb")
    raw["matching"] = {"method": "nearest_neighbour", "reuse_controls": False}
    results = api.run(parse_spec(raw))
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        d = con.execute(
            "SELECT mt.post_trips - mc.post_trips FROM sqlmatch.annual_pass_pairs p "
            "JOIN sqlmatch.annual_pass_measures mt ON mt.unit_key = p.treated_key "
            "JOIN sqlmatch.annual_pass_measures mc ON mc.unit_key = p.control_key"
        ).fetchnumpy()
    d = next(iter(d.values())).astype(float)
    effect = results.effect("post_trips")
    t = stats.ttest_1samp(d, 0.0)
    low, high = t.confidence_interval(0.95)
    assert effect.estimate == pytest.approx(d.mean(), rel=1e-12)
    assert effect.ci_low == pytest.approx(low, rel=1e-9) and effect.ci_high == pytest.approx(high, rel=1e-9)
    w = stats.wilcoxon(d, zero_method="wilcox", correction=False, method="approx", alternative="greater")
    bounds = effect.sensitivity["rosenbaum"]
    assert bounds["p_upper_at_gamma_1"] == pytest.approx(w.pvalue, rel=1e-6)
    assert bounds["gamma_at_alpha"] > 1.0
