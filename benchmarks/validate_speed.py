"""Speed of a full validation: a 3-variable surrogate, 16 members × 10⁵ samples each.

``--system ring --variables 100``: the ring of stations (Lorenz-96, N=100, 4 runs × 2000
samples at dt = 0.05) checked with its true equations at the check's default length.

Measured side by side in one run: the whole check (``ergodex.validation.check``: integration,
statistics on every piece, noise floor, member agreement, evidence) and the ensemble integration
alone with the same settings, so the statistics' share is a ratio that a busy machine does not
distort much.

Usage (repository root)::

    /work/venv/bin/python benchmarks/validate_speed.py [--repeats 3]
    /work/venv/bin/python benchmarks/validate_speed.py --system ring --variables 100
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--repeats", type=int, default=3)
    p.add_argument("--samples", type=int, default=100_000, help="output samples per member")
    p.add_argument("--members", type=int, default=16)
    p.add_argument("--system", choices=("convection-loop", "ring"), default="convection-loop")
    p.add_argument("--variables", type=int, default=100, help="stations of the ring")
    args = p.parse_args(argv)

    from ergodex import regimes, scenarios, validation
    from ergodex.integrate import blowup_bound, integrate_ensemble

    if args.system == "ring":
        # 4 runs × 2000 samples; the check's default length (the reference's own).
        data = scenarios.station_ring(seed=1, n=args.variables, duration=2000 * 0.05)
        sur = scenarios.lorenz96_surrogate(args.variables)
        spec = validation.CheckSpec(members=args.members, seed=0)
    else:
        data = scenarios.convection_loop(seed=1)  # 4 runs × 6000 samples, dt = 0.01
        sur = scenarios.lorenz63_surrogate()
        rs = regimes.RegimeSet.from_dict(scenarios.convection_loop_regimes())
        spec = validation.CheckSpec(
            members=args.members, length=args.samples * data.dt, regimes=rs, seed=0
        )
    validation.check(sur, data, spec)  # warm-up: numba kernels load from cache, imports

    full, integ = [], []
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        result = validation.check(sur, data, spec)
        full.append(time.perf_counter() - t0)
        s = result.scorecard.settings
        x0 = data.stacked()[: args.members]
        t0 = time.perf_counter()
        n_samples = round(s["member_length"] / data.dt)
        integrate_ensemble(
            sur,
            x0,
            dt_out=data.dt,
            n_out=n_samples,
            spinup=s["spinup"],
            bound=blowup_bound(data.stacked()),
            seed=0,
        )
        integ.append(time.perf_counter() - t0)
    f, i = statistics.median(full), statistics.median(integ)
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    print(
        f"full check ({args.system}, {sur.n_variables} variables, {args.members} members × "
        f"{n_samples} samples, "
        f"{result.scorecard.settings['pieces_per_member']} pieces each, "
        f"{len(result.scorecard.rows)} rows): median {f:.2f} s over {args.repeats} "
        f"(all: {', '.join(f'{x:.2f}' for x in full)})"
    )
    print(
        f"integration alone: median {i:.2f} s; statistics and evidence: {f - i:.2f} s; "
        f"ratio check / integration {f / i:.2f}"
    )
    print(f"verdict {result.scorecard.verdict}, largest ratio {result.scorecard.largest_ratio:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
