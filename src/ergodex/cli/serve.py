"""``ergodex serve``: run the HTTP service (FastAPI + uvicorn, the ``service`` extra).

Binds to loopback unless told otherwise. Writes need the bearer token read from ``--token-file``
or ``$ERGODEX_TOKEN``; without one the server still starts (reads work) but refuses every write.
Once listening, one line goes to stdout: ``ergodex serve: listening on http://HOST:PORT``; with
``--port 0`` the system picks a free port, and that line says which.
"""

from __future__ import annotations

import argparse
import ipaddress
import socket
import sys

from ergodex.cli.common import add_home_option, add_log_level_option, resolve_home

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
        "--port", type=int, default=DEFAULT_PORT,
        help=f"port (default: {DEFAULT_PORT}; 0 picks a free one and prints it)",
    )
    add_home_option(parser)
    parser.add_argument(
        "--workers", type=int, default=2, metavar="N",
        help="job worker processes (default: 2)",
    )
    parser.add_argument(
        "--token-file", metavar="FILE", default=None,
        help="file whose first line is the write token (default: $ERGODEX_TOKEN; none: no writes)",
    )
    parser.add_argument(
        "--protect-reads", action="store_true",
        help="require the token for read endpoints too (/health stays open)",
    )
    parser.add_argument(
        "--max-upload-mb", type=float, default=32.0, metavar="MB",
        help="largest dataset upload accepted, in MiB (default: 32)",
    )
    add_log_level_option(parser)
    parser.set_defaults(func=run)
    return parser


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def run(args: argparse.Namespace) -> int:
    """Start the server and block until it is stopped (SIGINT/SIGTERM)."""
    from ergodex.exceptions import SettingsError, require
    from ergodex.service import ServiceSettings, read_token

    uvicorn = require("uvicorn", "service", "ergodex serve")
    if not 0 <= args.port <= 65535:
        raise SettingsError(f"--port must be between 0 and 65535, got {args.port}")
    if not args.max_upload_mb > 0:
        raise SettingsError(f"--max-upload-mb must be > 0, got {args.max_upload_mb}")
    settings = ServiceSettings(
        home=resolve_home(args.home),
        token=read_token(args.token_file),
        protect_reads=bool(args.protect_reads),
        max_upload_bytes=int(args.max_upload_mb * 1024 * 1024),
        workers=args.workers,
    )
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
    print(f"ergodex serve: listening on http://{shown}:{port} (home {settings.home}, "
          f"{settings.workers} workers)", flush=True)
    server.run(sockets=[sock])
    return 0
