"""Member-steps per second of ergodex's ensemble integrator against the alternatives, side by side.

Run:  /work/venv/bin/python benchmarks/integrate.py            (about a minute on 2 loaded cores)
      /work/venv/bin/python benchmarks/integrate.py --quick    (smaller runs, for a smoke test)
      /work/venv/bin/python benchmarks/integrate.py --members 256 --no-first-call
                                                  (ensemble size; the targets are stated for 64)

Cases (M = 64 members, RK4 at h = 0.01, outputs every 10 steps):
1. Lorenz-63 surrogate fitted here with pysindy (STLSQ, degree-2 library) on data generated here:
   - pysindy's own ``model.simulate`` on one member (a short run, extrapolated);
   - a plain numpy RK4 over the ensemble (dense library matrix times coefficients);
   - ergodex ``integrate_ensemble`` (compiled kernel, sparse term table, blow-up checks);
   - a hand-written numba RK4 with the Lorenz equations typed in (two loop orders; the faster
     one is the ceiling).
2. The same at 16 members (validate's default ensemble), ergodex beside both hand kernels.
3. Lorenz-96, 40 stations, F = 8 as a quadratic table (861 candidate terms, 160 non-zero):
   ergodex against a hand-written numba RK4 of the Lorenz-96 equations.
4. The first call in a fresh process (import, load of the compiled kernel from numba's disk
   cache, a short run), and the same with an empty cache (compilation).

Every figure is member-steps per second; the compiled contenders run in turn, nine times each,
and the best time of each counts, so that they see the same machine load; the median of the
per-round ratios is printed beside it.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
import warnings

import numba as nb
import numpy as np

from ergodex.integrate import integrate_ensemble
from ergodex.scenarios import lorenz63_surrogate, lorenz96_surrogate
from ergodex.surrogate import Surrogate, from_pysindy, polynomial_terms

H = 0.01
K = 10  # substeps per output
M = 64


def best_of(fn, repeats: int = 3) -> float:
    best = np.inf
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t)
    return best


def interleaved_best(fns: dict, repeats: int = 9) -> tuple[dict, dict]:
    """Best time of each function, and every round's times, the runs taken in turn.

    Taking the contenders in turn lets all of them see the same machine load; the per-round
    times let the ratios also be read round by round (their median resists load that drifts
    during the run, which the best times alone do not show).
    """
    best = {name: np.inf for name in fns}
    rounds: dict[str, list[float]] = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            t = time.perf_counter()
            fn()
            sec = time.perf_counter() - t
            rounds[name].append(sec)
            best[name] = min(best[name], sec)
    return best, rounds


def round_ratio(rounds: dict, fast: str, slow: str) -> tuple[float, float, float]:
    """Median, smallest and largest of the per-round speed ratios ``fast`` / ``slow``."""
    r = np.array(rounds[slow]) / np.array(rounds[fast])
    return float(np.median(r)), float(r.min()), float(r.max())


# ---------------------------------------------------------------- the fitted Lorenz-63 surrogate
def fit_lorenz63(rng: np.random.Generator):
    import pysindy as ps

    truth = dense_quadratic(lorenz63_surrogate())
    x0 = rng.normal(size=(4, 3)) * 3 + [0, 0, 25]
    runs = integrate_ensemble(truth, x0, dt_out=0.002, n_out=5000, spinup=2.0, substep=0.001).states
    model = ps.SINDy(
        feature_library=ps.PolynomialLibrary(degree=2),
        optimizer=ps.STLSQ(threshold=0.1),
        differentiation_method=ps.FiniteDifference(order=4),
    )
    model.fit([r for r in runs], t=0.002)
    return model, from_pysindy(model, truth.variables), runs


def dense_quadratic(surrogate: Surrogate) -> Surrogate:
    """The same equations over the full degree-2 library in pysindy's order (as a fit yields)."""
    terms = polynomial_terms(surrogate.n_variables, 2)
    index = {t.powers: k for k, t in enumerate(terms)}
    coef = np.zeros((surrogate.n_variables, len(terms)))
    coef[:, [index[t.powers] for t in surrogate.terms]] = surrogate.coefficients
    return Surrogate(surrogate.variables, terms, coef)


