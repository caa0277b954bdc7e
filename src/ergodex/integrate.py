"""Ensemble integration of a surrogate: many members advanced together, blow-ups recorded.

:func:`integrate_ensemble` is the hot path of ergodex: validation, candidate sweeps and the
``simulate`` command all integrate a surrogate for a long time from many initial states.

- Deterministic surrogates: classical fourth-order Runge-Kutta (RK4) with ``k`` substeps between
  outputs. The substep is chosen from the stiffness of the surrogate (largest spectral radius of
  its Jacobian over sample states) unless given, and the choice is reported on the result.
- Stochastic surrogates (additive white noise of covariance ``Q`` per unit time): Euler-Maruyama
  or the stochastic Heun scheme, with increments ``sqrt(h) L xi`` where ``L L^T = Q`` (Cholesky
  factor) and ``xi`` standard normal draws from a seeded ``numpy.random.Generator``. The seed is
  recorded on the result.
- A member whose state becomes non-finite or leaves ``bound`` is stopped: its later outputs are
  NaN, and the result records which members, when, and the last accepted state. A blow-up is a
  finding reported through ``status``, never an exception, never a silently shortened array.

Two engines compute the same thing: ``"numba"`` (compiled, generic over the term table, see
:mod:`ergodex.kernels`) and ``"numpy"`` (vectorised over members; the plain reference). The random
draws are made here, in the same order for both, so a seeded run gives the same path in either.

Memory grows with what is kept (members x outputs x kept variables), not with the number of steps.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ergodex.exceptions import ModelLimitError, SettingsError
from ergodex.rk4 import rk4_step
from ergodex.stiffness import spectral_radius, states_to_measure
from ergodex.surrogate import Surrogate

__all__ = [
    "METHODS",
    "ENGINES",
    "EnsembleResult",
    "integrate_ensemble",
    "choose_substep",
    "blowup_bound",
    "stability_limit",
    "ensemble_memory",
    "MAX_SUBSTEPS_PER_OUTPUT",
]

#: Steppers: name -> (stochastic?, distance of the stability region boundary along the negative
#: real axis, in units of h * spectral radius).
METHODS = {
    # Classical RK4: |R(z)| <= 1 for real z in [-2.785, 0] (Hairer & Wanner, Solving ODEs II,
    # sec. IV.2, stability domain of explicit RK methods; value from memory).
    "rk4": (False, 2.785),
    # Euler-Maruyama's drift part is explicit Euler: |1 + z| <= 1, i.e. z in [-2, 0].
    "euler-maruyama": (True, 2.0),
    # Stochastic Heun's drift part is Heun's (explicit trapezoidal) method, real interval [-2, 0].
    "heun": (True, 2.0),
}
ENGINES = ("auto", "numba", "numpy")

#: Fraction of the stability limit used by :func:`choose_substep`. |h lambda| <= 0.7 keeps RK4's
#: per-step amplification error below about (0.7)^5 / 120 ~ 1e-3 for the stiffest mode (the
#: leading term of the RK4 local error; common practice, no source for the factor itself).
SAFETY = 0.25

_MAX_FLOAT = float(np.finfo(np.float64).max)

#: Substep floor: at most a million substeps per output interval (substep >= dt_out / 1e6). A
#: surrogate that needs more is too stiff to integrate explicitly in useful time (a long check
#: takes 1e4-1e6 outputs); it fails with :class:`~ergodex.exceptions.ModelLimitError`.
MAX_SUBSTEPS_PER_OUTPUT = 10**6

#: Member-substeps per compiled call of a deterministic run: bounds how long one call runs, so
#: that the time limit is checked every fraction of a second and a run that has lost every
#: member stops (common practice, no source).
_WORK_PER_CALL = 1 << 22


@dataclass
class EnsembleResult:
    """Outputs and status of an ensemble run (all times on the output clock: 0 = end of spin-up).

    Attributes
    ----------
    times : ndarray, shape (n_out,)
        Output times ``0, dt_out, 2 dt_out, …``.
    states : ndarray, shape (n_members, n_out, n_kept)
        Model-space states of the kept variables; NaN from the first output after a blow-up.
    blown_up : ndarray, shape (n_members,), bool
    blowup_time : ndarray, shape (n_members,)
        Time of the substep at which the member was stopped; NaN where none. Negative values
        (between ``-spinup`` and 0) mean the member blew up during spin-up.
    last_finite : ndarray, shape (n_members, n_variables)
        Last accepted full state (the final state for members that did not blow up).
    method : str
        ``"rk4"``, ``"euler-maruyama"`` or ``"heun"``.
    substep : float
        Integration step actually used (``dt_out / substeps_per_output``).
    substeps_per_output : int
    seed : int or None
        Seed of the generator that drew the noise (None for deterministic runs).
    status : str
        ``"ok"``, ``"blowup"`` (some members) or ``"all-blowup"``.
    message : str
        One line for people: what was run and what happened.
    variables : tuple of str
        Names of the kept variables (the last axis of ``states``).
    spinup : float
        Spin-up actually integrated (a whole number of substeps).
    spectral_radius : float or None
        Largest spectral radius of the Jacobian over the sample states when the substep was
        chosen automatically.
    engine : str
        ``"numba"`` or ``"numpy"``.
    """

    times: np.ndarray
    states: np.ndarray
    blown_up: np.ndarray
    blowup_time: np.ndarray
    last_finite: np.ndarray
    method: str
    substep: float
    substeps_per_output: int
    seed: int | None
    status: str
    message: str
    variables: tuple[str, ...] = ()
    spinup: float = 0.0
    spectral_radius: float | None = None
    engine: str = "numpy"
    bound: np.ndarray | None = field(default=None, repr=False)

    @property
    def n_members(self) -> int:
        return int(self.states.shape[0])

    @property
    def n_blown_up(self) -> int:
        """Number of members that were stopped."""
        return int(np.count_nonzero(self.blown_up))

    def valid(self, member: int) -> slice:
        """Slice of the outputs of ``member`` that precede its blow-up (all outputs if none)."""
        if not self.blown_up[member]:
            return slice(0, len(self.times))
        return slice(0, _first_output_after(self.times, self.blowup_time[member]))

    def summary(self) -> dict[str, Any]:
        """JSON-ready description of the run (no arrays of states)."""
        return {
            "status": self.status,
            "message": self.message,
            "method": self.method,
            "engine": self.engine,
            "substep": self.substep,
            "substeps_per_output": self.substeps_per_output,
            "spectral_radius": self.spectral_radius,
            "spinup": self.spinup,
            "seed": self.seed,
            "members": self.n_members,
            "outputs": len(self.times),
            "blown_up": self.n_blown_up,
            "blowup_members": [int(m) for m in np.flatnonzero(self.blown_up)],
            "blowup_times": [float(t) for t in self.blowup_time[self.blown_up]],
        }


def _first_output_after(times: np.ndarray, t: float) -> int:
    # Outputs at times strictly before the blow-up (with a little slack for rounding) are valid.
    tol = 1e-9 * max(1.0, abs(float(times[-1])) if len(times) else 1.0)
    return int(np.searchsorted(times, t - tol, side="left"))


def stability_limit(method: str) -> float:
    """Stability boundary of ``method`` along the negative real axis, in units of h * |lambda|."""
    try:
        return METHODS[method][1]
    except KeyError:
        raise SettingsError(f"method {method!r} is not one of {', '.join(METHODS)}") from None


def _spectral_radius(surrogate: Surrogate, sample_states: Any, max_states: int = 256) -> float:
    x = np.asarray(sample_states, dtype=np.float64)
    if x.ndim == 1:
        x = x[None, :]
    if x.ndim != 2 or x.shape[1] != surrogate.n_variables:
        raise SettingsError(
            f"sample_states: shape {np.shape(sample_states)}, expected (M, {surrogate.n_variables})"
        )
    x = x[np.all(np.isfinite(x), axis=1)]
    if len(x) == 0:
        raise SettingsError("sample_states: no finite state to measure the stiffness at")
    # Sparse Jacobian from the term table, exact eigenvalues for small models and a short
    # Arnoldi estimate (with a margin, capped by the Gershgorin bound) for large ones; the work
    # arrays are filled in bounded batches (ergodex.stiffness).
    max_states = states_to_measure(surrogate.n_variables, max_states)
    if len(x) > max_states:
        # Evenly spaced picks: deterministic and spread over the whole sample.
        x = x[np.linspace(0, len(x) - 1, max_states).astype(np.int64)]
    return spectral_radius(surrogate, x)


def choose_substep(
    surrogate: Surrogate,
    sample_states: Any,
    dt_out: float,
    *,
    method: str = "rk4",
    safety: float = SAFETY,
) -> float:
    """Largest substep that divides ``dt_out`` and keeps the scheme well inside its stability
    region.

    The stiffness is measured as the largest spectral radius ``rho`` of the Jacobian over (up to
    256 of) ``sample_states``, from the sparse Jacobian of the term table: exact up to 32
    variables, above that a short Arnoldi estimate with a 15 % margin at fewer states
    (:func:`ergodex.stiffness.spectral_radius`); the substep is at most ``safety * limit / rho``
    where ``limit`` is the stability boundary of ``method`` on the negative real axis (2.785 for
    RK4), and ``dt_out`` is an integer multiple of it.

    Parameters
    ----------
    surrogate : Surrogate
    sample_states : array_like, shape (M, n_variables)
        Model-space states typical of the run (e.g. reference data or initial states).
    dt_out : float
        Output interval (> 0).
    method : str, default "rk4"
    safety : float, default 0.25

    Returns
    -------
    float
        ``dt_out / k`` for the smallest integer ``k >= 1`` that satisfies the bound.

    Raises
    ------
    ModelLimitError
        When ``k`` would exceed :data:`MAX_SUBSTEPS_PER_OUTPUT` (the substep floor).

    References
    ----------
    .. [1] Hairer, E. & Wanner, G. (1996). Solving Ordinary Differential Equations II: Stiff and
       Differential-Algebraic Problems, 2nd ed., Springer, sec. IV.2.
    """
    return _choose(surrogate, sample_states, dt_out, method, safety)[0]


def _choose(surrogate, sample_states, dt_out, method, safety) -> tuple[float, int, float]:
    dt_out = _positive(dt_out, "dt_out")
    if not 0.0 < float(safety) <= 1.0:
        raise SettingsError(f"safety must be in (0, 1], got {safety}")
    rho = _spectral_radius(surrogate, sample_states)
    limit = stability_limit(method)
    if rho <= 0.0:
        return dt_out, 1, rho
    h_max = float(safety) * limit / rho
    if dt_out / h_max > MAX_SUBSTEPS_PER_OUTPUT:
        raise ModelLimitError(
            f"too stiff: needs substep {h_max:.3g} < floor {dt_out / MAX_SUBSTEPS_PER_OUTPUT:.3g} "
            f"(output interval / {MAX_SUBSTEPS_PER_OUTPUT:.0e}; largest spectral radius of the "
            f"Jacobian {rho:.3g} at states typical of the run); "
            "the surrogate's fastest mode is far "
            "faster than the data's sampling"
        )
    k = max(1, math.ceil(dt_out / h_max - 1e-9))
    return dt_out / k, k, rho


def ensemble_memory(
    n_members: int, n_out: int, n_kept: int, n_variables: int, n_terms: int = 0, *, copies: int = 1
) -> int:
    """Estimated bytes an ensemble run (and ``copies - 1`` copies of its outputs) allocates.

    Counts the kept outputs (``n_members * n_out * n_kept`` float64) ``copies`` times (the run's
    own array, plus the copies a caller makes: data space, statistics pieces), the states and the
    compiled kernel's work arrays (a few rows per variable and term, per member) and the noise
    buffer (2**20 numbers). Used to refuse a run before anything is allocated.
    """
    outputs = 8.0 * float(n_members) * float(n_out) * float(n_kept) * max(1, int(copies))
    work = 8.0 * float(n_members) * (3.0 * (n_variables + n_terms + 3) + 8.0 * n_variables)
    return int(outputs + work + 8.0 * (1 << 20))


def blowup_bound(reference_states: Any, factor: float = 10.0) -> np.ndarray:
    """Box outside which a member counts as blown up: the reference range widened ``factor`` times.

    For each variable, with centre ``c = (max + min) / 2`` and half-range ``r = (max - min) / 2``
    of the reference, the bound is ``[c - factor * r, c + factor * r]``. A variable with zero
    range uses ``r = max(|c|, 1)``.

    Parameters
    ----------
    reference_states : array_like, shape (n_samples, n_variables)
        Reference states in model space (non-finite rows are ignored).
    factor : float, default 10
        How many half-ranges away from the centre a state may go (> 1 keeps the data inside).

    Returns
    -------
    ndarray, shape (n_variables, 2)
        Lower and upper bound per variable.
    """
    x = np.asarray(reference_states, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] == 0:
        raise SettingsError(
            f"reference_states: expected (n_samples, n_variables), got shape {x.shape}"
        )
    factor = _positive(factor, "factor")
    x = x[np.all(np.isfinite(x), axis=1)]
    if len(x) == 0:
        raise SettingsError("reference_states: no finite row")
    lo, hi = x.min(axis=0), x.max(axis=0)
    centre, half = (hi + lo) / 2.0, (hi - lo) / 2.0
    half = np.where(half > 0.0, half, np.maximum(np.abs(centre), 1.0))
    with np.errstate(over="ignore"):  # a range near the float limit widens to +-inf: unbounded
        return np.column_stack([centre - factor * half, centre + factor * half])


def _positive(value: Any, name: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise SettingsError(f"{name} must be a positive number, got {value!r}") from None
    if not (math.isfinite(v) and v > 0.0):
        raise SettingsError(f"{name} must be a positive finite number, got {value!r}")
    return v


def _noise_factor(cov: np.ndarray) -> np.ndarray:
    """``L`` with ``L L^T = cov``.

    Cholesky when positive definite, else from the eigendecomposition.
    """
    try:
        return np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        # Semi-definite (e.g. noise on some variables only): a square root from eigenpairs.
        w, v = np.linalg.eigh(cov)
        return v * np.sqrt(np.clip(w, 0.0, None))


def _resolve_keep(surrogate: Surrogate, keep: Sequence[int | str] | None) -> np.ndarray:
    if keep is None:
        return np.arange(surrogate.n_variables, dtype=np.int64)
    if isinstance(keep, (str, int)):
        keep = [keep]
    out = []
    for item in keep:
        if isinstance(item, str):
            if item not in surrogate.variables:
                raise SettingsError(
                    f"keep: unknown variable {item!r}; "
                    f"the model has {', '.join(surrogate.variables)}"
                )
            out.append(surrogate.variables.index(item))
        elif isinstance(item, (int, np.integer)) and not isinstance(item, bool):
            if not 0 <= int(item) < surrogate.n_variables:
                raise SettingsError(f"keep: index {item} outside 0..{surrogate.n_variables - 1}")
            out.append(int(item))
        else:
            raise SettingsError(f"keep: expected variable names or indices, got {item!r}")
    if not out or len(set(out)) != len(out):
        raise SettingsError("keep: give at least one variable, each once")
    return np.array(out, dtype=np.int64)


def _resolve_seed(seed: Any) -> int:
    if seed is None:
        return int(np.random.SeedSequence().generate_state(1, dtype=np.uint64)[0] >> np.uint64(1))
    if isinstance(seed, np.random.Generator):
        return int(seed.integers(0, 2**63 - 1))
    if isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and int(seed) >= 0:
        return int(seed)
    raise SettingsError(
        f"seed must be a non-negative integer, a numpy Generator or None, got {seed!r}"
    )


def _numba_available() -> bool:
    try:
        import numba  # noqa: F401
    except ImportError:  # pragma: no cover - numba is a hard dependency
        return False
    return True


def integrate_ensemble(
    surrogate: Surrogate,
    initial_states: Any,
    *,
    dt_out: float,
    n_out: int,
    spinup: float = 0.0,
    substep: float | None = None,
    stiffness_states: Any = None,
    method: str = "auto",
    bound: Any = None,
    seed: int | np.random.Generator | None = None,
    keep: Sequence[int | str] | None = None,
    engine: str = "auto",
    progress: Callable[[int, int], None] | None = None,
    time_limit: float | None = None,
    max_memory: int | str | None = None,
) -> EnsembleResult:
    """Integrate ``M`` members of a surrogate together and record outputs, blow-ups and status.

    Parameters
    ----------
    surrogate : Surrogate
    initial_states : array_like, shape (M, n_variables)
        Finite model-space starting states, one per member.
    dt_out : float
        Time between outputs (> 0).
    n_out : int
        Number of outputs (>= 1); the first is the state at the end of spin-up (time 0).
    spinup : float, default 0
        Time integrated before the first output and discarded (rounded up to whole substeps).
    substep : float, optional
        Integration step; rounded down so that ``dt_out`` is a whole multiple of it. Default:
        :func:`choose_substep` on ``stiffness_states``.
    stiffness_states : array_like, shape (K, n_variables), optional
        Model-space states at which the automatic substep measures the stiffness (default: the
        initial states). Give states typical of the whole run when the members start in a calm
        corner of it (e.g. near a fixed point before a spin-up).
    method : {"auto", "rk4", "euler-maruyama", "heun"}
        ``"auto"``: RK4 for deterministic surrogates, stochastic Heun for stochastic ones.
    bound : array_like, shape (n_variables, 2), optional
        Lower/upper bound per variable (model space) beyond which a member counts as blown up
        (see :func:`blowup_bound`). Non-finite states always count.
    seed : int, numpy.random.Generator or None
        Source of the noise draws (stochastic methods). None draws a fresh seed; the seed used is
        recorded on the result either way.
    keep : sequence of int or str, optional
        Variables to store (default all); memory is ``M * n_out * len(keep)`` floats.
    engine : {"auto", "numba", "numpy"}
        ``"auto"`` uses the compiled kernel.
    progress : callable(done, total), optional
        Called after each block of outputs (for progress bars).
    time_limit : float, optional
        Wall-clock budget in seconds (default: none), checked between compiled calls (each a
        fraction of a second); over it the run stops with :class:`ModelLimitError`.
    max_memory : int or str, optional
        Memory limit for :func:`ensemble_memory` (default: :func:`ergodex.limits.memory_limit`,
        i.e. ``$ERGODEX_MAX_MEMORY`` or half the available memory); over it the run is refused
        before anything is allocated.

    Returns
    -------
    EnsembleResult

    Raises
    ------
    SettingsError
        For bad settings, non-finite initial states, or a run whose estimated memory exceeds the
        limit. Never for a blow-up.
    ModelLimitError
        When the automatic substep would fall below the floor (``dt_out /``
        :data:`MAX_SUBSTEPS_PER_OUTPUT`) or the run exceeds ``time_limit``.

    Notes
    -----
    The run stops as soon as every member has blown up (also during spin-up); the remaining
    outputs are NaN and the status is ``"all-blowup"``.

    References
    ----------
    .. [1] Kutta, W. (1901). Beitrag zur näherungsweisen Integration totaler
       Differentialgleichungen. Z. Math. Phys. 46, 435-453 (classical RK4).
    .. [2] Kloeden, P. E. & Platen, E. (1992). Numerical Solution of Stochastic Differential
       Equations. Springer (Euler-Maruyama, ch. 9; stochastic Heun, ch. 15).
    """
    plan = _plan(
        surrogate,
        initial_states,
        dt_out=dt_out,
        n_out=n_out,
        spinup=spinup,
        substep=substep,
        stiffness_states=stiffness_states,
        method=method,
        bound=bound,
        seed=seed,
        keep=keep,
        engine=engine,
        time_limit=time_limit,
        max_memory=max_memory,
    )
    run = _Members.start(plan)
    block = _block_runner(surrogate, plan, run)
    _spin_up(plan, run, block)
    _record(plan, run, block, progress)
    return _result(surrogate, plan, run)


@dataclass
class _Plan:
    """Checked settings of one ensemble run, with the substep and bounds derived from them."""

    x0: np.ndarray  # (M, n) initial states
    dt_out: float
    n_out: int
    method: str
    stochastic: bool
    engine: str
    h: float  # substep
    k: int  # substeps per output
    rho: float | None  # spectral radius behind an automatic substep
    lower: np.ndarray  # (n,) finite bounds
    upper: np.ndarray
    bound: np.ndarray | None  # as given
    keep: np.ndarray  # kept variable indices
    seed: int | None
    chol: np.ndarray  # (n, n) noise factor (zeros when deterministic)
    n_spin: int  # spin-up substeps
    deadline: float | None
    time_limit: float | None

    @property
    def n_members(self) -> int:
        return int(self.x0.shape[0])

    @property
    def spin_time(self) -> float:
        return self.n_spin * self.h

    @property
    def max_steps(self) -> int:
        """Substeps per call: the noise buffer near 2**20 numbers (stochastic), or each compiled
        call near _WORK_PER_CALL member-substeps (deterministic), so that progress is reported,
        the time limit is checked and a run whose members have all blown up stops."""
        M, n = self.x0.shape
        if self.stochastic:
            return max(1, (1 << 20) // (M * n))
        return max(1, _WORK_PER_CALL // M)

    def check_time(self, where: str) -> None:
        if self.deadline is not None and time.monotonic() > self.deadline:
            raise ModelLimitError(
                f"time limit of {self.time_limit:g} s reached {where} ({self.n_members} members, "
                f"substep {self.h:.3g}, {self.k} per output); the surrogate is too costly to "
                "integrate in that time: raise the time limit, or use fewer members or outputs"
            )


def _initial_states(surrogate: Surrogate, initial_states: Any) -> np.ndarray:
    n = surrogate.n_variables
    x0 = np.array(initial_states, dtype=np.float64)
    if x0.ndim == 1 and x0.shape[0] == n:
        x0 = x0[None, :]
    if x0.ndim != 2 or x0.shape[1] != n or x0.shape[0] == 0:
        raise SettingsError(f"initial_states: shape {np.shape(initial_states)}, expected (M, {n})")
    if not np.all(np.isfinite(x0)):
        bad = int(np.flatnonzero(~np.all(np.isfinite(x0), axis=1))[0])
        raise SettingsError(f"initial_states: member {bad} has a non-finite value")
    return x0


def _method(surrogate: Surrogate, method: str) -> str:
    if method == "auto":
        method = "heun" if surrogate.is_stochastic else "rk4"
    if method not in METHODS:
        raise SettingsError(f"method {method!r} is not one of auto, {', '.join(METHODS)}")
    if surrogate.is_stochastic and not METHODS[method][0]:
        raise SettingsError(
            f"method {method!r} ignores the surrogate's noise; use 'heun' or 'euler-maruyama', "
            "or integrate surrogate.with_noise(None)"
        )
    return method


def _substep(
    surrogate: Surrogate,
    x0: np.ndarray,
    dt_out: float,
    substep: float | None,
    stiffness_states: Any,
    method: str,
) -> tuple[float, int, float | None]:
    """``(h, k, rho)``: the substep, substeps per output and (automatic choice) the stiffness."""
    n = surrogate.n_variables
    if substep is None:
        sample = x0
        if stiffness_states is not None:
            extra = np.asarray(stiffness_states, dtype=np.float64)
            if extra.ndim != 2 or extra.shape[1] != n:
                raise SettingsError(f"stiffness_states: shape {extra.shape}, expected (K, {n})")
            sample = np.vstack([x0, extra])
        return _choose(surrogate, sample, dt_out, method, SAFETY)
    h_req = _positive(substep, "substep")
    if dt_out / h_req > MAX_SUBSTEPS_PER_OUTPUT:
        raise SettingsError(
            f"substep {h_req:g} is below the floor {dt_out / MAX_SUBSTEPS_PER_OUTPUT:.3g} "
            f"(output interval / {MAX_SUBSTEPS_PER_OUTPUT:.0e}); give a larger substep"
        )
    k = max(1, math.ceil(dt_out / h_req - 1e-9))
    return dt_out / k, k, None


def _bounds(bound: Any, n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    """``(lower, upper, bound as given)``; the first two finite, for the kernels."""
    if bound is None:
        return np.full(n, -_MAX_FLOAT), np.full(n, _MAX_FLOAT), None
    bound_arr = np.array(bound, dtype=np.float64)
    if (
        bound_arr.shape != (n, 2)
        or np.any(np.isnan(bound_arr))
        or np.any(bound_arr[:, 0] >= bound_arr[:, 1])
    ):
        raise SettingsError(
            f"bound: expected ({n}, 2) lower < upper per variable, got shape {bound_arr.shape}"
        )
    # Clipped to the finite range: the kernels rely on finite bounds to reject infinities.
    lower = np.ascontiguousarray(np.clip(bound_arr[:, 0], -_MAX_FLOAT, _MAX_FLOAT))
    upper = np.ascontiguousarray(np.clip(bound_arr[:, 1], -_MAX_FLOAT, _MAX_FLOAT))
    return lower, upper, bound_arr


def _plan(
    surrogate: Surrogate,
    initial_states: Any,
    *,
    dt_out: float,
    n_out: int,
    spinup: float,
    substep: float | None,
    stiffness_states: Any,
    method: str,
    bound: Any,
    seed: int | np.random.Generator | None,
    keep: Sequence[int | str] | None,
    engine: str,
    time_limit: float | None,
    max_memory: int | str | None,
) -> _Plan:
    """Check every setting (before anything large is allocated) and derive the run's plan."""
    if not isinstance(surrogate, Surrogate):
        raise SettingsError(f"surrogate: expected a Surrogate, got {type(surrogate).__name__}")
    n = surrogate.n_variables
    x0 = _initial_states(surrogate, initial_states)
    M = x0.shape[0]
    dt_out = _positive(dt_out, "dt_out")
    if isinstance(n_out, bool) or not isinstance(n_out, (int, np.integer)) or n_out < 1:
        raise SettingsError(f"n_out must be a positive integer, got {n_out!r}")
    n_out = int(n_out)
    try:
        spinup = float(spinup)
    except (TypeError, ValueError):
        raise SettingsError(f"spinup must be a number >= 0, got {spinup!r}") from None
    if not (math.isfinite(spinup) and spinup >= 0.0):
        raise SettingsError(f"spinup must be a finite number >= 0, got {spinup!r}")
    method = _method(surrogate, method)
    stochastic = METHODS[method][0]
    if engine not in ENGINES:
        raise SettingsError(f"engine {engine!r} is not one of {', '.join(ENGINES)}")
    if engine == "auto":
        engine = "numba" if _numba_available() else "numpy"
    if time_limit is not None:
        time_limit = _positive(time_limit, "time_limit")
    deadline = None if time_limit is None else time.monotonic() + time_limit
    from ergodex.limits import check_memory

    n_kept = n if keep is None else len(_resolve_keep(surrogate, keep))
    check_memory(
        ensemble_memory(M, n_out, n_kept, n, surrogate.n_terms),
        f"an ensemble of {M} members x {n_out} outputs x {n_kept} variables",
        "use fewer members or outputs",
        max_memory,
    )
    h, k, rho = _substep(surrogate, x0, dt_out, substep, stiffness_states, method)
    lower, upper, bound_arr = _bounds(bound, n)
    keep_idx = _resolve_keep(surrogate, keep)
    seed_used: int | None = None
    chol = np.zeros((n, n))
    if stochastic:
        seed_used = _resolve_seed(seed)
        if surrogate.noise is not None:
            chol = np.ascontiguousarray(_noise_factor(np.asarray(surrogate.noise)))
    if spinup / h > 2.0**62:
        raise SettingsError(
            f"spinup {spinup:g} is {spinup / h:.3g} substeps of {h:.3g}; give a shorter spin-up"
        )
    return _Plan(
        x0=x0,
        dt_out=dt_out,
        n_out=n_out,
        method=method,
        stochastic=stochastic,
        engine=engine,
        h=h,
        k=k,
        rho=rho,
        lower=lower,
        upper=upper,
        bound=bound_arr,
        keep=keep_idx,
        seed=seed_used,
        chol=chol,
        n_spin=math.ceil(spinup / h - 1e-9) if spinup > 0 else 0,
        deadline=deadline,
        time_limit=time_limit,
    )


