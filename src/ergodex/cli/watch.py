"""``ergodex watch FOLDER --name NAME``: retrain once on every new dataset file in an inbox.

A file is taken once it has stayed unchanged for a quiet period (``--settle``; temporary names
such as ``*.part`` and dotfiles are ignored), claimed into the watcher's work area
``.ergodex-claimed/`` and retrained from there. Each content is handled once, even across restarts
(a ledger ``.ergodex-inbox.sqlite3`` in the inbox folder keys on name + sha256); processed files
go to ``done/`` with their decision record, rejected ones to ``rejected/`` with
``<file>.error.txt``. A file rejected because it did not fit the settings is retried when the
watcher starts with other settings; ``--retry-rejected`` retries every rejected file. Prints one
line saying what it watches, then one line per file. See :mod:`ergodex.watching`.

Exit code 0 after a clean stop (``--once``, ``--max-files``, Ctrl-C); each file's outcome is in the
output, the log, the ledger and the decision record next to it. 2 on bad input (no such folder,
bad config).
"""

from __future__ import annotations

import argparse

from ergodex.cli.common import add_home_option, add_log_level_option
from ergodex.cli.retrain import (
    add_common_retrain_options,
    parse_holdout,
    spec_from_args,
)
from ergodex.watching import DEFAULT_SETTLE


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "watch",
        help="retrain a model once on every new dataset file that lands in a folder",
        description=(
            "Watch FOLDER and run one retrain of NAME for each new dataset file once it has "
            "stayed unchanged for the quiet period (--settle). The file is first moved into the "
            "watcher's work area FOLDER/.ergodex-claimed/ and read from there, then moved to "
            "done/ (with its decision record) or rejected/ (with its error and the reason: bad "
            "data, or data that do not fit the settings). Each content is handled once, even "
            "across restarts; a file written again under the same name is new data. Files "
            "rejected because they did not fit the settings are retried when the watcher starts "
            "with other settings. Prints one line saying what it watches, then one per file."
        ),
        epilog=(
            "Caution: a passed statistical check is not a certification; defer to the applicable "
            "codes, standards and licensed practice."
        ),
    )
    parser.add_argument("folder", metavar="FOLDER", help="the inbox folder")
    parser.add_argument("--name", required=True, help="registry name of the model to retrain")
    parser.add_argument(
        "--once",
        action="store_true",
        help="handle the files present now (after one quiet period), then return",
    )
    parser.add_argument(
        "--interval",
        type=float,
        default=2.0,
        metavar="S",
        help="seconds between polls (default 2)",
    )
    parser.add_argument(
        "--settle",
        type=float,
        default=DEFAULT_SETTLE,
        metavar="S",
        help=f"quiet period: seconds a file's size and modification time must stay unchanged "
        f"before it is taken (default {DEFAULT_SETTLE:g})",
    )
    parser.add_argument(
        "--retry-rejected",
        action="store_true",
        help="take every file in rejected/ back and try it again (also a rejected file "
        "dropped again), whatever the reason it was rejected",
    )
    parser.add_argument(
        "--max-files", type=int, default=None, metavar="N", help="stop after N files"
    )
    add_common_retrain_options(parser)
    add_home_option(parser)
    add_log_level_option(parser)
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    import logging

    from ergodex.cli.common import registry_from_args
    from ergodex.watching import watch

    registry = registry_from_args(args)

    def echo(line: str) -> None:
        print(line, flush=True)

    try:
        watch(
            args.folder,
            args.name,
            registry=registry,
            config=args.config,
            spec=spec_from_args(args),
            seed=args.seed,
            holdout=parse_holdout(args.holdout),
            report=not args.no_report,
            poll_interval=args.interval,
            settle=args.settle,
            retry_rejected=args.retry_rejected,
            once=args.once,
            max_files=args.max_files,
            echo=echo,
        )
    except KeyboardInterrupt:
        logging.getLogger("ergodex.watching").info("interrupted; stopping")
        return 0
    return 0
