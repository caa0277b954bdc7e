"""Calibrate the validator's default tolerance: false-reject and false-accept rates on known
systems.

For each case, many independent trials are run: fresh reference data from a scenario (its own
seed) and a check of a surrogate against it (its own seed). A *true* surrogate (the equations that
generated the data) should pass; a *wrong* one should fail. Each trial records the quantity the
verdict is based on — the largest row ratio, raised to the member-agreement ratio when that is
larger, and infinite when a member blew up — so that the pass rate at any tolerance follows
without re-running: a trial passes at tolerance t when that quantity is ≤ t.

Usage (repository root)::

    /work/venv/bin/python benchmarks/calibration.py --trials 100 --wrong-trials 40 --jobs 2

Ratios at several tolerances say nothing of the inconclusive verdict (a record too short to tell,
or runs that disagree): the table also counts the verdicts at the default settings, with
inconclusive apart. ``benchmarks/calibration_systems.py`` covers more systems and the threshold
derived from the data (``CheckSpec.false_reject_rate``).

Cases: Lorenz-63 convection loop (true; ρ=22; σ doubled; β halved; a linear inverse model fitted
to the same data), Ornstein–Uhlenbeck (true; drift and noise both doubled, which keeps the
stationary covariance but halves the correlation times), double well (true; noise 0.5 instead of
0.7). Prints a table of pass rates at several tolerances and writes the raw figures as JSON.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time

import numpy as np

FAST_DATA = False


def _fast_convection_loop(seed: int):
    """The recipe of ``scenarios.convection_loop`` (4 runs × 60 time units, dt 0.01, spin-up 20,
    random starts N((0, 0, 25), 8²), sensor noise sd 0.05), integrated with the compiled ensemble
    integrator instead of the scenario's numpy RK4 (about 10× faster)."""
    from ergodex import scenarios
    from ergodex.integrate import integrate_ensemble
    from ergodex.series import Series

    rng = np.random.default_rng(seed)
    x0 = np.column_stack([rng.normal(0, 8, 4), rng.normal(0, 8, 4), rng.normal(25, 8, 4)])
    res = integrate_ensemble(
        scenarios.lorenz63_surrogate(), x0, dt_out=0.01, n_out=6000, spinup=20.0, substep=0.0025
    )
    traj = res.states + rng.normal(0.0, 0.05, res.states.shape)
    return Series.from_arrays(
        list(traj),
        scenarios.CONVECTION_LOOP_VARIABLES,
        0.01,
        source=f"fast convection loop (seed={seed})",
    )


def _lorenz_case(name):
    from ergodex import scenarios

    def make(trial):
        data = (
            _fast_convection_loop(10_000 + trial)
            if FAST_DATA
            else scenarios.convection_loop(seed=10_000 + trial)
        )
        if name == "true":
            sur = scenarios.lorenz63_surrogate()
        elif name == "rho22":
            sur = scenarios.lorenz63_surrogate(rho=22.0)
        elif name == "sigma20":
            sur = scenarios.lorenz63_surrogate(sigma=20.0)
        elif name == "beta-half":
            sur = scenarios.lorenz63_surrogate(beta=4.0 / 3.0)
        elif name == "linear":
            from ergodex.fitting.linear_inverse import LinearInverseModel

            sur = LinearInverseModel(unstable="flag").fit(data).surrogate_
        else:  # pragma: no cover
            raise ValueError(name)
        return data, sur, None

    return make


def _ou_case(name):
    from ergodex import scenarios

    def make(trial):
        data = scenarios.ornstein_uhlenbeck(seed=20_000 + trial)
        sur = scenarios.ou_surrogate()
        if name == "fast":
            # doubling A and Q keeps the stationary covariance (A C + C Aᵀ + Q = 0 is linear in
            # (A, Q)) but halves every correlation time: only temporal statistics can tell
            sur = scenarios.ou_surrogate(
                drift=2 * np.asarray(sur.coefficients), noise=2 * np.asarray(sur.noise)
            )
        return data, sur, None

    return make


def _double_well_case(name):
    from ergodex import scenarios

    def make(trial):
        data = scenarios.double_well(seed=30_000 + trial)
        sur = scenarios.double_well_surrogate(noise=0.7 if name == "true" else 0.5)
        return data, sur, None

    return make


CASES = {
    "lorenz63/true": (_lorenz_case("true"), True),
    "lorenz63/rho22": (_lorenz_case("rho22"), False),
    "lorenz63/sigma20": (_lorenz_case("sigma20"), False),
    "lorenz63/beta-half": (_lorenz_case("beta-half"), False),
    "lorenz63/linear-inverse": (_lorenz_case("linear"), False),
    "ou/true": (_ou_case("true"), True),
    "ou/fast": (_ou_case("fast"), False),
    "double-well/true": (_double_well_case("true"), True),
    "double-well/noise-0.5": (_double_well_case("wrong"), False),
}


