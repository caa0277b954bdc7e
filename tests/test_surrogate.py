"""Tests of the Surrogate term table, its JSON file and the pysindy conversion."""

from __future__ import annotations

import json
from importlib import resources

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from ergodex.exceptions import ModelFileError, SettingsError
from ergodex.surrogate import FORMAT, Surrogate, Term, from_pysindy, polynomial_terms

NAMES = ("flow", "dT_across", "dT_up")
# Lorenz-63 parameters of the heated convection loop (Lorenz 1963, J. Atmos. Sci. 20, 130-141).
SIGMA, RHO, BETA = 10.0, 28.0, 8.0 / 3.0


def lorenz63_surrogate() -> Surrogate:
    terms = polynomial_terms(3, 2)
    index = {t.powers: k for k, t in enumerate(terms)}
    coef = np.zeros((3, len(terms)))
    coef[0, index[(1, 0, 0)]] = -SIGMA
    coef[0, index[(0, 1, 0)]] = SIGMA
    coef[1, index[(1, 0, 0)]] = RHO
    coef[1, index[(0, 1, 0)]] = -1.0
    coef[1, index[(1, 0, 1)]] = -1.0
    coef[2, index[(0, 0, 1)]] = -BETA
    coef[2, index[(1, 1, 0)]] = 1.0
    return Surrogate(NAMES, terms, coef)


def lorenz63_rhs(x: np.ndarray) -> np.ndarray:
    """Lorenz (1963) equations written out by hand, the reference for rhs()."""
    return np.column_stack(
        [
            SIGMA * (x[:, 1] - x[:, 0]),
            x[:, 0] * (RHO - x[:, 2]) - x[:, 1],
            x[:, 0] * x[:, 1] - BETA * x[:, 2],
        ]
    )


def lorenz63_trajectory(t_end: float, dt: float, x0=(-8.0, 7.0, 27.0)) -> np.ndarray:
    t = np.arange(0.0, t_end, dt)
    sol = solve_ivp(
        lambda _t, y: lorenz63_rhs(y[None, :])[0],
        (0.0, t[-1]),
        x0,
        t_eval=t,
        method="DOP853",
        rtol=1e-10,
        atol=1e-10,
    )
    return sol.y.T


def test_rhs_and_jacobian_match_the_lorenz_equations():
    rng = np.random.default_rng(1)
    x = rng.normal(scale=10.0, size=(50, 3))
    s = lorenz63_surrogate()
    # Same arithmetic up to summation order: agreement to a few ulps of the largest product.
    np.testing.assert_allclose(s.rhs(x), lorenz63_rhs(x), rtol=1e-13, atol=1e-12)
    np.testing.assert_allclose(s.rhs(x[0]), lorenz63_rhs(x[:1])[0], rtol=1e-13, atol=1e-12)
    # Analytic Jacobian of Lorenz (1963).
    jac = s.jacobian(x)
    expected = np.zeros((50, 3, 3))
    expected[:, 0, 0], expected[:, 0, 1] = -SIGMA, SIGMA
    expected[:, 1, 0], expected[:, 1, 1], expected[:, 1, 2] = RHO - x[:, 2], -1.0, -x[:, 0]
    expected[:, 2, 0], expected[:, 2, 1], expected[:, 2, 2] = x[:, 1], x[:, 0], -BETA
    np.testing.assert_allclose(jac, expected, rtol=1e-13, atol=1e-12)


def test_jacobian_of_trig_and_cubic_terms_matches_central_differences():
    rng = np.random.default_rng(2)
    terms = polynomial_terms(2, 3) + (
        Term("sin", variable=0, frequency=2.0),
        Term("cos", variable=1, frequency=0.5),
    )
    coef = rng.normal(size=(2, len(terms)))
    s = Surrogate(("a", "b"), terms, coef)
    x = rng.normal(size=(7, 2))
    h = 1e-5
    num = np.empty((7, 2, 2))
    for k in range(2):
        e = np.zeros(2)
        e[k] = h
        num[:, :, k] = (s.rhs(x + e) - s.rhs(x - e)) / (2 * h)
    # Central differences err by O(h^2 * f''') ~ 1e-10 plus round-off ~ eps/h ~ 1e-11
    # (common practice, no source).
    np.testing.assert_allclose(s.jacobian(x), num, rtol=1e-7, atol=1e-7)
    # Features of trig terms: sin(2 a), cos(0.5 b).
    feats = s.features(x)
    np.testing.assert_allclose(feats[:, -2], np.sin(2.0 * x[:, 0]))
    np.testing.assert_allclose(feats[:, -1], np.cos(0.5 * x[:, 1]))


