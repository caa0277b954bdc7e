"""Mutation score of the test suite: how many small deliberate bugs do the tests catch?

A general-purpose mutation tool (mutmut, the ``mutation`` extra) changes one operator, constant
or name at a time in a module and runs the tests that reach the changed function; a mutant the
tests do not fail on "survives". This script runs it module by module, each in a throw-away copy
of the project (mutmut writes a ``mutants/`` folder next to the sources), and prints per module
the mutants killed, surviving, timed out and not reached by any test, and the score
``killed / (killed + survived + not reached)``. Timeouts count as killed (an infinite loop is
caught by a test's time limit).

Slow (tens of minutes per module on 2 cores), so not part of CI. Typical use, from the project
root::

    python benchmarks/mutation.py validation stats --workers 2 --json mutation.json
    python benchmarks/mutation.py validation --only 'ergodex.validation.verdict.x__decide*'

Results and the surviving mutants are recorded in ``benchmarks/README.md``.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: module → (source file, or a glob of a package's files; test files that exercise it). Only fast
#: tests run (``-m "not slow"``).
MODULES: dict[str, tuple[str, list[str]]] = {
    "validation": (
        "src/ergodex/validation/*",
        [
            "tests/test_verdict.py",
            "tests/test_scorecard_io.py",
            "tests/test_defaults.py",
            "tests/test_validation.py",
            "tests/test_validation_hidden.py",
        ],
    ),
    "stats": (
        "src/ergodex/stats.py",
        [
            "tests/test_stats.py",
            "tests/test_stats_edges.py",
            "tests/test_verdict.py",
            "tests/test_defaults.py",
        ],
    ),
    "regimes": (
        "src/ergodex/regimes.py",
        ["tests/test_regimes.py", "tests/test_regime_labels.py", "tests/test_verdict.py"],
    ),
    "model_space": (
        "src/ergodex/model_space.py",
        ["tests/test_model_space.py", "tests/test_defaults.py"],
    ),
    "linear_inverse": (
        "src/ergodex/fitting/linear_inverse.py",
        ["tests/test_fitting_linear_inverse.py", "tests/test_defaults.py"],
    ),
    "registry": ("src/ergodex/registry/*", ["tests/test_registry.py", "tests/test_defaults.py"]),
}

# mutmut's result names → our tally
_KILLED = {"killed", "timeout", "caught by type check", "segfault"}
_SURVIVED = {"survived", "suspicious"}
_UNREACHED = {"no tests"}


def _project_copy(module: str, workdir: Path) -> Path:
    """A copy of sources, tests and pyproject.toml with a mutmut section for one module."""
    source, tests = MODULES[module]
    dest = workdir / module
    if dest.exists():
        shutil.rmtree(dest)
    dest.mkdir(parents=True)
    shutil.copytree(
        ROOT / "src", dest / "src", ignore=shutil.ignore_patterns("__pycache__", "*.egg-info")
    )
    shutil.copytree(ROOT / "tests", dest / "tests", ignore=shutil.ignore_patterns("__pycache__"))
    tests = [t for t in tests if (ROOT / t).exists()]
    quoted = lambda items: "[" + ", ".join(json.dumps(i) for i in items) + "]"  # noqa: E731
    section = (
        "\n[tool.mutmut]\n"
        'source_paths = ["src"]\n'
        f"only_mutate = {quoted([source])}\n"
        f"pytest_add_cli_args_test_selection = {quoted(tests)}\n"
        'pytest_add_cli_args = ["-m", "not slow", "-p", "no:cacheprovider"]\n'
        "use_git_change_detection = false\n"
    )
    (dest / "pyproject.toml").write_text((ROOT / "pyproject.toml").read_text() + section)
    return dest


def _tally(project: Path, env: dict) -> tuple[dict[str, int], list[str]]:
    """Counts by status and the names of the mutants that were not killed."""
    out = subprocess.run(
        [sys.executable, "-m", "mutmut", "results", "--all", "true"],
        cwd=project,
        env=env,
        capture_output=True,
        text=True,
        check=True,
    ).stdout
    counts: dict[str, int] = {}
    alive = []
    for line in out.splitlines():
        name, sep, status = line.strip().rpartition(": ")
        if not sep:
            continue
        counts[status] = counts.get(status, 0) + 1
        if status not in _KILLED:
            alive.append(f"{name} ({status})")
    return counts, alive


def run(module: str, workdir: Path, workers: int, only: list[str]) -> dict:
    project = _project_copy(module, workdir)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env.update(
        MPLBACKEND="Agg",
        OMP_NUM_THREADS="1",
        OPENBLAS_NUM_THREADS="1",
        MKL_NUM_THREADS="1",
        NUMBA_NUM_THREADS="1",
    )
    start = time.perf_counter()
    log = open(workdir / f"{module}.log", "w")
    with log:
        proc = subprocess.run(
            [sys.executable, "-m", "mutmut", "run", "--max-children", str(workers), *only],
            cwd=project,
            env=env,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    seconds = time.perf_counter() - start
    counts, alive = _tally(project, env)
    killed = sum(v for k, v in counts.items() if k in _KILLED)
    survived = sum(v for k, v in counts.items() if k in _SURVIVED)
    unreached = sum(v for k, v in counts.items() if k in _UNREACHED)
    judged = killed + survived + unreached
    return {
        "module": module,
        "source": MODULES[module][0],
        "tests": MODULES[module][1],
        "only": only,
        "exit_code": proc.returncode,
        "seconds": round(seconds, 1),
        "counts": counts,
        "killed": killed,
        "survived": survived,
        "not_reached": unreached,
        "score": killed / judged if judged else float("nan"),
        "not_killed": alive,
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "modules",
        nargs="*",
        default=list(MODULES),
        help=f"modules to mutate, of {list(MODULES)} (default: all)",
    )
    parser.add_argument("--workers", type=int, default=2, help="parallel test processes")
    parser.add_argument(
        "--only",
        action="append",
        default=[],
        help="mutant name patterns (fnmatch), e.g. 'ergodex.stats.x_hellinger*'",
    )
    parser.add_argument(
        "--workdir",
        type=Path,
        default=None,
        help="folder for the project copies and logs (default: a temporary one)",
    )
    parser.add_argument("--json", type=Path, default=None, help="write the results here")
    args = parser.parse_args(argv)
    unknown = [m for m in args.modules if m not in MODULES]
    if unknown:
        parser.error(f"unknown module(s) {unknown}; known: {list(MODULES)}")
    workdir = args.workdir or Path(tempfile.mkdtemp(prefix="ergodex-mutation-"))
    workdir.mkdir(parents=True, exist_ok=True)
    print(f"working in {workdir}")
    results = []
    for module in args.modules:
        r = run(module, workdir, args.workers, args.only)
        results.append(r)
        print(
            f"{module:>15}: {r['killed']:4d} killed, {r['survived']:4d} survived, "
            f"{r['not_reached']:4d} not reached, score {100 * r['score']:5.1f} % "
            f"({r['seconds']:.0f} s)",
            flush=True,
        )
        for name in r["not_killed"]:
            print(f"{'':>17}{name}")
        if args.json:
            args.json.write_text(json.dumps(results, indent=2) + "\n")
    killed = sum(r["killed"] for r in results)
    judged = sum(r["killed"] + r["survived"] + r["not_reached"] for r in results)
    if judged:
        print(f"{'overall':>15}: {killed} of {judged} killed, score {100 * killed / judged:.1f} %")
    return 0


if __name__ == "__main__":
    sys.exit(main())
