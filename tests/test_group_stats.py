"""Group statistics assembled from per-piece parts equal the statistics of the whole group.

Each check lays a group's pieces end to end and computes the statistic directly (the way the
noise floor computed it before the parts existed), and where the statistic claims to equal a
reference library, compares with that library too.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from ergodex import group_stats as gs
from ergodex import stats
from ergodex.regimes import (
    RegimeSet,
    mean_residence_times,
    occupancy,
    transition_matrix,
)

ALL = (
    "histogram",
    "quantiles",
    "autocorrelation",
    "spectrum",
    "occupancy",
    "residence",
    "transitions",
)


def _ar1_pieces(rng, n_pieces=8, length=601, n_vars=2, phi=0.9, offset=50.0):
    """AR(1) pieces about a large offset (products about the wrong centre would lose digits)."""
    x = np.empty((n_pieces, length, n_vars))
    x[:, 0] = rng.normal(size=(n_pieces, n_vars))
    for t in range(1, length):
        x[:, t] = phi * x[:, t - 1] + rng.normal(size=(n_pieces, n_vars))
    return x + offset


def _regimes():
    return RegimeSet.from_dict(
        {
            "regime": [
                {"name": "high", "kind": "threshold", "rules": [{"variable": "a", "above": 51.0}]},
                {"name": "low", "kind": "threshold", "rules": [{"variable": "a", "below": 49.0}]},
            ]
        }
    )


def _groups(n_pieces=8, pool=4):
    groups = [tuple(c) for c in itertools.combinations(range(n_pieces), pool)][:30]
    groups.append((5, 2, 7, 0))  # another order
    return groups


def _direct(cat, max_lag, dt, nperseg, regimes):
    """Today's direct computation on the concatenated group (validation's former path)."""
    n_total = cat.shape[0]
    k = min(n_total, gs.MAX_QUANTILE_POINTS)
    idx = np.minimum(np.ceil((np.arange(k) + 0.5) / k * n_total).astype(int) - 1, n_total - 1)
    lab = regimes.classify(cat, ("a", "b"))
    nr = regimes.n_regimes
    return {
        "qf": np.sort(cat, axis=0)[np.maximum(idx, 0)],
        "quant": np.quantile(cat, stats.DEFAULT_QUANTILES, axis=0),
        "acf": stats.autocorrelation(cat, max_lag),
        "psd": stats.welch_psd(cat.T, dt, nperseg)[1].T,
        "occ": occupancy(lab, nr),
        "res": mean_residence_times(lab, dt, nr),
        "trans": transition_matrix(lab, nr),
    }


@pytest.mark.parametrize("nperseg", [64, 37])  # even and odd segments; 601 is no multiple
def test_groups_from_parts_equal_the_direct_computation(nperseg):
    rng = np.random.default_rng(11)
    pieces = _ar1_pieces(rng)
    groups = _groups()
    regimes = _regimes()
    got = gs.group_statistics(
        pieces,
        groups,
        statistics=ALL,
        max_lag=40,
        dt=0.5,
        nperseg=nperseg,
        regimes=regimes,
        variables=("a", "b"),
    )
    assert got.n == len(groups)
    for gi, g in enumerate(groups):
        want = _direct(np.concatenate([pieces[i] for i in g]), 40, 0.5, nperseg, regimes)
        # order statistics and regime counts are exact; sums differ only in rounding order
        np.testing.assert_array_equal(got.qf[gi], want["qf"])
        np.testing.assert_allclose(got.quant[gi], want["quant"], rtol=1e-14)
        np.testing.assert_allclose(got.acf[gi], want["acf"], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(got.psd[gi], want["psd"], rtol=1e-10)
        np.testing.assert_allclose(got.occ[gi], want["occ"], rtol=1e-14)
        np.testing.assert_allclose(got.res[gi], want["res"], rtol=1e-14)
        np.testing.assert_allclose(got.trans[gi], want["trans"], rtol=1e-14)


def test_shared_and_separate_order_statistics_agree_with_ties():
    # readings rounded to one decimal tie often, within and across pieces
    rng = np.random.default_rng(3)
    pieces = np.round(rng.normal(size=(6, 3000, 2)), 1)
    groups = [tuple(c) for c in itertools.combinations(range(6), 3)]
    ranks = np.unique(rng.integers(0, 9000, size=500))
    shared = gs._shared_order_stats(pieces, groups, ranks, 1)
    separate = gs._separate_order_stats(pieces, groups, ranks, 1)
    np.testing.assert_array_equal(shared, separate)
    direct = np.sort(np.concatenate([pieces[i] for i in groups[4]]), axis=0)[ranks]
    np.testing.assert_array_equal(shared[4], direct)


def test_groups_match_the_reference_libraries():
    signal = pytest.importorskip("scipy.signal")
    sps = pytest.importorskip("scipy.stats")
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    rng = np.random.default_rng(5)
    pieces = _ar1_pieces(rng, n_pieces=6, length=400)
    groups = [(0, 1, 2), (3, 4, 5), (2, 0, 4)]
    got = gs.group_statistics(
        pieces,
        groups,
        statistics=("histogram", "quantiles", "autocorrelation", "spectrum"),
        max_lag=25,
        dt=0.1,
        nperseg=50,
    )
    cats = [np.concatenate([pieces[i] for i in g]) for g in groups]
    for gi, cat in enumerate(cats):
        for j in range(2):
            # statsmodels acf: the biased estimator about the sample mean
            want_acf = tsa.acf(cat[:, j], nlags=25, fft=False)
            np.testing.assert_allclose(got.acf[gi, :, j], want_acf, rtol=1e-9, atol=1e-12)
            # scipy.signal.welch with its defaults (Hann, half overlap, constant detrend)
            _, want_psd = signal.welch(cat[:, j], fs=10.0, nperseg=50)
            np.testing.assert_allclose(got.psd[gi, :, j], want_psd, rtol=1e-9)
            # scipy's mquantiles with alphap = betap = 1 is Hyndman & Fan's definition 7
            want_q = sps.mstats.mquantiles(cat[:, j], stats.DEFAULT_QUANTILES, alphap=1, betap=1)
            np.testing.assert_allclose(got.quant[gi, :, j], want_q, rtol=1e-12)
    # groups of 1200 samples keep every order statistic: the mean absolute difference of the
    # quantile functions is scipy's Wasserstein-1 distance
    for j in range(2):
        w1 = np.mean(np.abs(got.qf[0, :, j] - got.qf[1, :, j]))
        assert w1 == pytest.approx(sps.wasserstein_distance(cats[0][:, j], cats[1][:, j]), 1e-12)


def test_one_or_two_workers_give_identical_numbers():
    rng = np.random.default_rng(8)
    pieces = _ar1_pieces(rng, length=3000)
    groups = _groups()
    kw = dict(
        statistics=ALL, max_lag=30, dt=1.0, nperseg=128, regimes=_regimes(), variables=("a", "b")
    )
    one = gs.group_statistics(pieces, groups, workers=1, **kw)
    two = gs.group_statistics(pieces, groups, workers=2, **kw)
    for name in ("qf", "quant", "acf", "psd", "occ", "res", "trans"):
        np.testing.assert_array_equal(getattr(one, name), getattr(two, name))


def test_single_pieces_and_views():
    # each piece alone, given as views into a longer array (nothing copied as a whole)
    rng = np.random.default_rng(2)
    whole = _ar1_pieces(rng, n_pieces=1, length=2000)[0]
    views = [whole[i * 500 : (i + 1) * 500] for i in range(4)]
    got = gs.group_statistics(views, statistics=("autocorrelation", "quantiles"), max_lag=10)
    for i, v in enumerate(views):
        np.testing.assert_allclose(got.acf[i], stats.autocorrelation(v, 10), rtol=1e-10)
        np.testing.assert_allclose(got.quant[i], np.quantile(v, stats.DEFAULT_QUANTILES, axis=0))


def test_bad_workers_are_refused():
    from ergodex.exceptions import SettingsError

    with pytest.raises(SettingsError, match="workers"):
        gs.resolve_workers(0)
    assert gs.resolve_workers(None) >= 1


def test_pair_distances_are_the_distances_of_each_pair():
    sps = pytest.importorskip("scipy.stats")
    rng = np.random.default_rng(4)
    pieces = _ar1_pieces(rng, n_pieces=6, length=300)
    groups = [(0, 1), (2, 3), (4, 5), (1, 4)]
    kw = dict(statistics=("histogram", "autocorrelation", "spectrum"), max_lag=20, nperseg=40)
    st = gs.group_statistics(pieces, groups, **kw)
    every = gs.pair_distances("histogram", st, st, workers=2)
    assert every.shape == (16, 2)
    cats = [np.concatenate([pieces[i] for i in g]) for g in groups]
    for a in range(4):
        for b in range(4):
            for j in range(2):
                # groups of 600 samples keep every order statistic: scipy's Wasserstein-1
                want = sps.wasserstein_distance(cats[a][:, j], cats[b][:, j])
                assert every[a * 4 + b, j] == pytest.approx(want, rel=1e-12, abs=1e-12)
    pairs = (np.array([0, 3, 2]), np.array([1, 1, 0]))
    acf = gs.pair_distances("autocorrelation", st, st, pairs, workers=2)
    for k, (a, b) in enumerate(zip(*pairs)):
        diff = st.acf[a, 1:] - st.acf[b, 1:]
        np.testing.assert_allclose(acf[k], np.sqrt(np.mean(diff**2, axis=0)), rtol=1e-14)
    psd = gs.pair_distances("spectrum", st, st, pairs, workers=1)
    a, b = st.psd[0], st.psd[1]
    np.testing.assert_allclose(psd[0], np.abs(a - b).sum(0) / (0.5 * (a + b).sum(0)), rtol=1e-14)
