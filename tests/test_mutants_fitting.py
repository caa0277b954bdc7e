"""Fitting: documented defaults, the settings tables, the shared numerics and the selection
record, one behaviour at a time (each found missing by a mutation run,
``benchmarks/mutation.py fitting_base fitting_settings tendencies selection ...``)."""

from __future__ import annotations

import inspect
import math
import re

import numpy as np
import pytest

from ergodex.exceptions import DataError, NotFittedError, SettingsError
from ergodex.fitting import (
    FITTERS,
    check_fit_settings,
    fitter_class,
    make_fitter,
    parse_fit_settings,
)
from ergodex.fitting.selection import (
    DEFAULT_PRUNE_BELOW,
    Candidate,
    SelectionResult,
    parse_selection,
)
from ergodex.fitting.settings import Rule, check_setting, check_settings
from ergodex.fitting.tendencies import (
    check_library_rank,
    finite_difference,
    forward_tendencies,
    lagged_covariance,
    r2_score,
    relative_tendency_error,
    weak_matrices,
    weak_test_functions,
)
from ergodex.series import Series

LIM_SETTINGS = (
    "allowed settings: n_modes, negative_noise, standardise, tau0, tau_test, tau_test_tolerance, "
    "unstable"
)
TOP = "allowed top-level keys: format, method, settings, select"
TAU0 = "linear-inverse setting 'tau0' must be a number > 0 (or None to choose from the data)"


def _exact(message: str) -> str:
    return "^" + re.escape(message) + "$"


def _defaults(fn) -> dict:
    return {
        k: p.default
        for k, p in inspect.signature(fn).parameters.items()
        if p.default is not inspect.Parameter.empty
    }


# -- documented defaults ------------------------------------------------------------------------


def _documented_defaults(cls) -> dict[str, str]:
    """``name : type, default VALUE`` lines of a numpydoc Parameters section (VALUE as text);
    a value may continue on the next line, and ``a, b : int, default 9 and 4`` names two."""
    doc = inspect.getdoc(cls) or ""
    section = doc.split("Parameters\n----------\n", 1)[1].split("\n\n", 1)[0]
    lines = section.splitlines()
    out = {}
    for i, line in enumerate(lines):
        m = re.match(r"^(\w+(?:, \w+)*) : .*, default\s*(.*)$", line)
        if not m:
            continue
        value = m.group(2).strip() or lines[i + 1].strip()
        names = m.group(1).split(", ")
        values = value.split(" and ") if len(names) > 1 else [value]
        out.update(zip(names, values))
    return out


def _as_text(value) -> str:
    if isinstance(value, str):
        return f'"{value}"'
    if isinstance(value, tuple):
        return "[" + ", ".join(f"{v:g}" for v in value) + "]"
    return str(value)


@pytest.mark.parametrize("method", ["sparse", "linear-inverse"])
def test_every_default_in_a_fitters_docstring_is_the_constructors(method):
    cls = fitter_class(method)
    documented = _documented_defaults(cls)
    # the values a fitter built without settings holds (get_params reads them back), not the
    # signature alone: what a user gets
    actual = cls().get_params()
    assert actual == _defaults(cls.__init__)
    # every setting is documented with its default, and the two agree (numbers compared as
    # numbers: the docstring writes 1 for 1.0)
    assert set(documented) == set(actual) == set(cls.settings_table)
    for name, text in documented.items():
        value = actual[name]
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            assert float(text) == float(value), name
        else:
            assert text == _as_text(value), name


def test_sparse_defaults_as_documented():
    # SparseODE docstring, Parameters
    d = make_fitter("sparse").get_params()
    assert d["degree"] == 2 and d["regression"] == "stlsq" and d["terms"] == "polynomial"
    assert d["harmonics"] == 1 and d["constant_term"] is True and d["penalty"] == "L0"
    assert d["iterations"] is None and d["difference_order"] == 4
    assert d["smoothing_window"] == 9 and d["smoothing_degree"] == 4
    assert d["weak_window"] == 41 and d["weak_stride"] is None and d["weak_degree"] == 4
    assert d["bootstrap"] is False and d["resamples"] == 20 and d["bounded_quadratic"] is False
    assert d["seed"] == 0 and d["n_modes"] is None and d["standardise"] is False
    assert d["differentiation"] == "weak"


