"""``ergodex register MODEL --name NAME``: store a model file as the next candidate version.

``--json`` prints the new version's record with the keys of ``ergodex models show NAME@V --json``
(see :mod:`ergodex.cli.models`).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from ergodex.cli.common import add_home_option, registry_from_args


def add_parser(subparsers: argparse._SubParsersAction) -> None:
    parser = subparsers.add_parser(
        "register",
        help="store a model (and its scorecard) as the next candidate version of NAME",
        description=(
            "Copy MODEL (a model.json) and, if given, its scorecard, report and fit settings into "
            "the registry as the next version of NAME, with status 'candidate'. Nothing is "
            "accepted here: use 'ergodex models accept NAME@VERSION'. Exit code 2 and nothing "
            "written when an input is bad, including a scorecard made for another model (its "
            "model fingerprint differs from MODEL's). Version numbers are never reused."
        ),
    )
    parser.add_argument("model", metavar="MODEL", help="the surrogate file (model.json)")
    parser.add_argument(
        "--name",
        required=True,
        help="model name: letters, digits, '.', '_', '-' (at most 64 characters)",
    )
    parser.add_argument(
        "--scorecard", metavar="FILE",
        help="scorecard.json from 'ergodex validate' of this very MODEL (refused otherwise)",
    )
    parser.add_argument("--report", metavar="FILE", help="HTML report from 'ergodex validate'")
    parser.add_argument("--evidence", metavar="FILE", help="evidence .npz saved with the check")
    parser.add_argument("--fit-settings", metavar="FILE", help="fit settings (.json or .toml)")
    parser.add_argument("--note", default=None, help="free text shown in listings")
    parser.add_argument(
        "--parent", metavar="NAME@V", default=None, help="the version this one was retrained from"
    )
    parser.add_argument("--json", action="store_true", help="print the new version as JSON")
    add_home_option(parser)
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    registry = registry_from_args(args)
    info = registry.register(
        args.name,
        args.model,
        scorecard=args.scorecard,
        report_html=Path(args.report) if args.report else None,
        evidence_path=args.evidence,
        fit_settings=args.fit_settings,
        note=args.note,
        parent=args.parent,
    )
    if args.json:
        print(json.dumps(info.to_dict(), indent=2, sort_keys=True))
    else:
        verdict = info.verdict or "no scorecard"
        print(f"registered {info.ref} ({info.status}; scorecard: {verdict}) in {registry.home}")
        print(f"folder: {info.folder}")
    return 0
