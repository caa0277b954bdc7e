"""``ergodex fit DATA --out MODEL.json``: fit a surrogate, or select one by its statistics.

Without ``--method`` and ``--config``, a record of more than 6 variables gets the automatic
choice (:mod:`ergodex.fitting.automatic`): mode count and method chosen by checking candidates
against the fit runs' own statistics.

Exit codes: 0 a model was written; 1 ``--select`` or the automatic choice ran but no candidate
passed the statistical check (nothing written but the optional ``--json`` front), or the fit
gave a degenerate model
(no terms, or one that cannot move: nothing written, the reason and a suggestion on stderr);
2 bad input (raised as
:class:`~ergodex.exceptions.ErgodexError`, one line on stderr, nothing written).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from ergodex.cli.checks import OPTIONS, add_check_options, build_spec
from ergodex.cli.common import add_data_options, read_data
from ergodex.exceptions import SettingsError
from ergodex.fit_methods import FIT_METHODS

if TYPE_CHECKING:
    from ergodex.series import Series

EXIT_OK = 0
EXIT_NONE_PASSED = 1
EXIT_DEGENERATE = 1

#: What to try when a fit comes out degenerate, per method.
_DEGENERATE_HINTS = {
    "sparse": "lower the sparsity threshold (settings: prune_below = ...), or check that the "
    "data vary on the time unit given (--dt)",
    "quadratic-noise": "check that the data vary on the time unit given (--dt), or lower "
    "the ridge weight (settings: ridge = ...)",
    "linear-inverse": "choose tau0 (settings: tau0 = ...) as a lag at which the data are still "
    "correlated, in the data's time unit",
}

METHODS = tuple(FIT_METHODS)  # the fitter table's names, without importing any fitter

#: What the fit's ``score`` means, printed beside it.
SCORE_LEGEND = (
    "score: the fit's R², the share of the variance of the fitted tendencies "
    "(for linear-inverse: of the state one lag later) that the model explains; 1 is "
    "perfect; it is not the statistical check"
)
#: What the selection table's columns mean, printed under it.
SELECT_LEGEND = (
    "stat.score: largest ratio of the candidate's distance from the reference "
    "statistics to their noise floor (lower is better; the verdict compares it with "
    "the tolerance); tend.err: RMS error of the model's tendencies over their RMS "
    "(lower is better); * marks the chosen candidate"
)


def add_parser(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``fit`` subcommand."""
    parser = subparsers.add_parser(
        "fit",
        help="fit a surrogate to data (or select one by its long-run statistics)",
        description=(
            "Fit a surrogate to DATA and write it as MODEL.json. "
            "With --select, fit every candidate "
            "of a sweep, check each one's long-run statistics against the data's noise floor, and "
            "keep the sparsest that passes (exit 1 when none does). Without --method and "
            "--config, a record of more than 6 variables gets the automatic choice: the linear "
            "inverse model on 6, 8, 10 and 12 principal components (those fewer than the "
            "variables, and all of them when there are at most 12), "
            "then, if none passes, the calibrated linear inverse model on the mode count that "
            "came closest, each checked against the fit runs' own statistics (held-out runs "
            "untouched); the passing candidate with the fewest terms is written, one line per "
            "candidate tried is printed, and exit 1 when none passes. Give --method or --config "
            "to skip the choice. Caution: a passed statistical "
            "check is not a certification; defer to the applicable codes, standards and licensed "
            "practice."
        ),
    )
    parser.add_argument(
        "data", metavar="DATA", help="data to fit: .csv, .npz, .nc, or a folder with dataset.toml"
    )
    parser.add_argument(
        "--method",
        choices=METHODS,
        default=None,
        help="fit method (default: the config file's, else sparse; with neither, a record of "
        "more than 6 variables gets the automatic choice)",
    )
    parser.add_argument(
        "--config",
        metavar="FILE",
        default=None,
        help='fit settings (TOML): method = "...", a [settings] table, optional [select] '
        'table; format = "ergodex-fit/1" reads a file in the old setting names',
    )
    parser.add_argument(
        "--out", metavar="MODEL.json", required=True, help="where to write the model"
    )
    add_data_options(parser)
    parser.add_argument(
        "--select",
        action="store_true",
        help="sweep candidates (the config's [select] table, else a sweep of prune_below) "
        "and keep the sparsest whose statistics pass",
    )
    parser.add_argument(
        "--reference",
        metavar="DATA",
        default=None,
        help="--select: data to check candidates against (default: DATA's "
        "held-out runs, else DATA itself)",
    )
    parser.add_argument(
        "--scheduler",
        metavar="ADDRESS",
        default=None,
        help="--select or the automatic choice: run candidates on a Dask cluster "
        "(e.g. tcp://127.0.0.1:8786)",
    )
    parser.add_argument(
        "--n-jobs",
        type=int,
        default=None,
        help="--select or the automatic choice: local worker processes (default 1: in this "
        "process; -1: every CPU)",
    )
    from ergodex.cli.common import add_workers_option

    add_workers_option(parser, scope="--select: ")
    parser.add_argument(
        "--json",
        metavar="OUT",
        default=None,
        help="write a JSON summary (fit diagnostics, or the selection front) here",
    )
    parser.add_argument("--quiet", action="store_true", help="print nothing on success")
    add_check_options(parser, title="check settings (--select and the automatic choice)")
    from ergodex.cli.fields import add_fit_options

    add_fit_options(parser)
    parser.set_defaults(func=run)
    return parser


