"""Subclasses on the propensity score chosen from the data (matching.bins not given): each final
subclass must satisfy the stopping rule, checked here from the rows with scipy's two-sample t
statistic (pooled variance, scipy.stats.ttest_ind(equal_var=True)): either the score and every
numeric feature of the propensity model are balanced (|t| <= 1.96; the splitting rule of Imbens &
Rubin 2015, ch. 17, recalled, extended to the features), or no split at the median leaves 3
treated, 3 control and (features + 2) units on each side.

Row-level reads of the work tables happen here, in the test, only to check the SQL."""

from __future__ import annotations

import shutil

import duckdb
import numpy as np
import pytest
from scipy import stats

from sqlmatch import api
from sqlmatch.matching import score_bins
from sqlmatch.spec import parse_spec

from test_propensity import demo_score_spec


@pytest.fixture(scope="module")
def blocked(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("score_blocks")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    spec = parse_spec(demo_score_spec(folder), source_path=folder / "study.toml")
    assert spec.matching.bins is None  # the default: chosen from the data
    results = api.run(spec)
    with duckdb.connect(str(folder / "bikeshare.duckdb"), read_only=True) as con:
        strata = con.execute("SELECT * FROM sqlmatch.annual_pass_score_strata").df()
        scores = con.execute("SELECT * FROM sqlmatch.annual_pass_scores").df()
    return spec, results, strata, scores


def splittable(block, features, min_units) -> bool:
    med = np.sort(block.score.to_numpy())[(len(block) + 1) // 2 - 1]
    for low in (block.score <= med, block.score < med):
        sides = [block[low], block[~low]]
        if all((s.treated == 1).sum() >= score_bins.MIN_GROUP and (s.treated == 0).sum() >= score_bins.MIN_GROUP and len(s) >= min_units for s in sides):
            return True
    return False


def test_every_subclass_is_balanced_or_too_small_to_split(blocked):
    spec, results, strata, scores = blocked
    features = [n for n in spec.propensity.features if not spec.feature(n).categorical]
    min_units = len(spec.propensity.features) + 2
    balanced = 0
    for _, block in strata.groupby("score_bin"):
        t, c = block[block.treated == 1], block[block.treated == 0]
        if len(t) < 2 or len(c) < 2:
            continue
        tstats = [stats.ttest_ind(t[v], c[v], equal_var=True).statistic for v in ["score", *features]]
        ok = all(abs(x) <= score_bins.T_MAX or not np.isfinite(x) for x in tstats)
        balanced += ok
        assert ok or not splittable(block, features, min_units), (block.score_bin.iloc[0], tstats)
    assert balanced > 0
    # the data split the sample (one subclass at the start), and the run reports how many
    assert results.matching.strata == strata.groupby("score_bin").treated.agg(lambda g: 0 < g.sum() < len(g)).sum()
    assert results.matching.strata > 1


def test_common_support_drops_units_outside_the_overlap(blocked):
    spec, results, strata, scores = blocked
    s = scores.dropna(subset=["score"])
    low = max(s[s.treated == 1].score.min(), s[s.treated == 0].score.min())
    high = min(s[s.treated == 1].score.max(), s[s.treated == 0].score.max())
    inside = s[(s.score >= low) & (s.score <= high)]
    assert sorted(strata.unit_key) == sorted(inside.unit_key)


def pooled_t(strata, v) -> float:
    """The pooled difference of the subclasses holding both groups, ATT weights n_T,s / n_T, over
    its standard error (the stratified difference in means and its variance, Imbens & Rubin 2015,
    ch. 17, recalled), from the rows with numpy."""
    d, var, n1 = 0.0, 0.0, 0
    for _, block in strata.groupby("score_bin"):
        t, c = block[block.treated == 1][v].to_numpy(float), block[block.treated == 0][v].to_numpy(float)
        if len(t) and len(c):
            n1 += len(t)
            d += len(t) * (t.mean() - c.mean())
            var += len(t) ** 2 * ((t.var(ddof=1) if len(t) > 1 else 0.0) / len(t) + (c.var(ddof=1) if len(c) > 1 else 0.0) / len(c))
    return d / np.sqrt(var)


def test_pooled_imbalance_is_split_away_where_the_sizes_allow(blocked):
    # Differences below 1.96 in every subclass can share a sign and add up: while the pooled
    # difference on a variable exceeds 1.96 of its SE, every subclass pushing it that way is split
    # too, until no such subclass can be split.
    spec, results, strata, scores = blocked
    features = [n for n in spec.propensity.features if not spec.feature(n).categorical]
    min_units = len(spec.propensity.features) + 2
    for v in ["score", *features]:
        z = pooled_t(strata, v)
        if abs(z) <= score_bins.T_MAX:
            continue
        for _, block in strata.groupby("score_bin"):
            t, c = block[block.treated == 1], block[block.treated == 0]
            if len(t) >= 2 and len(c) >= 2 and (t[v].mean() - c[v].mean()) * z > 0:
                assert not splittable(block, features, min_units), (v, z, block.score_bin.iloc[0])