# ---------------------------------------------------------------- plain numpy ensemble RK4
def numpy_rk4(
    powers: np.ndarray, coef: np.ndarray, x0: np.ndarray, n_steps: int, k: int
) -> np.ndarray:
    def f(x):
        theta = np.prod(x[:, None, :] ** powers[None, :, :], axis=2)
        return theta @ coef.T

    x = x0.copy()
    outs = [x.copy()]
    for s in range(n_steps):
        k1 = f(x)
        k2 = f(x + 0.5 * H * k1)
        k3 = f(x + 0.5 * H * k2)
        k4 = f(x + H * k3)
        x = x + H / 6.0 * (k1 + 2 * k2 + 2 * k3 + k4)
        if (s + 1) % k == 0:
            outs.append(x.copy())
    return np.array(outs)


# ---------------------------------------------------------------- hand-written Lorenz-63 kernels
@nb.njit(cache=True, inline="always")
def _l63_rk4_step(x, y, z, h, a, b, c, d, e, f, g):
    """One RK4 step of dx = a x + b y; dy = c x + d y + e x z; dz = f z + g x y, in scalars."""
    k1x = a * x + b * y
    k1y = c * x + d * y + e * x * z
    k1z = f * z + g * x * y
    x2, y2, z2 = x + 0.5 * h * k1x, y + 0.5 * h * k1y, z + 0.5 * h * k1z
    k2x = a * x2 + b * y2
    k2y = c * x2 + d * y2 + e * x2 * z2
    k2z = f * z2 + g * x2 * y2
    x3, y3, z3 = x + 0.5 * h * k2x, y + 0.5 * h * k2y, z + 0.5 * h * k2z
    k3x = a * x3 + b * y3
    k3y = c * x3 + d * y3 + e * x3 * z3
    k3z = f * z3 + g * x3 * y3
    x4, y4, z4 = x + h * k3x, y + h * k3y, z + h * k3z
    k4x = a * x4 + b * y4
    k4y = c * x4 + d * y4 + e * x4 * z4
    k4z = f * z4 + g * x4 * y4
    return (
        x + h / 6.0 * (k1x + 2.0 * k2x + 2.0 * k3x + k4x),
        y + h / 6.0 * (k1y + 2.0 * k2y + 2.0 * k3y + k4y),
        z + h / 6.0 * (k1z + 2.0 * k2z + 2.0 * k3z + k4z),
    )


@nb.njit(cache=True)
def l63_members_outer(x0, n_out, k, h, a, b, c, d, e, f, g, out):
    """Lorenz-structured RK4 (see _l63_rk4_step); each member in registers."""
    for m in range(x0.shape[0]):
        x, y, z = x0[m, 0], x0[m, 1], x0[m, 2]
        out[m, 0, 0], out[m, 0, 1], out[m, 0, 2] = x, y, z
        for j in range(1, n_out):
            for _ in range(k):
                x, y, z = _l63_rk4_step(x, y, z, h, a, b, c, d, e, f, g)
            out[m, j, 0], out[m, j, 1], out[m, j, 2] = x, y, z


@nb.njit(cache=True)
def l63_steps_outer(x0, n_out, k, h, a, b, c, d, e, f, g, out):
    """Same equations, members in the inner loops (vectorisable over members)."""
    M = x0.shape[0]
    X = x0[:, 0].copy()
    Y = x0[:, 1].copy()
    Z = x0[:, 2].copy()
    for m in range(M):
        out[m, 0, 0], out[m, 0, 1], out[m, 0, 2] = X[m], Y[m], Z[m]
    for j in range(1, n_out):
        for _ in range(k):
            for m in range(M):
                X[m], Y[m], Z[m] = _l63_rk4_step(X[m], Y[m], Z[m], h, a, b, c, d, e, f, g)
        for m in range(M):
            out[m, j, 0], out[m, j, 1], out[m, j, 2] = X[m], Y[m], Z[m]


