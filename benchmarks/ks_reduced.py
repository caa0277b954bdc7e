"""Reduced-order surrogates of the Kuramoto–Sivashinsky flow (L = 22): which pass the check?

For each data seed, :func:`ergodex.kuramoto_sivashinsky.kuramoto_sivashinsky` makes 4 runs of
32 sensors (2000 time units each, every 0.5, sensor noise 0.05, ETDRK4); the surrogate is fitted
on runs 0–1 and checked on the held-out runs 2–3 (check seed = data seed, default tolerance,
all statistics). A PCA surrogate is compared in its model space (held-out runs mapped through
its own transform). Recipes: the command line's default method (``sparse``) on the leading
modes, the linear inverse model, and the linear inverse model calibrated against the fit runs'
statistics (``calibrated-linear-inverse``, ``homogeneous``: the domain is homogeneous, so the
modes are Fourier pairs from all cyclic rotations); optionally a quadratic drift with white
noise, with and without ``conserve_energy`` (the KS nonlinearity conserves ½Σu², and so does
any orthonormal change of basis). The control row: the true KS equations
written in the Fourier modes of the fit runs (exact quadratic coefficients; pseudo-spectral on
the same 32-point grid as the data) with only the leading modes observed — the best any reduced
model on those modes can do.

    /work/venv/bin/python benchmarks/ks_reduced.py [--data-seeds 1 2 3 4 5 6 7 8] [--modes 10]
        [--recipes default linear calibrated] [--truth]

A passed check is statistical evidence, not a certification; defer to the applicable codes,
standards and licensed practice.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from ergodex.fitting import make_fitter
from ergodex.fitting.reduction import cyclic_rotations
from ergodex.kuramoto_sivashinsky import ks_rhs, kuramoto_sivashinsky
from ergodex.model_space import PCA
from ergodex.surrogate import Surrogate, polynomial_terms
from ergodex.validation import CheckSpec, check

LENGTH = 22.0
RECIPES = (
    "default",
    "linear",
    "calibrated",
    "calibrated-plain",
    "quadratic",
    "quadratic-energy",
)


def true_equations_in_modes(fit_data, n_observed: int) -> Surrogate:
    """The KS equations in the Fourier modes of ``fit_data``, observed on the leading modes.

    The modes are the PCA of the fit runs plus all their cyclic rotations: exact Fourier pairs
    (a circulant covariance), the basis of the ``homogeneous`` recipe. ``ks_rhs`` is exactly
    quadratic in the grid values, so in those coordinates (x = mean + z C) ``dz/dt =
    ks_rhs(mean + z C) Cᵀ`` is quadratic in z; its coefficients come from least squares on
    random points, exact to round-off. In Fourier coordinates a product couples only wavenumbers
    p and q to p ± q, so round-off below 1e-9 of the largest coefficient is set to zero: the
    sparse table is what makes the stiff truth (RK4 substep ≈ 0.006) affordable to integrate.
    """
    transform = PCA(n_modes=fit_data.n_variables).fit(cyclic_rotations(fit_data))
    names = transform.output_names
    terms = polynomial_terms(len(names), 2)
    rng = np.random.default_rng(0)
    Z = rng.normal(scale=2.0, size=(3 * len(terms), len(names)))
    dZ = ks_rhs(transform.inverse(Z), LENGTH) @ transform.components_.T
    probe = Surrogate(names, terms, np.zeros((len(names), len(terms))))
    coefficients = np.linalg.lstsq(probe.features(Z), dZ, rcond=None)[0].T
    coefficients[np.abs(coefficients) < 1e-9 * np.abs(coefficients).max()] = 0.0
    return Surrogate(
        names,
        terms,
        coefficients,
        transform=transform,
        settings={"observed_variables": list(names[:n_observed])},
    )


def verdict(surrogate, held_out, seed: int) -> tuple[str, bool]:
    card = check(surrogate, held_out, CheckSpec(seed=seed)).scorecard
    worst = max(card.rows, key=lambda r: r.ratio) if card.rows else None
    what = f"{worst.statistic} {worst.variable}" if worst else "no rows"
    blow = f", {card.blowups['count']} blew up" if card.blowups["count"] else ""
    ratio = card.largest_ratio
    shown = f"{ratio:.2f}" if isinstance(ratio, float) and np.isfinite(ratio) else "—"
    return f"{card.verdict} {shown} ({what}{blow})", card.verdict == "pass"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data-seeds", type=int, nargs="+", default=[1, 2, 3, 4, 5, 6, 7, 8])
    parser.add_argument("--modes", type=int, default=10)
    parser.add_argument("--tau0", type=float, default=None)
    parser.add_argument(
        "--recipes",
        nargs="*",
        default=["default", "linear", "calibrated"],
        choices=list(RECIPES),
    )
    parser.add_argument("--truth", action="store_true", help="also check the control row")
    parser.add_argument("--members", type=int, default=40)
    parser.add_argument("--iterations", type=int, default=8)
    args = parser.parse_args()
    linear = {"n_modes": args.modes}
    if args.tau0 is not None:
        linear["tau0"] = args.tau0
    calibrated = {**linear, "members": args.members, "iterations": args.iterations}
    table = {
        "default": ("sparse", {"n_modes": args.modes}),
        "quadratic": ("quadratic-noise", {"n_modes": args.modes}),
        "quadratic-energy": ("quadratic-noise", {"n_modes": args.modes, "conserve_energy": True}),
        "linear": ("linear-inverse", linear),
        "calibrated": ("calibrated-linear-inverse", {**calibrated, "homogeneous": True}),
        "calibrated-plain": ("calibrated-linear-inverse", calibrated),
    }
    passes = dict.fromkeys([*args.recipes, *(["truth"] if args.truth else [])], 0)
    for data_seed in args.data_seeds:
        started = time.perf_counter()
        data = kuramoto_sivashinsky(seed=data_seed)
        made = time.perf_counter() - started
        fit_runs, check_runs = data.select_runs([0, 1]), data.select_runs([2, 3])
        cells = [f"data {made:.0f} s"]
        for name in args.recipes:
            method, settings = table[name]
            started = time.perf_counter()
            try:
                surrogate = make_fitter(method, settings).fit(fit_runs).surrogate_
            except Exception as error:  # a recipe that cannot fit is a finding here
                cells.append(f"{name}: fit refused ({type(error).__name__}: {error})"[:160])
                continue
            fitted = time.perf_counter() - started
            text, passed = verdict(surrogate, check_runs, data_seed)
            passes[name] += passed
            cells.append(f"{name}: {text} [fit {fitted:.0f} s]")
        if args.truth:
            started = time.perf_counter()
            text, passed = verdict(
                true_equations_in_modes(fit_runs, args.modes), check_runs, data_seed
            )
            passes["truth"] += passed
            cells.append(f"truth: {text} [{time.perf_counter() - started:.0f} s]")
        print(f"data seed {data_seed} | " + " | ".join(cells), flush=True)
    n = len(args.data_seeds)
    print("passes: " + ", ".join(f"{k} {v}/{n}" for k, v in passes.items()), flush=True)


if __name__ == "__main__":
    main()
