"""Fields on the command line: fit --variable, validate on the grid, simulate to CF, bad input."""

from __future__ import annotations

import json

import numpy as np
import pytest

pytest.importorskip("xarray")
cftime = pytest.importorskip("cftime")

from ergodex.cli import main
from ergodex.fields.demo import BASIN_NAME
from ergodex.registry import Registry, format_ref
from ergodex.retraining import _resolve_fit
from ergodex.surrogate import Surrogate
from fields_support import write_cf

LAT = np.array([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0])
LON = np.arange(8) * 10.0 + 120.0


def _ou_field(tmp_path, seed, name, n_runs=3, duration=400.0):
    """A 2-mode Ornstein–Uhlenbeck process laid on two orthonormal patterns, daily, noleap."""
    from ergodex.scenarios import ornstein_uhlenbeck

    rng = np.random.default_rng(seed)
    series = ornstein_uhlenbeck(seed=seed, n_runs=n_runs, duration=duration, dt=0.25)
    q, _ = np.linalg.qr(rng.standard_normal((LAT.size * LON.size, 2)))
    patterns = q.T * np.sqrt(LAT.size * LON.size)
    x = np.stack([r @ patterns for r in series.runs]).reshape(n_runs, -1, LAT.size, LON.size)
    x[:, :, 0, 0] = np.nan  # one land point
    n = x.shape[1]
    # dt 0.25 in the process's time unit = 6 hours on the calendar
    return write_cf(
        tmp_path / name,
        15.0 + x,
        lat=LAT,
        lon=LON,
        times=0.25 * np.arange(n),
        calendar="noleap",
        member="member",
    ), patterns


def test_fit_on_a_field_recovers_the_drift_of_the_process(tmp_path, capsys):
    path, _ = _ou_field(tmp_path, 21, "ou.nc")
    out = tmp_path / "m.json"
    assert (
        main(
            [
                "fit",
                str(path),
                "--variable",
                "tas",
                "--modes",
                "2",
                "--climatology",
                "none",
                "--method",
                "linear-inverse",
                "--out",
                str(out),
            ]
        )
        == 0
    )
    text = capsys.readouterr().out
    assert "dt 6 hours" in text and "noleap calendar" in text
    model = Surrogate.from_json(out)
    assert model.transform.kind == "field-modes" and model.transform.clock_.dt_text == "6 hours"
    # the modes are a rotation of the process's coordinates, so the drift's eigenvalues are
    # those of A = [[-1, .5], [-.5, -.5]] (scenarios' default; -0.75 ± 0.433i, analytic), with
    # time measured in hours now: divide by 6 h per 0.25 time units -> per hour ×(0.25/6)
    drift = model.coefficients[:, 1:3]
    got = np.sort_complex(np.linalg.eigvals(drift))
    expected = np.sort_complex(np.linalg.eigvals(np.array([[-1.0, 0.5], [-0.5, -0.5]]))) * 0.25 / 6
    # 3 runs × 400 time units of a process with unit decorrelation time: ~10 % sampling error
    np.testing.assert_allclose(got.real, expected.real, rtol=0.15)
    np.testing.assert_allclose(np.abs(got.imag), np.abs(expected.imag), rtol=0.2)


def test_validate_on_the_grid_and_simulate_to_cf(tmp_path, capsys):
    import xarray as xr

    path, _ = _ou_field(tmp_path, 22, "fit.nc", duration=150.0)
    check, _ = _ou_field(tmp_path, 23, "check.nc", duration=150.0)
    out = tmp_path / "m.json"
    assert (
        main(
            [
                "fit",
                str(path),
                "--variable",
                "tas",
                "--modes",
                "2",
                "--climatology",
                "none",
                "--method",
                "linear-inverse",
                "--out",
                str(out),
                "--quiet",
            ]
        )
        == 0
    )
    card = tmp_path / "card.json"
    report = tmp_path / "r.html"
    code = main(
        [
            "validate",
            str(out),
            str(check),
            "--variable",
            "tas",
            "--members",
            "4",
            "--region=-5,5,130,150",
            "--json",
            str(card),
            "--report",
            str(report),
        ]
    )
    rows = json.loads(card.read_text())["rows"]
    stats = {r["statistic"] for r in rows}
    assert {
        "variance map",
        "lag-1 map",
        "histogram (area mean)",
        "variance captured",
        "spectrum (box -5,5,130,150)",
    } <= stats
    assert code == (0 if json.loads(card.read_text())["verdict"] == "pass" else 1)
    assert "Maps on the grid" in report.read_text()
    # simulate: the grid, mask, calendar and time units of the data come back
    sim = tmp_path / "sim.nc"
    assert (
        main(
            [
                "simulate",
                str(out),
                "--members",
                "2",
                "--steps",
                "8",
                "--seed",
                "1",
                "--out",
                str(sim),
            ]
        )
        == 0
    )
    with xr.open_dataset(sim, decode_times=False) as ds:
        assert ds["time"].attrs["calendar"] == "noleap"
        assert ds["time"].attrs["units"] == "days since 2000-01-01"
        assert ds.attrs["ergodex_model"] == str(out)
        grid = ds["tas"].values
        assert np.isnan(grid[:, :, 0, 0]).all() and np.isfinite(grid[:, :, 1:, :]).all()
        # 6-hourly steps continuing after the fit record (noleap days: 0.25 d apart)
        np.testing.assert_allclose(np.diff(ds["time"].values), 0.25)
        with xr.open_dataset(path, decode_times=False) as fit:
            assert ds["time"].values[0] == pytest.approx(fit["time"].values[-1] + 0.25)