# ---------------------------------------------------------------- hand-written Lorenz-96 kernel
@nb.njit(cache=True)
def _l96(x, forcing, out):
    n, M = x.shape
    for i in range(n):
        ip, im, imm = (i + 1) % n, (i - 1) % n, (i - 2) % n
        for m in range(M):
            out[i, m] = (x[ip, m] - x[imm, m]) * x[im, m] - x[i, m] + forcing


@nb.njit(cache=True)
def l96_hand(x0, n_out, k, h, forcing, out):
    """RK4 of the Lorenz-96 ring written out by hand: rows = stations, columns = members."""
    M, n = x0.shape
    X = np.empty((n, M))
    K1 = np.empty((n, M))
    K2 = np.empty((n, M))
    K3 = np.empty((n, M))
    K4 = np.empty((n, M))
    Y = np.empty((n, M))
    for m in range(M):
        for i in range(n):
            X[i, m] = x0[m, i]
            out[m, 0, i] = X[i, m]
    for j in range(1, n_out):
        for _ in range(k):
            _l96(X, forcing, K1)
            for i in range(n):
                for m in range(M):
                    Y[i, m] = X[i, m] + 0.5 * h * K1[i, m]
            _l96(Y, forcing, K2)
            for i in range(n):
                for m in range(M):
                    Y[i, m] = X[i, m] + 0.5 * h * K2[i, m]
            _l96(Y, forcing, K3)
            for i in range(n):
                for m in range(M):
                    Y[i, m] = X[i, m] + h * K3[i, m]
            _l96(Y, forcing, K4)
            for i in range(n):
                for m in range(M):
                    X[i, m] += h / 6.0 * (K1[i, m] + 2.0 * K2[i, m] + 2.0 * K3[i, m] + K4[i, m])
        for m in range(M):
            for i in range(n):
                out[m, j, i] = X[i, m]


FIRST_CALL = """
import time
t = time.perf_counter()
import numpy as np
from ergodex.surrogate import Surrogate, polynomial_terms
from ergodex.integrate import integrate_ensemble
c = np.zeros((3, 10)); c[0, 1] = -10; c[0, 2] = 10; c[1, 1] = 28; c[1, 2] = -1; c[1, 6] = -1
c[2, 3] = -8 / 3; c[2, 5] = 1
s = Surrogate(("a", "b", "c"), polynomial_terms(3, 2), c)
r = integrate_ensemble(s, np.ones((64, 3)), dt_out=0.1, n_out=11, substep=0.01)
print(time.perf_counter() - t)
"""


def first_call_seconds(cache_dir: str | None) -> float:
    env = dict(os.environ)
    if cache_dir is not None:
        env["NUMBA_CACHE_DIR"] = cache_dir
    out = subprocess.run(
        [sys.executable, "-c", FIRST_CALL], env=env, capture_output=True, text=True, check=True
    )
    return float(out.stdout.strip().splitlines()[-1])


