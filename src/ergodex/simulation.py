"""Simulate a surrogate from Python: an ensemble in data space, as an xarray Dataset.

:func:`simulate` is the Python face of ``ergodex simulate``: the same start states (the model's
own long run, or rows of given data), the same blow-up bound and the same automatic substep, but
the result is an ``xarray.Dataset`` with dims ``(member, time)`` whose variables carry the data's
names. A member that blows up is a finding recorded in the Dataset (``status`` attribute,
``blown_up`` and ``blowup_time`` coordinates, NaN after the blow-up), never an exception.
"""

from __future__ import annotations

import logging
import math
from typing import Any, cast

import numpy as np

from ergodex.exceptions import DataError, ModelFileError, SettingsError, require

__all__ = [
    "bound_from_fitted_range",
    "bound_over",
    "fitted_range",
    "initial_states_from_model",
    "simulate",
    "states_in_fitted_range",
]

log = logging.getLogger(__name__)

#: Size of the perturbations added to the start state of the model's own run (model units).
PERTURBATION = 1e-3
#: Default spin-up of the model's own run, in output intervals.
SPINUP_STEPS = 1000


def _output_dt(surrogate, dt: float | None) -> float:
    """The output interval: ``dt`` if given, else the sampling interval the model records."""
    if dt is None:
        value = surrogate.provenance.get("dt", surrogate.settings.get("dt"))
        if isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0:
            return float(value)
        raise SettingsError("dt: the model does not record its sampling interval; pass dt=")
    if (
        isinstance(dt, bool)
        or not isinstance(dt, (int, float))
        or not (math.isfinite(dt) and dt > 0)
    ):
        raise SettingsError(f"dt must be a positive number, got {dt!r}")
    return float(dt)


def _data_names(surrogate) -> tuple[str, ...]:
    if surrogate.transform is not None:
        return tuple(surrogate.transform.input_names)
    return tuple(surrogate.observed_variables)


def fitted_range(surrogate) -> tuple[list[int], np.ndarray] | None:
    """The training range the fitter recorded: model columns and their ``(2, k)`` [min; max].

    None when the model file has no ``provenance.model_range`` (files from before it existed);
    hidden variables have no entry.
    """
    recorded = (surrogate.provenance or {}).get("model_range")
    if not isinstance(recorded, dict):
        return None
    columns = [j for j, name in enumerate(surrogate.variables) if name in recorded]
    if not columns:
        return None
    try:
        ends = np.array([recorded[surrogate.variables[j]] for j in columns], dtype=np.float64).T
    except (TypeError, ValueError):
        raise ModelFileError("provenance.model_range: expected [min, max] per variable") from None
    if (
        ends.shape != (2, len(columns))
        or not np.all(np.isfinite(ends))
        or np.any(ends[0] > ends[1])
    ):
        raise ModelFileError("provenance.model_range: expected finite [min, max] per variable")
    return columns, ends


def bound_from_fitted_range(surrogate) -> np.ndarray | None:
    """Blow-up bound from the recorded training range (None without a record).

    Ten times that range per variable (:func:`ergodex.integrate.blowup_bound`); variables without
    a recorded range (hidden levels) are unbounded.
    """
    recorded = fitted_range(surrogate)
    return None if recorded is None else bound_over(surrogate, *recorded)


def bound_over(surrogate, columns, reference: np.ndarray) -> np.ndarray:
    """Blow-up bound from ``reference`` states of the model ``columns``; other variables unbounded.

    Ten times the reference range (:func:`ergodex.integrate.blowup_bound`); hidden variables have
    no data range to leave.
    """
    from ergodex.integrate import blowup_bound

    bound = np.tile([-np.inf, np.inf], (surrogate.n_variables, 1))
    bound[columns] = blowup_bound(reference)
    return bound


def states_in_fitted_range(
    surrogate, rng: np.random.Generator, n_states: int = 256
) -> np.ndarray | None:
    """States drawn uniformly from the box of the recorded training range (hidden variables 0).

    The members of a model's own run start near its origin, which can be much calmer than where
    the run goes; the automatic substep measures the stiffness here as well. None without a
    record.
    """
    recorded = fitted_range(surrogate)
    if recorded is None:
        return None
    columns, ends = recorded
    states = np.zeros((n_states, surrogate.n_variables))
    states[:, columns] = rng.uniform(ends[0], ends[1], size=(n_states, len(columns)))
    return states


def initial_states_from_model(surrogate, members: int, rng: np.random.Generator) -> np.ndarray:
    """Start states for the model's own run: the origin plus seeded perturbations of 1e-3."""
    return rng.normal(scale=PERTURBATION, size=(members, surrogate.n_variables))


def _starts_from_data(surrogate, data: Any, members: int) -> tuple[np.ndarray, np.ndarray]:
    """``members`` model-space start states evenly spaced through ``data``, and every state."""
    from ergodex.frames import as_series

    series = as_series(data, what="initial")
    names = _data_names(surrogate)
    if tuple(series.names) != names:
        raise DataError(
            f"initial: variables {list(series.names)} do not match the model's data variables "
            f"{list(names)}"
        )
    given = np.concatenate([surrogate.to_model_space(run) for run in series.runs], axis=0)
    # hidden variables (a memory level) have no data: they start at 0, as in the validator
    rows = np.zeros((len(given), surrogate.n_variables))
    rows[:, surrogate.observed_index] = given
    if len(rows) < members:
        raise DataError(f"initial: has {len(rows)} states, fewer than members={members}")
    pick = np.linspace(0, len(rows) - 1, members).round().astype(np.int64)
    return rows[pick], rows