def test_delays_on_a_single_index(tmp_path):
    from ergodex.scenarios import ornstein_uhlenbeck
    from ergodex.writers import write_csv

    series = ornstein_uhlenbeck(seed=5, n_runs=2, duration=200.0, dt=0.1, names=("a", "b"))
    one = type(series).from_arrays([r[:, :1] for r in series.runs], ["index"], series.dt)
    data = write_csv(tmp_path / "index.csv", one)
    out = tmp_path / "d.json"
    assert (
        main(
            [
                "fit",
                str(data),
                "--delays",
                "3",
                "--delay-step",
                "2",
                "--method",
                "sparse",
                "--out",
                str(out),
                "--quiet",
            ]
        )
        == 0
    )
    model = Surrogate.from_json(out)
    assert model.transform.kind == "delay" and model.variables == (
        "index",
        "index_lag2",
        "index_lag4",
    )
    # the embedding's rows: x(t), x(t - 2 dt), x(t - 4 dt) (Takens coordinates), by definition
    x = one.runs[0]
    z = model.to_model_space(x)
    np.testing.assert_array_equal(z[0], [x[4, 0], x[2, 0], x[0, 0]])


@pytest.mark.parametrize(
    "argv, pattern",
    [
        (["--box", "0,10,0,10"], "--box needs --variable"),
        (["--variable", "tas", "--delays", "3"], "--delays applies to single-index"),
        (["--variable", "tas", "--box", "60,70,0,10"], "holds no grid points"),
        (["--variable", "pr"], "no variable 'pr'"),
    ],
)
def test_fit_refuses_bad_field_options(tmp_path, capsys, argv, pattern):
    path, _ = _ou_field(tmp_path, 24, "f.nc", n_runs=1, duration=20.0)
    out = tmp_path / "m.json"
    assert main(["fit", str(path), *argv, "--out", str(out)]) == 2
    assert pattern in capsys.readouterr().err
    assert not out.exists()


@pytest.mark.parametrize(
    "case, expected",
    [
        ("units", "variable 'tas', dimension 'time': the time coordinate has no CF 'units'"),
        ("no-time", "variable 'tas' has no time dimension"),
        ("lat", "variable 'tas', dimension 'lat': coordinate is not monotonic"),
        ("all-nan", "variable 'tas': every value is missing"),
        ("calendars", "variable 'tas', dimension 'time': calendar '360_day' differs"),
    ],
)
def test_fit_exit_2_names_variable_and_dimension(tmp_path, capsys, case, expected):
    import xarray as xr

    rng = np.random.default_rng(25)
    x = rng.standard_normal((10, 6, 8))
    data = str(tmp_path / "bad.nc")
    if case == "units":
        write_cf(
            tmp_path / "bad.nc",
            x,
            lat=LAT,
            lon=LON,
            times=np.arange(10.0),
            time_attrs={"standard_name": "time"},
        )
    elif case == "no-time":
        xr.Dataset(
            {"tas": (("lat", "lon"), x[0], {"units": "K"})}, coords={"lat": LAT, "lon": LON}
        ).to_netcdf(data)
    elif case == "lat":
        write_cf(
            tmp_path / "bad.nc", x, lat=LAT[[1, 0, 2, 3, 4, 5]], lon=LON, times=np.arange(10.0)
        )
    elif case == "all-nan":
        write_cf(
            tmp_path / "bad.nc", np.full_like(x, np.nan), lat=LAT, lon=LON, times=np.arange(10.0)
        )
    else:
        write_cf(tmp_path / "bad_1.nc", x, lat=LAT, lon=LON, times=np.arange(10.0))
        write_cf(
            tmp_path / "bad_2.nc",
            x,
            lat=LAT,
            lon=LON,
            times=np.arange(10.0, 20.0),
            calendar="360_day",
        )
        data = str(tmp_path / "bad_*.nc")  # a glob of files along time
    out = tmp_path / "m.json"
    assert main(["fit", data, "--variable", "tas", "--out", str(out)]) == 2
    err = capsys.readouterr().err
    assert expected in err and err.count("\n") == 1 and not out.exists()


@pytest.mark.slow
def test_demo_basin_runs_end_to_end(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    code = main(["demo", "--scenario", "basin"])
    text = capsys.readouterr().out
    assert code in (0, 1)
    assert "variance map" in text and "dt = 1 months" in text
    assert (tmp_path / "datasets" / "basin" / "basin_sst_fit.nc").is_file()
    page = next((tmp_path / "models" / "basin-sst").glob("*/report.html")).read_text()
    assert "Maps on the grid" in page
    # retrain refits with the settings recorded with the version: the parser must accept them
    registry = Registry(tmp_path / "models")
    info = registry.get(format_ref(BASIN_NAME, 1))
    assert "fit-settings.json" in info.artifacts
    assert _resolve_fit(None, registry, info) == ("linear-inverse", {})
