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

#: Each command's line in the top-level ``--help``, so that listing the commands imports none of
#: their modules (the module's own ``help=`` must say the same; ``tests/test_cli.py`` checks).
COMMAND_HELP: dict[str, str] = {
    "demo": "build the demo data, fit, validate, register, report; print where",
    "fit": "fit a surrogate to data (or select one by its long-run statistics)",
    "validate": "check a surrogate's long-run statistics against data (exit 0 pass, 1 fail, "
    "3 inconclusive)",
    "simulate": "integrate an ensemble of a surrogate and write it (CSV, NPZ, NetCDF)",
    "register": "store a model (and its scorecard) as the next candidate version of NAME",
    "models": "list, show, accept, reject, retire, verify, export or import registered models",
    "report": "(re)write the HTML validation report of a registered version",
    "retrain": "check the accepted model on new data, refit, validate, promote or keep",
    "watch": "retrain a model once on every new dataset file that lands in a folder",
    "serve": "run the HTTP service (uploads, jobs, registry)",
}

EXIT_OK = 0
EXIT_FAILED_CHECK = 1
EXIT_BAD_INPUT = 2


class _Parser(argparse.ArgumentParser):
    """Usage errors exit with code 2 and one line, like every other bad input."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_BAD_INPUT, f"ergodex: error: {message} (see '{self.prog} --help')\n")


class _Commands(argparse._SubParsersAction):
    """Subcommands whose module is imported only when its command is chosen.

    A script calling ``ergodex`` once per file pays every import on every call: ``--help`` lists
    the commands from :data:`COMMAND_HELP`, and ``ergodex fit ...`` imports ``ergodex.cli.fit``
    alone, which then adds its real subparser in place of the placeholder.
    """

    def add_pending(self, name: str) -> None:
        """List ``name`` (with its help line) without importing its module yet."""
        self._choices_actions.append(self._ChoicesPseudoAction(name, (), COMMAND_HELP[name]))
        # a placeholder, so that the choice is valid; load() replaces it before it is used
        self._name_parser_map[name] = None

    def load(self, name: str) -> None:
        """Import the module of ``name`` and let it add its real subparser (once)."""
        if name not in self._name_parser_map or self._name_parser_map[name] is not None:
            return
        del self._name_parser_map[name]
        # the module adds its own help line; it takes the place of the pending one
        position = next(i for i, a in enumerate(self._choices_actions) if a.dest == name)
        del self._choices_actions[position]
        importlib.import_module(f"ergodex.cli.{name}").add_parser(self)
        self._choices_actions.insert(position, self._choices_actions.pop())

    def __call__(self, parser, namespace, values, option_string=None):
        self.load(values[0])
        super().__call__(parser, namespace, values, option_string)


def build_parser(*, load_all: bool = False) -> argparse.ArgumentParser:
    """Return the top-level parser; a command's module is imported when that command is chosen.

    ``load_all`` imports every command module now and attaches its full subparser (for tests and
    tools that walk the whole command tree).
    """
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
    subparsers = parser.add_subparsers(
        dest="command", metavar="COMMAND", parser_class=_Parser, action=_Commands
    )
    assert isinstance(subparsers, _Commands)
    for name in COMMAND_MODULES:
        subparsers.add_pending(name)
        if load_all:
            subparsers.load(name)
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
    import logging

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
