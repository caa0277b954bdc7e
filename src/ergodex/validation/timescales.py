"""Time scales of a record that oscillates: the autocorrelation's envelope and dominant period.

The integrated autocorrelation time ``∫ρ`` is the right scale for a correlation that decays
without oscillating (an Ornstein–Uhlenbeck process: ``ρ(t) = exp(−t/τ)``, ``∫ρ = τ``), but an
oscillation's positive and negative lobes cancel in the integral: for ``ρ(t) = exp(−t/τ)
cos(ωt)`` it is ``τ / (1 + ω²τ²)``, far shorter than the time over which the oscillation keeps
its phase. A check whose lag window, piece gaps, Welch segments and spin-up follow that short
time never compares the band that matters.

:func:`oscillation_time_scales` looks for an oscillation in each variable's spectrum (the
Fourier transform of its autocorrelation, Wiener–Khinchin, over the lags where the
autocorrelation's envelope exceeds ``e⁻³``). With a peak away from zero frequency, at least
:data:`PEAK_RATIO` times the zero-frequency power, it fits the damped cosine
``exp(−t/τ) cos(ωt)`` to the autocorrelation (started at the envelope's e-folding lag and the
peak): ``τ`` is the **envelope time** (``exp(−t/τ)`` is the damped cosine's envelope) and
``2π/ω`` the **dominant period**, stated when the oscillation is underdamped enough to be one
(``ωτ ≥ 1``, at least 1/2π of a cycle per e-folding; common practice, no source). Without such
a peak (an Ornstein–Uhlenbeck process, a sum of decaying exponentials, a smooth output whose
autocorrelation is flat at zero lag) the envelope time is the first lag where the envelope —
the running maximum of ``|ρ|`` from the right — falls below ``1/e`` (``τ`` for
``ρ = exp(−t/τ)``) and there is no dominant period.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from ergodex import stats

#: The autocorrelation is used up to the first lag ``k`` after which ``|ρ|`` stays below this
#: over ``[k, 2k]``: beyond it the sample autocorrelation is mostly sampling noise (common
#: practice, no source).
WINDOW_FLOOR = math.exp(-3.0)
#: ``ωτ`` from which a fitted oscillation counts as a dominant period (common practice, no source).
MIN_QUALITY = 1.0
#: A spectral peak away from zero frequency counts when it holds at least this many times the
#: zero-frequency power (the sampling noise of the spectrum stays below it; common practice, no
#: source). The damped cosine has such an interior peak when ``ωτ > 1/√3`` (analytic).
PEAK_RATIO = 1.1
#: Sampling-noise standard deviations a negative lobe must reach to count (common practice, no
#: source).
NOISE_SIGMAS = 3.0


@dataclass(frozen=True)
class TimeScales:
    """Per-variable envelope times and dominant periods (None: no oscillation), in time units."""

    envelope_times: tuple[float, ...]
    periods: tuple[float | None, ...]

    @property
    def envelope_time(self) -> float:
        """The longest envelope time over the variables."""
        return float(max(self.envelope_times))

    @property
    def oscillation_envelope_time(self) -> float:
        """The longest envelope time over the variables that oscillate (0 when none does)."""
        found = [t for t, p in zip(self.envelope_times, self.periods) if p is not None]
        return float(max(found)) if found else 0.0

    @property
    def dominant_period(self) -> float | None:
        """The longest dominant period over the variables, None when none oscillates."""
        found = [p for p in self.periods if p is not None]
        return float(max(found)) if found else None


def hull_efolding(acf: np.ndarray, dt: float) -> float:
    """First lag (time units, linearly interpolated) where the envelope of ``|acf|`` — its
    running maximum from the right — falls below 1/e; the last lag when it never does."""
    env = np.maximum.accumulate(np.abs(acf)[::-1])[::-1]
    below = np.flatnonzero(env < math.exp(-1.0))
    if below.size == 0:
        return float((acf.size - 1) * dt)
    k = int(below[0])
    if k == 0:
        return float(dt)
    a, b = env[k - 1], env[k]
    frac = (a - math.exp(-1.0)) / (a - b) if a > b else 0.0
    return float((k - 1 + frac) * dt)


def spectral_peak(acf: np.ndarray, dt: float) -> tuple[float, float]:
    """Angular frequency of the largest peak of the spectrum of ``acf`` (Wiener–Khinchin: the
    Fourier transform of the two-sided autocorrelation, untapered for the finest resolution),
    and its power over the zero-frequency power (1 when the peak is at zero frequency).

    A nonnegative autocorrelation has no peak above its zero-frequency power (``|Σρ cos| ≤
    Σρ``), so a ratio above 1 needs negative lobes: an oscillation."""
    two_sided = np.concatenate([acf[:0:-1], acf])
    n = stats.fast_fft_length(8 * two_sided.size)
    power = np.fft.rfft(two_sided, n=n).real
    k = int(np.argmax(power))
    ratio = float(power[k] / power[0]) if power[0] > 0 else math.inf
    if k == 0:
        return 0.0, 1.0
    return float(2.0 * math.pi * k / (n * dt)), ratio


def fit_damped_cosine(acf: np.ndarray, dt: float, omega0: float) -> tuple[float, float]:
    """Least-squares ``(τ, ω)`` of ``exp(−t/τ) cos(ωt)`` to ``acf`` at lags ``0, dt, 2dt, …``.

    Started from the envelope's e-folding lag with ``ω`` at ``omega0`` (and
    half, 1.5 times it and 0); the best fit is kept.
    """
    from scipy.optimize import least_squares

    t = np.arange(acf.size) * dt
    tau0 = max(hull_efolding(acf, dt), dt)
    nyquist = math.pi / dt

    def residual(p):
        return np.exp(-t / np.exp(p[0])) * np.cos(p[1] * t) - acf

    best = None
    omegas = {min(f * omega0, 0.999 * nyquist) for f in (1.0, 0.5, 1.5)} | {0.0}
    for start in itertools.product((tau0,), sorted(omegas)):
        fit = least_squares(
            residual,
            [math.log(start[0]), start[1]],
            bounds=([math.log(dt) - 5.0, 0.0], [math.log(tau0) + 8.0, nyquist]),
            xtol=1e-12,
            ftol=1e-12,
        )
        if best is None or fit.cost < best.cost:
            best = fit
    assert best is not None
    return float(np.exp(best.x[0])), float(best.x[1])


def acf_time_scales(
    acf: np.ndarray, dt: float, n_samples: int | None = None
) -> tuple[float, float | None]:
    """``(envelope time, dominant period or None)`` of one variable's autocorrelation.

    An oscillation needs a negative lobe deeper than :data:`WINDOW_FLOOR` and, for a sample
    autocorrelation of ``n_samples`` values, deeper than :data:`NOISE_SIGMAS` times its
    sampling noise (Bartlett's variance ``(1 + 2 Σ ρ_k²) / n`` of a sample autocorrelation at
    lags where the true one has died out; M. S. Bartlett, J. R. Stat. Soc. Suppl. 8, 27–41,
    1946): a monotone autocorrelation's sampling noise must not read as a period.
    """
    acf = np.asarray(acf, float)
    if acf.size < 4 or not np.all(np.isfinite(acf)):
        return float(dt), None
    acf = acf[: max(_window(acf), 4)]
    efold = max(hull_efolding(acf, dt), float(dt))
    depth = WINDOW_FLOOR
    if n_samples is not None:
        noise = math.sqrt((1.0 + 2.0 * float(np.sum(acf[1:] ** 2))) / max(n_samples, 1))
        depth = max(depth, NOISE_SIGMAS * noise)
    if float(np.min(acf)) > -depth:
        return efold, None
    omega0, ratio = spectral_peak(acf, dt)
    if omega0 <= 0 or ratio < PEAK_RATIO:
        return efold, None
    tau, omega = fit_damped_cosine(acf, dt, omega0)
    if not math.isfinite(tau) or tau <= 0:
        return efold, None
    period = 2.0 * math.pi / omega if omega * tau >= MIN_QUALITY else None
    return max(tau, float(dt)), period


def _window(acf: np.ndarray) -> int:
    """Lags worth using: up to the first ``k`` with ``|ρ| < WINDOW_FLOOR`` on all of ``[k, 2k]``."""
    small = np.abs(acf) < WINDOW_FLOOR
    # run[k]: how many lags from k on stay small
    run = np.zeros(acf.size + 1, int)
    for k in range(acf.size - 1, -1, -1):
        run[k] = run[k + 1] + 1 if small[k] else 0
    for k in range(1, acf.size):
        if run[k] >= min(k + 1, acf.size - k):
            return k + 1
    return acf.size


def oscillation_time_scales(runs, dt: float) -> TimeScales:
    """Envelope time and dominant period of each variable of ``runs`` (see the module)."""
    runs = [np.asarray(r, float) for r in runs]
    longest = max(r.shape[0] for r in runs)
    shortest = min(r.shape[0] for r in runs)
    acf = stats.autocorrelation(runs, max(1, min(shortest - 1, longest // 4)))
    if acf.ndim == 1:
        acf = acf[:, None]
    n = sum(r.shape[0] for r in runs)
    found = [acf_time_scales(acf[:, j], dt, n) for j in range(acf.shape[1])]
    return TimeScales(tuple(f[0] for f in found), tuple(f[1] for f in found))
