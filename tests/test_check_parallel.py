"""A check gives the same scorecard with 1 or 2 threads, and on a Dask cluster."""

from __future__ import annotations

import pytest

from ergodex import scenarios
from ergodex.validation import CheckSpec, check


def _rows(card):
    return [(r.statistic, r.variable, r.value, r.noise_floor, r.verdict) for r in card.rows]


@pytest.fixture(scope="module")
def loop():
    # the heated convection loop against its own equations (Lorenz 1963), short records
    data = scenarios.convection_loop(seed=21, n_runs=4, duration=40.0)
    return scenarios.lorenz63_surrogate(), data


def test_one_or_two_threads_give_the_same_scorecard(loop):
    surrogate, data = loop
    spec = CheckSpec(members=6, seed=4)
    one = check(surrogate, data, spec, evidence=False, workers=1).scorecard
    two = check(surrogate, data, spec, evidence=False, workers=2).scorecard
    # every number of the scorecard, exactly: threads only change who computes what
    assert _rows(one) == _rows(two)
    assert one.verdict == two.verdict
    assert one.power == two.power
    assert one.member_agreement == two.member_agreement


def test_workers_must_be_positive(loop):
    from ergodex.exceptions import SettingsError

    surrogate, data = loop
    with pytest.raises(SettingsError, match="workers"):
        check(surrogate, data, CheckSpec(members=2), workers=0)


@pytest.mark.slow
def test_a_local_dask_cluster_gives_the_same_scorecard(loop):
    distributed = pytest.importorskip("distributed")
    surrogate, data = loop
    spec = CheckSpec(members=6, seed=4)
    here = check(surrogate, data, spec, evidence=False).scorecard
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        there = check(surrogate, data, spec, evidence=False, scheduler=client).scorecard
    # a deterministic model's members do not depend on where they run (same substep, chosen
    # once from every starting state), so every row agrees exactly
    assert there.verdict == here.verdict
    assert _rows(there) == _rows(here)
    assert there.blowups == here.blowups
    assert "Dask" in there.settings["integration"]["message"]
    assert there.settings["integration"]["substep"] == here.settings["integration"]["substep"]


def test_cli_workers_option(tmp_path, capsys):
    from ergodex.cli import main
    from ergodex.writers import write_csv

    data = scenarios.convection_loop(seed=22, n_runs=4, duration=30.0)
    write_csv(tmp_path / "loop.csv", data)
    model = tmp_path / "model.json"
    scenarios.lorenz63_surrogate().to_json(model)
    args = ["validate", str(model), str(tmp_path / "loop.csv"), "--holdout", "0", "--members", "4"]
    assert main([*args, "--workers", "0"]) == 2
    assert "--workers" in capsys.readouterr().err
    code = main([*args, "--workers", "2", "--quiet"])
    assert code in (0, 3)  # the true equations never fail; a short record may be inconclusive
    assert "verdict:" in capsys.readouterr().out


def test_fit_takes_workers_only_with_select(tmp_path, capsys):
    from ergodex.cli import main
    from ergodex.writers import write_csv

    data = scenarios.convection_loop(seed=23, n_runs=2, duration=10.0)
    write_csv(tmp_path / "loop.csv", data)
    out = tmp_path / "model.json"
    code = main(["fit", str(tmp_path / "loop.csv"), "--workers", "2", "--out", str(out)])
    assert code == 2
    assert "--workers" in capsys.readouterr().err
    assert not out.exists()  # refused before any work
