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
    script = (
        "import json, sys\n"
        "from ergodex.cli import main\n"
        "try:\n"
        "    code = main(sys.argv[1:])\n"
        "except SystemExit as exc:\n"
        "    code = exc.code\n"
        "names = sorted({m.split('.')[0] for m in sys.modules})\n"
        "print('\\n@@' + json.dumps({'code': code, 'modules': names}))\n"
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


def test_fast_fft_length_matches_scipy():
    from scipy.fft import next_fast_len

    from ergodex.stats import fast_fft_length

    # reference: scipy.fft.next_fast_len(n, real=True), the smallest 2·3·5-smooth length ≥ n
    rng = np.random.default_rng(19)
    sizes = [*range(1, 3000), *rng.integers(3000, 10**9, size=500).tolist()]
    assert [fast_fft_length(n) for n in sizes] == [next_fast_len(n, real=True) for n in sizes]
