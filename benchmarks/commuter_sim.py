"""A second simulated bike-share, for calibration only: riders offered a commuter pass.

Shaped unlike the demo (demo_warehouse/generate.sql.j2) on purpose:

- a continuous confounder, `commute_km` (home to work, lognormal, a unit attribute): longer
  commutes ride less often but buy the pass more readily;
- a categorical confounder, `home_district` (5 levels), shifting both riding and take-up;
- a heterogeneous effect: a pass holder rides tau_i = 0.5 + 0.4 * log1p(pre_trips_i) extra trips
  a month, so the effect grows with the pre-period trip count (a feature the study observes);
- skewed spend: each trip's fare is lognormal (sd 0.6 on the log scale) with a median rising with
  commute_km; pass holders pay half fare on every trip;
- take-up logistic in log1p(pre_trips), log(commute_km) and district only, so matching on the
  observed features can remove the confounding (the latent riding rate is never observed, but
  it reaches take-up only through pre_trips).

Calendar: trips 2025-09-01 .. 2026-06-30; the cohort buys in March 2026 (uniform day); about 3% of
the other riders buy in August 2026 (after the post window: controls). Pre window Sep..Feb,
post window Apr..Jun, as in the demo study.

Truth, per outcome (post_trips, post_fare, fare_per_trip, active_last_month):
  expected_att    the effect on the cohort given its riders' latent rates, fare levels and
                  pre_trips: the average over the post-window trip randomness (the demo's
                  `true_att` convention; what the stratified variance targets);
  sample_att      the realised mean of Y(pass) - Y(no pass) over the cohort, from both simulated
                  potential outcomes (fare_per_trip: difference of the two cohort ratios);
  matched treated (calibration.py): expected_att over only the treated units a run matched,
                  from the per-unit expectations in `commuter_unit_truth` (a method that drops
                  treated units estimates the effect on those it kept, and the effect varies);
  population_att  the same expectation over the treated of a 1,000,000-rider population drawn
                  once with a fixed seed (weights: each rider's take-up probability).
The same three for the effect on the controls (`expected_atc`, `sample_atc`, `population_atc`:
this seed's controls, every rider who did not buy in March, late buyers included; population
weights 1 - take-up probability) and on everyone (`expected_ate`, `sample_ate`, `population_ate`:
all riders of the study, weight 1). A control's world with the pass is the cohort's: tau_i extra
trips a month over April..June and half fare on every post-window trip. For the ratio outcome
fare_per_trip every truth is the ratio of the expected (or realised) sums over the target units
under the pass minus the same under no pass, as for the ATT. The realised control outcomes with a
pass are drawn from a second generator (seeded by (seed, 1)) after the data, so the riders and
trips of a seed are those the ATT-only version drew. `commuter_unit_truth` holds every rider's
expectations with a `treated` flag (calibration.py's truth over the units a run kept).

numpy draws the rows, DuckDB stores them (tables `riders`, `trips`, `commuter_truth`,
`commuter_unit_truth`). A benchmark
generator: row-level data in Python is fine here, never in sqlmatch.
"""

from __future__ import annotations

import functools
import shutil
from pathlib import Path

import duckdb
import numpy as np
import pandas as pd

SPEC = Path(__file__).resolve().parent / "commuter_pass.toml"
DATABASE = "commuter.duckdb"
OUTCOMES = ("post_trips", "post_fare", "fare_per_trip", "active_last_month")

# (name, share, shift of log rate, shift of the take-up logit)
DISTRICTS = (
    ("Harbour", 0.25, 0.20, 0.30),
    ("Old Town", 0.20, 0.35, 0.00),
    ("Uplands", 0.15, -0.40, -0.50),
    ("Riverside", 0.20, 0.10, 0.20),
    ("Northgate", 0.20, -0.10, -0.20),
)
# months from 2025-09 to 2026-06; seasonal multipliers of the monthly riding rate
MONTHS = pd.date_range("2025-09-01", "2026-06-01", freq="MS")
SEASON = np.array([1.25, 0.95, 0.70, 0.65, 0.45, 0.50, 0.75, 1.00, 1.25, 1.45])
PRE = slice(0, 6)  # Sep..Feb
COHORT_MONTH = 6  # March
POST = slice(7, 10)  # Apr..Jun
JUNE = 9
DISCOUNT = 0.5
FARE_LOG_SD = 0.6
TAKEUP_INTERCEPT = -4.0


