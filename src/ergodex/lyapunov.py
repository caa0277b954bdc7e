"""Lyapunov exponents of a surrogate's deterministic dynamics.

The largest exponent says how fast nearby trajectories part (its inverse is the time over which a
forecast is meaningful); the full spectrum's sum is the average rate of phase-space volume change
(negative for a dissipative system). A surrogate that reproduces the data's statistics should have
exponents close to the true system's; these numbers go into reports, not into the verdict.

Two methods:

- ``"tangent"`` (default): integrate the state together with ``k`` tangent vectors under the
  surrogate's Jacobian (RK4 on the augmented system), re-orthonormalise them by QR every few steps
  and average the logarithms of the diagonal of R (Benettin et al. 1980; Shimada & Nagashima 1979).
- ``"two-trajectory"``: follow a companion trajectory at a small distance, renormalise the distance
  every few steps and average the logarithmic growth (largest exponent only; needs no Jacobian).

Many trajectories are integrated at once (vectorised over members), which both speeds the
computation up and gives an honest standard error from the spread between members. Noise of a
stochastic surrogate is ignored: these are exponents of the deterministic part.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ergodex.exceptions import DataError, SettingsError
from ergodex.integrate import choose_substep
from ergodex.rk4 import rk4_step

__all__ = ["LyapunovResult", "largest_lyapunov", "lyapunov_spectrum"]

_METHODS = ("tangent", "two-trajectory")
# The default RK4 step is integrate.choose_substep's with a tenth of the stability limit at the
# fastest local rate (rather than the quarter used for ensembles): the truncation error then stays
# well below the statistical error of finite-time exponents. The averaging time plays the output
# interval, so it is a whole number of steps.
_STEP_SAFETY = 0.1


@dataclass
class LyapunovResult:
    """Exponents with their spread over trajectories.

    Attributes
    ----------
    exponents : ndarray, shape (k,)
        Mean over the trajectories that stayed finite, largest first (per unit time).
    standard_error : ndarray, shape (k,)
        Standard deviation over trajectories divided by the square root of their number.
    per_member : ndarray, shape (n_members, k)
        Finite-time exponents of each trajectory (NaN for one that blew up).
    time : float
        Averaging time per trajectory (after the transient).
    step : float
        RK4 step used.
    method : str
    n_blown_up : int
    """

    exponents: np.ndarray
    standard_error: np.ndarray
    per_member: np.ndarray
    time: float
    step: float
    method: str
    n_blown_up: int


def _field(surrogate):
    """``rhs(states)`` of the surrogate: its compiled term program when it has a term table."""
    if hasattr(surrogate, "term_tables"):
        from ergodex import kernels

        program = kernels.build_program(surrogate.term_tables(), surrogate.n_variables)
        return lambda states: kernels.evaluate(program, states)
    return surrogate.rhs


def _check(initial_states, time, transient, renormalise_every, n):
    x = np.array(initial_states, dtype=float, ndmin=2)
    if x.ndim != 2 or x.shape[1] != n:
        raise DataError(f"initial_states must be (n_members, {n}); got {np.shape(initial_states)}")
    if not np.all(np.isfinite(x)):
        raise DataError("initial_states contain non-finite values")
    if not time > 0 or not transient >= 0:
        raise SettingsError(f"time must be > 0 and transient ≥ 0; got {time}, {transient}")
    if int(renormalise_every) < 1:
        raise SettingsError(f"renormalise_every must be ≥ 1; got {renormalise_every}")
    return x


def lyapunov_spectrum(
    surrogate,
    initial_states,
    *,
    n_exponents: int | None = None,
    time: float = 50.0,
    transient: float = 5.0,
    step: float | None = None,
    renormalise_every: int = 5,
    seed: int | None = 0,
) -> LyapunovResult:
    """Leading Lyapunov exponents by tangent-space integration and QR re-orthonormalisation.

    Parameters
    ----------
    surrogate : Surrogate
        Anything with ``rhs(states)`` ``(M, n) -> (M, n)`` and ``jacobian(states)``
        ``(M, n) -> (M, n, n)``.
    initial_states : array_like, shape (n_members, n_variables)
        Model-space starting states, one trajectory each (e.g. drawn from the data).
    n_exponents : int, optional
        How many exponents (default all ``n_variables``).
    time : float, default 50
        Averaging time per trajectory.
    transient : float, default 5
        Time integrated first and discarded, so that states settle on the attractor and the
        tangent vectors align with the growing directions.
    step : float, optional
        RK4 step; default :func:`ergodex.integrate.choose_substep` at the initial states with
        a tenth of the RK4 stability limit (``safety=0.1``) and ``time`` as the output interval.
    renormalise_every : int, default 5
        Steps between QR decompositions (tangent vectors must not grow beyond double precision
        or collapse onto one direction).
    seed : int, optional
        Seed of the random initial tangent vectors.

    Returns
    -------
    LyapunovResult

    References
    ----------
    .. [1] G. Benettin, L. Galgani, A. Giorgilli and J.-M. Strelcyn, "Lyapunov characteristic
       exponents for smooth dynamical systems and for Hamiltonian systems; a method for computing
       all of them", Meccanica 15, 9–30 (1980).
    .. [2] I. Shimada and T. Nagashima, "A numerical approach to ergodic problem of dissipative
       dynamical systems", Prog. Theor. Phys. 61, 1605–1616 (1979).
    """
    n = surrogate.n_variables
    k = n if n_exponents is None else int(n_exponents)
    if not 1 <= k <= n:
        raise SettingsError(f"n_exponents must be in 1..{n}; got {n_exponents}")
    x = _check(initial_states, time, transient, renormalise_every, n)
    m = x.shape[0]
    h = choose_substep(surrogate, x, time, safety=_STEP_SAFETY) if step is None else float(step)
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.standard_normal((m, n, k)))
    n_transient = round(transient / h)
    n_steps = round(time / h)
    log_sum = np.zeros((m, k))
    alive = np.ones(m, bool)
    rhs = _field(surrogate)

    def augmented(z):
        # the state and its tangent vectors, packed as one array (m, n + n k)
        states = z[:, :n]
        fx = rhs(states)
        jq = surrogate.jacobian(states) @ z[:, n:].reshape(m, n, k)
        return np.concatenate([fx, jq.reshape(m, n * k)], axis=1)

    total = n_transient + n_steps
    for i in range(1, total + 1):
        # classical RK4 on the augmented system (state, tangent vectors)
        z = rk4_step(augmented, np.concatenate([x, q.reshape(m, n * k)], axis=1), h)
        x, q = z[:, :n], z[:, n:].reshape(m, n, k)
        if i % renormalise_every == 0 or i == n_transient or i == total:
            bad = ~(np.all(np.isfinite(x), axis=1) & np.all(np.isfinite(q), axis=(1, 2)))
            if np.any(bad):
                # a blown-up trajectory is parked at a harmless state and excluded from the mean
                alive &= ~bad
                x[bad] = 0.0
                q[bad] = np.eye(n, k)
            q, r = np.linalg.qr(q)
            if i > n_transient:
                diag = np.abs(np.diagonal(r, axis1=1, axis2=2))
                log_sum += np.log(np.maximum(diag, np.finfo(float).tiny))
            # keep the sign convention fixed so the vectors evolve continuously
            sign = np.sign(np.diagonal(r, axis1=1, axis2=2))
            sign[sign == 0] = 1.0
            q = q * sign[:, None, :]
    per_member = log_sum / (n_steps * h)
    per_member[~alive] = np.nan
    return _summarise(per_member, n_steps * h, h, "tangent")


def _summarise(per_member, time, step, method) -> LyapunovResult:
    alive = np.all(np.isfinite(per_member), axis=1)
    n_alive = int(alive.sum())
    if n_alive == 0:
        nan = np.full(per_member.shape[1], np.nan)
        return LyapunovResult(nan, nan, per_member, time, step, method, per_member.shape[0])
    good = per_member[alive]
    se = (
        good.std(axis=0, ddof=1) / np.sqrt(n_alive)
        if n_alive > 1
        else np.full(good.shape[1], np.nan)
    )
    return LyapunovResult(
        good.mean(axis=0), se, per_member, time, step, method, per_member.shape[0] - n_alive
    )


def largest_lyapunov(
    surrogate,
    initial_states,
    *,
    method: str = "tangent",
    time: float = 50.0,
    transient: float = 5.0,
    step: float | None = None,
    renormalise_every: int = 5,
    separation: float = 1e-8,
    seed: int | None = 0,
) -> LyapunovResult:
    """Largest Lyapunov exponent of a surrogate's deterministic part.

    Parameters
    ----------
    surrogate : Surrogate
    initial_states : array_like, shape (n_members, n_variables)
        Model-space starting states.
    method : {"tangent", "two-trajectory"}
        ``"tangent"`` evolves one tangent vector with the Jacobian (see
        :func:`lyapunov_spectrum`); ``"two-trajectory"`` follows a companion trajectory at
        distance ``separation`` (relative to the state's size), renormalised every
        ``renormalise_every`` steps, and needs only ``rhs``.
    time, transient, step, renormalise_every, seed
        As in :func:`lyapunov_spectrum`.
    separation : float, default 1e-8
        Initial and renormalised relative distance of the companion (two-trajectory method).

    Returns
    -------
    LyapunovResult
        With one exponent.

    References
    ----------
    .. [1] G. Benettin, L. Galgani and J.-M. Strelcyn, "Kolmogorov entropy and numerical
       experiments", Phys. Rev. A 14, 2338–2345 (1976) (two-trajectory renormalisation).
    .. [2] A. Wolf, J. B. Swift, H. L. Swinney and J. A. Vastano, "Determining Lyapunov exponents
       from a time series", Physica D 16, 285–317 (1985).
    """
    if method not in _METHODS:
        raise SettingsError(f"method must be one of {list(_METHODS)}; got {method!r}")
    if method == "tangent":
        return lyapunov_spectrum(
            surrogate,
            initial_states,
            n_exponents=1,
            time=time,
            transient=transient,
            step=step,
            renormalise_every=renormalise_every,
            seed=seed,
        )
    n = surrogate.n_variables
    x = _check(initial_states, time, transient, renormalise_every, n)
    m = x.shape[0]
    f = _field(surrogate)
    if step is None:
        try:
            h = choose_substep(surrogate, x, time, safety=_STEP_SAFETY)
        except (NotImplementedError, AttributeError):
            h = 0.01
    else:
        h = float(step)
    rng = np.random.default_rng(seed)
    scale = np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1.0)
    d0 = separation * scale
    u = rng.standard_normal((m, n))
    y = x + d0 * u / np.linalg.norm(u, axis=1, keepdims=True)
    both = np.concatenate([x, y])

    n_transient = round(transient / h)
    n_steps = round(time / h)
    log_sum = np.zeros(m)
    alive = np.ones(m, bool)
    total = n_transient + n_steps
    for i in range(1, total + 1):
        both = rk4_step(f, both, h)
        if i % renormalise_every == 0 or i == n_transient or i == total:
            xs, ys = both[:m], both[m:]
            diff = ys - xs
            dist = np.linalg.norm(diff, axis=1)
            bad = ~(
                np.all(np.isfinite(both[:m]), axis=1)
                & np.all(np.isfinite(both[m:]), axis=1)
                & (dist > 0)
            )
            alive &= ~bad
            dist[bad] = d0[bad, 0]
            diff[bad] = d0[bad] * np.eye(n)[0]
            xs[bad] = 0.0
            if i > n_transient:
                log_sum += np.log(dist / d0[:, 0])
            ys = xs + diff * (d0[:, 0] / dist)[:, None]
            both = np.concatenate([xs, ys])
    per_member = (log_sum / (n_steps * h))[:, None]
    per_member[~alive] = np.nan
    return _summarise(per_member, n_steps * h, h, "two-trajectory")
