"""Load on the HTTP service: 50 concurrent clients read the accepted model while 4 jobs run.

Not a test: it prints figures for benchmarks/README.md. One run measures, side by side on the
same server, the read latency with the job workers idle and with 4 fit jobs running, and
reports the ratio. Every response is checked (status 200 and the exact bytes the registry
holds); any failed request makes the script exit with code 1.

Run from the repository root:

    /work/venv/bin/python benchmarks/service_load.py [--clients 50] [--requests 20]
        [--time-limit 120]
"""

from __future__ import annotations

import argparse
import asyncio
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TOKEN = "benchmark-token-0123456789abcdef"
NAME = "convection-loop"


def convection_csv(seed: int, n_runs: int, duration: float) -> bytes:
    from ergodex import scenarios
    from ergodex.writers import write_csv

    series = scenarios.convection_loop(seed=seed, n_runs=n_runs, duration=duration)
    with tempfile.TemporaryDirectory() as folder:
        return write_csv(Path(folder) / "loop.csv", series, digits=8).read_bytes()


def wait(client, job_id: str, timeout: float) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        job = client.get(f"/jobs/{job_id}").json()
        if job["state"] in ("succeeded", "failed"):
            return job
        time.sleep(0.25)
    raise SystemExit(f"job {job_id} did not finish in {timeout} s")


async def load(
    url: str, path: str, expected: bytes, clients: int, per_client: int, time_limit: float
) -> tuple[list[float], list[str]]:
    """Run ``clients`` concurrent clients, each making ``per_client`` sequential reads."""
    import httpx

    latencies: list[float] = []
    failures: list[str] = []
    deadline = time.monotonic() + time_limit
    limits = httpx.Limits(max_connections=clients, max_keepalive_connections=clients)
    async with httpx.AsyncClient(base_url=url, timeout=60, limits=limits) as client:

        async def one_client() -> None:
            for _ in range(per_client):
                if time.monotonic() > deadline:
                    return
                start = time.perf_counter()
                try:
                    response = await client.get(path)
                except httpx.HTTPError as exc:
                    failures.append(f"{type(exc).__name__}: {exc}")
                    continue
                latencies.append(time.perf_counter() - start)
                if response.status_code != 200 or response.content != expected:
                    failures.append(f"status {response.status_code}, {len(response.content)} bytes")

        await asyncio.gather(*(one_client() for _ in range(clients)))
    return latencies, failures


def summary(latencies: list[float]) -> dict[str, float]:
    ms = np.asarray(latencies) * 1000.0
    return {
        "n": float(ms.size),
        "p50": float(np.percentile(ms, 50)),
        "p95": float(np.percentile(ms, 95)),
        "p99": float(np.percentile(ms, 99)),
        "max": float(ms.max()),
        "mean": float(statistics.fmean(ms)),
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--clients", type=int, default=50)
    parser.add_argument("--requests", type=int, default=20, help="reads per client per phase")
    parser.add_argument("--jobs", type=int, default=4)
    parser.add_argument("--time-limit", type=float, default=120.0, help="seconds per phase")
    args = parser.parse_args(argv)

    import httpx

    from ergodex.registry import Registry
    from ergodex.service.process import ServerProcess

    with tempfile.TemporaryDirectory(prefix="ergodex-load-") as tmp:
        root = Path(tmp)
        (root / "token").write_text(TOKEN)
        headers = {"Authorization": f"Bearer {TOKEN}"}
        with ServerProcess(root / "home", token_file=root / "token", workers=args.jobs) as server:
            with httpx.Client(base_url=server.url, timeout=60, headers=headers) as client:
                up = client.post(
                    "/datasets", files={"file": ("loop.csv", convection_csv(5, 4, 30.0))}
                )
                up.raise_for_status()
                dataset = up.json()["id"]
                base = {"dataset": dataset, "name": NAME, "check": {"members": 8, "seed": 1}}
                job = client.post("/jobs/fit", json=dict(base, method="sparse")).json()
                fitted = wait(client, job["id"], 300)
                if fitted["state"] != "succeeded":
                    print(f"setup fit failed: {fitted['error']}", file=sys.stderr)
                    return 1
                version = fitted["result"]["version"]
                accepted = client.post(
                    f"/models/{NAME}/versions/{version}/accept",
                    json={"reason": "load benchmark", "override": True},
                )
                accepted.raise_for_status()
                expected = Registry(root / "home").artifact(f"{NAME}/{version}", "model.json")
                path = f"/models/{NAME}/current/model.json"

                single, single_failures = asyncio.run(
                    load(server.url, path, expected, 1, 50, args.time_limit)
                )
                idle, idle_failures = asyncio.run(
                    load(server.url, path, expected, args.clients, args.requests, args.time_limit)
                )
                ids = [
                    client.post("/jobs/fit", json=dict(base, method="sparse")).json()["id"]
                    for _ in range(args.jobs)
                ]
                deadline = time.monotonic() + 120
                while client.get("/health").json()["jobs"]["running"] < args.jobs:
                    if time.monotonic() > deadline:
                        print("the jobs never all ran at once", file=sys.stderr)
                        return 1
                    time.sleep(0.1)
                busy, busy_failures = asyncio.run(
                    load(server.url, path, expected, args.clients, args.requests, args.time_limit)
                )
                running_after = client.get("/health").json()["jobs"]["running"]
                states = [client.get(f"/jobs/{job_id}").json()["state"] for job_id in ids]
            # Leaving the block stops the server; jobs still running are marked failed.
    one, a, b = summary(single), summary(idle), summary(busy)
    print(
        f"{args.clients} clients x {args.requests} reads of {len(expected)} bytes "
        f"(GET {path}), loopback"
    )
    for label, s, fails in (
        ("1 client, idle", one, single_failures),
        ("idle workers", a, idle_failures),
        (f"{args.jobs} jobs running", b, busy_failures),
    ):
        print(
            f"  {label:>17}: n={int(s['n'])} p50={s['p50']:.1f} ms p95={s['p95']:.1f} ms "
            f"p99={s['p99']:.1f} ms max={s['max']:.1f} ms failed={len(fails)}"
        )
    print(
        f"  p99 ratio busy/idle: {b['p99'] / a['p99']:.2f}; jobs still running at the end "
        f"of the busy phase: {running_after} (job states then: {', '.join(states)})"
    )
    failures = single_failures + idle_failures + busy_failures
    for line in failures[:10]:
        print("  failure:", line)
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
