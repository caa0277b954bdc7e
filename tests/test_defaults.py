"""Every documented default and convention, pinned to the value its documentation states.

Each test names where the value is documented. A changed default must change its documentation
and this file together.
"""

from __future__ import annotations

import dataclasses
import inspect
import math
import statistics as pystats

import numpy as np
import pytest
import scipy.signal

from ergodex import integrate, scenarios, stats, validation
from ergodex.fitting import make_fitter
from ergodex.model_space import DelayEmbedding, Standardise
from ergodex.series import Series
from ergodex.validation import CheckSpec


def _defaults(fn) -> dict:
    return {
        k: p.default
        for k, p in inspect.signature(fn).parameters.items()
        if p.default is not inspect.Parameter.empty
    }


def test_check_spec_defaults_as_documented():
    # validation.CheckSpec docstring: members 16, seed 0, bins 35, tolerance DEFAULT_TOLERANCE,
    # min_pieces 8, max_blowup_fraction 0; length, spinup, max_lag, gap, nperseg, pool derived
    spec = CheckSpec()
    assert spec.members == 16 and spec.seed == 0 and spec.bins == 35
    assert spec.min_pieces == 8 and spec.max_blowup_fraction == 0.0
    assert spec.tolerance == validation.DEFAULT_TOLERANCE
    assert spec.tolerances == {} and spec.regimes is None
    # CheckSpec docstring: false_reject_rate None (the fixed tolerance; the derived threshold is
    # opt-in), null_replicates 40, threshold_floor DEFAULT_TOLERANCE (benchmarks/README.md, the
    # derived-threshold section, keeps the floor)
    assert spec.false_reject_rate is None and spec.null_replicates == 40
    assert spec.threshold_floor == validation.DEFAULT_TOLERANCE
    for derived in ("length", "spinup", "max_lag", "gap", "nperseg", "pool"):
        assert getattr(spec, derived) is None
    # validation module docstring: the default rows are every variable statistic and occupancy
    assert spec.statistics == ("histogram", "autocorrelation", "spectrum", "quantiles", "occupancy")
    assert validation.ALL_STATISTICS == spec.statistics + ("residence", "transitions")
    assert [f.name for f in dataclasses.fields(CheckSpec)] == list(spec.to_dict())


def test_default_tolerance_is_the_calibrated_value():
    # benchmarks/README.md, calibration section: the calibrated family-wise tolerance is 2.75
    assert validation.DEFAULT_TOLERANCE == 2.75
    assert CheckSpec(tolerances={"spectrum": 3.0}).tolerance_for("spectrum") == 3.0
    assert CheckSpec(tolerances={"spectrum": 3.0}).tolerance_for("histogram") == 2.75


def test_check_settings_refuse_values_at_their_documented_limits():
    from ergodex.exceptions import SettingsError

    CheckSpec(
        max_blowup_fraction=0.0,
        spinup=0.0,
        gap=0.0,
        members=2,
        min_pieces=2,
        nperseg=8,
        pool=1,
        seed=0,
    ).check_settings()  # smallest allowed values
    bad = [
        dict(members=1),
        dict(min_pieces=1),
        dict(nperseg=7),
        dict(pool=0),
        dict(seed=-1),
        dict(max_blowup_fraction=1.0),
        dict(max_blowup_fraction=-0.1),
        dict(tolerance=0.0),
        dict(tolerance=math.inf),
        dict(length=0.0),
        dict(spinup=-1.0),
        dict(bins=0),
        dict(bins=True),
        dict(bins="sturges"),
        dict(members=True),
        dict(statistics=()),
        dict(statistics="histogram"),
        dict(tolerances={"entropy": 2.0}),
        dict(tolerances={"spectrum": -1.0}),
        dict(tolerances=[1]),
        dict(regimes={"a": 1}),
        dict(pool=True),
        dict(min_pieces=2.0),
    ]
    for kw in bad:
        name = next(iter(kw))
        with pytest.raises(SettingsError, match=f"^{name}"):
            CheckSpec(**kw).check_settings()
    for kw, message in (
        (dict(members=1), "members must be an integer ≥ 2; got 1"),
        (dict(spinup=-1.0), "spinup must be a non-negative number; got -1.0"),
        (dict(length=0.0), "length must be a positive number; got 0.0"),
        (dict(max_blowup_fraction=1.0), "max_blowup_fraction must be below 1; got 1.0"),
    ):
        with pytest.raises(SettingsError, match=f"^{message}$"):
            CheckSpec(**kw).check_settings()