def test_linear_inverse_defaults_as_documented():
    # LinearInverseModel docstring: n_modes None, standardise False (the rest in test_defaults)
    d = make_fitter("linear-inverse").get_params()
    assert d["n_modes"] is None and d["standardise"] is False


def test_shared_numerics_and_selection_defaults_as_documented():
    # finite_difference: order 4 unless asked; check_library_rank names "the data";
    # selection: the geometric default sweep 0.01 … 3 (DEFAULT_PRUNE_BELOW docstring)
    assert _defaults(finite_difference) == {"order": 4}
    assert _defaults(check_library_rank) == {"what": "the data"}
    assert DEFAULT_PRUNE_BELOW == (0.01, 0.03, 0.1, 0.3, 1.0, 3.0)
    assert _defaults(parse_fit_settings) == {"source": "fit settings", "recorded": False}


# -- the settings table -------------------------------------------------------------------------


@pytest.mark.parametrize(
    "rule, value, message",
    [
        (Rule("int", low=1), 0, "must be an integer >= 1; got 0"),
        (Rule("int", low=1), True, "must be an integer >= 1; got True"),
        (Rule("int", low=1), 2.0, "must be an integer >= 1; got 2.0"),
        (Rule("int", low=1, high=5), 6, "must be an integer >= 1 and <= 5; got 6"),
        (Rule("float", low=0.0, low_open=True), 0.0, "must be a number > 0; got 0.0"),
        (Rule("float", low=0.0, low_open=True), -1, "must be a number > 0; got -1"),
        (Rule("float", high=1.0, high_open=True), 1.0, "must be a number < 1; got 1.0"),
        (Rule("float", high=1.0), 1.5, "must be a number <= 1; got 1.5"),
        (Rule("float"), float("nan"), "must be a number; got nan"),
        (Rule("float"), float("inf"), "must be a number; got inf"),
        (Rule("float"), False, "must be a number; got False"),
        (Rule("float"), "1", "must be a number; got '1'"),
        (Rule("bool"), 1, "must be true or false; got 1"),
        (Rule("choice", choices=("a", "b")), "c", "must be one of 'a', 'b'; got 'c'"),
        (Rule("choice", choices=("a", "b")), 1, "must be one of 'a', 'b'; got 1"),
        (Rule("str"), 3, "must be a string; got 3"),
        (Rule("float-list", low=0.0), [], "must be a list of numbers >= 0; got []"),
        (Rule("float-list", low=0.0), [1, -1], "must be a list of numbers >= 0; got [1, -1]"),
        (Rule("float-list"), [1, True], "must be a list of numbers; got [1, True]"),
        (Rule("float-list"), "12", "must be a list of numbers; got '12'"),
        (Rule("int"), None, "must be an integer; got None"),
        (Rule("int", low=2.5), 2, "must be an integer >= 2.5; got 2"),
    ],
)
def test_a_bad_value_is_refused_with_what_is_allowed(rule, value, message):
    with pytest.raises(SettingsError, match=_exact(f"fitter setting 'k' {message}")):
        check_setting("fitter", "k", value, rule)


@pytest.mark.parametrize(
    "rule, value",
    [
        (Rule("int", low=1, high=5), 1),
        (Rule("int", low=1, high=5), 5),
        (Rule("int", low=1), np.int64(3)),
        (Rule("float", low=0.0), 0.0),
        (Rule("float", low=0.0, high=1.0), 1.0),
        (Rule("float", low=0.0, low_open=True), 1e-300),
        (Rule("float"), 3),
        (Rule("bool"), False),
        (Rule("choice", choices=("a", "b")), "b"),
        (Rule("str"), ""),
        (Rule("float-list", low=0.0), (0, 2.5)),
        (Rule("float", allow_none=True), None),
    ],
)
def test_values_at_the_bounds_are_allowed(rule, value):
    check_setting("fitter", "k", value, rule)  # raises nothing


def test_none_and_unknown_keys_are_explained():
    rule = Rule("int", low=1, allow_none=True)
    assert rule.describe() == "an integer >= 1 (or None to choose from the data)"
    with pytest.raises(SettingsError, match=_exact("f setting 'k' must be a number; got None")):
        check_settings("f", {"k": None}, {"k": Rule("float")})
    table = {"b": Rule("int"), "a": Rule("int")}
    check_settings("f", {"a": 1, "b": 2}, table)
    with pytest.raises(SettingsError, match=_exact("f has no setting 'c'; allowed settings: a, b")):
        check_settings("f", {"a": 1, "c": 2}, table)
    with pytest.raises(SettingsError, match=_exact("f setting 'b' must be an integer; got 'x'")):
        check_settings("f", {"a": 1, "b": "x"}, table)


