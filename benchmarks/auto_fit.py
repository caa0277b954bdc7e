"""Fit time and outcome of the automatic choice (``ergodex fit DATA`` on a many-variable record).

The ring of 40 stations (Lorenz-96, N=40, F=8, sensor noise 0.1) is regenerated for each data
seed (4 runs: the choice sees runs 0–1 only; the chosen model is then checked on the held-out runs
2–3 with check seed = data seed and the default tolerance, the protocol of
``benchmarks/ring_methods.py --data-seeds``). Printed per seed: the wall time of the choice (every
candidate fitted and checked against the fit runs), the candidates tried, the one chosen and its
held-out verdict. Run it alone on the machine for a fair time; it uses one process (as
``ergodex fit`` does by default).

    /work/venv/bin/python benchmarks/auto_fit.py [--data-seeds 1 2 3 4 5 6 7 8]

A passed check is statistical evidence, not a certification; defer to the applicable codes,
standards and licensed practice.
"""

from __future__ import annotations

import argparse
import os
import time

from ergodex import scenarios
from ergodex.fitting.automatic import choose_fit
from ergodex.validation import CheckSpec, check


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data-seeds", type=int, nargs="+", default=[1, 2, 3, 4, 5, 6, 7, 8])
    args = parser.parse_args()
    print(f"load average at start: {os.getloadavg()[0]:.1f}")
    times, cpus, passes = [], [], 0
    for seed in args.data_seeds:
        data = scenarios.station_ring(seed=seed)
        fit_runs, held_out = data.select_runs([0, 1]), data.select_runs([2, 3])
        started, cpu = time.perf_counter(), time.process_time()
        result = choose_fit(fit_runs, CheckSpec(), progress=False)
        elapsed, cpu = time.perf_counter() - started, time.process_time() - cpu
        cpus.append(cpu)
        times.append(elapsed)
        tried = ", ".join(
            f"{c.method}/{c.settings.get('n_modes')}:{c.verdict}"
            + (f" {c.statistical_score:.2f}" if c.statistical_score is not None else "")
            for c in result.candidates
        )
        if result.chosen is None:
            outcome = "nothing chosen (exit 1)"
        else:
            chosen = result.candidates[result.chosen]
            card = check(result.surrogate, held_out, CheckSpec(seed=seed), evidence=False)
            card = card.scorecard
            passes += card.verdict == "pass"
            outcome = (
                f"chose {chosen.method}/{chosen.settings.get('n_modes')}; held-out "
                f"{card.verdict} {card.largest_ratio:.2f}"
            )
        print(
            f"seed {seed}: {elapsed:5.1f} s wall, {cpu:5.1f} s CPU  [{tried}]  {outcome}",
            flush=True,
        )
    print(
        f"choice time {min(times):.1f}–{max(times):.1f} s wall ({min(cpus):.1f}–{max(cpus):.1f} s "
        f"CPU) per record; held-out passes "
        f"{passes}/{len(args.data_seeds)}; load average at end: {os.getloadavg()[0]:.1f}"
    )


if __name__ == "__main__":
    main()
