"""What a record can detect: the power statement and the reference-consistency test of a check.

A check compares statistics against the reference's own noise floor, so a short record passes
any model whose statistics differ by less than that noise. This module says how large a
difference the record can see, and whether the reference itself is one consistent sample.

**Power by rescaled copies of the reference.** The floor pairs of a check are disjoint groups
``(a, b)`` of reference pieces. Replacing ``a`` by a rescaled copy ``S(a)`` gives a sample of
a "model" that differs from the truth by exactly that change and is independent of ``b``, so
``mean d(S(a), b) / floor`` is the ratio the check would score for such a model, row by row,
through the same row machinery and tolerances. Two changes are tried, each on a ladder of
factors (:data:`LADDER`), and the smallest factor that some row rejects is reported:

- *time scale* ×f (slower): each piece is resampled at ``t / f`` by linear interpolation
  (it then covers ``1/f`` of its original time, as a slower model's piece would);
- *variance* ×f and ×1/f: each piece is scaled about the reference mean by ``sqrt(f)``.

A faster time scale is not simulated (it would need longer pieces); a change of the same size
on a log scale is taken to be as detectable. The method needs no model of a statistic's
sampling distribution and so holds for oscillating or non-Gaussian records alike. For an
Ornstein–Uhlenbeck process its answer can be checked against the effective sample size of
Bretherton et al. (1999, §5: ``N (1 − r²)/(1 + r²)`` for the variance of AR(1) with lag-one
correlation ``r``): in the limit of fine sampling a record of length ``T`` has ``N* = T / τ``
effective samples, so the log-variance of a group has standard deviation ``sqrt(2 τ / T)``.

**The length needed.** Sampling noise of these distances shrinks as ``T^(-1/2)`` while the
distance a change of log-size ``ln f`` adds does not; a record that first detects a change of
``f_min`` needs about ``(ln f_min / ln 1.5)^2`` times its length to detect ×1.5 (a rough
figure, stated as such).

**Reference consistency.** With several reference runs, each piece is cut into two halves
separated by a gap; the Wasserstein-1 distance between halves of different runs is compared
with that between halves of the same run. Runs that sample different attractors (each staying
on one) differ far beyond their own noise, and then no noise floor built from them means
anything: the check is inconclusive.

References
----------
.. [1] C. S. Bretherton, M. Widmann, V. P. Dymnikov, J. M. Wallace and I. Bladé, "The effective
   number of spatial degrees of freedom of a time-varying field", J. Climate 12, 1990–2009
   (1999) (effective sample size of variance estimates).
.. [2] H. von Storch and F. W. Zwiers, *Statistical Analysis in Climate Research*, Cambridge
   (1999), §17.1 (decorrelation time and equivalent sample size).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from ergodex.validation.pieces import PieceSettings

#: Factors tried, smallest first; the first one that some row rejects is reported.
LADDER = (1.1, 1.2, 1.3, 1.4, 1.5, 1.75, 2.0, 3.0, 5.0)
#: The check is inconclusive when it cannot detect a change of this factor (±50 %) of the time
#: scale or of the variance.
REQUIRED_FACTOR = 1.5
#: Fewest decorrelation times a record must span (common practice, no source: the sampling
#: noise of second moments from fewer is of order one).
MIN_DECORRELATION_TIMES = 20.0
#: Floor pairs used for the power statement (enough for a mean; keeps it cheap).
MAX_POWER_PAIRS = 16
#: Statistics that can see a change of time scale, and those that can see a change of variance:
#: a check scoring none of one kind makes no claim about it, so its power is not required.
TEMPORAL_STATISTICS = ("autocorrelation", "spectrum", "residence", "transitions")
DISTRIBUTION_STATISTICS = ("histogram", "quantiles", "occupancy")

METHOD = (
    "rescaled copies of the reference scored against disjoint reference groups through "
    "the check's own rows (time scale by resampling, variance by scaling); "
    "Bretherton et al. 1999 for the effective sample size it agrees with"
)


def stretch_pieces(pieces: np.ndarray, factor: float) -> np.ndarray:
    """Each piece slowed down ``factor``-fold (``factor ≥ 1``): ``y(t) = x(t / factor)``.

    Linear interpolation between samples; the result has the pieces' length and covers the
    first ``1 / factor`` of each piece.
    """
    pieces = np.asarray(pieces, float)
    L = pieces.shape[1]
    pos = np.arange(L) / float(factor)
    i0 = np.minimum(np.floor(pos).astype(int), L - 2)
    w = (pos - i0)[None, :, None]
    return pieces[:, i0] * (1.0 - w) + pieces[:, i0 + 1] * w


def scale_pieces(pieces: np.ndarray, factor: float, mean: np.ndarray) -> np.ndarray:
    """Pieces with their variance multiplied by ``factor`` about ``mean`` (per variable)."""
    return mean + math.sqrt(float(factor)) * (np.asarray(pieces, float) - mean)


def detectable_changes(
    ref_pieces: np.ndarray,
    groups: list,
    floor_index,
    group_stats,
    floors: dict[str, np.ndarray],
    settings: PieceSettings,
    tolerance_for: Callable[[str], float],
) -> dict:
    """Smallest time-scale and variance factors the check's rows would reject.

    Parameters
    ----------
    ref_pieces : (n_pieces, L, n_vars)
    groups, floor_index, group_stats
        The check's reference groups, its floor pairs and the statistics of its groups.
    floors : dict statistic → floor per row
    settings : the check's per-piece statistics settings
    tolerance_for : statistic → tolerance

    Returns
    -------
    dict with ``time_scale``, ``variance_up`` and ``variance_down``: the smallest factor on
    :data:`LADDER` that is rejected (``variance_down`` as ``1/f``), None when none is. A kind
    of change no scored statistic can see (e.g. the time scale when only histograms are
    scored) is not tried and left out.
    """
    from ergodex.validation.pieces import _pair_distances, _PieceStats

    left, right = (np.ravel(i)[:MAX_POWER_PAIRS] for i in floor_index)
    n_vars = ref_pieces.shape[2]
    mean = ref_pieces.reshape(-1, n_vars).mean(axis=0)

    def rejected(change: Callable[[np.ndarray], np.ndarray]) -> bool:
        # every change acts on each piece alone: change the pieces once, then pool them
        s_stats = _PieceStats(change(ref_pieces), settings, [groups[g] for g in left])
        pairs = (np.arange(left.size), right)
        for s, floor in floors.items():
            value = np.nanmean(_pair_distances(s, s_stats, group_stats, pairs), axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                ratio = value / floor
            if np.any(ratio > tolerance_for(s)):
                return True
        return False

    def smallest(change) -> float | None:
        for f in LADDER:

            def at_factor(p: np.ndarray, f: float = f) -> np.ndarray:
                return change(p, f)

            if rejected(at_factor):
                return f
        return None

    out: dict = {}
    if any(s in TEMPORAL_STATISTICS for s in floors):
        out["time_scale"] = smallest(stretch_pieces)
    if any(s in DISTRIBUTION_STATISTICS for s in floors):
        out["variance_up"] = smallest(lambda p, f: scale_pieces(p, f, mean))
        down = smallest(lambda p, f: scale_pieces(p, 1.0 / f, mean))
        out["variance_down"] = None if down is None else 1.0 / down
    return out


def power_statement(
    detect: dict, *, record_time: float, piece_time: float, decorrelation_time: float
) -> tuple[dict, list[str]]:
    """The scorecard's ``power`` block and the reasons the record is too weak (empty if not).

    The record is inconclusive when it cannot reject a time scale ×1.5 or a variance ×1.5 or
    ×0.5 (each only when ``detect`` holds it: a kind no scored statistic sees is not claimed),
    or spans fewer than :data:`MIN_DECORRELATION_TIMES` decorrelation times.
    """
    n_tau = record_time / decorrelation_time
    power = {
        "method": METHOD,
        "required_factor": REQUIRED_FACTOR,
        "record_time": record_time,
        "record_decorrelation_times": n_tau,
        "piece_decorrelation_times": piece_time / decorrelation_time,
        "min_decorrelation_times": MIN_DECORRELATION_TIMES,
        "detectable": dict(detect),
    }
    # (what, smallest detected factor as a size ≥ 1, the size required)
    checks = []
    if "time_scale" in detect:
        checks.append(("a time scale ×1.5", detect["time_scale"], REQUIRED_FACTOR))
    if "variance_up" in detect:
        checks.append(("a variance ×1.5", detect["variance_up"], REQUIRED_FACTOR))
    if "variance_down" in detect:
        checks.append(
            (
                "a variance ×0.5",
                None if detect["variance_down"] is None else 1.0 / detect["variance_down"],
                1.0 / (1.0 - (REQUIRED_FACTOR - 1.0)),
            )
        )
    weak = [(what, f, need) for what, f, need in checks if f is None or f > need * (1 + 1e-9)]
    reasons = []
    if weak:
        what = " or ".join(w for w, _, _ in weak)
        if any(f is None for _, f, _ in weak):
            need = f"not even a ×{LADDER[-1]:g} change was detected; it needs many times more data"
        else:
            times = max((math.log(f) / math.log(n)) ** 2 for _, f, n in weak)
            need = (
                f"it needs about {(times - 1) * record_time:.3g} more time units "
                f"(≈{times:.2g}× the record)"
            )
        reasons.append(
            f"inconclusive: the record ({record_time:.4g} time units, {n_tau:.3g} "
            f"decorrelation times) cannot detect {what}; {need}"
        )
    if n_tau < MIN_DECORRELATION_TIMES:
        more = (MIN_DECORRELATION_TIMES - n_tau) * decorrelation_time
        reasons.append(
            f"inconclusive: the record spans {n_tau:.3g} decorrelation times, fewer "
            f"than the {MIN_DECORRELATION_TIMES:g} needed; it needs about {more:.3g} "
            f"more time units"
        )
    power["sufficient"] = not reasons
    return power, reasons


def reference_consistency(
    ref_pieces: np.ndarray,
    run_of_piece: np.ndarray,
    gap_samples: int,
    settings: PieceSettings,
    tolerance: float,
) -> dict:
    """Do the reference runs sample the same thing, within their own noise?

    Each piece is cut into a first and a last part of equal length separated by up to
    ``gap_samples``; the mean Wasserstein-1 distance between parts of different runs is divided
    by that between parts of the same run, per variable. Above ``tolerance`` the runs differ
    beyond their own noise. Skipped (``verdict`` None) with fewer than two runs or parts
    shorter than 16 samples.
    """
    from ergodex.validation.pieces import _pair_distances, _PieceStats

    run_of_piece = np.asarray(run_of_piece)
    L = ref_pieces.shape[1]
    half = (L - min(gap_samples, L // 3)) // 2
    out: dict[str, Any] = {
        "ratio": None,
        "tolerance": tolerance,
        "verdict": None,
        "per_variable": {},
    }
    if np.unique(run_of_piece).size < 2 or half < 16:
        return out
    parts = np.concatenate([ref_pieces[:, :half], ref_pieces[:, L - half :]])
    runs = np.concatenate([run_of_piece, run_of_piece])
    st = _PieceStats(parts, settings.histogram_only())
    ii, jj = np.triu_indices(parts.shape[0], 1)
    same = runs[ii] == runs[jj]
    d = _pair_distances("histogram", st, st, (ii, jj))
    within, between = d[same].mean(axis=0), d[~same].mean(axis=0)
    per_var = between / np.maximum(within, np.finfo(float).tiny)
    ratio = float(np.max(per_var))
    out.update(
        ratio=ratio,
        verdict="pass" if ratio <= tolerance else "fail",
        per_variable={v: float(r) for v, r in zip(settings.variables, per_var)},
    )
    return out
