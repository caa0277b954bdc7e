"""What one retrain costs, step by step, and what the HTML report adds (inbox sizing).

Runs the same retrain (incumbent present, new data of the same convection loop) on fresh copies of
one registry, alternating ``report=True`` and ``report=False``, and prints the median wall time of
each with their ratio, plus the inbox throughput without reports. Ratios come from one run, side by
side, so they compare like with like on a loaded machine.

Usage: /work/venv/bin/python benchmarks/retrain_cost.py [--repeats 3]
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import tempfile
import threading
import time
from pathlib import Path


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--files", type=int, default=10, help="files for the inbox throughput")
    args = parser.parse_args()

    from ergodex.registry import Registry
    from ergodex.retraining import retrain
    from ergodex.scenarios import convection_loop
    from ergodex.watching import watch

    root = Path(tempfile.mkdtemp(prefix="ergodex-retrain-bench-"))
    try:
        first = convection_loop(seed=2, n_runs=6, duration=40.0, dt=0.02, spinup=10.0)
        new = convection_loop(seed=102, n_runs=6, duration=40.0, dt=0.02, spinup=10.0)
        base = root / "base"
        retrain(Registry(base), "loop", first, report=False)  # the incumbent; warms imports too
        times: dict[bool, list[float]] = {True: [], False: []}
        for i in range(args.repeats):
            for report in (True, False):
                home = root / f"copy-{i}-{report}"
                shutil.copytree(base, home)
                t0 = time.perf_counter()
                retrain(Registry(home), "loop", new, report=report)
                times[report].append(time.perf_counter() - t0)
        with_report = statistics.median(times[True])
        without = statistics.median(times[False])
        print(f"retrain with report:    {with_report:.2f} s (median of {args.repeats})")
        print(f"retrain without report: {without:.2f} s (median of {args.repeats})")
        print(f"ratio with / without:   {with_report / without:.2f}")

        # Inbox throughput: small files (4 runs x 20 time units), 8-member checks, no reports.
        import sys

        sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
        from retrain_support import write_csv

        inbox = root / "inbox"
        inbox.mkdir()
        data = convection_loop(seed=7, n_runs=4 * args.files, duration=20.0, dt=0.02, spinup=10.0)
        for i in range(args.files):
            write_csv(root / f"f{i:02d}.csv", data.select_runs(range(4 * i, 4 * i + 4)))
        registry = Registry(root / "inbox-home")
        t0 = time.perf_counter()
        done: list = []
        worker = threading.Thread(
            target=lambda: done.extend(
                watch(
                    inbox,
                    "loop",
                    registry=registry,
                    spec={"members": 8},
                    report=False,
                    poll_interval=0.05,
                    max_files=args.files,
                )
            )
        )
        worker.start()
        for i in range(args.files):
            shutil.move(str(root / f"f{i:02d}.csv"), str(inbox / f"f{i:02d}.csv"))
        worker.join()
        elapsed = time.perf_counter() - t0
        print(f"inbox: {len(done)} files in {elapsed:.1f} s = {elapsed / len(done):.2f} s per file")
    finally:
        shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
