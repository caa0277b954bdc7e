"""The Kuramoto–Sivashinsky equation on a periodic domain: ETDRK4 integrator and a scenario.

    u_t + u u_x + u_xx + u_xxxx = 0,    x in [0, L) periodic.

In Fourier space (wavenumbers ``k = 2 pi m / L``) the linear part is diagonal,
``v_k' = (k^2 - k^4) v_k + N_k(v)`` with ``N_k = -(i k / 2) FFT(u^2)_k``; the high wavenumbers
are very stiff (``k^4`` reaches several hundred on a 32-point grid at ``L = 22``), so the data
are made by the exponential time-differencing fourth-order Runge–Kutta scheme (ETDRK4) of Cox &
Matthews [1]_ with the φ-functions evaluated by a contour integral around each ``h (k^2 - k^4)``,
as Kassam & Trefethen [2]_ do (this avoids the cancellation of ``(e^z - 1 - z - ...) / z^3`` for
small ``z``). The products ``u^2`` are taken on the grid (pseudo-spectral, not dealiased; the
spectrum at ``L = 22`` falls by many decades before the grid's last wavenumber). The Nyquist
wavenumber's derivative is set to zero, as for any odd derivative on an even grid [3]_.

With ``L = 22`` the flow is chaotic with a leading Lyapunov exponent near 0.048 [4]_; its
spatial mean is conserved exactly (the ``k = 0`` mode has no linear part and no nonlinear
forcing). The domain is homogeneous (every shift of ``x`` is a symmetry), so a reduced model may
use Fourier modes.

Numerics only: no I/O.

References
----------
.. [1] S. M. Cox and P. C. Matthews, "Exponential time differencing for stiff systems",
   J. Comput. Phys. 176, 430-455 (2002).
.. [2] A.-K. Kassam and L. N. Trefethen, "Fourth-order time-stepping for stiff PDEs",
   SIAM J. Sci. Comput. 26, 1214-1233 (2005).
.. [3] L. N. Trefethen, Spectral Methods in MATLAB, SIAM (2000), ch. 3.
.. [4] P. Cvitanović, R. L. Davidchack and E. Siminos, "On the state space geometry of the
   Kuramoto-Sivashinsky flow in a periodic domain", SIAM J. Appl. Dyn. Syst. 9, 1-33 (2010).
.. [5] G. Benettin, L. Galgani, A. Giorgilli and J.-M. Strelcyn, "Lyapunov characteristic
   exponents for smooth dynamical systems", Meccanica 15, 9-20 (1980).
"""

from __future__ import annotations

import numpy as np

from ergodex.exceptions import SettingsError
from ergodex.scenarios import _check_nonnegative, _check_positive, _n_steps, _series
from ergodex.series import Series

__all__ = [
    "wavenumbers",
    "ks_rhs",
    "ETDRK4",
    "ks_trajectories",
    "ks_lyapunov_exponent",
    "ks_energy_production",
    "ks_station_names",
    "kuramoto_sivashinsky",
]


