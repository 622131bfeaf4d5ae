"""Coarsened exact matching: automatic cut points computed in SQL, and the NSW check."""

from __future__ import annotations

import math
import shutil
import tomllib

import duckdb
import numpy as np
import pytest

from sqlmatch import api
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from nsw import EXPERIMENTAL_INTERVAL, load_nsw, nsw_spec


def run_demo_with(demo_dir, folder, matching):
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(folder / "bikeshare.duckdb")
    raw["matching"] = matching
    results = api.run(parse_spec(raw))
    with duckdb.connect(str(folder / "bikeshare.duckdb"), read_only=True) as con:
        rows = con.execute(
            "SELECT m.unit_key, m.pre_minutes, c.pre_minutes__bin AS bin FROM sqlmatch.annual_pass_measures m "
            "JOIN sqlmatch.annual_pass_coarsened c USING (unit_key)"
        ).df()
    return results, rows


def test_quantile_bins_follow_numpy_order_statistics(demo_dir, tmp_path):
    """Cut k = the order statistic at position floor((n-1) k / K) (numpy.sort); bin = number of cuts <= x."""
    K = 6
    results, rows = run_demo_with(demo_dir, tmp_path, {"on": ["pre_minutes", "age_band"], "coarsen": "quantiles", "coarsen_bins": K})
    values = np.sort(rows.pre_minutes.to_numpy())
    n = len(values)
    cuts = [values[int(math.floor((n - 1) * k / K))] for k in range(1, K)]
    expected = np.searchsorted(np.array(cuts), rows.pre_minutes.to_numpy(), side="right")
    np.testing.assert_array_equal(rows.bin.to_numpy(), expected)
    assert results.matching.n_treated_matched > 0


def test_sturges_bins_follow_the_rule(demo_dir, tmp_path):
    """Sturges (1926): ceil(log2 n + 1) equal-width bins over the range; the maximum goes to the last bin."""
    _, rows = run_demo_with(demo_dir, tmp_path, {"on": ["pre_minutes"], "coarsen": "sturges"})
    x = rows.pre_minutes.to_numpy()
    k = math.ceil(math.log2(len(x)) + 1)
    width = (x.max() - x.min()) / k
    expected = np.minimum(np.floor((x - x.min()) / width), k - 1).astype(int)
    np.testing.assert_array_equal(rows.bin.to_numpy(), expected)


def test_nsw_coarsened_exact_matching(tmp_path):
    """NSW treated vs CPS comparison men (Dehejia & Wahba 1999, Table 3). Cut points fixed on
    substantive grounds before looking at the outcome: age groups, schooling levels (primary,
    junior, high school, some college, degree), earnings none / low / middle / high, exact on the
    0/1 attributes. The ATT on 1978 earnings lies inside the experimental interval [479, 3110];
    the unmatched difference (-8,498) does not. (Automatic coarsening does worse here: Sturges
    bins gave 3,628 and quartiles 613 when this test was written; see the closing notes.)"""
    db = tmp_path / "nsw.duckdb"
    load_nsw(str(db))
    cuts = {
        "age": [20, 25, 30, 35, 45],
        "educ": [7, 9, 12, 13, 16],
        "black": [0.5],
        "hisp": [0.5],
        "marr": [0.5],
        "nodegree": [0.5],
        "re74": [1, 5000, 10000],
        "re75": [1, 5000, 10000],
    }
    raw = nsw_spec(str(db), "coarsened_exact", on=list(cuts), cut_points=cuts)
    results = api.run(parse_spec(raw))
    effect = results.effect("earnings_after")
    low, high = EXPERIMENTAL_INTERVAL
    assert low <= effect.estimate <= high
    assert not low <= effect.naive.estimate <= high
    assert results.imbalance["l1_after"] < results.imbalance["l1_before"]
