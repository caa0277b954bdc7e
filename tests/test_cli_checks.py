"""Check settings on the command line and in ``--check-config``; advice in command-line form;
``--quiet`` keeps the reasons of a failure."""

from __future__ import annotations

import json
from dataclasses import fields

import numpy as np
import pytest

from ergodex import scenarios
from ergodex.cli import main
from ergodex.cli.checks import OPTIONS
from ergodex.validation import CheckSpec
from ergodex.writers import write_csv


@pytest.fixture(scope="module")
def ou_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("ou")
    write_csv(d / "data.csv", scenarios.ornstein_uhlenbeck(seed=50, duration=200.0))
    true = scenarios.ou_surrogate()
    true.to_json(d / "true.json")
    # doubling drift and noise keeps the stationary covariance but halves correlation times
    fast = scenarios.ou_surrogate(
        drift=2 * np.asarray(true.coefficients), noise=2 * np.asarray(true.noise)
    )
    fast.to_json(d / "fast.json")
    (d / "regimes.toml").write_text(
        '[[regime]]\nname = "high"\nkind = "threshold"\n'
        'rules = [{ variable = "x1", above = 0.5 }]\n'
    )
    return d


def exit_code(argv: list[str]) -> int:
    """``main``'s exit code, also for usage errors (argparse exits through SystemExit)."""
    try:
        return main(argv)
    except SystemExit as stop:
        return int(stop.code)


def test_every_check_setting_has_an_option():
    assert set(OPTIONS) == {f.name for f in fields(CheckSpec)}


def test_options_and_config_file_reach_the_scorecard(ou_files, tmp_path):
    config = tmp_path / "check.toml"
    config.write_text(
        f'members = 6\nmin_pieces = 6\nbins = 12\nregimes = "{ou_files / "regimes.toml"}"\n'
        'statistics = ["histogram", "occupancy"]\n[tolerances]\nhistogram = 3.5\n'
    )
    card = tmp_path / "card.json"
    main(
        [
            "validate",
            str(ou_files / "true.json"),
            str(ou_files / "data.csv"),
            "--quiet",
            "--check-config",
            str(config),
            "--members",
            "4",
            "--pool",
            "2",
            "--gap",
            "1.5",
            "--max-lag",
            "2",
            "--nperseg",
            "16",
            "--max-blowup-fraction",
            "0.25",
            "--tolerance",
            "3",
            "--spinup",
            "1",
            "--length",
            "200",
            "--seed",
            "5",
            "--json",
            str(card),
        ]
    )
    spec = json.loads(card.read_text())["spec"]
    # the command line wins over the file, the file over the defaults
    assert spec["members"] == 4 and spec["min_pieces"] == 6 and spec["bins"] == 12
    assert spec["statistics"] == ["histogram", "occupancy"]
    assert spec["tolerances"] == {"histogram": 3.5} and spec["tolerance"] == 3.0
    assert [r["name"] for r in spec["regimes"]["regime"]] == ["high"]
    assert (spec["pool"], spec["gap"], spec["max_lag"], spec["nperseg"]) == (2, 1.5, 2.0, 16)
    assert (spec["max_blowup_fraction"], spec["spinup"], spec["length"], spec["seed"]) == (
        0.25,
        1.0,
        200.0,
        5,
    )


@pytest.mark.parametrize(
    "extra, expected",
    [
        (["--members", "1"], "--members must be an integer"),
        (["--statistics", "histogram,wiggles"], "--statistics: unknown statistic 'wiggles'"),
        (["--tolerances", "spectrum"], "STATISTIC=NUMBER"),
        (["--tolerances", "wiggles=2"], "--tolerances: unknown statistic 'wiggles'"),
        (["--bins", "many"], "a bin count or 'fd'"),
        (["--max-blowup-fraction", "1.5"], "--max-blowup-fraction must be below 1"),
        (["--min-pieces", "1"], "--min-pieces must be an integer"),
        (["--check-config", "CONFIG:membrs = 4"], "unknown check setting 'membrs'"),
        (["--check-config", "CONFIG:members = 1"], "check.toml: members must be an integer"),
        (["--check-config", "CONFIG:members = "], "not valid TOML"),
        (["--check-config", 'CONFIG:regimes = "nonesuch.toml"'], "regime file not found"),
        (["--false-reject-rate", "0.7"], "--false-reject-rate must be between 0 and 0.5"),
        (["--false-reject-rate", "often"], "a rate such as 0.05, or 'fixed'"),
        (["--null-replicates", "3"], "--null-replicates must be an integer ≥ 10"),
        (["--threshold-floor", "low"], "a number or 'none'"),
    ],
)
def test_bad_check_settings_exit_2_on_one_line_naming_the_option_or_file(
    ou_files, tmp_path, capsys, extra, expected
):
    if extra[0] == "--check-config":
        config = tmp_path / "check.toml"
        config.write_text(extra[1].split(":", 1)[1] + "\n")
        extra = ["--check-config", str(config)]
    card = tmp_path / "card.json"
    code = exit_code(
        [
            "validate",
            str(ou_files / "true.json"),
            str(ou_files / "data.csv"),
            "--json",
            str(card),
            *extra,
        ]
    )
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and expected in err[0], err
    assert not card.exists()


