"""End to end: ``ergodex demo`` builds data, fits, validates, registers and reports."""

from __future__ import annotations

import json

import numpy as np
import pytest

from ergodex.cli import main

pytestmark = pytest.mark.slow

# Lorenz-63 (Lorenz 1963) with sigma=10, rho=28, beta=8/3: the demo loop's true dynamics.
# Columns follow the term order 1, flow, dT_across, dT_up, then the quadratic monomials.
SIGMA, RHO, BETA = 10.0, 28.0, 8.0 / 3.0


def _true_coefficients(terms: list[dict], variables: list[str]) -> np.ndarray:
    """The Lorenz-63 right-hand side written in the model file's term table."""
    index = {tuple(t["powers"]): j for j, t in enumerate(terms) if t["kind"] == "monomial"}
    x, y, z = (tuple(int(i == k) for i in range(3)) for k in range(3))
    xz, xy = (1, 0, 1), (1, 1, 0)
    true = np.zeros((3, len(terms)))
    true[0, index[x]], true[0, index[y]] = -SIGMA, SIGMA
    true[1, index[x]], true[1, index[y]], true[1, index[xz]] = RHO, -1.0, -1.0
    true[2, index[xy]], true[2, index[z]] = 1.0, -BETA
    return true


def test_demo_recovers_the_loop_equations_passes_and_registers(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("ERGODEX_HOME", raising=False)
    code = main(["demo"])
    out = capsys.readouterr().out
    assert code == 0, out

    # Files land under the current folder: datasets/ and models/ (the registry layout of
    # docs/formats.md).
    assert (tmp_path / "datasets" / "convection-loop" / "dataset.toml").is_file()
    assert (tmp_path / "models" / "registry.sqlite3").is_file()
    version = tmp_path / "models" / "convection-loop" / "1"
    for name in ("model.json", "scorecard.json", "report.html"):
        assert (version / name).is_file(), name

    model = json.loads((version / "model.json").read_text())
    assert model["variables"] == ["flow", "dT_across", "dT_up"]
    coef = np.asarray(model["coefficients"], dtype=float)
    true = _true_coefficients(model["terms"], model["variables"])
    nonzero = true != 0
    # Every true coefficient within 5 %, no spurious term above 0.05: the SINDy result on
    # Lorenz-63 (Brunton, Proctor & Kutz 2016, PNAS 113:3932).
    rel = np.abs(coef[nonzero] - true[nonzero]) / np.abs(true[nonzero])
    assert rel.max() < 0.05, rel
    assert np.abs(coef[~nonzero]).max(initial=0.0) <= 0.05

    card = json.loads((version / "scorecard.json").read_text())
    assert card["verdict"] == "pass"
    assert "accepted" in out and "report.html" in out
    assert "not a certification" in out


def test_demo_twice_adds_a_version_and_keeps_the_first(tmp_path, monkeypatch):
    home = tmp_path / "elsewhere"
    monkeypatch.chdir(tmp_path)
    assert main(["demo", "--home", str(home)]) == 0
    assert main(["demo", "--home", str(home)]) == 0
    assert (home / "convection-loop" / "1" / "model.json").is_file()
    assert (home / "convection-loop" / "2" / "model.json").is_file()
    # The same seed gives the same data and therefore the same model bytes.
    first = (home / "convection-loop" / "1" / "model.json").read_text()
    second = (home / "convection-loop" / "2" / "model.json").read_text()
    assert json.loads(first)["coefficients"] == json.loads(second)["coefficients"]
