"""From distances to a verdict: blow-up accounting, rows, member agreement and the decision."""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence

import numpy as np

from ergodex.group_stats import GroupStatistics
from ergodex.validation.pieces import PieceSettings, _pair_distances, _PieceStats
from ergodex.validation.scorecard import ScoreRow, _fmt
from ergodex.validation.spec import CheckSpec

# A member whose every variable varies less than this fraction of the reference's standard
# deviation has settled on a fixed point.
_COLLAPSE_FRACTION = 1e-6


def _blowup_accounting(
    blowup_times: np.ndarray, max_fraction: float
) -> tuple[dict, bool, list[str]]:
    """The scorecard's blow-up record, whether the blow-ups fail the check, and the reason.

    ``blowup_times`` holds one time per member, NaN for the members that survived. The check
    fails when more than ``max_fraction`` of the members blew up (any blow-up at the default 0).
    """
    times = np.asarray(blowup_times, float)
    blown = ~np.isnan(times)
    members = times.size
    n_blown = int(np.count_nonzero(blown))
    blowups = {
        "count": n_blown,
        "members": [int(m) for m in np.flatnonzero(blown)],
        "times": [float(t) for t in times[blown]],
        "allowed_fraction": max_fraction,
    }
    reasons = []
    if n_blown:
        reasons.append(
            f"{n_blown} of {members} members blew up (left the data range ten-fold "
            f"or became non-finite), the first at t = {float(np.min(times[blown])):.4g} "
            f"after spin-up"
        )
    return blowups, n_blown > max_fraction * members, reasons


def _score_rows(statistic: str, labels, value, floor, tolerance: float) -> list[ScoreRow]:
    """One row per label: ``ratio = value / floor``, passing when ``ratio <= tolerance``.

    A NaN ratio (no finite distance) compares false and so fails.
    """
    rows = []
    for label, v, f in zip(labels, value, floor):
        ratio = _ratio(v, f)
        verdict = "pass" if ratio <= tolerance else "fail"
        rows.append(ScoreRow(statistic, label, float(v), float(f), ratio, tolerance, verdict))
    return rows


def _decide(
    rows: list[ScoreRow],
    *,
    blowup_fail: bool,
    blowup_reasons: list[str],
    any_alive: bool,
    agreement_verdict: str | None,
    agreement_reasons: list[str],
    weak_reasons: Sequence[str] = (),
    reference_reasons: Sequence[str] = (),
) -> tuple[str, list[str]]:
    """The family-wise verdict and its reasons, in the order the scorecard lists them.

    Pass only when no blow-up limit is exceeded, some member survived, no row fails and the
    members agree. Reasons: every member blowing up first, then blow-ups, then failing rows
    (largest ratio first, NaN ratios last), then member disagreement.

    ``"inconclusive"`` (not passed) when the reference runs disagree beyond their own noise
    (``reference_reasons``: no floor means anything, so neither a pass nor a row failure is
    trusted; blow-ups still fail), or when nothing failed but the record is too weak to detect
    a ±50 % change (``weak_reasons``): a failure a short record detects is still a failure.
    """
    reasons = list(blowup_reasons)
    if not any_alive:
        reasons.insert(0, "every member blew up: no statistics can be compared")
    failing = sorted(
        (r for r in rows if r.verdict == "fail"),
        key=lambda r: -r.ratio if not math.isnan(r.ratio) else 0.0,
    )
    for r in failing:
        reasons.append(
            f"{r.statistic} of {r.variable}: distance {_fmt(r.ratio)}× the noise floor "
            f"(tolerance {r.tolerance:g})"
        )
    reasons.extend(agreement_reasons)
    broken = blowup_fail or not any_alive
    if reference_reasons and not broken:
        return "inconclusive", list(reference_reasons) + reasons
    if broken or failing or agreement_verdict != "pass":
        return "fail", reasons
    if weak_reasons:
        return "inconclusive", list(weak_reasons) + reasons
    return "pass", reasons


def _ratio(value: float, floor: float) -> float:
    if math.isnan(value) or math.isnan(floor):
        return float("nan")
    if floor <= 0:
        return 0.0 if value <= 0 else float("inf")
    return float(value / floor)


