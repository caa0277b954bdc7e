"""``ergodex retrain``: exit codes 0 / 1 / 2, the summary, and the documented ``--json`` record."""

from __future__ import annotations

import json

import pytest

from ergodex.cli import main
from ergodex.registry import Registry
from retrain_support import LOOP, WELL, copy_home, loop_data, well_data, write_csv

#: The keys of the decision record (ergodex.retraining.Decision.to_dict), stable for scripts.
RECORD_KEYS = {
    "format",
    "name",
    "outcome",
    "exit_code",
    "standing",
    "incumbent",
    "refit",
    "reasons",
    "score_definition",
    "seed",
    "holdout",
    "data",
    "spec",
    "caution",
    "times",
}
SIDE_KEYS = {
    "role",
    "ref",
    "version",
    "status",
    "verdict",
    "score",
    "blowups",
    "reasons",
    "model_fingerprint",
    "fit",
    "rows",
}


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    """``ergodex retrain`` on a fresh registry with rho = 28 loop data: the first run."""
    base = tmp_path_factory.mktemp("cli")
    csv = write_csv(base / "loop-28.csv", loop_data(2))
    home = base / "home"
    code = main(
        ["retrain", LOOP, str(csv), "--home", str(home), "--json", str(base / "first.json")]
    )
    return home, code, json.loads((base / "first.json").read_text())


@pytest.mark.slow
def test_first_run_accepts_and_stores_the_report(first_run):
    home, code, record = first_run
    assert code == 0
    assert record["outcome"] == "first-accepted" and record["exit_code"] == 0
    assert set(record) == RECORD_KEYS
    assert record["incumbent"] is None and set(record["refit"]) == SIDE_KEYS
    info = Registry(home).get(LOOP)
    assert info.version == 1 and "report.html" in info.artifacts


@pytest.mark.slow
def test_new_data_from_the_same_loop_exit_0_with_the_incumbent_kept(first_run, tmp_path, capsys):
    home, _, _ = first_run
    home = copy_home(home, tmp_path / "home")
    csv = write_csv(tmp_path / "loop-28-new.csv", loop_data(102))
    capsys.readouterr()
    code = main(
        [
            "retrain",
            LOOP,
            str(csv),
            "--home",
            str(home),
            "--json",
            "-",
            "--no-report",
            "--seed",
            "4",
        ]
    )
    captured = capsys.readouterr()
    assert code == 0
    record = json.loads(captured.out)  # with '-' the record alone goes to standard output
    assert record["outcome"] == "kept" and record["standing"] == f"{LOOP}/1"
    assert record["seed"] == 4 and record["spec"]["seed"] == 4
    assert set(record["incumbent"]) == SIDE_KEYS
    assert record["incumbent"]["verdict"] == "pass"
    assert f"retrain {LOOP}: kept" in captured.err  # the summary moves to stderr


@pytest.mark.slow
def test_bad_input_exits_2_and_writes_nothing(first_run, tmp_path, capsys):
    home, _, _ = first_run
    home = copy_home(home, tmp_path / "home")
    before = len(Registry(home).history(LOOP))
    out = tmp_path / "decision.json"
    bad = tmp_path / "bad.csv"
    bad.write_text("time,flow,dT_across,dT_up\n0,1,2,3\n0.02,1,2,oops\n")
    for argv in (
        ["retrain", LOOP, str(tmp_path / "missing.csv")],
        ["retrain", LOOP, str(bad)],
        ["retrain", LOOP, str(bad), "--config", str(tmp_path / "missing.toml")],
    ):
        capsys.readouterr()
        code = main(argv + ["--home", str(home), "--json", str(out)])
        err = capsys.readouterr().err
        assert code == 2
        assert err.startswith("ergodex: error: ") and err.count("\n") == 1
    assert not out.exists()
    assert len(Registry(home).history(LOOP)) == before
    assert [v.version for v in Registry(home).versions(LOOP)] == [1]


@pytest.mark.slow
def test_data_the_configured_method_cannot_represent_exit_1(tmp_path, capsys):
    # First run with a deterministic degree-2 sparse ODE on the noise-driven double well: without
    # noise it cannot hop between the wells, so its check fails and no model may be accepted.
    csv = write_csv(tmp_path / "well.csv", well_data(3, noise=0.7))
    config = tmp_path / "fit.toml"
    config.write_text('method = "sparse"\n\n[settings]\ndegree = 2\n')
    home = tmp_path / "home"
    code = main(
        [
            "retrain",
            WELL,
            str(csv),
            "--config",
            str(config),
            "--home",
            str(home),
            "--no-report",
            "--members",
            "8",
        ]
    )
    out = capsys.readouterr().out
    assert code == 1
    assert f"retrain {WELL}: no-acceptable-model (exit code 1)" in out
    info = Registry(home).get(f"{WELL}/1")
    assert info.status == "rejected"
    assert json.loads(Registry(home).artifact(f"{WELL}/1", "fit-settings.json")) == {
        "format": "ergodex-fit/2",
        "method": "sparse",
        "settings": {"degree": 2},
    }