def test_equations_are_readable():
    lines = lorenz63_surrogate().equations()
    assert lines == [
        "d flow/dt = -10 flow + 10 dT_across",
        "d dT_across/dt = 28 flow - dT_across - flow dT_up",
        "d dT_up/dt = -2.667 dT_up + flow dT_across",
    ]


def test_polynomial_terms_follow_pysindy_order():
    ps = pytest.importorskip("pysindy")
    rng = np.random.default_rng(3)
    for n, degree in ((3, 2), (4, 3), (2, 4)):
        lib = ps.PolynomialLibrary(degree=degree).fit(rng.normal(size=(20, n)))
        ours = np.array([t.powers for t in polynomial_terms(n, degree)])
        np.testing.assert_array_equal(ours, lib.powers_)
    # Lorenz-96 with 40 stations, quadratic: C(42, 2) = 861 candidate terms.
    assert len(polynomial_terms(40, 2)) == 861


def test_json_round_trip_is_bit_exact(tmp_path):
    rng = np.random.default_rng(4)
    terms = polynomial_terms(3, 2) + (Term("sin", variable=2, frequency=3.0),)
    # magnitudes up to the model file's bound (MAX_COEFFICIENT = 1e100)
    coef = rng.normal(size=(3, len(terms))) * 10.0 ** rng.integers(-300, 99, size=(3, len(terms)))
    coef[0, :4] = [0.1 + 0.2, -0.0, 5e-324, np.nextafter(1.0, 2.0)]
    a = rng.normal(size=(3, 3))
    noise = a @ a.T
    s = Surrogate(
        NAMES,
        terms,
        coef,
        kind="quadratic-stochastic",
        noise=noise,
        settings={"prune_below": np.float64(0.05), "degree": np.int64(2)},
        provenance={"data": "sha256:abc"},
    )
    path = tmp_path / "model.json"
    text = s.to_json(path)
    assert path.read_text() == text
    for back in (
        Surrogate.from_json(text),
        Surrogate.from_json(path),
        Surrogate.from_json(str(path)),
    ):
        assert back.coefficients.tobytes() == s.coefficients.tobytes()
        assert back.noise.tobytes() == s.noise.tobytes()
        assert back.terms == s.terms and back.variables == s.variables
        assert back.settings == {"prune_below": 0.05, "degree": 2}
        assert back.fingerprint() == s.fingerprint()
        assert back.to_json() == text
    assert json.loads(text)["format"] == FORMAT


def test_fingerprint_follows_dynamics_not_provenance():
    s = lorenz63_surrogate()
    other = Surrogate(s.variables, s.terms, s.coefficients, provenance={"fitted": "today"})
    assert other.fingerprint() == s.fingerprint()
    coef = s.coefficients.copy()
    coef[0, 1] = np.nextafter(coef[0, 1], 0.0)
    assert s.with_coefficients(coef).fingerprint() != s.fingerprint()
    assert s.with_coefficients(coef).variables == s.variables


def _schema_validator(schema):
    """A JSON Schema validator from whichever reference implementation is installed."""
    try:
        import jsonschema

        jsonschema.Draft202012Validator.check_schema(schema)
        return jsonschema.Draft202012Validator(schema).is_valid
    except ImportError:
        jsonschema_rs = pytest.importorskip("jsonschema_rs")
        return jsonschema_rs.Draft202012Validator(schema).is_valid


