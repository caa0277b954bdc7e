"""Transforms: documented conventions, edge cases and the model-file checks, one behaviour at a
time (each found missing by a mutation run, ``benchmarks/mutation.py transforms``)."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

from ergodex.exceptions import DataError, ModelFileError, NotFittedError, SettingsError
from ergodex.model_space import (
    PCA,
    Chain,
    DelayEmbedding,
    Standardise,
    transform_from_dict,
    transform_series,
)
from ergodex.series import Series


def _exact(message: str) -> str:
    return "^" + re.escape(message) + "$"


# -- Standardise ---------------------------------------------------------------------------------


def test_standardise_without_mean_or_scale():
    rng = np.random.default_rng(1)
    X = rng.normal(3.0, 2.0, (200, 2))
    # docstring: centre on the mean, divide by the population standard deviation (ddof=0,
    # numpy's default); each half can be switched off
    only_scale = Standardise(with_mean=False).fit(X)
    np.testing.assert_allclose(only_scale.forward(X), X / np.std(X, axis=0), rtol=1e-13)
    only_mean = Standardise(with_scale=False).fit(X)
    np.testing.assert_allclose(only_mean.forward(X), X - np.mean(X, axis=0), rtol=1e-13)
    both = Standardise().fit(X)
    np.testing.assert_allclose(both.inverse(both.forward(X)), X, rtol=1e-13)
    assert both.to_dict() == {
        "kind": "standardise",
        "input_names": ["x1", "x2"],  # the names given to unnamed columns
        "with_mean": True,
        "with_scale": True,
        "mean": np.mean(X, axis=0).tolist(),
        "scale": np.std(X, axis=0).tolist(),
    }


def test_standardise_refuses_a_constant_column_and_non_boolean_settings():
    X = np.column_stack([np.arange(5.0), np.full(5, 2.0)])
    with pytest.raises(DataError, match=_exact("column 2 is constant; it cannot be standardised")):
        Standardise().fit(X)
    Standardise(with_scale=False).fit(X)  # no division, so a constant column is fine
    with pytest.raises(SettingsError, match=_exact("with_mean must be True or False, got 1")):
        Standardise(with_mean=1).fit(X)  # type: ignore[arg-type]
    with pytest.raises(SettingsError, match=_exact("with_scale must be True or False, got 'no'")):
        Standardise(with_scale="no").fit(X)  # type: ignore[arg-type]


def test_standardise_from_a_dictionary_checks_its_fields():
    good = {"kind": "standardise", "input_names": ["a"], "mean": [1.0], "scale": [2.0]}
    t = transform_from_dict(good)  # with_mean / with_scale default to True when absent
    assert t.with_mean is True and t.with_scale is True
    np.testing.assert_array_equal(t.forward([[5.0]]), [[2.0]])
    for change, message in [
        ({"scale": [0.0]}, "transform field 'scale' must be positive"),
        ({"scale": [-1.0]}, "transform field 'scale' must be positive"),
        ({"mean": [1.0, 2.0]}, "transform field 'mean' has shape (2,), expected (1,)"),
        ({"mean": ["a"]}, "transform field 'mean' must be numbers"),
        ({"scale": [float("inf")]}, "transform field 'scale' has non-finite values"),
        ({"mean": None}, "transform field 'mean' has shape (), expected (1,)"),
    ]:
        with pytest.raises(ModelFileError, match=_exact(message)):
            transform_from_dict(good | change)


# -- PCA -------------------------------------------------------------------------------------------


def test_pca_projection_equals_scikit_learns():
    from sklearn.decomposition import PCA as SkPCA

    rng = np.random.default_rng(2)
    X = rng.normal(size=(300, 4)) @ rng.normal(size=(4, 4))
    ours = PCA(2).fit(X)
    ref = SkPCA(2, svd_solver="full").fit(X)  # reference library: z = (x - mean) V^T
    np.testing.assert_allclose(ours.forward(X), ref.transform(X), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(
        ours.inverse(ours.forward(X)), ref.inverse_transform(ref.transform(X))
    )
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_)
    np.testing.assert_allclose(ours.explained_variance_ratio_, ref.explained_variance_ratio_)
    assert ours.n_modes_ == 2 and ours.output_names == ("mode_1", "mode_2")


def test_pca_variance_fraction_keeps_the_fewest_modes_that_reach_it():
    # two orthogonal directions with sums of squares 3 and 1 (by construction): the first mode
    # explains exactly 3/4 of the variance (up to the rounding of sqrt(3)**2)
    a = np.sqrt(3.0)
    X = np.array([[a, 0.0], [-a, 0.0], [0.0, 1.0], [0.0, -1.0]])
    assert PCA(variance_fraction=0.75).fit(X).n_modes_ == 1
    assert PCA(variance_fraction=0.7500001).fit(X).n_modes_ == 2
    assert PCA(variance_fraction=0.5).fit(X).n_modes_ == 1
    assert PCA(variance_fraction=1.0).fit(X).n_modes_ == 2
    d = PCA(variance_fraction=0.75).fit(X).to_dict()
    assert d["n_modes"] is None and d["variance_fraction"] == 0.75
    assert PCA(np.int64(2)).fit(X).to_dict()["n_modes"] == 2


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda: PCA(0), "n_modes must be an integer >= 1, got 0"),
        (lambda: PCA(True), "n_modes must be an integer >= 1, got True"),
        (lambda: PCA(1.0), "n_modes must be an integer >= 1, got 1.0"),
        (
            lambda: PCA(2, variance_fraction=0.5),
            "give exactly one of n_modes and variance_fraction",
        ),
        (lambda: PCA(variance_fraction=0), "variance_fraction must be a number in (0, 1], got 0"),
        (
            lambda: PCA(variance_fraction=True),
            "variance_fraction must be a number in (0, 1], got True",
        ),
        (
            lambda: PCA(variance_fraction="1"),
            "variance_fraction must be a number in (0, 1], got '1'",
        ),
        (lambda: PCA(4), "n_modes=4 exceeds min(n_samples, n_variables) = 3"),
    ],
)
def test_pca_settings_are_checked(make, message):
    X = np.random.default_rng(3).normal(size=(10, 3))
    with pytest.raises(SettingsError, match=_exact(message)):
        make().fit(X)


def test_pca_with_as_many_modes_as_variables_round_trips():
    X = np.random.default_rng(4).normal(size=(10, 3))
    t = PCA(3).fit(X)
    np.testing.assert_allclose(t.inverse(t.forward(X)), X, atol=1e-12)
    assert PCA(1).fit(X).n_modes_ == 1


def test_pca_from_a_dictionary_checks_shapes():
    X = np.random.default_rng(5).normal(size=(20, 2))
    good = PCA(1).fit(X).to_dict()
    back = transform_from_dict(good)
    assert back.n_modes_ == 1 and back.n_modes == 1
    np.testing.assert_array_equal(back.forward(X), PCA(1).fit(X).forward(X))
    for change, message in [
        (
            {"components": [[1.0, 0.0, 0.0]]},
            "transform field 'components' has shape (1, 3), expected (n_modes, 2)",
        ),
        (
            {"components": [1.0, 0.0]},
            "transform field 'components' has shape (2,), expected (n_modes, 2)",
        ),
        (
            {"explained_variance": [1.0, 2.0]},
            "transform field 'explained_variance' has shape (2,), expected (1,)",
        ),
        (
            {"explained_variance_ratio": []},
            "transform field 'explained_variance_ratio' has shape (0,), expected (1,)",
        ),
        ({"mean": [0.0]}, "transform field 'mean' has shape (1,), expected (2,)"),
    ]:
        with pytest.raises(ModelFileError, match=_exact(message)):
            transform_from_dict(good | change)


# -- DelayEmbedding --------------------------------------------------------------------------------


def test_one_copy_is_no_embedding():
    X = np.random.default_rng(6).normal(size=(7, 2))
    t = DelayEmbedding(1, delay=5).fit(X, names=["a", "b"])
    assert t.rows_lost == 0 and t.output_names == ("a", "b")
    np.testing.assert_array_equal(t.forward(X), X)


def test_delay_run_length_boundary_and_messages():
    # 3 copies 4 samples apart lose (3 - 1) * 4 = 8 rows (docstring): 9 samples give one row
    t = DelayEmbedding(3, delay=4)
    X = np.arange(18.0).reshape(9, 2)
    Z = t.fit(X).forward(X)
    np.testing.assert_array_equal(Z, [[16.0, 17.0, 8.0, 9.0, 0.0, 1.0]])
    assert t.rows_lost == 8
    with pytest.raises(
        DataError,
        match=_exact(
            "a run of 8 samples is too short for 3 delays of 4 samples (needs more than 8)"
        ),
    ):
        DelayEmbedding(3, delay=4).fit(X[:8])
    with pytest.raises(DataError, match=_exact("8 rows are too few for 3 delays of 4 samples")):
        t.forward(X[:8])


@pytest.mark.parametrize(
    "kwargs, message",
    [
        ({"n_delays": 0}, "n_delays must be an integer >= 1, got 0"),
        ({"n_delays": True}, "n_delays must be an integer >= 1, got True"),
        ({"n_delays": 2.0}, "n_delays must be an integer >= 1, got 2.0"),
        ({"delay": 0}, "delay must be an integer >= 1, got 0"),
        ({"delay": False}, "delay must be an integer >= 1, got False"),
    ],
)
def test_delay_settings_are_checked(kwargs, message):
    with pytest.raises(SettingsError, match=_exact(message)):
        DelayEmbedding(**kwargs).fit(np.zeros((10, 1)))
    d = {"kind": "delay", "input_names": ["a"], "n_delays": 2, "delay": 1} | kwargs
    with pytest.raises(ModelFileError, match=_exact(message)):
        transform_from_dict(d)


def test_delay_dictionary_layout():
    t = DelayEmbedding(3, delay=np.int64(2)).fit(np.zeros((10, 1)), names=["h"])
    d = t.to_dict()
    assert d == {"kind": "delay", "input_names": ["h"], "n_delays": 3, "delay": 2}
    assert type(d["delay"]) is int  # JSON-able
    back = transform_from_dict(json.loads(json.dumps(d)))
    assert back.output_names == ("h", "h_lag2", "h_lag4") and back.rows_lost == 4


# -- Chain ---------------------------------------------------------------------------------------


def test_chain_of_delay_and_pca_loses_the_delay_rows_and_inverts_backwards():
    rng = np.random.default_rng(7)
    X = rng.normal(size=(40, 2))
    chain = Chain([DelayEmbedding(2, delay=3), Standardise()]).fit(X, names=["a", "b"])
    assert chain.rows_lost == 3
    assert chain.output_names == ("a", "b", "a_lag3", "b_lag3")
    Z = chain.forward(X)
    assert Z.shape == (37, 4)
    # inverse undoes the standardisation first, then keeps the undelayed block
    np.testing.assert_allclose(chain.inverse(Z), X[3:], rtol=1e-12, atol=1e-12)


def test_chain_settings_are_checked():
    X = np.zeros((5, 1))
    message = "steps must be a non-empty list of transforms"
    for steps in ([], [Standardise(), "pca"]):
        with pytest.raises(SettingsError, match=_exact(message)):
            Chain(steps).fit(X)  # type: ignore[list-item]
    with pytest.raises(SettingsError, match=_exact("delay must be an integer >= 1, got 0")):
        Chain([Standardise(with_scale=False), DelayEmbedding(2, delay=0)]).fit(X)


def test_chain_from_a_dictionary_checks_its_steps():
    X = np.random.default_rng(8).normal(size=(30, 2))
    good = Chain([Standardise(), PCA(1)]).fit(X, names=["a", "b"]).to_dict()
    assert [s["kind"] for s in good["steps"]] == ["standardise", "pca"]
    pca = good["steps"][1]
    for change, message in [
        ({"steps": []}, "transform field 'steps' must be a non-empty list"),
        ({"steps": {"a": 1}}, "transform field 'steps' must be a non-empty list"),
        ({"input_names": ["a"]}, "the first step's inputs differ from the chain's"),
        (
            {"steps": [good["steps"][0], pca | {"input_names": ["a", "c"]}]},
            "chain step 'pca' expects inputs ['a', 'c'], the step before gives ['a', 'b']",
        ),
    ]:
        with pytest.raises(ModelFileError, match=_exact(message)):
            transform_from_dict(good | change)


# -- the dictionary form and the shared checks ---------------------------------------------------


def test_transform_dictionaries_are_checked():
    names = "transform field 'input_names' must be a non-empty list of strings"
    delay = {"kind": "delay", "n_delays": 2, "delay": 1}
    for d, message in [
        (["standardise"], "a transform must be an object, got list"),
        (delay, names),
        (delay | {"input_names": []}, names),
        (delay | {"input_names": ["a", 1]}, names),
        (delay | {"input_names": "ab"}, names),
        (
            {"kind": "delay", "input_names": ["a"], "n_delays": 2},
            "delay transform is missing field 'delay'",
        ),
    ]:
        with pytest.raises(ModelFileError, match=_exact(message)):
            transform_from_dict(d)
    with pytest.raises(ModelFileError, match=r"^unknown transform kind None; known: standardise, "):
        transform_from_dict({"input_names": ["a"]})


def test_array_inputs_names_and_shapes():
    t = Standardise().fit(np.array([1.0, 2.0, 4.0]))  # a 1-D array is one variable
    # by hand: mean 7/3, population sd sqrt(42/27); (x - 7/3) / sqrt(42/27)
    assert t.input_names == ("x1",) and t.n_inputs == 1 and t.n_outputs == 1
    np.testing.assert_allclose(
        t.forward([1.0, 2.0, 4.0]).ravel(), [-1.069044968, -0.267261242, 1.336306210]
    )
    with pytest.raises(DataError, match=_exact("names has 1 entries, X has 2 columns")):
        Standardise().fit(np.ones((3, 2)), names=["a"])
    with pytest.raises(
        DataError, match=_exact("X must be 2-D (n_samples, n_variables), got shape (2, 2, 2)")
    ):
        Standardise().fit(np.ones((2, 2, 2)))
    p = PCA(1).fit(np.random.default_rng(9).normal(size=(10, 2)))
    with pytest.raises(DataError, match=_exact("pca transform inverse expects 1 columns, got 2")):
        p.inverse(np.zeros((3, 2)))
    with pytest.raises(DataError, match=_exact("pca transform expects 2 columns, got 1")):
        p.forward(np.zeros((3, 1)))
    with pytest.raises(
        NotFittedError, match=_exact("this delay transform is not fitted; call fit first")
    ):
        DelayEmbedding().to_dict()
    with pytest.raises(NotFittedError):
        _ = Standardise().output_names
    assert Standardise().rows_lost == 0 and PCA(1).rows_lost == 0


def test_transform_series_keeps_the_series_attributes():
    rng = np.random.default_rng(10)
    s = Series.from_arrays(
        [rng.normal(size=(12, 2)), rng.normal(size=(9, 2))],
        ["u", "v"],
        0.25,
        run_labels=["r1", "r2"],
        source="loop.csv",
        time_unit="s",
    )
    t = DelayEmbedding(2, delay=2).fit(s)
    out = transform_series(t, s)
    assert out.names == ("u", "v", "u_lag2", "v_lag2") and out.lengths == (10, 7)
    assert out.dt == 0.25 and out.run_labels == s.run_labels and out.source == "loop.csv"
    assert out.time_unit == "s"
    other = Series.from_arrays([rng.normal(size=(12, 2))], ["u", "w"], 0.25, source="b.csv")
    with pytest.raises(
        DataError,
        match=_exact("b.csv: variables ['u', 'w'] differ from the transform's inputs ['u', 'v']"),
    ):
        transform_series(t, other)


def test_settings_show_in_repr():
    # scikit-learn-shaped estimators show their settings (common practice, no source)
    assert repr(Standardise(with_mean=False)) == "Standardise(with_mean=False, with_scale=True)"
    assert repr(PCA(2)) == "PCA(n_modes=2, variance_fraction=None)"
    assert repr(DelayEmbedding()) == "DelayEmbedding(n_delays=2, delay=1)"
    assert (
        repr(Chain([PCA(variance_fraction=0.9)]))
        == "Chain([PCA(n_modes=None, variance_fraction=0.9)])"
    )


def test_pca_has_no_default_size():
    # PCA docstring: "Give exactly one of n_modes and variance_fraction" — neither is assumed
    assert PCA().n_modes is None and PCA().variance_fraction is None
    with pytest.raises(
        SettingsError, match=_exact("give exactly one of n_modes and variance_fraction")
    ):
        PCA().fit(np.eye(3))


def test_dictionary_round_trips_keep_every_setting():
    rng = np.random.default_rng(12)
    X = rng.normal(size=(40, 2))
    t = Standardise(with_mean=False, with_scale=False).fit(X, names=["a", "b"])
    back = transform_from_dict(json.loads(json.dumps(t.to_dict())))
    assert (back.with_mean, back.with_scale) == (False, False)
    p = PCA(variance_fraction=0.75).fit(X, names=["a", "b"])
    back_p = transform_from_dict(json.loads(json.dumps(p.to_dict())))
    assert back_p.variance_fraction == 0.75 and back_p.n_modes is None
    good = {"kind": "standardise", "input_names": ["a"], "mean": [1.0], "scale": [0.5]}
    assert transform_from_dict(good).scale_.tolist() == [0.5]  # any positive scale
    for change, message in [
        ({"scale": [1.0, 2.0]}, "transform field 'scale' has shape (2,), expected (1,)"),
        ({"scale": "x"}, "transform field 'scale' must be numbers"),
    ]:
        with pytest.raises(ModelFileError, match=_exact(message)):
            transform_from_dict(good | change)
    bad = p.to_dict() | {"components": [["a", "b"]]}
    with pytest.raises(
        ModelFileError, match=_exact("transform field 'components' must be numbers")
    ):
        transform_from_dict(bad)


def test_chains_of_three_steps_and_of_steps_of_different_widths():
    rng = np.random.default_rng(13)
    X = rng.normal(size=(60, 2))
    chain = Chain([Standardise(), DelayEmbedding(2), PCA(2)]).fit(X, names=["a", "b"])
    assert chain.output_names == ("mode_1", "mode_2")  # the last step's names
    assert repr(Chain([Standardise(), PCA(2)])) == (
        "Chain([Standardise(with_mean=True, with_scale=True), "
        "PCA(n_modes=2, variance_fraction=None)])"
    )
    # 2 inputs → 4 delay coordinates → 1 mode: the chain's inputs are the first step's
    narrow = Chain([DelayEmbedding(2), PCA(1)]).fit(X, names=["a", "b"])
    back = transform_from_dict(json.loads(json.dumps(narrow.to_dict())))
    np.testing.assert_array_equal(back.forward(X), narrow.forward(X))


def test_integer_data_are_handled_as_floats():
    # the Transform base class hands every kind 2-D float arrays (module docstring, point 3)
    X = np.arange(12).reshape(6, 2)
    Z = DelayEmbedding(2).fit(X).forward(X)
    assert Z.dtype == np.float64


def test_a_series_without_a_source_is_called_series_in_messages():
    t = Standardise().fit(np.random.default_rng(14).normal(size=(10, 1)), names=["u"])
    s = Series.from_arrays([np.random.default_rng(15).normal(size=(10, 1))], ["w"], 0.1)
    with pytest.raises(DataError, match=r"^series: variables \['w'\] differ"):
        transform_series(t, s)
