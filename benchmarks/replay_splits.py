"""Threshold of the null replicates with 4 floor splits (the default) against every split.

Issue 16: on Lorenz-96 (160 rows) the derived threshold came out far above the true model's
largest ratio. This runs the true model of one case of ``calibration_systems.py`` with
``nullfloor.MAX_REPLICATE_SPLITS`` at 4 and at 64 (every split the check has, at most 64) and
prints the unfloored null quantile, the median of the replicates' largest ratio, the check's
own largest ratio and the seconds of each check (fixed-tolerance check beside it).

    PYTHONPATH=src python benchmarks/replay_splits.py lorenz96-40 --trials 0 1
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path


def main(argv=None) -> int:
    sys.path.insert(0, str(Path(__file__).parent))
    import calibration_systems as cs

    from ergodex import nullfloor, validation
    from ergodex.validation import threshold as th

    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("case", choices=list(cs.SYSTEMS))
    p.add_argument("--trials", type=int, nargs="+", default=[0])
    p.add_argument("--splits", type=int, nargs="+", default=[4, 64])
    args = p.parse_args(argv)
    system = cs.SYSTEMS[args.case]
    for trial in args.trials:
        # the data seed of calibration_systems.run_trial
        data = system.data(1000 * (list(cs.SYSTEMS).index(args.case) + 1) + trial)
        surrogate = system.truth()
        for splits in args.splits:
            nullfloor.MAX_REPLICATE_SPLITS = splits
            th._RECENT.clear()  # the cache key does not hold the number of splits
            t0 = time.perf_counter()
            card = validation.validate(
                surrogate, data, validation.CheckSpec(seed=trial, threshold_floor=None)
            )
            t1 = time.perf_counter()
            validation.validate(
                surrogate, data, validation.CheckSpec(seed=trial, false_reject_rate=None)
            )
            t2 = time.perf_counter()
            print(
                f"{args.case} trial {trial} splits ≤{splits}: rows {len(card.rows)}, floor pairs "
                f"{card.settings['n_floor_pairs']}, null quantile "
                f"{card.threshold['null_quantile']:.2f}, null median "
                f"{card.threshold['null_median']:.2f}, largest {card.largest_ratio:.2f}, "
                f"s {t1 - t0:.1f} (fixed {t2 - t1:.1f})",
                flush=True,
            )
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
