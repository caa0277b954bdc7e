"""Statistics and distances checked against reference libraries and analytic results."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from ergodex import stats
from ergodex.exceptions import DataError, SettingsError


def _ou_path(rng, theta, dt, n, n_vars=1):
    """Exact discretisation of an OU process (an AR(1) with a = exp(-theta dt), unit variance)."""
    a = np.exp(-theta * dt)
    noise = rng.standard_normal((n, n_vars)) * np.sqrt(1 - a * a)
    noise[0] = rng.standard_normal(n_vars)  # start in the stationary law
    return scipy.signal.lfilter([1.0], [1.0, -a], noise, axis=0)


def test_wasserstein_matches_scipy():
    rng = np.random.default_rng(1)
    u = rng.normal(0, 1, 700)
    v = rng.gamma(2.0, 1.0, 1100)
    # reference library: scipy.stats.wasserstein_distance (exact 1-D W1, same definition)
    assert stats.wasserstein1(u, v) == pytest.approx(
        scipy.stats.wasserstein_distance(u, v), rel=1e-12
    )
    # a shift by c moves W1 by exactly c (analytic)
    assert stats.wasserstein1(u, u + 0.37) == pytest.approx(0.37, rel=1e-12)


def test_quantile_function_gives_exact_w1_for_equal_sizes():
    rng = np.random.default_rng(2)
    u, v = rng.normal(size=500), rng.laplace(size=500)
    qu, qv = stats.quantile_function(u, 500), stats.quantile_function(v, 500)
    # reference library: scipy.stats.wasserstein_distance; equal sizes -> mean |sorted u - sorted v|
    assert np.mean(np.abs(qu - qv)) == pytest.approx(
        scipy.stats.wasserstein_distance(u, v), rel=1e-12
    )


def test_histogram_wasserstein_matches_scipy_weighted():
    rng = np.random.default_rng(3)
    ref = rng.normal(size=2000)
    edges = stats.histogram_edges(ref, 20)
    p = stats.histogram(ref, edges)
    q = stats.histogram(rng.normal(0.5, 1.3, 3000), edges)
    support = np.concatenate([[edges[0]], 0.5 * (edges[1:] + edges[:-1]), [edges[-1]]])
    # reference library: scipy.stats.wasserstein_distance with weights on the bin support points
    expected = scipy.stats.wasserstein_distance(support, support, p, q)
    assert stats.wasserstein1_histogram(p, q, edges) == pytest.approx(expected, rel=1e-10)


def test_ks_matches_scipy():
    rng = np.random.default_rng(4)
    u, v = rng.normal(size=800), rng.normal(0.2, 1, 650)
    # reference library: scipy.stats.ks_2samp statistic
    assert stats.ks_distance(u, v) == pytest.approx(scipy.stats.ks_2samp(u, v).statistic, abs=1e-12)


def test_hellinger_identities():
    rng = np.random.default_rng(5)
    p, q = rng.random(12), rng.random(12)
    p, q = p / p.sum(), q / q.sum()
    # definition: H = ||sqrt p - sqrt q||_2 / sqrt 2 (Hellinger 1909), via scipy's euclidean
    # distance
    expected = scipy.spatial.distance.euclidean(np.sqrt(p), np.sqrt(q)) / np.sqrt(2)
    assert stats.hellinger(p, q) == pytest.approx(expected, rel=1e-10)
    assert stats.hellinger(p, p) == pytest.approx(0.0, abs=1e-7)
    assert stats.hellinger([1, 0], [0, 1]) == pytest.approx(1.0)


def test_histogram_counts_overflow_and_edges():
    edges = np.array([0.0, 1.0, 2.0])
    mass = stats.histogram([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0, 4.0, np.nan], edges)
    # under: -1; bin0: 0, 0.5; bin1: 1, 2 (right edge in the last bin); over: 3, 4
    np.testing.assert_allclose(mass, np.array([1, 2, 2, 2]) / 7)
    with pytest.raises(DataError, match="constant"):
        stats.histogram_edges(np.ones(10))
    with pytest.raises(SettingsError, match="bins"):
        stats.histogram_edges(np.arange(10.0), "sturges")


def test_freedman_diaconis_width():
    rng = np.random.default_rng(6)
    x = rng.normal(size=5000)
    edges = stats.histogram_edges(x, "fd")
    # reference library: numpy's 'fd' rule uses the same width 2 IQR n^(-1/3)
    np_edges = np.histogram_bin_edges(x, bins="fd")
    assert abs(edges.size - np_edges.size) <= 1


def test_joint_histogram_marginals():
    rng = np.random.default_rng(7)
    x, y = rng.normal(size=3000), rng.normal(size=3000)
    ex, ey = stats.histogram_edges(x[:1000], 10), stats.histogram_edges(y[:1000], 8)
    joint = stats.joint_histogram(x, y, ex, ey)
    assert joint.shape == (12, 10)
    # the marginals of the joint histogram are the one-dimensional histograms (definition)
    np.testing.assert_allclose(joint.sum(axis=1), stats.histogram(x, ex), atol=1e-12)
    np.testing.assert_allclose(joint.sum(axis=0), stats.histogram(y, ey), atol=1e-12)


def test_autocorrelation_matches_statsmodels():
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    rng = np.random.default_rng(8)
    x = _ou_path(rng, 0.5, 0.1, 3000, n_vars=2)
    ours = stats.autocorrelation(x, 60)
    for j in range(2):
        # reference library: statsmodels.tsa.stattools.acf (biased estimator, FFT)
        ref = tsa.acf(x[:, j], nlags=60, fft=True)
        np.testing.assert_allclose(ours[:, j], ref, atol=1e-10)
    assert stats.autocorrelation(x[:, 0], 10).shape == (11,)


def test_autocorrelation_pools_runs_without_crossing_boundaries():
    rng = np.random.default_rng(9)
    a, b = rng.normal(size=400), rng.normal(size=300)
    pooled = stats.autocorrelation([a, b], 5)
    mu = np.concatenate([a, b]).mean()

    # direct sum of lagged products within each run (definition, Box, Jenkins & Reinsel §2.1.5)
    def lagged(r, k):
        d = r - mu
        return np.sum(d[: d.size - k] * d[k:])

    direct = np.array([lagged(a, k) + lagged(b, k) for k in range(6)])
    np.testing.assert_allclose(pooled, direct / direct[0], atol=1e-12)


def test_ou_integrated_time_is_one_over_theta():
    rng = np.random.default_rng(10)
    theta, dt = 2.0, 0.02
    x = _ou_path(rng, theta, dt, 400_000)[:, 0]
    tau = stats.integrated_autocorrelation_time(x, dt)
    # analytic: OU autocorrelation exp(-theta t) integrates to 1/theta = 0.5. Sampling error of the
    # windowed estimate (Sokal 1997): sd/tau ≈ sqrt(2(2W+1)/N) with W ≈ 5·2τ/dt = 250 samples and
    # N = 4e5 -> 0.035; 4 sd = 0.14; the trapezoid rule's bias (dt θ)^2/12 is negligible.
    assert tau == pytest.approx(1 / theta, rel=0.14)
    ess = stats.effective_sample_size(x)
    assert ess == pytest.approx(x.size * dt * theta / 2, rel=0.14)


def test_power_spectrum_matches_welch_and_ou_lorentzian():
    rng = np.random.default_rng(11)
    theta, dt = 1.0, 0.05
    runs = [_ou_path(rng, theta, dt, 20_000)[:, 0] for _ in range(4)]
    freq, psd = stats.power_spectrum(runs, dt, nperseg=512)
    # reference library: scipy.signal.welch, averaged over equal-length runs
    ref = np.mean([scipy.signal.welch(r, fs=1 / dt, nperseg=512)[1] for r in runs], axis=0)
    np.testing.assert_allclose(psd, ref, rtol=1e-12)
    # analytic: the one-sided PSD of a unit-variance OU process is 4θ / (θ² + (2πf)²)
    lorentz = 4 * theta / (theta**2 + (2 * np.pi * freq) ** 2)
    band = (freq > 0.05) & (freq < 1.0)
    # 4 runs × ~77 half-overlapping segments each -> relative error per bin ≈ 1/sqrt(300·0.5) ≈ 8 %;
    # the band average over ~24 bins is far tighter, and Hann-window leakage is a few per cent here
    assert np.mean(psd[band] / lorentz[band]) == pytest.approx(1.0, abs=0.06)


def test_quantiles_and_exceedance_on_gaussian():
    rng = np.random.default_rng(12)
    x = rng.normal(size=(200_000, 2))
    q = stats.quantiles(x)
    # analytic: standard normal quantiles (scipy.stats.norm.ppf); sampling sd of a p-quantile is
    # sqrt(p(1-p)/n)/φ(q_p) (asymptotic normality of sample quantiles); tolerance 5 sd per level
    levels = np.array([0.01, 0.99, 0.999])
    expected = scipy.stats.norm.ppf(levels)
    sd = np.sqrt(levels * (1 - levels) / x.shape[0]) / scipy.stats.norm.pdf(expected)
    assert np.all(np.abs(q - expected[:, None]) < 5 * sd[:, None])
    rate = stats.exceedance_rate(x, q[1])
    np.testing.assert_allclose(
        rate, 0.01, atol=1e-6
    )  # fraction above the sample's own 99 % quantile
    # white noise: the chance that an excursion starts at a given step is p(1-p) (definition)
    starts = stats.exceedance_rate(x[:, 0], expected[1], dt=0.5)
    assert starts == pytest.approx(0.01 * 0.99 / 0.5, rel=0.1)  # 2000 events: sd ≈ 2.2 %


def test_logistic_map_invariant_density():
    rng = np.random.default_rng(13)
    x = rng.uniform(0.05, 0.95, 200)
    samples = []
    for k in range(1100):
        x = 4.0 * x * (1.0 - x)
        if k >= 100:
            samples.append(x.copy())
    sample = np.concatenate(samples)
    edges = np.linspace(0, 1, 21)
    mass = stats.histogram(sample, edges)[1:-1]
    # invariant density 1/(π sqrt(x(1-x))) (Ulam & von Neumann 1947); its CDF is
    # (2/π) arcsin(sqrt x)
    cdf = 2 / np.pi * np.arcsin(np.sqrt(edges))
    expected = np.diff(cdf)
    # at r = 4 lagged correlations of x vanish under the invariant law, so counts are nearly
    # binomial: 5 binomial sd per bin with n = 2e5
    tol = 5 * np.sqrt(expected * (1 - expected) / sample.size)
    assert np.all(np.abs(mass - expected) < tol)


def test_welch_psd_matches_scipy_on_many_series():
    rng = np.random.default_rng(14)
    x = rng.normal(size=(3, 2, 1000)).cumsum(axis=-1)
    for nperseg in (64, 101):
        f, p = stats.welch_psd(x, 0.1, nperseg)
        # reference library: scipy.signal.welch with its defaults (Hann, half overlap, constant
        # detrend)
        f_ref, p_ref = scipy.signal.welch(x, fs=10.0, nperseg=nperseg, axis=-1)
        np.testing.assert_allclose(f, f_ref, rtol=1e-12)
        np.testing.assert_allclose(p, p_ref, rtol=1e-10)