@dataclass
class _Members:
    """The run's state, updated in place by the engines: states, who is alive, outputs."""

    state: np.ndarray  # (M, n)
    alive: np.ndarray  # (M,) bool
    blowup_time: np.ndarray  # (M,)
    out: np.ndarray  # (M, n_out, n_kept)
    rng: np.random.Generator | None

    @classmethod
    def start(cls, plan: _Plan) -> _Members:
        M = plan.n_members
        return cls(
            state=plan.x0.copy(),
            alive=np.ones(M, dtype=np.bool_),
            blowup_time=np.full(M, np.nan),
            out=np.full((M, plan.n_out, len(plan.keep)), np.nan),
            rng=None if plan.seed is None else np.random.default_rng(plan.seed),
        )

    def draw(self, plan: _Plan, n_steps: int) -> np.ndarray:
        """Standard normal draws for ``n_steps`` substeps (empty for a deterministic run)."""
        M, n = self.state.shape
        if self.rng is None:
            return np.zeros((0, M, n))
        return self.rng.standard_normal((n_steps, M, n))


#: ``block(t0, n_blocks, steps, noise, j0, write)``: advance the live members by ``n_blocks``
#: output blocks of ``steps`` substeps each, writing outputs from ``j0`` when ``write``.
_Block = Callable[[float, int, int, np.ndarray, int, bool], None]


