"""Wall time of ``ergodex demo`` end to end, in a fresh process, in a temporary folder.

Usage: python benchmarks/demo.py [--scenario convection-loop|ring] [--repeat N]
The issue's target: under a minute on 2 cores for the default scenario.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--scenario", default="convection-loop")
    parser.add_argument("--repeat", type=int, default=2)
    args = parser.parse_args()
    times = []
    for i in range(args.repeat):
        with tempfile.TemporaryDirectory() as tmp:
            start = time.perf_counter()
            proc = subprocess.run(
                [
                    sys.executable,
                    "-c",
                    "import sys; from ergodex.cli import main; sys.exit(main())",
                    "demo",
                    "--scenario",
                    args.scenario,
                ],
                cwd=tmp,
                capture_output=True,
                text=True,
                env={**os.environ, "ERGODEX_HOME": ""},
            )
            elapsed = time.perf_counter() - start
        times.append(elapsed)
        print(f"run {i + 1}: exit {proc.returncode}, {elapsed:.1f} s")
        if proc.returncode not in (0, 1):
            print(proc.stderr)
    print(
        f"demo ({args.scenario}): best {min(times):.1f} s, worst {max(times):.1f} s "
        f"over {args.repeat} fresh processes (first includes any compile-cache fill)"
    )


if __name__ == "__main__":
    main()