def _check_target(option: str, target: str | None) -> None:
    if target is None:
        return
    path = Path(target)
    if path.is_dir():
        raise SettingsError(f"--{option} {target}: is a folder; give a file name")
    if not path.parent.exists():
        raise SettingsError(f"--{option} {target}: folder {str(path.parent)!r} does not exist")
    from ergodex.files import check_writable

    check_writable(path, f"--{option}")  # e.g. /proc/x.json: refused before the fit, not after


def run(args: argparse.Namespace) -> int:
    """Fit (or select) and write the model; return the exit code. Bad input raises ErgodexError."""
    from ergodex.cli.common import show_progress
    from ergodex.fitting import make_fitter
    from ergodex.fitting.base import parse_fit_settings, read_fit_document
    from ergodex.readers import read_series

    # read and check every input before any work: nothing is written when one is bad
    _check_target("out", args.out)
    _check_target("json", args.json)
    # the automatic choice is possible only without --method, --config and --select; whether it
    # happens depends on the number of variables, known once DATA is read
    may_choose = not args.select and args.method is None and args.config is None
    if args.reference and not args.select:
        raise SettingsError("--reference only applies with --select")
    if not (args.select or may_choose) and (args.scheduler or args.n_jobs is not None):
        raise SettingsError("--scheduler and --n-jobs only apply with --select")
    if args.workers is not None and not args.select:
        raise SettingsError("--workers only applies with --select")
    if args.workers is not None and args.workers < 1:
        raise SettingsError(f"--workers must be a positive number of threads, got {args.workers}")
    given = [OPTIONS[k] for k in OPTIONS if getattr(args, k, None) is not None]
    if not (args.select or may_choose) and (given or args.check_config):
        raise SettingsError(f"{(given or ['--check-config'])[0]} only applies with --select")
    spec = build_spec(args) if (args.select or may_choose) else None
    document: dict = {}
    if args.config is not None:
        document = read_fit_document(args.config)
        if args.method is not None and "method" in document and document["method"] != args.method:
            raise SettingsError(
                f"--method {args.method} contradicts method = {document['method']!r} "
                f"in {args.config}; "
                f"drop one of them"
            )
    if args.method is not None:
        document = {**document, "method": args.method}
    method, settings = parse_fit_settings(document, source=args.config or "--method")
    from ergodex.cli.fields import read_fit_input

    holder: dict[str, Any] = {}

    def read_fit_part(path: str, dt: float | None = None):
        holder["choice"] = read_data(
            path, part="fit", holdout=args.holdout, dt=dt, split_at_gaps=args.split_at_gaps
        )
        if not args.quiet:
            print(f"ergodex fit: {holder['choice'].note}", file=sys.stderr)
        return holder["choice"].series

    series, finish, data_note = read_fit_input(args, read_fit_part)
    choice = holder.get("choice")

    from ergodex.fitting.automatic import MANY_VARIABLES

    if may_choose and series.n_variables > MANY_VARIABLES:
        return _choose_and_write(args, series, spec, finish, data_note)
    if may_choose and (given or args.check_config or args.scheduler or args.n_jobs is not None):
        option = (given or ["--check-config" if args.check_config else "--n-jobs"])[0]
        raise SettingsError(
            f"{option} only applies with --select or the automatic choice (a record of more "
            f"than {MANY_VARIABLES} variables; this one has {series.n_variables})"
        )

    if not args.select:
        fitter = make_fitter(method, settings).fit(series, progress=show_progress(args))
        surrogate = finish(fitter.surrogate_)
        problem = degenerate_reason(surrogate)
        if problem is not None:
            print(
                f"ergodex fit: model failed: the fitted {method} model {problem}; nothing "
                f"written. Try: {_DEGENERATE_HINTS.get(method, 'other fit settings')}",
                file=sys.stderr,
            )
            return EXIT_DEGENERATE
        summary = {
            "method": method,
            "settings": fitter.get_params(),
            "n_terms": int(fitter.n_terms_),
            "score": float(fitter.score_),
            "tendency_error": float(fitter.tendency_error_),
            "data_fingerprint": series.fingerprint(),
            "model_fingerprint": surrogate.fingerprint(),
        }
        _write(args, surrogate, summary)
        if not args.quiet:
            print(
                f"fitted {method} model to {args.data} "
                f"({series.n_runs} runs, {series.n_samples} samples): "
                f"{fitter.n_terms_} terms, score {fitter.score_:.4g}"
            )
            print(f"  ({SCORE_LEGEND})")
            print(f"  data: {data_note}")
            for line in surrogate.equations():
                print(f"  {line}")
            tau_note = tau_test_note(fitter)
            if tau_note:
                print(f"  warning: {tau_note}")
            print(f"wrote {args.out}")
        return EXIT_OK

    from ergodex.fitting.selection import parse_selection, select

    candidates = parse_selection(
        document, method=method, settings=settings, source=args.config or "defaults"
    )
    reference: Series | None
    if args.reference:
        reference = read_series(args.reference, dt=args.dt, split_at_gaps=args.split_at_gaps)
    else:
        # the held-out runs, when DATA holds some out (a gridded field holds none out)
        reference = choice.held_out if choice is not None else None
    if reference is None or reference.fingerprint() == series.fingerprint():
        print(
            "ergodex fit: warning: --select checks the candidates on the data they are fitted "
            "on, which says little about new data; hold runs out (--holdout, or a dataset.toml "
            "'holdout' list) or give --reference",
            file=sys.stderr,
        )
    result = select(
        series,
        candidates,
        spec,
        reference=reference,
        scheduler=args.scheduler,
        n_jobs=args.n_jobs,
        workers=args.workers,
        progress=show_progress(args),
    )
    if not args.quiet:
        print(result.table())
        print(SELECT_LEGEND)
        print(result.message)
    if result.chosen is None:
        if args.json is not None:
            from ergodex.cli.common import write_json_atomic

            write_json_atomic(args.json, result.to_dict())
        return EXIT_NONE_PASSED
    _write(args, finish(result.surrogate), result.to_dict())
    if not args.quiet:
        print(f"wrote {args.out}")
    return EXIT_OK


