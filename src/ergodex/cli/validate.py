"""``ergodex validate MODEL DATA``: check a surrogate's long-run statistics against data.

Exit codes: 0 the model passed, 1 it failed its check (the scorecard says why), 2 bad input
(raised as :class:`~ergodex.exceptions.ErgodexError` and turned into one line on stderr by
:mod:`ergodex.cli`). Every input is read and checked before anything is written.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from ergodex.exceptions import SettingsError

EXIT_PASS = 0
EXIT_FAIL = 1
#: Default wall-clock budget of the ensemble integration (one hour).
DEFAULT_TIME_LIMIT = 3600.0


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``validate`` subcommand."""
    parser = subparsers.add_parser(
        "validate",
        help="check a surrogate's long-run statistics against data (exit 0 pass, 1 fail)",
        description=(
            "Integrate the surrogate from many states drawn from the data and compare its long-run "
            "statistics (histograms, autocorrelation, spectra, quantiles, regimes) with the data's, "
            "against the data's own sampling noise. Exit 0 when it passes, 1 when it fails (also "
            "when it is too stiff for the substep floor or exceeds --time-limit), 2 on "
            "bad input. Caution: a passed statistical check is not a certification; defer to the "
            "applicable codes, standards and licensed practice."
        ),
    )
    parser.add_argument("model", metavar="MODEL", help="surrogate file (model.json)")
    parser.add_argument("data", metavar="DATA",
                        help="reference data: .csv, .npz, .nc, or a folder with dataset.toml")
    parser.add_argument("--regimes", metavar="FILE", default=None,
                        help="regime definitions (TOML) for occupancy rows")
    parser.add_argument("--members", type=int, default=16, help="ensemble members (default 16)")
    parser.add_argument("--length", type=float, default=None, metavar="T",
                        help="time per member after spin-up (default: one reference piece)")
    parser.add_argument("--spinup", type=float, default=None, metavar="T",
                        help="spin-up time discarded (default: 5 decorrelation times)")
    parser.add_argument("--seed", type=int, default=0, help="seed of starts and noise (default 0)")
    parser.add_argument("--tolerance", type=float, default=None,
                        help="largest allowed ratio of model distance to noise floor "
                             "(default: the calibrated value)")
    parser.add_argument("--dt", type=float, default=None,
                        help="sampling interval when DATA has no time column or manifest")
    parser.add_argument("--json", metavar="OUT", default=None, help="write the scorecard JSON here")
    parser.add_argument("--evidence", metavar="OUT.npz", default=None,
                        help="write the evidence arrays (NPZ) here")
    parser.add_argument("--report", metavar="OUT.html", default=None,
                        help="write a self-contained HTML report here")
    parser.add_argument("--quiet", action="store_true", help="do not print the scorecard table")
    from ergodex.cli.common import add_limit_options

    add_limit_options(parser, time_limit=DEFAULT_TIME_LIMIT)
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    """Run the check; return 0 (pass) or 1 (fail). Bad input raises ErgodexError."""
    from ergodex.cli.common import check_limit_options
    from ergodex.files import check_writable
    from ergodex.readers import read_series
    from ergodex.regimes import RegimeSet
    from ergodex.surrogate import Surrogate
    from ergodex.validation import CheckSpec, check

    # read and check everything first: nothing is written when an input is bad
    check_limit_options(args)
    surrogate = Surrogate.from_json(Path(args.model))
    reference = read_series(args.data, dt=args.dt)
    regimes = RegimeSet.from_toml(args.regimes) if args.regimes else None
    spec_kw: dict[str, Any] = {"members": args.members, "length": args.length,
                               "spinup": args.spinup, "seed": args.seed, "regimes": regimes}
    if args.tolerance is not None:
        spec_kw["tolerance"] = args.tolerance
    spec = CheckSpec(**spec_kw)
    spec.check_settings()
    for option in ("json", "evidence", "report"):
        target = getattr(args, option)
        if target is not None and Path(target).is_dir():
            raise SettingsError(f"--{option} {target}: is a folder; give a file name")
        if target is not None:
            check_writable(target, f"--{option}")

    result = check(surrogate, reference, spec, time_limit=args.time_limit,
                   max_memory=args.max_memory)
    scorecard = result.scorecard
    if args.json:
        Path(args.json).parent.mkdir(parents=True, exist_ok=True)
        scorecard.to_json(args.json)
    if args.evidence:
        Path(args.evidence).parent.mkdir(parents=True, exist_ok=True)
        result.evidence.to_npz(args.evidence)
    if args.report:
        from ergodex.report import write_report

        write_report(args.report, result, surrogate)
    if not args.quiet:
        print(scorecard.table())
    else:
        print(f"verdict: {scorecard.verdict}", file=sys.stdout)
    return EXIT_PASS if scorecard.passed else EXIT_FAIL
