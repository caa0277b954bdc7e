"""The basin demo scenario: monthly sea-surface temperature of a small ocean basin (invented data).

A 2.5° grid over 10°N–45°N, 290°E–340°E with a continent along the western edge and an island;
a seasonal cycle that grows with latitude; a weakly nonlinear, noise-driven oscillator (a
stochastic Hopf normal form below its bifurcation, period about five years) that drives two
spatial patterns in quadrature; a slow red-noise mode with a third pattern; and red spatial
noise (AR(1) in time, smoothed in space) on every ocean point. Written as a CF NetCDF file on the
``noleap`` calendar, ``days since 1900-01-01``, values packed as int16 with ``scale_factor`` and
``add_offset``, land as ``_FillValue``, members along a ``realization`` dimension.

The data are invented for the demo only; no check in the test suite uses them as a reference.

References
----------
.. [1] S. H. Strogatz, *Nonlinear Dynamics and Chaos*, 2nd ed., Westview (2015), §8.2 — the
   Hopf normal form.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from ergodex.fields.calendar import Clock

__all__ = ["BASIN_VARIABLE", "basin_field", "basin_grid", "write_basin"]

BASIN_VARIABLE = "sst"
_TIME_UNITS = "days since 1900-01-01"


def basin_grid() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Latitudes, longitudes (degrees) and the ocean mask (True = ocean) of the basin."""
    lat = np.arange(10.0, 45.1, 2.5)
    lon = np.arange(290.0, 340.1, 2.5)
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    coast = 290.0 + 8.0 * (la - 10.0) / 35.0 + 3.0 * np.sin(la / 6.0)
    island = (la - 30.0) ** 2 / 9.0 + (lo - 322.5) ** 2 / 16.0 <= 1.0
    return lat, lon, (lo > coast) & ~island


def _patterns(lat, lon, mask) -> np.ndarray:
    """Three smooth, mutually orthogonal basin patterns on the ocean points (3, n_points)."""
    la, lo = np.meshgrid(lat, lon, indexing="ij")
    y = (la - 27.5) / 17.5
    x = (lo - 315.0) / 25.0
    p1 = np.exp(-((y + 0.4) ** 2) / 0.3) * np.cos(np.pi * x / 2.4)  # southern tongue
    p2 = np.exp(-((y - 0.1) ** 2) / 0.4) * np.sin(np.pi * (x + 0.3) / 1.8)  # east-west dipole
    p3 = np.tanh(3.0 * y) * np.exp(-(x**2) / 1.5)  # gyre boundary
    q, _ = np.linalg.qr(np.stack([p[mask] for p in (p1, p2, p3)]).T)
    return q.T * np.sqrt(mask.sum())  # unit RMS per point


def _oscillator(rng, n_months: int, n_sub: int = 8) -> np.ndarray:
    """Stochastic Hopf normal form, dz = ((mu + i w) z - |z|^2 z) dt + s dW, monthly samples."""
    mu, omega, sigma = -0.03, 2 * np.pi / 60.0, 0.3  # per month: damping, 5-year period, noise
    h = 1.0 / n_sub
    z = 0.5 + 0.0j
    out = np.empty((n_months, 2))
    for t in range(n_months):
        dw = rng.standard_normal((n_sub, 2)) * np.sqrt(h)
        for k in range(n_sub):  # Euler-Maruyama (Kloeden & Platen 1992) on a fine step
            z = (
                z
                + ((mu + 1j * omega) * z - abs(z) ** 2 * z) * h
                + sigma * (dw[k, 0] + 1j * dw[k, 1])
            )
        out[t] = z.real, z.imag
    return out


def basin_field(n_members: int = 6, n_years: int = 60, *, seed: int = 2026):
    """Values (n_members, n_months, n_points), the grid, and the clock of the basin scenario."""
    rng = np.random.default_rng(seed)
    lat, lon, mask = basin_grid()
    patterns = _patterns(lat, lon, mask)
    n = 12 * n_years
    la = np.broadcast_to(lat[:, None], mask.shape)[mask]
    mean_state = 27.0 - 0.35 * (la - 10.0)
    amplitude = 0.5 + 0.08 * (la - 10.0)
    month = np.arange(n) % 12
    season = -np.cos(2 * np.pi * (month - 1.5) / 12.0)[:, None] * amplitude  # warmest in Aug
    from scipy.ndimage import gaussian_filter

    values = np.empty((n_members, n, mask.sum()))
    for m in range(n_members):
        osc = _oscillator(rng, n)
        slow = np.zeros(n)
        for t in range(1, n):
            slow[t] = 0.97 * slow[t - 1] + 0.25 * rng.standard_normal()
        noise = np.zeros(mask.shape)
        red = np.empty((n, mask.sum()))
        for t in range(n):
            white = gaussian_filter(rng.standard_normal(mask.shape), 1.5)
            noise = 0.6 * noise + np.sqrt(1 - 0.36) * white / 0.19
            red[t] = noise[mask]
        values[m] = (
            mean_state
            + season
            + 1.2 * osc @ patterns[:2]
            + 0.4 * slow[:, None] * patterns[2]
            + 0.15 * red
        )
    clock = Clock("months", 1.0, 12.0 * 1950, "days since 1900-01-01", "noleap", 15.0)
    return values, lat, lon, mask, clock


def write_basin(
    folder: str | os.PathLike,
    *,
    n_fit: int = 4,
    n_check: int = 2,
    n_years: int = 60,
    seed: int = 2026,
) -> tuple[Path, Path]:
    """Write the basin scenario as two CF NetCDF files: fit runs and held-out check runs."""
    values, lat, lon, mask, clock = basin_field(n_fit + n_check, n_years, seed=seed)
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    return (
        _write(folder / "basin_sst_fit.nc", values[:n_fit], lat, lon, mask, clock, seed),
        _write(folder / "basin_sst_check.nc", values[n_fit:], lat, lon, mask, clock, seed),
    )


def _write(path: Path, values, lat, lon, mask, clock, seed: int) -> Path:
    from ergodex.fields.writing import write_field

    return write_field(
        path,
        values,
        variable=BASIN_VARIABLE,
        lat=lat,
        lon=lon,
        mask=mask,
        clock=clock,
        steps=np.arange(values.shape[1]),
        time_units=_TIME_UNITS,
        units="degC",
        attrs={
            "standard_name": "sea_surface_temperature",
            "long_name": "sea surface temperature",
            "cell_methods": "time: mean",
        },
        member_dim="realization",
        global_attrs={
            "title": "ergodex basin demo scenario (invented data)",
            "source": f"ergodex.fields.basin, seed {seed}",
        },
        packing={
            "dtype": "int16",
            "scale_factor": 0.001,
            "add_offset": 20.0,
            "_FillValue": np.int16(-32767),
        },
    )
