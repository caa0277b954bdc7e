"""``ergodex serve``: run the HTTP service (FastAPI + uvicorn, the ``service`` extra).

Binds to loopback unless told otherwise. Writes need the bearer token read from ``--token-file``
or ``$ERGODEX_TOKEN``; without one the server still starts (reads work) but refuses every write.
Once listening, one line goes to stdout: ``ergodex serve: listening on http://HOST:PORT``; with
``--port 0`` the system picks a free port, and that line says which.
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from pathlib import Path

from ergodex.cli.common import add_home_option, add_log_level_option, resolve_home
from ergodex.service.settings import (
    DEFAULT_JOB_MEMORY,
    DEFAULT_JOB_TIME_LIMIT,
    DEFAULT_QUEUE_PER_TOKEN,
    DEFAULT_QUEUE_TOTAL,
    SERVICE_DIR,
)

DEFAULT_PORT = 8752


def add_parser(subparsers) -> argparse.ArgumentParser:
    """Add the ``serve`` subcommand."""
    parser = subparsers.add_parser(
        "serve",
        help="run the HTTP service (uploads, jobs, registry)",
        description=(
            "Serve the registry over HTTP: upload datasets, submit fit/validate/retrain jobs run "
            "by worker processes, read and download versions, accept/reject/retire. Write "
            "endpoints need 'Authorization: Bearer <token>'."
        ),
    )
    parser.add_argument("--host", default="127.0.0.1", help="address to bind (default: 127.0.0.1)")
    parser.add_argument(
        "--port",
        type=int,
        default=DEFAULT_PORT,
        help=f"port (default: {DEFAULT_PORT}; 0 picks a free one and prints it)",
    )
    add_home_option(parser)
    parser.add_argument(
        "--workers",
        type=int,
        default=2,
        metavar="N",
        help="job worker processes (default: 2)",
    )
    parser.add_argument(
        "--token-file",
        metavar="FILE",
        default=None,
        help="file whose first line is the write token (default: $ERGODEX_TOKEN; none: no writes)",
    )
    parser.add_argument(
        "--protect-reads",
        action="store_true",
        help="require the token for read endpoints too (/health stays open)",
    )
    parser.add_argument(
        "--max-upload-mb",
        type=float,
        default=32.0,
        metavar="MB",
        help="largest dataset upload accepted, in MiB (default: 32)",
    )
    parser.add_argument(
        "--max-dataset-mb",
        type=float,
        default=None,
        metavar="MB",
        help="largest size an NPZ upload may declare for its arrays once inflated, checked "
        "before inflating, in MiB (default: 8 × --max-upload-mb)",
    )
    parser.add_argument(
        "--queue-per-token",
        type=int,
        default=DEFAULT_QUEUE_PER_TOKEN,
        metavar="N",
        help="most jobs queued or running at once per token; more get 429 queue-full "
        f"(default: {DEFAULT_QUEUE_PER_TOKEN})",
    )
    parser.add_argument(
        "--queue-limit",
        type=int,
        default=DEFAULT_QUEUE_TOTAL,
        metavar="N",
        help=f"most jobs queued or running at once in all (default: {DEFAULT_QUEUE_TOTAL})",
    )
    parser.add_argument(
        "--job-time-limit",
        type=float,
        default=DEFAULT_JOB_TIME_LIMIT,
        metavar="SECONDS",
        help="wall-clock time a job may run before its worker is ended and the job fails with "
        f"time-limit (default: {DEFAULT_JOB_TIME_LIMIT:g})",
    )
    parser.add_argument(
        "--job-memory-mb",
        type=float,
        default=DEFAULT_JOB_MEMORY / 2**20,
        metavar="MB",
        help="address space a job (and an upload's reader) may use, in MiB; a job over it fails "
        "with memory-limit, check options estimated over it are refused (default: "
        f"{DEFAULT_JOB_MEMORY / 2**20:g})",
    )
    add_log_level_option(parser)
    parser.set_defaults(func=run)
    return parser


def _is_loopback(host: str) -> bool:
    import ipaddress

    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def _mebibytes(option: str, value: float) -> int:
    """Whole bytes of a size given in MiB; a one-line error for 0, negative, inf or NaN."""
    from ergodex.exceptions import SettingsError

    if not (math.isfinite(value) and value > 0) or value * 2**20 < 1:
        raise SettingsError(f"{option} must be a finite number of MiB > 0, got {value}")
    if value > 2**40:  # a mebibyte count beyond any machine's memory: surely a typo
        raise SettingsError(f"{option} must be at most {2**40} MiB, got {value:g}")
    return int(value * 2**20)


def _home_folder(home: Path) -> Path:
    """The registry home, created if missing; a one-line error if it is a file or not writable."""
    from ergodex.exceptions import SettingsError

    if home.exists() and not home.is_dir():
        raise SettingsError(
            f"--home {home} is a file, not a folder; give a folder (it is created if missing)"
        )
    try:
        home.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SettingsError(
            f"--home {home}: cannot create the folder: {exc.strerror or exc}"
        ) from None
    if not os.access(home, os.W_OK | os.X_OK):
        raise SettingsError(f"--home {home}: the folder is not writable by this user")
    service = home / SERVICE_DIR
    if service.exists() and not service.is_dir():
        raise SettingsError(
            f"--home {home}: {service} is a file, but the service keeps its "
            "job table and uploads in a folder of that name; move the file"
        )
    return home


def run(args: argparse.Namespace) -> int:
    """Start the server and block until it is stopped (SIGINT/SIGTERM)."""
    from ergodex.exceptions import SettingsError, require
    from ergodex.service import ServiceSettings, read_token

    uvicorn = require("uvicorn", "service", "ergodex serve")
    if not 0 <= args.port <= 65535:
        raise SettingsError(f"--port must be between 0 and 65535, got {args.port}")
    upload_bytes = _mebibytes("--max-upload-mb", args.max_upload_mb)
    dataset_bytes = (
        None if args.max_dataset_mb is None else _mebibytes("--max-dataset-mb", args.max_dataset_mb)
    )
    memory_bytes = _mebibytes("--job-memory-mb", args.job_memory_mb)
    for option, value in (
        ("--workers", args.workers),
        ("--queue-per-token", args.queue_per_token),
        ("--queue-limit", args.queue_limit),
    ):
        if value < (0 if option == "--workers" else 1):
            raise SettingsError(
                f"{option} must be {'0' if option == '--workers' else '1'} or more, got {value}"
            )
    if not (math.isfinite(args.job_time_limit) and args.job_time_limit > 0):
        raise SettingsError(
            f"--job-time-limit must be a finite number of seconds > 0, got {args.job_time_limit}"
        )
    settings = ServiceSettings(
        home=_home_folder(resolve_home(args.home)),
        token=read_token(args.token_file),
        protect_reads=bool(args.protect_reads),
        max_upload_bytes=upload_bytes,
        max_dataset_bytes=dataset_bytes,
        workers=args.workers,
        queue_per_token=args.queue_per_token,
        queue_total=args.queue_limit,
        job_time_limit=float(args.job_time_limit),
        job_memory_bytes=memory_bytes,
    )
    import socket

    from ergodex.service.app import create_app
    from ergodex.service.jobs import hold_home_lock

    lock = hold_home_lock(settings)  # one server per home; a clash is a one-line error
    app = create_app(settings)
    app.state.home_lock = lock
    family = socket.AF_INET6 if ":" in args.host else socket.AF_INET
    # IPPROTO_TCP explicitly: asyncio turns Nagle off (TCP_NODELAY) only on sockets whose proto
    # says TCP, and with Nagle on every keep-alive response waits ~40 ms for a delayed ACK.
    sock = socket.socket(family, socket.SOCK_STREAM, socket.IPPROTO_TCP)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((args.host, args.port))
    except OSError as exc:
        sock.close()
        raise SettingsError(f"cannot listen on {args.host}:{args.port}: {exc.strerror}") from None
    host, port = sock.getsockname()[:2]
    if not _is_loopback(args.host):
        print(
            f"ergodex serve: warning: listening on {host}, reachable from other machines; "
            "the traffic is not encrypted (put a TLS proxy in front)",
            file=sys.stderr,
        )
    if settings.token is None:
        print(
            "ergodex serve: no token configured (--token-file or ERGODEX_TOKEN): every write "
            "is refused",
            file=sys.stderr,
        )
    config = uvicorn.Config(
        app, log_level=str(args.log_level).lower(), access_log=False, lifespan="on"
    )
    server = uvicorn.Server(config)
    shown = f"[{host}]" if family == socket.AF_INET6 else host
    print(
        f"ergodex serve: listening on http://{shown}:{port} (home {settings.home}, "
        f"{settings.workers} workers)",
        flush=True,
    )
    server.run(sockets=[sock])
    return 0
