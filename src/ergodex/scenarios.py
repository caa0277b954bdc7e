"""Published benchmark systems and the demo scenarios' data generators.

Each scenario returns a :class:`~ergodex.series.Series` generated reproducibly from a seed, and
has its true equations available as a :class:`~ergodex.surrogate.Surrogate`, so that a test can
integrate the truth through the same path as a fitted model.

- :func:`convection_loop` -- the demo: a laboratory heated convection loop whose three sensors
  (``flow``, ``dT_across``, ``dT_up``) follow the Lorenz-63 equations, with small sensor noise.
  :func:`lorenz63_surrogate` and :func:`convection_loop_regimes` go with it.
- :func:`station_ring` -- a ring of 40 weather stations around a latitude circle following the
  Lorenz-96 equations; the reduced-order case. :func:`lorenz96_surrogate` goes with it.
- :func:`ornstein_uhlenbeck` -- a multivariate Ornstein-Uhlenbeck process with analytic stationary
  covariance (:func:`ou_stationary_covariance`) and lagged covariance
  (:func:`ou_autocovariance`); :func:`ou_surrogate`.
- :func:`double_well` -- Langevin motion in the double-well potential ``V = x^4/4 - x^2/2``, with
  analytic stationary density (:func:`double_well_density`); :func:`double_well_surrogate`.

Deterministic systems are integrated with the classical fourth-order Runge-Kutta method (RK4) on a
fine internal step by compiled loops (:func:`lorenz63_trajectories`, :func:`lorenz96_trajectories`;
numba, cached on disk); :func:`rk4_trajectories` is the same method in plain NumPy for any
right-hand side. ``tests/test_scenarios.py`` checks both against ``scipy.integrate.solve_ivp``
(DOP853 at tight tolerance). The double well uses Euler-Maruyama on a fine internal step (also
compiled); the Ornstein-Uhlenbeck process uses its exact discretisation (no step error).

References
----------
.. [1] E. N. Lorenz, "Deterministic nonperiodic flow", J. Atmos. Sci. 20, 130-141 (1963).
.. [2] E. N. Lorenz, "Predictability: a problem partly solved", Proc. ECMWF Seminar on
   Predictability, vol. 1, 1-18 (1996).
.. [3] P. Ehrhard and U. Mueller, "Dynamical behaviour of natural convection in a single-phase
   loop", J. Fluid Mech. 217, 487-518 (1990) -- the convection loop as a Lorenz system.
.. [4] C. W. Gardiner, Stochastic Methods, 4th ed., Springer (2009) -- the multivariate
   Ornstein-Uhlenbeck process, its stationary covariance and autocovariance.
.. [5] D. T. Gillespie, "Exact numerical simulation of the Ornstein-Uhlenbeck process and its
   integral", Phys. Rev. E 54, 2084 (1996).
.. [6] P. E. Kloeden and E. Platen, Numerical Solution of Stochastic Differential Equations,
   Springer (1992) -- Euler-Maruyama.
.. [7] H. Risken, The Fokker-Planck Equation, 2nd ed., Springer (1989) -- stationary density of
   a one-dimensional Langevin equation.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy.linalg import expm, solve_continuous_lyapunov

from ergodex.exceptions import SettingsError
from ergodex.rk4 import rk4_step
from ergodex.series import Series

if TYPE_CHECKING:  # pragma: no cover
    from ergodex.surrogate import Surrogate

__all__ = [
    "CONVECTION_LOOP_VARIABLES",
    "rk4_trajectories",
    "lorenz63_rhs",
    "lorenz63_trajectories",
    "lorenz96_trajectories",
    "lorenz63_fixed_points",
    "lorenz63_surrogate",
    "convection_loop",
    "convection_loop_regimes",
    "lorenz96_rhs",
    "lorenz96_surrogate",
    "station_names",
    "station_ring",
    "ou_stationary_covariance",
    "ou_autocovariance",
    "ou_surrogate",
    "ornstein_uhlenbeck",
    "double_well_potential",
    "double_well_density",
    "double_well_surrogate",
    "double_well",
    "SAMPLE_SEED",
    "write_sample_datasets",
]

#: Sensor names of the convection loop, in the order of the Lorenz-63 variables (x, y, z).
CONVECTION_LOOP_VARIABLES = ("flow", "dT_across", "dT_up")


def _check_positive(name: str, value: Any, *, integer: bool = False) -> None:
    ok = isinstance(value, (int, np.integer)) if integer else isinstance(value, (int, float))
    if isinstance(value, bool) or not ok or not math.isfinite(value) or value <= 0:
        kind = "an integer" if integer else "a finite number"
        raise SettingsError(f"{name} must be {kind} > 0, got {value!r}")


def _check_nonnegative(name: str, value: Any) -> None:
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not (math.isfinite(value) and value >= 0)
    ):
        raise SettingsError(f"{name} must be a finite number >= 0, got {value!r}")


def _n_steps(duration: float, dt: float, what: str = "duration") -> int:
    n = int(round(duration / dt))
    if n < 2:
        raise SettingsError(f"{what}={duration} at dt={dt} gives fewer than 2 samples")
    return n


def _observe(
    trajectories: Callable[..., np.ndarray],
    x0: np.ndarray,
    *,
    dt: float,
    n_out: int,
    spinup: float,
    noise: float,
    rng: np.random.Generator,
    **params: Any,
) -> np.ndarray:
    """Spin ``x0`` up (discarded), record ``n_out`` samples, add Gaussian sensor noise."""
    n_spin = int(round(spinup / dt))
    if n_spin:
        x0 = trajectories(x0, dt=dt, n_out=n_spin + 1, **params)[:, -1]
    traj = trajectories(x0, dt=dt, n_out=n_out, **params)
    if noise > 0:
        traj = traj + rng.normal(0.0, noise, traj.shape)
    return traj


def _series(runs: np.ndarray, names: Sequence[str], dt: float, source: str) -> Series:
    """A scenario's runs (n_runs, n_samples, n_variables) as a Series labelled ``run-1`` ..."""
    return Series.from_arrays(
        list(runs),
        names,
        dt,
        run_labels=[f"run-{i + 1}" for i in range(len(runs))],
        source=source,
    )


