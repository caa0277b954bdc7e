"""The verdict on published systems: false rejections of true models and detection of wrong ones,
with the fixed tolerance and with the threshold from the data's own null distribution.

Each trial draws fresh reference data of a system (its own seed) and checks a surrogate against
it twice with the same seed: once with the fixed tolerance (``false_reject_rate=None``, the
verdict before the null threshold) and once with the threshold derived from the reference
(``ergodex.nullfloor``, default false-reject rate 5 %, with and without the 2.75 floor: the
unfloored verdict is recomputed from the same scorecard). Verdicts are counted as pass / fail /
inconclusive; "inconclusive" is not a pass.

Systems (parameters and sources beside each in :data:`SYSTEMS`): Lorenz-63, Rössler, Lorenz-84,
Sprott B, Thomas (two attractors), Lorenz-96 with 40 sites, a two-variable Ornstein–Uhlenbeck
process (4 runs, one long run, a short record), a rotating Ornstein–Uhlenbeck oscillator and a
double well. Wrong models: the time scale ×1.5 (every tendency divided by 1.5: the same
invariant density, only temporal rows can tell), the variance ×1.5 (the state scaled by
sqrt(1.5): a degree-d coefficient times 1.5^((1−d)/2), noise covariance ×1.5) and parameter
changes (Lorenz-63 ρ = 26, double-well noise 0.5).

Usage (repository root)::

    /work/venv/bin/python benchmarks/calibration_systems.py --jobs 2 \
        --out benchmarks/calibration_systems.json
    /work/venv/bin/python benchmarks/calibration_systems.py --quick   # a few trials each

Caution: a passed statistical check is not a certification; defer to the applicable codes,
standards and licensed practice.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from dataclasses import dataclass

import numpy as np


# -- systems -----------------------------------------------------------------------------------
def _poly(names, rows, *, noise=None, kind="polynomial-ode", settings=None):
    """A polynomial Surrogate from rows {powers tuple: coefficient} (one row per variable)."""
    from ergodex.surrogate import Surrogate, Term

    n = len(names)
    keys: list[tuple[int, ...]] = []
    for row in rows:
        for k in row:
            if k not in keys:
                keys.append(k)
    coef = np.zeros((n, len(keys)))
    for i, row in enumerate(rows):
        for k, c in row.items():
            coef[i, keys.index(k)] = c
    return Surrogate(
        tuple(names),
        tuple(Term("monomial", k) for k in keys),
        coef,
        kind=kind if noise is None else "polynomial-sde",
        noise=None if noise is None else np.asarray(noise, float),
        settings=settings or {},
    )


def lorenz63(rho=28.0):
    # Lorenz (1963), J. Atmos. Sci. 20, 130: σ = 10, ρ = 28, β = 8/3
    from ergodex import scenarios

    return scenarios.lorenz63_surrogate(rho=rho)


def rossler(a=0.2, b=0.2, c=5.7):
    # Rössler (1976), Phys. Lett. A 57, 397: a = b = 0.2, c = 5.7
    return _poly(
        ("x", "y", "z"),
        [
            {(0, 1, 0): -1.0, (0, 0, 1): -1.0},
            {(1, 0, 0): 1.0, (0, 1, 0): a},
            {(0, 0, 0): b, (1, 0, 1): 1.0, (0, 0, 1): -c},
        ],
    )


def lorenz84(a=0.25, b=4.0, F=8.0, G=1.0):
    # Lorenz (1984), Tellus 36A, 98: a = 1/4, b = 4, F = 8, G = 1
    return _poly(
        ("x", "y", "z"),
        [
            {(0, 2, 0): -1.0, (0, 0, 2): -1.0, (1, 0, 0): -a, (0, 0, 0): a * F},
            {(1, 1, 0): 1.0, (1, 0, 1): -b, (0, 1, 0): -1.0, (0, 0, 0): G},
            {(1, 1, 0): b, (1, 0, 1): 1.0, (0, 0, 1): -1.0},
        ],
    )


def sprott_b():
    # Sprott (1994), Phys. Rev. E 50, R647, case B: x' = yz, y' = x − y, z' = 1 − xy
    return _poly(
        ("x", "y", "z"),
        [{(0, 1, 1): 1.0}, {(1, 0, 0): 1.0, (0, 1, 0): -1.0}, {(0, 0, 0): 1.0, (1, 1, 0): -1.0}],
    )


def thomas(b=0.208186):
    # Thomas (1999), Int. J. Bifurcation Chaos 9, 1889: x' = sin y − b x (cyclic), b = 0.208186
    from ergodex.surrogate import Surrogate, Term

    terms = tuple(Term("sin", variable=j) for j in range(3)) + tuple(
        Term("monomial", tuple(int(i == j) for i in range(3))) for j in range(3)
    )
    coef = np.zeros((3, 6))
    for i in range(3):
        coef[i, (i + 1) % 3] = 1.0
        coef[i, 3 + i] = -b
    return Surrogate(("x", "y", "z"), terms, coef, kind="ode")


def lorenz96():
    # Lorenz (1996), ECMWF seminar on predictability: 40 sites, F = 8
    from ergodex import scenarios

    return scenarios.lorenz96_surrogate(40, 8.0)


OU_DRIFT = np.array([[-1.0, 0.5], [-0.5, -0.5]])
OU_NOISE = np.array([[1.0, 0.3], [0.3, 0.5]])
# rotating OU: A = [[−γ, −ω], [ω, −γ]], Q = 2γσ² I: stationary covariance σ² I and
# autocorrelation e^(−γt) cos(ωt) (Gardiner, Handbook of Stochastic Methods, §4.5); γ = 0.5,
# ω = π (period 2), σ² = 1
ROT_DRIFT = np.array([[-0.5, -math.pi], [math.pi, -0.5]])
ROT_NOISE = np.eye(2)


def ou(drift=OU_DRIFT, noise=OU_NOISE):
    from ergodex import scenarios

    return scenarios.ou_surrogate(drift=drift, noise=noise)


def double_well(noise=0.7):
    # dx = (x − x³) dt + s dW, s = 0.7 (Kramers problem; Risken, The Fokker–Planck Equation)
    from ergodex import scenarios

    return scenarios.double_well_surrogate(noise=noise)


def slower(sur, factor=1.5):
    """Every tendency divided by ``factor`` (noise covariance too): the time scale × factor."""
    out = sur.with_coefficients(np.asarray(sur.coefficients) / factor)
    return out if sur.noise is None else out.with_noise(np.asarray(sur.noise) / factor)


def wider(sur, factor=1.5):
    """The state scaled by s = sqrt(factor): y = s x obeys y' = s f(y / s) + s dW."""
    s = math.sqrt(factor)
    degree = np.array([sum(t.powers) for t in sur.terms], float)
    out = sur.with_coefficients(np.asarray(sur.coefficients) * s ** (1.0 - degree)[None, :])
    return out if sur.noise is None else out.with_noise(np.asarray(sur.noise) * factor)


