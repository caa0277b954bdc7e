"""Registry speed: registering (one writer vs several at once) and loading (verified vs a bare
read).

Run from the repository root:

    /work/venv/bin/python benchmarks/registry_throughput.py [--versions 40] [--writers 4]

Everything runs side by side in one temporary folder in one run, so the ratios compare like with
like on a loaded machine. Registration time is dominated by fsync (every file, the staging
folder, the version's parent folder, and the SQLite commit with synchronous=FULL).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import numpy as np

from ergodex.registry import Registry
from ergodex.scenarios import lorenz63_surrogate
from ergodex.surrogate import Surrogate

WRITER = textwrap.dedent(
    """
    import sys
    from ergodex.registry import Registry
    home, model, card, evidence, n = sys.argv[1:6]
    reg = Registry(home)
    for _ in range(int(n)):
        reg.register("bench", model, scorecard=card, evidence_path=evidence)
    """
)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--versions", type=int, default=40, help="versions registered per case")
    parser.add_argument("--writers", type=int, default=4, help="concurrent writer processes")
    args = parser.parse_args()
    rng = np.random.default_rng(0)

    with tempfile.TemporaryDirectory(prefix="ergodex-registry-bench-") as tmp:
        tmp = Path(tmp)
        truth = lorenz63_surrogate()
        model = tmp / "model.json"
        truth.to_json(model)
        card = tmp / "scorecard.json"
        card.write_text(
            json.dumps(
                {
                    "verdict": "pass",
                    "data_fingerprint": "sha256:" + "00" * 32,
                    "model_fingerprint": truth.fingerprint(),
                }
            )
        )
        evidence = tmp / "evidence.npz"
        np.savez(evidence, sample=rng.normal(size=(20_000, 3)))  # ~0.5 MB, like a real check

        # One writer.
        reg = Registry(tmp / "serial")
        start = time.perf_counter()
        for _ in range(args.versions):
            reg.register("bench", model, scorecard=card, evidence_path=evidence)
        serial = (time.perf_counter() - start) / args.versions

        # Several writers at once, same total number of versions.
        per_writer = max(1, args.versions // args.writers)
        start = time.perf_counter()
        procs = [
            subprocess.Popen(
                [
                    sys.executable,
                    "-c",
                    WRITER,
                    str(tmp / "parallel"),
                    str(model),
                    str(card),
                    str(evidence),
                    str(per_writer),
                ]
            )
            for _ in range(args.writers)
        ]
        for p in procs:
            if p.wait() != 0:
                raise SystemExit("a writer failed")
        total = per_writer * args.writers
        parallel = (time.perf_counter() - start) / total
        numbers = [v.version for v in Registry(tmp / "parallel").versions("bench")]
        assert numbers == list(range(1, total + 1))

        # Loading: verified (every artifact hashed) vs reading model.json directly.
        refs = [f"bench/{v}" for v in range(1, args.versions + 1)]
        start = time.perf_counter()
        for ref in refs:
            reg.load(ref)
        verified = (time.perf_counter() - start) / len(refs)
        paths = [reg.get(ref).folder / "model.json" for ref in refs]
        start = time.perf_counter()
        for path in paths:
            Surrogate.from_json(path)
        bare = (time.perf_counter() - start) / len(paths)

    print(f"register, 1 writer:            {serial * 1e3:8.1f} ms per version")
    print(
        f"register, {args.writers} writers at once:  {parallel * 1e3:8.1f} ms per version "
        f"(wall time / versions, incl. process start)"
    )
    print(f"  ratio serial / concurrent:   {serial / parallel:8.2f}")
    print(
        f"load with verification:        {verified * 1e3:8.2f} ms (model + scorecard + 0.5 MB "
        "evidence hashed)"
    )
    print(f"bare Surrogate.from_json:      {bare * 1e3:8.2f} ms")
    print(f"  ratio verified / bare:       {verified / bare:8.2f}")


if __name__ == "__main__":
    main()
