"""Oscillation-aware time scales: the autocorrelation's envelope time and dominant period.

Check values are analytic. A damped cosine ``ρ(t) = exp(−t/τ) cos(ωt)`` has the envelope
``exp(−t/τ)`` and the period ``2π/ω``; it is the exact autocorrelation of each component of the
rotating Ornstein–Uhlenbeck process ``dx = (−x/τ − ω y) dt + σ dW₁``, ``dy = (ω x − y/τ) dt +
σ dW₂`` (drift ``A = −I/τ + ω J``, isotropic stationary covariance, so ``C(t) = exp(At) C₀ =
σ²τ/2 · exp(−t/τ) R(ωt)``; C. W. Gardiner, *Handbook of Stochastic Methods*, §4.4.6, the
multivariate Ornstein–Uhlenbeck process). With ``ω = 0`` it is the plain OU process,
``ρ(t) = exp(−t/τ)``, whose integrated autocorrelation time is ``τ`` and whose oscillating
version has ``∫ρ = τ / (1 + ω²τ²)`` (elementary integral).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.optimize

from ergodex import scenarios, stats, validation
from ergodex.validation import CheckSpec
from ergodex.validation.timescales import acf_time_scales, oscillation_time_scales


@pytest.mark.parametrize(
    ("tau", "omega"), [(2.0, 2 * math.pi / 6), (5.0, 1.0), (0.5, 3.0), (1.0, 1.5)]
)
def test_damped_cosine_gives_its_envelope_time_and_period(tau, omega):
    dt = 0.05
    t = np.arange(4000) * dt
    envelope, period = acf_time_scales(np.exp(-t / tau) * np.cos(omega * t), dt)
    # analytic: the envelope of exp(−t/τ) cos(ωt) is exp(−t/τ); its period 2π/ω
    assert envelope == pytest.approx(tau, rel=1e-6)
    if omega * tau >= 1.0:  # the documented rule for a stated period (ωτ ≥ 1)
        assert period == pytest.approx(2 * math.pi / omega, rel=1e-6)
    else:
        assert period is None


@pytest.mark.parametrize(("tau", "omega"), [(1.0, 0.0), (3.0, 0.1)])
def test_without_an_interior_spectral_peak_the_envelope_is_the_first_1_over_e_lag(tau, omega):
    # ωτ ≤ 1/√3: the spectrum of exp(−|t|/τ) cos(ωt) peaks at zero frequency (analytic: the sum
    # of two Lorentzians at ±ω of half-width 1/τ has a maximum at 0 while 3ω²τ² ≤ 1)
    dt = 0.05
    t = np.arange(4000) * dt
    envelope, period = acf_time_scales(np.exp(-t / tau) * np.cos(omega * t), dt)
    # reference library: scipy.optimize.brentq on exp(−t/τ) cos(ωt) = 1/e
    crossing = scipy.optimize.brentq(
        lambda x: math.exp(-x / tau) * math.cos(omega * x) - math.exp(-1.0), 0.0, tau
    )
    assert envelope == pytest.approx(crossing, rel=1e-3)  # linear interpolation between lags
    assert period is None


def test_a_smooth_monotone_autocorrelation_states_no_period():
    # the observed coordinate of dx = (−x + y) dt, dy = −y/2 dt + dW has the autocorrelation
    # (2 e^{−t/2} − e^{−t}) (analytic: the sum of its two modes; zero slope at t = 0, which a
    # damped cosine would mimic, but never negative, so no spectral peak away from zero)
    dt = 0.1
    t = np.arange(2000) * dt
    envelope, period = acf_time_scales(2 * np.exp(-t / 2) - np.exp(-t), dt)
    crossing = scipy.optimize.brentq(
        lambda x: 2 * math.exp(-x / 2) - math.exp(-x) - math.exp(-1.0), 0.0, 10.0
    )
    assert envelope == pytest.approx(crossing, rel=1e-3)
    assert period is None


def _rotating_ou(seed: int, tau: float, omega: float, duration: float, dt: float = 0.1):
    drift = [[-1.0 / tau, -omega], [omega, -1.0 / tau]]
    return scenarios.ornstein_uhlenbeck(
        seed=seed, drift=drift, noise=[[1.0, 0.0], [0.0, 1.0]], duration=duration, dt=dt
    )


def test_rotating_ou_record_gives_the_analytic_envelope_and_period_not_the_integral():
    tau, omega = 2.0, 2 * math.pi / 6  # envelope 2, period 6 (the rotating OU)
    data = _rotating_ou(61, tau, omega, duration=2500.0)  # 4 runs × 1250 τ
    scales = oscillation_time_scales(list(data.runs), data.dt)
    # sampling error of the fitted envelope over 5000 τ of record: a few per cent (Bartlett's
    # variance of the sample autocorrelation, ~1/N_eff); 10 % is a wide margin
    for envelope, period in zip(scales.envelope_times, scales.periods):
        assert envelope == pytest.approx(tau, rel=0.10)
        assert period == pytest.approx(6.0, rel=0.05)
    # the integrated time is the analytic τ / (1 + ω²τ²) ≈ 0.37, far below the envelope
    integrated = stats.integrated_autocorrelation_time(list(data.runs), data.dt)
    assert np.all(integrated < 0.6 * tau)


def test_plain_ou_record_has_no_dominant_period_and_its_envelope_is_tau():
    tau = 1.5
    data = scenarios.ornstein_uhlenbeck(
        seed=62, drift=[[-1.0 / tau]], noise=[[1.0]], duration=2000.0, dt=0.1
    )
    scales = oscillation_time_scales(list(data.runs), data.dt)
    assert scales.envelope_times[0] == pytest.approx(tau, rel=0.10)  # analytic exp(−t/τ)
    assert scales.dominant_period is None


def test_check_of_an_oscillating_record_follows_the_envelope_and_states_the_periods():
    tau, omega = 2.0, 2 * math.pi / 6
    data = _rotating_ou(63, tau, omega, duration=600.0)
    surrogate = scenarios.ou_surrogate(
        drift=[[-1.0 / tau, -omega], [omega, -1.0 / tau]], noise=[[1.0, 0.0], [0.0, 1.0]]
    )
    sc = validation.validate(surrogate, data, CheckSpec(seed=4, members=4))
    s = sc.settings
    # the documented rules (plan.py): decorrelation time = the longest integrated time; gap and
    # spin-up 5 of them; the lag window covers 3 integrated times and one dominant period (at
    # most a quarter piece); the Welch segment 4 periods and 2 decorrelation times (at most an
    # eighth of a piece); the envelope time is stated
    oscillating = [t for v, t in s["envelope_time"].items() if s["dominant_period"][v]]
    longest = max(s["integrated_autocorrelation_time"].values())
    assert s["decorrelation_time"] == pytest.approx(longest, rel=1e-12)
    assert max(oscillating) == pytest.approx(tau, rel=0.15)  # the envelope, analytic
    assert s["gap"] == pytest.approx(5 * s["decorrelation_time"], rel=1e-12)
    assert s["spinup"] == pytest.approx(5 * s["decorrelation_time"], rel=1e-12)
    L, dt = s["piece_length_samples"], data.dt
    period = max(p for p in s["dominant_period"].values() if p is not None)
    assert period == pytest.approx(6.0, rel=0.05)
    want_lag = max(3 * max(s["integrated_autocorrelation_time"].values()), period)
    assert s["max_lag_samples"] == min(max(1, round(want_lag / dt)), L // 4)
    assert s["max_lag"] >= 6.0 * 0.95  # covers a period
    segment = max(4 * period, 2 * s["decorrelation_time"])
    assert s["nperseg"] == max(8, min(256, L // 8), min(round(segment / dt), L // 8))
    assert s["spectral_resolution"] == pytest.approx(1.0 / (s["nperseg"] * dt), rel=1e-12)
    # the scorecard states the record in dominant periods and the unit of every distance
    assert sc.power["dominant_period"] == pytest.approx(period, rel=1e-12)
    assert sc.power["record_dominant_periods"] == pytest.approx(
        sc.power["record_time"] / period, rel=1e-12
    )
    assert "dominant periods of" in sc.table()
    assert set(s["distance_units"]) == set(s["statistics"])
    assert s["distance_units"]["autocorrelation"] == "correlation (dimensionless)"


def test_gaps_of_a_slowly_dephasing_oscillator_follow_the_integrated_time():
    # one run of a slowly dephasing oscillator: 8 blocks cannot be separated by 5 envelope
    # times, but can by 5 integrated times, which is the documented rule (plan.py)
    tau, omega = 20.0, 2 * math.pi / 5
    data = scenarios.ornstein_uhlenbeck(
        seed=64,
        drift=[[-1.0 / tau, -omega], [omega, -1.0 / tau]],
        noise=[[1.0, 0.0], [0.0, 1.0]],
        duration=400.0,
        dt=0.1,
        n_runs=1,
    )
    surrogate = scenarios.ou_surrogate(
        drift=[[-1.0 / tau, -omega], [omega, -1.0 / tau]], noise=[[1.0, 0.0], [0.0, 1.0]]
    )
    sc = validation.validate(surrogate, data, CheckSpec(seed=5, members=4))
    s = sc.settings
    assert not s.get("gap_note")
    assert max(s["envelope_time"].values()) > max(s["integrated_autocorrelation_time"].values())
    integrated = max(s["integrated_autocorrelation_time"].values())
    assert s["gap"] == pytest.approx(5 * integrated, rel=1e-12)
    assert s["gap"] == pytest.approx(5 * s["decorrelation_time"], rel=1e-12)
