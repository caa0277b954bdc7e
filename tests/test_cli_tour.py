"""The README tour through ``ergodex.cli.main``: hold-outs, recorded fit settings, registry
references, kept evidence and reordered columns.

The data are samples of an Ornstein-Uhlenbeck process (exact transitions, Gillespie 1996); the
model is fitted by the linear inverse model, which is fast. Nothing here checks a number against
a reference value: the assertions are about which runs each command used (data fingerprints),
what was recorded, and what each command refuses.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from ergodex import scenarios
from ergodex.cli import main
from ergodex.readers import read_dataset
from ergodex.series import Series
from ergodex.surrogate import Surrogate
from ergodex.writers import write_csv, write_dataset


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    """Four OU runs in a dataset folder whose manifest holds the last two out."""
    folder = tmp_path_factory.mktemp("data") / "ou"
    series = scenarios.ornstein_uhlenbeck(seed=11, n_runs=4, duration=100.0)
    write_dataset(folder, series, name="ou", holdout=2)
    return folder


@pytest.fixture(scope="module")
def fitted(dataset, tmp_path_factory):
    """``ergodex fit`` on the dataset with the defaults of the tour (manifest hold-out)."""
    out = tmp_path_factory.mktemp("fit") / "model.json"
    assert (
        main(["fit", str(dataset), "--method", "linear-inverse", "--out", str(out), "--quiet"]) == 0
    )
    return out


def test_fit_uses_only_the_runs_the_manifest_does_not_hold_out(dataset, fitted):
    fit_part, _ = read_dataset(dataset).split()
    provenance = Surrogate.from_json(fitted).provenance
    assert provenance["fitted_on_runs"] == 2
    assert provenance["data_fingerprint"] == fit_part.fingerprint()


@pytest.mark.parametrize("holdout, runs", [("none", 4), ("1", 3), ("run-1,run-2", 2)])
def test_fit_holdout_option_overrides_the_manifest(dataset, tmp_path, holdout, runs):
    whole = read_dataset(dataset).series
    out = tmp_path / "model.json"
    assert (
        main(
            [
                "fit",
                str(dataset),
                "--method",
                "linear-inverse",
                "--out",
                str(out),
                "--holdout",
                holdout,
                "--quiet",
            ]
        )
        == 0
    )
    provenance = Surrogate.from_json(out).provenance
    assert provenance["fitted_on_runs"] == runs
    if holdout == "run-1,run-2":  # labels name the held-out runs: the fit keeps run-3, run-4
        assert provenance["data_fingerprint"] == whole.select_runs([2, 3]).fingerprint()


def test_validate_checks_on_the_held_out_runs_without_a_warning(dataset, fitted, tmp_path, capsys):
    _, held_out = read_dataset(dataset).split()
    card = tmp_path / "card.json"
    code = main(["validate", str(fitted), str(dataset), "--members", "8", "--json", str(card)])
    assert code in (0, 1, 3)  # pass, fail or inconclusive: the verdict is not under test
    assert json.loads(card.read_text())["data_fingerprint"] == held_out.fingerprint()
    err = capsys.readouterr().err
    assert "warning" not in err and "run-3, run-4" in err


def test_validate_warns_when_the_check_uses_the_fit_data(dataset, fitted, tmp_path, capsys):
    # every run, two of which the model was fitted on
    main(
        [
            "validate",
            str(fitted),
            str(dataset),
            "--members",
            "8",
            "--holdout",
            "none",
            "--statistics",
            "histogram",
        ]
    )
    assert "warning: the model was fitted on runs that this check uses" in capsys.readouterr().err
    # exactly the fit runs
    main(
        [
            "validate",
            str(fitted),
            str(dataset),
            "--members",
            "8",
            "--holdout",
            "run-1,run-2",
            "--statistics",
            "histogram",
            "--quiet",
        ]
    )
    err = capsys.readouterr().err
    assert "warning: the check data are exactly the data the model was fitted on" in err


def test_a_cli_fitted_model_registers_reports_and_retrains_without_hand_written_settings(
    dataset, fitted, tmp_path, capsys
):
    home = tmp_path / "home"
    card = tmp_path / "card.json"
    main(["validate", str(fitted), str(dataset), "--members", "8", "--json", str(card)])
    assert (tmp_path / "card.evidence.npz").exists()  # evidence kept beside the scorecard
    assert (
        main(
            ["register", str(fitted), "--name", "ou", "--scorecard", str(card), "--home", str(home)]
        )
        == 0
    )
    assert (
        main(
            [
                "models",
                "accept",
                "ou/1",
                "--home",
                str(home),
                "--override",
                "--reason",
                "test: the verdict is not what this test is about",
            ]
        )
        == 0
    )
    capsys.readouterr()

    # NAME alone is the accepted version, for every command that takes a model
    assert main(
        [
            "validate",
            "ou",
            str(dataset),
            "--home",
            str(home),
            "--members",
            "8",
            "--statistics",
            "histogram",
            "--quiet",
        ]
    ) in (0, 1, 3)
    assert main(["report", "ou", "--home", str(home)]) == 0
    page = (home / "reports" / "ou-v1-report.html").read_text(encoding="utf-8")
    assert "<img " in page  # the evidence picked up beside the scorecard gives the figures

    # retrain refits with the settings recorded in the model file by `ergodex fit`
    decision = tmp_path / "decision.json"
    code = main(
        [
            "retrain",
            "ou",
            str(dataset),
            "--home",
            str(home),
            "--members",
            "8",
            "--no-report",
            "--json",
            str(decision),
        ]
    )
    assert code in (0, 1)
    record = json.loads(decision.read_text())
    recorded = Surrogate.from_json(fitted).settings
    fit = record["refit"]["fit"]
    assert fit["method"] == "linear-inverse" == recorded["method"]
    assert all(recorded[key] == value for key, value in fit["settings"].items())
    assert record["spec"]["members"] == 8
    assert "score: largest row ratio" in capsys.readouterr().out


def test_retrain_accepts_the_same_variables_in_another_column_order(dataset, fitted, tmp_path):
    home = tmp_path / "home"
    assert main(["register", str(fitted), "--name", "ou", "--home", str(home)]) == 0
    assert (
        main(["models", "accept", "ou/1", "--home", str(home), "--override", "--reason", "test"])
        == 0
    )
    whole = read_dataset(dataset).series
    swapped = Series.from_arrays(
        [run[:, ::-1] for run in whole.runs],
        whole.names[::-1],
        whole.dt,
        run_labels=whole.run_labels,
    )
    data = write_csv(tmp_path / "swapped.csv", swapped)
    decision = tmp_path / "decision.json"
    assert main(
        [
            "retrain",
            "ou",
            str(data),
            "--home",
            str(home),
            "--members",
            "8",
            "--statistics",
            "histogram",
            "--holdout",
            "2",
            "--no-report",
            "--json",
            str(decision),
        ]
    ) in (0, 1)
    record = json.loads(decision.read_text())
    assert record["data"]["names"] == list(whole.names)  # put back in the incumbent's order
    # the columns were moved, not relabelled: the reference part equals the original runs 3-4
    assert record["data"]["reference_fingerprint"] == whole.select_runs([2, 3]).fingerprint()


def test_validate_simulate_and_report_resolve_registry_references_alike(fitted, tmp_path, capsys):
    home = tmp_path / "home"
    assert main(["register", str(fitted), "--name", "ou", "--home", str(home)]) == 0
    out = tmp_path / "sim.csv"
    assert (
        main(
            [
                "simulate",
                "ou/1",
                "--members",
                "2",
                "--steps",
                "5",
                "--seed",
                "1",
                "--out",
                str(out),
                "--home",
                str(home),
            ]
        )
        == 0
    )
    capsys.readouterr()
    # an unknown reference is one line, exit 2, for every command
    for argv in (
        ["validate", "ou/7", str(out)],
        ["simulate", "ou/7", "--members", "2", "--steps", "5"],
        ["report", "ou/7"],
    ):
        assert main([*argv, "--home", str(home)]) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "ou/7" in err[0]
    assert main(["retrain", "ou/1", str(out), "--home", str(home)]) == 2
    assert "without /VERSION" in capsys.readouterr().err


def test_register_refuses_fit_settings_retrain_could_not_use(fitted, tmp_path, capsys):
    home = tmp_path / "home"
    cases = {
        "broken.json": ('{"method": "sparse", ', "not valid JSON (line 1"),
        "typo.json": ('{"method": "sparse", "settings": {"treshold": 0.1}}', "'treshold'"),
        "extra.json": ('{"method": "sparse", "degree": 2}', "unknown key 'degree'"),
        "list.json": ("[1, 2]", "must be a JSON object"),
        "method.toml": ('method = "nonesuch"\n', "must be one of"),
    }
    for name, (text, expected) in cases.items():
        path = tmp_path / name
        path.write_text(text)
        assert (
            main(
                [
                    "register",
                    str(fitted),
                    "--name",
                    "ou",
                    "--fit-settings",
                    str(path),
                    "--home",
                    str(home),
                ]
            )
            == 2
        )
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and expected in err[0] and name in err[0]
    assert not (home / "ou").exists()
    good = tmp_path / "good.json"
    good.write_text('{"method": "linear-inverse", "settings": {"tau0": 0.5}}')
    assert (
        main(
            [
                "register",
                str(fitted),
                "--name",
                "ou",
                "--fit-settings",
                str(good),
                "--home",
                str(home),
            ]
        )
        == 0
    )


def test_validate_report_without_a_file_goes_next_to_the_model(
    dataset, fitted, tmp_path, monkeypatch
):
    model = tmp_path / "m.json"
    model.write_bytes(fitted.read_bytes())
    work = tmp_path / "cwd"
    work.mkdir()
    monkeypatch.chdir(work)
    main(
        [
            "validate",
            str(model),
            str(dataset),
            "--members",
            "8",
            "--statistics",
            "histogram",
            "--report",
            "--quiet",
        ]
    )
    assert (tmp_path / "m.report.html").exists()
    assert list(work.iterdir()) == []


def test_fitted_settings_come_back_from_the_model_file(fitted):
    from ergodex.retraining import fit_settings_from_model

    surrogate = Surrogate.from_json(fitted)
    method, settings = fit_settings_from_model(surrogate)
    assert method == "linear-inverse"
    # learned facts beside the settings (tau0_used) are not settings
    assert "tau0_used" in surrogate.settings and "tau0_used" not in settings
    bare = Surrogate(
        surrogate.variables,
        surrogate.terms,
        np.asarray(surrogate.coefficients),
        kind=surrogate.kind,
        noise=surrogate.noise,
        settings={},
    )
    from ergodex.exceptions import SettingsError

    with pytest.raises(SettingsError, match="config=") as info:
        fit_settings_from_model(bare)
    assert "--config FILE" in info.value.for_command_line()


def test_select_checks_candidates_on_the_held_out_runs_and_explains_its_columns(
    dataset, tmp_path, capsys
):
    fit_part, held_out = read_dataset(dataset).split()
    front = tmp_path / "front.json"
    assert main(
        [
            "fit",
            str(dataset),
            "--select",
            "--method",
            "linear-inverse",
            "--members",
            "6",
            "--statistics",
            "histogram,autocorrelation",
            "--out",
            str(tmp_path / "m.json"),
            "--json",
            str(front),
        ]
    ) in (0, 1)
    record = json.loads(front.read_text())
    assert record["data_fingerprint"] == fit_part.fingerprint()
    assert record["reference_fingerprint"] == held_out.fingerprint()
    assert record["spec"]["members"] == 6
    assert record["spec"]["statistics"] == ["histogram", "autocorrelation"]
    out = capsys.readouterr().out
    assert "stat.score: largest ratio" in out and "tend.err: RMS error" in out


def test_register_ignores_evidence_older_than_the_scorecard(dataset, fitted, tmp_path, capsys):
    import os

    card = tmp_path / "card.json"
    main(
        [
            "validate",
            str(fitted),
            str(dataset),
            "--members",
            "8",
            "--statistics",
            "histogram",
            "--json",
            str(card),
            "--quiet",
        ]
    )
    beside = tmp_path / "card.evidence.npz"
    stamp = card.stat().st_mtime_ns
    os.utime(beside, ns=(stamp - 10**9, stamp - 10**9))  # as if left by an earlier check
    home = tmp_path / "home"
    assert (
        main(
            ["register", str(fitted), "--name", "ou", "--scorecard", str(card), "--home", str(home)]
        )
        == 0
    )
    assert "evidence.npz" not in {p.name for p in (home / "ou" / "1").iterdir()}
    os.utime(beside, ns=(stamp, stamp))
    assert (
        main(
            ["register", str(fitted), "--name", "ou", "--scorecard", str(card), "--home", str(home)]
        )
        == 0
    )
    assert "found beside the scorecard" in capsys.readouterr().out
    assert "evidence.npz" in {p.name for p in (home / "ou" / "2").iterdir()}


def test_select_without_held_out_runs_warns_that_it_checks_on_the_fit_data(
    dataset, tmp_path, capsys
):
    main(
        [
            "fit",
            str(dataset),
            "--select",
            "--method",
            "linear-inverse",
            "--members",
            "4",
            "--statistics",
            "histogram",
            "--holdout",
            "none",
            "--out",
            str(tmp_path / "m.json"),
        ]
    )
    assert "warning: --select checks the candidates on the data they are fitted on" in (
        capsys.readouterr().err
    )


def test_simulate_initial_states_in_another_column_order_start_the_same_members(
    dataset, fitted, tmp_path
):
    whole = read_dataset(dataset).series
    first = whole.select_runs([0])
    swapped = Series.from_arrays([run[:, ::-1] for run in first.runs], first.names[::-1], first.dt)
    outputs = []
    for name, series in (("straight", first), ("swapped", swapped)):
        initial = write_csv(tmp_path / f"{name}.csv", series)
        out = tmp_path / f"{name}-sim.npz"
        assert (
            main(
                [
                    "simulate",
                    str(fitted),
                    "--members",
                    "3",
                    "--steps",
                    "20",
                    "--seed",
                    "2",
                    "--initial",
                    str(initial),
                    "--out",
                    str(out),
                ]
            )
            == 0
        )
        with np.load(out, allow_pickle=False) as archive:
            outputs.append((list(archive["names"]), archive["values"].copy()))
    assert outputs[0][0] == outputs[1][0] == list(whole.names)
    np.testing.assert_array_equal(outputs[0][1], outputs[1][1])