def test_methods_and_settings_documents_are_checked():
    assert list(FITTERS)[:2] == ["sparse", "linear-inverse"]
    assert fitter_class("linear-inverse") is fitter_class(fitter_class("linear-inverse"))
    with pytest.raises(
        SettingsError, match=r"^unknown fit method 'lim'; allowed methods: sparse, "
    ):
        fitter_class("lim")
    with pytest.raises(SettingsError, match=r"^unknown fit method 3; allowed methods: "):
        make_fitter(3)  # type: ignore[arg-type]
    with pytest.raises(
        SettingsError,
        match=_exact("linear-inverse settings must be a table of key = value; got list"),
    ):
        check_fit_settings("linear-inverse", [])  # type: ignore[arg-type]
    assert parse_fit_settings({}) == ("sparse", {})  # method "sparse" when not given
    assert parse_fit_settings({"method": "linear-inverse", "settings": {"tau0": 0.5}}) == (
        "linear-inverse",
        {"tau0": 0.5},
    )
    for document, message in [
        ({"methd": "sparse"}, f"f.toml: unknown key 'methd'; {TOP}"),
        ({"settings": [1]}, "f.toml: 'settings' must be a table ([settings]); got list"),
        (
            {"method": "linear-inverse", "settings": {"tau0": -1}},
            f"f.toml: [settings] {TAU0}; got -1",
        ),
    ]:
        with pytest.raises(SettingsError, match=_exact(message)):
            parse_fit_settings(document, source="f.toml")
    with pytest.raises(SettingsError, match=r"^f\.toml: key 'method' must be one of sparse, "):
        parse_fit_settings({"method": 1}, source="f.toml")


def test_fitter_settings_round_trip_and_learned_state_waits_for_fit():
    fitter = make_fitter("linear-inverse", {"tau0": 0.5, "unstable": "flag"})
    assert fitter.get_params()["tau0"] == 0.5 and fitter.get_params()["unstable"] == "flag"
    assert fitter.set_params(tau0=0.25) is fitter and fitter.tau0 == 0.25
    with pytest.raises(
        SettingsError,
        match=_exact("linear-inverse has no setting 'tau'; " + LIM_SETTINGS),
    ):  # noqa: E501
        fitter.set_params(tau=1.0)
    assert not fitter.is_fitted
    with pytest.raises(
        NotFittedError,
        match=_exact("LinearInverseModel.G_ is not available before fit(); call fit(series) first"),
    ):  # noqa: E501
        _ = fitter.G_
    with pytest.raises(
        AttributeError, match=_exact("'LinearInverseModel' object has no attribute 'colour'")
    ):  # noqa: E501
        _ = fitter.colour


def test_fit_refuses_data_it_cannot_use():
    rng = np.random.default_rng(11)
    x = rng.normal(size=(200, 2))
    # varies by 1e-13 only: a Series takes it, but no fit can (base.check_series: spread below
    # 1e-12 of the variable's size)
    nearly = np.full(200, 3.0)
    nearly[7] += 1e-13
    flat = Series.from_arrays([np.column_stack([x[:, 0], nearly])], ["a", "b"], 0.1)
    with pytest.raises(DataError, match=r"variable 'b' is constant \(3\) over every run"):
        make_fitter("linear-inverse").fit(flat)


# -- shared numerics ------------------------------------------------------------------------------


