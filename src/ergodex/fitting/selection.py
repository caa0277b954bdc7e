"""Choose a surrogate by its long-run statistics, not by how well it fits the tendencies.

Each candidate (a fit method and its settings: a sweep of the sparse fitter's ``prune_below``,
other term families, other derivative estimates, other mode counts) is fitted, integrated from
many starting states and checked with :func:`ergodex.validation.check`. The chosen candidate is
the *sparsest one whose statistics pass*; the whole front (number of terms, statistical score,
tendency error, blow-up time of the failures) is kept so that a report can show why the others
lost. Selecting by tendency error alone is the common mistake this replaces: the best tendency
fit often blows up or settles on a fixed point once integrated.

Candidates run through joblib: local processes by default, or a ``dask.distributed`` cluster
through joblib's Dask backend (``scheduler="tcp://host:8786"`` or a ``Client``). Every candidate is
checked with the same :class:`~ergodex.validation.CheckSpec` (same seed), so the result does not
depend on where it ran.
"""

from __future__ import annotations

import logging
import math
import os
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ergodex.exceptions import ErgodexError, SettingsError
from ergodex.fitting.base import (
    check_fit_settings,
    current_fit_document,
    fitter_class,
    make_fitter,
)

log = logging.getLogger(__name__)

__all__ = [
    "Candidate",
    "SelectionResult",
    "select",
    "prune_sweep",
    "parse_selection",
    "DEFAULT_PRUNE_BELOW",
    "SELECTION_FORMAT",
]

#: Written in the ``format`` key of a selection record (``fit --select --json``).
SELECTION_FORMAT = "ergodex-selection/2"

#: Values of ``prune_below`` in the default sweep (geometric, in the data's tendency units).
DEFAULT_PRUNE_BELOW = (0.01, 0.03, 0.1, 0.3, 1.0, 3.0)


@dataclass
class Candidate:
    """One fitted and checked candidate: a point of the front."""

    index: int
    method: str
    settings: Mapping[str, Any]
    verdict: str  # "pass" | "fail" | "error" (the fit itself failed)
    n_terms: int | None = None  # non-zero coefficients
    statistical_score: float | None = None  # the scorecard's largest ratio to the noise floor
    tendency_error: float | None = None
    fit_score: float | None = None  # the fitter's own score_ (tendency R² for sparse)
    blowup_count: int = 0
    first_blowup_time: float | None = None
    reasons: list[str] = field(default_factory=list)
    model_json: str | None = None
    scorecard: dict | None = None

    @property
    def passed(self) -> bool:
        return self.verdict == "pass"

    def surrogate(self):
        """The candidate's surrogate (rebuilt from its JSON), or None when the fit failed."""
        from ergodex.surrogate import Surrogate

        return None if self.model_json is None else Surrogate.from_json(self.model_json)

    def to_dict(self) -> dict:
        """JSON-ready summary (without the model and the full scorecard)."""
        return {
            "index": self.index,
            "method": self.method,
            "settings": dict(self.settings),
            "verdict": self.verdict,
            "n_terms": self.n_terms,
            "statistical_score": _clean(self.statistical_score),
            "tendency_error": _clean(self.tendency_error),
            "fit_score": _clean(self.fit_score),
            "blowup_count": self.blowup_count,
            "first_blowup_time": _clean(self.first_blowup_time),
            "reasons": list(self.reasons),
        }