def main() -> None:
    global M
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller runs (smoke test)")
    parser.add_argument(
        "--no-first-call", action="store_true", help="skip the fresh-process timings"
    )
    parser.add_argument(
        "--members",
        type=int,
        default=M,
        help=f"ensemble size M (default {M}, the size the targets are stated for)",
    )
    args = parser.parse_args()
    # The kernels read the ensemble size from their arrays; M sets how many members the runs use.
    M = args.members
    steps = 10_000 if args.quick else 100_000
    n_out = steps // K + 1
    rng = np.random.default_rng(2024)

    print(
        f"# ergodex integrate benchmark: M={M}, RK4 h={H}, {steps} steps, outputs every {K} steps"
    )
    print(f"# numba {nb.__version__}, numpy {np.__version__}, {os.cpu_count()} cpus")
    model, fitted, runs = fit_lorenz63(rng)
    print("fitted Lorenz-63 surrogate:")
    for line in fitted.equations():
        print("   ", line)
    x0 = runs[:, -1, :][rng.integers(0, runs.shape[0], M)] + rng.normal(scale=0.1, size=(M, 3))

    rates: dict[str, float] = {}

    # pysindy simulate: one member, a short run, LSODA with the library's defaults.
    n_ps = 50 if args.quick else 200
    t_ps = np.arange(n_ps + 1) * H
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sec = best_of(lambda: model.simulate(x0[0], t_ps), repeats=1)
    rates["pysindy simulate"] = n_ps / sec

    # Plain numpy ensemble RK4 over the dense library (short run, extrapolated).
    powers = np.array([t.powers for t in fitted.terms], dtype=float)
    n_np = 1000 if args.quick else 4000
    sec = best_of(
        lambda: numpy_rk4(powers, np.asarray(fitted.coefficients), x0, n_np, K), repeats=2
    )
    rates["numpy RK4"] = M * n_np / sec

    # ergodex (warm-up call first so that compilation or cache load is not timed).
    integrate_ensemble(fitted, x0, dt_out=K * H, n_out=3, substep=H)
    res = None

    def run_ergodex():
        nonlocal res
        res = integrate_ensemble(fitted, x0, dt_out=K * H, n_out=n_out, substep=H)

    run_ergodex()
    assert res.status == "ok", res.message

    # Hand-written kernels with the fitted coefficients typed into the Lorenz structure.
    terms = {t.powers: k for k, t in enumerate(fitted.terms)}
    C = np.asarray(fitted.coefficients)
    pattern = np.flatnonzero(C.ravel())
    lorenz_shape = np.array_equal(
        pattern, np.flatnonzero(dense_quadratic(lorenz63_surrogate()).coefficients)
    )
    if not lorenz_shape:
        print(
            "note: the fit found terms beyond the Lorenz structure; the hand kernels use the "
            "Lorenz terms only"
        )
    coefs = (
        C[0, terms[(1, 0, 0)]],
        C[0, terms[(0, 1, 0)]],
        C[1, terms[(1, 0, 0)]],
        C[1, terms[(0, 1, 0)]],
        C[1, terms[(1, 0, 1)]],
        C[2, terms[(0, 0, 1)]],
        C[2, terms[(1, 1, 0)]],
    )
    out = np.empty((M, n_out, 3))
    l63_members_outer(x0, 3, K, H, *coefs, out)
    l63_steps_outer(x0, 3, K, H, *coefs, out)
    best, rounds = interleaved_best(
        {
            "ergodex": run_ergodex,
            "hand numba (members outer)": lambda: l63_members_outer(x0, n_out, K, H, *coefs, out),
            "hand numba (steps outer)": lambda: l63_steps_outer(x0, n_out, K, H, *coefs, out),
        }
    )
    for name, sec in best.items():
        rates[name] = M * steps / sec
    ceiling_name = max(("hand numba (members outer)", "hand numba (steps outer)"), key=rates.get)
    ceiling = rates[ceiling_name]
    med63 = round_ratio(rounds, "ergodex", ceiling_name)
    if lorenz_shape:
        # Same model, same steps: the hand kernel and ergodex agree to round-off over a short run.
        short = integrate_ensemble(fitted, x0, dt_out=K * H, n_out=11, substep=H).states
        hand = np.empty((M, 11, 3))
        l63_steps_outer(x0, 11, K, H, *coefs, hand)
        print(f"max |ergodex - hand| after 1 time unit: {np.max(np.abs(short - hand)):.2e}")

    print("\nLorenz-63 (fitted), member-steps per second:")
    for name, r in rates.items():
        print(f"  {name:30s} {r:14.4g}")
    print(
        f"  ergodex / pysindy simulate     {rates['ergodex'] / rates['pysindy simulate']:14.1f}x   "
        "(target >= 1000)"
    )
    print(
        f"  ergodex / numpy RK4            {rates['ergodex'] / rates['numpy RK4']:14.1f}x   "
        "(target >= 10)"
    )
    print(f"  ergodex / hand numba (best)    {rates['ergodex'] / ceiling:14.2f}x   (target >= 0.5)")
    print(
        f"  same, round by round: median {med63[0]:.2f}, range {med63[1]:.2f}-{med63[2]:.2f} "
        f"({len(rounds['ergodex'])} rounds)"
    )

    # Validate's default ensemble: 16 members, the same model and contenders side by side.
    m16 = 16
    x16 = x0[:m16] if M >= m16 else x0[rng.integers(0, M, m16)]
    out16 = np.empty((m16, n_out, 3))
    integrate_ensemble(fitted, x16, dt_out=K * H, n_out=3, substep=H)
    best16, rounds16 = interleaved_best(
        {
            "ergodex": lambda: integrate_ensemble(
                fitted, x16, dt_out=K * H, n_out=n_out, substep=H
            ),
            "hand numba (members outer)": lambda: l63_members_outer(
                x16, n_out, K, H, *coefs, out16
            ),
            "hand numba (steps outer)": lambda: l63_steps_outer(x16, n_out, K, H, *coefs, out16),
        }
    )
    print(f"\nLorenz-63 (fitted) at {m16} members, member-steps per second:")
    for name, sec in best16.items():
        print(f"  {name:30s} {m16 * steps / sec:14.4g}   ({sec / steps * 1e9:7.0f} ns per step)")
    for hand_name in ("hand numba (members outer)", "hand numba (steps outer)"):
        med = round_ratio(rounds16, "ergodex", hand_name)
        print(
            f"  ergodex / {hand_name:26s} {best16[hand_name] / best16['ergodex']:6.2f}x   "
            f"(round median {med[0]:.2f}, range {med[1]:.2f}-{med[2]:.2f})"
        )

    # Lorenz-96, 40 stations.
    l96 = dense_quadratic(lorenz96_surrogate())
    tables = l96.term_tables()
    steps96 = steps // 10
    n_out96 = steps96 // K + 1
    y0 = 8.0 + rng.normal(size=(M, 40))
    integrate_ensemble(l96, y0, dt_out=K * H, n_out=3, substep=H)
    r96 = {}

    def run96():
        integrate_ensemble(l96, y0, dt_out=K * H, n_out=n_out96, substep=H)

    out96 = np.empty((M, n_out96, 40))
    l96_hand(y0, 3, K, H, 8.0, out96)
    best, rounds = interleaved_best(
        {"ergodex": run96, "hand numba": lambda: l96_hand(y0, n_out96, K, H, 8.0, out96)}
    )
    med96 = round_ratio(rounds, "ergodex", "hand numba")
    for name, sec in best.items():
        r96[name] = M * steps96 / sec
    check = integrate_ensemble(l96, y0, dt_out=K * H, n_out=3, substep=H).states
    hand = np.empty((M, 3, 40))
    l96_hand(y0, 3, K, H, 8.0, hand)
    print(
        f"\nLorenz-96 N=40 ({l96.n_terms} candidate terms, {len(tables['active'])} active, "
        f"{len(tables['coef_value'])} non-zero coefficients), {steps96} steps, "
        "member-steps per second:"
    )
    for name, r in r96.items():
        print(f"  {name:30s} {r:14.4g}")
    print(
        f"  ergodex / hand numba           {r96['ergodex'] / r96['hand numba']:14.2f}x   "
        "(target >= 0.3)"
    )
    print(f"  same, round by round: median {med96[0]:.2f}, range {med96[1]:.2f}-{med96[2]:.2f}")
    print(f"  max |ergodex - hand| after 0.2 time units: {np.max(np.abs(check - hand)):.2e}")

    if not args.no_first_call:
        warm = first_call_seconds(None)
        with tempfile.TemporaryDirectory() as empty:
            cold = first_call_seconds(empty)
            again = first_call_seconds(empty)
        print("\nFirst call in a fresh process (import + kernel + 64 members x 100 steps):")
        print(f"  with the on-disk cache         {warm:8.2f} s   (target < 3)")
        print(f"  empty cache (compiles)         {cold:8.2f} s")
        print(f"  after that compile (cached)    {again:8.2f} s")


if __name__ == "__main__":
    main()
