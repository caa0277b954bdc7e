"""``ergodex simulate``: integrate an ensemble of a surrogate and write it in data space.

    ergodex simulate MODEL --members N --steps K [--seed S] [--dt DT] [--out FILE]
                     [--initial FILE] [--spinup T] [--format csv|npz|nc] [--substep H]

MODEL is a ``model.json`` file, or ``NAME[/VERSION]`` of a registered model (``--home``).

Initial states
--------------
- ``--initial FILE`` (CSV / NPZ / NetCDF / dataset folder, data space): N rows evenly spaced
  through the file's samples (all runs together) start the N members; no spin-up by default.
- Otherwise the members start from the model's own long run: the model-space origin (for a
  standardised or PCA model, the data mean) plus independent perturbations of size 1e-3 drawn
  from the seed, integrated for a spin-up (default ``1000 * dt``) that is discarded. In a chaotic
  model the perturbations grow apart during the spin-up, so the members sample its attractor;
  a model with a stable fixed point collapses onto it, which is what it would do in use too.

Blow-up bound
-------------
A member is stopped when a state is not finite or leaves ten times the range (see
:func:`ergodex.integrate.blowup_bound`) of the given ``--initial`` states or, without them, of the
data the model was fitted on (``model_range`` in the model file's provenance, written by every
ergodex fitter). A model file without that record is bounded only by floating-point overflow.

Substep
-------
Without ``--substep`` the RK4 substep is chosen from the stiffness (largest spectral radius of the
Jacobian) at the start states and at states typical of the run: every state of ``--initial``, or
256 states drawn uniformly from the recorded training range (see
:func:`ergodex.integrate.choose_substep`).

Output
------
One run per member (labels ``member-000`` …) at interval ``--dt`` in data space, through
:mod:`ergodex.writers`; the format follows ``--format`` or the extension of ``--out``; without
``--out`` CSV goes to standard output. A member that blows up is a finding, not an error: its run
ends at its last finite output (members that blew up during spin-up, and for NetCDF every member
that blew up, are left out), stderr says which members and when, and the exit code is 1.

Limits
------
The memory the run needs (members x outputs x variables, see
:func:`ergodex.integrate.ensemble_memory`, plus the output file's text) is estimated before
anything is allocated; over ``--max-memory`` (default ``$ERGODEX_MAX_MEMORY``, else half the memory
available) the run is refused with exit 2. ``--time-limit`` bounds the wall-clock time (default:
none); a surrogate that needs a substep below ``dt / 1e6`` or more time than that fails with exit 1.
A run stops as soon as every member has blown up.

Exit codes: 0 every member integrated; 1 some member blew up, every member settled on a fixed
point (a variable constant in the whole output), or the surrogate was too stiff or too slow; 2 bad
input (nothing written).
Caution: a simulated ensemble is not a certification of the model; defer to the applicable codes,
standards and licensed practice.
"""

from __future__ import annotations

import argparse
import math
import sys
import tempfile
from pathlib import Path
from typing import TYPE_CHECKING, Any, cast

if TYPE_CHECKING:  # numpy loads when a command runs, not for --help
    import numpy as np

from ergodex.cli.common import MODEL_HELP, load_model
from ergodex.exceptions import DataError, SettingsError

__all__ = ["add_parser", "initial_states_from_file", "load_model", "run"]