def test_finite_differences_are_exact_to_their_order():
    # central differences of order p are exact for polynomials of degree <= p (Taylor series,
    # analytic); order 2 misses a cubic by dt² x'''/6 = dt² (analytic truncation error)
    dt = 0.1
    t = np.arange(20) * dt
    quartic = np.column_stack([t**4, 3 * t**2 - t])
    d4 = finite_difference(quartic, dt)
    assert d4.shape == (16, 2)
    np.testing.assert_allclose(d4[:, 0], 4 * t[2:-2] ** 3, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(d4[:, 1], 6 * t[2:-2] - 1, rtol=1e-9, atol=1e-9)
    cubic = (t**3)[:, None]
    d2 = finite_difference(cubic, dt, order=2)
    assert d2.shape == (18, 1)
    np.testing.assert_allclose(d2[:, 0], 3 * t[1:-1] ** 2 + dt**2, rtol=1e-9, atol=1e-9)


def test_weak_test_functions_integrate_as_the_analytic_bump():
    # on a window from t = 1 to t = 2: ∫φ dt = 1 (normalised), ∫φ t dt = 1.5 (φ symmetric),
    # ∫φ' dt = 0 and ∫φ' t dt = −∫φ dt = −1 (integration by parts, φ zero at both ends)
    n, dt = 41, 1 / 40
    t = 1.0 + dt * np.arange(n)
    # (the trapezoid rule's error shrinks as more derivatives of φ vanish at the ends)
    for degree, rel in ((2, 1e-2), (4, 1e-3), (6, 1e-4)):
        phi, dphi = weak_test_functions(n, dt, degree)
        assert phi.sum() == pytest.approx(1.0, rel=1e-12)
        assert phi @ t == pytest.approx(1.5, rel=1e-12)
        assert dphi.sum() == pytest.approx(0.0, abs=1e-12)
        assert dphi @ t == pytest.approx(-1.0, rel=rel)
        assert dphi @ t**2 == pytest.approx(-3.0, rel=rel)  # −2 ∫φ t dt
    # degree 2: φ ∝ (1 − s²)², so φ at the window's quarter point over φ at its centre is
    # (1 − 1/4)² = 9/16
    phi, _ = weak_test_functions(n, dt, 2)
    assert phi[10] / phi[20] == pytest.approx(9 / 16, rel=1e-12)


def test_weak_rows_of_a_line_recover_its_slope():
    # x(t) = 2 t + 1: every window gives −∫φ' x dt = 2 (the slope) and ∫φ·1 dt = 1
    dt = 0.05
    t = dt * np.arange(100)
    X = (2 * t + 1)[:, None]
    theta = np.ones((100, 1))
    rows, y = weak_matrices(X, theta, dt, window=21, stride=10, degree=4)
    assert rows.shape == (8, 1) and y.shape == (8, 1)  # windows start at 0, 10, …, 70
    np.testing.assert_allclose(rows, 1.0, rtol=1e-12)
    np.testing.assert_allclose(y, 2.0, rtol=1e-3)  # trapezoid rule, 21 samples


def test_library_rank_checks_name_the_terms():
    rng = np.random.default_rng(12)
    x = rng.normal(size=(50, 1))
    names = ["1", "a", "b"]
    few = np.ones((2, 3))
    with pytest.raises(
        DataError,
        match=_exact(
            "loop.csv: the term library has 3 terms but only 2 usable samples; at least 3 are "
            "needed (more than 6 for a stable fit): add runs or longer runs, or lower the degree"
        ),
    ):
        check_library_rank(few, names, what="loop.csv")
    zero = np.column_stack([np.ones(50), x, np.zeros(50)])
    with pytest.raises(
        DataError, match=_exact("the data: library term(s) b are zero on every sample; remove them")
    ):
        check_library_rank(zero, names)
    twice = np.column_stack([np.ones(50), x, 2 * x])
    with pytest.raises(
        DataError,
        match=r"^the data: the term library is rank-deficient \(rank 2 of 3 terms\); the terms "
        r"'a', 'b' are linearly dependent",
    ):
        check_library_rank(twice, names)
    # columns of very different units are not dependent (each is scaled to unit norm first)
    check_library_rank(np.column_stack([np.ones(50), 1e-8 * x, 1e8 * x**2]), names)
    check_library_rank(np.column_stack([np.ones(3), [0.0, 1.0, 2.0], [0.0, 1.0, 4.0]]), names)


def test_r2_equals_scikit_learns():
    from sklearn.metrics import r2_score as sk_r2

    rng = np.random.default_rng(13)
    Y = rng.normal(size=(60, 3))
    fit = Y + rng.normal(0, 0.5, size=(60, 3))
    # reference library: scikit-learn, one R² per column
    np.testing.assert_allclose(r2_score(Y, fit), sk_r2(Y, fit, multioutput="raw_values"))
    # a constant column has no variance to explain: 1 − SS_res (not a division by zero)
    const = np.column_stack([Y[:, 0], np.full(60, 2.0)])
    got = r2_score(const, const + 0.1)
    assert got[1] == pytest.approx(1.0 - 60 * 0.01)


def test_lagged_covariance_pools_runs_without_crossing_them():
    # by hand: runs [1, 2, 3] and [5, 7], mean 0, lag 1: pairs (2·1), (3·2), (7·5) → 43 / 3
    runs = [np.array([[1.0], [2.0], [3.0]]), np.array([[5.0], [7.0]])]
    C, pairs = lagged_covariance(runs, 1, np.zeros(1))
    assert pairs == 3 and C[0, 0] == pytest.approx(43 / 3)
    C2, pairs2 = lagged_covariance(runs, 2, np.zeros(1))  # the 2-sample run has no pair
    assert pairs2 == 1 and C2[0, 0] == pytest.approx(3.0)
    assert lagged_covariance(runs, 5, np.zeros(1))[1] == 0
    # lag 0 with the run's own mean: numpy's population covariance (reference library)
    rng = np.random.default_rng(14)
    X = rng.normal(size=(100, 2))
    C0, n0 = lagged_covariance([X], 0, X.mean(axis=0))
    np.testing.assert_allclose(C0, np.cov(X.T, bias=True))
    assert n0 == 100
    # C(τ)[i, j] = E[x_i(t+τ) x_j(t)]: the later sample is the row
    C1, _ = lagged_covariance([X], 1, np.zeros(2))
    np.testing.assert_allclose(C1[0, 1], np.mean(X[1:, 0] * X[:-1, 1]))


def test_forward_tendencies_stay_within_runs():
    runs = [np.array([[0.0], [1.0], [3.0]]), np.array([[10.0], [6.0]])]
    states, tendencies = forward_tendencies(runs, 0.5)
    np.testing.assert_array_equal(states.ravel(), [0.0, 1.0, 10.0])
    np.testing.assert_array_equal(tendencies.ravel(), [2.0, 4.0, -8.0])


def test_relative_tendency_error_of_an_exact_and_a_zero_drift():
    from ergodex.surrogate import Surrogate, polynomial_terms

    dt = 0.1
    X = (3.0 * dt * np.arange(30) + 1.0)[:, None]  # dx/dt = 3 exactly
    terms = polynomial_terms(1, 0)  # the constant term only
    exact = Surrogate(["x"], terms, np.array([[3.0]]))
    still = Surrogate(["x"], terms, np.array([[0.0]]))
    assert relative_tendency_error(exact, [X], dt) == pytest.approx(0.0, abs=1e-12)
    assert relative_tendency_error(still, [X], dt) == pytest.approx(1.0)
    # runs shorter than the order-4 stencil (5 samples) are skipped; none left gives NaN
    assert relative_tendency_error(still, [X, X[:4]], dt) == pytest.approx(1.0)
    assert math.isnan(relative_tendency_error(still, [X[:4]], dt))


# -- the selection record ------------------------------------------------------------------------


def _result(chosen):
    cands = [
        Candidate(0, "sparse", {"degree": 2}, "fail", 9, 3.5, 0.1, 0.9, 2, 4.25, ["blew up"]),
        Candidate(1, "sparse", {"degree": 1}, "pass", 4, 1.25, float("nan"), 0.8),
        Candidate(2, "linear-inverse", {}, "error", reasons=["fit failed: x"]),
        Candidate(3, "sparse", {"degree": 3}, "pass", 4, 0.5, 0.2, 0.95),
    ]
    return SelectionResult(cands, chosen, {"members": 16}, "sequential", "d1", "r1", "ok")


def test_selection_front_table_and_record():
    res = _result(3)
    # SelectionResult docstring: front ordered by number of terms, failed fits last
    assert [c.index for c in res.front] == [1, 3, 0, 2]
    assert res.passed and not _result(None).passed and _result(None).surrogate is None
    lines = res.table().splitlines()
    assert lines[0].split() == ["#", "method", "terms", "stat.score", "tend.err", "verdict"]
    assert lines[1].split() == ["1", "sparse", "4", "1.25", "nan", "pass"]
    assert lines[2].split() == ["*", "3", "sparse", "4", "0.5", "0.2", "pass"]
    assert lines[3].split() == [
        "0",
        "sparse",
        "9",
        "3.5",
        "0.1",
        "fail",
        "(blow-up",
        "at",
        "t=4.25)",
    ]
    assert lines[4].split() == ["2", "linear-inverse", "-", "-", "-", "error"]
    d = res.to_dict()
    assert {k: d[k] for k in ("chosen", "passed", "message", "backend")} == {
        "chosen": 3,
        "passed": True,
        "message": "ok",
        "backend": "sequential",
    }
    assert d["data_fingerprint"] == "d1" and d["reference_fingerprint"] == "r1"
    assert d["spec"] == {"members": 16}
    first = d["candidates"][0]
    assert first == {
        "index": 0,
        "method": "sparse",
        "settings": {"degree": 2},
        "verdict": "fail",
        "n_terms": 9,
        "statistical_score": 3.5,
        "tendency_error": 0.1,
        "fit_score": 0.9,
        "blowup_count": 2,
        "first_blowup_time": 4.25,
        "reasons": ["blew up"],
    }
    assert d["candidates"][1]["tendency_error"] is None  # NaN is not JSON: null
    assert res.candidates[2].surrogate() is None and not res.candidates[2].passed


def test_selection_candidates_from_a_settings_document():
    # parse_selection docstring: without a [select] table the default threshold sweep is used
    # (for a method that has a threshold); otherwise the one candidate of the [settings] table
    sweep = parse_selection({}, method="sparse", settings={"degree": 3})
    assert len(sweep) == len(DEFAULT_PRUNE_BELOW)
    assert all(m == "sparse" and s["degree"] == 3 for m, s in sweep)
    assert parse_selection({}, method="linear-inverse", settings={"tau0": 1.0}) == [
        ("linear-inverse", {"tau0": 1.0})
    ]
    doc = {"select": {"candidates": [{"method": "linear-inverse", "tau0": 2.0}]}}
    assert parse_selection(doc, method="sparse", settings={}) == [("linear-inverse", {"tau0": 2.0})]
    for table, message in [
        ([1], "f: 'select' must be a table ([select])"),
        ({"candidates": [{"tau0": 1.0}]}, "f: [[select.candidates]] entry 1 needs a 'method' key"),
        (
            {"candidates": [{"method": "linear-inverse", "x": 1}]},
            "f: [[select.candidates]] entry 1: linear-inverse has no setting 'x'; " + LIM_SETTINGS,
        ),
    ]:
        with pytest.raises(SettingsError, match=_exact(message)):
            parse_selection({"select": table}, method="sparse", settings={}, source="f")
    with pytest.raises(SettingsError, match=r"^f: \[select\] has no key 'colour'; allowed keys: "):
        parse_selection({"select": {"colour": 1}}, method="sparse", settings={}, source="f")


def test_library_rank_counts_relative_singular_values_below_1e_10_as_dependent():
    # check_library_rank docstring: columns scaled to unit norm; "a relative singular value
    # below 1e-10 counts as a dependency". Columns u and u + θ v (u ⟂ v unit vectors) have
    # singular values ≈ √2 and θ/√2 (analytic, small θ): θ = 1.4e-10 gives a relative one of
    # 0.7e-10 (dependent, rank 1), θ = 3e-10 one of 1.5e-10 (independent)
    u = np.zeros(10)
    v = np.zeros(10)
    u[0], v[1] = 1.0, 1.0
    with pytest.raises(
        DataError, match=r"rank-deficient \(rank 1 of 2 terms\); the terms 'p', 'q'"
    ):
        check_library_rank(np.column_stack([u, u + 1.4e-10 * v]), ["p", "q"])
    check_library_rank(np.column_stack([u, u + 3e-10 * v]), ["p", "q"])
    # two terms zero everywhere are both named
    with pytest.raises(DataError, match=r"library term\(s\) p, q are zero on every sample"):
        check_library_rank(np.column_stack([np.zeros(10), np.zeros(10), u]), ["p", "q", "r"])


def _ou_series(source: str = "", time_unit: str | None = None) -> Series:
    rng = np.random.default_rng(21)
    x = np.zeros((400, 2))
    for k in range(1, 400):  # AR(1) with coefficient 0.9: a decaying, noisy pair of variables
        x[k] = 0.9 * x[k - 1] + rng.normal(size=2)
    return Series.from_arrays([x], ["a", "b"], 0.1, source=source, time_unit=time_unit)


def test_a_fit_records_its_data_and_reports_progress(caplog):
    # data_provenance docstring: fingerprint, size, interval and the data's time unit
    series = _ou_series(time_unit="s")
    calls = []
    with caplog.at_level("INFO", logger="ergodex"):
        fitter = make_fitter("linear-inverse").fit(
            series, progress=lambda d, t: calls.append((d, t))
        )
    prov = fitter.surrogate_.provenance
    assert prov["data_fingerprint"] == series.fingerprint()
    assert prov["fitted_on_runs"] == 1 and prov["fitted_on_samples"] == 400
    assert prov["dt"] == 0.1 and prov["time_unit"] == "s"
    assert calls and calls[-1][0] == calls[-1][1] >= 1  # the last call says "done"
    assert "fit linear-inverse: 1 runs, 400 samples of 2 variables (a, b), dt=0.1" in caplog.text


def test_settings_changed_after_construction_are_checked_at_fit():
    fitter = make_fitter("linear-inverse")
    fitter.tau0 = -1.0  # scikit-learn style: plain attributes, checked when fit runs
    with pytest.raises(SettingsError, match=r"^linear-inverse setting 'tau0' must be a number > 0"):
        fitter.fit(_ou_series())


def test_fit_messages_name_the_data_file():
    series = _ou_series(source="loop.csv")
    nearly = series.runs[0].copy()
    nearly[:, 1] = 3.0
    nearly[7, 1] += 1e-13
    flat = Series.from_arrays([nearly], ["a", "b"], 0.1, source="loop.csv")
    with pytest.raises(DataError, match=r"^loop\.csv: variable 'b' is constant \(3\)"):
        make_fitter("linear-inverse").fit(flat)


def test_a_folder_given_as_fit_settings_says_what_was_expected(tmp_path):
    from ergodex.fitting import load_fit_settings

    (tmp_path / "fit.toml").mkdir()
    with pytest.raises(
        SettingsError, match=r"fit\.toml: is a folder, expected a fit settings file \(TOML\)$"
    ):
        load_fit_settings(tmp_path / "fit.toml")


def test_linear_inverse_score_and_tau_test_record_as_documented():
    # LinearInverseModel docstring: score_ is the mean R² of the lag-τ₀ forecast G x(t) of
    # x(t + τ₀) over the variables (reference: scikit-learn's r2_score per column); tau_test_
    # holds lags, relative_change, eigenvalues, tolerance and flat
    from sklearn.metrics import r2_score as sk_r2

    series = _ou_series()
    fitter = make_fitter("linear-inverse").fit(series)
    x = series.runs[0]
    lag = int(round(fitter.tau0_ / 0.1))
    anomaly = x - fitter.mean_
    forecast = anomaly[:-lag] @ fitter.G_.T
    expected = np.mean(sk_r2(anomaly[lag:], forecast, multioutput="raw_values"))
    # (scikit-learn centres each column on its own mean, the model on the pooled mean: ≈ 1 %)
    assert fitter.score_ == pytest.approx(expected, rel=1e-2)
    assert {"lags", "relative_change", "eigenvalues", "tolerance", "flat"} <= set(fitter.tau_test_)
    assert fitter.tau_test_["tolerance"] == 0.15
    assert len(fitter.tau_test_["eigenvalues"]) == len(fitter.tau_test_["lags"])


def test_sparse_settings_that_contradict_each_other_are_refused():
    # SparseODE docstring: trapping fits a quadratic model (degree 2, polynomial library);
    # the Savitzky–Golay window is odd and longer than the polynomial order (scipy's rule)
    for settings in (
        {"bounded_quadratic": True, "degree": 3},
        {"bounded_quadratic": True, "terms": "fourier"},
    ):
        with pytest.raises(SettingsError, match=r"^sparse setting 'bounded_quadratic' needs terms"):
            make_fitter("sparse", settings)
    with pytest.raises(
        SettingsError, match=r"^sparse setting 'smoothing_window' must be odd; got 8$"
    ):
        make_fitter("sparse", {"smoothing_window": 8})
    with pytest.raises(SettingsError, match=r"^sparse setting 'smoothing_degree' \(5\) must be"):
        make_fitter("sparse", {"smoothing_window": 5, "smoothing_degree": 5})
