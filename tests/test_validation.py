"""The validator: a perfect surrogate passes, wrong ones fail, and the scorecard tells why."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import scipy.stats

from ergodex import scenarios, validation
from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.regimes import RegimeSet
from ergodex.surrogate import Surrogate
from ergodex.validation import CheckSpec, Evidence, Scorecard


@pytest.fixture(scope="module")
def loop_data():
    # the demo scenario: 4 runs × 60 time units of Lorenz-63 with sensor noise (Lorenz 1963)
    return scenarios.convection_loop(seed=7)


@pytest.fixture(scope="module")
def loop_regimes():
    return RegimeSet.from_dict(scenarios.convection_loop_regimes())


@pytest.mark.slow
def test_true_lorenz63_passes_and_wrong_parameters_fail(loop_data, loop_regimes):
    """Not a rubber stamp (issue 2): the truth passes, ρ=22 and σ doubled fail.

    ρ = 22 is below the Hopf threshold ρ_H ≈ 24.74 for σ=10, β=8/3, so C± are stable fixed
    points (Lorenz 1963; Sparrow 1982) and the statistics collapse; σ = 20 changes the
    attractor's shape and time scales. The default tolerance was calibrated in
    benchmarks/calibration.py (rates in benchmarks/README.md): the truth passed and these two
    failed in every calibration trial, so a single seeded check is a fair test.
    """
    spec = CheckSpec(regimes=loop_regimes, seed=11)
    truth = validation.check(scenarios.lorenz63_surrogate(), loop_data, spec)
    assert truth.scorecard.verdict == "pass", truth.scorecard.table()
    assert truth.scorecard.largest_ratio <= spec.tolerance
    # the default rows, and with regimes the persistence rows (CheckSpec.persistence)
    assert {r.statistic for r in truth.scorecard.rows} == {
        "histogram",
        "autocorrelation",
        "spectrum",
        "quantiles",
        "occupancy",
        "residence",
        "transitions",
    }

    for wrong in (scenarios.lorenz63_surrogate(rho=22.0), scenarios.lorenz63_surrogate(sigma=20.0)):
        sc = validation.validate(wrong, loop_data, spec)
        assert sc.verdict == "fail"
        assert sc.largest_ratio > spec.tolerance
        assert any("noise floor" in reason for reason in sc.reasons)


def _ou(seed, duration=90.0):
    return scenarios.ornstein_uhlenbeck(seed=seed, duration=duration)


def test_noise_floor_is_mean_pairwise_wasserstein_between_reference_pieces():
    data = _ou(40)  # 4 runs of 1800 samples: short enough for exact quantile functions
    spec = CheckSpec(seed=1, statistics=("histogram",), min_pieces=4, pool=1)
    sc = validation.validate(scenarios.ou_surrogate(), data, spec)
    for j, name in enumerate(data.names):
        # reference library: scipy.stats.wasserstein_distance over every pair of runs
        pairs = [
            scipy.stats.wasserstein_distance(data.runs[a][:, j], data.runs[b][:, j])
            for a in range(4)
            for b in range(a + 1, 4)
        ]
        row = next(r for r in sc.rows if r.variable == name)
        assert row.noise_floor == pytest.approx(np.mean(pairs), rel=1e-10)
        assert row.ratio == pytest.approx(row.value / row.noise_floor)


def test_ou_true_passes_and_faster_dynamics_fail():
    # Doubling drift and noise keeps the stationary covariance (A C + C Aᵀ + Q = 0, Gardiner 2009)
    # but halves the correlation times: only the temporal rows can see it.
    data = _ou(41, duration=200.0)
    true = scenarios.ou_surrogate()
    fast = scenarios.ou_surrogate(
        drift=2 * np.asarray(true.coefficients), noise=2 * np.asarray(true.noise)
    )
    spec = CheckSpec(seed=2)
    assert validation.validate(true, data, spec).passed
    sc = validation.validate(fast, data, spec)
    assert not sc.passed
    failing = {r.statistic for r in sc.rows if r.verdict == "fail"}
    assert failing & {"autocorrelation", "spectrum"}
    # stationary marginals are the same for both models, so the histogram rows stay near 1
    assert all(r.ratio < spec.tolerance for r in sc.rows if r.statistic == "histogram")


def test_all_members_blowing_up_is_a_clean_failure():
    data = _ou(42)
    # dx/dt = x² explodes in finite time from any positive start (and grows from any start)
    terms = scenarios.ou_surrogate().terms
    exploding = Surrogate(data.names, terms, np.eye(2) * 5.0)
    result = validation.check(exploding, data, CheckSpec(seed=3))
    sc = result.scorecard
    assert sc.verdict == "fail"
    assert sc.blowups["count"] == 16
    assert len(sc.blowups["times"]) == 16 and all(math.isfinite(t) for t in sc.blowups["times"])
    assert "every member blew up" in sc.reasons[0]
    assert np.all(np.isfinite(result.evidence.blowup_times))
    json.loads(sc.to_json())  # still a valid scorecard


def test_members_on_different_fixed_points_fail_with_that_reason():
    # deterministic double well dx/dt = x − x³: members fall into x = +1 or x = −1 depending on
    # their start (two stable fixed points), unlike the noisy data that hops between the wells
    data = scenarios.double_well(seed=43, duration=150.0)
    noiseless = scenarios.double_well_surrogate().with_noise(None)
    sc = validation.validate(noiseless, data, CheckSpec(seed=4))
    assert sc.verdict == "fail"
    assert sc.member_agreement["verdict"] == "fail"
    assert sc.member_agreement["collapsed_members"]
    assert any("fixed point" in reason for reason in sc.reasons)


def test_scorecard_and_evidence_round_trip(tmp_path, loop_regimes):
    data = _ou(44)
    spec = CheckSpec(seed=5, members=4, tolerances={"spectrum": 3.0}, min_pieces=4)
    result = validation.check(scenarios.ou_surrogate(), data, spec)
    sc = result.scorecard
    path = tmp_path / "scorecard.json"
    text = sc.to_json(path)
    d = json.loads(text)
    assert d["format"] == "ergodex-scorecard/2"
    for key in (
        "verdict",
        "rows",
        "reasons",
        "blowups",
        "member_agreement",
        "spec",
        "settings",
        "model_fingerprint",
        "data_fingerprint",
        "created",
        "ergodex_version",
    ):
        assert key in d
    assert d["data_fingerprint"] == data.fingerprint()
    assert d["settings"]["piece_length_samples"] == 1800
    again = Scorecard.from_json(path)
    assert again.to_dict() == sc.to_dict()
    assert again.spec.tolerance_for("spectrum") == 3.0
    assert "verdict" in sc.table() and "not a certification" in sc.table()

    ev_path = tmp_path / "evidence.npz"
    result.evidence.to_npz(ev_path)
    ev = Evidence.from_npz(ev_path)
    with np.load(ev_path, allow_pickle=False) as z:  # readable without pickle
        assert set(validation.EVIDENCE_FIELDS) <= set(z.files)
    n_bins = 35
    assert ev.hist_edges.shape == (2, n_bins + 1)
    assert ev.hist_reference.shape == (2, n_bins + 2)
    assert ev.hist_reference_pieces.shape == (4, 2, n_bins + 2)
    assert ev.acf_reference.shape == (ev.acf_lags.size, 2)
    assert ev.psd_reference_pieces.shape[0] == 4
    assert list(ev.variables) == list(data.names)
    np.testing.assert_allclose(ev.hist_reference.sum(axis=1), 1.0)

    with pytest.raises(ModelFileError, match="format"):
        Scorecard.from_json('{"format": "something-else/9"}')


def test_regime_rows_and_kmeans_regimes():
    data = _ou(45)
    rs = RegimeSet.from_dict(
        {"regime": [{"name": "c", "kind": "kmeans", "clusters": 2, "seed": 0}]}
    )
    sc = validation.validate(
        scenarios.ou_surrogate(),
        data,
        CheckSpec(seed=6, regimes=rs, statistics=("occupancy", "residence", "transitions")),
    )
    assert [r.variable for r in sc.rows] == ["c0", "c1", "c0", "c1", "all regimes"]
    assert sc.settings["regimes_used"]["regime"][0]["kind"] == "cluster"


def test_bad_settings_and_data():
    data = _ou(46)
    sur = scenarios.ou_surrogate()
    with pytest.raises(SettingsError, match="members"):
        validation.validate(sur, data, CheckSpec(members=1))
    with pytest.raises(SettingsError, match="unknown statistic 'entropy'"):
        validation.validate(sur, data, CheckSpec(statistics=("entropy",)))
    with pytest.raises(SettingsError, match="length"):
        validation.validate(sur, data, CheckSpec(length=1.0))
    with pytest.raises(DataError, match="do not match"):
        validation.validate(scenarios.ou_surrogate(names=("a", "b")), data)
    short = scenarios.ornstein_uhlenbeck(seed=1, duration=2.0, n_runs=1)
    with pytest.raises(DataError, match="too short"):
        validation.validate(sur, short)
    with pytest.raises(SettingsError, match="unknown check setting"):
        CheckSpec.from_dict({"members": 4, "colour": "red"})


def test_given_initial_states_are_used_and_recorded():
    data = _ou(47)
    spec = CheckSpec(seed=7, members=4, min_pieces=4)
    starts = np.array(data.runs[0][:4])
    a = validation.validate(scenarios.ou_surrogate(), data, spec, initial_states=starts)
    b = validation.validate(scenarios.ou_surrogate(), data, spec, initial_states=starts)
    assert a.settings["starts"].startswith("given: sha256:")
    # same seed, same starts: the check repeats exactly (stochastic noise is seeded)
    assert [r.value for r in a.rows] == [r.value for r in b.rows]
    with pytest.raises(DataError, match="initial_states"):
        validation.validate(scenarios.ou_surrogate(), data, spec, initial_states=starts[:2])


def _rows_by_variable(scorecard):
    return {(r.statistic, r.variable): (r.value, r.noise_floor) for r in scorecard.rows}


def test_column_order_of_the_data_and_of_observed_variables_does_not_matter():
    # The same states in another column order are the same data: with the same seed the members
    # start from the same states, so every row must come out identical (up to round-off).
    data = _ou(48)
    sur = scenarios.ou_surrogate()
    spec = CheckSpec(seed=8, members=4, min_pieces=4)
    base = _rows_by_variable(validation.validate(sur, data, spec))
    swapped = type(data).from_arrays(
        [run[:, ::-1] for run in data.runs], data.names[::-1], data.dt, source="swapped"
    )
    for sc in (
        validation.validate(sur, swapped, spec),
        # observed_variables naming every variable in another order is no hidden level
        validation.validate(
            Surrogate(
                sur.variables,
                sur.terms,
                sur.coefficients,
                noise=sur.noise,
                settings={"observed_variables": ["x2", "x1"]},
            ),
            data,
            spec,
        ),
    ):
        rows = _rows_by_variable(sc)
        assert rows.keys() == base.keys()
        for key, (value, floor) in base.items():
            assert rows[key][0] == pytest.approx(value, rel=1e-9, abs=1e-12)
            assert rows[key][1] == pytest.approx(floor, rel=1e-9, abs=1e-12)


def test_observed_variables_that_are_not_model_variables_are_refused():
    data = _ou(49)
    sur = scenarios.ou_surrogate()
    odd = Surrogate(
        sur.variables,
        sur.terms,
        sur.coefficients,
        noise=sur.noise,
        settings={"observed_variables": ["x1", "x3"]},
    )
    with pytest.raises(DataError, match="observed variables \\['x3'\\] that it does not have"):
        validation.validate(odd, data, CheckSpec(seed=9, members=4, min_pieces=4))


def test_evidence_reads_from_a_binary_file_object_without_a_path(tmp_path):
    import io
    import zipfile

    data = _ou(50)
    result = validation.check(
        scenarios.ou_surrogate(), data, CheckSpec(seed=10, members=4, min_pieces=4)
    )
    path = tmp_path / "evidence.npz"
    result.evidence.to_npz(path)
    raw = path.read_bytes()
    from_path = Evidence.from_npz(path)
    handle = io.BytesIO(raw)
    from_bytes = Evidence.from_npz(handle, name="model@1: evidence.npz")
    assert not handle.closed  # the caller's file object is left open
    for name in validation.EVIDENCE_FIELDS:
        np.testing.assert_array_equal(getattr(from_bytes, name), getattr(from_path, name))
    # the stored members are the arrays that were written, read back by numpy itself
    with zipfile.ZipFile(io.BytesIO(raw)) as archive:
        assert {f"{k}.npy" for k in validation.EVIDENCE_FIELDS} <= set(archive.namelist())

    # bad content: a clear error naming the file, never a crash and never an unpickle
    bare = io.BytesIO()
    np.save(bare, np.arange(3.0))
    for content in (b"", b"not an archive at all", raw[: len(raw) // 2], bare.getvalue()):
        with pytest.raises(ModelFileError, match="^model@1: evidence.npz: "):
            Evidence.from_npz(io.BytesIO(content), name="model@1: evidence.npz")
    with pytest.raises(ModelFileError, match="missing.npz: cannot read evidence"):
        Evidence.from_npz(tmp_path / "missing.npz")
