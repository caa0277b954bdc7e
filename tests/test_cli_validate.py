"""``ergodex validate``: exit 0 pass, 1 fail, 2 bad input with nothing written."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from ergodex import scenarios
from ergodex.cli import main
from ergodex.writers import write_csv


@pytest.fixture(scope="module")
def ou_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("ou")
    data = scenarios.ornstein_uhlenbeck(seed=50, duration=200.0)
    write_csv(d / "data.csv", data)
    true = scenarios.ou_surrogate()
    true.to_json(d / "true.json")
    # doubling drift and noise keeps the stationary covariance but halves correlation times
    fast = scenarios.ou_surrogate(
        drift=2 * np.asarray(true.coefficients), noise=2 * np.asarray(true.noise)
    )
    fast.to_json(d / "fast.json")
    return d


def test_pass_writes_scorecard_and_evidence(ou_files, tmp_path, capsys):
    out = tmp_path / "card.json"
    ev = tmp_path / "ev.npz"
    code = main(
        [
            "validate",
            str(ou_files / "true.json"),
            str(ou_files / "data.csv"),
            "--members",
            "8",
            "--seed",
            "3",
            "--json",
            str(out),
            "--evidence",
            str(ev),
        ]
    )
    assert code == 0
    card = json.loads(out.read_text())
    assert card["verdict"] == "pass" and card["spec"]["members"] == 8 and card["spec"]["seed"] == 3
    assert ev.exists()
    assert "verdict: PASS" in capsys.readouterr().out


def test_fail_exits_1_with_reasons(ou_files, tmp_path, capsys):
    out = tmp_path / "card.json"
    code = main(
        [
            "validate",
            str(ou_files / "fast.json"),
            str(ou_files / "data.csv"),
            "--seed",
            "3",
            "--json",
            str(out),
        ]
    )
    assert code == 1
    card = json.loads(out.read_text())
    assert card["verdict"] == "fail" and card["reasons"]
    assert "noise floor" in capsys.readouterr().out


def test_bad_inputs_exit_2_and_write_nothing(ou_files, tmp_path, capsys):
    out = tmp_path / "card.json"
    bad = tmp_path / "bad.csv"
    bad.write_text("time,x1,x2\n0.0,1,2\n0.05,nan,2\n0.1,1,3\n")
    regimes = tmp_path / "regimes.toml"
    regimes.write_text('[[regime]]\nname = "a"\nkind = "ball"\ncentre = { x1 = 0.0 }\n')
    cases = [
        [str(ou_files / "true.json"), str(bad)],  # NaN in the data
        [str(tmp_path / "missing.json"), str(ou_files / "data.csv")],  # no model file
        [str(ou_files / "true.json"), str(ou_files / "data.csv"), "--regimes", str(regimes)],
        [str(ou_files / "true.json"), str(ou_files / "data.csv"), "--members", "1"],
    ]
    expected = ["bad.csv", "missing.json", "'radius'", "members"]
    # the first case through a real process (console behaviour), the rest through main()
    proc = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from ergodex.cli import main; sys.exit(main())",
            "validate",
            *cases[0],
            "--json",
            str(out),
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert proc.returncode == 2, proc.stderr
    assert proc.stderr.count("\n") == 1 and "Traceback" not in proc.stderr
    assert expected[0] in proc.stderr
    for extra, needle in zip(cases[1:], expected[1:]):
        assert main(["validate", *extra, "--json", str(out)]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and needle in err, err
    assert not out.exists()
