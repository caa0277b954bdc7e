"""Fitting speed, measured side by side in one run (ratios, not absolute times, are the result).

Compares on the demo data (convection loop, 4 runs x 60 time units, dt = 0.01):
- the three derivative estimates of SparseODE (weak form, smoothed and plain differences);
- SparseODE's own assembly of the regression against pysindy's SINDy.fit on the same data
  (same library, optimizer and order-4 differences), to show what the wrapper costs;
- the linear inverse model and the quadratic noise closure.
Each case runs --repeat times after one warm-up; the median is reported.

Usage: /work/venv/bin/python benchmarks/fit_speed.py [--repeat 5]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np


def timed(func, repeat: int) -> float:
    func()  # warm-up: imports, caches
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()

    import pysindy as ps

    from ergodex.fitting import make_fitter
    from ergodex.scenarios import convection_loop

    series = convection_loop(seed=0)
    runs = [np.asarray(r) for r in series.runs]

    def pysindy_direct():
        model = ps.SINDy(
            optimizer=ps.STLSQ(threshold=0.1),
            feature_library=ps.PolynomialLibrary(degree=2),
            differentiation_method=ps.FiniteDifference(order=4),
        )
        model.fit(runs, t=series.dt)
        return model

    cases = {
        "sparse, weak form (default)": lambda: make_fitter("sparse", {}).fit(series),
        "sparse, smoothed differences": lambda: make_fitter(
            "sparse", {"differentiation": "smoothed-finite-difference"}
        ).fit(series),
        "sparse, plain differences": lambda: make_fitter(
            "sparse", {"differentiation": "finite-difference"}
        ).fit(series),
        "pysindy SINDy.fit, plain differences": pysindy_direct,
        "sparse, bootstrap of 20 (weak form)": lambda: make_fitter(
            "sparse", {"bootstrap": True}
        ).fit(series),
        "linear inverse model": lambda: make_fitter("linear-inverse", {"tau0": 0.05}).fit(series),
        "quadratic + white noise": lambda: make_fitter("quadratic-noise", {}).fit(series),
    }
    results = {name: timed(func, args.repeat) for name, func in cases.items()}
    base = results["pysindy SINDy.fit, plain differences"]
    print(f"{'case':42s} {'median s':>9s} {'vs SINDy.fit':>12s}")
    for name, seconds in results.items():
        print(f"{name:42s} {seconds:9.3f} {seconds / base:12.2f}")


if __name__ == "__main__":
    main()
