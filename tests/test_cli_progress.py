"""One progress convention on the command line: a bar on a terminal's stderr, else nothing."""

from __future__ import annotations

import pytest

from ergodex.cli import common, main
from ergodex.scenarios import lorenz63_surrogate


@pytest.fixture
def model(tmp_path):
    path = tmp_path / "model.json"
    truth = lorenz63_surrogate()
    type(truth)(truth.variables, truth.terms, truth.coefficients, provenance={"dt": 0.01}).to_json(
        path
    )
    return path


def _simulate(model, tmp_path, name):
    out = tmp_path / name
    return main(
        [
            "simulate",
            str(model),
            "--members",
            "2",
            "--steps",
            "300",
            "--seed",
            "1",
            "--out",
            str(out),
        ]
    )


def test_simulate_draws_a_bar_on_a_terminal_and_none_in_a_script(
    model, tmp_path, capsys, monkeypatch
):
    monkeypatch.setattr(common, "is_terminal", lambda: True)
    assert _simulate(model, tmp_path, "a.csv") == 0
    err = capsys.readouterr().err
    assert "simulate:" in err and "output" in err and "\r" in err  # tqdm's redrawn line
    monkeypatch.setattr(common, "is_terminal", lambda: False)
    assert _simulate(model, tmp_path, "b.csv") == 0
    err = capsys.readouterr().err
    assert "\r" not in err and "2 members integrated" in err


def test_fit_bar_follows_the_terminal_and_quiet_silences_it(model, tmp_path, capsys, monkeypatch):
    assert (
        main(
            [
                "simulate",
                str(model),
                "--members",
                "2",
                "--steps",
                "400",
                "--seed",
                "2",
                "--out",
                str(tmp_path / "data.csv"),
            ]
        )
        == 0
    )
    capsys.readouterr()
    monkeypatch.setattr(common, "is_terminal", lambda: True)
    fit = ["fit", str(tmp_path / "data.csv"), "--holdout", "0", "--out"]
    assert main([*fit, str(tmp_path / "m1.json")]) == 0
    assert "fit sparse" in capsys.readouterr().err  # the fitter's own bar (desc "fit METHOD")
    assert main([*fit, str(tmp_path / "m2.json"), "--quiet"]) == 0
    assert capsys.readouterr().err == ""


def test_show_progress_is_off_off_a_terminal_and_with_quiet(monkeypatch):
    import argparse

    monkeypatch.setattr(common, "is_terminal", lambda: True)
    assert common.show_progress(argparse.Namespace(quiet=False)) is True
    assert common.show_progress(argparse.Namespace(quiet=True)) is False
    assert common.show_progress(argparse.Namespace()) is True  # commands without --quiet
    monkeypatch.setattr(common, "is_terminal", lambda: False)
    assert common.show_progress(argparse.Namespace(quiet=False)) is False