def _member_agreement(
    model, alive, L, ref_stats, ref_pieces, spec, settings: PieceSettings
) -> dict:
    """Do the members tell the same story? Compares each member's first piece with the others'.

    A surrogate with several attractors (or one whose members collapse to different fixed
    points) gives members whose marginals differ by far more than the reference's noise floor,
    even when the pooled statistics happen to look right.
    """
    tol = spec.tolerance
    variables = settings.variables
    members = np.flatnonzero(alive)
    ref_sd = np.nanstd(ref_pieces.reshape(-1, ref_pieces.shape[2]), axis=0)
    first = [model[m, :L] for m in members]  # each member's first piece, as views
    collapsed = [
        int(m) for m in members if np.all(np.std(model[m], axis=0) < _COLLAPSE_FRACTION * ref_sd)
    ]
    reasons = []
    if collapsed and len(collapsed) == len(members):
        reasons.append("every surviving member settles on a fixed point")
    elif collapsed:
        reasons.append(
            f"{len(collapsed)} of {len(members)} members settle on a fixed point while "
            f"the others keep moving"
        )
    out = {
        "tolerance": tol,
        "collapsed_members": collapsed,
        "outlying_members": [],
        "per_variable": {},
    }
    if len(members) < 2:
        out.update(ratio=None, verdict="pass" if not collapsed else "fail")
        out["_reasons"] = reasons
        return out
    histogram = settings.histogram_only()
    mem = _PieceStats(first, histogram)
    ref_h = ref_stats if hasattr(ref_stats, "qf") else _PieceStats(ref_pieces, histogram)
    floor = np.mean(_pair_distances("histogram", ref_h, ref_h, np.triu_indices(ref_h.n, 1)), axis=0)
    ii, jj = np.triu_indices(len(members), 1)
    d = _pair_distances("histogram", mem, mem, (ii, jj))  # (pairs, n_vars)
    per_var = d.mean(axis=0) / np.maximum(floor, np.finfo(float).tiny)
    ratio = float(np.max(per_var))
    # members whose mean distance to the others is beyond tolerance on some variable
    each = np.zeros((len(members), d.shape[1]))
    np.add.at(each, ii, d)
    np.add.at(each, jj, d)
    each /= len(members) - 1
    outlying = [int(members[k]) for k in np.flatnonzero(np.any(each / floor > tol, axis=1))]
    verdict = "pass" if ratio <= tol and not collapsed else "fail"
    if ratio > tol:
        reasons.append(
            f"members disagree: their marginal distributions differ {_fmt(ratio)}× "
            f"more than reference pieces of the same length do (tolerance {tol:g}), "
            f"beyond sampling noise; the surrogate may have several attractors or "
            f"states it stays in for longer than a piece "
            f"(outlying members: {outlying[:8]})"
        )
    out.update(
        ratio=ratio,
        verdict=verdict,
        outlying_members=outlying,
        per_variable={v: float(r) for v, r in zip(variables, per_var)},
    )
    out["_reasons"] = reasons
    return out


def _power(
    reference,
    ref_pieces: np.ndarray,
    piece_info: dict,
    groups,
    floor_index,
    group_stats: GroupStatistics,
    floors: dict[str, np.ndarray],
    settings: PieceSettings,
    spec: CheckSpec,
    tau_d: float,
    gap: float,
    tolerance_for: Callable[[str], float] | None = None,
) -> tuple[dict, list[str], dict]:
    """The power statement, the reasons the record is too weak, and the reference's consistency.

    ``tolerance_for`` gives each statistic's threshold (default: the spec's fixed tolerances);
    a change is detected when the check with those thresholds would reject it.

    See :mod:`ergodex.power` for the method (rescaled copies of the reference scored through
    the check's own rows; Bretherton et al. 1999 for the effective sample size it matches).
    """
    from ergodex import power as pw

    dt = settings.dt
    L = ref_pieces.shape[1]
    detect = pw.detectable_changes(
        ref_pieces,
        groups,
        floor_index,
        group_stats,
        floors,
        settings,
        spec.tolerance_for if tolerance_for is None else tolerance_for,
    )
    record_time = float(sum(r.shape[0] for r in reference.runs) * dt)
    power, weak = pw.power_statement(
        detect, record_time=record_time, piece_time=L * dt, decorrelation_time=tau_d
    )
    per_run = piece_info.get("blocks_per_run", 1)
    run_of_piece = np.arange(ref_pieces.shape[0]) // per_run
    consistency = pw.reference_consistency(
        ref_pieces, run_of_piece, int(math.ceil(gap / dt)), settings, spec.tolerance
    )
    power["reference_consistency"] = dict(consistency)
    if consistency["verdict"] == "fail":
        consistency["_reasons"] = [
            f"inconclusive: the reference runs differ from each other "
            f"{_fmt(consistency['ratio'])}× more than parts of the same run do (tolerance "
            f"{consistency['tolerance']:g}); they do not sample one consistent behaviour (several "
            f"attractors, or runs too short to leave one), so no noise floor can be built from "
            f"them: supply runs that each visit every state, or check the runs separately"
        ]
    return power, weak, consistency
