"""``ergodex retrain NAME DATA``: re-check the accepted model on new data, refit, keep the better.

Exit codes: 0 an accepted model stands (kept, replaced or accepted on a first run); 1 no acceptable
model (the incumbent drifted and the refit failed, or a first fit failed): downstream users
must be warned; 2 bad input (unreadable data, variables that differ, bad settings), nothing
written. The decision record (``--json``) is documented in :mod:`ergodex.retraining`.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ergodex.cli.common import add_data_options, add_home_option, add_log_level_option
from ergodex.exceptions import SettingsError


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "retrain",
        help="check the accepted model on new data, refit, validate, promote or keep",
        description=(
            "Check the accepted version of NAME (the incumbent) against held-out runs of DATA, "
            "refit on the other runs with the incumbent's recorded fit settings (or "
            "--config), check it against the same runs with the same seed, register it with "
            "lineage, and accept it only if it passes and scores no worse than a drifted "
            "incumbent. Exit code 0 when an accepted model stands, 1 when none does, 2 on bad "
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
    add_data_options(parser, holdout=False)  # --holdout comes with the retrain options
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
        help="fit settings TOML for the refit (default: the incumbent's recorded settings)",
    )
    parser.add_argument("--seed", type=int, default=0, help="seed of both checks (default 0)")
    parser.add_argument(
        "--holdout",
        default=None,
        metavar="H",
        help="held-out reference: a fraction of the runs, a run count (2) or comma-separated "
        "run labels (default: the dataset.toml 'holdout' list, else 0.5)",
    )
    parser.add_argument(
        "--no-report",
        action="store_true",
        help="do not store an HTML report with the refit (saves a few seconds per retrain)",
    )
    from ergodex.cli.checks import add_check_options

    add_check_options(
        parser, seed=False, title="check settings (default: as in the incumbent's recorded check)"
    )


def parse_holdout(text: str | None):
    """``--holdout``: a fraction, a run count, or comma-separated run labels."""
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
    """Check settings given on the command line or in ``--check-config`` (``None``: none, so the
    incumbent's recorded spec is used as it is); each is checked with a one-line error."""
    from ergodex.cli.checks import build_spec, check_overrides

    settings, _origin = check_overrides(args)
    if not settings:
        return None
    build_spec(args)  # refuse a bad value here, naming its option or file
    return settings


def read_new_data(args: argparse.Namespace):
    """DATA as a Series, and the hold-out: ``--holdout``, else the manifest's list, else 0.5."""
    from ergodex.readers import read_dataset, read_series

    holdout = parse_holdout(args.holdout)
    path = args.data
    is_dataset = (
        Path(path).is_dir() and (Path(path) / "dataset.toml").exists() or path.endswith(".toml")
    )
    if is_dataset and args.dt is None:
        dataset = read_dataset(path, split_at_gaps=args.split_at_gaps)
        if args.holdout is None and dataset.holdout:
            holdout = list(dataset.holdout)
        return dataset.series, holdout
    return read_series(path, dt=args.dt, split_at_gaps=args.split_at_gaps), holdout


def run(args: argparse.Namespace) -> int:
    from ergodex.cli.common import registry_from_args, show_progress
    from ergodex.registry import split_ref
    from ergodex.retraining import retrain

    name, version, current = split_ref(args.name)  # refuses the former NAME@VERSION form
    if version is not None or current:
        raise SettingsError(
            "retrain works on a name's accepted version (the incumbent); give "
            f"{name} without /VERSION (to check one version on new data use "
            "'ergodex validate NAME/VERSION DATA')"
        )
    if args.json not in (None, "-"):  # refused before the work, not after it
        from ergodex.files import check_writable

        check_writable(args.json, "--json")
    registry = registry_from_args(args)
    spec = spec_from_args(args)
    data, holdout = read_new_data(args)
    decision = retrain(
        registry,
        args.name,
        data,
        config=args.config,
        spec=spec,
        seed=args.seed,
        holdout=holdout,
        report=not args.no_report,
        progress=show_progress(args),
    )
    if args.json == "-":
        sys.stdout.write(decision.to_json())
        print(decision.summary(), file=sys.stderr)
    else:
        if args.json:
            decision.to_json(args.json)
        print(decision.summary())
    return decision.exit_code
