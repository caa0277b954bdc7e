"""What a record can detect: the inconclusive verdict, the power statement, reference consistency,
and ``fit`` refusing a degenerate model."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from ergodex import power, scenarios, validation
from ergodex.cli import main
from ergodex.exceptions import RegistryError
from ergodex.registry import Registry
from ergodex.series import Series
from ergodex.validation import CheckSpec, Scorecard, ScoreRow
from ergodex.validation.verdict import _decide
from ergodex.writers import write_csv

# A one-variable Ornstein–Uhlenbeck process dx = −x/τ dt + sqrt(2σ²/τ) dW with τ = 1, σ² = 1:
# its autocorrelation is exactly exp(−t/τ) (Gardiner, Handbook of Stochastic Methods, §4.5).
TAU = 1.0
DRIFT = -np.eye(1) / TAU
NOISE = 2.0 * np.eye(1) / TAU
DT = 0.05


def _ou(seed: int, duration: float, n_runs: int = 4) -> Series:
    return scenarios.ornstein_uhlenbeck(
        seed=seed, drift=DRIFT, noise=NOISE, n_runs=n_runs, duration=duration, dt=DT
    )


def _log_variance_sd(group_time: float) -> float:
    """Standard deviation of the difference of two log-variance estimates, each from a record of
    ``group_time``: Bretherton et al. (1999, J. Climate 12, §5) give N* = N (1 − r²)/(1 + r²)
    effective samples for the variance of AR(1) with lag-one correlation r = exp(−dt/τ); for
    N = T/dt and fine sampling N* → T/τ. var(ln s²) = 2/N* for Gaussian data."""
    r = math.exp(-DT / TAU)
    n_star = group_time / DT * (1 - r * r) / (1 + r * r)
    return math.sqrt(2 * 2.0 / n_star)


def test_short_ou_record_is_inconclusive_and_says_how_much_more_it_needs():
    data = _ou(1, duration=10.0)  # 4 runs × 10 τ: groups of half the record, 20 τ each
    # the analytic resolution: ±50 % of variance is within one standard deviation of the noise
    assert math.log(1.5) < _log_variance_sd(20.0)
    true = scenarios.ou_surrogate(drift=DRIFT, noise=NOISE)
    slow = scenarios.ou_surrogate(drift=DRIFT / 2, noise=NOISE / 2)  # τ × 2, same variance
    sc = validation.validate(true, data, CheckSpec(seed=3))
    assert sc.verdict == "inconclusive" and not sc.passed
    assert sc.reasons[0].startswith("inconclusive: the record")
    assert "more time units" in sc.reasons[0]
    assert sc.power["sufficient"] is False
    assert "INCONCLUSIVE" in sc.table() and "smallest change it detects" in sc.table()
    assert not validation.validate(slow, data, CheckSpec(seed=3)).passed


def test_long_ou_record_passes_the_truth_fails_a_doubled_time_scale_and_states_its_power():
    data = _ou(2, duration=500.0)  # 4 runs × 500 τ: groups of 1000 τ
    sd = _log_variance_sd(1000.0)
    assert math.log(1.5) > 5 * sd  # analytic: ±50 % of variance is far outside the noise
    true = scenarios.ou_surrogate(drift=DRIFT, noise=NOISE)
    slow = scenarios.ou_surrogate(drift=DRIFT / 2, noise=NOISE / 2)
    sc = validation.validate(true, data, CheckSpec(seed=3))
    assert sc.verdict == "pass", sc.table()
    detect = sc.power["detectable"]
    assert detect["time_scale"] <= 1.5 and detect["variance_up"] <= 1.5
    assert detect["variance_down"] >= 0.5
    # no check can resolve a variance change the sampling noise hides: the smallest change it
    # claims to detect lies beyond two standard deviations of the log-variance difference
    assert math.log(detect["variance_up"]) >= 1.96 * sd
    assert sc.power["reference_consistency"]["verdict"] == "pass"
    # record length in decorrelation times: 2000 τ within the estimator's error (Sokal 1997)
    assert sc.power["record_decorrelation_times"] == pytest.approx(2000.0, rel=0.25)
    wrong = validation.validate(slow, data, CheckSpec(seed=3))
    assert wrong.verdict == "fail"
    assert {r.statistic for r in wrong.rows if r.verdict == "fail"} & {
        "autocorrelation",
        "spectrum",
    }


def test_rescaled_copies_are_exact():
    t = np.arange(400) * DT
    piece = np.sin(2 * np.pi * 0.3 * t)[None, :, None]
    # slowing by 1.5: sin(ω t / 1.5), up to linear interpolation error (≤ (ω dt)²/8 ≈ 1e-3)
    slowed = power.stretch_pieces(piece, 1.5)
    assert np.max(np.abs(slowed[0, :, 0] - np.sin(2 * np.pi * 0.3 * t / 1.5))) < 2e-3
    x = np.random.default_rng(0).normal(2.0, 1.0, size=(3, 500, 2))
    mean = x.reshape(-1, 2).mean(axis=0)
    scaled = power.scale_pieces(x, 1.5, mean)
    assert np.var(scaled.reshape(-1, 2), axis=0) == pytest.approx(
        1.5 * np.var(x.reshape(-1, 2), axis=0), rel=1e-12
    )


def test_reference_runs_on_two_attractors_are_inconclusive():
    # each run stays near +4 or −4 (two separate OU wells): runs differ far beyond their noise
    base = _ou(3, duration=100.0)
    runs = [r + (4.0 if k % 2 else -4.0) for k, r in enumerate(base.runs)]
    data = Series.from_arrays(runs, base.names, base.dt)
    # one piece per run (min_pieces 4): the pooled autocorrelation of such runs hardly decays,
    # so blocks separated by 5 decorrelation times would not fit in them
    sc = validation.validate(
        scenarios.ou_surrogate(drift=DRIFT, noise=NOISE), data, CheckSpec(seed=3, min_pieces=4)
    )
    assert sc.verdict == "inconclusive"
    assert sc.reasons[0].startswith("inconclusive: the reference runs differ from each other")
    assert sc.power["reference_consistency"]["verdict"] == "fail"


def _row(ratio, verdict):
    return ScoreRow("histogram", "x", ratio, 1.0, ratio, 2.75, verdict)


def test_decide_orders_fail_inconclusive_and_pass():
    common = {
        "blowup_fail": False,
        "blowup_reasons": [],
        "any_alive": True,
        "agreement_verdict": "pass",
        "agreement_reasons": [],
    }
    weak = ["inconclusive: short"]
    assert _decide([_row(1.0, "pass")], **common, weak_reasons=weak) == ("inconclusive", weak)
    # a failure a short record detects is still a failure
    assert _decide([_row(9.0, "fail")], **common, weak_reasons=weak)[0] == "fail"
    # runs that disagree: neither a pass nor a row failure is trusted
    ref = ["inconclusive: runs differ"]
    verdict, reasons = _decide([_row(9.0, "fail")], **common, reference_reasons=ref)
    assert verdict == "inconclusive" and reasons[0] == ref[0]
    # blow-ups still fail
    common["blowup_fail"] = True
    assert _decide([_row(1.0, "pass")], **common, reference_reasons=ref)[0] == "fail"


@pytest.fixture(scope="module")
def short_files(tmp_path_factory):
    d = tmp_path_factory.mktemp("short")
    write_csv(d / "data.csv", _ou(4, duration=10.0))
    scenarios.ou_surrogate(drift=DRIFT, noise=NOISE).to_json(d / "true.json")
    return d


def test_cli_validate_exits_3_when_inconclusive(short_files, tmp_path, capsys):
    out = tmp_path / "card.json"
    code = main(
        [
            "validate",
            str(short_files / "true.json"),
            str(short_files / "data.csv"),
            "--seed",
            "3",
            "--json",
            str(out),
        ]
    )
    assert code == 3
    card = json.loads(out.read_text())
    assert card["verdict"] == "inconclusive" and card["power"]["sufficient"] is False
    assert Scorecard.from_dict(card).verdict == "inconclusive"
    assert "verdict: INCONCLUSIVE" in capsys.readouterr().out


def test_registry_refuses_to_accept_an_inconclusive_scorecard(short_files, tmp_path):
    from ergodex.surrogate import Surrogate

    model = Surrogate.from_json(short_files / "true.json")
    card = validation.validate(model, _ou(4, duration=10.0), CheckSpec(seed=3))
    assert card.verdict == "inconclusive"
    reg = Registry(tmp_path / "home")
    info = reg.register("ou", model, scorecard=card)
    with pytest.raises(RegistryError, match="inconclusive"):
        reg.accept(info.ref)
    assert (
        reg.accept(info.ref, override=True, reason="short record, judged by hand").status
        == "accepted"
    )


def test_retrain_counts_an_inconclusive_refit_as_not_passed():
    from ergodex.retraining import ModelVerdict
    from ergodex.retraining import _decide as retrain_decide

    ch = ModelVerdict("refit", "ou/2", 2, "inconclusive", 1.0, ["inconclusive: short"])
    outcome, reasons = retrain_decide(None, ch)
    assert outcome == "no-acceptable-model"
    assert "was inconclusive" in reasons[0]


def test_fit_refuses_a_model_with_no_terms(tmp_path, capsys):
    data = write_csv(
        tmp_path / "loop.csv", scenarios.convection_loop(seed=5, n_runs=1, duration=20.0)
    )
    config = tmp_path / "fit.toml"
    config.write_text('method = "sparse"\n[settings]\nprune_below = 1e9\n')
    out = tmp_path / "model.json"
    code = main(["fit", str(data), "--config", str(config), "--out", str(out)])
    assert code == 1
    err = capsys.readouterr().err
    assert "cannot move" in err and "prune_below" in err
    assert not out.exists()


def test_fit_prints_a_failed_tau_test(tmp_path, capsys):
    # Lorenz-63 is nonlinear: the linear operator fitted at one lag does not hold at others
    # (the tau test of Penland & Sardeshmukh 1995 fails)
    data = write_csv(
        tmp_path / "loop.csv", scenarios.convection_loop(seed=5, n_runs=1, duration=40.0)
    )
    out = tmp_path / "lim.json"
    code = main(["fit", str(data), "--method", "linear-inverse", "--out", str(out)])
    text = capsys.readouterr().out
    assert code == 0 and out.exists()
    assert "warning: the tau test failed" in text


def test_a_check_without_temporal_rows_makes_no_time_scale_claim():
    # histograms cannot see a change of time scale at all: the power is neither required nor
    # stated for it, and the reason names only the variance
    data = _ou(5, duration=10.0)
    sc = validation.validate(
        scenarios.ou_surrogate(drift=DRIFT, noise=NOISE),
        data,
        CheckSpec(seed=3, statistics=("histogram",)),
    )
    assert "time_scale" not in sc.power["detectable"]
    assert "time scale not scored" in sc.table()
    assert sc.verdict == "inconclusive" and "time scale" not in sc.reasons[0]