def test_derived_check_settings_follow_the_documented_rules():
    # CheckSpec docstring and the module's constants: the decorrelation time is the longest
    # integrated time or envelope time of an oscillating variable
    # (validation/plan.py); spin-up and gap 5 decorrelation times,
    # max_lag 3 integrated times or one dominant period (in samples, at least 1 and at most a
    # quarter piece), Welch segment min(256, piece length // 8) (at least 8), raised to cover 4
    # dominant periods and 2 decorrelation times up to piece length // 8, pool half the
    # reference pieces, member length pool reference pieces
    data = scenarios.ornstein_uhlenbeck(seed=51, duration=90.0)
    sc = validation.validate(scenarios.ou_surrogate(), data, CheckSpec(seed=2, members=4))
    s = sc.settings
    tau = s["decorrelation_time"]
    oscillating = [t for v, t in s["envelope_time"].items() if s["dominant_period"][v] is not None]
    times = [*s["integrated_autocorrelation_time"].values(), *oscillating]
    assert tau == pytest.approx(max(times), rel=1e-12)
    assert s["spinup"] == pytest.approx(5 * tau, rel=1e-12)
    assert s["gap"] == pytest.approx(5 * tau, rel=1e-12)
    L = s["piece_length_samples"]
    period = max([p for p in s["dominant_period"].values() if p is not None], default=0.0)
    lag = max(3 * max(s["integrated_autocorrelation_time"].values()), period)
    assert s["max_lag_samples"] == min(max(1, round(lag / data.dt)), L // 4)
    segment = round(max(4 * period, 2 * tau) / data.dt)
    assert s["nperseg"] == max(8, min(256, L // 8), min(segment, L // 8))
    # 4 runs < min_pieces 8: each run is cut into ceil(8 / 4) = 2 blocks
    assert s["piece_source"] == "blocks" and s["blocks_per_run"] == 2
    assert s["n_reference_pieces"] == 8 and s["pool"] == 4
    assert s["member_length"] == pytest.approx(4 * L * data.dt, rel=1e-12)
    assert s["quantile_levels"] == [0.01, 0.99, 0.999]
    assert sc.blowups["allowed_fraction"] == 0.0


def test_statistics_defaults_as_documented():
    # stats module: DEFAULT_BINS 35, DEFAULT_QUANTILES (0.01, 0.99, 0.999) (their docstrings)
    assert stats.DEFAULT_BINS == 35
    assert stats.DEFAULT_QUANTILES == (0.01, 0.99, 0.999)
    assert _defaults(stats.histogram_edges) == {"bins": 35}
    assert _defaults(stats.power_spectrum) == {"nperseg": 256}
    assert _defaults(stats.integrated_autocorrelation_time) == {"dt": 1.0, "c": 5.0}
    assert _defaults(stats.effective_sample_size) == {"c": 5.0}
    assert _defaults(stats.exceedance_rate) == {"dt": None, "below": False}
    rng = np.random.default_rng(60)
    x = rng.normal(size=3000)
    assert stats.histogram_edges(x).size == 36
    # quantiles(): "default (0.01, 0.99, 0.999)", numpy's linear interpolation (definition 7)
    np.testing.assert_allclose(stats.quantiles(x), np.quantile(x, [0.01, 0.99, 0.999]))
    # autocorrelation(): "max_lag default: the shortest run's length minus one"
    assert stats.autocorrelation([x[:50], x[50:120]]).shape == (50,)
    # power_spectrum(): nperseg 256, cut down to the shortest run (scipy.signal.welch reference)
    freq, psd = stats.power_spectrum(x, 1.0)
    assert freq.size == 129
    np.testing.assert_allclose(psd, scipy.signal.welch(x, nperseg=256)[1], rtol=1e-12)
    freq, _ = stats.power_spectrum([x[:100], x[100:400]], 1.0)
    assert freq.size == 51


def test_freedman_diaconis_bins_are_capped_at_200():
    # histogram_edges docstring: "Freedman–Diaconis width 2 IQR n^(-1/3) (capped at 200 bins)"
    rng = np.random.default_rng(61)
    narrow = np.concatenate([rng.normal(size=100_000), [1e4]])  # one far outlier, tiny width
    assert stats.histogram_edges(narrow, "fd").size == 201
    # IQR zero (more than half the values equal): the width is 0 and the default 35 bins apply
    flat = np.concatenate([np.zeros(80), np.linspace(1, 2, 20)])
    assert stats.histogram_edges(flat, "fd").size == 36


def test_integration_defaults_as_documented():
    # integrate.blowup_bound docstring: factor 10, centre ± factor × half-range; a zero range
    # uses max(|centre|, 1)
    assert _defaults(integrate.blowup_bound) == {"factor": 10.0}
    ref = np.array([[1.0, 5.0, -3.0], [3.0, 5.0, -3.0]])
    bound = integrate.blowup_bound(ref)
    np.testing.assert_allclose(bound, [[-8.0, 12.0], [-45.0, 55.0], [-33.0, 27.0]])
    # choose_substep docstring: method "rk4", safety 0.25
    assert _defaults(integrate.choose_substep) == {"method": "rk4", "safety": 0.25}
    # integrate_ensemble docstring: spinup 0, method and engine "auto"
    d = _defaults(integrate.integrate_ensemble)
    assert d["spinup"] == 0.0 and d["method"] == "auto" and d["engine"] == "auto"
    assert d["bound"] is None and d["substep"] is None


def test_both_engines_give_identical_blow_up_members_and_times():
    # integrate module docstring: "Two engines compute the same thing". dx/dt = x² from x0
    # blows up at t = 1/x0 (analytic); both engines must flag the same members at the same
    # output step.
    pytest.importorskip("numba")
    from ergodex.surrogate import Surrogate, Term

    sur = Surrogate(("x",), (Term("monomial", powers=(2,)),), np.array([[1.0]]))
    x0 = np.array([[0.5], [1.0], [-0.5], [2.0]])
    runs = [
        integrate.integrate_ensemble(
            sur,
            x0,
            dt_out=0.05,
            n_out=30,
            substep=0.005,
            bound=np.array([[-100.0, 100.0]]),
            engine=e,
        )
        for e in ("numba", "numpy")
    ]
    np.testing.assert_array_equal(runs[0].blown_up, [False, True, False, True])
    np.testing.assert_array_equal(runs[0].blown_up, runs[1].blown_up)
    np.testing.assert_array_equal(runs[0].blowup_time, runs[1].blowup_time)
    # blow-up near 1/x0 (within one output interval past the bound crossing, 1/x0 − 1/100)
    assert runs[0].blowup_time[1] == pytest.approx(1.0, abs=0.06)
    assert runs[0].blowup_time[3] == pytest.approx(0.5, abs=0.06)


def test_standardise_uses_the_population_standard_deviation():
    # transforms.Standardise docstring: "divide by its standard deviation (ddof=0)"
    X = np.array([[1.0, 10.0], [2.0, 10.0], [3.0, 13.0], [4.0, 11.0]])
    t = Standardise().fit(X)
    # reference library: Python's statistics.pstdev (population standard deviation)
    np.testing.assert_allclose(t.scale_, [pystats.pstdev(X[:, 0]), pystats.pstdev(X[:, 1])])
    np.testing.assert_allclose(t.mean_, [2.5, 11.0])
    assert _defaults(Standardise.__init__) == {"with_mean": True, "with_scale": True}
    assert _defaults(DelayEmbedding.__init__) == {"n_delays": 2, "delay": 1}


def test_linear_inverse_default_lag_is_half_the_e_folding_lag():
    # LinearInverseModel docstring: tau0 None picks "half the e-folding time of the mean
    # autocorrelation of the model-space variables (at least one sample)"; tau_test
    # [0.5, 1, 2, 3], tau_test_tolerance 0.15
    tsa = pytest.importorskip("statsmodels.tsa.stattools")
    rng = np.random.default_rng(62)
    dt, theta = 0.1, 1.0 / 1.25  # e-folding time 1.25 = 12.5 samples
    a = math.exp(-theta * dt)
    x = scipy.signal.lfilter([1.0], [1.0, -a], rng.standard_normal((2, 40_000)), axis=1).T
    series = Series.from_arrays([x], ("p", "q"), dt)
    fitter = make_fitter("linear-inverse", {}).fit(series)
    # reference library: statsmodels acf, mean over the two variables; first lag below 1/e
    acf = np.mean([tsa.acf(x[:, j], nlags=40, fft=True) for j in range(2)], axis=0)
    e_fold = int(np.flatnonzero(acf < math.exp(-1.0))[0])
    assert e_fold in (12, 13)  # analytic 12.5 samples; sampling error of the acf ≈ 0.01
    assert fitter.tau0_ == pytest.approx((e_fold // 2) * dt, rel=1e-9)
    d = _defaults(type(fitter).__init__)
    assert d["tau0"] is None and d["tau_test"] in ([0.5, 1, 2, 3], (0.5, 1.0, 2.0, 3.0))
    assert d["tau_test_tolerance"] == 0.15
    assert d["unstable"] == "refuse" and d["negative_noise"] == "clip"


def test_sparse_bootstrap_keep_fraction_default():
    # SparseODE docstring: "keep_fraction : float, default 0.5" (keep a term non-zero in
    # at least that fraction of the bagged fits)
    from ergodex.fitting.sparse import SparseODE

    assert _defaults(SparseODE.__init__)["keep_fraction"] == 0.5
