"""Evidence on demand: the arrays behind figures are built only when something will hold them."""

from __future__ import annotations

import json

import numpy as np
import pytest

from ergodex import scenarios, validation
from ergodex.cli import main
from ergodex.exceptions import SettingsError
from ergodex.plotting import plot_histograms
from ergodex.validation import CheckSpec, checking
from ergodex.writers import write_csv


def _ou_case(seed: int):
    # the two-variable Ornstein-Uhlenbeck scenario and its own generating model; 800 time units
    # so that the record can detect a 1.5x change of time scale (a shorter one is inconclusive)
    return scenarios.ou_surrogate(), scenarios.ornstein_uhlenbeck(seed=seed, duration=800.0)


def test_without_evidence_the_scorecard_is_the_same():
    model, data = _ou_case(61)
    spec = CheckSpec(seed=5, members=6)
    full = validation.check(model, data, spec)
    bare = validation.check(model, data, spec, evidence=False)
    assert full.evidence is not None and bare.evidence is None
    assert bare.scorecard.verdict == full.scorecard.verdict
    assert [(r.statistic, r.variable) for r in bare.scorecard.rows] == [
        (r.statistic, r.variable) for r in full.scorecard.rows
    ]
    np.testing.assert_array_equal(
        [r.ratio for r in bare.scorecard.rows], [r.ratio for r in full.scorecard.rows]
    )
    with pytest.raises(SettingsError, match="evidence=True"):
        plot_histograms(bare)


@pytest.fixture()
def evidence_calls(monkeypatch):
    """Count the evidence builds of checks run in this process."""
    calls = []
    build = checking._evidence  # the coordinator's own reference to the builder

    def counted(*args, **kwargs):
        calls.append(1)
        return build(*args, **kwargs)

    monkeypatch.setattr(checking, "_evidence", counted)
    return calls


def test_validate_builds_evidence_only_for_a_file_or_report(tmp_path, evidence_calls, capsys):
    model, data = _ou_case(62)
    write_csv(tmp_path / "data.csv", data)
    model.to_json(tmp_path / "model.json")
    base = [
        "validate",
        str(tmp_path / "model.json"),
        str(tmp_path / "data.csv"),
        "--members",
        "6",
        "--seed",
        "2",
    ]
    assert main(base) == 0
    assert evidence_calls == []  # nobody asked for figures: none built
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data.csv", "model.json"]
    # --json keeps its contract: the evidence goes beside the scorecard
    card = tmp_path / "card.json"
    assert main([*base, "--json", str(card)]) == 0
    assert evidence_calls == [1]
    assert (tmp_path / "card.evidence.npz").is_file()
    assert json.loads(card.read_text())["verdict"] == "pass"
    capsys.readouterr()