def _latent(rng: np.random.Generator, n: int):
    shares = np.array([d[1] for d in DISTRICTS])
    district = rng.choice(len(DISTRICTS), size=n, p=shares / shares.sum())
    commute = np.clip(np.round(np.exp(np.log(4.0) + 0.6 * rng.standard_normal(n)), 2), 0.3, 30.0)
    shift = np.array([d[2] for d in DISTRICTS])[district]
    rate = np.minimum(np.exp(np.log(2.2) + shift - 0.3 * np.log(commute / 4.0) + 0.6 * rng.standard_normal(n)), 40.0)
    fare_median = 1.0 + 0.3 * commute
    return district, commute, rate, fare_median


def _takeup(pre_trips, commute, district):
    buy_shift = np.array([d[3] for d in DISTRICTS])[district]
    logit = TAKEUP_INTERCEPT + 0.8 * np.log1p(pre_trips) + 0.5 * np.log(commute / 4.0) + buy_shift
    return 1.0 / (1.0 + np.exp(-logit))


def _tau(pre_trips):
    return 0.5 + 0.4 * np.log1p(pre_trips)  # extra trips per month with the pass


def _expected(rate, fare_median, tau):
    """Per-rider expected outcomes in each world over the post window (given latent values)."""
    mean_fare = fare_median * np.exp(FARE_LOG_SD**2 / 2)
    base = rate * SEASON[POST].sum()
    trips0, trips1 = base, base + 3 * tau
    fare0, fare1 = mean_fare * trips0, (1 - DISCOUNT) * mean_fare * trips1
    june = rate * SEASON[JUNE]
    active0, active1 = 1 - np.exp(-june), 1 - np.exp(-(june + tau))
    return dict(trips0=trips0, trips1=trips1, fare0=fare0, fare1=fare1, active0=active0, active1=active1)


def _effect(ex: dict, weight) -> dict[str, float]:
    """The effect over units weighted by `weight` (1/0 picks a group; take-up probabilities give
    the population's treated, 1 - them its controls); ratio outcome: ratio of the weighted sums in
    each world, then the difference."""
    w = weight / weight.sum()
    return {
        "post_trips": float(w @ (ex["trips1"] - ex["trips0"])),
        "post_fare": float(w @ (ex["fare1"] - ex["fare0"])),
        "fare_per_trip": float((w @ ex["fare1"]) / (w @ ex["trips1"]) - (w @ ex["fare0"]) / (w @ ex["trips0"])),
        "active_last_month": float(w @ (ex["active1"] - ex["active0"])),
    }


@functools.lru_cache(maxsize=1)
def population_truth(n: int = 1_000_000, seed: int = 987654321) -> dict[str, dict[str, float]]:
    """Effects of a large population, estimand -> outcome -> value: on the treated (each rider
    weighted by its take-up probability), on the controls (1 - it) and on everyone (1)."""
    rng = np.random.default_rng(seed)
    district, commute, rate, fare_median = _latent(rng, n)
    pre_trips = rng.poisson(rate * SEASON[PRE].sum())
    p = _takeup(pre_trips, commute, district)
    # the cohort is March buyers among riders who did not buy otherwise; take-up is all in March,
    # and every other rider (late buyers too) is a control
    ex = _expected(rate, fare_median, _tau(pre_trips))
    return {"att": _effect(ex, p), "atc": _effect(ex, 1.0 - p), "ate": _effect(ex, np.ones(n))}


def population_att(n: int = 1_000_000, seed: int = 987654321) -> dict[str, float]:
    """Effect on the treated of a large population, weighting each rider by its take-up probability."""
    return population_truth(n, seed)["att"]


