"""How long the demo's validation report takes to generate, beside the check that precedes it.

Usage (repository root): python benchmarks/report_speed.py [--repeat N] [--true-equations]

Builds what ``ergodex demo`` builds for the convection loop — the scenario's data (seed 2026),
the held-out runs, the sparse ODE fit on the others (or the true equations with
``--true-equations``) and the check with the loop's regimes — then times
``ergodex.report.render_report`` and ``write_report`` on it. The issue's target: under 5 s.
Measured side by side in the same process, so that the ratios stay meaningful on a loaded machine:
the check itself, and one single-panel matplotlib SVG figure (the unit every report figure is made
of).
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path


def _timed(fn, repeat: int) -> tuple[float, float, float]:
    """(median wall time, best wall time, median CPU time of this process) over ``repeat`` calls.

    On a machine shared with other jobs the wall time includes waiting for a core; the process's
    CPU time does not, so it is the better estimate of the cost on an idle machine.
    """
    walls, cpus = [], []
    for _ in range(repeat):
        start, cpu_start = time.perf_counter(), time.process_time()
        fn()
        walls.append(time.perf_counter() - start)
        cpus.append(time.process_time() - cpu_start)
    return statistics.median(walls), min(walls), statistics.median(cpus)


def _one_panel_svg() -> None:
    import io

    import numpy as np
    from matplotlib.figure import Figure

    figure = Figure(figsize=(3.3, 2.6))
    ax = figure.subplots()
    x = np.linspace(0.0, 10.0, 200)
    ax.plot(x, np.sin(x))
    figure.savefig(io.BytesIO(), format="svg")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument(
        "--true-equations",
        action="store_true",
        help="report on the true Lorenz-63 equations instead of a fitted model",
    )
    args = parser.parse_args()

    from ergodex import scenarios
    from ergodex.regimes import RegimeSet
    from ergodex.report import render_report, write_report
    from ergodex.series import split_runs
    from ergodex.validation import CheckSpec, check

    seed = 2026
    data = scenarios.convection_loop(seed=seed)
    fit_data, check_data = split_runs(data, [-2, -1])
    if args.true_equations:
        surrogate, label = scenarios.lorenz63_surrogate(), "true equations"
    else:
        from ergodex.fitting import make_fitter

        surrogate, label = make_fitter("sparse", {}).fit(fit_data).surrogate_, "sparse fit"
    spec = CheckSpec(seed=seed, regimes=RegimeSet.from_dict(scenarios.convection_loop_regimes()))

    check_start = time.perf_counter()
    result = check(surrogate, check_data, spec)
    check_time = time.perf_counter() - check_start

    _one_panel_svg()  # first call pays matplotlib's font-cache and import costs, as reports do
    first_start = time.perf_counter()
    page = render_report(result, surrogate, title="Heated convection loop")
    first = time.perf_counter() - first_start
    render_median, render_best, render_cpu = _timed(
        lambda: render_report(result, surrogate, title="Heated convection loop"), args.repeat
    )
    with tempfile.TemporaryDirectory() as tmp:
        target = Path(tmp) / "report.html"
        write_median, _, write_cpu = _timed(
            lambda: write_report(target, result, surrogate), args.repeat
        )
    panel_median, _, panel_cpu = _timed(_one_panel_svg, max(5, args.repeat))

    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(
        f"demo report ({label}, verdict {result.scorecard.verdict}), "
        f"{os.cpu_count()} cores, load average {load:.1f}, python {sys.version.split()[0]}"
    )
    print(f"  page size                         {len(page) / 1e6:.2f} MB")
    print(f"  render_report, first call         {first:.2f} s")
    print(
        f"  render_report, median of {args.repeat}        {render_median:.2f} s "
        f"(best {render_best:.2f} s; CPU time {render_cpu:.2f} s)"
    )
    print(
        f"  write_report, median of {args.repeat}         {write_median:.2f} s "
        f"(CPU time {write_cpu:.2f} s)"
    )
    print(f"  check (16 members), once          {check_time:.2f} s")
    print(
        f"  one-panel SVG figure, median      {panel_median * 1000:.0f} ms "
        f"(CPU time {panel_cpu * 1000:.0f} ms)"
    )
    print(f"  ratio report / check              {render_median / check_time:.2f}")
    print(f"  ratio report / one-panel figure   {render_median / panel_median:.1f}")
    print(
        f"  target under 5 s (wall, median): {'met' if render_median < 5.0 else 'NOT met'}; "
        f"(CPU time): {'met' if render_cpu < 5.0 else 'NOT met'}"
    )


if __name__ == "__main__":
    main()
