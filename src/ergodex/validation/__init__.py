"""Validation: do a surrogate's long-run statistics match the data's, within the data's own noise?

The check (README, "How the check decides"):

1. The reference data is cut into *pieces* of equal length that are close to independent:
   separate runs, or blocks of one run separated by a gap of several decorrelation times.
2. The surrogate is integrated from states drawn from the reference (seeded), a spin-up is
   thrown away, and each member's output (at the data's sampling interval) is cut into pieces of
   the same length. Members that blow up are counted, timed and left out. A surrogate whose
   transform changes the variables (PCA modes) is compared in its model space, on the reference
   mapped through that transform; hidden variables (``settings["observed_variables"]`` names the
   others) start at 0 and are not compared.
3. Pieces are pooled into *groups* of ``pool`` pieces (default half the reference pieces). For
   every *row* (a statistic and a variable or regime) a distance ``d`` is computed between two
   groups. The **noise floor** is the mean of ``d`` over splits of the reference into two
   disjoint groups — how far two honest samples of the truth of that size already differ; the
   **value** is the mean of ``d`` over all (model group, reference group) pairs. Every compared
   sample has the same length, so the two are comparable: for a perfect surrogate both estimate
   the same number and ``ratio = value / noise floor`` is near 1, while a wrong surrogate adds a
   bias that does not shrink with sampling and drives the ratio up. Pooling averages out
   piece-level noise, which makes real differences stand out 2–3× further than comparing single
   pieces (measured in ``benchmarks/calibration.py``).
4. The verdict is family-wise: the surrogate passes when the *largest* row ratio is within the
   threshold, the members agree with one another, and no member blew up. The threshold comes
   from the data (:mod:`ergodex.nullfloor`, :mod:`~ergodex.validation.threshold`): whole checks
   of a right surrogate are replayed on a smoothed moving-block bootstrap of the reference, and
   the ``1 − false_reject_rate`` point (default 95 %) of their largest ratio is the threshold,
   so it grows with the number of independent rows and stays put for correlated ones; it is
   never below ``threshold_floor`` (2.75, the tolerance calibrated on known systems, figures in
   ``benchmarks/README.md``). ``false_reject_rate = None`` holds every row to ``tolerance``.
5. Power (:mod:`ergodex.power`): rescaled copies of the reference (time scale ×f, variance ×f)
   are scored against reference groups through the same rows; the smallest rejected factors are
   stated in the scorecard. A record that cannot reject ±50 %, spans fewer than 20 decorrelation
   times, or whose runs differ from each other beyond their own noise gives the verdict
   ``"inconclusive"`` (not passed) unless the model already failed; runs that disagree make it
   inconclusive even then (no noise floor built from them is meaningful), blow-ups still fail.

Rows (``CheckSpec.statistics``):

========================  ==========================================================  =========
statistic                 distance between two samples (groups of pieces)             rows
========================  ==========================================================  =========
``histogram``             Wasserstein-1 distance of the marginal distributions         variables
``autocorrelation``       RMS difference of the autocorrelation up to ``max_lag``      variables
``spectrum``              L1 difference of Welch spectra / their mean total power      variables
``quantiles``             mean absolute difference of the 1 %, 99 %, 99.9 % quantiles   variables
``occupancy``             absolute difference of the fraction of time in a regime      regimes
``residence``             absolute difference of the mean residence time               regimes
``transitions``           Frobenius norm of the difference of transition matrices      one
========================  ==========================================================  =========

A passed check is evidence, not a certification: a surrogate that feeds decisions affecting
people's safety must also meet the applicable codes, standards and licensed practice.

The package, one job per module: :mod:`~ergodex.validation.spec` (the settings),
:mod:`~ergodex.validation.plan` (what is derived from them and the data),
:mod:`~ergodex.validation.spaces` (compared variables and column order),
:mod:`~ergodex.validation.pieces` (reference pieces, per-piece statistics, distances, groups:
the noise floor), :mod:`~ergodex.validation.verdict` (rows, blow-ups, member agreement, the
decision), :mod:`~ergodex.validation.threshold` (the threshold from the data),
:mod:`~ergodex.validation.scorecard`, :mod:`~ergodex.validation.evidence`,
:mod:`~ergodex.validation.result`, and :mod:`~ergodex.validation.checking` (the coordinator).
"""

from __future__ import annotations

from ergodex.check_names import ALL_STATISTICS, DEFAULT_STATISTICS, DEFAULT_TOLERANCE
from ergodex.validation.checking import check, validate
from ergodex.validation.evidence import EVIDENCE_FIELDS, EVIDENCE_FORMAT, Evidence
from ergodex.validation.pieces import PieceSettings
from ergodex.validation.plan import CheckPlan, derive_plan
from ergodex.validation.result import CheckResult
from ergodex.validation.scorecard import (
    SCORECARD_FORMAT,
    Scorecard,
    ScoreRow,
    power_lines,
    threshold_line,
)
from ergodex.validation.spaces import align_columns, data_variables
from ergodex.validation.spec import CheckSpec

__all__ = [
    "ALL_STATISTICS",
    "DEFAULT_STATISTICS",
    "DEFAULT_TOLERANCE",
    "EVIDENCE_FIELDS",
    "EVIDENCE_FORMAT",
    "SCORECARD_FORMAT",
    "CheckPlan",
    "CheckResult",
    "CheckSpec",
    "Evidence",
    "PieceSettings",
    "ScoreRow",
    "Scorecard",
    "align_columns",
    "check",
    "data_variables",
    "derive_plan",
    "threshold_line",
    "power_lines",
    "validate",
]