def test_model_dict_validates_against_the_packaged_schema():
    schema = json.loads(resources.files("ergodex").joinpath("data/model.schema.json").read_text())
    is_valid = _schema_validator(schema)
    s = lorenz63_surrogate().with_noise(np.eye(3) * 0.5)
    assert is_valid(s.to_dict())
    assert is_valid(json.loads(lorenz63_surrogate().to_json()))
    trig = Surrogate(
        ("a",), (Term("monomial", (1,)), Term("cos", variable=0, frequency=2.0)), [[1.0, 2.0]]
    )
    assert is_valid(trig.to_dict())
    for change in (
        lambda d: d.update(format="ergodex-model/99"),
        lambda d: d.pop("coefficients"),
        lambda d: d["terms"][0].update(powers=[0, -1, 0]),
        lambda d: d.update(extra=1),
    ):
        bad = s.to_dict()
        change(bad)
        assert not is_valid(bad)


def _broken(change) -> str:
    d = lorenz63_surrogate().to_dict()
    change(d)
    return json.dumps(d)


@pytest.mark.parametrize(
    ("change", "field"),
    [
        (lambda d: d.update(format="ergodex-model/9"), "format"),
        (lambda d: d.pop("format"), "format"),
        (lambda d: d.pop("coefficients"), "coefficients"),
        (lambda d: d.pop("terms"), "terms"),
        (lambda d: d.pop("variables"), "variables"),
        (lambda d: d.pop("kind"), "kind"),
        (lambda d: d["coefficients"][1].pop(), r"coefficients\[1\]"),
        (lambda d: d["coefficients"].pop(), "coefficients"),
        (lambda d: d["terms"][4].update(powers=[1, 1]), r"terms\[4\]"),
        (lambda d: d["terms"][2].update(powers=[0, -1, 0]), r"terms\[2\]"),
        (lambda d: d["terms"][2].update(kind="tanh"), r"terms\[2\]"),
        (lambda d: d.update(noise=[[1.0, 0.0], [0.0, 1.0]]), "noise"),
        (lambda d: d.update(noise=[[1.0, 2.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]), "noise"),
        (lambda d: d.update(noise=[[-1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]), "noise"),
        (lambda d: d["coefficients"][0].__setitem__(3, "1.5"), r"coefficients\[0\]\[3\]"),
        (lambda d: d.update(variables=["flow", "flow", "dT_up"]), "variables"),
        (lambda d: d.update(extra_field=1), "extra_field"),
    ],
)
def test_bad_model_files_are_refused_naming_the_field(tmp_path, change, field):
    path = tmp_path / "model.json"
    path.write_text(_broken(change))
    with pytest.raises(ModelFileError, match=field):
        Surrogate.from_json(path)


def test_non_finite_and_unreadable_files_are_refused(tmp_path):
    path = tmp_path / "m.json"
    path.write_text(_broken(lambda d: None).replace("-10.0", "NaN", 1))
    with pytest.raises(ModelFileError, match="NaN"):
        Surrogate.from_json(path)
    path.write_text("{not json")
    with pytest.raises(ModelFileError, match=r"m\.json.*line 1"):
        Surrogate.from_json(path)
    with pytest.raises(ModelFileError, match="no such model file"):
        Surrogate.from_json(tmp_path / "missing.json")


def test_constructor_refuses_bad_values_naming_the_argument():
    s = lorenz63_surrogate()
    coef = s.coefficients.copy()
    coef[2, 3] = np.inf
    with pytest.raises(SettingsError, match="coefficients.*row 2, column 3"):
        s.with_coefficients(coef)
    with pytest.raises(SettingsError, match="coefficients: shape"):
        s.with_coefficients(coef[:, :4])
    with pytest.raises(SettingsError, match="noise.*symmetric"):
        s.with_noise([[1.0, 0.5, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(SettingsError, match="noise.*semi-definite"):
        s.with_noise([[1.0, 2.0, 0.0], [2.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    with pytest.raises(SettingsError, match="states"):
        s.rhs(np.zeros((4, 2)))
    assert not s.is_stochastic and s.with_noise(np.eye(3)).is_stochastic


def test_from_pysindy_matches_the_library_term_by_term():
    ps = pytest.importorskip("pysindy")
    rng = np.random.default_rng(5)
    x = lorenz63_trajectory(5.0, 0.005) / 10.0  # scaled so that the sin/cos terms vary
    x = x + rng.normal(scale=1e-3, size=x.shape)
    library = ps.PolynomialLibrary(degree=3) + ps.FourierLibrary(n_frequencies=2)
    model = ps.SINDy(feature_library=library, optimizer=ps.STLSQ(threshold=0.0, alpha=1e-6))
    model.fit(x, t=0.005, feature_names=list(NAMES))
    s = from_pysindy(model, NAMES)
    # Reference: the library's own feature matrix, column by column.
    theirs = model.feature_library.transform(x[:200])
    ours = s.features(x[:200])
    assert ours.shape == np.asarray(theirs).shape
    for k, name in enumerate(model.feature_library.get_feature_names()):
        np.testing.assert_allclose(
            ours[:, k], np.asarray(theirs)[:, k], rtol=1e-12, atol=1e-12, err_msg=f"feature {name}"
        )
    # And the library's own prediction of dx/dt.
    np.testing.assert_allclose(s.rhs(x[:200]), model.predict(x[:200]), rtol=1e-9, atol=1e-9)
    np.testing.assert_array_equal(s.coefficients, model.coefficients())
    assert s.provenance["fitted_with"] == "pysindy"


def test_from_pysindy_recovers_the_lorenz_equations():
    ps = pytest.importorskip("pysindy")
    x = lorenz63_trajectory(10.0, 0.002)
    model = ps.SINDy(
        feature_library=ps.PolynomialLibrary(degree=2),
        optimizer=ps.STLSQ(threshold=0.5),
        differentiation_method=ps.FiniteDifference(order=4),
    )
    model.fit(x, t=0.002)
    s = from_pysindy(model, NAMES)
    truth = lorenz63_surrogate()
    # Brunton, Proctor & Kutz (2016) recover sigma=10, rho=28, beta=8/3 from clean Lorenz data;
    # with 4th-order differences at dt=0.002 the error is well below 1 % (docs/pysindy-2 notes
    # measured 0.002 absolute in rho at dt=0.01).
    np.testing.assert_allclose(s.coefficients, truth.coefficients, atol=0.05)
    assert np.count_nonzero(s.coefficients) == 7


def test_from_pysindy_refuses_unsupported_terms():
    ps = pytest.importorskip("pysindy")
    rng = np.random.default_rng(6)
    x = rng.normal(size=(300, 2))
    library = ps.CustomLibrary(
        library_functions=[lambda v: np.tanh(v)], function_names=[lambda v: f"tanh({v})"]
    )
    model = ps.SINDy(feature_library=library, optimizer=ps.STLSQ(threshold=0.0))
    model.fit(x, t=0.01)
    with pytest.raises(SettingsError, match=r"tanh\(x0\)"):
        from_pysindy(model, ("a", "b"))
    with pytest.raises(SettingsError, match="fitted on 2 variables"):
        from_pysindy(model, ("a", "b", "c"))


def _hidden_level_surrogate(rng: np.random.Generator, observed=("mode_1", "mode_2")):
    """Two PCA modes of five data columns plus two hidden variables (a memory level)."""
    from ergodex.model_space import PCA

    mixing = rng.normal(size=(5, 5))
    X = rng.normal(size=(400, 5)) @ mixing + rng.normal(size=5)
    pca = PCA(2).fit(X, names=[f"s{j}" for j in range(5)])
    variables = ("mode_1", "mode_2", "r_mode_1", "r_mode_2")
    terms = polynomial_terms(4, 2)
    coef = rng.normal(size=(4, len(terms)))
    a = rng.normal(size=(2, 2))
    noise = np.zeros((4, 4))
    noise[2:, 2:] = a @ a.T
    settings = {"observed_variables": list(observed), "hidden_variables": ["r_mode_1", "r_mode_2"]}
    return (
        X,
        pca,
        Surrogate(
            variables,
            terms,
            coef,
            kind="polynomial-emr",
            noise=noise,
            transform=pca,
            settings=settings,
        ),
    )


def test_hidden_variables_beside_a_transform_round_trip_exactly(tmp_path):
    # A transform may feed fewer model variables than the model has when the rest are hidden
    # and settings.observed_variables names the transform's outputs; the JSON round trip of
    # floats is exact (Python's shortest repr reads back to the same double, IEEE 754 / PEP 3101).
    rng = np.random.default_rng(41)
    _X, pca, s = _hidden_level_surrogate(rng)
    path = tmp_path / "model.json"
    text = s.to_json(path)
    back = Surrogate.from_json(path)
    assert back.coefficients.tobytes() == s.coefficients.tobytes()
    assert back.noise.tobytes() == s.noise.tobytes()
    assert back.transform.to_dict() == pca.to_dict()
    assert back.observed_variables == ("mode_1", "mode_2")
    assert back.fingerprint() == s.fingerprint()
    assert back.to_json() == text


def test_hidden_variables_map_to_data_space_through_observed_columns_only():
    # to_data_space of full model states must equal the PCA inverse (Z @ components + mean,
    # Jolliffe, Principal Component Analysis, 2002, §3.5) of the observed columns alone: the
    # hidden columns are set to huge values, which must not leak into data space.
    rng = np.random.default_rng(42)
    X, pca, s = _hidden_level_surrogate(rng)
    Z_obs = s.to_model_space(X[:50])
    assert Z_obs.shape == (50, 2)
    full = np.column_stack([Z_obs, np.full((50, 2), 1e6)])
    expected = Z_obs @ pca.components_ + pca.mean_
    np.testing.assert_allclose(s.to_data_space(full), expected, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(s.to_data_space(Z_obs), expected, rtol=1e-12, atol=1e-9)


@pytest.mark.parametrize(
    "observed, message",
    [
        (("mode_1", "r_x"), "'r_x' is not a model variable"),
        (("mode_2", "mode_1"), "must be the transform's outputs in its order"),
        (("mode_1",), "must be the transform's outputs"),
    ],
)
def test_wrong_observed_variables_beside_a_transform_are_refused(observed, message):
    rng = np.random.default_rng(43)
    with pytest.raises(SettingsError, match=f"settings.observed_variables: .*{message}"):
        _hidden_level_surrogate(rng, observed=observed)


def test_wrong_observed_variables_in_a_model_file_name_the_field():
    rng = np.random.default_rng(44)
    _, _, s = _hidden_level_surrogate(rng)
    d = s.to_dict()
    d["settings"]["observed_variables"] = ["mode_1", "nope"]
    with pytest.raises(
        ModelFileError, match="model JSON: field settings.observed_variables: 'nope'"
    ):
        Surrogate.from_json(json.dumps(d))
    del d["settings"]["observed_variables"]
    with pytest.raises(ModelFileError, match="settings.observed_variables"):
        Surrogate.from_json(json.dumps(d))


def test_hidden_variables_without_a_transform_are_dropped_in_data_space():
    # A memory level beside the data variables themselves (no transform): data space is the
    # observed columns, in settings.observed_variables order, whatever the hidden ones hold.
    rng = np.random.default_rng(45)
    variables = ("x", "r_y", "y", "r_x")
    terms = polynomial_terms(4, 1)
    s = Surrogate(
        variables,
        terms,
        rng.normal(size=(4, len(terms))),
        settings={"observed_variables": ["y", "x"]},
    )
    assert s.observed_variables == ("y", "x")
    full = rng.normal(size=(3, 7, 4))
    np.testing.assert_array_equal(s.to_data_space(full), full[..., [2, 0]])
    observed_only = full[..., [2, 0]]
    np.testing.assert_array_equal(s.to_data_space(observed_only), observed_only)
    # without hidden variables the map stays the identity
    plain = Surrogate(variables, terms, s.coefficients)
    np.testing.assert_array_equal(plain.to_data_space(full), full)
    # a name that is not a model variable cannot be mapped
    odd = Surrogate(variables, terms, s.coefficients, settings={"observed_variables": ["x", "z"]})
    with pytest.raises(
        SettingsError, match="settings.observed_variables: 'z' is not a model variable"
    ):
        odd.to_data_space(full)
