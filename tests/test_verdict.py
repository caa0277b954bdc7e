"""The verdict's pieces one by one, on tiny inputs with hand-computed expectations.

Blow-up gating, row verdicts (tolerance boundary, NaN rows), the assembly of the verdict and its
reasons, the noise floor's groups, the member-agreement floor, and the per-piece statistics
against the reference libraries they claim to equal.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from ergodex import scenarios, stats, validation
from ergodex.regimes import RegimeSet
from ergodex.surrogate import Surrogate, Term
from ergodex.validation import CheckSpec, PieceSettings, ScoreRow
from ergodex.validation.pieces import _acf_pieces, _pair_distances, _PieceStats, _reference_groups
from ergodex.validation.verdict import (
    _blowup_accounting,
    _decide,
    _member_agreement,
    _ratio,
    _score_rows,
)

NAN = float("nan")


def _row(ratio, verdict, statistic="histogram", variable="x", tolerance=2.75):
    return ScoreRow(statistic, variable, ratio, 1.0, ratio, tolerance, verdict)


# ---------------------------------------------------------------------------------------------
# Blow-ups
# ---------------------------------------------------------------------------------------------


def test_one_blow_up_in_sixteen_fails_at_the_default_and_passes_when_allowed():
    times = np.full(16, NAN)
    times[15] = 3.0
    blowups, fail, reasons = _blowup_accounting(times, 0.0)
    assert blowups == {"count": 1, "members": [15], "times": [3.0], "allowed_fraction": 0.0}
    assert fail
    assert reasons == [
        "1 of 16 members blew up (left the data range ten-fold or became "
        "non-finite), the first at t = 3 after spin-up"
    ]
    # raising the allowed fraction to 1/16 admits exactly one blown-up member
    assert not _blowup_accounting(times, 1 / 16)[1]


def test_blow_up_fraction_is_compared_with_more_than_not_at_least():
    # CheckSpec docstring: "Fraction of members allowed to blow up before the check fails";
    # 2 of 16 at 0.125 is exactly the allowed fraction (passes), 3 of 16 is beyond (fails)
    times = np.full(16, NAN)
    times[[2, 9]] = [4.0, -1.5]
    blowups, fail, reasons = _blowup_accounting(times, 0.125)
    assert not fail
    assert blowups["members"] == [2, 9] and blowups["times"] == [4.0, -1.5]
    assert "2 of 16 members" in reasons[0]
    assert "the first at t = -1.5" in reasons[0]  # the earliest, even when listed later
    times[11] = 0.5
    assert _blowup_accounting(times, 0.125)[1]


def test_no_blow_up_gives_no_reason_and_no_failure():
    blowups, fail, reasons = _blowup_accounting(np.full(4, NAN), 0.0)
    assert blowups == {"count": 0, "members": [], "times": [], "allowed_fraction": 0.0}
    assert not fail and reasons == []


# ---------------------------------------------------------------------------------------------
# Rows: ratio and the tolerance boundary
# ---------------------------------------------------------------------------------------------


def test_ratio_cases():
    assert _ratio(3.0, 2.0) == 1.5
    assert _ratio(0.0, 0.0) == 0.0  # two identical samples and a zero floor: nothing to see
    assert _ratio(1e-300, 0.0) == math.inf
    assert _ratio(1.0, -0.0) == math.inf
    assert math.isnan(_ratio(NAN, 1.0)) and math.isnan(_ratio(1.0, NAN))


def test_row_at_the_tolerance_passes_and_just_above_fails():
    # ScoreRow docstring: "the row passes when ratio <= tolerance"
    tol = 2.75
    rows = _score_rows(
        "spectrum", ["a", "b", "c"], [2.75, np.nextafter(2.75, 3.0), 1.0], [1.0, 1.0, 4.0], tol
    )
    assert [r.verdict for r in rows] == ["pass", "fail", "pass"]
    assert [r.variable for r in rows] == ["a", "b", "c"]
    assert rows[2].ratio == 0.25 and rows[2].value == 1.0 and rows[2].noise_floor == 4.0
    assert all(r.statistic == "spectrum" and r.tolerance == tol for r in rows)


def test_nan_row_fails():
    rows = _score_rows("autocorrelation", ["x", "y"], [NAN, 0.5], [1.0, NAN], 2.75)
    assert [r.verdict for r in rows] == ["fail", "fail"]
    assert all(math.isnan(r.ratio) for r in rows)


# ---------------------------------------------------------------------------------------------
# The verdict's assembly
# ---------------------------------------------------------------------------------------------


def _decide_with(
    rows=(),
    *,
    blowup_fail=False,
    blowup_reasons=(),
    any_alive=True,
    agreement_verdict="pass",
    agreement_reasons=(),
):
    return _decide(
        list(rows),
        blowup_fail=blowup_fail,
        blowup_reasons=list(blowup_reasons),
        any_alive=any_alive,
        agreement_verdict=agreement_verdict,
        agreement_reasons=list(agreement_reasons),
    )


def test_everything_fine_passes_with_no_reasons():
    assert _decide_with([_row(1.0, "pass"), _row(2.75, "pass")]) == ("pass", [])


def test_blow_ups_beyond_the_allowed_fraction_fail_even_when_members_survive():
    verdict, reasons = _decide_with(
        [_row(1.0, "pass")], blowup_fail=True, blowup_reasons=["1 of 16 members blew up"]
    )
    assert verdict == "fail" and reasons == ["1 of 16 members blew up"]
    # within the allowed fraction the blow-up is still reported but does not fail the check
    assert _decide_with([_row(1.0, "pass")], blowup_reasons=["1 of 16 members blew up"]) == (
        "pass",
        ["1 of 16 members blew up"],
    )


def test_no_survivor_fails_and_says_so_first():
    verdict, reasons = _decide_with(
        [],
        blowup_fail=True,
        any_alive=False,
        blowup_reasons=["16 of 16 members blew up"],
        agreement_verdict="fail",
    )
    assert verdict == "fail"
    assert reasons == [
        "every member blew up: no statistics can be compared",
        "16 of 16 members blew up",
    ]
    # no survivor fails even where blow-ups are allowed and nothing else is reported
    assert _decide_with([], any_alive=False)[0] == "fail"


def test_nan_row_fails_the_check_and_is_named():
    rows = [_row(1.0, "pass", variable="x"), ScoreRow("spectrum", "y", NAN, NAN, NAN, 2.75, "fail")]
    verdict, reasons = _decide_with(rows)
    assert verdict == "fail"
    assert reasons == ["spectrum of y: distance n/a× the noise floor (tolerance 2.75)"]


def test_failing_rows_are_listed_largest_ratio_first_nan_last():
    rows = [
        ScoreRow("quantiles", "a", NAN, 1.0, NAN, 3.0, "fail"),
        _row(3.5, "fail", variable="b"),
        _row(1.0, "pass", variable="c"),
        _row(math.inf, "fail", "spectrum", "d"),
        _row(23456.0, "fail", "autocorrelation", "e"),
    ]
    verdict, reasons = _decide_with(rows, agreement_reasons=["members disagree"])
    assert verdict == "fail"
    assert reasons == [
        "spectrum of d: distance inf× the noise floor (tolerance 2.75)",
        "autocorrelation of e: distance 2.346e+04× the noise floor (tolerance 2.75)",
        "histogram of b: distance 3.5× the noise floor (tolerance 2.75)",
        "quantiles of a: distance n/a× the noise floor (tolerance 3)",
        "members disagree",
    ]


def test_member_disagreement_alone_fails():
    assert _decide_with(
        [_row(1.0, "pass")], agreement_verdict="fail", agreement_reasons=["members disagree"]
    ) == ("fail", ["members disagree"])
    assert _decide_with([_row(1.0, "pass")], agreement_verdict=None)[0] == "fail"


def test_check_with_one_member_blowing_up_fails_unless_allowed():
    # OU plus a small cubic drift on x1 (Term x1³, coefficient 0.01): from |x1| ≲ 10 the linear
    # drift wins (the data stay within ±3), from x1 = 20 the cubic term (0.01·20³ = 80 > 20)
    # drives that member out of the bound. One member in 16 starts there.
    # 4 runs of 200 time units: long enough to detect a ±50 % change (else inconclusive)
    data = scenarios.ornstein_uhlenbeck(seed=40, duration=200.0)
    ou = scenarios.ou_surrogate()
    cubic = Surrogate(
        ou.variables,
        ou.terms + (Term("monomial", powers=(3, 0)),),
        np.hstack([ou.coefficients, [[0.01], [0.0]]]),
        noise=ou.noise,
    )
    starts = np.array(data.stacked()[:16])
    starts[5] = [20.0, 0.0]
    strict = validation.validate(cubic, data, CheckSpec(seed=1), initial_states=starts)
    assert strict.blowups["count"] == 1 and strict.blowups["members"] == [5]
    assert strict.verdict == "fail"
    assert all(r.verdict == "pass" for r in strict.rows)  # the blow-up alone decides it
    assert strict.member_agreement["verdict"] == "pass"
    assert strict.reasons[0].startswith("1 of 16 members blew up")
    lenient = validation.validate(
        cubic, data, CheckSpec(seed=1, max_blowup_fraction=1 / 16), initial_states=starts
    )
    assert lenient.verdict == "pass"
    assert lenient.blowups["allowed_fraction"] == 1 / 16


# ---------------------------------------------------------------------------------------------
# Noise floor: groups of reference pieces
# ---------------------------------------------------------------------------------------------


def test_every_split_is_used_once_when_the_pieces_halve_exactly():
    groups, (left, right) = _reference_groups(4, 2, np.random.default_rng(0))
    # the 3 ways to split 4 pieces into two pairs, each once (hand enumeration)
    assert groups == [(0, 1), (0, 2), (0, 3), (2, 3), (1, 3), (1, 2)]
    assert left.tolist() == [0, 1, 2] and right.tolist() == [3, 4, 5]


def test_single_piece_groups_use_every_pair_once():
    groups, (left, right) = _reference_groups(4, 1, np.random.default_rng(0))
    assert groups == [(0,), (1,), (2,), (3,)]
    pairs = sorted(zip(left.tolist(), right.tolist()))
    assert pairs == [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]  # no self-pairs


def test_random_splits_are_disjoint_and_seeded():
    groups, (left, right) = _reference_groups(10, 3, np.random.default_rng(5))
    assert left.size == right.size == 64
    for a, b in zip(left, right):
        ga, gb = set(groups[a]), set(groups[b])
        assert len(ga) == len(gb) == 3 and not ga & gb
    again, (left2, right2) = _reference_groups(10, 3, np.random.default_rng(5))
    assert again == groups and left2.tolist() == left.tolist()
    # too many exact splits (C(11, 5) = 462 > 64) also falls back to 64 random ones
    assert _reference_groups(12, 6, np.random.default_rng(1))[1][0].size == 64


def test_noise_floor_of_the_check_is_the_mean_over_the_exact_splits():
    # 4 runs, pool 2: the floor averages d over the 3 splits of the runs into two pairs;
    # d is Wasserstein-1 between the pooled samples (scipy.stats.wasserstein_distance)
    data = scenarios.ornstein_uhlenbeck(seed=44, duration=90.0)
    sc = validation.validate(
        scenarios.ou_surrogate(),
        data,
        CheckSpec(seed=3, members=4, min_pieces=4, pool=2, statistics=("histogram",)),
    )
    runs = data.runs
    splits = [((0, 1), (2, 3)), ((0, 2), (1, 3)), ((0, 3), (1, 2))]
    for j, name in enumerate(data.names):
        d = [
            scipy.stats.wasserstein_distance(
                np.concatenate([runs[i][:, j] for i in a]),
                np.concatenate([runs[i][:, j] for i in b]),
            )
            for a, b in splits
        ]
        row = next(r for r in sc.rows if r.variable == name)
        # pooled groups have 3600 samples > 2000 quantile points: the floor uses the quantile
        # function at 2000 midpoints, whose error is far below the distances (≈ 0.03 here)
        assert row.noise_floor == pytest.approx(np.mean(d), rel=0.02)
    assert sc.settings["n_floor_pairs"] == 3 and sc.settings["n_reference_groups"] == 6


# ---------------------------------------------------------------------------------------------
# Member agreement
# ---------------------------------------------------------------------------------------------


def _ctx(n_vars=1, statistics=("histogram",), max_lag=1, nperseg=8, regimes=None):
    return PieceSettings(
        statistics=statistics,
        variables=tuple(f"v{j}" for j in range(n_vars)),
        dt=1.0,
        max_lag_samples=max_lag,
        nperseg=nperseg,
        regimes=regimes,
    )


def _agreement_case(tolerance, shifts=((0, 0.0), (2, 2.0), (3, 6.0))):
    """Two reference pieces two units apart; members shifted by 0, 2 and 6 (member 1 blown up).

    Wasserstein-1 between a sample and its copy shifted by c is c (analytic). Floor: d(ref0,
    ref1) = 2 (one pair, no self-pair). Members 0, 2, 3 at shifts 0, 2, 6: pair distances
    2, 6, 4, mean 4 → ratio 2. Each member's mean distance to the others: 4, 3, 5 → 2, 1.5, 2.5
    floors. A second variable is the first times ten: the same ratios, per variable.
    """
    base = np.array([0.0, 1.0, 2.0, 3.0])
    ref_pieces = np.stack([base, base + 2.0])[:, :, None] * np.array([1.0, 10.0])
    ctx = _ctx(2)
    model = np.full((4, 8, 2), NAN)
    for m, shift in shifts:
        model[m, :, 0] = np.concatenate([base + shift, base[::-1] + shift])
        model[m, :, 1] = 10 * model[m, :, 0]
    alive = ~np.isnan(model[:, 0, 0])
    spec = CheckSpec(tolerance=tolerance)
    return _member_agreement(model, alive, 4, _PieceStats(ref_pieces, ctx), ref_pieces, spec, ctx)


def test_member_agreement_ratio_against_hand_computed_floor():
    out = _agreement_case(2.0)
    assert out["ratio"] == pytest.approx(2.0, rel=1e-12)
    assert out["per_variable"] == {
        "v0": pytest.approx(2.0, rel=1e-12),
        "v1": pytest.approx(2.0, rel=1e-12),
    }
    assert out["verdict"] == "pass"  # at the tolerance: passes (ratio <= tolerance)
    assert out["tolerance"] == 2.0
    assert out["outlying_members"] == [3]  # mean distance 2.5 > 2; indices of the full ensemble
    assert out["collapsed_members"] == [] and out["_reasons"] == []


def test_member_agreement_beyond_tolerance_fails_with_the_outliers_named():
    out = _agreement_case(1.9)
    assert out["verdict"] == "fail"
    assert out["outlying_members"] == [0, 3]  # 2 and 2.5 exceed 1.9, 1.5 does not
    assert out["_reasons"] == [
        "members disagree: their marginal distributions differ 2× more than reference pieces "
        "of the same length do (tolerance 1.9), beyond sampling noise; the surrogate may have "
        "several attractors or states it stays in for longer than a piece (outlying members: "
        "[0, 3])"
    ]


def test_two_members_are_compared():
    out = _agreement_case(2.75, shifts=((0, 0.0), (3, 6.0)))
    assert out["ratio"] == pytest.approx(3.0, rel=1e-12)  # d = 6 over the floor 2
    assert out["verdict"] == "fail" and out["outlying_members"] == [0, 3]


def test_at_most_eight_outlying_members_are_named():
    base = np.array([0.0, 1.0, 2.0, 3.0])
    ref_pieces = np.stack([base, base + 1.0])[:, :, None]
    ctx = _ctx()
    model = np.stack([base + 5.0 * m for m in range(10)])[:, :, None]
    out = _member_agreement(
        model, np.ones(10, bool), 4, _PieceStats(ref_pieces, ctx), ref_pieces, CheckSpec(), ctx
    )
    assert out["outlying_members"] == list(range(10))
    assert out["_reasons"][0].endswith("(outlying members: [0, 1, 2, 3, 4, 5, 6, 7])")


def test_a_collapsed_member_fails_agreement():
    base = np.array([0.0, 1.0, 2.0, 3.0])
    ref_pieces = np.stack([base, base + 1.0])[:, :, None]
    ctx = _ctx()
    model = np.stack([np.tile(base, 2), np.full(8, 0.5), np.tile(base, 2)])[:, :, None]
    out = _member_agreement(
        model, np.ones(3, bool), 4, _PieceStats(ref_pieces, ctx), ref_pieces, CheckSpec(), ctx
    )
    assert out["collapsed_members"] == [1]
    assert out["verdict"] == "fail"
    assert out["_reasons"][0] == (
        "1 of 3 members settle on a fixed point while the others keep moving"
    )
    # every member collapsed
    flat = np.stack([np.full(8, 0.5), np.full(8, 0.7)])[:, :, None]
    out = _member_agreement(
        flat, np.ones(2, bool), 4, _PieceStats(ref_pieces, ctx), ref_pieces, CheckSpec(), ctx
    )
    assert out["verdict"] == "fail"
    assert out["_reasons"][0] == "every surviving member settles on a fixed point"


def test_a_single_survivor_cannot_disagree():
    base = np.array([0.0, 1.0, 2.0, 3.0])
    ref_pieces = np.stack([base, base + 1.0])[:, :, None]
    ctx = _ctx()
    model = np.full((2, 4, 1), NAN)
    model[1, :, 0] = base
    out = _member_agreement(
        model,
        np.array([False, True]),
        4,
        _PieceStats(ref_pieces, ctx),
        ref_pieces,
        CheckSpec(),
        ctx,
    )
    assert out["ratio"] is None and out["verdict"] == "pass"


# ---------------------------------------------------------------------------------------------
# Per-piece statistics and distances against the libraries they claim to equal
# ---------------------------------------------------------------------------------------------


def _ar1(rng, n, a=0.8, shape=()):
    # AR(1) noise through scipy.signal.lfilter: a correlated test series
    return scipy.signal.lfilter([1.0], [1.0, -a], rng.standard_normal(shape + (n,)), axis=-1)


def test_piece_autocorrelation_equals_statsmodels_per_piece_without_wrap_around():
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    rng = np.random.default_rng(21)
    pieces = _ar1(rng, 50, shape=(3, 2)).transpose(0, 2, 1)  # (3 pieces, 50 samples, 2 vars)
    acf = _acf_pieces(pieces, 30)
    assert acf.shape == (3, 31, 2)
    for p in range(3):
        for j in range(2):
            # reference library: statsmodels.tsa.stattools.acf, direct sums (no FFT); a lag as
            # long as 30 of 50 samples shows any circular wrap-around of the FFT
            ref = tsa.acf(pieces[p, :, j], nlags=30, fft=False)
            np.testing.assert_allclose(acf[p, :, j], ref, atol=1e-12)


def test_piece_quantile_function_is_the_sorted_piece_or_the_inverted_cdf():
    rng = np.random.default_rng(22)
    short = rng.normal(size=(2, 300, 2))
    st = _PieceStats(short, _ctx(2))
    np.testing.assert_array_equal(st.qf, np.sort(short, axis=1))  # exact below 2000 samples
    long = rng.normal(size=(2, 5000, 1))
    st = _PieceStats(long, _ctx(1))
    assert st.qf.shape == (2, 2000, 1)
    p = (np.arange(2000) + 0.5) / 2000
    for k in range(2):
        # reference library: numpy's inverted-CDF quantile (Hyndman & Fan definition 1)
        ref = np.quantile(long[k, :, 0], p, method="inverted_cdf")
        np.testing.assert_array_equal(st.qf[k, :, 0], ref)


def test_histogram_distance_is_scipy_wasserstein_for_equal_lengths():
    rng = np.random.default_rng(23)
    pieces = np.concatenate([rng.normal(size=(2, 400, 1)), rng.gamma(2.0, size=(1, 400, 1))])
    st = _PieceStats(pieces, _ctx(1))
    d = _pair_distances("histogram", st, st, np.triu_indices(3, 1))
    pairs = [(0, 1), (0, 2), (1, 2)]
    # reference library: scipy.stats.wasserstein_distance
    ref = [scipy.stats.wasserstein_distance(pieces[a, :, 0], pieces[b, :, 0]) for a, b in pairs]
    np.testing.assert_allclose(d[:, 0], ref, rtol=1e-12)
    # without an index: every (a, b) pair, a-major, including a piece with itself
    full = _pair_distances("histogram", st, st)
    assert full.shape == (9, 1)
    np.testing.assert_allclose(full[[1, 2, 5], 0], ref, rtol=1e-12)
    assert np.all(full[[0, 4, 8], 0] == 0.0)


def test_piece_quantiles_and_spectra_equal_numpy_and_scipy():
    rng = np.random.default_rng(24)
    pieces = _ar1(rng, 256, shape=(3, 2)).transpose(0, 2, 1)
    st = _PieceStats(pieces, _ctx(2, ("quantiles", "spectrum"), nperseg=64))
    for p in range(3):
        # reference library: numpy.quantile (linear, Hyndman & Fan definition 7)
        np.testing.assert_allclose(
            st.quant[p], np.quantile(pieces[p], stats.DEFAULT_QUANTILES, axis=0), rtol=1e-12
        )
        # reference library: scipy.signal.welch with its defaults
        _, ref = scipy.signal.welch(pieces[p], fs=1.0, nperseg=64, axis=0)
        np.testing.assert_allclose(st.psd[p], ref, rtol=1e-10)


def test_pair_distances_follow_their_definitions():
    rng = np.random.default_rng(25)
    pieces = _ar1(rng, 128, shape=(2, 1)).transpose(0, 2, 1)
    st = _PieceStats(
        pieces, _ctx(1, ("autocorrelation", "spectrum", "quantiles"), max_lag=10, nperseg=32)
    )
    one = (np.array([0]), np.array([1]))
    a, b = st.acf[0, :, 0], st.acf[1, :, 0]
    # RMS over lags 1..max_lag (lag 0 is 1 for both and carries nothing)
    expected = np.sqrt(np.mean((a[1:] - b[1:]) ** 2))
    assert _pair_distances("autocorrelation", st, st, one)[0, 0] == pytest.approx(
        expected, rel=1e-12
    )
    pa, pb = st.psd[0, :, 0], st.psd[1, :, 0]
    # L1 difference over the mean total power of the two spectra
    expected = np.sum(np.abs(pa - pb)) / np.mean([pa.sum(), pb.sum()])
    assert _pair_distances("spectrum", st, st, one)[0, 0] == pytest.approx(expected, rel=1e-12)
    qa, qb = st.quant[0, :, 0], st.quant[1, :, 0]
    assert _pair_distances("quantiles", st, st, one)[0, 0] == pytest.approx(
        np.mean(np.abs(qa - qb)), rel=1e-12
    )
    # a piece against itself is at distance zero for every statistic
    same = (np.array([1]), np.array([1]))
    for s in ("autocorrelation", "spectrum", "quantiles"):
        assert _pair_distances(s, st, st, same)[0, 0] == 0.0


def test_regime_rows_on_hand_labelled_pieces():
    # regimes "hot" (v0 > 1) and "cold" (v0 < −1); dt = 1. Labels by hand (n = none):
    # piece 0: n h h n c c c n — complete visits: hot 2, cold 3; occupancy h 2/8, c 3/8
    # piece 1: n h n c n h h h — complete visits: hot 1, cold 1 (the last hot visit is cut by
    # the end); occupancy h 4/8, c 1/8
    regimes = RegimeSet.from_dict(
        {
            "regime": [
                {"name": "hot", "kind": "threshold", "rules": [{"variable": "v0", "above": 1.0}]},
                {"name": "cold", "kind": "threshold", "rules": [{"variable": "v0", "below": -1.0}]},
            ]
        }
    )
    pieces = np.array([[0, 2, 2, 0, -2, -2, -2, 0], [0, 2, 0, -2, 0, 2, 2, 2]], float)[:, :, None]
    ctx = _ctx(1, ("occupancy", "residence", "transitions"), regimes=regimes)
    st = _PieceStats(pieces, ctx)
    np.testing.assert_allclose(st.occ, [[2 / 8, 3 / 8, 3 / 8], [4 / 8, 1 / 8, 3 / 8]])
    one = (np.array([0]), np.array([1]))
    # one row per regime, "none" left out
    np.testing.assert_allclose(_pair_distances("occupancy", st, st, one), [[0.25, 0.25]])
    np.testing.assert_allclose(_pair_distances("residence", st, st, one), [[1.0, 2.0]])
    # jump chains (hot, cold, none): both leave hot and cold only to none; from none piece 0
    # goes to hot 1 of 2 times, piece 1 2 of 3 times: difference (−1/6, 1/6, 0) in one row;
    # Frobenius norm √(2/36) (numpy.linalg.norm, "fro")
    d = _pair_distances("transitions", st, st, one)
    assert d.shape == (1, 1)
    assert d[0, 0] == pytest.approx(np.linalg.norm(st.trans[0] - st.trans[1], "fro"), rel=1e-12)
    assert d[0, 0] == pytest.approx(math.sqrt(2 / 36), rel=1e-12)
    assert _pair_distances("transitions", st, st).shape == (4, 1)


def test_spectrum_distance_is_per_variable():
    rng = np.random.default_rng(27)
    pieces = rng.normal(size=(2, 64, 2)) * np.array([1.0, 5.0])
    st = _PieceStats(pieces, _ctx(2, ("spectrum",), nperseg=16))
    d = _pair_distances("spectrum", st, st, (np.array([0]), np.array([1])))
    for j in range(2):
        pa, pb = st.psd[0, :, j], st.psd[1, :, j]
        # L1 difference over the mean total power, variable by variable
        assert d[0, j] == pytest.approx(
            np.sum(np.abs(pa - pb)) / np.mean([pa.sum(), pb.sum()]), rel=1e-12
        )
    assert _pair_distances("spectrum", st, st, (np.array([], int), np.array([], int))).shape == (
        0,
        2,
    )


# ---------------------------------------------------------------------------------------------
# Scorecard helpers
# ---------------------------------------------------------------------------------------------


def test_largest_ratio_ignores_nan_and_a_null_failing_ratio_reads_back_as_infinite():
    rows = [_row(NAN, "fail"), _row(1.5, "pass"), _row(0.5, "pass")]
    sc = validation.Scorecard("fail", rows, [], {}, {}, CheckSpec(), "m", "d", "t", "v")
    assert sc.largest_ratio == 1.5
    back = ScoreRow.from_dict(_row(math.inf, "fail").to_dict())
    assert back.ratio == math.inf and back.verdict == "fail"
    assert math.isnan(ScoreRow.from_dict(_row(NAN, "pass").to_dict()).ratio)


def test_collapse_is_judged_per_variable_against_that_variable_spread():
    # _member_agreement docstring/constant: a member has settled when *every* variable varies
    # less than 1e-6 of the reference's standard deviation of that variable.
    rng = np.random.default_rng(26)
    ref_pieces = rng.normal(size=(2, 8, 2)) * np.array([1000.0, 1.0])  # very different scales
    ctx = _ctx(2)
    sd = np.std(ref_pieces.reshape(-1, 2), axis=0)
    wiggle = np.tile([1.0, -1.0], 4)[:, None]  # standard deviation exactly 1
    moving = rng.normal(size=(8, 2)) * sd
    still = np.array([5.0, -5.0]) + wiggle * np.array([1e-8, 1e-8]) * sd  # both below 1e-6 sd
    # 1e-5 is below 1e-6 × 1000 for the first variable but above 1e-6 × 1 for the second
    mixed = np.array([5.0, -5.0]) + wiggle * np.array([1e-5, 1e-5])
    model = np.stack([moving, still, mixed, moving[::-1]])
    out = _member_agreement(
        model, np.ones(4, bool), 4, _PieceStats(ref_pieces, ctx), ref_pieces, CheckSpec(), ctx
    )
    assert out["collapsed_members"] == [1]


def test_single_survivor_record_has_every_key():
    base = np.array([0.0, 1.0, 2.0, 3.0])
    ref_pieces = np.stack([base, base + 1.0])[:, :, None]
    ctx = _ctx()
    out = _member_agreement(
        np.tile(base, (1, 1))[:, :, None],
        np.array([True]),
        4,
        _PieceStats(ref_pieces, ctx),
        ref_pieces,
        CheckSpec(tolerance=2.0),
        ctx,
    )
    assert out == {
        "tolerance": 2.0,
        "collapsed_members": [],
        "outlying_members": [],
        "per_variable": {},
        "ratio": None,
        "verdict": "pass",
        "_reasons": [],
    }
    # a single survivor that has settled fails
    out = _member_agreement(
        np.full((1, 4, 1), 0.5),
        np.array([True]),
        4,
        _PieceStats(ref_pieces, ctx),
        ref_pieces,
        CheckSpec(),
        ctx,
    )
    assert out["verdict"] == "fail" and out["collapsed_members"] == [0]
    assert out["_reasons"] == ["every surviving member settles on a fixed point"]


def test_evidence_per_piece_arrays_when_the_rows_did_not_compute_them():
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    data = scenarios.ornstein_uhlenbeck(seed=52, duration=90.0)
    result = validation.check(
        scenarios.ou_surrogate(),
        data,
        CheckSpec(seed=4, members=4, min_pieces=4, bins="fd", statistics=("histogram",)),
    )
    ev, s = result.evidence, result.scorecard.settings
    lag, nperseg = s["max_lag_samples"], s["nperseg"]
    for p, run in enumerate(data.runs):  # 4 runs → 4 pieces, each a whole run
        for j in range(2):
            # reference libraries: statsmodels acf and scipy.signal.welch, piece by piece
            np.testing.assert_allclose(
                ev.acf_reference_pieces[p, :, j],
                tsa.acf(run[:, j], nlags=lag, fft=True),
                atol=1e-10,
            )
            np.testing.assert_allclose(
                ev.psd_reference_pieces[p, :, j],
                scipy.signal.welch(run[:, j], fs=1 / data.dt, nperseg=nperseg)[1],
                rtol=1e-10,
            )
    # "fd": every variable gets the largest Freedman–Diaconis count (numpy's 'fd' rule)
    stacked = data.stacked()
    counts = [np.histogram_bin_edges(stacked[:, j], bins="fd").size - 1 for j in range(2)]
    assert ev.hist_edges.shape == (2, max(counts) + 1)
    for j in range(2):
        assert ev.hist_edges[j, 0] == stacked[:, j].min()
        assert ev.hist_edges[j, -1] == stacked[:, j].max()
    assert ev.regime_names.size == 0 and ev.occupancy_reference_pieces.shape == (4, 0)
    assert np.all(np.isnan(ev.blowup_times))