# --- integration ---------------------------------------------------------------------------------
def rk4_trajectories(
    rhs: Callable[[np.ndarray], np.ndarray],
    initial_states: np.ndarray,
    *,
    dt: float,
    n_out: int,
    substeps: int,
) -> np.ndarray:
    """Integrate many states at once with RK4 and sample every ``dt``.

    Parameters
    ----------
    rhs : callable
        ``rhs(states) -> derivatives`` on arrays of shape (n_members, n_variables).
    initial_states : ndarray, shape (n_members, n_variables)
    dt : float
        Output interval.
    n_out : int
        Number of outputs; the first is the initial state.
    substeps : int
        RK4 steps per output interval (internal step ``dt / substeps``).

    Returns
    -------
    ndarray, shape (n_members, n_out, n_variables)

    References
    ----------
    .. [1] E. Hairer, S. P. Norsett and G. Wanner, Solving Ordinary Differential Equations I,
       2nd ed., Springer (1993), section II.1 -- the classical Runge-Kutta method.
    """
    x = np.array(initial_states, dtype=np.float64)
    out = np.empty((x.shape[0], n_out, x.shape[1]))
    out[:, 0] = x
    h = dt / substeps
    for k in range(1, n_out):
        for _ in range(substeps):
            x = rk4_step(rhs, x, h)
        out[:, k] = x
    return out


def _kernels() -> dict[str, Any]:
    """The compiled generators (:mod:`ergodex.scenario_kernels`; imports numba when first used)."""
    from ergodex import scenario_kernels as sk

    return {
        "l63": sk.lorenz63_rk4,
        "l96": sk.lorenz96_rk4,
        "double_well": sk.double_well_euler_maruyama,
    }


def lorenz63_trajectories(
    initial_states: Any,
    *,
    dt: float,
    n_out: int,
    substeps: int = 4,
    sigma: float = 10.0,
    rho: float = 28.0,
    beta: float = 8.0 / 3.0,
) -> np.ndarray:
    """Lorenz-63 by compiled RK4 (step ``dt / substeps``), sampled every ``dt``.

    Same result as ``rk4_trajectories(lorenz63_rhs, ...)`` without per-step Python overhead.

    Returns
    -------
    ndarray, shape (n_members, n_out, 3); the first sample is the initial state.
    """
    x0 = np.ascontiguousarray(np.atleast_2d(initial_states), dtype=np.float64)
    out = np.empty((x0.shape[0], n_out, 3))
    _kernels()["l63"](
        x0, dt / substeps, n_out, substeps, float(sigma), float(rho), float(beta), out
    )
    return out