def _control_pass_world(seed: int, control, tau, fare_median, trips0, fare0, june0):
    """Realised post-window outcomes of the controls had they bought in March: the cohort's
    extra-trip and fare draws, from a generator of their own so the data's draws are untouched.
    Returns (trips1, fare1, active1) for the rows `control`."""
    rng = np.random.default_rng([seed, 1])
    n = len(control)
    extra = rng.poisson(np.repeat(tau[control, None], 3, axis=1))  # controls x (Apr, May, Jun)
    count = extra.sum(axis=1)
    rider = np.repeat(np.arange(n), count)
    extra_fare = (1 - DISCOUNT) * fare_median[control][rider] * np.exp(FARE_LOG_SD * rng.standard_normal(len(rider)))
    trips1 = trips0[control] + count
    fare1 = (1 - DISCOUNT) * fare0 + np.bincount(rider, weights=extra_fare, minlength=n)
    active1 = (june0[control] + extra[:, 2]) > 0
    return trips1, fare1, active1


def _trip_rows(rng, rider, month, count, fare_median, discount):
    """Rows for `count` trips per (rider, month): uniform start time in the month, lognormal fare."""
    idx = np.repeat(np.arange(len(rider)), count)
    start = MONTHS.values[month[idx]]
    days = MONTHS[month[idx]].days_in_month.values
    offset = (rng.random(len(idx)) * days * 86400).astype("int64")
    fare = fare_median[idx] * np.exp(FARE_LOG_SD * rng.standard_normal(len(idx)))
    return rider[idx], start + offset.astype("timedelta64[s]"), fare, fare * (1 - discount[idx])


def simulate(units: int, seed: int):
    """Returns (riders, trips, truth) as pandas frames and a dict outcome -> truths."""
    rng = np.random.default_rng(seed)
    district, commute, rate, fare_median = _latent(rng, units)
    rider_id = np.arange(1, units + 1)
    n_months = len(MONTHS)
    base = rng.poisson(np.outer(rate, SEASON))  # riders x months, world without a pass
    pre_trips = base[:, PRE].sum(axis=1)
    p = _takeup(pre_trips, commute, district)
    treated = rng.random(units) < p
    late = ~treated & (rng.random(units) < 0.03)  # buy in August 2026: controls here
    buy_day = 1 + np.floor(rng.random(units) * 31).astype(int)
    bought = np.full(units, np.datetime64("NaT"), dtype="datetime64[D]")
    bought[treated] = np.datetime64("2026-03-01") + (buy_day[treated] - 1)
    bought[late] = np.datetime64("2026-08-01") + (buy_day[late] - 1)
    tau = _tau(pre_trips)
    extra = np.zeros_like(base)
    extra[treated, POST] = rng.poisson(np.repeat(tau[treated, None], 3, axis=1))

    # base trips: fares drawn once, paid at pass price by the treated from April on (the March
    # trips after purchase stay at standard fare: outside every window, so no matter)
    r = np.repeat(np.arange(units), n_months)
    m = np.tile(np.arange(n_months), units)
    pass_month = (treated[r] & (m >= POST.start)).astype(float) * DISCOUNT
    rows_b = _trip_rows(rng, r, m, base.ravel(), fare_median[r], pass_month)
    rows_e = _trip_rows(rng, r, m, extra.ravel(), fare_median[r], np.full(len(r), DISCOUNT))
    trips = pd.DataFrame(
        {
            "rider_id": rider_id[np.concatenate([rows_b[0], rows_e[0]])],
            "started_at": np.concatenate([rows_b[1], rows_e[1]]),
            "fare": np.round(np.concatenate([rows_b[3], rows_e[3]]), 2),
        }
    ).sort_values(["started_at", "rider_id"], kind="stable")
    trips.insert(0, "trip_id", np.arange(1, len(trips) + 1))

    # sample truth: both potential outcomes of the cohort over the post window
    in_post = (MONTHS.values[POST.start] <= rows_b[1]) & (rows_b[1] < np.datetime64("2026-07-01"))
    cohort = np.flatnonzero(treated)
    is_t_b = treated[rows_b[0]] & in_post
    fare0 = np.bincount(rows_b[0][is_t_b], weights=rows_b[2][is_t_b], minlength=units)
    fare1 = fare0 * (1 - DISCOUNT) + np.bincount(rows_e[0], weights=rows_e[3], minlength=units)
    trips0 = base[:, POST].sum(axis=1)
    trips1 = trips0 + extra[:, POST].sum(axis=1)
    act0 = base[:, JUNE] > 0
    act1 = (base[:, JUNE] + extra[:, JUNE]) > 0
    c = cohort
    sample = {
        "post_trips": float(np.mean(trips1[c] - trips0[c])),
        "post_fare": float(np.mean(fare1[c] - fare0[c])),
        "fare_per_trip": float(fare1[c].sum() / trips1[c].sum() - fare0[c].sum() / trips0[c].sum()),
        "active_last_month": float(np.mean(act1[c].astype(float) - act0[c])),
    }
    expected = _effect(_expected(rate[c], fare_median[c], tau[c]), np.ones(len(c)))

    # the controls (every rider not in the cohort) in both worlds: realised, and expected
    k = np.flatnonzero(~treated)
    is_c_b = ~treated[rows_b[0]] & in_post
    fare0_k = np.bincount(rows_b[0][is_c_b], weights=rows_b[2][is_c_b], minlength=units)[k]
    trips1_k, fare1_k, act1_k = _control_pass_world(seed, k, tau, fare_median, trips0, fare0_k, base[:, JUNE])

    def realised(t0, t1, f0, f1, a0, a1):
        return {
            "post_trips": float(np.mean(t1 - t0)),
            "post_fare": float(np.mean(f1 - f0)),
            "fare_per_trip": float(f1.sum() / t1.sum() - f0.sum() / t0.sum()),
            "active_last_month": float(np.mean(a1.astype(float) - a0)),
        }

    sample_c = realised(trips0[k], trips1_k, fare0_k, fare1_k, act0[k], act1_k)
    sample_e = realised(
        np.concatenate([trips0[c], trips0[k]]), np.concatenate([trips1[c], trips1_k]),
        np.concatenate([fare0[c], fare0_k]), np.concatenate([fare1[c], fare1_k]),
        np.concatenate([act0[c], act0[k]]), np.concatenate([act1[c], act1_k]),
    )
    ex_all = _expected(rate, fare_median, tau)
    expected_c = _effect({key: v[k] for key, v in ex_all.items()}, np.ones(len(k)))
    expected_e = _effect(ex_all, np.ones(units))
    unit_truth = pd.DataFrame({"rider_id": rider_id, "treated": treated.astype(int), **ex_all})
    population = population_truth()
    truth = {
        o: dict(
            expected_att=expected[o], sample_att=sample[o], population_att=population["att"][o],
            expected_atc=expected_c[o], sample_atc=sample_c[o], population_atc=population["atc"][o],
            expected_ate=expected_e[o], sample_ate=sample_e[o], population_ate=population["ate"][o],
        )
        for o in OUTCOMES
    }

    signup = np.datetime64("2023-01-01") + rng.integers(0, 900, units).astype("timedelta64[D]")
    riders = pd.DataFrame(
        {
            "rider_id": rider_id,
            "home_district": np.array([d[0] for d in DISTRICTS])[district],
            "commute_km": commute,
            "signup_date": signup,
            "pass_bought_on": bought,
        }
    )
    return riders, trips, truth, unit_truth


