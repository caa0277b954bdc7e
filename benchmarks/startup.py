"""Start-up and fixed costs of the command line, each beside its reference, in one run.

A script that calls ``ergodex`` once per file pays the start-up on every call. Four pairs,
measured side by side (alternating, best of ``--repeats``) so that the ratios survive a busy
machine:

1. ``python -c "import argparse"`` against ``ergodex --help`` (target: within 2×).
2. ``ergodex fit --method linear-inverse`` on the demo data against the same fit in-process, and
   whether the fitting process imported pysindy (target: never).
3. ``ergodex validate`` of the true convection-loop model on the demo data against the
   in-process ``check`` with the same settings once compiled (target: within 1.5×), and the
   in-process check with evidence against without (what ``--json``/``--report`` add).
4. The automatic substep choice of a 200-station ring (Lorenz-96) against the ``simulate`` run it
   serves (target: ≤ 5 %), with the former dense choice (Jacobians + all eigenvalues) beside it.

Commands run as an installed console script would: compiled bytecode cached (a private
``PYTHONPYCACHEPREFIX``; the cache is warmed first), this checkout's ``src`` first on the path.

Usage (repository root)::

    /work/venv/bin/python benchmarks/startup.py [--repeats 5]
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DATASET = ROOT / "datasets" / "convection-loop"
CLI = "import sys; from ergodex.cli import main; sys.exit(main())"
# Prints the top-level modules the command imported (after it ran) on the last line.
CLI_MODULES = (
    "import sys, json; from ergodex.cli import main; code = main(); "
    "print(json.dumps(sorted({m.split('.')[0] for m in sys.modules}))); sys.exit(code)"
)


def _env(cache: str) -> dict[str, str]:
    env = dict(os.environ)
    env.pop("PYTHONDONTWRITEBYTECODE", None)
    env["PYTHONPYCACHEPREFIX"] = cache
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    return env


def _wall(argv: list[str], env: dict[str, str]) -> float:
    t0 = time.perf_counter()
    proc = subprocess.run(argv, env=env, capture_output=True, text=True, check=False)
    elapsed = time.perf_counter() - t0
    if proc.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(argv)} failed ({proc.returncode}): {proc.stderr[-500:]}")
    return elapsed


def _best_side_by_side(cases: dict, repeats: int) -> dict[str, float]:
    """Best time of each case, the cases alternating within every round."""
    best = {name: float("inf") for name in cases}
    for _ in range(repeats):
        for name, fn in cases.items():
            best[name] = min(best[name], fn())
    return best


def _timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeats", type=int, default=5)
    p.add_argument("--ring", type=int, default=200, help="stations of the simulated ring")
    p.add_argument("--outputs", type=int, default=10_000, help="outputs per simulated member")
    args = p.parse_args(argv)
    py = sys.executable
    tmp = Path(tempfile.mkdtemp(prefix="ergodex-startup-"))
    env = _env(str(tmp / "pycache"))
    sys.path.insert(0, str(ROOT / "src"))
    import numpy as np

    from ergodex import integrate, scenarios, validation
    from ergodex.cli.common import read_data
    from ergodex.fitting import make_fitter
    from ergodex.simulation import states_in_fitted_range
    from ergodex.surrogate import Surrogate

    print(
        f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}; "
        f"best of {args.repeats}, cases alternating"
    )
    rows: list[tuple[str, str, str, float]] = []

    # 1. --help against a bare interpreter with argparse
    _wall([py, "-c", CLI, "--help"], env)  # warm the bytecode cache
    best = _best_side_by_side(
        {
            "bare": lambda: _wall([py, "-c", "import argparse"], env),
            "help": lambda: _wall([py, "-c", CLI, "--help"], env),
        },
        args.repeats,
    )
    rows.append(
        (
            "ergodex --help",
            f"{best['help']:.3f} s",
            f"python -c 'import argparse' {best['bare']:.3f} s",
            best["help"] / best["bare"],
        )
    )

    # 2. linear-inverse fit: the command against the fit in-process
    model_out = tmp / "lim.json"
    fit_argv = [
        py,
        "-c",
        CLI_MODULES,
        "fit",
        str(DATASET),
        "--method",
        "linear-inverse",
        "--out",
        str(model_out),
        "--quiet",
    ]
    proc = subprocess.run(fit_argv, env=env, capture_output=True, text=True, check=True)
    modules = set(json.loads(proc.stdout.strip().splitlines()[-1]))
    fit_part = read_data(
        str(DATASET), part="fit", holdout=None, dt=None, split_at_gaps=False
    ).series
    best = _best_side_by_side(
        {
            "cli": lambda: _wall(fit_argv, env),
            "sklearn": lambda: _wall([py, "-c", "import sklearn.base"], env),
            "inproc": lambda: _timed(lambda: make_fitter("linear-inverse").fit(fit_part)),
        },
        args.repeats,
    )
    rows.append(
        (
            "fit --method linear-inverse",
            f"{best['cli']:.3f} s",
            f"python -c 'import sklearn.base' {best['sklearn']:.3f} s",
            best["cli"] / best["sklearn"],
        )
    )
    rows.append(("  (the fit itself, in-process)", f"{best['inproc']:.3f} s", "", float("nan")))
    print(
        f"linear-inverse fit imported pysindy: {'pysindy' in modules}; "
        f"scikit-learn: {'sklearn' in modules}"
    )

    # 3. validate of the demo data: the command against the in-process check
    truth = tmp / "truth.json"
    scenarios.lorenz63_surrogate().to_json(truth)
    reference = read_data(
        str(DATASET), part="check", holdout=None, dt=None, split_at_gaps=False
    ).series
    spec = validation.CheckSpec()
    surrogate = scenarios.lorenz63_surrogate()
    validation.check(surrogate, reference, spec)  # compile / load the kernels first
    val_argv = [py, "-c", CLI, "validate", str(truth), str(DATASET), "--quiet"]
    _wall(val_argv, env)
    card = tmp / "card.json"
    # the floor of any command that integrates: a fresh interpreter that imports numpy and numba
    # and runs the cached compiled kernel for one output of the same model
    kernel_once = (
        "import numpy as np; from ergodex import integrate, scenarios; "
        "integrate.integrate_ensemble(scenarios.lorenz63_surrogate(), np.ones((1, 3)), "
        "dt_out=0.01, n_out=2)"
    )
    best = _best_side_by_side(
        {
            "numba": lambda: _wall([py, "-c", "import numba"], env),
            "kernel": lambda: _wall([py, "-c", kernel_once], env),
            "cli": lambda: _wall(val_argv, env),
            "cli_json": lambda: _wall([*val_argv, "--json", str(card)], env),
            "bare": lambda: _timed(
                lambda: validation.check(surrogate, reference, spec, evidence=False)
            ),
            "full": lambda: _timed(lambda: validation.check(surrogate, reference, spec)),
        },
        args.repeats,
    )
    rows.append(
        (
            "validate (demo data)",
            f"{best['cli']:.3f} s",
            f"in-process check {best['bare']:.3f} s",
            best["cli"] / best["bare"],
        )
    )
    rows.append(("  python -c 'import numba'", f"{best['numba']:.3f} s", "", float("nan")))
    rows.append(
        (
            "  fresh process: two outputs, cached kernel",
            f"{best['kernel']:.3f} s",
            f"validate {best['cli']:.3f} s",
            best["kernel"] / best["cli"],
        )
    )
    rows.append(
        (
            "validate --json (scorecard + evidence)",
            f"{best['cli_json']:.3f} s",
            f"validate {best['cli']:.3f} s",
            best["cli_json"] / best["cli"],
        )
    )
    rows.append(
        (
            "check with evidence",
            f"{best['full']:.3f} s",
            f"without {best['bare']:.3f} s",
            best["full"] / best["bare"],
        )
    )

    # 4. substep choice of a large ring against the simulate run it serves
    n = args.ring
    ring = scenarios.lorenz96_surrogate(n)
    rng = np.random.default_rng(0)
    # states of the attractor: two runs, the first 20 time units dropped as spin-up
    runs = scenarios.lorenz96_trajectories(rng.normal(2.3, 3.6, size=(2, n)), dt=0.05, n_out=1400)
    states = runs[:, 400:].reshape(-1, n)
    ring = Surrogate(
        ring.variables,
        ring.terms,
        ring.coefficients,
        provenance={
            "dt": 0.05,
            "model_range": {
                v: [float(lo), float(hi)]
                for v, lo, hi in zip(ring.variables, states.min(axis=0), states.max(axis=0))
            },
        },
    )
    x0 = states[rng.integers(0, len(states), size=16)]
    stiff = np.vstack([x0, states_in_fitted_range(ring, np.random.default_rng([0, 1]))])
    h = integrate.choose_substep(ring, stiff, 0.05)

    def dense_choice() -> None:  # the former rule: dense Jacobians and eigenvalues, 16 states
        pick = stiff[np.linspace(0, len(stiff) - 1, 16).astype(np.int64)]
        np.abs(np.linalg.eigvals(ring.jacobian(pick))).max()

    def run():
        return integrate.integrate_ensemble(
            ring, x0, dt_out=0.05, n_out=args.outputs, substep=h, seed=0
        )

    run()
    best = _best_side_by_side(
        {
            "choose": lambda: _timed(lambda: integrate.choose_substep(ring, stiff, 0.05)),
            "dense": lambda: _timed(dense_choice),
            "run": lambda: _timed(run),
        },
        args.repeats,
    )
    rows.append(
        (
            f"substep choice, ring of {n}",
            f"{best['choose'] * 1e3:.1f} ms",
            f"simulate 16 x {args.outputs} outputs {best['run']:.3f} s",
            best["choose"] / best["run"],
        )
    )
    rows.append(
        (
            "former dense choice (16 states)",
            f"{best['dense'] * 1e3:.1f} ms",
            f"new choice {best['choose'] * 1e3:.1f} ms",
            best["dense"] / best["choose"],
        )
    )
    print(f"ring substep {h:.4g} ({round(0.05 / h)} per output)")

    width = max(len(r[0]) for r in rows)
    print(f"\n{'case':<{width}}  {'time':>10}  {'beside':<40} ratio")
    for name, t, ref, ratio in rows:
        shown = "" if math.isnan(ratio) else f"{ratio:.3f}"
        print(f"{name:<{width}}  {t:>10}  {ref:<40} {shown}".rstrip())
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
