"""``ergodex report NAME[/VERSION]``: (re)write the validation report of a registered version.

The page is rebuilt from what the registry stored for that version — ``model.json``,
``scorecard.json``, ``evidence.npz`` and, when present, the fit settings — each checked against
its recorded hash. A version stored without evidence gets its figures recomputed from ``--data``
(the data it was checked on, recognised by the scorecard's data fingerprint, checked again with
the recorded settings and seed); without either, the command refuses rather than write a page
without figures, unless ``--no-figures`` asks for one.

Versions are immutable (their folder holds only the hash-checked files registered with them), so
the report goes to ``--out``, else to ``HOME/reports/NAME-vVERSION-report.html`` under the
registry home — never silently into the current folder.
"""

from __future__ import annotations

import argparse
import io
import json
from pathlib import Path
from typing import Any

from ergodex.cli.common import add_home_option, registry_from_args
from ergodex.exceptions import ModelFileError, RegistryError, SettingsError


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``report`` subcommand."""
    parser = subparsers.add_parser(
        "report",
        help="(re)write the HTML validation report of a registered version",
        description=(
            "Rebuild the self-contained HTML validation report of a registered version from its "
            "stored model, scorecard and evidence (all hash-checked); without stored evidence, "
            "the figures are recomputed from --data. The report goes to --out, else to "
            "HOME/reports/NAME-vVERSION-report.html under the registry home (versions are "
            "immutable, so never into the version folder). Caution: a passed statistical check "
            "is not a certification; defer to the applicable codes, standards and licensed "
            "practice."
        ),
    )
    parser.add_argument(
        "ref",
        metavar="NAME[/VERSION]",
        help="the version to report on; NAME/current, or NAME alone, means the accepted version",
    )
    parser.add_argument(
        "--out",
        metavar="FILE",
        default=None,
        help=(
            "where to write the report: an .html file, or an existing folder to write "
            "NAME-vVERSION-report.html into (default: HOME/reports/)"
        ),
    )
    parser.add_argument(
        "--title", default=None, help="page title (default: 'NAME/VERSION: validation report')"
    )
    parser.add_argument(
        "--data",
        metavar="DATA",
        default=None,
        help="the data the version was checked on, to recompute figures a version stored "
        "without evidence (recognised by the scorecard's data fingerprint)",
    )
    parser.add_argument(
        "--holdout",
        metavar="H",
        default=None,
        help="--data: the held-out runs, as for 'ergodex validate'",
    )
    parser.add_argument(
        "--no-figures",
        action="store_true",
        help="write the page without figures when no evidence is stored and "
        "no --data is given (default: refuse)",
    )
    add_home_option(parser)
    parser.set_defaults(func=run)
    return parser


def _output_path(out: str | None, name: str, version: int, home: Path) -> Path:
    default_name = f"{name}-v{version}-report.html"
    if out is None:
        return home / "reports" / default_name
    path = Path(out)
    if path.is_dir():
        return path / default_name
    if not path.parent.exists():
        raise SettingsError(
            f"--out {out}: folder {path.parent} does not exist; create it or choose another path"
        )
    return path


def load_check_result(registry: Any, ref: str):
    """The stored check of a registered version as ``(info, CheckResult, surrogate, fit settings)``.

    Evidence is optional (older versions, or a scorecard registered on its own): without it the
    result carries ``evidence=None`` and the report shows the scorecard without figures.
    """
    from ergodex.cli.common import resolve_registered
    from ergodex.validation import CheckResult, Evidence, Scorecard

    info, surrogate = resolve_registered(registry, ref)
    if "scorecard.json" not in info.artifacts:
        raise RegistryError(
            f"{info.ref} has no scorecard.json, so there is no check to report on; run "
            "'ergodex validate' on the model and register the result as a new version"
        )
    card_text = registry.artifact(info, "scorecard.json").decode("utf-8")
    scorecard = Scorecard.from_json(card_text)
    evidence = None
    if "evidence.npz" in info.artifacts:
        # Read the verified bytes (not the stored file, which could change after the check).
        data = registry.artifact(info, "evidence.npz")
        evidence = Evidence.from_npz(io.BytesIO(data), name=f"{info.ref}: evidence.npz")
    fit_settings = None
    if "fit-settings.json" in info.artifacts:
        try:
            fit_settings = json.loads(registry.artifact(info, "fit-settings.json").decode("utf-8"))
        except ValueError as exc:
            raise ModelFileError(f"{info.ref}: fit-settings.json is not valid JSON: {exc}") from exc
    return info, CheckResult(scorecard=scorecard, evidence=evidence), surrogate, fit_settings


def recompute_evidence(surrogate: Any, scorecard: Any, data: str, holdout: str | None, ref: str):
    """Evidence of a stored check, recomputed from the data it was checked on.

    The runs of ``data`` whose fingerprint is the scorecard's (the held-out runs, or every run)
    are checked again with the recorded settings and seed; other data are refused.
    """
    from ergodex.cli.common import read_data
    from ergodex.exceptions import DataError
    from ergodex.validation import check

    choice = read_data(data, part="check", holdout=holdout)
    recorded = scorecard.data_fingerprint
    for candidate in (choice.series, choice.whole):
        if candidate.fingerprint() == recorded:
            return check(surrogate, candidate, scorecard.spec).evidence
    raise DataError(
        f"{data}: not the data {ref} was checked on (its scorecard records data fingerprint "
        f"{recorded}; these runs have {choice.series.fingerprint()}); give the same data, "
        "or --holdout to pick the same runs"
    )


def run(args: argparse.Namespace) -> int:
    """Write the report; print its path. Exit 0, or 2 (via ErgodexError) on bad input."""
    from dataclasses import replace

    from ergodex.report import write_report

    if args.holdout is not None and args.data is None:
        raise SettingsError("--holdout only applies with --data")
    registry = registry_from_args(args)
    info, result, surrogate, fit_settings = load_check_result(registry, args.ref)
    target = _output_path(args.out, info.name, info.version, registry.home)
    if result.evidence is None:
        if args.data is not None:
            evidence = recompute_evidence(
                surrogate, result.scorecard, args.data, args.holdout, info.ref
            )
            result = replace(result, evidence=evidence)
        elif not args.no_figures:
            raise RegistryError(
                f"{info.ref} was registered without evidence, so its figures must be recomputed: "
                f"give --data DATA (the data it was checked on, fingerprint "
                f"{result.scorecard.data_fingerprint}), or --no-figures for a page without them"
            )
    elif args.data is not None:
        raise SettingsError(f"--data: {info.ref} has stored evidence; the figures come from it")
    title = args.title or f"{info.ref}: validation report"
    summary = {"registered": info.created, "status": info.status}
    if info.note:
        summary["note"] = info.note
    if isinstance(fit_settings, dict):
        summary.update(fit_settings)
    sections: list = []
    field_model = getattr(surrogate.transform, "kind", "") == "field-modes"
    if field_model and "evidence.npz" in info.artifacts:
        from ergodex.fields.maps import stored_map_sections

        # a field model's check stores its grid maps beside the evidence arrays
        sections = stored_map_sections(
            surrogate, registry.artifact(info, "evidence.npz"), name=f"{info.ref}: evidence.npz"
        )
    target.parent.mkdir(parents=True, exist_ok=True)
    write_report(
        target, result, surrogate, title=title, fit_summary=summary, extra_sections=sections
    )
    print(target)
    return 0
