"""Helpers shared by the retraining, inbox and ``ergodex retrain`` tests (not a test module).

The check spec here is small so the suite stays fast, but not so small that verdicts become coin
flips: the reference is held-out runs of 30-40 time units of the convection loop (about 30-40
decorrelation times of ``flow``; (from memory) the Lorenz-63 autocorrelation of x decays within
about one time unit), and the check integrates several members of the same length.
"""

from __future__ import annotations

import gc
import shutil
from pathlib import Path

import numpy as np

from ergodex.series import Series

LOOP = "convection-loop"
WELL = "double-well"


def write_csv(path: Path, series: Series) -> Path:
    """Write a Series as CSV (``run``, ``time`` and one column per variable), exactly.

    ``%.17g`` prints every float64 so that it reads back to the same bits (IEEE-754 binary64
    needs at most 17 significant digits to round-trip; common practice, no source).
    """
    path = Path(path)
    lines = ["run,time," + ",".join(series.names)]
    labels = series.run_labels or tuple(f"run-{i + 1}" for i in range(series.n_runs))
    for label, run in zip(labels, series.runs):
        times = np.arange(run.shape[0]) * series.dt
        for t, row in zip(times, run):
            lines.append(f"{label},{t:.17g}," + ",".join(f"{v:.17g}" for v in row))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def copy_home(source: Path, target: Path) -> Path:
    """An independent copy of a registry home (the SQLite file is closed between calls).

    A Registry a test did not close is closed by the garbage collector whenever it runs; if that
    happened in the middle of the copy, SQLite would remove the -wal/-shm files the copy has
    listed. Collecting first closes such connections before the folder is listed.
    """
    gc.collect()
    shutil.copytree(source, target)
    return target


def loop_data(seed: int, *, rho: float = 28.0, n_runs: int = 6, duration: float = 40.0) -> Series:
    """Convection-loop records (Lorenz-63, sigma 10, beta 8/3) with the scenario's sensor noise.

    Sampled every 0.02 (RK4 on a 0.005 internal step) after a spin-up of 10 time units: with the
    largest Lyapunov exponent of about 0.906 (Sprott, Chaos and Time-Series Analysis, 2003) that is
    about 9 e-foldings, enough to forget the random start and sit on the attractor.
    """
    from ergodex.scenarios import convection_loop

    return convection_loop(
        seed=seed, rho=rho, n_runs=n_runs, duration=duration, dt=0.02, spinup=10.0
    )


def well_data(seed: int, *, noise: float, n_runs: int = 8, duration: float = 200.0) -> Series:
    """Double-well Langevin records ``dx = (x - x^3) dt + s dW``, sampled every 0.05.

    Euler-Maruyama on an internal step of 0.005: the drift's stiffest rate near the wells is 2,
    so the step is far inside the stability limit (Kloeden & Platen 1992, weak order 1).
    """
    from ergodex.scenarios import double_well

    return double_well(seed=seed, noise=noise, n_runs=n_runs, duration=duration, substeps=10)
