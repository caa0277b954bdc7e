"""``ergodex register MODEL --name NAME``: store a model file as the next candidate version.

``--json`` prints the new version's record with the keys of ``ergodex models show NAME/V --json``
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
            "accepted here: use 'ergodex models accept NAME/VERSION'. Exit code 2 and nothing "
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
        "--scorecard",
        metavar="FILE",
        help="scorecard.json from 'ergodex validate' of this very MODEL (refused otherwise)",
    )
    parser.add_argument("--report", metavar="FILE", help="HTML report from 'ergodex validate'")
    parser.add_argument(
        "--evidence",
        metavar="FILE",
        help="evidence .npz saved with the check (default: the one 'ergodex "
        "validate --json CARD.json' wrote beside it, CARD.evidence.npz)",
    )
    parser.add_argument(
        "--fit-settings",
        metavar="FILE",
        help="fit settings (.json or .toml: method and a settings table), checked "
        "against the fitter's settings (default: those recorded in MODEL)",
    )
    parser.add_argument("--note", default=None, help="free text shown in listings")
    parser.add_argument(
        "--parent", metavar="NAME/V", default=None, help="the version this one was retrained from"
    )
    parser.add_argument("--json", action="store_true", help="print the new version as JSON")
    add_home_option(parser)
    parser.set_defaults(func=run)


def check_fit_settings_file(path: str) -> None:
    """Refuse a fit-settings file that ``retrain`` could not use (one-line SettingsError)."""
    from ergodex.exceptions import SettingsError
    from ergodex.fitting import load_fit_settings, parse_fit_settings

    if Path(path).suffix.lower() != ".json":
        if Path(path).suffix.lower() == ".toml":
            load_fit_settings(path)
        return  # the registry refuses other suffixes itself
    try:
        document = json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SettingsError(f"{path}: fit settings file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SettingsError(f"{path}: cannot read fit settings: {exc}") from None
    except json.JSONDecodeError as exc:
        raise SettingsError(f"{path}: not valid JSON (line {exc.lineno}: {exc.msg})") from None
    if not isinstance(document, dict):
        raise SettingsError(
            f"{path}: fit settings must be a JSON object with 'method' and "
            f"'settings'; got {type(document).__name__}"
        )
    parse_fit_settings(document, source=path)


def _written_with(scorecard: str) -> bool:
    """Whether the evidence beside ``scorecard`` came from the same check: ``ergodex validate``
    writes it right after the scorecard, so an older file belongs to an earlier check."""
    from ergodex.cli.validate import evidence_beside

    beside = evidence_beside(scorecard)
    try:
        return beside.stat().st_mtime_ns >= Path(scorecard).stat().st_mtime_ns
    except OSError:
        return False


def run(args: argparse.Namespace) -> int:
    from ergodex.cli.validate import evidence_beside

    if args.fit_settings:
        check_fit_settings_file(args.fit_settings)
    evidence, found = args.evidence, False
    if evidence is None and args.scorecard and _written_with(args.scorecard):
        evidence, found = str(evidence_beside(args.scorecard)), True
    registry = registry_from_args(args)
    info = registry.register(
        args.name,
        args.model,
        scorecard=args.scorecard,
        report_html=Path(args.report) if args.report else None,
        evidence_path=evidence,
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
        if found:
            print(f"evidence: {evidence} (found beside the scorecard)")
    return 0