@dataclass
class System:
    truth: object  # () -> Surrogate
    data: object  # (truth, seed) -> Series
    wrong: dict  # label -> () -> Surrogate
    source: str


def _ode_data(make, *, n_runs, duration, dt, spinup, centre, spread, substep=None):
    def data(seed):
        from ergodex.integrate import integrate_ensemble
        from ergodex.series import Series

        sur = make()
        rng = np.random.default_rng(seed)
        x0 = np.asarray(centre, float) + spread * rng.standard_normal((n_runs, sur.n_variables))
        res = integrate_ensemble(
            sur, x0, dt_out=dt, n_out=round(duration / dt), spinup=spinup, substep=substep
        )
        return Series.from_arrays(list(res.states), sur.variables, dt, source=f"seed {seed}")

    return data


def _ou_data(drift, noise, n_runs, duration, dt=0.05):
    def data(seed):
        from ergodex import scenarios

        return scenarios.ornstein_uhlenbeck(
            seed=seed, drift=drift, noise=noise, n_runs=n_runs, duration=duration, dt=dt
        )

    return data


def _dw_data(seed):
    from ergodex import scenarios

    return scenarios.double_well(seed=seed)


SYSTEMS = {
    "lorenz63": System(
        lorenz63,
        _ode_data(
            lorenz63, n_runs=4, duration=60.0, dt=0.01, spinup=20.0, centre=(0, 0, 25), spread=8.0
        ),
        {"rho26": lambda: lorenz63(26.0), "time1.5": lambda: slower(lorenz63())},
        "Lorenz 1963, σ=10 ρ=28 β=8/3; 4 runs × 60",
    ),
    "rossler": System(
        rossler,
        _ode_data(
            rossler, n_runs=4, duration=300.0, dt=0.1, spinup=100.0, centre=(0, -5, 0), spread=1.0
        ),
        {"time1.5": lambda: slower(rossler()), "variance1.5": lambda: wider(rossler())},
        "Rössler 1976, a=b=0.2 c=5.7; 4 runs × 300",
    ),
    "lorenz84": System(
        lorenz84,
        _ode_data(
            lorenz84, n_runs=4, duration=300.0, dt=0.1, spinup=50.0, centre=(1, 0, 0), spread=0.5
        ),
        {"time1.5": lambda: slower(lorenz84()), "variance1.5": lambda: wider(lorenz84())},
        "Lorenz 1984, a=1/4 b=4 F=8 G=1; 4 runs × 300",
    ),
    "sprott-b": System(
        sprott_b,
        _ode_data(
            sprott_b, n_runs=4, duration=300.0, dt=0.1, spinup=50.0, centre=(0, 0.5, 0), spread=0.3
        ),
        {"time1.5": lambda: slower(sprott_b())},
        "Sprott 1994 case B; 4 runs × 300",
    ),
    "thomas": System(
        thomas,
        _ode_data(
            thomas, n_runs=4, duration=1000.0, dt=0.5, spinup=200.0, centre=(0, 0, 0), spread=2.0
        ),
        {},
        "Thomas 1999, b=0.208186 (two attractors); 4 runs × 1000",
    ),
    "lorenz96-40": System(
        lorenz96,
        _ode_data(
            lorenz96, n_runs=2, duration=60.0, dt=0.05, spinup=20.0, centre=(8.0,) * 40, spread=1.0
        ),
        {"time1.5": lambda: slower(lorenz96())},
        "Lorenz 1996, 40 sites F=8, 160 rows; 2 runs × 60",
    ),
    "ou": System(
        ou,
        _ou_data(OU_DRIFT, OU_NOISE, 4, 200.0),
        {"time1.5": lambda: slower(ou()), "variance1.5": lambda: wider(ou())},
        "2-variable OU (ergodex scenario); 4 runs × 200",
    ),
    "ou-one-run": System(
        ou,
        _ou_data(OU_DRIFT, OU_NOISE, 1, 800.0),
        {"variance1.5": lambda: wider(ou())},
        "the same OU, a single run × 800",
    ),
    "ou-short": System(
        ou,
        _ou_data(OU_DRIFT, OU_NOISE, 4, 15.0),
        {"time1.5": lambda: slower(ou())},
        "the same OU, 4 runs × 15 (about 15 decorrelation times in all)",
    ),
    "rotating-ou": System(
        lambda: ou(ROT_DRIFT, ROT_NOISE),
        _ou_data(ROT_DRIFT, ROT_NOISE, 4, 200.0),
        {"time1.5": lambda: slower(ou(ROT_DRIFT, ROT_NOISE))},
        "rotating OU γ=0.5 ω=π (oscillator, period 2); 4 runs × 200",
    ),
    "double-well": System(
        double_well,
        lambda seed: _dw_data(seed),
        {"noise0.5": lambda: double_well(0.5), "time1.5": lambda: slower(double_well())},
        "double well s=0.7 (ergodex scenario); 4 runs × 400",
    ),
}


