"""Scripted retraining: drift check of the incumbent, refit, side-by-side decision, lineage.

The scenarios are the project's own: a heated convection loop (Lorenz-63) whose heating changes
(rho 28 -> 35), and a noise-driven double well that a deterministic quadratic ODE cannot represent.
Every model is really fitted (pysindy), really checked (ensemble integration against the held-out
runs) and really registered (SQLite + version folders).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.registry import Registry
from ergodex.retraining import (
    DECISION_FORMAT,
    OUTCOMES,
    Decision,
    ModelVerdict,
    find_incumbent,
    read_decision,
    resolve_spec,
    retrain,
    shared_score,
    split_for_retrain,
)
from ergodex.series import Series
from ergodex.validation import CheckSpec, ScoreRow, check
from retrain_support import LOOP, WELL, copy_home, loop_data, well_data

# 16 members (the check's default) of one reference piece each; the reference is the 3 held-out
# runs of 40 time units. Measured while writing these tests: the sparse fit of rho = 28 data
# passed on 5 of 6 data seeds, the rho = 28 incumbent passed on new rho = 28 data in 5 of 5, and
# failed on rho = 35 data in 6 of 6 with ratios 5.5-14 (tolerance 2). bins (used for figures and
# evidence only) differs from the default so that a test can see the incumbent's spec reused.
SPEC = CheckSpec(members=16, bins=30)


def _coefficient(surrogate, equation: str, term_powers: tuple[int, ...]) -> float:
    """Coefficient of one monomial in one equation of a fitted surrogate (0 if absent)."""
    row = surrogate.variables.index(equation)
    for k, term in enumerate(surrogate.terms):
        if term.kind == "monomial" and tuple(term.powers) == term_powers:
            return float(surrogate.coefficients[row, k])
    return 0.0


@pytest.fixture(scope="module")
def loop_home(tmp_path_factory):
    """A registry whose convection-loop incumbent was fitted on rho = 28 data by a first retrain."""
    home = tmp_path_factory.mktemp("loop") / "home"
    registry = Registry(home)
    try:
        decision = retrain(registry, LOOP, loop_data(2), spec=SPEC, seed=0, report=False)
    finally:
        # closed before kept_pair copies the folder: a connection closed by the garbage collector
        # in the middle of the copy removes the SQLite -wal/-shm files the copy has listed
        registry.close()
    return home, decision


@pytest.fixture(scope="module")
def kept_pair(loop_home, tmp_path_factory):
    """The same retrain (new rho = 28 data, seed 0) on two copies of the incumbent home."""
    home, _ = loop_home
    new = loop_data(102)
    out = []
    for tag in ("a", "b"):
        copy = copy_home(home, tmp_path_factory.mktemp(f"kept-{tag}") / "home")
        registry = Registry(copy)
        # No spec: the check recorded with the incumbent is repeated.
        out.append((registry, retrain(registry, LOOP, new, seed=0, report=False)))
    return out


@pytest.mark.slow
def test_first_run_fits_checks_registers_and_accepts(loop_home):
    home, decision = loop_home
    registry = Registry(home)
    assert decision.outcome == "first-accepted" and decision.exit_code == 0
    assert decision.incumbent is None
    assert decision.refit.ref == f"{LOOP}/1" and decision.refit.passed
    info = registry.get(LOOP)  # newest accepted
    assert info.version == 1 and info.status == "accepted" and info.parent is None
    # The recorded fit settings are what the next retrain refits with.
    recorded = json.loads(registry.artifact(f"{LOOP}/1", "fit-settings.json"))
    assert recorded == {"format": "ergodex-fit/2", "method": "sparse", "settings": {}}
    # SINDy recovers the Lorenz-63 coefficients from clean-enough data (Brunton, Proctor & Kutz,
    # PNAS 2016): d dT_across/dt = rho flow - dT_across - flow dT_up with rho = 28. 2 % covers
    # the 0.05 sensor noise and the smoothed differences at dt = 0.02.
    rho = _coefficient(registry.load(LOOP), "dT_across", (1, 0, 0))
    assert rho == pytest.approx(28.0, rel=0.02)


@pytest.mark.slow
def test_new_data_from_the_same_loop_keep_the_incumbent(kept_pair):
    registry, decision = kept_pair[0]
    assert decision.outcome == "kept" and decision.exit_code == 0
    assert decision.incumbent.ref == f"{LOOP}/1" and decision.incumbent.passed
    assert decision.standing == f"{LOOP}/1"
    # The refit is registered all the same, with lineage, and not promoted.
    refit = registry.get(decision.refit.ref)
    assert refit.version == 2 and refit.parent == f"{LOOP}/1"
    assert refit.status in ("candidate", "rejected")
    assert refit.status == decision.refit.status
    assert registry.get(LOOP).version == 1  # downstream still loads the incumbent
    events = [e.event for e in registry.history(f"{LOOP}/1")]
    assert events[-1] == "drift-check-passed"


@pytest.mark.slow
def test_the_same_inputs_and_seed_give_the_same_decision_record(kept_pair):
    (_, first), (_, second) = kept_pair
    assert first.record() == second.record()
    # The wall-clock times are the only part kept apart, and the JSON is the dict.
    full = first.to_dict()
    assert set(full) - set(first.record()) == {"times"}
    assert json.loads(first.to_json()) == full
    assert full["format"] == "ergodex-decision/2"
    assert full["spec"] == {**SPEC.to_dict(), "seed": 0}  # the incumbent's recorded check
    assert full["data"]["fingerprint"] == loop_data(102).fingerprint()


@pytest.mark.slow
def test_changed_heating_replaces_the_drifted_incumbent_with_lineage(loop_home, tmp_path):
    home, _ = loop_home
    registry = Registry(copy_home(home, tmp_path / "home"))
    new = loop_data(202, rho=35.0)
    decision = retrain(registry, LOOP, new, spec=SPEC, seed=0, report=False)

    assert decision.outcome == "replaced" and decision.exit_code == 0
    assert not decision.incumbent.passed and decision.refit.passed
    assert decision.refit.score <= decision.incumbent.score
    assert decision.standing == decision.refit.ref == f"{LOOP}/2"
    info = registry.get(LOOP)
    assert info.version == 2 and info.status == "accepted"
    assert info.parent == f"{LOOP}/1"
    roles = {d["role"]: d["fingerprint"] for d in info.datasets}
    assert roles["fit"] == decision.data["fit_fingerprint"]
    assert roles["check"] == decision.data["reference_fingerprint"]
    drift = [e for e in registry.history(f"{LOOP}/1") if e.event == "drift-detected"]
    assert len(drift) == 1 and new.fingerprint() in drift[0].reason
    # One accepted version per name: the old incumbent is retired by the promotion, with its
    # own event; nothing deleted, it still loads by version.
    assert registry.get(f"{LOOP}/1").status == "retired"
    retired = [e for e in registry.history(f"{LOOP}/1") if e.event == "retired"]
    assert [e.reason for e in retired] == ["replaced by version 2"]
    registry.load(f"{LOOP}/1")
    # The refit learned the new heating (Lorenz 1963 form; SINDy recovery as above).
    rho = _coefficient(registry.load(LOOP), "dT_across", (1, 0, 0))
    assert rho == pytest.approx(35.0, rel=0.02)


@pytest.mark.slow
def test_data_the_method_cannot_represent_leave_no_acceptable_model(tmp_path):
    from ergodex.scenarios import double_well_surrogate

    registry = Registry(tmp_path / "home")
    # Incumbent: the true double-well Langevin equation (s = 0.7), accepted on its own held-out
    # runs. With this data size the truth passed on 4 of 6 data seeds (the member-agreement row is
    # strict for a process that hops between wells every few tens of time units); seed 3 is one
    # where it passes, and the test is about the retrain decision, not the check's calibration.
    old = well_data(3, noise=0.7)
    _, reference = split_for_retrain(old, 0.5)
    truth = double_well_surrogate(0.7)
    result = check(truth, reference, SPEC)
    # The truth must not fail. On these 800 time units the check detects a change of the hopping
    # time scale only from about ×1.75 and says so (inconclusive, not a pass): the incumbent is
    # then accepted by override, as a person would after reading why.
    assert result.scorecard.verdict in ("pass", "inconclusive"), result.scorecard.reasons
    registry.register(
        WELL, truth, scorecard=result.scorecard, datasets={"check": reference.fingerprint()}
    )
    registry.accept(
        f"{WELL}/1",
        reason="true equations did not fail on held-out runs",
        override=not result.scorecard.passed,
    )

    # New data: stronger noise (s = 1.2 widens the stationary density p ~ exp(-2V/s^2), Risken
    # 1989), and a deterministic degree-2 sparse ODE configured for the refit: without noise
    # it settles on a fixed point or cycle and cannot reproduce the hopping.
    new = well_data(13, noise=1.2)
    decision = retrain(
        registry, WELL, new, config=("sparse", {"degree": 2}), spec=SPEC, seed=0, report=False
    )

    assert decision.outcome == "no-acceptable-model" and decision.exit_code == 1
    assert not decision.incumbent.passed and not decision.refit.passed
    assert any("warned" in r for r in decision.reasons)
    history = registry.history(f"{WELL}/1")
    assert [e.event for e in history if e.event == "drift-detected"] == ["drift-detected"]
    refit = registry.get(f"{WELL}/2")
    assert refit.status == "rejected" and refit.parent == f"{WELL}/1"
    # Nothing deleted: both versions and their folders remain; the incumbent still loads.
    assert [v.version for v in registry.versions(WELL)] == [1, 2]
    assert all(v.folder.is_dir() for v in registry.versions(WELL))
    assert registry.load(WELL).fingerprint() == truth.fingerprint()


@pytest.mark.slow
def test_bad_input_raises_before_anything_is_written(loop_home, tmp_path):
    home, _ = loop_home
    registry = Registry(copy_home(home, tmp_path / "home"))
    before = (len(registry.versions(LOOP)), len(registry.history(LOOP)))
    rng = np.random.default_rng(5)
    other = Series.from_arrays(rng.normal(size=(3, 400, 2)), ["a", "b"], 0.1, source="other.csv")
    with pytest.raises(DataError, match="variables"):
        retrain(registry, LOOP, other, spec=SPEC, report=False)
    with pytest.raises(DataError, match="unknown file type"):
        retrain(registry, LOOP, tmp_path / "data.xlsx", spec=SPEC, report=False)
    with pytest.raises(SettingsError, match="has no setting"):
        retrain(
            registry,
            LOOP,
            loop_data(3, n_runs=2, duration=10.0),
            config=("sparse", {"no_such_setting": 1}),
            spec=SPEC,
            report=False,
        )
    with pytest.raises(SettingsError, match="seed"):
        retrain(registry, LOOP, other, seed=-1, report=False)
    assert (len(registry.versions(LOOP)), len(registry.history(LOOP))) == before


@pytest.mark.slow
def test_check_spec_defaults_to_the_incumbents_and_takes_overrides(loop_home):
    home, _ = loop_home
    registry = Registry(home)
    incumbent = find_incumbent(registry, LOOP)
    assert incumbent.ref == f"{LOOP}/1"
    assert resolve_spec(None, registry, incumbent, 3) == CheckSpec(members=16, bins=30, seed=3)
    assert resolve_spec({"members": 5}, registry, incumbent, 0) == CheckSpec(members=5, bins=30)
    given = CheckSpec(members=4)
    assert resolve_spec(given, registry, incumbent, 7) == CheckSpec(members=4, seed=7)
    assert resolve_spec(None, registry, None, 0) == CheckSpec()  # first run: the defaults
    with pytest.raises(SettingsError, match="members"):
        resolve_spec({"members": 1}, registry, incumbent, 0)
    with pytest.raises(SettingsError, match="unknown check setting"):
        resolve_spec({"colour": "red"}, registry, incumbent, 0)
    assert find_incumbent(registry, "never-registered") is None


def test_split_holds_out_whole_runs_or_the_end_of_a_single_run():
    rng = np.random.default_rng(0)
    six = Series.from_arrays(
        rng.normal(size=(6, 50, 2)), ["u", "v"], 0.1, run_labels=[f"r{i}" for i in range(6)]
    )
    fit, ref = split_for_retrain(six, 0.5)
    assert fit.run_labels == ("r0", "r1", "r2") and ref.run_labels == ("r3", "r4", "r5")
    fit, ref = split_for_retrain(six, 0.1)  # at least one run held out
    assert (fit.n_runs, ref.n_runs) == (5, 1)
    fit, ref = split_for_retrain(six, ["r0"])
    assert ref.run_labels == ("r0",) and fit.n_runs == 5
    one = six.select_runs([0])
    fit, ref = split_for_retrain(one, 0.3)  # ten blocks of 5 samples, the last 3 held out
    assert (fit.n_runs, ref.n_runs) == (7, 3)
    np.testing.assert_array_equal(ref.runs[-1], one.runs[0][45:50])
    with pytest.raises(SettingsError, match="between 0 and 1"):
        split_for_retrain(six, 1.5)
    with pytest.raises(DataError, match="single run"):
        split_for_retrain(one, 1)


def test_shared_score_is_the_largest_row_ratio_and_infinite_after_a_blowup():
    spec = CheckSpec(members=4)

    def card(ratios, blown=0):
        from ergodex.validation import Scorecard

        rows = [
            ScoreRow("histogram", f"v{i}", r, 1.0, r, 2.0, "pass" if r <= 2 else "fail")
            for i, r in enumerate(ratios)
        ]
        return Scorecard(
            verdict="pass",
            rows=rows,
            reasons=[],
            blowups={"count": blown},
            member_agreement={},
            spec=spec,
            model_fingerprint="m",
            data_fingerprint="d",
            created="",
            ergodex_version="",
        )

    assert shared_score(card([0.5, 1.7, 1.2])) == 1.7
    assert math.isinf(shared_score(card([0.5, 1.0], blown=1)))
    assert math.isinf(shared_score(card([0.5, float("nan")])))
    assert math.isinf(shared_score(card([])))


def test_exit_codes_follow_the_outcome():
    assert OUTCOMES == {"first-accepted": 0, "kept": 0, "replaced": 0, "no-acceptable-model": 1}
    d = Decision(
        name="m",
        outcome="kept",
        standing="m/1",
        incumbent=None,
        refit=None,
        reasons=["x"],
        seed=0,
        holdout=0.5,
        data={},
        spec={},
    )
    assert d.exit_code == 0
    d.outcome = "no-acceptable-model"
    assert d.exit_code == 1
    assert "no-acceptable-model" in d.summary() and "not a certification" in d.summary()


def _two_sided_decision() -> Decision:
    return Decision(
        name="loop",
        outcome="replaced",
        standing="loop/2",
        incumbent=ModelVerdict("incumbent", "loop/1", 1, "fail", 3.5, ["acf of flow"]),
        refit=ModelVerdict("refit", "loop/2", 2, "pass", 1.2, [], status="accepted"),
        reasons=["drifted", "refit passed"],
        seed=4,
        holdout=0.5,
        data={"source": "new.csv"},
        spec={},
    )


def test_a_version_1_decision_record_is_read_with_todays_side_names(tmp_path):
    today = _two_sided_decision().to_dict()
    assert today["format"] == DECISION_FORMAT == "ergodex-decision/2"
    # A record as version 1 wrote it: the same content under the sides' former names.
    old = {k: v for k, v in today.items() if k not in ("incumbent", "refit")}
    old["format"] = "ergodex-decision/1"
    old["champion"] = {**today["incumbent"], "role": "champion"}
    old["challenger"] = {**today["refit"], "role": "challenger"}
    path = tmp_path / "old.decision.json"
    path.write_text(json.dumps(old), encoding="utf-8")
    assert read_decision(path) == today
    current = tmp_path / "new.decision.json"
    current.write_text(_two_sided_decision().to_json(), encoding="utf-8")
    assert read_decision(current) == today


def test_a_version_2_decision_record_with_a_former_key_is_refused(tmp_path):
    record = _two_sided_decision().to_dict()
    record["champion"] = record.pop("incumbent")
    path = tmp_path / "mixed.decision.json"
    path.write_text(json.dumps(record), encoding="utf-8")
    with pytest.raises(ModelFileError, match=r"mixed\.decision\.json.*'incumbent', not 'champion'"):
        read_decision(path)
    record = _two_sided_decision().to_dict()
    record["format"] = "ergodex-decision/9"
    path.write_text(json.dumps(record), encoding="utf-8")
    with pytest.raises(ModelFileError, match="ergodex-decision/9"):
        read_decision(path)


@pytest.mark.slow
def test_an_incumbent_too_stiff_to_integrate_is_a_failed_drift_check_not_a_crash(tmp_path):
    # A linear decay rate of 1e9 needs an RK4 substep below 2.8e-9 (RK4's real stability bound
    # is |h lambda| <= 2.785; Hairer & Wanner, Solving ODEs II, sec. IV.2), under the substep
    # floor of dt / 1e6 = 2e-8 at dt = 0.02: the check cannot run it (ModelLimitError).
    from ergodex.surrogate import Surrogate, polynomial_terms

    data = loop_data(7)
    terms = polynomial_terms(3, 1)
    coefficients = np.zeros((3, len(terms)))
    for i in range(3):
        powers = tuple(1 if j == i else 0 for j in range(3))
        coefficients[i, terms.index(next(t for t in terms if t.powers == powers))] = -1e9
    # recorded as a sparse fit, so that retrain refits with the method the incumbent names
    stiff = Surrogate(
        data.names, terms, coefficients, settings={"method": "sparse", "prune_below": 0.1}
    )
    registry = Registry(tmp_path / "home")
    info = registry.register(LOOP, stiff)
    registry.accept(info.ref, reason="test: an incumbent that cannot be integrated", override=True)

    decision = retrain(registry, LOOP, data, spec=SPEC, seed=0, report=False)

    assert decision.incumbent.verdict == "fail"
    assert math.isinf(decision.incumbent.score)
    assert "could not be integrated" in decision.incumbent.reasons[0]
    assert "too stiff" in decision.incumbent.reasons[0]
    # the drift check's failure is recorded in the incumbent's history, never hidden
    events = [e.event for e in registry.history(LOOP)]
    assert "drift-detected" in events
    assert decision.outcome in ("replaced", "no-acceptable-model")


def test_a_refit_too_stiff_to_integrate_is_a_failed_refit_not_a_crash(tmp_path, monkeypatch):
    # The fit -> check path is made to raise as a too-stiff model does (the integrator's floor
    # is tested in test_integrate/test_limits); what is checked here is the decision around it.
    import ergodex.pipeline
    from ergodex.exceptions import ModelLimitError

    def too_stiff(*args, **kwargs):
        raise ModelLimitError("too stiff: needs substep 1e-12 < floor 2e-08")

    monkeypatch.setattr(ergodex.pipeline, "fit_check_register", too_stiff)
    registry = Registry(tmp_path / "home")
    decision = retrain(
        registry, LOOP, loop_data(3, n_runs=4, duration=20.0), spec=SPEC, seed=0, report=False
    )
    assert decision.outcome == "no-acceptable-model"
    assert decision.refit.ref is None and decision.refit.verdict == "fail"
    assert "could not be integrated" in " ".join(decision.reasons)
    assert registry.list_models() == []  # nothing registered for a model that never ran