def lorenz96_trajectories(
    initial_states: Any, *, dt: float, n_out: int, substeps: int = 5, forcing: float = 8.0
) -> np.ndarray:
    """Lorenz-96 by compiled RK4 (step ``dt / substeps``), sampled every ``dt``.

    Returns
    -------
    ndarray, shape (n_members, n_out, n); the first sample is the initial state.
    """
    x0 = np.ascontiguousarray(np.atleast_2d(initial_states), dtype=np.float64)
    out = np.empty((x0.shape[0], n_out, x0.shape[1]))
    _kernels()["l96"](x0, dt / substeps, n_out, substeps, float(forcing), out)
    return out


def _monomial(n: int, powers: dict[int, int]):
    from ergodex.surrogate import Term

    p = [0] * n
    for i, e in powers.items():
        p[i] += e
    return Term("monomial", tuple(p))


# --- Lorenz-63: the heated convection loop ------------------------------------------------------
def lorenz63_rhs(
    states: np.ndarray, sigma: float = 10.0, rho: float = 28.0, beta: float = 8.0 / 3.0
) -> np.ndarray:
    """Lorenz-63 right-hand side on states of shape (..., 3) (Lorenz 1963, eq. 25-27)."""
    x, y, z = states[..., 0], states[..., 1], states[..., 2]
    return np.stack([sigma * (y - x), x * (rho - z) - y, x * y - beta * z], axis=-1)


def lorenz63_fixed_points(rho: float = 28.0, beta: float = 8.0 / 3.0) -> np.ndarray:
    """The fixed points C+ and C- = (±a, ±a, rho - 1), a = sqrt(beta (rho - 1)); shape (2, 3)."""
    if rho <= 1:
        raise SettingsError(f"rho must exceed 1 for the convection lobes to exist, got {rho}")
    a = math.sqrt(beta * (rho - 1.0))
    return np.array([[a, a, rho - 1.0], [-a, -a, rho - 1.0]])


def lorenz63_surrogate(
    sigma: float = 10.0, rho: float = 28.0, beta: float = 8.0 / 3.0
) -> Surrogate:
    """The true convection-loop equations (Lorenz-63) as a Surrogate.

    ``d flow/dt = sigma (dT_across - flow)``,
    ``d dT_across/dt = rho flow - dT_across - flow dT_up``,
    ``d dT_up/dt = flow dT_across - beta dT_up``.

    References
    ----------
    .. [1] E. N. Lorenz, "Deterministic nonperiodic flow", J. Atmos. Sci. 20, 130-141 (1963).
    """
    from ergodex.surrogate import Surrogate

    terms = (
        _monomial(3, {0: 1}),
        _monomial(3, {1: 1}),
        _monomial(3, {2: 1}),
        _monomial(3, {0: 1, 1: 1}),
        _monomial(3, {0: 1, 2: 1}),
    )
    coef = np.array(
        [
            [-sigma, sigma, 0.0, 0.0, 0.0],
            [rho, -1.0, 0.0, 0.0, -1.0],
            [0.0, 0.0, -beta, 1.0, 0.0],
        ]
    )
    return Surrogate(
        CONVECTION_LOOP_VARIABLES,
        terms,
        coef,
        kind="polynomial-ode",
        settings={"scenario": "lorenz63", "sigma": sigma, "rho": rho, "beta": beta},
        provenance={"source": "true equations (Lorenz 1963)"},
    )