_FORMATS = {".csv": "csv", ".npz": "npz", ".nc": "nc", ".nc4": "nc", ".netcdf": "nc"}


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``simulate`` subcommand."""
    from ergodex.cli.common import add_home_option

    parser = subparsers.add_parser(
        "simulate",
        help="integrate an ensemble of a surrogate and write it (CSV, NPZ, NetCDF)",
        description=(
            "Integrate N members of a surrogate for K output steps and write them in data space. "
            "Members start from the model's own long run (origin + tiny seeded perturbations, "
            "spun up for 1000 output steps) unless --initial gives start states. A member is "
            "stopped (blew up) when it leaves ten times the range of the --initial states or, "
            "without them, of the data the model was fitted on. "
            "Exit codes: 0 all members finished, "
            "1 some member blew up, the output settled on a fixed point, or the surrogate was too "
            "stiff or too slow (--time-limit), 2 bad input (also a run over --max-memory). "
            "A simulated ensemble is not a certification; defer to the applicable codes, "
            "standards and licensed practice."
        ),
    )
    parser.add_argument("model", metavar="MODEL", help=MODEL_HELP)
    parser.add_argument(
        "--members", type=int, required=True, metavar="N", help="number of members (>= 1)"
    )
    parser.add_argument(
        "--steps", type=int, required=True, metavar="K", help="outputs per member (>= 1)"
    )
    parser.add_argument(
        "--seed",
        type=int,
        default=None,
        metavar="S",
        help="seed of the perturbations and of the noise (default: fresh, printed)",
    )
    parser.add_argument(
        "--dt",
        type=float,
        default=None,
        metavar="DT",
        help="output interval in time units (default: the 'dt' recorded in the model)",
    )
    parser.add_argument(
        "--out",
        default=None,
        metavar="FILE",
        help="output file (.csv, .npz, .nc); default: CSV on standard output",
    )
    parser.add_argument(
        "--format",
        choices=["csv", "npz", "nc"],
        default=None,
        help="output format (default: from the --out extension)",
    )
    parser.add_argument(
        "--initial",
        default=None,
        metavar="FILE",
        help="start states in data space (CSV, NPZ, NetCDF or dataset folder)",
    )
    parser.add_argument(
        "--spinup",
        type=float,
        default=None,
        metavar="T",
        help="time integrated and discarded before the first output "
        "(default: 1000*dt from the model's own run, 0 with --initial)",
    )
    parser.add_argument(
        "--substep",
        type=float,
        default=None,
        metavar="H",
        help="integration step (default: chosen from the model's stiffness at the start "
        "states and at the --initial states or, without them, states across the "
        "range the model was fitted on; never below DT/1e6: a model that needs "
        "less fails as too stiff, exit 1)",
    )
    add_home_option(parser)
    from ergodex.cli.common import add_limit_options

    add_limit_options(parser, time_limit=None)
    parser.set_defaults(func=run)
    return parser


def _output_dt(surrogate, dt: float | None) -> float:
    if dt is None:
        for where in (surrogate.provenance, surrogate.settings):
            value = where.get("dt")
            if isinstance(value, (int, float)) and not isinstance(value, bool) and value > 0:
                return float(value)
        raise SettingsError("--dt: the model does not record its sampling interval; give --dt")
    if not (math.isfinite(dt) and dt > 0):
        raise SettingsError(f"--dt must be a positive number, got {dt}")
    return float(dt)


def initial_states_from_file(surrogate, path: str, members: int) -> tuple[np.ndarray, np.ndarray]:
    """``members`` model-space start states, rows evenly spaced through a data file.

    Returns the picked states and every state of the file (model space), from which the
    blow-up bound is set.
    """
    import numpy as np

    from ergodex.readers import read_series
    from ergodex.validation import align_columns

    # the model's variables in any column order, as validate accepts them
    series = align_columns(surrogate, read_series(path))
    observed = surrogate.observed_index
    model_rows = [surrogate.to_model_space(run) for run in series.runs]
    given = np.concatenate([r for r in model_rows if len(r)], axis=0)
    # Hidden variables (a memory level) have no data: they start at 0, as in the validator.
    rows = np.zeros((len(given), surrogate.n_variables))
    rows[:, observed] = given
    if len(rows) < members:
        raise DataError(f"{path}: has {len(rows)} usable states, fewer than --members {members}")
    pick = np.linspace(0, len(rows) - 1, members).round().astype(np.int64)
    return rows[pick], rows


def _data_names(surrogate) -> tuple[str, ...]:
    """Names of the data-space columns the model reads and writes."""
    if surrogate.transform is not None:
        return tuple(surrogate.transform.input_names)
    return tuple(surrogate.observed_variables)


def _check_memory(surrogate, args: argparse.Namespace) -> None:
    """Refuse before allocating when the run and its output would exceed the memory limit."""
    from ergodex.integrate import ensemble_memory
    from ergodex.limits import check_memory

    n_data = len(_data_names(surrogate))
    # the written text: about 25 characters per value (CSV or netCDF encodings are smaller)
    output = 25.0 * float(args.members) * float(args.steps) * n_data
    # the run's outputs, the data-space runs and the Series' checked copy: three copies
    estimate = (
        ensemble_memory(
            args.members,
            args.steps,
            surrogate.n_variables,
            surrogate.n_variables,
            surrogate.n_terms,
            copies=3,
        )
        + output
    )
    check_memory(
        estimate,
        f"simulating {args.members} members x {args.steps} outputs x "
        f"{surrogate.n_variables} variables",
        "use fewer --members or --steps",
        args.max_memory,
    )


def _constant_columns(runs: list[np.ndarray]) -> list[int]:
    """Data columns that hold one value across every run and output (a settled ensemble)."""
    import numpy as np

    if not runs:
        return []
    lo = np.min([r.min(axis=0) for r in runs], axis=0)
    hi = np.max([r.max(axis=0) for r in runs], axis=0)
    return [int(c) for c in np.flatnonzero(lo == hi)]


def run(args: argparse.Namespace) -> int:
    """Run ``ergodex simulate``; returns 0, or 1 when some member blew up."""
    import numpy as np

    from ergodex.integrate import integrate_ensemble
    from ergodex.series import Series
    from ergodex.simulation import (  # the library's start and bound rules
        SPINUP_STEPS,
        bound_from_fitted_range,
        bound_over,
        initial_states_from_model,
        states_in_fitted_range,
    )
    from ergodex.writers import write_csv, write_netcdf, write_npz

    if args.members is None or args.members < 1:
        raise SettingsError(f"--members must be at least 1, got {args.members}")
    if args.steps is None or args.steps < 1:
        raise SettingsError(f"--steps must be at least 1, got {args.steps}")
    if args.members * args.steps < 2:
        raise SettingsError(
            "one member with one output is a single state; a data file needs "
            "at least two; use --steps 2 or more"
        )
    if args.seed is not None and args.seed < 0:
        raise SettingsError(f"--seed must be a non-negative integer, got {args.seed}")
    fmt = args.format
    if args.out is not None and fmt is None:
        fmt = _FORMATS.get(Path(args.out).suffix.lower())
        if fmt is None:
            raise SettingsError(
                f"--out {args.out}: unknown extension; use .csv, .npz or .nc, or give --format"
            )
    if args.out is None:
        if fmt not in (None, "csv"):
            raise SettingsError(
                f"--format {fmt} needs --out FILE (only CSV goes to standard output)"
            )
        fmt = "csv"
    if args.out is not None and not Path(args.out).parent.exists():
        raise SettingsError(f"--out {args.out}: folder {Path(args.out).parent} does not exist")
    from ergodex.cli.common import check_limit_options
    from ergodex.files import check_writable

    check_limit_options(args)
    if args.out is not None:
        check_writable(args.out, "--out")

    surrogate = load_model(args.model, getattr(args, "home", None))
    dt = _output_dt(surrogate, args.dt)
    _check_memory(surrogate, args)
    from ergodex.series import check_name

    for name in _data_names(surrogate):  # refused before the run, not after it
        check_name(name, what="the model's variable name", source=str(args.model))
    observed = surrogate.observed_index
    if args.seed is not None:
        seed = args.seed
    else:
        # cast: a SeedSequence made without entropy draws an int (the stub allows any entropy)
        seed = int(cast(int, np.random.SeedSequence().entropy) % (2**63))
    rng = np.random.default_rng(seed)

    if args.initial is not None:
        x0, every_state = initial_states_from_file(surrogate, args.initial, args.members)
        spinup = 0.0 if args.spinup is None else args.spinup
        # Ten times the range of the given states (see blowup_bound); non-finite always counts.
        bound = (
            bound_over(surrogate, observed, every_state[:, observed])
            if len(every_state) > 1
            else None
        )
        stiffness_states: np.ndarray | None = every_state
    else:
        x0 = initial_states_from_model(surrogate, args.members, rng)
        spinup = SPINUP_STEPS * dt if args.spinup is None else args.spinup
        bound = bound_from_fitted_range(surrogate)
        stiffness_states = states_in_fitted_range(surrogate, np.random.default_rng([seed, 1]))
    if not (math.isfinite(spinup) and spinup >= 0):
        raise SettingsError(f"--spinup must be a number >= 0, got {spinup}")

    from ergodex.cli.common import show_progress
    from ergodex.progress import reporter

    with reporter(show_progress(args), args.steps, desc="simulate", unit="output") as update:
        result = integrate_ensemble(
            surrogate,
            x0,
            dt_out=dt,
            n_out=args.steps,
            spinup=spinup,
            substep=args.substep,
            stiffness_states=stiffness_states,
            seed=int(rng.integers(0, 2**63 - 1)),
            bound=bound,
            progress=update,
            time_limit=args.time_limit,
            max_memory=args.max_memory,
        )

    from ergodex.cli.fields import field_output_map, write_simulated_field

    to_data = field_output_map(surrogate, dt) or surrogate.to_data_space
    runs, labels, dropped = [], [], []
    for m in range(result.n_members):
        valid = result.valid(m)
        if valid.stop == 0 or (fmt == "nc" and result.blown_up[m]):
            dropped.append(m)
            continue
        # data space holds the observed variables only: hidden columns are not data
        runs.append(to_data(result.states[m, valid]))
        labels.append(f"member-{m:03d}")
    names = _data_names(surrogate)

    print(f"ergodex simulate: {result.message}; seed {seed}", file=sys.stderr)
    from ergodex.cli.fields import time_unit_note

    if time_unit_note(surrogate):
        print(f"ergodex simulate: {time_unit_note(surrogate)}", file=sys.stderr)
    if result.n_blown_up:
        which = ", ".join(
            f"{m} (t={t:.6g})"
            for m, t in zip(np.flatnonzero(result.blown_up), result.blowup_time[result.blown_up])
        )
        print(f"ergodex simulate: members that blew up: {which}", file=sys.stderr)
        if dropped:
            print(
                f"ergodex simulate: left out of the output: members {', '.join(map(str, dropped))}",
                file=sys.stderr,
            )
    if not runs:
        print(
            "ergodex simulate: every member blew up before its first output; nothing written",
            file=sys.stderr,
        )
        return 1

    settled = _constant_columns(runs)
    if settled:
        stays = ", ".join(f"{names[c]} stays at {runs[0][0, c]:.6g}" for c in settled[:4])
        print(
            f"ergodex simulate: the ensemble settled on a fixed point ({stays} in every member "
            "and output); a data file cannot hold a constant variable; nothing written",
            file=sys.stderr,
        )
        return 1
    series = Series.from_arrays(
        runs,
        names,
        dt,
        run_labels=labels,
        source=str(args.model),
        time_unit=surrogate.provenance.get("time_unit") or None,
    )
    if args.out is None:
        with tempfile.TemporaryDirectory() as tmp:
            target = write_csv(Path(tmp) / "simulation.csv", series)
            sys.stdout.write(target.read_text(encoding="utf-8"))
    else:
        writer = {"csv": write_csv, "npz": write_npz, "nc": write_netcdf}[fmt]
        if fmt == "nc" and field_output_map(surrogate, dt) is not None:
            target = write_simulated_field(args.out, surrogate, series, args)
        else:
            target = writer(args.out, series)
        print(
            f"ergodex simulate: wrote {series.n_runs} members x {args.steps} outputs to {target}",
            file=sys.stderr,
        )
    return 1 if result.n_blown_up else 0
