"""Statistics at their edges: tiny hand-computed inputs, boundaries of the allowed settings, and
the messages of refused input (found by mutation testing, ``benchmarks/mutation.py``)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from ergodex import stats
from ergodex.exceptions import DataError, SettingsError
from ergodex.stats import _sokal_tau


def test_histogram_of_single_values_and_of_nothing():
    edges = np.array([0.0, 1.0, 2.0])
    np.testing.assert_array_equal(stats.histogram([0.5], edges), [0, 1, 0, 0])
    np.testing.assert_array_equal(stats.histogram([np.nan, np.inf], edges), [0, 0, 0, 0])
    # integer input and the left edge: x == edges[0] is inside the first bin
    np.testing.assert_array_equal(stats.histogram(np.array([0, 2]), edges), [0, 0.5, 0.5, 0])


def test_joint_histogram_by_hand():
    ex, ey = np.array([0.0, 1.0]), np.array([0, 10])  # one bin each, integer edges
    joint = stats.joint_histogram(
        [0.5, 1.0, -1.0, 3.0, np.nan], [5.0, 10.0, 5.0, np.nan, 5.0], ex, ey
    )
    # kept pairs: (0.5, 5) and (1, 10) in the bin, (-1, 5) below x; pairs with a NaN are dropped
    np.testing.assert_allclose(joint, [[0, 1 / 3, 0], [0, 2 / 3, 0], [0, 0, 0]])
    assert stats.joint_histogram([0.5], [5.0], ex, ey)[1, 1] == 1.0
    assert np.all(stats.joint_histogram([np.nan], [1.0], ex, ey) == 0.0)
    with pytest.raises(DataError, match="x and y must have the same length; got 2 and 1"):
        stats.joint_histogram([1.0, 2.0], [1.0], ex, ey)


def test_histogram_edges_bins_and_freedman_diaconis_by_hand():
    x = np.arange(10.0)
    np.testing.assert_array_equal(stats.histogram_edges(x, 1), [0.0, 9.0])  # one bin allowed
    # FD for [0, 0, 1, 1]: IQR 1, width 2 · 1 · 4^(-1/3) ≈ 1.26 > range 1 → a single bin
    np.testing.assert_array_equal(stats.histogram_edges([0.0, 0.0, 1.0, 1.0], "fd"), [0.0, 1.0])
    rng = np.random.default_rng(71)
    y = rng.normal(size=5000)
    # reference library: numpy's 'fd' rule, the same width and bin count
    assert stats.histogram_edges(y, "fd").size == np.histogram_bin_edges(y, bins="fd").size
    for bad in (0, 2.5, True):
        with pytest.raises(
            SettingsError, match=f"bins must be a positive integer or 'fd'; got {bad!r}"
        ):
            stats.histogram_edges(x, bad)
    with pytest.raises(DataError, match="histogram reference has no finite values"):
        stats.histogram_edges([np.nan])
    with pytest.raises(DataError, match="histogram reference is constant"):
        stats.histogram_edges([2.0, 2.0, np.nan])


def test_distance_refusals_name_the_problem():
    for distance in (stats.wasserstein1, stats.ks_distance):
        with pytest.raises(DataError, match="^first sample has no finite values$"):
            distance([np.nan], [1.0])
        with pytest.raises(DataError, match="^second sample has no finite values$"):
            distance([1.0], [])
    with pytest.raises(DataError, match="histograms must have 3 entries for 2 edges"):
        stats.wasserstein1_histogram([0.5, 0.5], [0.5, 0.5], [0.0, 1.0])
    with pytest.raises(DataError, match="histograms must have 3 entries"):
        stats.wasserstein1_histogram([0.5, 0.5, 0.0], [1.0, 0.0], [0.0, 1.0])
    with pytest.raises(DataError, match="same shape"):
        stats.hellinger([1.0, 0.0], [1.0])
    for p, q in (
        ([0.0, 0.0], [1.0, 1.0]),
        ([1.0, 1.0], [0.0, 0.0]),
        ([2.0, -1.0], [1.0, 1.0]),
        ([1.0, 1.0], [2.0, -1.0]),
    ):
        with pytest.raises(
            DataError, match="^distributions must be non-negative with positive total mass$"
        ):
            stats.hellinger(p, q)
    with pytest.raises(DataError, match="sample has no finite values"):
        stats.quantile_function([np.nan], 4)


def test_hellinger_normalises_each_distribution():
    p, q = np.array([0.2, 0.8]), np.array([0.6, 0.4])
    # definition with normalised inputs: H² = 1 − Σ √(p q) (Hellinger 1909)
    expected = math.sqrt(1 - (math.sqrt(0.12) + math.sqrt(0.32)))
    assert stats.hellinger(2 * p, 3 * q) == pytest.approx(expected, rel=1e-12)


def test_ks_distance_with_ties_matches_scipy():
    rng = np.random.default_rng(72)
    u, v = rng.integers(0, 5, 60).astype(float), rng.integers(0, 6, 45).astype(float)
    # reference library: scipy.stats.ks_2samp (ties between the samples are frequent here)
    assert stats.ks_distance(u, v) == pytest.approx(scipy.stats.ks_2samp(u, v).statistic, abs=1e-12)


def test_any_array_like_is_one_run():
    pd = pytest.importorskip("pandas")
    x = np.random.default_rng(77).normal(size=200)
    # a pandas Series is one run (array_like), not a list of runs
    np.testing.assert_allclose(
        stats.autocorrelation(pd.Series(x), 5), stats.autocorrelation(x, 5), atol=0
    )


def test_quantile_function_with_fewer_points_than_samples():
    x = np.arange(10.0)[::-1]
    # midpoints 1/8, 3/8, 5/8, 7/8 → inverted CDF: order statistics 2, 4, 7, 9 (1-based)
    np.testing.assert_array_equal(stats.quantile_function(x, 4), [1.0, 3.0, 6.0, 8.0])
    np.testing.assert_array_equal(stats.quantile_function([3.0], 3), [3.0, 3.0, 3.0])


def test_autocorrelation_lags_runs_and_refusals():
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    rng = np.random.default_rng(73)
    x = rng.normal(size=40)
    assert stats.autocorrelation([x], 0).tolist() == [1.0]  # a list of one 1-D run stays 1-D
    full = stats.autocorrelation(x, 39)  # the largest allowed lag
    # reference library: statsmodels acf (biased estimator, direct sums)
    np.testing.assert_allclose(full, tsa.acf(x, nlags=39, fft=False), atol=1e-12)
    # a given mean replaces the pooled mean: direct sums (Box, Jenkins & Reinsel §2.1.5)
    d = x - 0.5
    direct = np.array([np.sum(d[: 40 - k] * d[k:]) for k in range(4)])
    np.testing.assert_allclose(
        stats.autocorrelation(x, 3, mean=np.array([0.5])), direct / direct[0], atol=1e-12
    )
    for bad in (-1, 40):
        with pytest.raises(
            SettingsError,
            match=rf"max_lag must be in \[0, 39\] for runs of 40 "
            rf"samples; got {bad}",
        ):
            stats.autocorrelation(x, bad)
    with pytest.raises(
        DataError, match="^autocorrelation needs finite values; drop blown-up runs first$"
    ):
        stats.autocorrelation(np.array([1.0, np.nan, 2.0]), 1)
    with pytest.raises(DataError, match="^autocorrelation of a constant variable is undefined$"):
        stats.autocorrelation(np.ones(10), 2)
    with pytest.raises(DataError, match="^no runs given$"):
        stats.autocorrelation([], 1)
    with pytest.raises(DataError, match=r"different numbers of variables: \[1, 2\]"):
        stats.autocorrelation([np.zeros((5, 1)), np.zeros((5, 2))], 1)
    with pytest.raises(DataError, match=r"a run must be 1-D or 2-D .* got shape \(2, 2, 2\)"):
        stats.autocorrelation(np.zeros((2, 2, 2)), 1)


def test_sokal_window_by_hand():
    acf = np.array([1.0, 0.5, 0.25, 0.125] + [0.0] * 20)
    # 1 + 2 Σρ: 2, 2.5, 2.75, 2.75, ... ; with c = 4 the first lag W ≥ 4 · 2.75 = 11 is 11
    assert _sokal_tau(acf, 4.0) == (2.75, 11)
    # no lag satisfies the window rule: the whole sum and the last lag
    assert _sokal_tau(acf[:4], 5.0) == (2.75, 3)
    x = np.random.default_rng(74).normal(size=(300, 2))
    tau = stats.integrated_autocorrelation_time(x, 0.5)
    assert tau.shape == (2,)
    assert isinstance(stats.integrated_autocorrelation_time(x[:, 0], 0.5), float)
    # Sokal's 1 + 2Σρ in samples, halved and times dt (the docstring's convention)
    acf0 = stats.autocorrelation(x[:, 0])
    assert tau[0] == pytest.approx(0.5 * 0.5 * _sokal_tau(acf0, 5.0)[0], rel=1e-12)
    ess = stats.effective_sample_size(x, c=3.0)
    assert ess.shape == (2,)
    assert ess[0] == pytest.approx(300 / _sokal_tau(acf0, 3.0)[0], rel=1e-12)
    assert isinstance(stats.effective_sample_size(x[:, 0]), float)


def test_welch_psd_segment_limits():
    x = np.random.default_rng(75).normal(size=(2, 16))
    for nperseg in (2, 16):  # both ends of [2, n_samples]
        # reference library: scipy.signal.welch with its defaults
        np.testing.assert_allclose(
            stats.welch_psd(x, 0.5, nperseg)[1],
            scipy.signal.welch(x, fs=2.0, nperseg=nperseg)[1],
            rtol=1e-10,
        )
    for bad in (1, 17):
        with pytest.raises(SettingsError, match=rf"nperseg must be in \[2, 16\]; got {bad}"):
            stats.welch_psd(x, 0.5, bad)


def test_power_spectrum_weights_runs_by_their_number_of_segments():
    rng = np.random.default_rng(76)
    runs = [rng.normal(size=(300, 2)), rng.normal(size=(1000, 2))]
    freq, psd = stats.power_spectrum(runs, 0.1, nperseg=64)
    # reference library: scipy.signal.welch per run; half-overlapping segments: (n − 64)//32 + 1
    per_run = [scipy.signal.welch(r, fs=10.0, nperseg=64, axis=0)[1] for r in runs]
    weights = [(300 - 64) // 32 + 1, (1000 - 64) // 32 + 1]
    expected = (weights[0] * per_run[0] + weights[1] * per_run[1]) / sum(weights)
    np.testing.assert_allclose(psd, expected, rtol=1e-12)
    # an odd segment length: segments start every 63 − 63 // 2 = 32 samples (scipy's noverlap
    # is nperseg // 2); 315 samples give (315 − 63) // 32 + 1 = 8 segments
    odd = [runs[0][:315], runs[1]]
    per_run = [scipy.signal.welch(r, fs=10.0, nperseg=63, axis=0)[1] for r in odd]
    expected = (8 * per_run[0] + ((1000 - 63) // 32 + 1) * per_run[1]) / (8 + 30)
    np.testing.assert_allclose(stats.power_spectrum(odd, 0.1, nperseg=63)[1], expected, rtol=1e-12)
    assert stats.power_spectrum(runs[0][:4, 0], 1.0)[0].size == 3  # 4 samples: the shortest
    with pytest.raises(DataError, match="runs of 3 samples are too short for a spectrum"):
        stats.power_spectrum(runs[0][:3], 1.0)
    with pytest.raises(
        DataError, match="^power_spectrum needs finite values; drop blown-up runs first$"
    ):
        stats.power_spectrum(np.array([1.0, 2.0, np.nan, 4.0, 5.0]), 1.0)


def test_quantiles_levels_and_missing_values():
    x = np.array([[1.0, 4.0], [2.0, np.nan], [3.0, 6.0], [4.0, 8.0]])
    # numpy.quantile per column, NaN dropped in column 1 only (linear interpolation, def. 7)
    np.testing.assert_allclose(stats.quantiles(x, [0.5]), [[2.5, 6.0]])
    np.testing.assert_allclose(
        stats.quantiles(x[:, 0], (0.25, 0.75)), np.quantile(x[:, 0], [0.25, 0.75])
    )
    for bad in ([0.0], [1.0], [0.5, 1.5], [-0.1]):
        with pytest.raises(
            SettingsError, match="quantile levels must lie strictly between 0 and 1; got"
        ):
            stats.quantiles(x[:, 0], bad)
    with pytest.raises(DataError, match="sample has no finite values"):
        stats.quantiles(np.array([np.nan]))
    with pytest.raises(DataError, match="column 1 has no finite values"):
        stats.quantiles(np.array([[1.0, np.nan]]))


def test_exceedance_rates_on_a_short_series_by_hand():
    x = np.array([0.0, 2.0, 1.0, 2.0, 0.0])
    # above 1 (strictly): samples 2, 2 → fraction 2/5; the value equal to 1 is not beyond
    assert stats.exceedance_rate(x, 1.0) == pytest.approx(2 / 5)
    # up-crossings of 1: 0→2 and 1→2 → 2 starts over (5 − 1) · 0.5 = 2 time units
    assert stats.exceedance_rate(x, 1.0, dt=0.5) == pytest.approx(1.0)
    # below 1 (strictly): 0, 0 → 2/5; down-crossings: 2→0 once over 2 time units
    assert stats.exceedance_rate(x, 1.0, below=True) == pytest.approx(2 / 5)
    assert stats.exceedance_rate(x, 1.0, dt=0.5, below=True) == pytest.approx(0.5)
    assert isinstance(stats.exceedance_rate(x, 1.0), float)
    two = np.array([[0.0, 3.0], [2.0, np.nan], [3.0, 5.0]])
    # per column; NaN is not beyond and is left out of the count of samples
    np.testing.assert_allclose(stats.exceedance_rate(two, [1.0, 4.0]), [2 / 3, 1 / 2])
    one = np.array([[0.0, np.nan], [2.0, np.nan], [3.0, 5.0]])
    np.testing.assert_allclose(stats.exceedance_rate(one, [1.0, 4.0]), [2 / 3, 1.0])
    assert stats.exceedance_rate(np.array([0.0, 2.0]), 1.0, dt=1.0) == 1.0
    with pytest.raises(DataError, match="^an excursion rate needs at least two samples$"):
        stats.exceedance_rate(np.array([2.0]), 1.0, dt=1.0)