def build_commuter(out: Path, units: int, seed: int, threads: int | None = None) -> tuple[Path, dict]:
    """A fresh commuter-pass database in out/ with the spec beside it; returns (spec path, truth)."""
    out.mkdir(parents=True, exist_ok=True)
    database = out / DATABASE
    database.unlink(missing_ok=True)
    riders, trips, truth, unit_truth = simulate(units, seed)
    truth_df = pd.DataFrame([dict(outcome=o, **t) for o, t in truth.items()])
    con = duckdb.connect(str(database), config={"threads": threads} if threads else {})
    try:
        con.execute("CREATE TABLE riders AS SELECT rider_id, home_district, commute_km, CAST(signup_date AS DATE) AS signup_date, CAST(pass_bought_on AS DATE) AS pass_bought_on FROM riders")
        con.execute("CREATE TABLE trips AS SELECT trip_id, rider_id, CAST(started_at AS TIMESTAMP) AS started_at, fare FROM trips")
        con.execute("CREATE TABLE commuter_truth AS SELECT * FROM truth_df")
        con.execute("CREATE TABLE commuter_unit_truth AS SELECT * FROM unit_truth")
    finally:
        con.close()
    spec_path = out / SPEC.name
    shutil.copyfile(SPEC, spec_path)
    return spec_path, truth