@dataclass
class SelectionResult:
    """Every candidate of a sweep and the one chosen.

    Attributes
    ----------
    candidates : list of Candidate
        In the order given.
    chosen : int or None
        Index of the chosen candidate: the fewest terms among those that passed (ties: the
        smaller statistical score). None when no candidate passed.
    spec : dict
        The CheckSpec used for every candidate (``CheckSpec.to_dict()``).
    backend : str
        Where the candidates ran ("sequential", "loky", "dask").
    reference_fingerprint, data_fingerprint : str
    """

    candidates: list[Candidate]
    chosen: int | None
    spec: dict
    backend: str
    data_fingerprint: str
    reference_fingerprint: str
    message: str = ""

    @property
    def passed(self) -> bool:
        return self.chosen is not None

    @property
    def surrogate(self):
        """The chosen surrogate, or None."""
        return None if self.chosen is None else self.candidates[self.chosen].surrogate()

    @property
    def front(self) -> list[Candidate]:
        """Candidates ordered by number of terms (failed fits last)."""
        return sorted(self.candidates, key=lambda c: (c.n_terms is None, c.n_terms or 0, c.index))

    def plot_front(self, *, ax=None):
        """Terms against score per candidate (:func:`ergodex.plotting.plot_selection_front`)."""
        from ergodex.plotting import plot_selection_front

        return plot_selection_front(self, ax=ax)

    def to_dict(self) -> dict:
        """JSON-ready record for reports and ``--json`` output (format ``ergodex-selection/2``:
        the candidates' settings under ergodex's own names; files without a ``format`` key were
        written before, with the old names)."""
        return {
            "format": SELECTION_FORMAT,
            "chosen": self.chosen,
            "passed": self.passed,
            "message": self.message,
            "backend": self.backend,
            "data_fingerprint": self.data_fingerprint,
            "reference_fingerprint": self.reference_fingerprint,
            "spec": self.spec,
            "candidates": [c.to_dict() for c in self.candidates],
        }

    def table(self, *, settings: bool = False) -> str:
        """Plain-text front, one line per candidate, the chosen one marked; with ``settings``,
        each line ends with the candidate's settings (``n_modes=10``)."""
        lines = [
            f"{'':2}{'#':>3}  {'method':16} {'terms':>5}  {'stat.score':>10}  {'tend.err':>8}  "
            "verdict"
        ]
        for c in self.front:
            mark = "* " if c.index == self.chosen else "  "
            score = "-" if c.statistical_score is None else f"{c.statistical_score:.3g}"
            tend = "-" if c.tendency_error is None else f"{c.tendency_error:.3g}"
            terms = "-" if c.n_terms is None else str(c.n_terms)
            extra = (
                f" (blow-up at t={c.first_blowup_time:.3g})"
                if c.first_blowup_time is not None
                else ""
            )
            shown = ""
            if settings:
                shown = "  " + (" ".join(f"{k}={v}" for k, v in c.settings.items()) or "(defaults)")
            lines.append(
                f"{mark}{c.index:>3}  {c.method:16} {terms:>5}  {score:>10}  {tend:>8}  "
                f"{c.verdict}{extra}{shown}"
            )
        return "\n".join(lines)


