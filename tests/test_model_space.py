"""Tests of the data-space <-> model-space transforms."""

from __future__ import annotations

import json

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
from ergodex.scenarios import station_ring
from ergodex.series import Series


@pytest.fixture(scope="module")
def ring():
    return station_ring(seed=3, n_runs=2, duration=40.0)


@pytest.mark.parametrize("fraction", [0.5, 0.8, 0.95])
def test_pca_keeps_the_asked_variance_and_round_trips_within_it(ring, fraction):
    X = ring.stacked()
    pca = PCA(variance_fraction=fraction).fit(ring)
    kept = pca.explained_variance_ratio_.sum()
    assert kept >= fraction
    # fewest modes: one fewer would not reach the fraction
    assert kept - pca.explained_variance_ratio_[-1] < fraction
    # Reference: scikit-learn's ratios are eigenvalues of the sample covariance over its trace.
    eig = np.sort(np.linalg.eigvalsh(np.cov(X.T)))[::-1]
    np.testing.assert_allclose(
        pca.explained_variance_ratio_, eig[: pca.n_modes_] / eig.sum(), rtol=1e-8
    )
    recon = pca.inverse(pca.forward(X))
    lost = np.sum((X - recon) ** 2) / np.sum((X - X.mean(axis=0)) ** 2)
    # The round trip loses exactly the variance not kept (orthogonal projection).
    assert lost == pytest.approx(1 - kept, rel=1e-8, abs=1e-12)
    assert lost <= 1 - fraction + 1e-12


def test_pca_with_n_modes_and_names(ring):
    pca = PCA(4).fit(ring)
    assert pca.output_names == ("mode_1", "mode_2", "mode_3", "mode_4")
    assert pca.input_names == ring.names
    Z = pca.forward(ring.runs[0])
    # mode amplitudes are uncorrelated with decreasing variance (definition of PCA)
    c = np.cov(pca.forward(ring.stacked()).T)
    assert np.all(np.abs(c - np.diag(np.diag(c))) < 1e-8 * c.max())
    assert Z.shape == (ring.lengths[0], 4)


def test_delay_embedding_round_trips_exactly():
    rng = np.random.default_rng(5)
    X = rng.normal(size=(50, 2))
    d = DelayEmbedding(3, delay=4).fit(X, names=["flow", "dT_up"])
    Z = d.forward(X)
    assert Z.shape == (50 - 8, 6)
    np.testing.assert_array_equal(d.inverse(Z), X[8:])
    # the lagged block at row t holds the values delay*j samples earlier
    np.testing.assert_array_equal(Z[:, 2:4], X[4:46])
    np.testing.assert_array_equal(Z[:, 4:6], X[0:42])
    assert d.output_names == ("flow", "dT_up", "flow_lag4", "dT_up_lag4", "flow_lag8", "dT_up_lag8")


def test_delay_embedding_of_a_series_never_spans_runs():
    rng = np.random.default_rng(6)
    s = Series.from_arrays([rng.normal(size=(20, 1)), rng.normal(size=(15, 1))], ["x"], 0.1)
    d = DelayEmbedding(2, delay=3).fit(s)
    e = transform_series(d, s)
    assert e.lengths == (17, 12)
    np.testing.assert_array_equal(e.runs[1][:, 1], s.runs[1][:12, 0])


def test_dict_round_trip_is_exact_through_json(ring):
    X = ring.stacked()
    chain = Chain([Standardise(), PCA(variance_fraction=0.7)]).fit(ring)
    text = json.dumps(chain.to_dict())
    back = transform_from_dict(json.loads(text))
    np.testing.assert_array_equal(back.forward(X), chain.forward(X))
    np.testing.assert_array_equal(back.inverse(chain.forward(X)), chain.inverse(chain.forward(X)))
    assert back.output_names == chain.output_names and back.input_names == ring.names
    for t in (Standardise(with_mean=False).fit(X), DelayEmbedding(2).fit(X)):
        again = transform_from_dict(json.loads(json.dumps(t.to_dict())))
        np.testing.assert_array_equal(again.forward(X), t.forward(X))


def test_surrogate_carries_its_transform(ring):
    surrogate_mod = pytest.importorskip("ergodex.surrogate")
    pca = PCA(2).fit(ring)
    terms = surrogate_mod.polynomial_terms(2, 1)
    s = surrogate_mod.Surrogate(pca.output_names, terms, np.zeros((2, len(terms))), transform=pca)
    back = surrogate_mod.Surrogate.from_json(s.to_json())
    X = ring.runs[0][:10]
    np.testing.assert_array_equal(back.to_model_space(X), pca.forward(X))


def test_errors():
    rng = np.random.default_rng(7)
    X = rng.normal(size=(10, 3))
    with pytest.raises(NotFittedError, match="not fitted"):
        PCA(2).forward(X)
    with pytest.raises(SettingsError, match="exactly one of n_modes and variance_fraction"):
        PCA().fit(X)
    with pytest.raises(SettingsError, match="variance_fraction must be a number in"):
        PCA(variance_fraction=1.5).fit(X)
    with pytest.raises(SettingsError, match="n_modes=5 exceeds"):
        PCA(5).fit(X[:, :2])
    with pytest.raises(DataError, match="expects 3 columns, got 2"):
        Standardise().fit(X).forward(X[:, :2])
    with pytest.raises(DataError, match="too short"):
        DelayEmbedding(5, delay=3).fit(X)
    with pytest.raises(ModelFileError, match="unknown transform kind 'warp'"):
        transform_from_dict({"kind": "warp", "input_names": ["a"]})
    with pytest.raises(ModelFileError, match="missing field 'scale'"):
        transform_from_dict({"kind": "standardise", "input_names": ["a"], "mean": [0.0]})
    with pytest.raises(ModelFileError, match="'components' has shape"):
        transform_from_dict(
            {
                "kind": "pca",
                "input_names": ["a", "b"],
                "mean": [0, 0],
                "components": [[1.0, 0.0, 0.0]],
                "explained_variance": [1.0],
                "explained_variance_ratio": [1.0],
            }
        )