def convection_loop(
    *,
    seed: int,
    n_runs: int = 4,
    duration: float = 60.0,
    dt: float = 0.01,
    noise: float = 0.05,
    spinup: float = 20.0,
    rho: float = 28.0,
    sigma: float = 10.0,
    beta: float = 8.0 / 3.0,
    substeps: int = 4,
) -> Series:
    """Sensor records of a heated convection loop (the demo scenario).

    The loop's circulation ``flow``, the temperature difference across it ``dT_across`` and the
    departure of the vertical temperature difference from its conduction value ``dT_up`` follow
    the Lorenz-63 equations [1]_ (the single-phase loop reduces to them [2]_). Each run starts from
    its own random state, is integrated for ``spinup`` time units that are thrown away (about 18
    Lyapunov times at the default, so every run sits on the attractor), and is then recorded for
    ``duration`` time units every ``dt``. Independent Gaussian sensor noise of standard deviation
    ``noise`` (in the variables' own units; the signals have standard deviations of about 8-9) is
    added to every reading.

    Parameters
    ----------
    seed : int
        Seed of the ``numpy.random.Generator`` for starting states and sensor noise.
    n_runs : int, default 4
    duration : float, default 60.0
        Recorded time per run (``round(duration / dt)`` samples).
    dt : float, default 0.01
    noise : float, default 0.05
        Standard deviation of the sensor noise; 0 for clean data.
    spinup : float, default 20.0
    rho, sigma, beta : float
        Lorenz-63 parameters (defaults 28, 10, 8/3: the chaotic regime).
    substeps : int, default 4
        RK4 steps per sample (internal step ``dt / substeps``).

    Returns
    -------
    Series
        Variables ``flow``, ``dT_across``, ``dT_up``; run labels ``run-1`` ... .

    References
    ----------
    .. [1] E. N. Lorenz, J. Atmos. Sci. 20, 130-141 (1963).
    .. [2] P. Ehrhard and U. Mueller, J. Fluid Mech. 217, 487-518 (1990).
    """
    _check_positive("n_runs", n_runs, integer=True)
    _check_positive("duration", duration)
    _check_positive("dt", dt)
    _check_nonnegative("noise", noise)
    _check_nonnegative("spinup", spinup)
    _check_positive("substeps", substeps, integer=True)
    rng = np.random.default_rng(seed)
    n_out = _n_steps(duration, dt)
    # Random starts spread over the attractor's neighbourhood; the spin-up removes the transient.
    x0 = np.column_stack(
        [rng.normal(0.0, 8.0, n_runs), rng.normal(0.0, 8.0, n_runs), rng.normal(25.0, 8.0, n_runs)]
    )

    traj = _observe(
        lorenz63_trajectories,
        x0,
        dt=dt,
        n_out=n_out,
        spinup=spinup,
        noise=noise,
        rng=rng,
        substeps=substeps,
        sigma=sigma,
        rho=rho,
        beta=beta,
    )
    return _series(traj, CONVECTION_LOOP_VARIABLES, dt, f"convection_loop(seed={seed})")


def convection_loop_regimes(rho: float = 28.0, beta: float = 8.0 / 3.0) -> dict:
    """Regimes of the convection loop as balls in (flow, dT_across, dT_up).

    - ``clockwise``: the lobe around C+ = (a, a, rho - 1), a = sqrt(beta (rho - 1)), where the
      flow is positive; by our convention positive ``flow`` is clockwise circulation seen from the
      front of the loop.
    - ``counter-clockwise``: the lobe around C- = (-a, -a, rho - 1), negative flow.
    - ``reversal``: a ball on the ``dT_up`` axis at (0, 0, (rho - 1) / 2). Trajectories leave a
      lobe by falling towards the origin along its stable manifold (the ``dT_up`` axis), where the
      circulation almost stops, and the sign with which they leave this region decides the next
      lobe: the loop chooses its direction there.

    The lobe radius ``1.2 a`` (about 10.2 at rho=28) and reversal radius ``0.7 a`` (about 5.9) keep
    the three balls disjoint (the reversal centre is ``sqrt(2 a^2 + ((rho-1)/2)^2)`` ≈ 18.1 from
    each lobe centre, more than 1.2 a + 0.7 a ≈ 16.1) while each is visited many times: on a long
    run at rho=28 (measured while choosing them) about 20 % and 17 % of samples fall in the lobes
    and 13 % in the reversal ball, which is entered about every 1.5 time units. Samples outside
    every ball are unclassified.

    Returns
    -------
    dict
        ``{"regime": [{"name", "kind": "ball", "centre": {variable: value}, "radius"}, ...]}``.
    """
    plus, minus = lorenz63_fixed_points(rho, beta)
    a = float(plus[0])

    def centre(p):
        return {n: float(v) for n, v in zip(CONVECTION_LOOP_VARIABLES, p)}

    return {
        "regime": [
            {"name": "clockwise", "kind": "ball", "centre": centre(plus), "radius": 1.2 * a},
            {
                "name": "counter-clockwise",
                "kind": "ball",
                "centre": centre(minus),
                "radius": 1.2 * a,
            },
            {
                "name": "reversal",
                "kind": "ball",
                "centre": centre([0.0, 0.0, (rho - 1.0) / 2]),
                "radius": 0.7 * a,
            },
        ]
    }