def _block_runner(surrogate: Surrogate, plan: _Plan, run: _Members) -> _Block:
    """The chosen engine as one callable over blocks of substeps."""
    if plan.engine == "numba":
        from ergodex import kernels

        program = kernels.build_program(surrogate.term_tables(), surrogate.n_variables)

        def compiled(
            t0: float, n_blocks: int, steps: int, noise: np.ndarray, j0: int, write: bool
        ) -> None:
            kernels.advance(
                plan.method,
                program,
                run.state,
                run.alive,
                run.blowup_time,
                kernels.Run(t0, plan.h, n_blocks, steps, plan.lower, plan.upper),
                kernels.Noise(noise, plan.chol),
                kernels.Outputs(run.out, j0, write, plan.keep),
            )

        return compiled

    def reference(
        t0: float, n_blocks: int, steps: int, noise: np.ndarray, j0: int, write: bool
    ) -> None:
        _numpy_block(surrogate, plan, run, t0, n_blocks, steps, noise, j0, write)

    return reference


def _spin_up(plan: _Plan, run: _Members, block: _Block) -> None:
    """Integrate the spin-up (outputs discarded) in chunks; then record output 0."""
    t = -plan.spin_time
    done = 0
    while done < plan.n_spin and run.alive.any():
        steps = min(plan.n_spin - done, plan.max_steps)
        block(t, 1, steps, run.draw(plan, steps), 0, False)
        done += steps
        t = -plan.spin_time + done * plan.h
        plan.check_time(f"during the spin-up (t={t:.6g} of 0)")
    # Output 0: the state at the end of spin-up.
    run.out[run.alive, 0, :] = run.state[run.alive][:, plan.keep]


