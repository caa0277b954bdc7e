"""``ergodex retrain NAME DATA``: re-check the accepted model on new data, refit, keep the better.

Exit codes: 0 an accepted model stands (kept, replaced or accepted on a first run); 1 no acceptable
model (the champion drifted and the challenger failed, or a first fit failed): downstream users
must be warned; 2 bad input (unreadable data, variables that differ, bad settings), nothing
written. The decision record (``--json``) is documented in :mod:`ergodex.retraining`.
"""

from __future__ import annotations

import argparse
import sys

from ergodex.cli.common import add_home_option, add_log_level_option


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "retrain",
        help="check the accepted model on new data, refit, validate, promote or keep",
        description=(
            "Check the accepted version of NAME (the champion) against held-out runs of DATA, "
            "fit a challenger on the other runs with the champion's recorded fit settings (or "
            "--config), check it against the same runs with the same seed, register it with "
            "lineage, and accept it only if it passes and scores no worse than a drifted "
            "champion. Exit code 0 when an accepted model stands, 1 when none does, 2 on bad "
            "input."
        ),
        epilog=(
            "Caution: a passed statistical check is not a certification; defer to the applicable "
            "codes, standards and licensed practice."
        ),
    )
    parser.add_argument("name", metavar="NAME", help="registry name of the model")
    parser.add_argument("data", metavar="DATA", help="new data: CSV, NPZ, NetCDF or dataset folder")
    add_common_retrain_options(parser)
    parser.add_argument(
        "--json",
        metavar="OUT",
        default=None,
        help="write the decision record as JSON to OUT ('-' for standard output)",
    )
    add_home_option(parser)
    add_log_level_option(parser)
    parser.set_defaults(func=run)


def add_common_retrain_options(parser: argparse.ArgumentParser) -> None:
    """Options shared by ``retrain`` and ``watch``: fit config, seed, holdout, check size."""
    parser.add_argument(
        "--config",
        metavar="FILE",
        default=None,
        help="fit settings TOML for the challenger (default: the champion's recorded settings)",
    )
    parser.add_argument("--seed", type=int, default=0, help="seed of both checks (default 0)")
    parser.add_argument(
        "--holdout",
        default=None,
        metavar="H",
        help="held-out reference: a fraction of the runs (0.5, the default), a run count (2) "
        "or comma-separated run labels",
    )
    parser.add_argument(
        "--no-report",
        action="store_true",
        help="do not store an HTML report with the challenger (saves a few seconds per retrain)",
    )
    parser.add_argument(
        "--members",
        type=int,
        default=None,
        metavar="N",
        help="ensemble members per check (default: as in the champion's recorded check, else 16)",
    )


def parse_holdout(text: str | None):
    """``--holdout``: a fraction, a run count, or comma-separated run labels."""
    from ergodex.exceptions import SettingsError
    from ergodex.retraining import DEFAULT_HOLDOUT

    if text is None:
        return DEFAULT_HOLDOUT
    text = text.strip()
    if not text:
        raise SettingsError("--holdout is empty; give a fraction, a run count or run labels")
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        pass
    return [part.strip() for part in text.split(",") if part.strip()]


def spec_from_args(args: argparse.Namespace):
    """Check settings overridden on the command line (``None``: the champion's recorded spec)."""
    if getattr(args, "members", None) is None:
        return None
    return {"members": args.members}


def run(args: argparse.Namespace) -> int:
    from ergodex.cli.common import is_terminal, registry_from_args
    from ergodex.retraining import retrain

    if args.json not in (None, "-"):  # refused before the work, not after it
        from ergodex.files import check_writable

        check_writable(args.json, "--json")
    registry = registry_from_args(args)
    holdout = parse_holdout(args.holdout)
    spec = spec_from_args(args)
    bar = None
    if is_terminal():
        from tqdm import tqdm

        bar = tqdm(total=5, desc="retrain", unit="step", file=sys.stderr, leave=False)

    def progress(step: str) -> None:
        if bar is not None:
            bar.set_postfix_str(step)
            bar.update(1)

    try:
        decision = retrain(registry, args.name, args.data, config=args.config, spec=spec,
                           seed=args.seed, holdout=holdout, report=not args.no_report,
                           progress=progress)
    finally:
        if bar is not None:
            bar.close()
    if args.json == "-":
        sys.stdout.write(decision.to_json())
        print(decision.summary(), file=sys.stderr)
    else:
        if args.json:
            decision.to_json(args.json)
        print(decision.summary())
    return decision.exit_code
