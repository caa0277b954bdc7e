"""The ``ergodex`` command: a thin shell over the Python API.

Each command group lives in its own module exposing ``add_parser(subparsers)``, which adds its
subparser and sets ``func=run`` where ``run(args) -> int`` returns the exit code. Exit codes
(README, "Exit codes"): 0 success (for ``validate``/``retrain``: the model passed / an accepted
model stands), 1 the work ran but the model failed its check, 2 bad input or usage — one line on
stderr, nothing written — and 3 inconclusive (``validate``: the record cannot tell). The library
never calls ``sys.exit``; this module is the one place that turns an
:class:`~ergodex.exceptions.ErgodexError` into exit code 2 (or the ``exit_code`` the class names:
1 for :class:`~ergodex.exceptions.ModelLimitError`, a model too stiff or too slow to integrate).

Safety net: an operating-system error (unwritable path, full disk) and running out of memory are
one line and exit 2 as well; any other exception is a bug and prints one line with a hint to rerun
with ``--debug`` (or ``ERGODEX_DEBUG=1``), which shows the traceback.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import os
import sys
from collections.abc import Sequence

from ergodex import __version__
from ergodex.exceptions import ErgodexError, one_line

#: Command modules under ``ergodex.cli``, in the order their commands appear in ``--help``.
COMMAND_MODULES: tuple[str, ...] = (
    "demo",
    "fit",
    "validate",
    "simulate",
    "register",
    "models",
    "report",
    "retrain",
    "watch",
    "serve",
)

EXIT_OK = 0
EXIT_FAILED_CHECK = 1
EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    """Usage errors exit with code 2 and one line, like every other bad input."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_BAD_INPUT, f"ergodex: error: {message} (see '{self.prog} --help')\n")


def build_parser() -> argparse.ArgumentParser:
    """Return the top-level parser with every command module's subparsers attached."""
    parser = _Parser(
        prog="ergodex",
        description=(
            "Fit cheap surrogate dynamics to time series, accept them only when their long-run "
            "statistics match the data's within its own sampling noise, and keep them in a "
            "versioned registry."
        ),
        epilog=(
            "Exit codes: 0 success (validate/retrain: the model passed or an accepted model "
            "stands), 1 the model failed its check (or was too stiff or too slow to integrate), "
            "2 bad input or usage, 3 inconclusive. "
            "Caution: a passed statistical check is not a certification; defer to the applicable "
            "codes, standards and licensed practice."
        ),
    )
    parser.add_argument("--version", action="version", version=f"ergodex {__version__}")
    parser.add_argument(
        "--debug",
        action="store_true",
        help="show the full traceback of an unexpected error (also ERGODEX_DEBUG=1)",
    )
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in COMMAND_MODULES:
        importlib.import_module(f"ergodex.cli.{name}").add_parser(subparsers)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line and return its exit code (the console script exits with it)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if getattr(args, "func", None) is None:
        # one line, like every refusal: the usage and where the full help is
        usage = " ".join(parser.format_usage().split())
        print(f"ergodex: error: no command given; {usage} (see 'ergodex --help')", file=sys.stderr)
        return EXIT_BAD_INPUT
    logging.basicConfig(
        level=getattr(args, "log_level", None) or "WARNING",
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    debug = bool(getattr(args, "debug", False)) or os.environ.get("ERGODEX_DEBUG", "") not in (
        "",
        "0",
    )
    try:
        return int(args.func(args))
    except ErgodexError as exc:
        # one line, whatever the library wrote, with its advice in command-line form
        code = int(getattr(exc, "exit_code", EXIT_BAD_INPUT))
        label = "model failed" if code == EXIT_FAILED_CHECK else "error"
        message = one_line(exc.for_command_line())
        print(f"ergodex: {label}: {message}", file=sys.stderr)
        return code
    except KeyboardInterrupt:
        print("ergodex: interrupted", file=sys.stderr)
        return 130
    except MemoryError:
        if debug:
            raise
        print(
            "ergodex: error: out of memory; use fewer members or outputs, or smaller inputs",
            file=sys.stderr,
        )
        return EXIT_BAD_INPUT
    except OSError as exc:
        if debug:
            raise
        where = f"{exc.filename}: " if getattr(exc, "filename", None) else ""
        print(f"ergodex: error: {where}{exc.strerror or one_line(exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except Exception as exc:  # the last line of defence of the command line
        if debug:
            raise
        print(
            # the text only (no class-name fallback): the class is named just before it
            f"ergodex: internal error: {type(exc).__name__}: {one_line(str(exc))[:300]} "
            "(a bug in ergodex; rerun with --debug or ERGODEX_DEBUG=1 for the traceback)",
            file=sys.stderr,
        )
        return EXIT_BAD_INPUT


def entry_point() -> None:  # pragma: no cover - thin wrapper for the console script
    sys.exit(main())