def wavenumbers(n_points: int, length: float) -> np.ndarray:
    """Wavenumbers ``2 pi m / L``, ``m = 0 .. n_points // 2``, of :func:`numpy.fft.rfft`."""
    return 2.0 * np.pi * np.arange(n_points // 2 + 1) / length


def _odd_derivative_factor(n_points: int, length: float) -> np.ndarray:
    """``i k`` with the Nyquist entry zeroed (an odd derivative of the Nyquist mode is not real)."""
    k = wavenumbers(n_points, length)
    if n_points % 2 == 0:
        k[-1] = 0.0
    return 1j * k


def ks_rhs(u: np.ndarray, length: float) -> np.ndarray:
    """Tendency ``-u u_x - u_xx - u_xxxx`` on the grid, pseudo-spectrally (last axis = space).

    The same discrete equations as :class:`ETDRK4` integrates; for checks and reference solvers.
    """
    u = np.asarray(u, dtype=np.float64)
    n = u.shape[-1]
    k = wavenumbers(n, length)
    v = np.fft.rfft(u, axis=-1)
    nonlinear = -0.5 * _odd_derivative_factor(n, length) * np.fft.rfft(u * u, axis=-1)
    return np.fft.irfft((k**2 - k**4) * v + nonlinear, n=n, axis=-1)


def ks_energy_production(u: np.ndarray, length: float) -> np.ndarray:
    """``d/dt (1/2) mean(u^2)`` predicted by the energy balance: ``mean(u_x^2) - mean(u_xx^2)``.

    The nonlinear term moves energy between wavenumbers but adds none (``mean(u^2 u_x) = 0`` on a
    periodic domain), so the rate of change of the energy is the linear part's alone: growth by
    the anti-diffusion ``-u_xx`` minus dissipation by the hyper-diffusion ``u_xxxx``.
    """
    u = np.asarray(u, dtype=np.float64)
    n = u.shape[-1]
    v = np.fft.rfft(u, axis=-1) / n
    k = wavenumbers(n, length)
    weight = np.full(k.shape, 2.0)  # each positive wavenumber stands for itself and -k
    weight[0] = 1.0
    if n % 2 == 0:
        weight[-1] = 1.0
    power = weight * np.abs(v) ** 2
    return np.sum(power * (k**2 - k**4), axis=-1)


class ETDRK4:
    """ETDRK4 stepper for the Kuramoto–Sivashinsky equation on ``n_points`` grid points.

    Parameters
    ----------
    n_points : int
        Grid points (even); the state is real, shape (..., n_points).
    length : float
        Domain length ``L``.
    step : float
        Time step ``h``.
    contour_points : int, default 32
        Points on the circle of radius 1 around each ``h (k^2 - k^4)`` over which the φ-functions
        are averaged (Kassam & Trefethen use 32 around the full circle, eq. (2.5) and §3).
    """

    def __init__(
        self, n_points: int, length: float, step: float, *, contour_points: int = 32
    ) -> None:
        self.n_points = n_points
        self.length = length
        self.step = step
        self.contour_points = contour_points
        if isinstance(self.n_points, bool) or int(self.n_points) != self.n_points:
            raise SettingsError(f"n_points must be an even integer >= 8, got {self.n_points!r}")
        if self.n_points < 8 or self.n_points % 2:
            raise SettingsError(f"n_points must be an even integer >= 8, got {self.n_points!r}")
        _check_positive("length", self.length)
        _check_positive("step", self.step)
        _check_positive("contour_points", self.contour_points, integer=True)
        h = self.step
        k = wavenumbers(self.n_points, self.length)
        linear = k**2 - k**4
        roots = np.exp(2j * np.pi * (np.arange(self.contour_points) + 0.5) / self.contour_points)
        z = h * linear[:, None] + roots[None, :]
        ez = np.exp(z)
        # Cox & Matthews (2002) eq. (26) coefficients, averaged over the contour (Kassam &
        # Trefethen 2005, eq. (2.5)); real parts because the linear operator is real.
        self._e = np.exp(h * linear)
        self._e2 = np.exp(h * linear / 2.0)
        self._q = h * np.real(np.mean((np.exp(z / 2.0) - 1.0) / z, axis=1))
        f1 = np.mean((-4.0 - z + ez * (4.0 - 3.0 * z + z**2)) / z**3, axis=1)
        f2 = np.mean((2.0 + z + ez * (z - 2.0)) / z**3, axis=1)
        f3 = np.mean((-4.0 - 3.0 * z - z**2 + ez * (4.0 - z)) / z**3, axis=1)
        self._f1 = h * np.real(f1)
        self._f2 = h * np.real(f2)
        self._f3 = h * np.real(f3)
        self._g = -0.5 * _odd_derivative_factor(self.n_points, self.length)

    def _nonlinear(self, v: np.ndarray) -> np.ndarray:
        u = np.fft.irfft(v, n=self.n_points, axis=-1)
        return self._g * np.fft.rfft(u * u, axis=-1)

    def advance(self, v: np.ndarray, n_steps: int) -> np.ndarray:
        """Take ``n_steps`` steps from the Fourier coefficients ``v`` (rfft of the grid values)."""
        e, e2, q = self._e, self._e2, self._q
        f1, f2, f3 = self._f1, self._f2, self._f3
        for _ in range(n_steps):
            nv = self._nonlinear(v)
            a = e2 * v + q * nv
            na = self._nonlinear(a)
            b = e2 * v + q * na
            nb = self._nonlinear(b)
            c = e2 * a + q * (2.0 * nb - nv)
            nc = self._nonlinear(c)
            v = e * v + f1 * nv + 2.0 * f2 * (na + nb) + f3 * nc
        return v

    def trajectories(self, u0: np.ndarray, *, substeps: int, n_out: int) -> np.ndarray:
        """Grid values every ``substeps`` steps, ``n_out`` outputs (the first is ``u0``).

        ``u0`` has shape (n_members, n_points); returns (n_members, n_out, n_points).
        """
        u0 = np.atleast_2d(np.asarray(u0, dtype=np.float64))
        out = np.empty((u0.shape[0], n_out, self.n_points))
        out[:, 0] = u0
        v = np.fft.rfft(u0, axis=-1)
        for i in range(1, n_out):
            v = self.advance(v, substeps)
            out[:, i] = np.fft.irfft(v, n=self.n_points, axis=-1)
        return out


def ks_trajectories(
    u0: np.ndarray, *, length: float, dt: float, n_out: int, step: float
) -> np.ndarray:
    """Integrate states (n_members, n_points) with ETDRK4 and sample every ``dt``.

    The internal step is the largest ``dt / m`` (``m`` whole) not above ``step``.
    """
    _check_positive("dt", dt)
    _check_positive("step", step)
    substeps = max(1, int(np.ceil(dt / step - 1e-9)))
    u0 = np.atleast_2d(np.asarray(u0, dtype=np.float64))
    stepper = ETDRK4(u0.shape[-1], length, dt / substeps)
    return stepper.trajectories(u0, substeps=substeps, n_out=n_out)


def ks_lyapunov_exponent(
    u0: np.ndarray,
    *,
    length: float,
    time: float,
    step: float = 0.25,
    interval: float = 1.0,
    size: float = 1e-7,
    rng: np.random.Generator,
) -> np.ndarray:
    """Leading Lyapunov exponent from each state of ``u0`` by Benettin's renormalisation [5]_.

    A copy of each state displaced by ``size`` (in the Euclidean norm of the Fourier
    coefficients) in a random zero-mean direction is integrated beside it; every ``interval``
    time units the growth of the separation is logged and the separation is scaled back to
    ``size``. The mean log growth rate over ``time`` estimates the exponent: one number per
    state, shape (n_members,). Start from states on the attractor (after a spin-up).
    """
    _check_positive("time", time)
    _check_positive("interval", interval)
    u0 = np.atleast_2d(np.asarray(u0, dtype=np.float64))
    substeps = max(1, int(np.ceil(interval / step - 1e-9)))
    stepper = ETDRK4(u0.shape[-1], length, interval / substeps)
    v = np.fft.rfft(u0, axis=-1)
    direction = np.fft.rfft(rng.normal(size=u0.shape), axis=-1)
    direction[:, 0] = 0.0  # the mean is conserved: a change of it would not grow or decay
    direction *= size / np.linalg.norm(direction, axis=-1, keepdims=True)
    w = v + direction
    logs = np.zeros(u0.shape[0])
    n_intervals = int(round(time / interval))
    for _ in range(n_intervals):
        v, w = np.split(stepper.advance(np.concatenate([v, w]), substeps), 2)
        separation = np.linalg.norm(w - v, axis=-1)
        logs += np.log(separation / size)
        w = v + (w - v) * (size / separation)[:, None]
    return logs / (n_intervals * interval)


def ks_station_names(n_points: int) -> tuple[str, ...]:
    """Names of the grid sensors: ``u_01`` ... (zero-padded to a common width)."""
    width = max(2, len(str(n_points)))
    return tuple(f"u_{i + 1:0{width}d}" for i in range(n_points))


def kuramoto_sivashinsky(
    *,
    seed: int,
    n_runs: int = 4,
    duration: float = 2000.0,
    dt: float = 0.5,
    noise: float = 0.05,
    spinup: float = 200.0,
    length: float = 22.0,
    n_points: int = 32,
    step: float = 0.125,
) -> Series:
    """Readings of ``n_points`` evenly spaced sensors of a Kuramoto–Sivashinsky flow.

    Each run starts from a small random smooth zero-mean field (wavenumbers 1–4), is spun up for
    ``spinup`` time units (discarded), then recorded every ``dt`` for ``duration`` time units;
    Gaussian sensor noise of standard deviation ``noise`` is added (the field's own standard
    deviation is about 1.2 at ``L = 22``).

    Parameters
    ----------
    seed : int
    n_runs : int, default 4
    duration : float, default 2000.0
        About 90 Lyapunov times at ``L = 22``.
    dt : float, default 0.5
    noise : float, default 0.05
    spinup : float, default 200.0
    length : float, default 22.0
        Domain length ``L``.
    n_points : int, default 32
        Grid points (even); 32 resolve ``L = 22`` (Cvitanović et al. 2010 use a
        32-point truncation, from memory).
    step : float, default 0.125
        Largest ETDRK4 step.

    Returns
    -------
    Series
        Variables ``u_01`` ...; run labels ``run-1`` ....
    """
    _check_positive("n_runs", n_runs, integer=True)
    _check_positive("duration", duration)
    _check_positive("dt", dt)
    _check_nonnegative("noise", noise)
    _check_nonnegative("spinup", spinup)
    rng = np.random.default_rng(seed)
    n_out = _n_steps(duration, dt)
    coefficients = np.zeros((n_runs, n_points // 2 + 1), dtype=complex)
    coefficients[:, 1:5] = rng.normal(size=(n_runs, 4)) + 1j * rng.normal(size=(n_runs, 4))
    u0 = np.fft.irfft(coefficients, n=n_points, axis=-1)
    u0 *= 0.5 / np.std(u0, axis=-1, keepdims=True)
    n_spin = int(round(spinup / dt))
    if n_spin:
        u0 = ks_trajectories(u0, length=length, dt=dt, n_out=n_spin + 1, step=step)[:, -1]
    runs = ks_trajectories(u0, length=length, dt=dt, n_out=n_out, step=step)
    if noise > 0:
        runs = runs + rng.normal(0.0, noise, runs.shape)
    return _series(
        runs,
        ks_station_names(n_points),
        dt,
        f"Kuramoto-Sivashinsky L={length:g} ({n_points} points), seed {seed}",
    )
