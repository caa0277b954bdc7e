"""How a check's time and peak memory grow with the samples and the variables.

Each case runs in a fresh interpreter (so its peak resident memory is its own): the data are
generated, a small check warms the compiled kernels up, the resident memory is read, then one
scorecard-only check (``validate``'s default: no evidence) is timed. Printed per case: data
size, check time, peak resident memory of the process, and that peak against the target
``300 MB + 20 × data``; then the slopes of log time against log samples and log variables.

Cases: the heated convection loop (Lorenz-63, 3 variables, 4 runs, the sample counts given)
and the ring of stations (Lorenz-96, 4 runs × 2000 samples, the station counts given), each
checked against its true equations with 16 members.

``--threads KIND SIZE`` instead measures, in one process, the statistics of a check alone
(group statistics of 70 reference groups of 4 pieces and of 16 model groups, and the distances
of every row) with 1 and with 2 threads, alternating, and the whole check with each.

``--dask KIND SIZE`` compares, in one process, the ensemble integration and the whole check on
this machine with the same on a 2-worker Dask LocalCluster (worker processes, one thread each;
cluster start-up not counted), and says whether the scorecards agree.

Usage (repository root)::

    /work/venv/bin/python benchmarks/check_scaling.py [--samples 1e4 1e5 1e6] [--stations 20 40 100]
    /work/venv/bin/python benchmarks/check_scaling.py --one l63 1000000   # one case, JSON
    /work/venv/bin/python benchmarks/check_scaling.py --threads l63 1000000 [--repeats 3]
    /work/venv/bin/python benchmarks/check_scaling.py --dask l96 100 [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import math
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _peak_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _current_mb() -> float:
    with open("/proc/self/statm") as handle:
        return int(handle.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def one_case(kind: str, size: int, workers: int | None) -> dict:
    """Generate the data, warm up, time one scorecard-only check; sizes in MB."""
    import numpy as np

    from ergodex import scenarios, validation

    extra = {} if workers is None else {"workers": workers}  # check()'s thread count
    if kind == "l63":
        data = scenarios.convection_loop(seed=1, duration=size / 4 * 0.01)
        sur = scenarios.lorenz63_surrogate()
        small = scenarios.convection_loop(seed=2, duration=20.0)
    else:
        data = scenarios.station_ring(seed=1, n=size, duration=2000 * 0.05)
        sur = scenarios.lorenz96_surrogate(n=size)
        small = scenarios.station_ring(seed=2, n=size, duration=200 * 0.05)
    spec = validation.CheckSpec(members=16, seed=0)
    validation.check(
        sur, small, spec, evidence=False, **extra
    )  # kernels compiled or loaded from cache
    before = _current_mb()
    t0 = time.perf_counter()
    card = validation.check(sur, data, spec, evidence=False, **extra).scorecard
    elapsed = time.perf_counter() - t0
    data_mb = sum(np.asarray(r).nbytes for r in data.runs) / 2**20
    return {
        "kind": kind,
        "size": size,
        "samples": int(data.n_samples),
        "variables": int(data.n_variables),
        "data_mb": data_mb,
        "seconds": elapsed,
        "rss_before_mb": before,
        "peak_mb": _peak_mb(),
        "target_mb": 300.0 + 20.0 * data_mb,
        "verdict": card.verdict,
        "largest_ratio": card.largest_ratio,
    }


def threads_case(kind: str, size: int, repeats: int) -> None:
    """Statistics alone and the whole check, 1 thread against 2, alternating."""
    import itertools
    import statistics as st

    import numpy as np

    from ergodex import scenarios, validation
    from ergodex.group_stats import group_statistics, pair_distances
    from ergodex.integrate import integrate_ensemble

    if kind == "l63":
        data = scenarios.convection_loop(seed=1, duration=size / 4 * 0.01)
        sur = scenarios.lorenz63_surrogate()
    else:
        data = scenarios.station_ring(seed=1, n=size, duration=2000 * 0.05)
        sur = scenarios.lorenz96_surrogate(n=size)
    runs = [np.asarray(r) for r in data.runs]
    L = min(r.shape[0] for r in runs) // 2
    pieces = np.stack([r[i * L : (i + 1) * L] for r in runs for i in range(2)])  # 8 pieces
    groups = [tuple(c) for c in itertools.combinations(range(8), 4)]
    model = integrate_ensemble(
        sur,
        np.concatenate(runs)[:: max(1, data.n_samples // 16)][:16],
        dt_out=data.dt,
        n_out=4 * L,
        seed=0,
    ).states
    model_pieces = [model[m, k * L : (k + 1) * L] for k in range(4) for m in range(16)]
    model_groups = [tuple(range(g * 4, g * 4 + 4)) for g in range(16)]
    names = ("histogram", "quantiles", "autocorrelation", "spectrum")
    kw = dict(statistics=names, max_lag=max(1, L // 40), dt=data.dt, nperseg=min(256, L // 8))

    def statistics_alone(workers: int) -> float:
        t0 = time.perf_counter()
        ref = group_statistics(pieces, groups, workers=workers, **kw)
        mod = group_statistics(model_pieces, model_groups, workers=workers, **kw)
        for name in names:
            pair_distances(name, mod, ref, workers=workers)
        return time.perf_counter() - t0

    spec = validation.CheckSpec(members=16, seed=0)

    def whole(workers: int) -> float:
        t0 = time.perf_counter()
        validation.check(sur, data, spec, evidence=False, workers=workers)
        return time.perf_counter() - t0

    whole(1)  # warm-up
    times: dict[str, list[float]] = {k: [] for k in ("s1", "s2", "c1", "c2")}
    for _ in range(repeats):
        times["s1"].append(statistics_alone(1))
        times["s2"].append(statistics_alone(2))
        times["c1"].append(whole(1))
        times["c2"].append(whole(2))
    med = {k: st.median(v) for k, v in times.items()}
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    print(
        f"{kind} {size:g}: {data.n_samples} samples x {data.n_variables} variables, "
        f"medians of {repeats}"
    )
    print(
        f"statistics alone: 1 thread {med['s1']:.2f} s, 2 threads {med['s2']:.2f} s, "
        f"speed-up {med['s1'] / med['s2']:.2f}"
    )
    print(
        f"whole check:      1 thread {med['c1']:.2f} s, 2 threads {med['c2']:.2f} s, "
        f"speed-up {med['c1'] / med['c2']:.2f}"
    )
    print(f"load average after: {os.getloadavg()[0]:.1f}")


def _case_data(kind: str, size: int):
    from ergodex import scenarios

    if kind == "l63":
        return scenarios.convection_loop(seed=1, duration=size / 4 * 0.01), (
            scenarios.lorenz63_surrogate()
        )
    return scenarios.station_ring(seed=1, n=size, duration=2000 * 0.05), (
        scenarios.lorenz96_surrogate(n=size)
    )


def dask_case(kind: str, size: int, repeats: int, members: int) -> None:
    """Integration and whole check here and on a 2-worker LocalCluster, alternating."""
    import statistics as st

    import numpy as np
    from dask.distributed import Client, LocalCluster

    from ergodex import validation
    from ergodex.cluster import integrate_scattered
    from ergodex.integrate import integrate_ensemble

    data, sur = _case_data(kind, size)
    spec = validation.CheckSpec(members=members, seed=0)
    starts = np.concatenate(data.runs)[:: max(1, data.n_samples // members)][:members]
    n_out = 4 * min(data.lengths)
    times: dict[str, list[float]] = {k: [] for k in ("i_here", "i_dask", "c_here", "c_dask")}
    with (
        LocalCluster(n_workers=2, threads_per_worker=1, dashboard_address=None) as cluster,
        Client(cluster) as client,
    ):
        here = validation.check(sur, data, spec, evidence=False).scorecard  # warm-up
        there = validation.check(sur, data, spec, evidence=False, scheduler=client).scorecard
        for _ in range(repeats):
            t0 = time.perf_counter()
            integrate_ensemble(sur, starts, dt_out=data.dt, n_out=n_out, seed=0)
            times["i_here"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            integrate_scattered(sur, starts, dt_out=data.dt, n_out=n_out, seed=0, scheduler=client)
            times["i_dask"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            validation.check(sur, data, spec, evidence=False)
            times["c_here"].append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            validation.check(sur, data, spec, evidence=False, scheduler=client)
            times["c_dask"].append(time.perf_counter() - t0)
    med = {k: st.median(v) for k, v in times.items()}
    same = [(r.value, r.noise_floor) for r in here.rows] == [
        (r.value, r.noise_floor) for r in there.rows
    ]
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    print(f"{kind} {size:g}: {members} members, medians of {repeats}")
    print(
        f"integration ({members} x {n_out} outputs): here {med['i_here']:.2f} s, "
        f"2-worker LocalCluster {med['i_dask']:.2f} s, ratio {med['i_here'] / med['i_dask']:.2f}"
    )
    print(
        f"whole check: here {med['c_here']:.2f} s, LocalCluster {med['c_dask']:.2f} s, "
        f"ratio {med['c_here'] / med['c_dask']:.2f}"
    )
    print(
        f"scorecards agree: verdict {here.verdict == there.verdict}, every row value and "
        f"floor {same}"
    )
    print(f"load average after: {os.getloadavg()[0]:.1f}")


def _run(kind: str, size: int, workers: int | None) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT / "src"), env.get("PYTHONPATH", "")])
    argv = [sys.executable, __file__, "--one", kind, str(size)]
    if workers is not None:
        argv += ["--workers", str(workers)]
    proc = subprocess.run(argv, env=env, capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        return {"kind": kind, "size": size, "error": proc.stderr.strip().splitlines()[-1:]}
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _slope(rows: list[dict], key: str) -> float:
    ok = [r for r in rows if "seconds" in r]
    if len(ok) < 2:
        return float("nan")
    x = [math.log(r[key]) for r in ok]
    y = [math.log(r["seconds"]) for r in ok]
    mx, my = sum(x) / len(x), sum(y) / len(y)
    return sum((a - mx) * (b - my) for a, b in zip(x, y)) / sum((a - mx) ** 2 for a in x)


def _print(rows: list[dict]) -> None:
    print(
        f"{'case':<22} {'data MB':>8} {'check s':>8} {'RSS before':>10} {'peak MB':>8} "
        f"{'target MB':>9}  {'peak/target':>11}  verdict"
    )
    for r in rows:
        name = f"{r['kind']} {r['size']:g}"
        if "error" in r:
            print(f"{name:<22} failed: {r['error']}")
            continue
        print(
            f"{name:<22} {r['data_mb']:>8.1f} {r['seconds']:>8.2f} {r['rss_before_mb']:>10.0f} "
            f"{r['peak_mb']:>8.0f} "
            f"{r['target_mb']:>9.0f}  {r['peak_mb'] / r['target_mb']:>11.2f}  {r['verdict']}"
        )


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--samples", type=float, nargs="*", default=[1e4, 1e5, 1e6])
    p.add_argument("--stations", type=int, nargs="*", default=[20, 40, 100])
    p.add_argument(
        "--workers",
        type=int,
        default=None,
        help="threads of the statistics (check(workers=...)); default: check()'s own default",
    )
    p.add_argument("--one", nargs=2, metavar=("KIND", "SIZE"), help=argparse.SUPPRESS)
    p.add_argument("--threads", nargs=2, metavar=("KIND", "SIZE"), default=None)
    p.add_argument("--dask", nargs=2, metavar=("KIND", "SIZE"), default=None)
    p.add_argument("--members", type=int, default=16, help="--dask: ensemble members")
    p.add_argument("--repeats", type=int, default=3)
    args = p.parse_args(argv)
    if args.dask:
        dask_case(args.dask[0], int(float(args.dask[1])), args.repeats, args.members)
        return 0
    if args.threads:
        threads_case(args.threads[0], int(float(args.threads[1])), args.repeats)
        return 0
    if args.one:
        print(json.dumps(one_case(args.one[0], int(float(args.one[1])), args.workers)))
        return 0
    print(f"machine: {os.cpu_count()} cores, load average {os.getloadavg()[0]:.1f}")
    l63 = [_run("l63", int(n), args.workers) for n in args.samples]
    l96 = [_run("l96", n, args.workers) for n in args.stations]
    _print(l63 + l96)
    print(f"slope of log time against log samples (Lorenz-63): {_slope(l63, 'samples'):.2f}")
    print(f"slope of log time against log variables (Lorenz-96): {_slope(l96, 'variables'):.2f}")
    print(f"load average after: {os.getloadavg()[0]:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