def _choose_and_write(args: argparse.Namespace, series, spec, finish, data_note: str) -> int:
    """The automatic choice (many variables, no method given): try, print, write the chosen."""
    from ergodex.cli.common import show_progress, write_json_atomic
    from ergodex.fitting.automatic import MANY_VARIABLES, choose_fit

    if not args.quiet:
        print(
            f"ergodex fit: {series.n_variables} variables (more than {MANY_VARIABLES}) and no "
            "--method or --config: choosing the mode count and method, each candidate checked "
            "against the fit runs' own statistics (held-out runs untouched)",
            file=sys.stderr,
        )
    result = choose_fit(
        series,
        spec,
        progress=show_progress(args),
        n_jobs=args.n_jobs,
        scheduler=args.scheduler,
    )
    record = {**result.to_dict(), "choice": "automatic"}
    if not args.quiet or result.chosen is None:
        print(result.table(settings=True))
        print(SELECT_LEGEND)
        print(result.message)
    if result.chosen is None:
        if args.json is not None:
            write_json_atomic(args.json, record)
        return EXIT_NONE_PASSED
    _write(args, finish(result.surrogate), record)
    if not args.quiet:
        print(f"  data: {data_note}")
        print(f"wrote {args.out}")
    return EXIT_OK


def degenerate_reason(surrogate) -> str | None:
    """Why a fitted model is useless, or None: no terms, or nothing that can move it.

    A model with no non-zero coefficient and no noise stays where it starts (``dx/dt = 0``);
    no check can say anything about it, so ``fit`` must not report success.
    """
    import numpy as np

    coefficients = np.asarray(surrogate.coefficients, float)
    if surrogate.n_terms == 0 or not np.any(coefficients != 0):
        noise = surrogate.noise
        if noise is None or not np.any(np.asarray(noise, float) != 0):
            return "has no non-zero term and no noise (dx/dt = 0): it cannot move"
        return "has no non-zero term (only noise: a random walk with no dynamics)"
    return None


def tau_test_note(fitter) -> str | None:
    """The linear inverse model's failed tau test, in one line (None when it passed or none ran).

    The tau test refits at several lags; an operator that changes with the lag means the data
    are not well described by linear dynamics with white noise at that lag.
    """
    test = getattr(fitter, "tau_test_", None)
    if not isinstance(test, dict) or test.get("flat", True):
        return None
    changes = [float(c) for c in test.get("relative_change", []) if c is not None]
    worst = max(changes) if changes else float("nan")
    problems = "; ".join(str(p) for p in test.get("problems", []) or [])
    return (
        f"the tau test failed: the operator changes by up to {worst:.3g} (relative) across "
        f"lags {', '.join(f'{lag:g}' for lag in test.get('lags', []))}, above the tolerance "
        f"{test.get('tolerance', float('nan')):g}"
        + (f" ({problems})" if problems else "")
        + "; the model may not hold at other lags: try another tau0 or check its scorecard"
    )


def _write(args: argparse.Namespace, surrogate, summary: dict) -> None:
    # the model goes through a temporary file in the target folder and os.replace (atomic)
    surrogate.to_json(Path(args.out))
    if args.json is not None:
        from ergodex.cli.common import write_json_atomic

        write_json_atomic(args.json, summary)


if __name__ == "__main__":  # pragma: no cover
    from ergodex.cli import main

    sys.exit(main(["fit", *sys.argv[1:]]))
