"""The family-wise threshold from the reference's own null distribution (ergodex.nullfloor)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps
from scipy.stats import mstats

from ergodex import nullfloor


def test_harrell_davis_quantile_matches_scipy():
    # reference implementation: scipy.stats.mstats.hdquantiles (Harrell & Davis 1982)
    rng = np.random.default_rng(1)
    for n in (5, 40, 301):
        x = rng.lognormal(size=n)
        for q in (0.5, 0.9, 0.95):
            expected = float(mstats.hdquantiles(x, prob=[q])[0])
            assert nullfloor.harrell_davis_quantile(x, q) == pytest.approx(expected, rel=1e-10)


def test_harrell_davis_quantile_with_infinite_replicates():
    x = np.array([1.0, 1.2, 1.4, np.inf])
    # the top order statistic carries under half the weight of the 0.5 quantile: finite
    assert math.isfinite(nullfloor.harrell_davis_quantile(x, 0.5))
    assert nullfloor.harrell_davis_quantile(np.full(5, np.inf), 0.95) == math.inf


@pytest.mark.parametrize("k", [1, 3, 12, 48])
def test_threshold_of_independent_rows_is_the_quantile_of_their_maximum(k):
    # k iid rows with CDF F: the maximum has CDF F^k, so its 1 − α quantile is
    # F⁻¹((1 − α)^(1/k)) (order statistics; David & Nagaraja, Order Statistics, §2.1).
    # Rows here are lognormal(0, 0.3), F⁻¹ from scipy.stats.lognorm.
    rng = np.random.default_rng(10 + k)
    alpha, n_rep = 0.05, 20_000
    ratios = rng.lognormal(0.0, 0.3, size=(n_rep, k))
    expected = sps.lognorm(0.3).ppf((1 - alpha) ** (1.0 / k))
    got = nullfloor.quantile_of_largest(ratios, alpha)
    # sampling error of a 95 % quantile from 20 000 draws: sd ≈ sqrt(p(1−p)/n)/f(q) ≈ 0.5 %
    assert got == pytest.approx(expected, rel=0.03)


def test_threshold_grows_with_the_number_of_independent_rows():
    rng = np.random.default_rng(7)
    ratios = rng.lognormal(0.0, 0.3, size=(20_000, 48))
    t = [nullfloor.quantile_of_largest(ratios[:, :k], 0.05) for k in (1, 3, 12, 48)]
    assert all(a < b for a, b in zip(t, t[1:]))


@pytest.mark.parametrize("k", [2, 15, 48])
def test_perfectly_correlated_rows_give_the_single_row_quantile(k):
    # k copies of one row: the maximum is that row, so the threshold is F⁻¹(1 − α)
    rng = np.random.default_rng(20 + k)
    one = rng.lognormal(0.0, 0.3, size=(20_000, 1))
    ratios = np.repeat(one, k, axis=1)
    expected = sps.lognorm(0.3).ppf(0.95)  # scipy.stats.lognorm
    assert nullfloor.quantile_of_largest(ratios, 0.05) == pytest.approx(expected, rel=0.03)
    assert nullfloor.quantile_of_largest(ratios, 0.05) == pytest.approx(
        nullfloor.quantile_of_largest(one, 0.05), rel=1e-12
    )


def test_block_bootstrap_draws_contiguous_blocks_of_one_piece():
    rng = np.random.default_rng(3)
    n, L, block = 5, 200, 30
    # every sample is tagged with its piece and its position
    pieces = np.stack([np.column_stack([np.full(L, p), np.arange(L)]) for p in range(n)]).astype(
        float
    )
    out = nullfloor.block_bootstrap(pieces, 7, 150, block, rng)
    assert out.shape == (7, 150, 2)
    for piece in out:
        for s in range(0, 150, block):
            seg = piece[s : s + block]
            assert np.all(seg[:, 0] == seg[0, 0])  # one piece per block
            assert np.all(np.diff(seg[:, 1]) == 1)  # consecutive samples


def test_block_bootstrap_keeps_the_autocorrelation_within_blocks():
    # AR(1) with φ = 0.9: lag-1 autocorrelation φ (Box & Jenkins, Time Series Analysis, §3.2)
    rng = np.random.default_rng(5)
    phi, L = 0.9, 20_000
    x = np.empty(L)
    x[0] = rng.normal() / math.sqrt(1 - phi**2)
    e = rng.normal(size=L)
    for i in range(1, L):
        x[i] = phi * x[i - 1] + e[i]
    out = nullfloor.block_bootstrap(x.reshape(4, L // 4, 1), 4, L // 4, 400, rng)
    y = out.ravel() - out.mean()
    lag1 = float(np.dot(y[:-1], y[1:]) / np.dot(y, y))
    # joins touch 1/400 of the products; sampling sd of r1 ≈ sqrt((1−φ²)/N) ≈ 0.003
    assert lag1 == pytest.approx(phi, abs=0.015)


def test_block_length_covers_several_lag_windows_within_a_piece():
    assert nullfloor.block_length(10_000, 50) == nullfloor.BLOCK_LAGS * 50
    assert nullfloor.block_length(100, 50) == 100  # never longer than a piece


def test_null_threshold_of_a_known_null_matches_its_distribution():
    # A score whose null distribution is known: each row is the ratio of the model groups' mean
    # square to the reference's, for white Gaussian noise. With n_model·pool·L and n·L samples
    # the ratio is F-distributed (Fisher; scipy.stats.f), one row per variable, independent.
    rng = np.random.default_rng(11)
    n, L, n_vars, groups, pool = 8, 64, 6, 4, 2
    pieces = rng.normal(size=(n, L, n_vars))

    def prepare(model):
        return np.mean(model**2, axis=1)  # mean square per pool group and variable

    def score(reference, prepared, chosen):
        return np.mean(prepared[chosen], axis=0) / np.mean(reference**2, axis=(0, 1))

    nt = nullfloor.NullThreshold(false_reject_rate=0.05, n_replicates=400, seed=2)
    nt.fit(pieces, prepare, score, n_model_groups=groups, pool=pool, max_lag_samples=1)
    assert nt.row_ratios_.shape == (400, n_vars)
    assert nt.threshold_ == nt.quantile_  # no floor
    # the bootstrap draws from the empirical distribution of the pieces, whose fourth moment is
    # that of the normal only within sampling error: compare with the F quantile loosely
    d1, d2 = groups * pool * L, n * L
    expected = sps.f(d1, d2).ppf(0.95 ** (1 / n_vars))
    assert nt.quantile_ == pytest.approx(expected, rel=0.08)
    floored = nullfloor.NullThreshold(n_replicates=50, floor=10.0).fit(
        pieces, prepare, score, n_model_groups=groups, pool=pool, max_lag_samples=1
    )
    assert floored.threshold_ == 10.0 and floored.quantile_ < 10.0
    d = floored.to_dict()
    assert d["false_reject_rate"] == 0.05 and d["floor"] == 10.0 and d["replicates"] == 50


def test_null_threshold_refuses_bad_settings():
    pieces = np.zeros((4, 10, 1))
    with pytest.raises(ValueError, match="false_reject_rate"):
        nullfloor.NullThreshold(false_reject_rate=1.5).fit(
            pieces,
            lambda m: m,
            lambda a, b, c: np.ones(1),
            n_model_groups=1,
            pool=1,
            max_lag_samples=1,
        )
