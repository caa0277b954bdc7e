"""The registry says what it decided: one line on ``ergodex.registry`` per status change."""

from __future__ import annotations

import logging

import pytest

from ergodex.exceptions import RegistryError
from ergodex.registry import INDEX_FILE, Registry
from ergodex.scenarios import lorenz63_surrogate


def _card(surrogate, verdict: str = "pass") -> dict:
    return {
        "verdict": verdict,
        "rows": [
            {
                "statistic": "wasserstein1",
                "variable": "flow",
                "value": 0.1,
                "noise_floor": 0.2,
                "ratio": 0.5,
                "tolerance": 2.0,
                "verdict": verdict,
            }
        ],
        "data_fingerprint": "sha256:" + "ab" * 32,
        "model_fingerprint": surrogate.fingerprint(),
    }


def _lines(caplog) -> list[str]:
    lines = [r.getMessage() for r in caplog.records if r.name == "ergodex.registry"]
    caplog.clear()
    return lines


def test_register_accept_reject_retire_each_log_one_line(tmp_path, caplog):
    truth = lorenz63_surrogate()
    reg = Registry(tmp_path / "home")
    with caplog.at_level(logging.INFO, logger="ergodex.registry"):
        reg.register("loop", truth, scorecard=_card(truth))
        assert _lines(caplog) == ["loop/1: new -> candidate (registered; scorecard verdict pass)"]
        reg.accept("loop/1", reason="first")
        assert _lines(caplog) == ["loop/1: candidate -> accepted (first)"]
        reg.register("loop", truth, scorecard=_card(truth))
        _lines(caplog)
        # accepting 2 retires 1 in the same transaction: two lines, the retirement explained
        reg.accept("loop/2")
        assert _lines(caplog) == [
            "loop/2: candidate -> accepted (no reason given)",
            "loop/1: accepted -> retired (replaced by version 2)",
        ]
        reg.retire("loop/2", reason="drifted")
        assert _lines(caplog) == ["loop/2: accepted -> retired (drifted)"]
        reg.register("loop", truth, scorecard=_card(truth, verdict="fail"))
        assert _lines(caplog) == ["loop/3: new -> candidate (registered; scorecard verdict fail)"]
        reg.accept("loop/3", reason="reviewed by hand", override=True)
        assert _lines(caplog) == ["loop/3: candidate -> accepted (override: reviewed by hand)"]
        reg.register("loop", truth, scorecard=_card(truth))
        _lines(caplog)
        reg.reject("loop/4", reason="too many terms")
        assert _lines(caplog) == ["loop/4: candidate -> rejected (too many terms)"]


def test_a_refused_change_logs_nothing_and_recovery_logs_each_version(tmp_path, caplog):
    truth = lorenz63_surrogate()
    home = tmp_path / "home"
    reg = Registry(home)
    reg.register("loop", truth, scorecard=_card(truth, verdict="fail"))
    with caplog.at_level(logging.INFO, logger="ergodex.registry"):
        with pytest.raises(RegistryError, match="cannot be accepted"):
            reg.accept("loop/1")  # a failed scorecard, no override
        assert _lines(caplog) == []
    reg.close()
    (home / INDEX_FILE).unlink()
    with caplog.at_level(logging.INFO, logger="ergodex.registry"):
        Registry(home).versions("loop")
    assert (
        "loop/1: candidate -> candidate (recovered: indexed again from the version "
        "folder's own records)"
    ) in _lines(caplog)