def run_trial(case: str, trial: int, regimes: bool, fast: bool = False, spec_kw=None) -> dict:
    global FAST_DATA
    FAST_DATA = fast
    from ergodex import regimes as regimes_mod
    from ergodex import scenarios, validation

    make, _ = CASES[case]
    t0 = time.perf_counter()
    data, sur, _ = make(trial)
    spec = validation.CheckSpec(seed=trial, **(spec_kw or {}))
    if regimes and case.startswith("lorenz63"):
        spec.regimes = regimes_mod.RegimeSet.from_dict(scenarios.convection_loop_regimes())
    sc = validation.validate(sur, data, spec)
    ratios = {f"{r.statistic}/{r.variable}": r.ratio for r in sc.rows}
    agreement = sc.member_agreement.get("ratio")
    decisive = max([r for r in ratios.values() if not math.isnan(r)] or [math.inf])
    if agreement is not None:
        decisive = max(decisive, agreement)
    if sc.blowups["count"] > 0 or sc.member_agreement.get("collapsed_members"):
        decisive = math.inf
    return {
        "case": case,
        "trial": trial,
        "verdict": sc.verdict,
        "decisive": decisive,
        "agreement": agreement,
        "blowups": sc.blowups["count"],
        "ratios": ratios,
        "seconds": time.perf_counter() - t0,
    }


def _save(args, results, wall) -> None:
    with open(args.out, "w") as fh:
        json.dump(
            {
                "tolerances": args.tolerances,
                "argv": sys.argv[1:],
                "results": results,
                "wall_seconds": wall,
            },
            fh,
            indent=1,
            default=lambda x: None if not math.isfinite(x) else x,
        )


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--trials", type=int, default=100, help="trials per true case")
    p.add_argument("--wrong-trials", type=int, default=40, help="trials per wrong case")
    p.add_argument("--cases", nargs="*", default=list(CASES), help="cases to run")
    p.add_argument("--jobs", type=int, default=1)
    p.add_argument("--no-regimes", action="store_true", help="leave out the regime rows")
    p.add_argument(
        "--fast-data",
        action="store_true",
        help="generate the convection-loop data with the compiled integrator",
    )
    p.add_argument("--min-pieces", type=int, default=None, help="override CheckSpec.min_pieces")
    p.add_argument("--pool", type=int, default=None, help="override CheckSpec.pool")
    p.add_argument("--statistics", nargs="*", default=None, help="override CheckSpec.statistics")
    p.add_argument("--out", default="benchmarks/calibration_results.json")
    p.add_argument("--tolerances", type=float, nargs="*", default=[1.5, 2.0, 2.5, 2.75, 3.0, 3.5])
    args = p.parse_args(argv)
    from joblib import Parallel, delayed

    jobs = [
        (c, t) for c in args.cases for t in range(args.trials if CASES[c][1] else args.wrong_trials)
    ]
    t0 = time.perf_counter()
    spec_kw = {}
    if args.min_pieces:
        spec_kw["min_pieces"] = args.min_pieces
    if args.pool:
        spec_kw["pool"] = args.pool
    if args.statistics:
        spec_kw["statistics"] = tuple(args.statistics)
    results = []
    stream = Parallel(n_jobs=args.jobs, return_as="generator")(
        delayed(run_trial)(c, t, not args.no_regimes, args.fast_data, spec_kw) for c, t in jobs
    )
    for res in stream:
        results.append(res)
        # save as we go: a long calibration on a busy machine can be inspected while it runs
        _save(args, results, time.perf_counter() - t0)
        print(
            f"{len(results)}/{len(jobs)} {res['case']} trial {res['trial']}: "
            f"largest ratio {res['decisive']:.3g}",
            file=sys.stderr,
            flush=True,
        )
    wall = time.perf_counter() - t0
    _save(args, results, wall)
    head = f"{'case':<26} {'should':<6} {'n':>4} " + " ".join(
        f"{'t=' + format(t, 'g'):>7}" for t in args.tolerances
    )
    print(
        head + "   (fraction passing at each tolerance; then the verdicts at the defaults: "
        "pass / fail / inconclusive, inconclusive counted apart and not as a pass)"
    )
    for c in args.cases:
        rows = [r for r in results if r["case"] == c]
        d = np.array([r["decisive"] for r in rows])
        rates = " ".join(f"{np.mean(d <= t):>7.2f}" for t in args.tolerances)
        verdicts = [r["verdict"] for r in rows]
        counts = " / ".join(str(verdicts.count(v)) for v in ("pass", "fail", "inconclusive"))
        print(f"{c:<26} {'pass' if CASES[c][1] else 'fail':<6} {len(rows):>4} {rates}   {counts}")
    print(f"wall time {wall:.0f} s, {len(results)} checks; raw figures in {args.out}")
    # which rows decide for true models (the largest ratio's statistic)
    for c in args.cases:
        if not CASES[c][1]:
            continue
        rows = [r for r in results if r["case"] == c]
        tops = [max(r["ratios"], key=lambda k: r["ratios"][k]) for r in rows if r["ratios"]]
        uniq, counts = np.unique(tops, return_counts=True)
        order = np.argsort(-counts)[:5]
        print(
            f"{c}: rows with the largest ratio: "
            + ", ".join(f"{uniq[i]} ({counts[i]})" for i in order)
            + f"; median largest ratio {np.median([r['decisive'] for r in rows]):.2f}"
        )
    return 0


if __name__ == "__main__":
    sys.exit(main())