# --- Lorenz-96: the ring of weather stations -----------------------------------------------------
def lorenz96_rhs(states: np.ndarray, forcing: float = 8.0) -> np.ndarray:
    """Lorenz-96 right-hand side, ``dx_i/dt = (x_{i+1} - x_{i-2}) x_{i-1} - x_i + F`` (cyclic)."""
    return (
        (np.roll(states, -1, axis=-1) - np.roll(states, 2, axis=-1)) * np.roll(states, 1, axis=-1)
        - states
        + forcing
    )


def station_names(n: int = 40) -> tuple[str, ...]:
    """``station_01`` ... ``station_<n>`` (zero-padded to at least two digits)."""
    width = max(2, len(str(n)))
    return tuple(f"station_{i + 1:0{width}d}" for i in range(n))


def lorenz96_surrogate(n: int = 40, forcing: float = 8.0) -> Surrogate:
    """The true station-ring equations (Lorenz-96 with ``n`` sites) as a Surrogate.

    References
    ----------
    .. [1] E. N. Lorenz, "Predictability: a problem partly solved", Proc. ECMWF Seminar on
       Predictability (1996).
    """
    from ergodex.surrogate import Surrogate

    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 4:
        raise SettingsError(f"n must be an integer >= 4 (the stencil reaches i-2..i+1), got {n!r}")
    terms = [_monomial(n, {})]
    index: dict[tuple[tuple[int, int], ...], int] = {(): 0}

    def term_index(powers: dict[int, int]) -> int:
        key = tuple(sorted(powers.items()))
        if key not in index:
            index[key] = len(terms)
            terms.append(_monomial(n, powers))
        return index[key]

    rows = []
    for i in range(n):
        row: dict[int, float] = {0: forcing}
        row[term_index({i: 1})] = -1.0
        row[term_index({(i + 1) % n: 1, (i - 1) % n: 1})] = 1.0
        row[term_index({(i - 2) % n: 1, (i - 1) % n: 1})] = -1.0
        rows.append(row)
    coef = np.zeros((n, len(terms)))
    for i, row in enumerate(rows):
        for t, c in row.items():
            coef[i, t] += c
    return Surrogate(
        station_names(n),
        tuple(terms),
        coef,
        kind="polynomial-ode",
        settings={"scenario": "lorenz96", "n": int(n), "forcing": forcing},
        provenance={"source": "true equations (Lorenz 1996)"},
    )


def station_ring(
    *,
    seed: int,
    n_runs: int = 4,
    duration: float = 100.0,
    dt: float = 0.05,
    noise: float = 0.1,
    spinup: float = 20.0,
    forcing: float = 8.0,
    n: int = 40,
    substeps: int = 5,
) -> Series:
    """Readings of a ring of ``n`` weather stations around a latitude circle (Lorenz-96).

    Each station's reading is one Lorenz-96 variable [1]_ on a cyclic ring; with ``forcing=8`` and
    ``n=40`` the ring is chaotic with waves drifting westward. Each run starts at the rest state
    ``F`` plus a small random perturbation, is spun up for ``spinup`` time units (discarded), then
    recorded for ``duration`` time units every ``dt`` (0.05 time units is about six hours in
    Lorenz's scaling). Gaussian sensor noise of standard deviation ``noise`` is added.

    Parameters
    ----------
    seed : int
    n_runs : int, default 4
    duration : float, default 100.0
    dt : float, default 0.05
    noise : float, default 0.1
        Standard deviation of the sensor noise (signals have a standard deviation of about 3.6).
    spinup : float, default 20.0
    forcing : float, default 8.0
    n : int, default 40
    substeps : int, default 5
        RK4 steps per sample (internal step 0.01 at the default ``dt``).

    Returns
    -------
    Series
        Variables ``station_01`` ... ``station_40``; run labels ``run-1`` ... .

    References
    ----------
    .. [1] E. N. Lorenz, Proc. ECMWF Seminar on Predictability (1996).
    """
    _check_positive("n_runs", n_runs, integer=True)
    _check_positive("duration", duration)
    _check_positive("dt", dt)
    _check_nonnegative("noise", noise)
    _check_nonnegative("spinup", spinup)
    _check_positive("substeps", substeps, integer=True)
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 4:
        raise SettingsError(f"n must be an integer >= 4, got {n!r}")
    rng = np.random.default_rng(seed)
    n_out = _n_steps(duration, dt)
    x0 = forcing + rng.normal(0.0, 1.0, (n_runs, n))

    traj = _observe(
        lorenz96_trajectories,
        x0,
        dt=dt,
        n_out=n_out,
        spinup=spinup,
        noise=noise,
        rng=rng,
        substeps=substeps,
        forcing=forcing,
    )
    return _series(traj, station_names(n), dt, f"station_ring(seed={seed})")


