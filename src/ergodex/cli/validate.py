"""``ergodex validate MODEL DATA``: check a surrogate's long-run statistics against data.

MODEL is a ``model.json`` file or a registry reference (``NAME/VERSION``; ``NAME`` alone is the
accepted version). DATA's held-out runs are the reference: the ``holdout`` list of a dataset's
``dataset.toml``, or ``--holdout``; a warning goes to stderr when the check would use data the
model was fitted on. Every check setting has an option, and ``--check-config FILE`` reads them
from TOML (see :mod:`ergodex.cli.checks`).

Exit codes: 0 the model passed, 1 it failed its check (the scorecard says why), 2 bad input
(raised as :class:`~ergodex.exceptions.ErgodexError` and turned into one line on stderr by
:mod:`ergodex.cli`), 3 inconclusive (the record cannot detect a ±50 % change of time scale or
variance, is too short, or its runs disagree; the reasons say how much more data is needed).
Every input is read and checked before anything is written.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ergodex.cli.checks import add_check_options, build_spec
from ergodex.cli.common import (
    MODEL_HELP,
    add_data_options,
    add_home_option,
    own_data_warning,
    read_data,
)
from ergodex.exceptions import SettingsError

EXIT_PASS = 0
EXIT_FAIL = 1
EXIT_INCONCLUSIVE = 3
#: Default wall-clock budget of the ensemble integration (one hour).
DEFAULT_TIME_LIMIT = 3600.0

#: ``--report`` given without a file: the default place (see :func:`default_report_path`).
_DEFAULT = "\0default"


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``validate`` subcommand."""
    parser = subparsers.add_parser(
        "validate",
        help="check a surrogate's long-run statistics against data (exit 0 pass, 1 fail, "
        "3 inconclusive)",
        description=(
            "Integrate the surrogate from many states drawn from the data and compare its long-run "
            "statistics (histograms, autocorrelation, spectra, quantiles, regimes) "
            "with the data's, "
            "against the data's own sampling noise. The reference is DATA's held-out runs "
            "(dataset.toml 'holdout', or --holdout). Exit 0 when it passes, 1 when it fails (also "
            "when it is too stiff for the substep floor or exceeds --time-limit), 2 on "
            "bad input, 3 when inconclusive: the record cannot detect a ±50 % change of time "
            "scale or variance, spans too few decorrelation times, or its runs disagree with "
            "each other (not a pass). Caution: a passed statistical check is not a "
            "certification; defer to the applicable codes, standards and licensed practice."
        ),
    )
    parser.add_argument("model", metavar="MODEL", help=MODEL_HELP)
    parser.add_argument(
        "data",
        metavar="DATA",
        help="reference data: .csv, .npz, .nc, or a folder with dataset.toml",
    )
    add_data_options(parser)
    parser.add_argument(
        "--json",
        metavar="OUT",
        default=None,
        help="write the scorecard JSON here (and the evidence beside it, as "
        "OUT's name with .evidence.npz, unless --evidence says where)",
    )
    parser.add_argument(
        "--evidence", metavar="OUT.npz", default=None, help="write the evidence arrays (NPZ) here"
    )
    parser.add_argument(
        "--report",
        metavar="OUT.html",
        nargs="?",
        const=_DEFAULT,
        default=None,
        help="write a self-contained HTML report here (without a file name: next "
        "to a model file as MODEL.report.html, or under the registry home "
        "in reports/ for NAME/VERSION)",
    )
    parser.add_argument(
        "--quiet",
        action="store_true",
        help="print only the verdict line and, unless passed, its reasons",
    )
    add_home_option(parser)
    from ergodex.cli.fields import add_check_options as add_field_check_options

    add_field_check_options(parser)
    add_check_options(parser)
    from ergodex.cli.common import add_limit_options, add_workers_option

    add_limit_options(parser, time_limit=DEFAULT_TIME_LIMIT)
    add_workers_option(parser)
    parser.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        default=None,
        help="integrate the ensemble members on a Dask cluster (e.g. tcp://127.0.0.1:8786); "
        "a deterministic model gives the same scorecard as on this machine",
    )
    parser.set_defaults(func=run)
    return parser


