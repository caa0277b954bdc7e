"""One contract, every fitter: same inputs, same invariants (scikit-learn's common-test idea)."""

from __future__ import annotations

import copy

import numpy as np
import pytest

from ergodex.exceptions import NotFittedError, SettingsError
from ergodex.fitting import FITTERS, Fitter, make_fitter
from ergodex.series import Series
from ergodex.surrogate import Surrogate


@pytest.fixture(scope="module")
def series():
    # A stable, weakly nonlinear 2-variable system with noise, simulated with Euler–Maruyama:
    # every fitter can fit it (the LIM sees a stationary process, the sparse fitter smooth
    # dynamics).
    rng = np.random.default_rng(40)
    dt, n = 0.05, 4000
    runs = []
    for _ in range(3):
        x = rng.normal(size=2)
        out = np.empty((n, 2))
        for k in range(n):
            drift = np.array([-x[0] + 0.5 * x[1], -0.5 * x[0] - 0.8 * x[1] - 0.1 * x[0] ** 2])
            x = x + drift * dt + 0.3 * np.sqrt(dt) * rng.normal(size=2)
            out[k] = x
        runs.append(out)
    return Series.from_arrays(runs, ("u", "v"), dt, source="contract-data")


@pytest.mark.parametrize("method", list(FITTERS))
def test_contract(method, series):
    cls = FITTERS[method]
    fitter = make_fitter(method, {})
    assert isinstance(fitter, Fitter) and type(fitter) is cls

    # 1. learned state before fit → NotFittedError (an AttributeError)
    with pytest.raises(NotFittedError, match="before fit"):
        _ = fitter.surrogate_
    with pytest.raises(NotFittedError):
        _ = fitter.score_

    # 2. every documented setting is in the table and the constructor, and the defaults pass
    params = fitter.get_params()
    assert set(params) == set(cls.settings_table)
    fitter.check_params()

    # 3. fit returns self and changes no setting
    before = copy.deepcopy(params)
    assert fitter.fit(series) is fitter
    assert fitter.get_params() == before

    # 4. the surrogate's shapes and provenance
    surrogate = fitter.surrogate_
    assert isinstance(surrogate, Surrogate)
    assert surrogate.coefficients.shape == (surrogate.n_variables, surrogate.n_terms)
    assert surrogate.n_variables >= series.n_variables or surrogate.transform is not None
    assert surrogate.settings["method"] == method
    assert surrogate.provenance["data_fingerprint"] == series.fingerprint()
    # the model-space range of the training data, which ergodex simulate bounds members with
    # (no transform by default: the data's own range, computed here with numpy)
    assert surrogate.transform is None
    stacked = series.stacked()
    assert surrogate.provenance["model_range"] == {
        name: [float(stacked[:, j].min()), float(stacked[:, j].max())]
        for j, name in enumerate(series.names)
    }
    assert np.all(np.isfinite(surrogate.rhs(np.zeros((4, surrogate.n_variables)))))
    assert np.isfinite(fitter.score_) and np.isfinite(fitter.tendency_error_)
    assert fitter.n_terms_ >= 1

    # 5. the surrogate survives its JSON round trip unchanged
    assert Surrogate.from_json(surrogate.to_json()) == surrogate

    # 6. fitting again gives the same model (no hidden randomness)
    again = make_fitter(method, {}).fit(series)
    np.testing.assert_array_equal(again.surrogate_.coefficients, surrogate.coefficients)

    # 7. an unknown setting is refused, naming the key
    with pytest.raises(SettingsError, match=f"{method} has no setting 'no_such_key'"):
        make_fitter(method, {"no_such_key": 1})


@pytest.mark.parametrize("method", list(FITTERS))
def test_fitters_are_scikit_learn_estimators(method, series):
    """scikit-learn's own tools work on every fitter: clone, check_is_fitted, params, display."""
    from sklearn.base import BaseEstimator, clone
    from sklearn.exceptions import NotFittedError as SklearnNotFitted
    from sklearn.utils.validation import check_is_fitted

    fitter = make_fitter(method, {})
    assert isinstance(fitter, BaseEstimator)
    with pytest.raises(SklearnNotFitted):
        check_is_fitted(fitter)
    # clone builds a new unfitted fitter with the same settings (its identity check passes only
    # when get_params(deep) hands back the stored objects)
    first = sorted(fitter.get_params(deep=True))
    twin = clone(fitter)
    assert twin is not fitter and twin.get_params(deep=False) == fitter.get_params(deep=False)
    assert sorted(twin.get_params()) == first == sorted(cls_settings(method))
    # set_params still checks against the table (stricter than scikit-learn)
    with pytest.raises(SettingsError, match="no setting 'nope'"):
        twin.set_params(nope=1)

    fitter.fit(series)
    check_is_fitted(fitter)  # raises if not fitted
    refit = clone(fitter)  # settings only: the clone is not fitted
    assert not refit.is_fitted
    with pytest.raises(SklearnNotFitted):
        check_is_fitted(refit)
    # the notebook display and the short repr
    html = fitter._repr_html_()
    assert type(fitter).__name__ in html
    assert len(repr(fitter)) < 120


def cls_settings(method):
    return FITTERS[method].settings_table


def test_fit_accepts_a_dataframe_reports_progress_and_logs_its_substeps(series, caplog):
    pd = pytest.importorskip("pandas")
    rows = [
        pd.DataFrame(
            {"run": str(i), "time": np.arange(len(r)) * series.dt, "u": r[:, 0], "v": r[:, 1]}
        )
        for i, r in enumerate(series.runs)
    ]
    frame = pd.concat(rows, ignore_index=True)
    calls = []
    with caplog.at_level("INFO", logger="ergodex.fitting"):
        fitter = make_fitter("sparse", {}).fit(frame, progress=lambda d, t: calls.append((d, t)))
    assert fitter.surrogate_.provenance["data_fingerprint"] == series.fingerprint()
    total = len(FITTERS["sparse"].fit_stages) + 1
    assert calls[-1] == (total, total)
    assert [d for d, _ in calls] == sorted(d for d, _ in calls) and len(calls) >= 2
    messages = [r.getMessage() for r in caplog.records]
    assert any("sparse regression" in m for m in messages)
    assert any(m.startswith("fit sparse done") for m in messages)
