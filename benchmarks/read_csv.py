"""Time ergodex's CSV reader against pandas.read_csv on the same ~100 MB file.

The file is generated in a temporary folder: a ``time`` column and 40 station columns of
Lorenz-96-like magnitudes written in shortest exact form (what ``ergodex.writers.write_csv``
writes), about 130,000 rows. Both readers run alternately, several times; the best time of each
is compared (the minimum is the least disturbed by other jobs on a shared machine). The first
ergodex call in the process is reported separately: it includes importing numba and loading the
compiled scanner from its on-disk cache.

Usage::

    /work/venv/bin/python benchmarks/read_csv.py [--mb 100] [--repeats 3]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

import numpy as np


def make_file(path: Path, target_mb: float, seed: int = 0) -> int:
    rng = np.random.default_rng(seed)
    n_cols = 40
    header = "time," + ",".join(f"station_{i + 1:02d}" for i in range(n_cols)) + "\n"
    rows = 0
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(header)
        while fh.tell() < target_mb * 1e6:
            block = rng.normal(2.3, 3.6, size=(5000, n_cols))
            lines = []
            for row in block.tolist():
                lines.append(repr(round(rows * 0.05, 12)) + "," + ",".join(map(repr, row)))
                rows += 1
            fh.write("\n".join(lines) + "\n")
    return rows


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--mb", type=float, default=100.0)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()

    import pandas as pd

    from ergodex.readers import read_csv

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "stations.csv"
        rows = make_file(path, args.mb)
        size = path.stat().st_size / 1e6
        print(f"file: {size:.1f} MB, {rows} rows x 41 columns")

        t0 = time.perf_counter()
        first = read_csv(path)
        cold = time.perf_counter() - t0

        ours, theirs = [], []
        for _ in range(args.repeats):
            t0 = time.perf_counter()
            frame = pd.read_csv(path)
            theirs.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            series = read_csv(path)
            ours.append(time.perf_counter() - t0)
        # Same numbers as Python's float (correctly rounded) on every 97th line.
        lines = path.read_text().splitlines()[1::97]
        exact = np.array([[float(c) for c in line.split(",")[1:]] for line in lines])
        same = np.array_equal(series.runs[0][::97], exact)
        close = np.allclose(frame.to_numpy()[:, 1:], series.runs[0], rtol=1e-15, atol=0)
        assert same and close and first.fingerprint() == series.fingerprint()
        print(
            f"pandas.read_csv  best {min(theirs):.2f} s  (all: "
            f"{', '.join(f'{t:.2f}' for t in theirs)})"
        )
        print(
            f"ergodex read_csv best {min(ours):.2f} s  (all: {', '.join(f'{t:.2f}' for t in ours)})"
        )
        print(f"ergodex first call in process (numba import + cache load): {cold:.2f} s")
        print(f"ratio ergodex / pandas (best of {args.repeats}): {min(ours) / min(theirs):.2f}")
        print(
            f"values identical to Python float() on sampled lines: {same}; within 1e-15 of pandas: "
            f"{close}"
        )
        del frame


if __name__ == "__main__":
    main()