def evidence_beside(json_path: str | Path) -> Path:
    """Default evidence file of a scorecard file: ``card.json`` → ``card.evidence.npz``."""
    path = Path(json_path)
    return path.with_name(path.stem + ".evidence.npz")


def default_report_path(model_ref: str, info: Any, home: Path) -> Path:
    """``--report`` without a file: next to a model file, else under the registry home
    (``HOME/reports/NAME-vV-check.html``)."""
    if info is None:
        path = Path(model_ref)
        return path.with_name(path.stem + ".report.html")
    return home / "reports" / f"{info.name}-v{info.version}-check.html"


def quiet_lines(scorecard: Any) -> list[str]:
    """``--quiet`` output: the verdict, and unless passed the reasons that drove it."""
    lines = [f"verdict: {scorecard.verdict}"]
    lines.extend(f"- {reason}" for reason in scorecard.reasons)
    return lines


def run(args: argparse.Namespace) -> int:
    """Run the check; return 0 (pass), 1 (fail) or 3 (inconclusive). Bad input raises
    ErgodexError."""
    from ergodex.cli.common import (
        check_limit_options,
        load_model_info,
        resolve_home,
        show_progress,
    )
    from ergodex.files import check_writable
    from ergodex.validation import check

    # read and check everything first: nothing is written when an input is bad
    check_limit_options(args)
    surrogate, info = load_model_info(args.model, args.home)
    from ergodex.cli.fields import read_check_input

    holder: dict[str, Any] = {}

    def read_check_part(path: str, dt: float | None = None):
        holder["choice"] = read_data(
            path, part="check", holdout=args.holdout, dt=dt, split_at_gaps=args.split_at_gaps
        )
        return holder["choice"].series

    reference, field = read_check_input(args, surrogate, read_check_part)
    choice = holder.get("choice")
    spec = build_spec(args)
    evidence = args.evidence or (evidence_beside(args.json) if args.json else None)
    report = args.report
    if report == _DEFAULT:
        report = default_report_path(args.model, info, resolve_home(args.home))
    for option, target in (("json", args.json), ("evidence", evidence), ("report", report)):
        if target is not None and Path(target).is_dir():
            raise SettingsError(f"--{option} {target}: is a folder; give a file name")
        if target is not None:
            check_writable(target, f"--{option}")

    extra_sections: list = []
    extra_arrays = None
    if field is None:
        # the evidence arrays only when a file or the report will hold them
        result = check(
            surrogate,
            reference,
            spec,
            time_limit=args.time_limit,
            max_memory=args.max_memory,
            progress=show_progress(args),
            evidence=bool(evidence or report),
            workers=args.workers,
            scheduler=args.scheduler,
        )
    else:
        from ergodex.cli.fields import check_field_arg

        field_check = check_field_arg(args, surrogate, field, spec)
        result, extra_sections = field_check.result, field_check.report_sections()
        from ergodex.fields.maps import evidence_maps

        extra_arrays = evidence_maps(field_check)  # so 'ergodex report' redraws the maps
    scorecard = result.scorecard
    if choice is not None:  # said after the work, so that a refusal stays one line
        if not args.quiet:
            print(f"ergodex validate: {choice.note}", file=sys.stderr)
        warning = own_data_warning(surrogate, choice)
        if warning:
            print(f"ergodex validate: warning: {warning}", file=sys.stderr)
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        scorecard.to_json(args.json)
    if evidence:
        Path(evidence).parent.mkdir(parents=True, exist_ok=True)
        assert result.evidence is not None  # the check was asked for its evidence above
        result.evidence.to_npz(evidence, extra=extra_arrays)
    if report:
        from ergodex.report import write_report

        Path(report).parent.mkdir(parents=True, exist_ok=True)
        write_report(report, result, surrogate, extra_sections=extra_sections)
        print(f"ergodex validate: report written to {report}", file=sys.stderr)
    print("\n".join(quiet_lines(scorecard)) if args.quiet else scorecard.table())
    from ergodex.cli.fields import time_unit_note

    if time_unit_note(surrogate) and not args.quiet:
        print(time_unit_note(surrogate))
    if scorecard.verdict == "inconclusive":
        return EXIT_INCONCLUSIVE
    return EXIT_PASS if scorecard.passed else EXIT_FAIL