def _record(
    plan: _Plan, run: _Members, block: _Block, progress: Callable[[int, int], None] | None
) -> None:
    """Outputs 1 .. n_out - 1, in calls of about a hundredth of the run each."""
    n_out, k, max_steps = plan.n_out, plan.k, plan.max_steps
    j = 1
    per_call = max(1, min(max_steps // k, math.ceil((n_out - 1) / 100)) if n_out > 1 else 1)
    if progress is not None:
        progress(1, n_out)
    while j < n_out and run.alive.any():
        t0 = (j - 1) * plan.dt_out
        if k <= max_steps:
            nb = min(per_call, n_out - j)
            block(t0, nb, k, run.draw(plan, nb * k), j, True)
        else:
            # More substeps per output than one call takes: split the interval.
            nb = 1
            done = 0
            while done < k:
                steps = min(k - done, max_steps)
                block(t0 + done * plan.h, 1, steps, run.draw(plan, steps), j, done + steps == k)
                done += steps
                plan.check_time(f"at output {j} of {n_out}")
        j += nb
        plan.check_time(f"at output {j} of {n_out}")
        if progress is not None:
            progress(j, n_out)


def _result(surrogate: Surrogate, plan: _Plan, run: _Members) -> EnsembleResult:
    """Mask outputs after blow-ups, and describe the run."""
    M = plan.n_members
    times = np.arange(plan.n_out) * plan.dt_out
    blown = ~run.alive
    n_blown = int(np.count_nonzero(blown))
    # Safety net: outputs at or after a member's blow-up are NaN whatever the engine wrote.
    for m in np.flatnonzero(blown):
        run.out[m, _first_output_after(times, run.blowup_time[m]) :, :] = np.nan
    if n_blown == 0:
        status = "ok"
    elif n_blown == M:
        status = "all-blowup"
    else:
        status = "blowup"
    how = f"{plan.method} ({plan.engine}), substep {plan.h:.6g} ({plan.k} per output)"
    if plan.rho is not None:
        how += f" chosen from spectral radius {plan.rho:.4g}"
    if n_blown:
        first = float(np.nanmin(run.blowup_time))
        message = (
            f"{n_blown} of {M} members blew up (non-finite or outside the bound), "
            f"first at t={first:.6g}; "
            f"{how}"
        )
    else:
        message = (
            f"{M} members integrated to t={times[-1]:.6g} after spin-up {plan.spin_time:.6g}; {how}"
        )
    return EnsembleResult(
        times=times,
        states=run.out,
        blown_up=blown,
        blowup_time=run.blowup_time,
        last_finite=run.state,
        method=plan.method,
        substep=plan.h,
        substeps_per_output=plan.k,
        seed=plan.seed,
        status=status,
        message=message,
        variables=tuple(surrogate.variables[i] for i in plan.keep),
        spinup=plan.spin_time,
        spectral_radius=plan.rho,
        engine=plan.engine,
        bound=plan.bound,
    )


def _numpy_block(
    surrogate: Surrogate,
    plan: _Plan,
    run: _Members,
    t0: float,
    n_blocks: int,
    steps: int,
    noise: np.ndarray,
    j0: int,
    write: bool,
) -> None:
    """Reference engine: the same steps as :func:`ergodex.kernels.advance`, vectorised with numpy.

    The right-hand side is :meth:`Surrogate.rhs` (numpy, independent of the compiled program).
    """
    f = surrogate.rhs
    h, method, chol = plan.h, plan.method, plan.chol
    state, alive, blowup_time = run.state, run.alive, run.blowup_time
    sqh = math.sqrt(h)
    for j in range(n_blocks):
        for s in range(steps):
            live = np.flatnonzero(alive)
            if len(live) == 0:
                break
            x = state[live]
            step = j * steps + s
            with np.errstate(all="ignore"):
                if method == "rk4":
                    xn = rk4_step(f, x, h)
                else:
                    dw = sqh * (noise[step, live] @ chol.T)
                    k1 = f(x)
                    if method == "euler-maruyama":
                        xn = x + h * k1 + dw
                    else:
                        k2 = f(x + h * k1 + dw)
                        xn = x + 0.5 * h * (k1 + k2) + dw
                ok = np.all(np.isfinite(xn) & (xn >= plan.lower) & (xn <= plan.upper), axis=1)
            state[live[ok]] = xn[ok]
            dead = live[~ok]
            alive[dead] = False
            blowup_time[dead] = t0 + (step + 1) * h
        if write:
            live = np.flatnonzero(alive)
            run.out[live, j0 + j, :] = state[live][:, plan.keep]
