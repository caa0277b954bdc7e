"""The automatic choice of reduction and method (``ergodex fit`` on a many-variable record)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from ergodex.cli import main
from ergodex.fitting.automatic import MANY_VARIABLES, choose_fit, mode_counts
from ergodex.series import Series
from ergodex.surrogate import Surrogate
from ergodex.validation import CheckSpec
from ergodex.writers import write_csv
from test_fitting_data import ou_runs


def _ou(n: int, seed: int, *, n_runs: int = 2, n_samples: int = 6000) -> Series:
    """A stable linear OU process on n variables, sampled exactly (Gardiner §4.5.6 via
    ou_runs): a ring of damped variables each pushed by its neighbour, with independent noise."""
    A = -np.eye(n) + 0.3 * np.roll(np.eye(n), 1, axis=1)
    Q = 0.5 * np.eye(n)
    runs, _ = ou_runs(np.random.default_rng(seed), A, Q, n_runs=n_runs, n_samples=n_samples)
    return Series.from_arrays(runs, tuple(f"v{j}" for j in range(n)), 0.1)


def test_mode_counts_follow_the_documented_rule():
    assert mode_counts(40) == [6, 8, 10, 12]
    assert mode_counts(12) == [6, 8, 10, 12]
    assert mode_counts(9) == [6, 8, 9]
    assert mode_counts(2) == [2]


def test_a_linear_ou_record_chooses_the_linear_inverse_model_on_every_mode():
    # A linear OU process is exactly the linear inverse model's dynamics (Penland & Sardeshmukh
    # 1995; the analytic OU law: drift A x, white noise Q), so the LIM on both modes must pass
    # its check against the fit runs, and the calibrated step is never reached.
    series = _ou(2, seed=3)
    result = choose_fit(series, CheckSpec(seed=1, members=8), progress=False)
    assert result.passed and len(result.candidates) == 1
    chosen = result.candidates[result.chosen]
    assert (chosen.method, chosen.settings) == ("linear-inverse", {"n_modes": 2})
    assert chosen.statistical_score is not None
    assert chosen.statistical_score <= result.spec["tolerance"]
    assert "linear-inverse on 2 modes" in result.message
    assert result.reference_fingerprint == series.fingerprint()  # scored on the fit runs


def test_cli_chooses_for_a_many_variable_record_and_says_why(tmp_path, capsys):
    series = _ou(MANY_VARIABLES + 1, seed=5)
    data = write_csv(tmp_path / "ou7.csv", series)
    out, front = tmp_path / "m.json", tmp_path / "front.json"
    code = main(
        ["fit", str(data), "--out", str(out), "--json", str(front), "--seed", "2", "--members", "8"]
    )
    printed = capsys.readouterr()
    assert code == 0
    assert "more than 6" in printed.err
    lines = printed.out.splitlines()
    # one line per candidate: mode counts 6 and 7 (the number of variables)
    assert sum("n_modes=6" in line for line in lines) == 1
    assert sum("n_modes=7" in line for line in lines) == 1
    assert any(line.startswith("chose candidate") for line in lines)
    record = json.loads(front.read_text())
    assert record["choice"] == "automatic" and record["passed"] is True
    chosen = record["candidates"][record["chosen"]]
    assert chosen["method"] == "linear-inverse" and chosen["verdict"] == "pass"
    assert Surrogate.from_json(out).settings["method"] == "linear-inverse"


def test_cli_check_options_without_a_choice_are_refused(tmp_path, capsys):
    data = write_csv(tmp_path / "ou2.csv", _ou(2, seed=6, n_runs=1, n_samples=400))
    out = tmp_path / "m.json"
    assert main(["fit", str(data), "--out", str(out), "--members", "8"]) == 2
    err = capsys.readouterr().err
    assert "--members only applies with --select or the automatic choice" in err
    assert not out.exists()
    assert main(["fit", str(data), "--out", str(out), "--method", "sparse", "--n-jobs", "2"]) == 2
    assert "--n-jobs only apply with --select" in capsys.readouterr().err


@pytest.mark.slow
def test_cli_calibrates_after_the_linear_models_fail_and_exits_by_the_verdict(tmp_path, capsys):
    # Lorenz-96 on a ring of 8 stations (Lorenz 1996, F = 8) is chaotic and non-Gaussian, which a
    # linear model driven by Gaussian noise cannot reproduce, so the linear step fails and the
    # calibrated step runs on the closest mode count; the exit code follows its verdict and a
    # failed choice writes only the --json front.
    from ergodex import scenarios

    series = scenarios.station_ring(seed=1, n=8, n_runs=2, duration=60.0)
    data = write_csv(tmp_path / "ring8.csv", series)
    out, front = tmp_path / "m.json", tmp_path / "front.json"
    args = ["fit", str(data), "--out", str(out), "--json", str(front), "--members", "8"]
    code = main(args)
    printed = capsys.readouterr().out
    record = json.loads(front.read_text())
    methods = [c["method"] for c in record["candidates"]]
    assert methods == ["linear-inverse", "linear-inverse", "calibrated-linear-inverse"]
    assert [c["verdict"] for c in record["candidates"][:2]] == ["fail", "fail"]
    closest = min(record["candidates"][:2], key=lambda c: c["statistical_score"])
    assert record["candidates"][2]["settings"] == closest["settings"]
    passed = record["candidates"][2]["verdict"] == "pass"
    assert code == (0 if passed else 1) and out.exists() == passed
    assert ("chose candidate 2" if passed else "none of the 3 candidates passed") in printed


def test_cli_writes_the_front_and_exits_1_when_no_candidate_can_be_checked(tmp_path, capsys):
    # 2 runs of 300 samples: too short to cut into the 8 separated pieces a noise floor needs
    # (CheckSpec's min_pieces), so no candidate can be checked and none is written
    series = _ou(MANY_VARIABLES + 1, seed=9, n_samples=300)
    data = write_csv(tmp_path / "ou7.csv", series)
    out, front = tmp_path / "m.json", tmp_path / "front.json"
    code = main(["fit", str(data), "--out", str(out), "--json", str(front), "--members", "4"])
    assert code == 1 and not out.exists()
    printed = capsys.readouterr().out
    assert "could be fitted and checked" in printed and "too short for a noise floor" in printed
    record = json.loads(front.read_text())
    assert record["chosen"] is None and record["choice"] == "automatic"
    assert [c["verdict"] for c in record["candidates"]] == ["error", "error"]


def test_a_record_too_short_to_tell_stops_after_the_linear_step():
    # 2 runs of 3000 samples: too few decorrelation times for the check to detect a ±50 %
    # change of the time scale or variance (validate's power rule), so the one candidate is
    # inconclusive and the calibrated step, which could not change that, is skipped.
    series = _ou(2, seed=3, n_samples=3000)
    result = choose_fit(series, CheckSpec(seed=1, members=8), progress=False)
    assert not result.passed
    assert [c.verdict for c in result.candidates] == ["inconclusive"]
    assert "too short to tell" in result.message
