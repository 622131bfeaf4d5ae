"""Checks of the demo warehouse generator (sqlmatch/demo.py + demo_warehouse/generate.sql.j2).

The demo data are a simulation with a known truth: the pass effect is fixed by construction
(DELTA = 1.5 extra trips per month, 40% off fares), so the checks below compare the generated
tables with that construction, and the random-number building blocks with reference libraries
(scipy.stats, numpy). Sizes are small so the whole file runs in a few seconds.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pytest
from scipy import stats

from sqlmatch import demo

RIDERS = 3000
SEED = demo.DEFAULT_SEED


def _build(riders: int = RIDERS, seed: int = SEED, threads: int | None = None) -> duckdb.DuckDBPyConnection:
    con = duckdb.connect(config={"threads": threads} if threads else {})
    demo.build_demo_warehouse(con.execute, riders=riders, seed=seed)
    return con


def _rows(con: duckdb.DuckDBPyConnection, sql: str) -> list[tuple]:
    return con.execute(sql).fetchall()


def _one(con: duckdb.DuckDBPyConnection, sql: str):
    rows = _rows(con, sql)
    assert len(rows) == 1, rows
    return rows[0][0] if len(rows[0]) == 1 else rows[0]


def _checksums(con: duckdb.DuckDBPyConnection) -> dict[str, tuple]:
    """Order-independent fingerprints of every public table (integer-valued, so exact)."""
    return {
        "riders": _one(con, """
            SELECT COUNT(*), SUM(rider_id),
                   bit_xor(hash(hash(rider_id, home_district, signup_date, age_band, pass_bought_on))),
                   SUM(CASE WHEN pass_bought_on IS NULL THEN 0 ELSE date_diff('day', DATE '2026-01-01', pass_bought_on) + 1 END)
            FROM riders"""),
        "trips": _one(con, """
            SELECT COUNT(*), SUM(trip_id * (rider_id % 97)),
                   bit_xor(hash(hash(trip_id, rider_id, started_at, minutes, fare, distance_km))),
                   SUM(CAST(ROUND(fare * 100) AS BIGINT)), SUM(CAST(ROUND(minutes * 10) AS BIGINT)),
                   SUM(CAST(ROUND(distance_km * 100) AS BIGINT)), SUM(epoch(started_at))
            FROM trips"""),
        "demo_truth": tuple(_rows(con, "SELECT outcome, true_att, note FROM demo_truth ORDER BY outcome")),
        "demo_meta": tuple(_rows(con, "SELECT key, value FROM demo_meta ORDER BY key")),
    }


def _meta(con: duckdb.DuckDBPyConnection) -> dict[str, str]:
    return dict(_rows(con, "SELECT key, value FROM demo_meta"))


def _truth(con: duckdb.DuckDBPyConnection) -> dict[str, float]:
    return dict(_rows(con, f"SELECT outcome, true_att FROM {demo.DEMO_TRUTH_TABLE}"))


@pytest.fixture(scope="module")
def warehouse() -> duckdb.DuckDBPyConnection:
    con = _build()
    yield con
    con.close()


# --------------------------------------------------------------------------------------------
# Rendering and the executor interface
# --------------------------------------------------------------------------------------------


def test_statements_render_with_literals_and_drop_first():
    statements = demo.demo_statements(riders=1234, seed=77)
    assert statements, "no statements rendered"
    assert all(isinstance(s, str) and s.strip() for s in statements)
    assert not any(s.rstrip().endswith(";") for s in statements)
    assert not any("{{" in s or "{%" in s for s in statements)
    # every public table is dropped before anything is created
    first_create = next(i for i, s in enumerate(statements) if "CREATE TABLE" in s)
    drops_before = " ".join(statements[:first_create])
    for table in ("riders", "trips", "demo_truth", "demo_meta"):
        assert f"DROP TABLE IF EXISTS {table}" in drops_before
    text = "\n".join(statements)
    assert "range(1, 1234 + 1)" in text
    assert "CAST(77 AS BIGINT)" in text
    # portability rules of the project
    assert "CREATE OR REPLACE" not in text.upper()
    assert "QUALIFY" not in text.upper()
    assert "//" not in text
    # random() is not reproducible under parallelism; the generator must not use it
    assert "random()" not in text.lower()


def test_same_arguments_render_identically_and_seed_changes_sql():
    assert demo.demo_statements(500, 1) == demo.demo_statements(500, 1)
    assert demo.demo_statements(500, 1) != demo.demo_statements(500, 2)


@pytest.mark.parametrize("riders, seed", [(0, 1), (-5, 1), (True, 1), (10.0, 1), (10, -1), (10, 2**63), (10, "7")])
def test_bad_arguments_are_rejected(riders, seed):
    with pytest.raises((TypeError, ValueError)):
        demo.demo_statements(riders=riders, seed=seed)


def test_split_statements_on_marker_lines():
    text = "-- header only\n-- statement\nSELECT 1\n-- statement\n\n   \n-- statement\n  -- statement  \nSELECT 2\nFROM t\n"
    assert demo.split_statements(text) == ["SELECT 1", "SELECT 2\nFROM t"]


def test_build_runs_every_statement_in_order_through_the_executor():
    seen: list[str] = []
    n = demo.build_demo_warehouse(seen.append, riders=50, seed=3)
    assert seen == demo.demo_statements(riders=50, seed=3)
    assert n == len(seen)


def test_template_is_found_and_documents_the_separator():
    text = demo.load_template_text()
    assert demo.STATEMENT_SEPARATOR in text
    assert "CREATE TABLE trips" in text


# --------------------------------------------------------------------------------------------
# Random-number building blocks against reference libraries
# --------------------------------------------------------------------------------------------


def test_hashed_uniforms_are_uniform_and_streams_independent():
    module = demo.template_module(seed=SEED)
    con = duckdb.connect()
    n = 50_000
    u = np.array(_rows(con, f"""
        SELECT {module.unif(1, 'x')}, {module.unif(2, 'x')}, {module.unif(1, 'x + 1')}, {module.unif(1, 'x, 7')}
        FROM range({n}) AS t(x) ORDER BY x"""), dtype=float)
    assert np.all((u > 0) & (u < 1))
    # Kolmogorov-Smirnov against U(0, 1) (scipy.stats.kstest); p > 1e-4 on a fixed seed
    for j in range(u.shape[1]):
        assert stats.kstest(u[:, j], "uniform").pvalue > 1e-4
    # streams of the same key, and neighbouring keys, must not be correlated: |r| < 0.02,
    # about 4.5 standard errors of a null correlation (1/sqrt(n)) -- common practice
    corr = np.corrcoef(u.T)
    off_diagonal = corr[~np.eye(corr.shape[0], dtype=bool)]
    assert np.max(np.abs(off_diagonal)) < 0.02


def test_poisson_inverse_cdf_matches_scipy_ppf():
    """The sampler is the Poisson inverse CDF: N = min{k : F(k) >= u} = scipy.stats.poisson.ppf."""
    module = demo.template_module(seed=SEED)
    con = duckdb.connect()
    mus = [0.05, 0.4, 1.5, 3.0, 7.5, 20.0, 55.0]
    us = np.linspace(0.0005, 0.9995, 400)
    values = ", ".join(f"(CAST({float(mu)!r} AS DOUBLE), CAST({float(u)!r} AS DOUBLE))" for mu in mus for u in us)
    got = _rows(con, f"SELECT mu, u, {module.poisson('mu', 'u')} AS n FROM (VALUES {values}) AS t(mu, u) ORDER BY mu, u")
    mismatches = 0
    for mu, u, n in got:
        expected = int(stats.poisson.ppf(u, mu))
        if n != expected:
            # only a floating-point tie at a CDF step is tolerated
            assert abs(stats.poisson.cdf(expected, mu) - u) < 1e-9 or abs(stats.poisson.cdf(n, mu) - u) < 1e-9
            mismatches += 1
    assert mismatches <= 2


def test_normal_draws_have_standard_normal_moments():
    module = demo.template_module(seed=SEED)
    con = duckdb.connect()
    z = np.array([r[0] for r in _rows(con, f"SELECT {module.normal(4, 5, 'x')} FROM range(40000) AS t(x)")])
    # mean within 4 standard errors of 0 and sd within 2% of 1 (Box & Muller 1958 transform)
    assert abs(z.mean()) < 4 / math.sqrt(len(z))
    assert abs(z.std() - 1.0) < 0.02
    assert stats.kstest(z, "norm").pvalue > 1e-4


# --------------------------------------------------------------------------------------------
# The generated warehouse
# --------------------------------------------------------------------------------------------


def test_schemas(warehouse):
    def columns(table):
        return [(r[0], r[1]) for r in _rows(warehouse, f"DESCRIBE {table}")]

    assert columns("riders") == [
        ("rider_id", "BIGINT"), ("home_district", "VARCHAR"), ("signup_date", "DATE"),
        ("age_band", "VARCHAR"), ("pass_bought_on", "DATE"),
    ]
    assert columns("trips") == [
        ("trip_id", "BIGINT"), ("rider_id", "BIGINT"), ("started_at", "TIMESTAMP"),
        ("minutes", "DOUBLE"), ("fare", "DOUBLE"), ("distance_km", "DOUBLE"),
    ]
    assert columns("demo_truth") == [
        ("outcome", "VARCHAR"), ("true_att", "DOUBLE"), ("sample_att", "DOUBLE"),
        ("true_atc", "DOUBLE"), ("true_ate", "DOUBLE"), ("note", "VARCHAR"),
    ]
    assert columns("demo_meta") == [("key", "VARCHAR"), ("value", "VARCHAR")]
    # scratch tables are gone
    assert _one(warehouse, "SELECT COUNT(*) FROM duckdb_tables() WHERE table_name LIKE '\\_demo\\_%' ESCAPE '\\'") == 0


def test_rider_ids_unique_and_primary_key_enforced(warehouse):
    n, distinct, lo, hi = _one(warehouse, "SELECT COUNT(*), COUNT(DISTINCT rider_id), MIN(rider_id), MAX(rider_id) FROM riders")
    assert n == distinct == RIDERS
    assert (lo, hi) == (1, RIDERS)
    with pytest.raises(duckdb.ConstraintException):
        warehouse.execute("INSERT INTO riders SELECT * FROM riders WHERE rider_id = 1")


def test_rider_attributes_and_dates(warehouse):
    districts = {r[0] for r in _rows(warehouse, "SELECT DISTINCT home_district FROM riders")}
    assert districts == {"Harbour", "Old Town", "Uplands", "Riverside", "Market", "Northgate"}
    bands = {r[0] for r in _rows(warehouse, "SELECT DISTINCT age_band FROM riders")}
    assert bands == {"16-24", "25-34", "35-49", "50+"}
    lo, hi, p_lo, p_hi = _one(warehouse, "SELECT MIN(signup_date), MAX(signup_date), MIN(pass_bought_on), MAX(pass_bought_on) FROM riders")
    assert str(lo) >= "2023-01-01" and str(hi) <= "2025-06-30"
    assert str(p_lo) >= "2026-01-01" and str(p_hi) <= "2026-12-31"


def test_trips_are_well_formed(warehouse):
    n, distinct, lo_id, hi_id, t0, t1, orphans = _one(warehouse, """
        SELECT COUNT(*), COUNT(DISTINCT trip_id), MIN(trip_id), MAX(trip_id), MIN(started_at), MAX(started_at),
               COUNT(*) FILTER (WHERE rider_id NOT IN (SELECT rider_id FROM riders))
        FROM trips""")
    assert n == distinct and (lo_id, hi_id) == (1, n)
    assert str(t0) >= "2025-07-01" and str(t1) < "2027-01-01"
    assert orphans == 0
    # trip_id follows start time
    assert _one(warehouse, """
        SELECT COUNT(*) FROM (
            SELECT started_at, LAG(started_at) OVER (ORDER BY trip_id) AS prev FROM trips) AS x
        WHERE prev > started_at""") == 0
    # about 20 trips per rider over the 18 months (tuning target of the generator)
    assert 15 <= n / RIDERS <= 27
    # minutes around 15, positive fares and distances
    mean_minutes, min_minutes, min_fare, min_km = _one(warehouse, "SELECT AVG(minutes), MIN(minutes), MIN(fare), MIN(distance_km) FROM trips")
    assert 12 <= mean_minutes <= 18 and min_minutes >= 1.0 and min_fare > 0 and min_km >= 0
    # more riding in summer than in winter
    july, january = _one(warehouse, """
        SELECT COUNT(*) FILTER (WHERE started_at >= '2026-07-01' AND started_at < '2026-08-01'),
               COUNT(*) FILTER (WHERE started_at >= '2026-01-01' AND started_at < '2026-02-01') FROM trips""")
    assert july > 2 * january


def test_fares_follow_the_tariff_and_the_pass_date(warehouse):
    """Standard fare 1.00 + 0.15 * minutes before the purchase date, 40% off on and after it."""
    bad_standard, bad_pass, n_pass = _one(warehouse, """
        SELECT
            COUNT(*) FILTER (WHERE (r.pass_bought_on IS NULL OR CAST(t.started_at AS DATE) < r.pass_bought_on)
                               AND abs(t.fare - (1.0 + 0.15 * t.minutes)) > 0.005 + 1e-9),
            COUNT(*) FILTER (WHERE CAST(t.started_at AS DATE) >= r.pass_bought_on
                               AND abs(t.fare - 0.6 * (1.0 + 0.15 * t.minutes)) > 0.0081),
            COUNT(*) FILTER (WHERE CAST(t.started_at AS DATE) >= r.pass_bought_on)
        FROM trips AS t JOIN riders AS r USING (rider_id)""")
    assert bad_standard == 0
    assert bad_pass == 0
    assert n_pass > 0


def test_treated_share_in_target_range(warehouse):
    cohort, buyers = _one(warehouse, """
        SELECT COUNT(*) FILTER (WHERE pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01'),
               COUNT(pass_bought_on) FROM riders""")
    assert 0.06 <= cohort / RIDERS <= 0.10
    assert 0.25 <= buyers / RIDERS <= 0.60
    assert _meta(warehouse)["cohort_riders"] == str(cohort)


def test_meta_describes_the_study(warehouse):
    meta = _meta(warehouse)
    assert meta["seed"] == str(SEED)
    assert meta["riders"] == str(RIDERS)
    assert meta["trips"] == str(_one(warehouse, "SELECT COUNT(*) FROM trips"))
    assert meta["cohort"] == demo.DEMO_COHORT == "2026-03"
    assert (meta["pre_window_start"], meta["pre_window_end"]) == demo.DEMO_PRE_WINDOW
    assert (meta["post_window_start"], meta["post_window_end"]) == demo.DEMO_POST_WINDOW
    assert float(meta["pass_extra_trips_per_month"]) == 1.5
    assert float(meta["pass_fare_discount"]) == 0.4


def test_truth_table_has_the_five_outcomes(warehouse):
    truth = _truth(warehouse)
    assert set(truth) == set(demo.DEMO_OUTCOMES)
    assert all(v is not None and math.isfinite(v) for v in truth.values())
    notes = dict(_rows(warehouse, "SELECT outcome, note FROM demo_truth"))
    assert "3 * DELTA = 4.5" in notes["post_trips"]
    # each sample ATT is the difference of the two potential-world means kept in demo_meta
    meta = _meta(warehouse)
    sample = dict(_rows(warehouse, "SELECT outcome, sample_att FROM demo_truth"))
    for outcome, att in sample.items():
        y1 = float(meta[f"truth.{outcome}.mean_pass"])
        y0 = float(meta[f"truth.{outcome}.mean_no_pass"])
        assert att == pytest.approx(y1 - y0, abs=1e-9)
    # the expected effect on trips is exactly 3 months of DELTA extra trips (by construction)
    assert truth["post_trips"] == 3 * float(meta["pass_extra_trips_per_month"])


def test_expected_truth_is_close_to_the_sample_truth(warehouse):
    """The expected effect (given the cohort's latent riding) and the realised one differ only by
    trip-level noise: about four standard errors of a cohort mean of ~200 riders (simulation with a known
    truth; tolerances generous on purpose)."""
    rows = _rows(warehouse, "SELECT outcome, true_att, sample_att FROM demo_truth")
    tolerance = {"post_trips": 0.6, "post_minutes": 10.0, "post_fare": 1.5, "fare_per_trip": 0.15, "active_last_month": 0.15}
    for outcome, expected, sample in rows:
        assert abs(expected - sample) < tolerance[outcome], (outcome, expected, sample)


def test_truth_signs_follow_the_construction(warehouse):
    truth = _truth(warehouse)
    meta = _meta(warehouse)
    # the pass only adds trips, minutes and activity, and lowers the price of every trip
    assert truth["post_trips"] > 0
    assert truth["post_minutes"] > 0
    assert 0 < truth["active_last_month"] <= 1
    # fare per trip: every post-window trip of the cohort is at 60% of the standard fare, so the
    # ratio under the pass is close to 0.6 times the one without (extra trips have the same
    # minutes distribution): allow 10% for sampling noise of a few hundred riders
    ratio = float(meta["truth.fare_per_trip.mean_pass"]) / float(meta["truth.fare_per_trip.mean_no_pass"])
    assert ratio == pytest.approx(0.6, rel=0.10)
    assert truth["fare_per_trip"] < 0


def test_post_trips_truth_close_to_three_months_of_delta(warehouse):
    """Simulation with a known truth: E[post_trips ATT] = 3 months * DELTA = 4.5.

    The sample ATT is the cohort mean of Poisson(4.5) extra-trip counts, so its standard error is
    sqrt(4.5 / n_cohort) (Poisson variance = mean); tolerate 4 standard errors (common practice).
    """
    meta = _meta(warehouse)
    delta = float(meta["pass_extra_trips_per_month"])
    n_cohort = int(meta["cohort_riders"])
    expected = 3 * delta
    se = math.sqrt(expected / n_cohort)
    sample = dict(_rows(warehouse, "SELECT outcome, sample_att FROM demo_truth"))
    assert abs(sample["post_trips"] - expected) < 4 * se


def test_observed_cohort_outcomes_equal_the_pass_world_of_the_truth(warehouse):
    """The public tables show the cohort's pass world; it must match what the truth used."""
    observed = _one(warehouse, """
        WITH cohort AS (
            SELECT rider_id FROM riders
            WHERE pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01'),
        post AS (
            SELECT c.rider_id,
                   COUNT(t.trip_id) AS n,
                   COALESCE(SUM(t.minutes), 0) AS minutes,
                   COALESCE(SUM(t.fare), 0) AS fare,
                   MAX(CASE WHEN t.started_at >= TIMESTAMP '2026-06-01' THEN 1 ELSE 0 END) AS active
            FROM cohort AS c
            LEFT JOIN trips AS t
              ON t.rider_id = c.rider_id
             AND t.started_at >= TIMESTAMP '2026-04-01' AND t.started_at < TIMESTAMP '2026-07-01'
            GROUP BY c.rider_id)
        SELECT AVG(n), AVG(minutes), AVG(fare), SUM(fare) / SUM(n), AVG(COALESCE(active, 0)) FROM post""")
    meta = _meta(warehouse)
    for name, value in zip(demo.DEMO_OUTCOMES, observed):
        assert value == pytest.approx(float(meta[f"truth.{name}.mean_pass"]), rel=1e-9, abs=1e-9), name


def test_confounding_heavier_riders_buy_and_naive_difference_exceeds_truth(warehouse):
    # take-up by pre-window (2025-09-01 .. 2026-02-28) trip count
    light, heavy = _one(warehouse, """
        WITH pre AS (
            SELECT r.rider_id, r.pass_bought_on, COUNT(t.trip_id) AS n
            FROM riders AS r
            LEFT JOIN trips AS t
              ON t.rider_id = r.rider_id
             AND t.started_at >= TIMESTAMP '2025-09-01' AND t.started_at < TIMESTAMP '2026-03-01'
            GROUP BY r.rider_id, r.pass_bought_on)
        SELECT AVG(CASE WHEN pass_bought_on IS NULL THEN 0.0 ELSE 1.0 END) FILTER (WHERE n = 0),
               AVG(CASE WHEN pass_bought_on IS NULL THEN 0.0 ELSE 1.0 END) FILTER (WHERE n >= 6)
        FROM pre""")
    assert heavy > light + 0.25
    # naive post_trips contrast: March cohort vs riders untreated through the post window
    naive = _one(warehouse, """
        WITH post AS (
            SELECT r.rider_id,
                   CASE WHEN r.pass_bought_on >= DATE '2026-03-01' AND r.pass_bought_on < DATE '2026-04-01' THEN 1
                        WHEN r.pass_bought_on IS NULL OR r.pass_bought_on > DATE '2026-06-30' THEN 0 END AS d,
                   COUNT(t.trip_id) AS n
            FROM riders AS r
            LEFT JOIN trips AS t
              ON t.rider_id = r.rider_id
             AND t.started_at >= TIMESTAMP '2026-04-01' AND t.started_at < TIMESTAMP '2026-07-01'
            GROUP BY r.rider_id, r.pass_bought_on)
        SELECT AVG(n) FILTER (WHERE d = 1) - AVG(n) FILTER (WHERE d = 0) FROM post""")
    assert naive > _truth(warehouse)["post_trips"] + 1.0


_CONTROLS = "r.pass_bought_on IS NULL OR r.pass_bought_on > DATE '2026-06-30'"
_COHORT = "r.pass_bought_on >= DATE '2026-03-01' AND r.pass_bought_on < DATE '2026-04-01'"


def test_effect_on_everyone_mixes_the_cohort_and_the_controls(warehouse):
    """A mean over the cohort and the controls is their size-weighted mix, so the expected ATE is
    (n_t ATT + n_c ATC) / (n_t + n_c) for the outcomes linear in the riders (post_fare,
    active_last_month); counts from the public riders table. The outcomes fixed by construction
    (trips: 3 * DELTA; minutes and fare per trip: trip-level expectations) are equal across the three."""
    n_t, n_c = _one(warehouse, f"SELECT COUNT(*) FILTER (WHERE {_COHORT}), COUNT(*) FILTER (WHERE {_CONTROLS}) FROM riders AS r")
    assert n_t == int(_meta(warehouse)["cohort_riders"])
    rows = {o: (att, atc, ate) for o, att, atc, ate in _rows(warehouse, "SELECT outcome, true_att, true_atc, true_ate FROM demo_truth")}
    for outcome in ("post_fare", "active_last_month"):
        att, atc, ate = rows[outcome]
        # each group mean is rounded to 12 decimals in the generator
        assert ate == pytest.approx((n_t * att + n_c * atc) / (n_t + n_c), abs=1e-9), outcome
        assert atc != att  # the controls ride less than the cohort: a different effect
    for outcome in ("post_trips", "post_minutes", "fare_per_trip"):
        att, atc, ate = rows[outcome]
        assert att == atc == ate, outcome
    assert rows["post_trips"][1] == 3 * float(_meta(warehouse)["pass_extra_trips_per_month"])


def test_effect_on_the_controls_follows_from_their_observed_no_pass_world(warehouse):
    """The controls' observed post window is their world without a pass (none holds one before
    July). By the construction (header, 5.) a March pass adds DELTA trips a month and charges 60%
    of the standard fare on every trip, so E[ATC of post_fare] = (b + 3 DELTA) * 0.6 fs - b fs and
    E[ATC of active_last_month] = P(no June trip) * (1 - exp(-DELTA)), with b the controls' mean
    post-window trips and fs the standard fare per trip, both estimated from the public trips
    table. Tolerance: 4 standard errors of those estimates (common practice), plus half a cent per
    trip for the pass fare's rounding to cents."""
    n, b, var_b, fs, var_fare, trips, idle = _one(warehouse, f"""
        WITH post AS (
            SELECT r.rider_id,
                   COUNT(t.trip_id) AS n,
                   SUM(t.fare) AS fare,
                   SUM(t.fare * t.fare) AS fare2,
                   MAX(CASE WHEN t.started_at >= TIMESTAMP '2026-06-01' THEN 1 ELSE 0 END) AS active
            FROM riders AS r
            LEFT JOIN trips AS t
              ON t.rider_id = r.rider_id
             AND t.started_at >= TIMESTAMP '2026-04-01' AND t.started_at < TIMESTAMP '2026-07-01'
            WHERE {_CONTROLS}
            GROUP BY r.rider_id)
        SELECT COUNT(*), AVG(n), VAR_SAMP(n), SUM(fare) / SUM(n),
               SUM(fare2) / SUM(n) - (SUM(fare) / SUM(n)) ^ 2, SUM(n), AVG(1.0 - COALESCE(active, 0)) FROM post""")
    delta = float(_meta(warehouse)["pass_extra_trips_per_month"])
    discount = float(_meta(warehouse)["pass_fare_discount"])
    truth = {o: atc for o, atc in _rows(warehouse, "SELECT outcome, true_atc FROM demo_truth")}
    fp = (1 - discount) * fs
    predicted = (b + 3 * delta) * fp - b * fs
    # delta method over the two estimates (independent enough: trip fares do not depend on the rider)
    se = math.sqrt((fp - fs) ** 2 * var_b / n + ((1 - discount) * (b + 3 * delta) - b) ** 2 * var_fare / trips)
    assert abs(truth["post_fare"] - predicted) < 4 * se + 0.005 * (b + 3 * delta), (truth["post_fare"], predicted, se)
    predicted = idle * (1 - math.exp(-delta))
    se = math.sqrt(idle * (1 - idle) / n) * (1 - math.exp(-delta))
    assert abs(truth["active_last_month"] - predicted) < 4 * se, (truth["active_last_month"], predicted, se)


# --------------------------------------------------------------------------------------------
# Determinism
# --------------------------------------------------------------------------------------------


def test_same_seed_gives_identical_tables_across_runs_and_thread_counts(warehouse):
    reference = _checksums(warehouse)
    for threads in (1, 2):
        con = _build(threads=threads)
        try:
            assert _checksums(con) == reference
        finally:
            con.close()


def test_other_seed_gives_other_tables(warehouse):
    con = _build(seed=SEED + 1)
    try:
        other = _checksums(con)
    finally:
        con.close()
    reference = _checksums(warehouse)
    assert other["riders"] != reference["riders"]
    assert other["trips"] != reference["trips"]
    assert other["demo_truth"] != reference["demo_truth"]


def test_rebuilding_in_place_replaces_previous_tables():
    con = _build(riders=400, seed=11)
    try:
        demo.build_demo_warehouse(con.execute, riders=RIDERS, seed=SEED)
        fresh = _build()
        try:
            assert _checksums(con) == _checksums(fresh)
        finally:
            fresh.close()
    finally:
        con.close()
