"""The field check honours --time-limit and --max-memory as the plain check does, and its
scorecard prints dt with the field's time unit."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("xarray")
pytest.importorskip("cftime")

from ergodex.exceptions import ModelLimitError, SettingsError
from ergodex.fields import FieldModes, modes_series, read_field
from ergodex.fields.checking import check_field
from ergodex.fields.modelling import attach_transform
from ergodex.fitting import make_fitter
from ergodex.validation import CheckSpec
from fields_support import write_cf

LAT = np.linspace(-40.0, 40.0, 20)
LON = np.arange(30) * 5.0


def _ou_file(tmp_path, seed, name):
    from ergodex.scenarios import ornstein_uhlenbeck

    series = ornstein_uhlenbeck(seed=seed, n_runs=2, duration=100.0, dt=0.25)
    q, _ = np.linalg.qr(np.random.default_rng(seed + 50).standard_normal((LAT.size * LON.size, 2)))
    x = np.stack([r @ q.T for r in series.runs]).reshape(2, -1, LAT.size, LON.size)
    # 0.25 days apart: the field reader counts them as 6 hours
    return write_cf(
        tmp_path / name,
        x,
        lat=LAT,
        lon=LON,
        times=0.25 * np.arange(x.shape[1]),
        calendar="noleap",
        member="member",
    )


@pytest.fixture(scope="module")
def field_model(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fields")
    fit = read_field(_ou_file(folder, 1, "fit.nc"), "tas")
    t = FieldModes(n_modes=2, climatology=None).fit(fit)
    model = attach_transform(
        make_fitter("linear-inverse", {}).fit(modes_series(t, fit)).surrogate_, t
    )
    return model, _ou_file(folder, 2, "check.nc"), fit.source


def test_field_check_prints_dt_with_its_unit_in_the_settings(field_model):
    model, check_path, _ = field_model
    result = check_field(model, read_field(check_path, "tas"), CheckSpec(seed=1, members=4))
    settings = result.scorecard.settings
    # 0.25 days between samples are 6 hours (common practice, no source)
    assert settings["dt"] == 6.0 and settings["time_unit"] == "hours"
    assert settings["dt_text"] == "6 hours"
    assert model.provenance["time_unit"] == "hours"


def test_field_check_stops_at_the_time_limit(field_model):
    model, check_path, _ = field_model
    with pytest.raises(ModelLimitError, match=r"time limit of 1e-09 s reached"):
        check_field(
            model, read_field(check_path, "tas"), CheckSpec(seed=1, members=4), time_limit=1e-9
        )


def test_field_check_refuses_grid_rows_over_the_memory_limit(field_model):
    model, check_path, _ = field_model
    # 12 MB holds the mode-space ensemble (its noise buffer is 8 MB) but not the grid pieces
    # of 600 points (24 pieces x 82 samples x 600 points x 8 bytes, twice, is about 18 MiB)
    with pytest.raises(
        SettingsError,
        match=r"the grid rows \(\d+ pieces x \d+ samples x 600 "
        r"grid points\) needs about .* over the limit of "
        r"12 MiB",
    ):
        check_field(
            model, read_field(check_path, "tas"), CheckSpec(seed=1, members=4), max_memory="12MB"
        )


def test_validate_passes_the_limits_to_the_field_check(field_model, tmp_path, capsys):
    from ergodex.cli import main

    model, check_path, _ = field_model
    path = tmp_path / "model.json"
    model.to_json(path)
    common = [
        "validate",
        str(path),
        str(check_path),
        "--variable",
        "tas",
        "--members",
        "4",
        "--seed",
        "1",
    ]
    assert main(common + ["--max-memory", "12MB"]) == 2
    assert "the grid rows" in capsys.readouterr().err
    assert main(common + ["--time-limit", "1e-9"]) == 1
    assert "time limit" in capsys.readouterr().err
    assert main(common) in (0, 1)
    assert "time unit: hours (dt = 6 hours, noleap calendar)" in capsys.readouterr().out