# --- Ornstein-Uhlenbeck ---------------------------------------------------------------------------
_OU_DRIFT = ((-1.0, 0.5), (-0.5, -0.5))
_OU_NOISE = ((1.0, 0.3), (0.3, 0.5))


def _ou_matrices(drift: Any, noise: Any) -> tuple[np.ndarray, np.ndarray]:
    A = np.atleast_2d(np.asarray(drift, dtype=np.float64))
    Q = np.atleast_2d(np.asarray(noise, dtype=np.float64))
    n = A.shape[0]
    if A.shape != (n, n) or Q.shape != (n, n):
        raise SettingsError(
            f"drift and noise must be square matrices of one size, got {A.shape} and {Q.shape}"
        )
    if not (np.all(np.isfinite(A)) and np.all(np.isfinite(Q))):
        raise SettingsError("drift and noise must be finite")
    if not np.allclose(Q, Q.T) or np.linalg.eigvalsh(Q).min() < -1e-12 * np.abs(Q).max():
        raise SettingsError("noise must be a symmetric positive semi-definite covariance")
    if np.linalg.eigvals(A).real.max() >= 0:
        raise SettingsError(
            "drift must be stable (every eigenvalue with negative real part) for a stationary "
            f"process; eigenvalues {np.linalg.eigvals(A)}"
        )
    return A, Q


def ou_stationary_covariance(drift: Any = _OU_DRIFT, noise: Any = _OU_NOISE) -> np.ndarray:
    """Stationary covariance C of ``dx = A x dt + dW``, ``cov(dW) = Q dt``.

    C solves the Lyapunov equation ``A C + C A^T + Q = 0`` (Gardiner, Stochastic Methods, the
    multivariate Ornstein-Uhlenbeck process).
    """
    A, Q = _ou_matrices(drift, noise)
    C = solve_continuous_lyapunov(A, -Q)
    return 0.5 * (C + C.T)


def ou_autocovariance(lags: Any, drift: Any = _OU_DRIFT, noise: Any = _OU_NOISE) -> np.ndarray:
    """Stationary lagged covariance ``E[x(t+tau) x(t)^T] = expm(A tau) C`` for lags ``tau >= 0``.

    For a scalar process with drift ``-theta`` the autocorrelation is ``exp(-theta tau)``.

    Returns
    -------
    ndarray, shape (n_lags, n, n)
    """
    A, _ = _ou_matrices(drift, noise)
    C = ou_stationary_covariance(A, noise)
    lags = np.atleast_1d(np.asarray(lags, dtype=np.float64))
    return np.stack([expm(A * tau) @ C for tau in lags])


def _default_names(n: int) -> tuple[str, ...]:
    return tuple(f"x{i + 1}" for i in range(n))


def ou_surrogate(
    drift: Any = _OU_DRIFT, noise: Any = _OU_NOISE, names: Sequence[str] | None = None
) -> Surrogate:
    """The true Ornstein-Uhlenbeck equations as a stochastic linear Surrogate.

    ``dx = A x dt + dW`` with ``cov(dW) = Q dt``: linear monomial terms with coefficients ``A``
    and ``noise = Q``.
    """
    from ergodex.surrogate import Surrogate

    A, Q = _ou_matrices(drift, noise)
    n = A.shape[0]
    terms = tuple(_monomial(n, {i: 1}) for i in range(n))
    return Surrogate(
        tuple(names) if names is not None else _default_names(n),
        terms,
        A,
        kind="linear-stochastic",
        noise=Q,
        settings={"scenario": "ornstein-uhlenbeck", "drift": A.tolist(), "noise": Q.tolist()},
        provenance={"source": "true equations (Ornstein-Uhlenbeck process)"},
    )


