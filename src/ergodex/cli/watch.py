"""``ergodex watch FOLDER --name NAME``: retrain once on every new dataset file in an inbox.

Complete files only (written then renamed; temporary names such as ``*.part`` and dotfiles are
ignored; the size must be the same on two polls). Each file is handled once, even across
restarts (a ledger ``.ergodex-inbox.sqlite3`` in the inbox folder); processed files go to
``done/`` with their decision record, unreadable ones to ``rejected/`` with ``<file>.error.txt``.
See :mod:`ergodex.inbox`.

Exit code 0 after a clean stop (``--once``, ``--max-files``, Ctrl-C); each file's outcome is in the
log, the ledger and the decision record next to it. 2 on bad input (no such folder, bad config).
"""

from __future__ import annotations

import argparse

from ergodex.cli.common import add_home_option, add_log_level_option
from ergodex.cli.retrain import (
    add_common_retrain_options,
    parse_holdout,
    spec_from_args,
)


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "watch",
        help="retrain a model once on every new dataset file that lands in a folder",
        description=(
            "Watch FOLDER and run one retrain of NAME for each new complete dataset file; move "
            "it to done/ (with its decision record) or, if it cannot be read, to rejected/ "
            "(with its error). Each file is handled once, even across restarts."
        ),
        epilog=(
            "Caution: a passed statistical check is not a certification; defer to the applicable "
            "codes, standards and licensed practice."
        ),
    )
    parser.add_argument("folder", metavar="FOLDER", help="the inbox folder")
    parser.add_argument("--name", required=True, help="registry name of the model to retrain")
    parser.add_argument(
        "--once", action="store_true", help="handle the files present now, then return"
    )
    parser.add_argument(
        "--interval",
        type=float,
        default=2.0,
        metavar="S",
        help="seconds between polls (default 2); a file must be unchanged over one interval",
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
    from ergodex.inbox import watch

    registry = registry_from_args(args)
    try:
        items = watch(
            args.folder,
            args.name,
            registry=registry,
            config=args.config,
            spec=spec_from_args(args),
            seed=args.seed,
            holdout=parse_holdout(args.holdout),
            report=not args.no_report,
            poll_interval=args.interval,
            once=args.once,
            max_files=args.max_files,
        )
    except KeyboardInterrupt:
        logging.getLogger("ergodex.inbox").info("interrupted; stopping")
        return 0
    for item in items:
        what = item.outcome or item.state
        if item.skipped:
            what = f"already {item.state}"
        extra = f": {item.error}" if item.error else ""
        print(f"{item.file_name}: {what}{extra}")
    return 0
