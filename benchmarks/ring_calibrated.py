"""Does calibrating a linear inverse model against the fit runs' statistics make the ring pass?

The ring of 40 stations (Lorenz-96, N=40, F=8, sensor noise 0.1) is regenerated for each data
seed (4 runs: fit on runs 0–1, check on the held-out runs 2–3, check seed = data seed, default
tolerance), the set-up of ``benchmarks/ring_methods.py --data-seeds``. Each data seed is fitted
with the 10-mode linear inverse model (τ₀ 0.25) as it is, and with the same model calibrated by
ensemble Kalman inversion (``calibrated-linear-inverse``: with cubic damping; without it with
``--scales``; on all cyclic rotations of the ring with ``homogeneous``); the largest row ratio,
the verdict, the row that drove it and the fit time are printed. ``--wrong-forcing 6`` also fits
the homogeneous recipe to a ring driven at F=6 (same seed) and checks it against the F=8
held-out runs, which must fail.

    /work/venv/bin/python benchmarks/ring_calibrated.py [--data-seeds 1 2 3 4] [--members 40]
        [--iterations 8] [--modes 10] [--scales] [--wrong-forcing 6]
        [--skip-linear] [--skip-plain]

A passed check is statistical evidence, not a certification; defer to the applicable codes,
standards and licensed practice.
"""

from __future__ import annotations

import argparse
import time

from ergodex import scenarios
from ergodex.fitting import make_fitter
from ergodex.validation import CheckSpec, check


def verdict(surrogate, held_out, seed: int) -> str:
    card = check(surrogate, held_out, CheckSpec(seed=seed)).scorecard
    worst = max(card.rows, key=lambda r: r.ratio) if card.rows else None
    what = f"{worst.statistic} {worst.variable}" if worst else "no rows"
    blow = f", {card.blowups['count']} blew up" if card.blowups["count"] else ""
    return f"{card.verdict} {card.largest_ratio:.2f} ({what}{blow})"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data-seeds", type=int, nargs="+", default=[1, 2, 3, 4])
    parser.add_argument("--members", type=int, default=40)
    parser.add_argument("--iterations", type=int, default=8)
    parser.add_argument("--modes", type=int, default=10)
    parser.add_argument("--skip-linear", action="store_true")
    parser.add_argument(
        "--skip-plain",
        action="store_true",
        help="skip the calibrated recipe that is not homogeneous",
    )
    parser.add_argument(
        "--scales",
        action="store_true",
        help="also calibrate without cubic damping (drift and noise scales only)",
    )
    parser.add_argument(
        "--wrong-forcing",
        type=float,
        default=None,
        help="also fit the homogeneous recipe to data at this forcing",
    )
    args = parser.parse_args()
    base = {"n_modes": args.modes, "tau0": 0.25}
    calibrated = {**base, "members": args.members, "iterations": args.iterations}
    recipes = []
    if not args.skip_linear:
        recipes.append(("linear-inverse", base))
    if args.scales:
        recipes.append(("calibrated-linear-inverse", {**calibrated, "cubic_damping": False}))
    if not args.skip_plain:
        recipes.append(("calibrated-linear-inverse", calibrated))
    homogeneous = ("calibrated-linear-inverse", {**calibrated, "homogeneous": True})
    recipes.append(homogeneous)
    for data_seed in args.data_seeds:
        data = scenarios.station_ring(seed=data_seed)
        fit_runs, check_runs = data.select_runs([0, 1]), data.select_runs([2, 3])
        cells = []
        for method, settings in recipes:
            started = time.perf_counter()
            fitter = make_fitter(method, settings).fit(fit_runs)
            fitted = time.perf_counter() - started
            misfit = getattr(fitter, "calibration_misfit_", None)
            note = f", misfit {misfit[0]:.1f}→{misfit[-1]:.1f}" if misfit else ""
            label = (
                method
                if method == "linear-inverse"
                else (
                    f"{method} cubic={settings.get('cubic_damping', True)}"
                    f" homogeneous={settings.get('homogeneous', False)}"
                )
            )
            cells.append(
                f"{label}: "
                f"{verdict(fitter.surrogate_, check_runs, data_seed)} "
                f"[fit {fitted:.0f} s{note}]"
            )
        if args.wrong_forcing is not None:
            other = scenarios.station_ring(seed=data_seed, forcing=args.wrong_forcing)
            fitter = make_fitter(*homogeneous).fit(other.select_runs([0, 1]))
            cells.append(
                f"fitted at F={args.wrong_forcing:g}, homogeneous: "
                f"{verdict(fitter.surrogate_, check_runs, data_seed)}"
            )
        print(f"data seed {data_seed} | " + " | ".join(cells), flush=True)


if __name__ == "__main__":
    main()
