"""Read an uploaded dataset in a short-lived process of its own, under a memory limit.

The server never parses an upload itself: a crafted file that inflates or allocates far beyond
its size would otherwise take the server's memory (and every client with it). The server runs
``python -m ergodex.service.reader FILE NAME OPTIONS MEMORY`` (see :func:`read_isolated`); the
child caps its own address space, reads the file with :func:`ergodex.readers.read_series`,
and prints one JSON line: the summary the dataset record needs, or a refusal ``{code, message}``.
"""

from __future__ import annotations

import json
import logging
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

from ergodex.exceptions import one_line
from ergodex.service.errors import ApiError
from ergodex.service.limits import apply_memory_limit, is_memory_error

log = logging.getLogger(__name__)

#: Exit status of a child that read the file or refused it on purpose (a JSON line was printed).
_ANSWERED = 0


def summarize(path: Path, filename: str, options: dict[str, Any]) -> dict[str, Any]:
    """Read the file and return the record fields that depend on its content."""
    from ergodex.exceptions import ErgodexError
    from ergodex.readers import read_series

    try:
        series = read_series(path, **options)
    except Exception as exc:  # noqa: BLE001 - a malformed upload is the client's, never a 500
        if is_memory_error(exc):
            return {
                "code": "dataset-too-large",
                "status": 413,
                "message": f"{filename}: reading it needs more memory than this server allows "
                "one upload; send a smaller file",
            }
        text = (
            str(exc)
            if isinstance(exc, ErgodexError)
            else (f"{filename}: cannot be read: {type(exc).__name__}: {exc}")
        )
        return {
            "code": "invalid-dataset",
            "status": 422,
            # Name the file as the client knows it, not by its staging path on the server.
            "message": one_line(text.replace(str(path), filename)),
        }
    return {
        "fingerprint": series.fingerprint(),
        "variables": list(series.names),
        "dt": float(series.dt),
        "runs": int(series.n_runs),
        "samples": int(series.n_samples),
        "reader_pid": os.getpid(),
    }


def main(argv: list[str] | None = None) -> int:
    """Child entry point: ``FILE NAME OPTIONS_JSON MEMORY_BYTES``; one JSON line on stdout."""
    argv = sys.argv[1:] if argv is None else argv
    path, filename, options_text, memory = argv
    from ergodex.service.jobs import _die_with_parent

    _die_with_parent(os.getppid())  # a killed server leaves no reader behind
    # numpy starts its BLAS threads when imported; do that before the ceiling so that thread
    # stacks are not what the limit catches.
    import numpy  # noqa: F401

    apply_memory_limit(int(memory))
    answer = summarize(Path(path), filename, json.loads(options_text))
    sys.stdout.write(json.dumps(answer) + "\n")
    sys.stdout.flush()
    return _ANSWERED


def read_isolated(
    path: Path, filename: str, options: dict[str, Any], *, memory_bytes: int, timeout: float
) -> dict[str, Any]:
    """Read an uploaded file in a child process; return its summary or raise :class:`ApiError`.

    A child that runs out of memory, is killed, or takes longer than ``timeout`` seconds is
    ended and the upload refused; nothing it did stays behind (it writes nothing).
    """
    command = [
        sys.executable,
        "-m",
        "ergodex.service.reader",
        str(path),
        filename,
        json.dumps(options),
        str(int(memory_bytes)),
    ]
    try:
        done = subprocess.run(
            command,
            capture_output=True,
            text=True,
            timeout=timeout,
            stdin=subprocess.DEVNULL,
            check=False,
        )
    except subprocess.TimeoutExpired:
        raise ApiError(
            422,
            "invalid-dataset",
            f"{filename}: reading it took longer than this server allows ({timeout:g} s); "
            "send a smaller or simpler file",
        ) from None
    lines = done.stdout.strip().splitlines()
    if done.returncode != _ANSWERED or not lines:
        if done.returncode < 0 or "MemoryError" in done.stderr:
            # Killed by the kernel, or an allocation the ceiling stopped outside Python's reach.
            raise ApiError(
                413,
                "dataset-too-large",
                f"{filename}: the process reading it ended without an answer (exit code "
                f"{done.returncode}), at this server's memory limit for one upload; send a "
                "smaller file",
            )
        log.error(
            "the reader of upload %s failed (exit %s): %s",
            filename,
            done.returncode,
            done.stderr[-2000:],
        )
        raise ApiError(
            500, "internal-error", f"the reader of {filename} failed; see the server log"
        )
    answer = json.loads(lines[-1])
    if "code" in answer:
        raise ApiError(int(answer["status"]), answer["code"], answer["message"])
    return answer


if __name__ == "__main__":
    sys.exit(main())