def _clean(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def prune_sweep(
    values: Sequence[float] = DEFAULT_PRUNE_BELOW,
    *,
    method: str = "sparse",
    settings: Mapping[str, Any] | None = None,
) -> list[tuple[str, dict]]:
    """Candidates that differ only in the sparsity threshold (the setting ``prune_below``)."""
    return [(method, {**dict(settings or {}), "prune_below": float(t)}) for t in values]


def _evaluate(
    index: int,
    method: str,
    settings: dict,
    fit_data,
    reference,
    spec_dict: dict,
    fit_progress: Any = False,
    workers: int | None = None,
) -> dict:
    """Fit, check and summarise one candidate (runs in a worker; returns plain data)."""
    from ergodex.validation import CheckSpec, check

    try:
        fitter = make_fitter(method, settings).fit(fit_data, progress=fit_progress)
    except ErgodexError as exc:
        return {"index": index, "verdict": "error", "reasons": [f"fit failed: {exc}"]}
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
        # a numerical failure inside one candidate (e.g. the optimizer) is that candidate's
        # finding; the sweep goes on and the front records it
        return {
            "index": index,
            "verdict": "error",
            "reasons": [f"fit failed ({type(exc).__name__}): {exc}"],
        }
    surrogate = fitter.surrogate_
    out = {
        "index": index,
        "n_terms": int(fitter.n_terms_),
        "tendency_error": float(fitter.tendency_error_),
        "fit_score": float(fitter.score_),
        "model_json": surrogate.to_json(),
    }
    try:
        scorecard = check(
            surrogate, reference, CheckSpec.from_dict(spec_dict), evidence=False, workers=workers
        ).scorecard
    except ErgodexError as exc:
        out.update(verdict="error", reasons=[f"check failed: {exc}"])
        return out
    times = [t for t in scorecard.blowups.get("times", []) if t is not None and math.isfinite(t)]
    out.update(
        verdict=scorecard.verdict,
        statistical_score=float(scorecard.largest_ratio),
        blowup_count=int(scorecard.blowups.get("count", 0)),
        first_blowup_time=min(times) if times else None,
        reasons=list(scorecard.reasons),
        scorecard=scorecard.to_dict(),
    )
    return out


def _choose(candidates: list[Candidate]) -> int | None:
    passing = [c for c in candidates if c.passed]
    if not passing:
        return None
    best = min(
        passing,
        key=lambda c: (
            c.n_terms,
            c.statistical_score if c.statistical_score is not None else math.inf,
            c.index,
        ),
    )
    return best.index


def select(
    series,
    candidates: Sequence[tuple[str, Mapping[str, Any]]] | None = None,
    spec=None,
    *,
    reference=None,
    prune_below: Sequence[float] | None = None,
    scheduler: Any = None,
    n_jobs: int | None = None,
    workers: int | None = None,
    progress: Any = None,
) -> SelectionResult:
    """Fit and check every candidate; choose the sparsest whose statistics pass.

    Parameters
    ----------
    series : Series, pandas.DataFrame or xarray.Dataset
        Data to fit on (converted by :func:`ergodex.frames.as_series`).
    candidates : list of (method, settings), optional
        What to try. Default: a sweep of the sparse fitter over ``prune_below``.
    spec : CheckSpec, optional
        How every candidate is checked (the same seed for all, so results are comparable).
    reference : Series, DataFrame or Dataset, optional
        Data to check against — held-out runs of the same system. Default: ``series`` itself,
        which flatters every candidate a little; pass held-out runs whenever there are some.
    prune_below : sequence of float, optional
        Values of the sparse fitter's ``prune_below`` in the default sweep
        (:data:`DEFAULT_PRUNE_BELOW`).
    scheduler : str or dask.distributed.Client, optional
        Run on a Dask cluster through joblib's Dask backend: a scheduler address
        (``"tcp://127.0.0.1:8786"``) or a connected client. Default: local processes.
    n_jobs : int, optional
        Local worker processes; default 1 (in this process). Each new process pays for importing
        pysindy and compiling the integrator's kernels (seconds to tens of seconds on a busy
        machine), so processes only pay off when each candidate takes longer than that; -1 uses
        every CPU.
    workers : int, optional
        Threads for each candidate's check statistics (:func:`ergodex.validation.check`);
        default every core in this process, one thread in each worker process or on a cluster.
    progress : bool or callable(done, total), optional
        Progress over the candidates (see :mod:`ergodex.progress`); default: a bar only when
        standard error is a terminal.

    Returns
    -------
    SelectionResult

    References
    ----------
    The sweep-then-check idea follows the model-selection step of Brunton, Proctor & Kutz (2016)
    with the tendency error replaced by a statistical check against the data's noise floor.
    """
    from ergodex.frames import as_series
    from ergodex.validation import CheckSpec

    series = as_series(series, what="fit data")
    if reference is not None:
        reference = as_series(reference, what="reference")
    if candidates is None:
        candidates = prune_sweep(prune_below if prune_below is not None else DEFAULT_PRUNE_BELOW)
    elif prune_below is not None:
        raise SettingsError("give either candidates or prune_below, not both")
    candidates = [(m, dict(s)) for m, s in candidates]
    if not candidates:
        raise SettingsError("select needs at least one candidate")
    for k, (method, settings) in enumerate(candidates):
        try:
            check_fit_settings(method, settings)
        except SettingsError as exc:
            raise SettingsError(f"candidate {k}: {exc}") from None
    spec = CheckSpec() if spec is None else spec
    spec.check_settings()
    spec_dict = spec.to_dict()
    reference = series if reference is None else reference
    if tuple(reference.names) != tuple(series.names):
        raise SettingsError(
            f"reference variables {list(reference.names)} differ from the fitting data's "
            f"{list(series.names)}"
        )

    jobs = [(k, m, s) for k, (m, s) in enumerate(candidates)]
    show = sys.stderr.isatty() if progress is None else progress
    log.info(
        "select: %d candidates on %d runs, checked against %d runs",
        len(jobs),
        series.n_runs,
        reference.n_runs,
    )
    results, backend = _run(
        jobs, series, reference, spec_dict, scheduler, n_jobs, show, workers=workers
    )

    by_index = {r["index"]: r for r in results}
    out = []
    for k, method, settings in jobs:
        r = by_index[k]
        out.append(
            Candidate(
                index=k,
                method=fitter_class(method).method,
                settings=settings,
                verdict=r["verdict"],
                n_terms=r.get("n_terms"),
                statistical_score=r.get("statistical_score"),
                tendency_error=r.get("tendency_error"),
                fit_score=r.get("fit_score"),
                blowup_count=r.get("blowup_count", 0),
                first_blowup_time=r.get("first_blowup_time"),
                reasons=r.get("reasons", []),
                model_json=r.get("model_json"),
                scorecard=r.get("scorecard"),
            )
        )
    chosen = _choose(out)
    if chosen is None:
        message = f"none of the {len(out)} candidates passed the statistical check"
    else:
        c = out[chosen]
        message = (
            f"chose candidate {chosen} ({c.method}, {c.n_terms} terms, statistical score "
            f"{c.statistical_score:.3g}): the sparsest of {sum(x.passed for x in out)} passing "
            "candidates"
        )
    for c in out:
        log.info(
            "select: candidate %d (%s %s): %s, %s terms, score %s",
            c.index,
            c.method,
            c.settings,
            c.verdict,
            c.n_terms,
            c.statistical_score,
        )
    log.info("select: %s", message)
    return SelectionResult(
        candidates=out,
        chosen=chosen,
        spec=spec_dict,
        backend=backend,
        data_fingerprint=series.fingerprint(),
        reference_fingerprint=reference.fingerprint(),
        message=message,
    )


def _run(
    jobs, series, reference, spec_dict, scheduler, n_jobs, show, *, workers=None
) -> tuple[list[dict], str]:
    import joblib

    if n_jobs is None:
        n_jobs = 1
    if n_jobs == -1:
        n_jobs = os.cpu_count() or 1
    n_jobs = max(1, min(int(n_jobs), len(jobs)))
    here = scheduler is None and n_jobs == 1
    # in this process each fit shows its own bar under the candidates' bar (a callable given as
    # progress hears of the candidates only)
    fit_bar = here and show is True
    # processes and cluster workers already share the cores: one thread each unless told
    threads = workers if workers is not None or here else 1
    tasks = [
        joblib.delayed(_evaluate)(k, m, s, series, reference, spec_dict, fit_bar, threads)
        for k, m, s in jobs
    ]
    if scheduler is not None:
        return _run_dask(tasks, scheduler, show), "dask"
    if here:
        # one candidate at a time (lazily, so the progress bar moves)
        return _collect(
            (func(*args, **kwargs) for func, args, kwargs in tasks), len(tasks), show
        ), "sequential"
    with joblib.parallel_config(backend="loky", n_jobs=n_jobs):
        return _collect(
            joblib.Parallel(return_as="generator_unordered")(tasks), len(tasks), show
        ), "loky"


def _run_dask(tasks, scheduler, show) -> list[dict]:
    import joblib

    from ergodex.cluster import open_client

    with (
        open_client(scheduler, what="running a sweep on a cluster") as client,
        joblib.parallel_config(backend="dask", client=client),
    ):
        return _collect(
            joblib.Parallel(n_jobs=-1, return_as="generator_unordered")(tasks), len(tasks), show
        )


def _collect(iterator, total: int, show: Any) -> list[dict]:
    from ergodex.progress import reporter

    results = []
    with reporter(show, total, desc="candidates", unit="fit") as update:
        for item in iterator:
            results.append(item)
            if update is not None:
                update(len(results), total)
    return results


# -- the [select] table of a fit-settings file ------------------------------------------------
_SELECT_KEYS = ("prune_below", "candidates")


def parse_selection(
    document: Mapping[str, Any],
    *,
    method: str,
    settings: Mapping[str, Any],
    source: str = "fit settings",
) -> list[tuple[str, dict]]:
    """Candidates from the ``[select]`` table of a fit-settings document.

    ``prune_below = [0.05, 0.1, 0.2]`` sweeps that setting of ``method`` with the
    ``[settings]`` table as the base; ``[[select.candidates]]`` tables each give ``method`` and
    further keys as settings. Without a ``[select]`` table the default sweep of ``prune_below``
    is used. An old-version document (``format = "ergodex-fit/1"``) is read in the new names.
    """
    document = current_fit_document(document, source=source)
    table = document.get("select", {})
    if not isinstance(table, Mapping):
        raise SettingsError(f"{source}: 'select' must be a table ([select])")
    for key in table:
        if key not in _SELECT_KEYS:
            raise SettingsError(
                f"{source}: [select] has no key '{key}'; allowed keys: {', '.join(_SELECT_KEYS)}"
            )
    out: list[tuple[str, dict]] = []
    values = table.get("prune_below")
    if values is not None:
        if (
            not isinstance(values, list)
            or not values
            or not all(
                isinstance(t, (int, float)) and not isinstance(t, bool) and t >= 0 for t in values
            )
        ):
            raise SettingsError(
                f"{source}: [select] 'prune_below' must be a non-empty list of numbers >= 0; got "
                f"{values!r}"
            )
        if "prune_below" not in fitter_class(method).settings_table:
            raise SettingsError(
                f"{source}: [select] 'prune_below' needs method 'sparse'; method is {method!r}"
            )
        out += prune_sweep(values, method=method, settings=settings)
    for k, entry in enumerate(table.get("candidates", []) or []):
        if not isinstance(entry, Mapping) or "method" not in entry:
            raise SettingsError(
                f"{source}: [[select.candidates]] entry {k + 1} needs a 'method' key"
            )
        entry = dict(entry)
        cand_method = entry.pop("method")
        try:
            check_fit_settings(cand_method, entry)
        except SettingsError as exc:
            raise SettingsError(f"{source}: [[select.candidates]] entry {k + 1}: {exc}") from None
        out.append((cand_method, entry))
    if not out:
        if "prune_below" in fitter_class(method).settings_table:
            out = prune_sweep(DEFAULT_PRUNE_BELOW, method=method, settings=settings)
        else:
            out = [(method, dict(settings))]
    return out
