"""``ergodex demo``: the whole job on the embedded default scenario, under the current folder."""

from __future__ import annotations

import argparse
from collections.abc import Callable
from typing import Any

from ergodex.cli.common import add_home_option, add_log_level_option


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "demo",
        help="build the demo data, fit, validate, register, report; print where",
        description=(
            "Generate the demo scenario's data into ./datasets/, fit a surrogate, check its "
            "long-run statistics against held-out runs, register it under ./models/ (or --home), "
            "write the report, and print the equations, the scorecard and where the files are. "
            "Exit code 0 when the surrogate passed, 1 when it failed."
        ),
    )
    parser.add_argument(
        "--scenario",
        choices=["convection-loop", "ring", "basin"],
        default="convection-loop",
        help="convection-loop: a heated loop whose flow reverses (3 sensors, default); "
        "ring: 40 weather stations around a latitude circle, reduced to a few modes; "
        "basin: monthly sea-surface temperature of an ocean basin (CF NetCDF, land mask), "
        "reduced to EOF modes and checked on the grid",
    )
    parser.add_argument(
        "--seed",
        type=int,
        default=None,
        help="seed of data and check (default: the committed sample datasets' seed, 2026)",
    )
    parser.add_argument(
        "--data-root",
        default="datasets",
        metavar="DIR",
        help="folder the demo dataset is written into (default ./datasets)",
    )
    add_home_option(parser)
    add_log_level_option(parser)
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from ergodex.cli.common import resolve_home, show_progress
    from ergodex.pipeline import DemoResult, run_demo

    if args.seed is not None and args.seed < 0:
        from ergodex.exceptions import SettingsError

        raise SettingsError(f"--seed must be a non-negative integer, got {args.seed}")
    demo: Callable[..., DemoResult] = run_demo
    options: dict[str, Any] = {"progress": show_progress(args)}
    if args.scenario == "basin":
        from ergodex.fields.demo import run_basin_demo

        demo, options = run_basin_demo, {}  # its field check takes no progress (yet)
    result = demo(
        scenario=args.scenario,
        home=resolve_home(args.home),
        data_root=args.data_root,
        seed=args.seed,
        **options,
    )
    flow = result.flow
    assert flow.folder is not None  # the demo always registers its model
    card = flow.check.scorecard
    print("Equations found:")
    for line in flow.surrogate.equations():
        print(f"  {line}")
    from ergodex.cli.fields import time_unit_note

    if time_unit_note(flow.surrogate):
        print(f"  ({time_unit_note(flow.surrogate)})")
    print()
    print(card.table())
    print()
    print(f"data:      {result.dataset_folder}")
    print(f"registry:  {result.home}  ({flow.name}/{flow.version}, {flow.status})")
    print(f"model:     {flow.folder / 'model.json'}")
    print(f"scorecard: {flow.folder / 'scorecard.json'}")
    if result.report_path is not None:
        print(f"report:    {result.report_path}")
    return 0 if card.passed else 1
