"""The default fit of a many-variable record: choose the reduction and the method by statistics.

A record of many variables (more than :data:`MANY_VARIABLES`) fitted without a method or settings
of the user's gets no single default model; :func:`choose_fit` tries a short plan of candidates
and keeps the simplest whose long-run statistics pass the check against **the fit runs
themselves** (held-out runs are never touched; the check's noise floor comes from pieces of the
fit runs):

1. the linear inverse model on the leading principal components, for each mode count of
   :func:`mode_counts` (6, 8, 10, 12 below the number of variables, and the number of variables
   itself when it is at most 12);
2. only when none of those passes and at least one failed (rather than all being inconclusive:
   fit runs too short to tell, which no other model changes), the linear inverse model with cubic
   damping calibrated against the fit runs' statistics (``calibrated-linear-inverse``) on the mode
   count whose linear model came closest (the lowest largest ratio).

The chosen candidate is the passing one with the fewest terms (ties: the lower largest ratio),
the rule of :func:`~ergodex.fitting.selection.select`, which fits and checks every candidate.
The plan stays short so that a record of the ring of 40 stations is fitted in about a minute
on two cores (``benchmarks/auto_fit.py``).
"""

from __future__ import annotations

import dataclasses
import logging
import math
from typing import Any

from ergodex.fitting.selection import SelectionResult, _choose, select

log = logging.getLogger(__name__)

__all__ = ["MANY_VARIABLES", "MODE_COUNTS", "choose_fit", "linear_candidates", "mode_counts"]

#: Records with more variables than this get the automatic choice when no method is given.
MANY_VARIABLES = 6
#: Mode counts the linear inverse model is tried with (those below the number of variables).
MODE_COUNTS = (6, 8, 10, 12)
#: The method tried in the second step.
CALIBRATED = "calibrated-linear-inverse"


def mode_counts(n_variables: int) -> list[int]:
    """Mode counts to try for ``n_variables`` variables: :data:`MODE_COUNTS` below it, and the
    number of variables itself when it is at most the largest of them.

    Examples
    --------
    >>> mode_counts(40), mode_counts(7), mode_counts(2)
    ([6, 8, 10, 12], [6, 7], [2])
    """
    counts = [k for k in MODE_COUNTS if k < n_variables]
    if n_variables <= MODE_COUNTS[-1]:
        counts.append(n_variables)
    return counts


def linear_candidates(n_variables: int) -> list[tuple[str, dict]]:
    """The first step: the linear inverse model at each of :func:`mode_counts`."""
    return [("linear-inverse", {"n_modes": k}) for k in mode_counts(n_variables)]


def choose_fit(
    series,
    spec=None,
    *,
    progress: Any = None,
    n_jobs: int | None = None,
    scheduler: Any = None,
) -> SelectionResult:
    """Try the plan of the module docstring on ``series`` and return every candidate tried.

    Parameters
    ----------
    series : Series
        The fit runs; candidates are fitted on them and checked against them.
    spec : CheckSpec, optional
        How each candidate is checked (default: ``CheckSpec()``, the defaults of ``validate``).
    progress, n_jobs, scheduler
        As for :func:`~ergodex.fitting.selection.select`.

    Returns
    -------
    SelectionResult
        ``chosen`` is None when no candidate passed; ``message`` says what was chosen and why.
    """
    n = int(series.n_variables)
    options = {"progress": progress, "n_jobs": n_jobs, "scheduler": scheduler}
    first = select(series, linear_candidates(n), spec, reference=series, **options)
    result = first
    if not first.passed and any(c.verdict == "fail" for c in first.candidates):
        scored = [c for c in first.candidates if c.statistical_score is not None]
        closest = min(scored, key=lambda c: c.statistical_score or math.inf) if scored else None
        k = int(closest.settings["n_modes"]) if closest is not None else mode_counts(n)[-1]
        log.info("automatic fit: no linear inverse model passed; calibrating on %d modes", k)
        second = select(series, [(CALIBRATED, {"n_modes": k})], spec, reference=series, **options)
        offset = len(first.candidates)
        candidates = first.candidates + [
            dataclasses.replace(c, index=c.index + offset) for c in second.candidates
        ]
        result = dataclasses.replace(first, candidates=candidates, chosen=_choose(candidates))
    return dataclasses.replace(result, message=_why(result))


def _why(result: SelectionResult) -> str:
    tolerance = result.spec.get("tolerance")
    limit = f" (tolerance {tolerance:g})" if isinstance(tolerance, (int, float)) else ""
    errors = [c for c in result.candidates if c.verdict == "error"]
    if result.chosen is None and len(errors) == len(result.candidates):
        reason = errors[0].reasons[0] if errors[0].reasons else "no reason given"
        return (
            f"none of the {len(result.candidates)} candidates could be fitted and checked "
            f"against the fit runs (the first: {reason}); nothing written"
        )
    if result.chosen is None and all(c.verdict == "inconclusive" for c in result.candidates):
        return (
            f"the fit runs are too short to tell whether any of the {len(result.candidates)} "
            "candidates reproduces their statistics (inconclusive); nothing written. Give more "
            "or longer runs, or --method and settings of your own (--config)"
        )
    if result.chosen is None:
        return (
            f"none of the {len(result.candidates)} candidates passed the check against the fit "
            f"runs' own statistics{limit}; nothing written. Give --method and settings of your "
            "own (--config), or more data"
        )
    c = result.candidates[result.chosen]
    passing = sum(x.passed for x in result.candidates)
    modes = c.settings.get("n_modes")
    return (
        f"chose candidate {c.index}: {c.method} on {modes} modes, {c.n_terms} terms, largest "
        f"ratio {c.statistical_score:.3g}{limit} against the fit runs' own statistics; the "
        f"fewest terms of the {passing} candidate(s) that passed"
    )