def ornstein_uhlenbeck(
    *,
    seed: int,
    drift: Any = _OU_DRIFT,
    noise: Any = _OU_NOISE,
    n_runs: int = 4,
    duration: float = 200.0,
    dt: float = 0.05,
    names: Sequence[str] | None = None,
) -> Series:
    """Samples of a stationary multivariate Ornstein-Uhlenbeck process.

    ``dx = A x dt + dW``, ``cov(dW) = Q dt``. Each run starts from a draw of the stationary
    distribution N(0, C) and is advanced with the exact transition
    ``x_{k+1} = expm(A dt) x_k + xi``, ``xi ~ N(0, C - expm(A dt) C expm(A dt)^T)`` [1]_, so the
    samples carry no step-size error and their statistics can be checked against the analytic
    ones (:func:`ou_stationary_covariance`, :func:`ou_autocovariance`) within sampling error.

    Parameters
    ----------
    seed : int
    drift : array_like (n, n)
        Stable drift matrix A.
    noise : array_like (n, n)
        Noise covariance per unit time Q.
    n_runs : int, default 4
    duration : float, default 200.0
    dt : float, default 0.05
    names : sequence of str, optional
        Default ``x1 ... xn``.

    References
    ----------
    .. [1] D. T. Gillespie, Phys. Rev. E 54, 2084 (1996).
    .. [2] C. W. Gardiner, Stochastic Methods, 4th ed., Springer (2009).
    """
    A, Q = _ou_matrices(drift, noise)
    _check_positive("n_runs", n_runs, integer=True)
    _check_positive("duration", duration)
    _check_positive("dt", dt)
    n = A.shape[0]
    n_out = _n_steps(duration, dt)
    C = ou_stationary_covariance(A, Q)
    F = expm(A * dt)
    S = C - F @ C @ F.T
    L_c = _psd_factor(C)
    L_s = _psd_factor(0.5 * (S + S.T))
    rng = np.random.default_rng(seed)
    out = np.empty((n_runs, n_out, n))
    x = rng.standard_normal((n_runs, n)) @ L_c.T
    out[:, 0] = x
    shocks = rng.standard_normal((n_out - 1, n_runs, n)) @ L_s.T
    for k in range(1, n_out):
        x = x @ F.T + shocks[k - 1]
        out[:, k] = x
    return _series(
        out,
        tuple(names) if names is not None else _default_names(n),
        dt,
        f"ornstein_uhlenbeck(seed={seed})",
    )


def _psd_factor(M: np.ndarray) -> np.ndarray:
    """L with L L^T = M for a symmetric positive semi-definite M (eigen-decomposition)."""
    w, V = np.linalg.eigh(M)
    return V * np.sqrt(np.clip(w, 0.0, None))


# --- double-well Langevin ------------------------------------------------------------------------
def double_well_potential(x: Any) -> np.ndarray:
    """``V(x) = x^4 / 4 - x^2 / 2``: minima at ±1, barrier height 1/4 at 0."""
    x = np.asarray(x, dtype=np.float64)
    return 0.25 * x**4 - 0.5 * x**2


def double_well_density(x: Any, noise: float = 0.7) -> np.ndarray:
    """Normalised stationary density of ``dx = -V'(x) dt + s dW``: ``p ∝ exp(-2 V(x) / s^2)``.

    The stationary Fokker-Planck equation of a one-dimensional gradient Langevin equation has
    this solution (Risken, The Fokker-Planck Equation, 2nd ed.); the normalising
    constant is computed by adaptive quadrature (``scipy.integrate.quad``).
    """
    from scipy.integrate import quad

    _check_positive("noise", noise)
    s2 = noise**2
    # Shift by the minimum of V (-1/4) so the integrand peaks at 1 and cannot overflow.
    unnorm = lambda u: math.exp(-2.0 * (double_well_potential(u) + 0.25) / s2)  # noqa: E731
    z = 2.0 * quad(unnorm, 0.0, np.inf)[0]
    x = np.asarray(x, dtype=np.float64)
    return np.exp(-2.0 * (double_well_potential(x) + 0.25) / s2) / z


def double_well_surrogate(noise: float = 0.7, name: str = "x") -> Surrogate:
    """The true double-well Langevin equation ``dx = (x - x^3) dt + s dW`` as a Surrogate.

    The noise covariance per unit time is ``s^2``.
    """
    from ergodex.surrogate import Surrogate

    _check_positive("noise", noise)
    terms = (_monomial(1, {0: 1}), _monomial(1, {0: 3}))
    return Surrogate(
        (name,),
        terms,
        np.array([[1.0, -1.0]]),
        kind="polynomial-sde",
        noise=np.array([[noise**2]]),
        settings={"scenario": "double-well", "noise": noise},
        provenance={"source": "true equations (double-well Langevin)"},
    )


