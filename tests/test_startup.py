"""Start-up: what a command imports before it does its work.

A script that calls ``ergodex`` once per file pays every import on every call, so ``--help``
loads no numerical library and a linear-inverse fit never loads pysindy. Each case runs in a
fresh interpreter (``sys.modules`` of this test process already holds everything).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

DATASET = Path(__file__).resolve().parents[1] / "datasets" / "convection-loop"
HEAVY = ("numpy", "scipy", "sklearn", "pysindy", "numba", "pandas", "xarray", "matplotlib")


def _loaded_after(argv: list[str]) -> tuple[int, str, set[str]]:
    """Run ``ergodex ARGV`` in a fresh interpreter; its exit code, stdout and top-level modules."""
    code, out, modules = _modules_after(argv)
    return code, out, {m.split(".")[0] for m in modules}


def _modules_after(argv: list[str]) -> tuple[int, str, set[str]]:
    """Run ``ergodex ARGV`` in a fresh interpreter; its exit code, stdout and every module."""
    script = (
        "import json, sys\n"
        "from ergodex.cli import main\n"
        "try:\n"
        "    code = main(sys.argv[1:])\n"
        "except SystemExit as exc:\n"
        "    code = exc.code\n"
        "print('\\n@@' + json.dumps({'code': code, 'modules': sorted(sys.modules)}))\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", script, *argv],
        check=False,
        capture_output=True,
        text=True,
        timeout=300,
    )
    out, _, tail = proc.stdout.rpartition("\n@@")
    assert tail, proc.stderr
    record = json.loads(tail)
    return record["code"], out, set(record["modules"])


def test_help_loads_no_numerical_library():
    code, out, modules = _loaded_after(["--help"])
    assert code == 0
    # every command is still listed (their modules were imported to build the parser)
    for command in ("fit", "validate", "simulate", "serve"):
        assert command in out
    assert "ergodex" in modules  # the probe itself works: the package was imported
    assert not modules & set(HEAVY), sorted(modules & set(HEAVY))


def test_help_imports_no_command_module():
    # the command list comes from ergodex.cli itself: no command module, nor what they import
    # (the inbox ledger's sqlite3, the service's sockets, logging)
    code, out, modules = _modules_after(["--help"])
    assert code == 0 and "watch" in out
    commands = {m for m in modules if m.startswith("ergodex.cli.")}
    assert not commands, sorted(commands)
    assert not modules & {"sqlite3", "socket", "hashlib", "logging", "ergodex.watching"}


def test_a_command_imports_no_other_command_module():
    code, out, modules = _modules_after(["fit", "--help"])
    assert code == 0 and "usage" in out
    assert "ergodex.cli.fit" in modules  # the probe sees the command that ran
    others = {f"ergodex.cli.{name}" for name in ("watch", "serve", "models", "retrain", "demo")}
    assert not modules & others, sorted(modules & others)
    assert not modules & {"sqlite3", "socket", "ergodex.watching", "ergodex.service"}


@pytest.mark.parametrize("command", ["fit", "validate", "simulate"])
def test_command_help_loads_no_numerical_library(command):
    code, out, modules = _loaded_after([command, "--help"])
    assert code == 0 and "usage" in out
    assert not modules & set(HEAVY), sorted(modules & set(HEAVY))


def test_linear_inverse_fit_never_imports_pysindy(tmp_path):
    out = tmp_path / "model.json"
    code, _, modules = _loaded_after(
        ["fit", str(DATASET), "--method", "linear-inverse", "--out", str(out), "--quiet"]
    )
    assert code == 0
    document = json.loads(out.read_text())
    assert document["settings"]["method"] == "linear-inverse"
    assert "numpy" in modules  # the fit really ran in that process
    assert "pysindy" not in modules


def test_validate_imports_no_fitting_library(tmp_path):
    from ergodex import scenarios

    model = tmp_path / "truth.json"
    scenarios.lorenz63_surrogate().to_json(model)
    code, out, modules = _loaded_after(
        ["validate", str(model), str(DATASET), "--members", "4", "--quiet"]
    )
    assert code in (0, 1, 3), out
    assert "numpy" in modules  # the check really ran in that process
    # a check integrates and compares statistics: no fitting, plotting or table library (not
    # sqlite3 either, but numba imports coverage when it is installed, and coverage sqlite3)
    unwanted = {"sklearn", "pysindy", "pandas", "xarray", "matplotlib"}
    assert not modules & unwanted, sorted(modules & unwanted)


def test_fast_fft_length_matches_scipy():
    from scipy.fft import next_fast_len

    from ergodex.stats import fast_fft_length

    # reference: scipy.fft.next_fast_len(n, real=True), the smallest 2·3·5-smooth length ≥ n
    rng = np.random.default_rng(19)
    sizes = [*range(1, 3000), *rng.integers(3000, 10**9, size=500).tolist()]
    assert [fast_fft_length(n) for n in sizes] == [next_fast_len(n, real=True) for n in sizes]


def test_compiled_kernels_are_loaded_from_the_disk_cache_in_a_new_process():
    # numba compiles on first use and caches on disk (cache=True); a second interpreter must load
    # every kernel it runs from that cache instead of compiling it again (a kernel built inside
    # a closure over non-global values, or without cache=True, would be compiled every time)
    script = (
        "import json\n"
        "import numpy as np\n"
        "from numba.core.dispatcher import Dispatcher\n"
        "from ergodex import integrate, kernels, scenarios\n"
        "integrate.integrate_ensemble(scenarios.lorenz63_surrogate(), np.ones((2, 3)),\n"
        "                             dt_out=0.01, n_out=5, engine='numba')\n"
        "used = {name: (sum(f.stats.cache_hits.values()), sum(f.stats.cache_misses.values()))\n"
        "        for name, f in vars(kernels).items() if isinstance(f, Dispatcher)\n"
        "        and (f.stats.cache_hits or f.stats.cache_misses)}\n"
        "print(json.dumps(used))\n"
    )
    for _ in range(2):  # the first run may compile and write the cache; the second must not
        proc = subprocess.run(
            [sys.executable, "-c", script], check=True, capture_output=True, text=True, timeout=600
        )
    used = json.loads(proc.stdout.strip().splitlines()[-1])
    assert used, "no compiled kernel ran"
    assert all(misses == 0 and hits > 0 for hits, misses in used.values()), used
