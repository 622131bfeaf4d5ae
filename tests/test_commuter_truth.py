"""The truths of benchmarks/commuter_sim.py (the calibration's second simulated bike-share) for the
effect on the treated, on the controls and on everyone: the identities they must satisfy by the
definition of a mean over a group, and the realised effects against their expectations."""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import commuter_sim  # noqa: E402

UNITS, SEED = 4000, 11


@pytest.fixture(scope="module")
def simulated():
    riders, trips, truth, unit_truth = commuter_sim.simulate(UNITS, SEED)
    return riders, trips, truth, unit_truth


def test_every_estimand_has_its_three_truths(simulated):
    _, _, truth, _ = simulated
    for outcome in commuter_sim.OUTCOMES:
        for estimand in ("att", "atc", "ate"):
            for kind in ("expected", "sample", "population"):
                assert math.isfinite(truth[outcome][f"{kind}_{estimand}"]), (outcome, kind, estimand)


def test_truths_are_the_group_means_of_the_unit_expectations(simulated):
    """expected_* is the mean of E[Y(1)] - E[Y(0)] over the group's rows of commuter_unit_truth
    (the ratio outcome: ratio of the group's sums in each world, then the difference), and the
    effect on everyone is the size-weighted mix of the two groups' (linear outcomes)."""
    riders, _, truth, u = simulated
    assert len(u) == UNITS and u.treated.sum() == riders.pass_bought_on.between("2026-03-01", "2026-03-31").sum()
    groups = {"att": u[u.treated == 1], "atc": u[u.treated == 0], "ate": u}
    for estimand, g in groups.items():
        assert truth["post_trips"][f"expected_{estimand}"] == pytest.approx(np.mean(g.trips1 - g.trips0), rel=1e-12)
        assert truth["post_fare"][f"expected_{estimand}"] == pytest.approx(np.mean(g.fare1 - g.fare0), rel=1e-12)
        assert truth["active_last_month"][f"expected_{estimand}"] == pytest.approx(np.mean(g.active1 - g.active0), rel=1e-12)
        ratio = g.fare1.sum() / g.trips1.sum() - g.fare0.sum() / g.trips0.sum()
        assert truth["fare_per_trip"][f"expected_{estimand}"] == pytest.approx(ratio, rel=1e-12)
    n_t = int(u.treated.sum())
    for outcome in ("post_trips", "post_fare", "active_last_month"):
        for kind in ("expected", "sample"):
            t = truth[outcome]
            mix = (n_t * t[f"{kind}_att"] + (UNITS - n_t) * t[f"{kind}_atc"]) / UNITS
            assert t[f"{kind}_ate"] == pytest.approx(mix, rel=1e-9, abs=1e-12), (outcome, kind)
    # the effect grows with pre-period trips and the controls ride less: a smaller effect on them
    assert truth["post_trips"]["expected_atc"] < truth["post_trips"]["expected_att"]


def test_realised_control_effect_on_trips_is_near_its_expectation(simulated):
    """A control's realised extra trips are Poisson(3 tau_i) (commuter_sim: tau_i extra trips a
    month over three months), so the sample ATC of post_trips has SE sqrt(mean(3 tau) / n_c)
    around the expected ATC (Poisson variance = mean); 4 SE, common practice."""
    _, _, truth, u = simulated
    c = u[u.treated == 0]
    mean_extra = float(np.mean(c.trips1 - c.trips0))
    se = math.sqrt(mean_extra / len(c))
    t = truth["post_trips"]
    assert abs(t["sample_atc"] - t["expected_atc"]) < 4 * se
    assert t["sample_atc"] != t["expected_atc"]  # drawn, not copied


def test_population_truths_weight_the_take_up_probability():
    """population_truth on a small draw against the same weighted means computed here: the
    treated weighted by the take-up probability p, the controls by 1 - p, everyone by 1."""
    n, seed = 20_000, 5
    got = commuter_sim.population_truth(n, seed)
    rng = np.random.default_rng(seed)
    district, commute, rate, fare_median = commuter_sim._latent(rng, n)
    pre = rng.poisson(rate * commuter_sim.SEASON[commuter_sim.PRE].sum())
    p = commuter_sim._takeup(pre, commute, district)
    ex = commuter_sim._expected(rate, fare_median, commuter_sim._tau(pre))
    for estimand, w in (("att", p), ("atc", 1 - p), ("ate", np.ones(n))):
        assert got[estimand]["post_trips"] == pytest.approx(np.average(ex["trips1"] - ex["trips0"], weights=w), rel=1e-12)
        ratio = np.sum(w * ex["fare1"]) / np.sum(w * ex["trips1"]) - np.sum(w * ex["fare0"]) / np.sum(w * ex["trips0"])
        assert got[estimand]["fare_per_trip"] == pytest.approx(ratio, rel=1e-12)
    assert got["att"] == commuter_sim.population_att(n, seed)
