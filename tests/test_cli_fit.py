"""``ergodex fit``: the command line over the fitters and the selection."""

from __future__ import annotations

import json

import numpy as np
import pytest

from ergodex.cli import main
from ergodex.surrogate import Surrogate
from ergodex.writers import write_csv
from test_fitting_data import lorenz63_reference_series, lorenz63_true_coefficients


@pytest.fixture(scope="module")
def lorenz_csv(tmp_path_factory):
    return write_csv(tmp_path_factory.mktemp("data") / "loop.csv", lorenz63_reference_series(0.01))


def test_fit_writes_a_model_that_recovers_lorenz63(lorenz_csv, tmp_path, capsys):
    out = tmp_path / "model.json"
    summary = tmp_path / "fit.json"
    assert (
        main(
            [
                "fit",
                str(lorenz_csv),
                "--method",
                "sparse",
                "--out",
                str(out),
                "--json",
                str(summary),
            ]
        )
        == 0
    )
    model = Surrogate.from_json(out)
    # Brunton, Proctor & Kutz (2016): the seven Lorenz-63 terms, coefficients within 1 %
    assert model.n_terms == 5 and int(np.count_nonzero(model.coefficients)) == 7
    true = lorenz63_true_coefficients()
    assert abs(model.coefficients[1, 0] - true[1, 1]) < 0.01 * 28.0
    record = json.loads(summary.read_text())
    assert record["method"] == "sparse" and record["n_terms"] == 7
    assert record["model_fingerprint"] == model.fingerprint()
    assert "d flow/dt" in capsys.readouterr().out
    assert sorted(p.name for p in tmp_path.iterdir()) == [
        "fit.json",
        "model.json",
    ]  # no temp files left


def test_fit_with_config(lorenz_csv, tmp_path):
    config = tmp_path / "fit.toml"
    config.write_text('method = "linear-inverse"\n[settings]\ntau0 = 0.05\n')
    out = tmp_path / "lim.json"
    assert (
        main(["fit", str(lorenz_csv), "--config", str(config), "--out", str(out), "--quiet"]) == 0
    )
    model = Surrogate.from_json(out)
    assert model.kind == "linear-stochastic" and model.is_stochastic
    assert model.settings["tau0"] == 0.05


@pytest.mark.parametrize(
    "config_text, extra, message",
    [
        ('method = "sparse"\n[settings]\ntreshold = 0.1\n', [], "sparse has no setting 'treshold'"),
        ('method = "sparse"\n', ["--method", "linear-inverse"], "contradicts method = 'sparse'"),
        (
            "[settings]\ntau0 = -1.0\n",
            ["--method", "linear-inverse"],
            "'tau0' must be a number > 0",
        ),
    ],
)
def test_bad_settings_exit_2_and_write_nothing(
    lorenz_csv, tmp_path, capsys, config_text, extra, message
):
    config = tmp_path / "fit.toml"
    config.write_text(config_text)
    out = tmp_path / "model.json"
    assert main(["fit", str(lorenz_csv), "--config", str(config), "--out", str(out), *extra]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not out.exists()


def test_bad_data_and_targets_exit_2(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("time,a,b\n0,1,2\n0.1,1,nan\n0.2,2,3\n")
    assert main(["fit", str(bad), "--out", str(tmp_path / "m.json")]) == 2
    assert "bad.csv" in capsys.readouterr().err
    assert main(["fit", str(bad), "--out", str(tmp_path)]) == 2
    assert "is a folder" in capsys.readouterr().err
    # with --method there is no automatic choice either, so --scheduler is refused at once
    args = ["fit", str(bad), "--method", "sparse", "--out", str(tmp_path / "m.json")]
    assert main([*args, "--scheduler", "tcp://x:1"]) == 2
    assert "only apply with --select" in capsys.readouterr().err
    assert not (tmp_path / "m.json").exists()


def test_too_few_samples_exit_2(tmp_path, capsys):
    rng = np.random.default_rng(50)
    short = tmp_path / "short.csv"
    np.savetxt(
        short,
        np.column_stack([np.arange(15) * 0.1, rng.normal(size=(15, 3))]),
        delimiter=",",
        header="time,a,b,c",
        comments="",
        fmt="%.17g",
    )
    code = main(["fit", str(short), "--out", str(tmp_path / "m.json")])
    assert code == 2
    assert "needs at least 41" in capsys.readouterr().err


@pytest.mark.slow
def test_select_writes_the_sparsest_passing_model_and_the_front(tmp_path, capsys):
    from ergodex.scenarios import convection_loop

    data = write_csv(tmp_path / "fit.csv", convection_loop(seed=70, n_runs=2, duration=60.0))
    held = write_csv(tmp_path / "held.csv", convection_loop(seed=71, n_runs=4, duration=40.0))
    config = tmp_path / "fit.toml"
    config.write_text('method = "sparse"\n[select]\nprune_below = [0.1, 5.0]\n')
    out, front = tmp_path / "model.json", tmp_path / "front.json"
    code = main(
        [
            "fit",
            str(data),
            "--config",
            str(config),
            "--select",
            "--reference",
            str(held),
            "--members",
            "8",
            "--out",
            str(out),
            "--json",
            str(front),
        ]
    )
    assert code == 0
    record = json.loads(front.read_text())
    assert record["chosen"] == 0 and [c["verdict"] for c in record["candidates"]] == [
        "pass",
        "fail",
    ]
    # Lorenz (1963): the convection loop's equations have 7 terms on 5 distinct monomials
    assert Surrogate.from_json(out).n_terms == 5
    assert "chose candidate 0" in capsys.readouterr().out