def double_well(
    *,
    seed: int,
    n_runs: int = 4,
    duration: float = 400.0,
    dt: float = 0.05,
    noise: float = 0.7,
    spinup: float = 10.0,
    substeps: int = 25,
    name: str = "x",
) -> Series:
    """Langevin motion in a double well, ``dx = (x - x^3) dt + s dW``.

    Euler-Maruyama [1]_ with internal step ``dt / substeps`` (0.002 at the defaults; the
    drift's rate near the wells is ``V''(±1) = 2``, so ``h V''`` is 0.004: far inside stability,
    and the method's O(h) bias on the stationary statistics is of that order), sampled every
    ``dt``. With ``s = 0.7`` the barrier ``1/4`` is about one ``s^2/2`` high, so the process hops
    between the wells at ±1 about every ten time units (Kramers' rate
    ``sqrt(V''(1) |V''(0)|) / (2 pi) exp(-2 Delta V / s^2)`` ≈ 0.08 per time unit [2]_).

    References
    ----------
    .. [1] P. E. Kloeden and E. Platen, Numerical Solution of Stochastic Differential Equations,
       Springer (1992), section 10.2.
    .. [2] H. Risken, The Fokker-Planck Equation, 2nd ed., Springer (1989).
    """
    _check_positive("n_runs", n_runs, integer=True)
    _check_positive("duration", duration)
    _check_positive("dt", dt)
    _check_positive("noise", noise)
    _check_nonnegative("spinup", spinup)
    _check_positive("substeps", substeps, integer=True)
    rng = np.random.default_rng(seed)
    n_out = _n_steps(duration, dt)
    n_spin = int(round(spinup / dt))
    h = dt / substeps
    amp = noise * math.sqrt(h)
    x = rng.choice([-1.0, 1.0], n_runs) + rng.normal(0.0, 0.1, n_runs)
    out = np.empty((n_runs, n_out))
    kernel = _kernels()["double_well"]
    total = n_spin + n_out
    chunk = max(1, 200_000 // (substeps * n_runs))  # bounded memory for the increments
    for k0 in range(0, total, chunk):
        dw = rng.standard_normal((min(chunk, total - k0), substeps, n_runs))
        kernel(x, h, amp, dw, out, k0 - n_spin)
    return _series(out[:, :, None], (name,), dt, f"double_well(seed={seed})")


# --- committed sample data ------------------------------------------------------------------------
#: Seed of the committed sample datasets (the demo's default seed).
SAMPLE_SEED = 2026


#: The sample datasets: folder name -> (generator, description). The demo writes one of them.
SAMPLE_DATASETS: dict[str, tuple[Any, str]] = {
    "convection-loop": (
        "convection_loop",
        "Heated convection loop: three sensors (flow, dT_across, dT_up) following the "
        "Lorenz-63 equations (sigma=10, rho=28, beta=8/3) with Gaussian sensor noise 0.05.",
    ),
    "station-ring": (
        "station_ring",
        "Ring of 40 weather stations around a latitude circle following the Lorenz-96 "
        "equations (N=40, F=8) with Gaussian sensor noise 0.1.",
    ),
}


def write_sample_dataset(
    name: str, root: Any = "datasets", *, seed: int = SAMPLE_SEED, digits: int = 7
):
    """Write one sample dataset, ``<root>/<name>``: a CSV file per run plus ``dataset.toml``.

    Generated from ``seed`` with the scenario's defaults, last two runs held out for
    validation, values written with ``digits`` significant digits (far finer than the sensor
    noise) to keep the files small. Returns the manifest's path.
    """
    from pathlib import Path

    from ergodex.writers import write_dataset

    if name not in SAMPLE_DATASETS:
        raise SettingsError(
            f"unknown sample dataset {name!r}; choose one of {sorted(SAMPLE_DATASETS)}"
        )
    generator, description = SAMPLE_DATASETS[name]
    series = globals()[generator](seed=seed)
    return write_dataset(
        Path(root) / name,
        series,
        name=name,
        holdout=2,
        description=description,
        provenance={"generator": f"ergodex.scenarios.{generator}", "seed": seed, "digits": digits},
        digits=digits,
    )


def write_sample_datasets(root: Any = "datasets", *, seed: int = SAMPLE_SEED, digits: int = 7):
    """Write every sample dataset under ``root`` (see :func:`write_sample_dataset`)."""
    return [write_sample_dataset(name, root, seed=seed, digits=digits) for name in SAMPLE_DATASETS]