def test_threshold_options_reach_the_scorecard(ou_files, tmp_path):
    card = tmp_path / "card.json"
    common = ["validate", str(ou_files / "true.json"), str(ou_files / "data.csv"), "--quiet"]
    common += ["--members", "4", "--json", str(card)]
    main([*common, "--false-reject-rate", "0.05", "--threshold-floor", "none"])
    d = json.loads(card.read_text())
    assert d["format"] == "ergodex-scorecard/2"
    assert d["spec"]["threshold_floor"] is None and d["threshold"]["floor"] is None
    assert d["threshold"]["threshold"] == d["threshold"]["null_quantile"]
    config = tmp_path / "check.toml"
    config.write_text('false_reject_rate = 0.1\nnull_replicates = 12\nthreshold_floor = "none"\n')
    main([*common, "--check-config", str(config)])
    d = json.loads(card.read_text())
    assert (d["spec"]["false_reject_rate"], d["spec"]["null_replicates"]) == (0.1, 12)
    assert d["threshold"]["false_reject_rate"] == 0.1 and d["threshold"]["replicates"] == 12
    main(
        [*common, "--check-config", str(config), "--false-reject-rate", "fixed", "--tolerance", "3"]
    )
    d = json.loads(card.read_text())
    assert d["spec"]["false_reject_rate"] is None
    assert d["threshold"] == {"false_reject_rate": None, "threshold": 3.0}
    assert {r["tolerance"] for r in d["rows"]} == {3.0}


def test_quiet_failure_keeps_its_reasons(ou_files, capsys):
    code = main(
        [
            "validate",
            str(ou_files / "fast.json"),
            str(ou_files / "data.csv"),
            "--seed",
            "3",
            "--quiet",
        ]
    )
    assert code == 1
    lines = capsys.readouterr().out.strip().splitlines()
    assert lines[0] == "verdict: fail"
    assert len(lines) >= 2 and all(line.startswith("- ") for line in lines[1:])
    assert any("noise floor" in line for line in lines[1:])


def test_gap_advice_is_in_command_line_form_and_the_option_exists(tmp_path, capsys):
    data = write_csv(
        tmp_path / "gappy.csv", scenarios.ornstein_uhlenbeck(seed=4, n_runs=1, duration=100.0)
    )
    text = data.read_text().splitlines()
    cells = text[1001].split(",")
    cells[-2] = ""  # one missing cell in the middle of the run
    text[1001] = ",".join(cells)
    data.write_text("\n".join(text) + "\n")
    out = tmp_path / "model.json"
    args = ["fit", str(data), "--method", "linear-inverse", "--out", str(out), "--quiet"]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "(use --split-at-gaps)" in err and "split_at_gaps=True" not in err
    assert main([*args, "--split-at-gaps"]) == 0
    from ergodex.surrogate import Surrogate

    assert Surrogate.from_json(out).provenance["fitted_on_runs"] == 2  # split at the gap


def test_python_callers_keep_the_python_form_of_the_advice(tmp_path):
    from ergodex.exceptions import DataError
    from ergodex.readers import read_series

    data = tmp_path / "gappy.csv"
    data.write_text("time,x1\n0.0,1\n0.1,\n0.2,3\n")
    with pytest.raises(DataError, match=r"split_at_gaps=True") as info:
        read_series(data)
    assert "--split-at-gaps" in info.value.for_command_line()


def test_accept_refusal_advises_the_override_options(ou_files, tmp_path, capsys):
    home = tmp_path / "home"
    card = tmp_path / "card.json"
    main(
        [
            "validate",
            str(ou_files / "fast.json"),
            str(ou_files / "data.csv"),
            "--seed",
            "3",
            "--json",
            str(card),
            "--quiet",
        ]
    )
    assert (
        main(
            [
                "register",
                str(ou_files / "fast.json"),
                "--name",
                "ou",
                "--scorecard",
                str(card),
                "--home",
                str(home),
            ]
        )
        == 0
    )
    capsys.readouterr()
    assert main(["models", "accept", "ou/1", "--home", str(home)]) == 2
    err = capsys.readouterr().err
    assert "--override --reason TEXT" in err and "override=True" not in err


def test_fit_prints_what_its_score_means(ou_files, tmp_path, capsys):
    assert (
        main(
            [
                "fit",
                str(ou_files / "data.csv"),
                "--method",
                "linear-inverse",
                "--out",
                str(tmp_path / "m.json"),
            ]
        )
        == 0
    )
    out = capsys.readouterr().out
    assert "score: the fit's R²" in out


def test_check_options_apply_to_fit_only_with_select(ou_files, tmp_path, capsys):
    assert (
        main(
            ["fit", str(ou_files / "data.csv"), "--out", str(tmp_path / "m.json"), "--members", "4"]
        )
        == 2
    )
    assert "--members only applies with --select" in capsys.readouterr().err
    assert not (tmp_path / "m.json").exists()


def test_advice_survives_the_trip_through_a_worker_process():
    import pickle

    from ergodex.exceptions import DataError

    # candidate sweeps run in joblib workers, whose errors come back pickled
    error = pickle.loads(pickle.dumps(DataError("bad row", python_hint="(a=1)", cli_hint="(--a)")))
    assert str(error) == "bad row (a=1)" and error.for_command_line() == "bad row (--a)"
    assert isinstance(error, ValueError)