def cases() -> dict[str, tuple[str, str]]:
    out = {}
    for name, system in SYSTEMS.items():
        out[f"{name}/true"] = (name, "true")
        for label in system.wrong:
            out[f"{name}/{label}"] = (name, label)
    return out


FIXED = 2.75  # the fixed tolerance before the null threshold (benchmarks/README.md)


def run_trial(case: str, trial: int, spec_kw: dict | None = None) -> dict:
    from ergodex import validation
    from ergodex.exceptions import DataError

    name, label = cases()[case]
    system = SYSTEMS[name]
    seed = 1000 * (list(SYSTEMS).index(name) + 1) + trial
    t0 = time.perf_counter()
    data = system.data(seed)
    sur = system.truth() if label == "true" else system.wrong[label]()
    out = {"case": case, "trial": trial, "should": "pass" if label == "true" else "fail"}
    try:
        fixed = validation.validate(
            sur, data, validation.CheckSpec(seed=trial, false_reject_rate=None)
        )
    except DataError as exc:  # the check refuses the record (exit code 2): counted as such
        out.update(
            rows=0,
            largest=None,
            verdict_fixed="refused",
            verdict_null="refused",
            verdict_floored="refused",
            null_quantile=None,
            reasons_fixed=[str(exc)],
            seconds_fixed=time.perf_counter() - t0,
            seconds_null=0.0,
        )
        return out
    t1 = time.perf_counter()
    null = validation.validate(
        sur, data, validation.CheckSpec(seed=trial, threshold_floor=None, **(spec_kw or {}))
    )
    t2 = time.perf_counter()
    q = null.threshold.get("null_quantile")
    # with the floor the threshold is max(q, 2.75): the fixed check's when q ≤ 2.75 (rows and
    # power alike), the unfloored check's otherwise, so no third check is needed
    floored = fixed.verdict if q is None or q <= FIXED else null.verdict
    out.update(
        rows=len(null.rows),
        largest=null.largest_ratio,
        agreement=null.member_agreement.get("ratio"),
        blowups=null.blowups["count"],
        verdict_fixed=fixed.verdict,
        verdict_null=null.verdict,
        verdict_floored=floored,
        null_quantile=q,
        power_null=null.power.get("detectable"),
        power_fixed=fixed.power.get("detectable"),
        reasons_fixed=fixed.reasons[:2],
        reasons_null=null.reasons[:2],
        seconds_fixed=t1 - t0,
        seconds_null=t2 - t1,
    )
    return out


