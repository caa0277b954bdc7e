"""The fitter table, make_fitter, settings checks and fit-settings files."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.exceptions import DataError, NotFittedError, SettingsError
from ergodex.fitting import FITTERS, Fitter, load_fit_settings, make_fitter
from ergodex.fitting.base import check_series
from ergodex.series import Series


def test_table_lists_the_four_methods():
    assert list(FITTERS) == [
        "sparse",
        "linear-inverse",
        "quadratic-noise",
        "calibrated-linear-inverse",
    ]
    for name in FITTERS:
        assert issubclass(FITTERS[name], Fitter)
        assert FITTERS[name].method == name


def test_unknown_method_is_named_with_the_allowed_ones():
    with pytest.raises(
        SettingsError, match=r"unknown fit method 'sindy'.*sparse, linear-inverse, quadratic-noise"
    ):
        make_fitter("sindy", {})


def test_unknown_key_is_named_with_the_allowed_ones():
    with pytest.raises(
        SettingsError, match=r"sparse has no setting 'treshold'; allowed settings: .*prune_below"
    ):
        make_fitter("sparse", {"treshold": 0.1})


@pytest.mark.parametrize(
    "settings, message",
    [
        ({"degree": -1}, r"'degree' must be an integer >= 0"),
        ({"degree": 2.5}, r"'degree' must be an integer"),
        ({"prune_below": "big"}, r"'prune_below' must be a number >= 0; got 'big'"),
        ({"regression": "lasso"}, r"'regression' must be one of 'stlsq', 'sr3'; got 'lasso'"),
        ({"bootstrap": 1}, r"'bootstrap' must be true or false"),
        ({"smoothing_window": 10}, r"'smoothing_window' must be odd"),
    ],
)
def test_bad_values_are_named(settings, message):
    with pytest.raises(SettingsError, match=message):
        make_fitter("sparse", settings)


def test_bad_value_set_after_construction_is_caught_by_fit():
    fitter = FITTERS["sparse"](prune_below=-1.0)
    series = Series.from_arrays([np.random.default_rng(0).normal(size=(200, 2))], ("a", "b"), 0.1)
    with pytest.raises(SettingsError, match="'prune_below' must be a number >= 0"):
        fitter.fit(series)


def test_learned_state_before_fit_raises_not_fitted():
    fitter = make_fitter("sparse", {})
    with pytest.raises(NotFittedError, match=r"SparseODE.surrogate_ is not available before fit"):
        _ = fitter.surrogate_
    assert not hasattr(fitter, "coefficients_")  # NotFittedError is an AttributeError
    assert not fitter.is_fitted


def test_get_params_round_trips_through_make_fitter():
    fitter = make_fitter("sparse", {"prune_below": 0.2, "degree": 3})
    params = fitter.get_params()
    assert params["prune_below"] == 0.2 and params["degree"] == 3
    assert make_fitter("sparse", params).get_params() == params


def test_settings_file(tmp_path):
    path = tmp_path / "fit.toml"
    path.write_text('method = "sparse"\n\n[settings]\ndegree = 3\nprune_below = 0.05\n')
    assert load_fit_settings(path) == ("sparse", {"degree": 3, "prune_below": 0.05})


@pytest.mark.parametrize(
    "text, message",
    [
        (
            'method = "sparse"\n[settings]\nthreshhold = 1.0\n',
            r"fit.toml: \[settings\] sparse has no setting 'threshhold'",
        ),
        (
            'method = "magic"\n',
            r"fit.toml: key 'method' must be one of sparse, linear-inverse, quadratic-noise, "
            r"calibrated-linear-inverse; got 'magic'",
        ),
        ('method = "sparse"\nsettings = 3\n', r"'settings' must be a table"),
        ('methd = "sparse"\n', r"fit.toml: unknown key 'methd'"),
        ('method = "sparse"\n[settings]\ndegree = \n', r"fit.toml: not valid TOML: .*line 3"),
        ('method = "sparse"\n[settings]\ndegree = "two"\n', r"'degree' must be an integer"),
    ],
)
def test_settings_file_errors_name_the_key(tmp_path, text, message):
    path = tmp_path / "fit.toml"
    path.write_text(text)
    with pytest.raises(SettingsError, match=message):
        load_fit_settings(path)


def test_missing_settings_file(tmp_path):
    with pytest.raises(SettingsError, match="not found"):
        load_fit_settings(tmp_path / "nope.toml")


def test_check_series_refuses_non_series():
    with pytest.raises(DataError, match="fitters take an ergodex.series.Series; got ndarray"):
        check_series(np.zeros((10, 2)))