def simulate(
    surrogate: Any,
    *,
    members: int = 16,
    duration: float | None = None,
    steps: int | None = None,
    dt: float | None = None,
    seed: int | None = None,
    initial: Any = None,
    spinup: float | None = None,
    substep: float | None = None,
    progress: Any = False,
) -> Any:
    """Integrate ``members`` copies of a surrogate and return them in data space.

    Parameters
    ----------
    surrogate : Surrogate
    members : int, default 16
        Number of ensemble members.
    duration : float, optional
        Time per member after spin-up; ``steps`` outputs of ``dt`` otherwise. One is required.
    steps : int, optional
        Outputs per member.
    dt : float, optional
        Output interval (default: the sampling interval recorded in the model).
    seed : int, optional
        Seed of the start perturbations and of the noise; None draws one (recorded in ``attrs``).
    initial : Series, DataFrame or xarray Dataset, optional
        Data-space states; ``members`` rows evenly spaced through them start the members (no
        spin-up by default). Without it the members start at the model-space origin plus seeded
        perturbations of 1e-3 and are spun up for ``1000 * dt``, as ``ergodex simulate`` does.
    spinup : float, optional
        Time integrated and discarded before the first output.
    substep : float, optional
        Integration step (default: chosen from the model's stiffness).
    progress : bool or callable(done, total)
        See :mod:`ergodex.progress`.

    Returns
    -------
    xarray.Dataset
        Dims ``(member, time)``; one variable per data variable (NaN after a member's blow-up);
        coordinates ``blown_up`` and ``blowup_time`` along ``member``; ``attrs``: ``status``
        (``"ok"``, ``"blowup"`` or ``"all-blowup"``), ``message``, ``model_fingerprint``, ``dt``,
        ``seed``, ``spinup``, ``method``, ``substep``, ``n_blown_up``.

    Raises
    ------
    SettingsError, DataError
        For bad settings or start data. Never for a blow-up.
    """
    from ergodex.integrate import integrate_ensemble
    from ergodex.progress import reporter
    from ergodex.surrogate import Surrogate

    xr = require("xarray", "netcdf", "ergodex.simulate (it returns an xarray Dataset)")
    if not isinstance(surrogate, Surrogate):
        raise SettingsError(f"surrogate: expected a Surrogate, got {type(surrogate).__name__}")
    if isinstance(members, bool) or not isinstance(members, (int, np.integer)) or members < 1:
        raise SettingsError(f"members must be an integer >= 1, got {members!r}")
    dt_out = _output_dt(surrogate, dt)
    if steps is None:
        if duration is None:
            raise SettingsError("give duration= (time per member) or steps= (outputs per member)")
        if not (isinstance(duration, (int, float)) and math.isfinite(duration) and duration > 0):
            raise SettingsError(f"duration must be a positive number, got {duration!r}")
        steps = max(1, int(round(duration / dt_out)))
    elif duration is not None:
        raise SettingsError("give duration= or steps=, not both")
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 1:
        raise SettingsError(f"steps must be an integer >= 1, got {steps!r}")
    if seed is None:
        # a SeedSequence made without entropy draws an int from the OS
        seed = int(cast(int, np.random.SeedSequence().entropy) % (2**63))
    rng = np.random.default_rng(seed)

    stiffness_states: np.ndarray | None

    if initial is not None:
        x0, every_state = _starts_from_data(surrogate, initial, int(members))
        spinup = 0.0 if spinup is None else spinup
        observed = surrogate.observed_index
        bound = (
            bound_over(surrogate, observed, every_state[:, observed])
            if len(every_state) > 1
            else None
        )
        stiffness_states = every_state
    else:
        x0 = initial_states_from_model(surrogate, int(members), rng)
        spinup = SPINUP_STEPS * dt_out if spinup is None else spinup
        bound = bound_from_fitted_range(surrogate)
        stiffness_states = states_in_fitted_range(surrogate, np.random.default_rng([seed, 1]))
    log.info(
        "simulate: %d members x %d outputs of dt=%g after a spin-up of %g (seed %d)",
        members,
        steps,
        dt_out,
        spinup,
        seed,
    )
    with reporter(progress, int(steps), desc="simulate", unit="output") as update:
        result = integrate_ensemble(
            surrogate,
            x0,
            dt_out=dt_out,
            n_out=int(steps),
            spinup=float(spinup),
            substep=substep,
            stiffness_states=stiffness_states,
            seed=int(rng.integers(0, 2**63 - 1)),
            bound=bound,
            progress=update,
        )
    log.info("simulate: %s", result.message)

    names = _data_names(surrogate)
    values = np.full((result.n_members, len(result.times), len(names)), np.nan)
    for m in range(result.n_members):
        valid = result.valid(m)
        if valid.stop:
            values[m, valid] = surrogate.to_data_space(result.states[m, valid])
    data_vars = {name: (("member", "time"), values[:, :, k]) for k, name in enumerate(names)}
    coords = {
        "member": ("member", np.arange(result.n_members)),
        "time": ("time", np.asarray(result.times, dtype=np.float64)),
        "blown_up": ("member", np.asarray(result.blown_up, dtype=bool)),
        "blowup_time": ("member", np.asarray(result.blowup_time, dtype=np.float64)),
    }
    attrs = {
        "status": result.status,
        "message": result.message,
        "model_fingerprint": surrogate.fingerprint(),
        "dt": dt_out,
        "seed": int(seed),
        "spinup": float(result.spinup),
        "method": result.method,
        "substep": float(result.substep),
        "n_blown_up": result.n_blown_up,
        "space": "data",
    }
    return xr.Dataset(data_vars, coords=coords, attrs=attrs)