def summarise(results: list[dict]) -> list[str]:
    lines = [
        "| case | should | trials | rows | fixed 2.75 | null threshold | null, floor 2.75 | "
        "null quantile median (range) | largest ratio median | s per check (fixed / null) |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for case in cases():
        rows = [r for r in results if r["case"] == case]
        if not rows:
            continue

        def count(key, rows=rows):
            v = [r[key] for r in rows]
            text = f"{v.count('pass')} / {v.count('fail')} / {v.count('inconclusive')}"
            return text + (f" / {v.count('refused')} refused" if "refused" in v else "")

        q = np.array([np.nan if r["null_quantile"] is None else r["null_quantile"] for r in rows])
        lr = np.array([np.nan if r["largest"] is None else r["largest"] for r in rows])
        if np.all(np.isnan(q)):
            q = np.array([np.inf])
        if np.all(np.isnan(lr)):
            lr = np.array([np.inf])
        lines.append(
            f"| {case} | {rows[0]['should']} | {len(rows)} | {rows[0]['rows']} | "
            f"{count('verdict_fixed')} | {count('verdict_null')} | {count('verdict_floored')} | "
            f"{np.nanmedian(q):.2f} ({np.nanmin(q):.2f}–{np.nanmax(q):.2f}) | "
            f"{np.nanmedian(lr):.2f} | "
            f"{np.mean([r['seconds_fixed'] for r in rows]):.1f} / "
            f"{np.mean([r['seconds_null'] for r in rows]):.1f} |"
        )
    return lines


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--trials", type=int, default=10, help="trials per true model")
    p.add_argument("--wrong-trials", type=int, default=3, help="trials per wrong model")
    p.add_argument("--quick", action="store_true", help="3 true and 1 wrong trial per case")
    p.add_argument("--cases", nargs="*", default=None, help="cases (default: all)")
    p.add_argument("--jobs", type=int, default=2)
    p.add_argument("--out", default="benchmarks/calibration_systems.json")
    p.add_argument("--replicates", type=int, default=None, help="CheckSpec.null_replicates")
    args = p.parse_args(argv)
    spec_kw = {} if args.replicates is None else {"null_replicates": args.replicates}
    if args.quick:
        args.trials, args.wrong_trials = 3, 1
    from joblib import Parallel, delayed

    chosen = args.cases or list(cases())
    # trial by trial across the cases, so that a run stopped early still covers every case
    jobs = [
        (c, t)
        for t in range(max(args.trials, args.wrong_trials))
        for c in chosen
        if t < (args.trials if c.endswith("/true") else args.wrong_trials)
    ]
    t0 = time.perf_counter()
    results = []
    stream = Parallel(n_jobs=args.jobs, return_as="generator")(
        delayed(run_trial)(c, t, spec_kw) for c, t in jobs
    )
    for res in stream:
        results.append(res)
        print(
            f"{len(results)}/{len(jobs)} {res['case']} #{res['trial']}: largest "
            f"{res['largest']}, null quantile {res['null_quantile']}, "
            f"{res['verdict_fixed']} → {res['verdict_null']} / {res['verdict_floored']}",
            file=sys.stderr,
            flush=True,
        )
        with open(args.out, "w") as fh:
            json.dump(
                {
                    "argv": sys.argv[1:],
                    "results": results,
                    "wall_seconds": time.perf_counter() - t0,
                },
                fh,
                indent=1,
                default=lambda x: None if not math.isfinite(x) else x,
            )
    print("\n".join(summarise(results)))
    print(f"wall time {time.perf_counter() - t0:.0f} s, {len(results)} trials; raw in {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
