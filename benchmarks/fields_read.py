"""Reading and reducing a large gridded field: wall time and peak memory, in memory and in chunks.

Writes a CF NetCDF file of ``--time`` × ``--lat`` × ``--lon`` float32 values (default
3650 × 90 × 180, about 240 MB: ten years of daily values on a 2° grid, noleap calendar, about a
third of the points masked as land) to a temporary folder, then runs, each in a fresh process so
that its peak resident memory (``ru_maxrss``) is its own:

- ``in memory``: ``read_field`` + ``FieldModes`` (daily climatology, 10 modes; the randomized SVD
  is chosen automatically for a matrix this size) + ``modes_series``;
- ``chunks``: the same with ``read_field(..., chunks=365)``: values stay a dask array, the
  climatology and the EOFs (dask's compressed SVD) are computed a chunk at a time.

Both print the leading variance fractions, which must agree. A third case runs the chunked path
on a file twice as long: its peak memory must not grow with the file (what lets a file larger
than memory through). Usage (repository root)::

    /work/venv/bin/python benchmarks/fields_read.py [--time 3650 --lat 90 --lon 180]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

_CHILD = r"""
import json, resource, sys, time
import numpy as np
from ergodex.fields import FieldModes, modes_series, read_field
path, chunks = sys.argv[1], (None if sys.argv[2] == "none" else int(sys.argv[2]))
import dask.array, sklearn.utils.extmath, xarray  # noqa: E401 - what every case imports anyway
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
t0 = time.perf_counter()
field = read_field(path, "tas", chunks=chunks)
t1 = time.perf_counter()
modes = FieldModes(n_modes=10, climatology="day").fit(field)
series = modes_series(modes, field)
t2 = time.perf_counter()
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
print(json.dumps({"read": t1 - t0, "reduce": t2 - t1, "total": t2 - t0, "peak_mb": peak,
                  "imports_mb": base,
                  "fractions": modes.variance_fraction_[:4].tolist(), "solver": modes.eof_solver_,
                  "samples": series.n_samples}))
"""


def write_file(path: Path, n_time: int, n_lat: int, n_lon: int, seed: int = 0) -> Path:
    """A daily noleap field: seasonal cycle + 5 travelling patterns + noise, land masked."""
    import netCDF4

    rng = np.random.default_rng(seed)
    lat = np.linspace(-89.0, 89.0, n_lat)
    lon = np.linspace(0.0, 360.0, n_lon, endpoint=False)
    la, lo = np.meshgrid(np.deg2rad(lat), np.deg2rad(lon), indexing="ij")
    land = (np.sin(2 * lo) * np.cos(la) > 0.45) | (np.abs(lat)[:, None] > 80)
    patterns = np.stack([np.cos(k * lo + k * la) * np.cos(la) for k in range(1, 6)]).astype(
        np.float32
    )
    with netCDF4.Dataset(path, "w") as ds:
        ds.createDimension("time", n_time)
        ds.createDimension("lat", n_lat)
        ds.createDimension("lon", n_lon)
        t = ds.createVariable("time", "f8", ("time",))
        t.units, t.calendar = "days since 2000-01-01", "noleap"
        t[:] = np.arange(n_time, dtype=np.float64)
        for name, values, units in (("lat", lat, "degrees_north"), ("lon", lon, "degrees_east")):
            v = ds.createVariable(name, "f8", (name,))
            v.units = units
            v[:] = values
        var = ds.createVariable(
            "tas",
            "f4",
            ("time", "lat", "lon"),
            fill_value=np.float32(1e20),
            chunksizes=(73, n_lat, n_lon),
        )
        var.units = "K"
        amps = np.cumsum(rng.standard_normal((n_time, 5)), axis=0).astype(np.float32) * 0.05
        for a in range(0, n_time, 365):
            b = min(n_time, a + 365)
            day = np.arange(a, b) % 365
            season = 10.0 * np.cos(2 * np.pi * day / 365.0)[:, None, None] * np.cos(la)
            block = (
                280.0
                + season
                + np.einsum("tk,kyx->tyx", amps[a:b], patterns)
                + rng.standard_normal((b - a, n_lat, n_lon)).astype(np.float32)
            )
            block[:, land] = np.nan
            var[a:b] = np.ma.masked_invalid(block.astype(np.float32))
    return path


def run_child(path: Path, chunks: int | None, blas_threads: int) -> dict:
    env_path = str(Path(__file__).resolve().parents[1] / "src")
    out = subprocess.run(
        [sys.executable, "-c", _CHILD, str(path), str(chunks or "none")],
        check=True,
        capture_output=True,
        text=True,
        env={
            "PYTHONPATH": env_path,
            "PATH": "/usr/bin:/bin",
            "OMP_NUM_THREADS": str(blas_threads),
            "OPENBLAS_NUM_THREADS": str(blas_threads),
        },
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--time", type=int, default=3650)
    parser.add_argument("--lat", type=int, default=90)
    parser.add_argument("--lon", type=int, default=180)
    parser.add_argument("--chunks", type=int, default=365)
    parser.add_argument(
        "--blas-threads",
        type=int,
        default=1,
        help="OpenBLAS threads in the measured processes (default 1: on a shared "
        "2-core machine two spinning BLAS threads made an SVD 28x slower)",
    )
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="ergodex-fields-bench-") as tmp:
        t0 = time.perf_counter()
        path = write_file(Path(tmp) / "field.nc", args.time, args.lat, args.lon)
        size = path.stat().st_size / 2**20
        print(
            f"wrote {path.name}: {args.time} x {args.lat} x {args.lon} float32, "
            f"{size:.0f} MB in {time.perf_counter() - t0:.1f} s"
        )
        rows = [
            ("in memory", run_child(path, None, args.blas_threads)),
            (f"chunks={args.chunks}", run_child(path, args.chunks, args.blas_threads)),
        ]
        path.unlink()
        longer = write_file(Path(tmp) / "field2.nc", 2 * args.time, args.lat, args.lon)
        print(
            f"wrote {longer.name}: {2 * args.time} x {args.lat} x {args.lon} float32, "
            f"{longer.stat().st_size / 2**20:.0f} MB"
        )
        rows.append(
            (f"2x, chunks={args.chunks}", run_child(longer, args.chunks, args.blas_threads))
        )
    print(
        f"{'case':<18} {'read s':>7} {'reduce s':>9} {'total s':>8} {'peak MB':>8} "
        f"{'imports MB':>10}  solver, leading variance fractions"
    )
    for name, r in rows:
        print(
            f"{name:<18} {r['read']:7.1f} {r['reduce']:9.1f} {r['total']:8.1f} "
            f"{r['peak_mb']:8.0f} {r['imports_mb']:10.0f}  {r['solver']}, "
            f"{np.round(r['fractions'], 4).tolist()}"
        )
    a, b = (np.array(r["fractions"]) for _, r in rows[:2])
    ratio = rows[1][1]["peak_mb"] / rows[0][1]["peak_mb"]
    print(
        f"largest difference of the leading fractions: {np.max(np.abs(a - b)):.2e}; "
        f"peak memory ratio chunks / in memory: {ratio:.2f}"
    )


if __name__ == "__main__":
    main()
