"""The plan of a check: every setting derived from a :class:`CheckSpec` and the reference.

:func:`derive_plan` measures the reference's time scales and turns the spec's unset settings
into numbers (gap between blocks, lag window, Welch segment, spin-up, pooling, member length);
the rest of the check reads them from the frozen :class:`CheckPlan` it returns.

The **decorrelation time** the gap and spin-up follow is the longest integrated
autocorrelation time (Sokal 1997), on which the default tolerance was calibrated. The envelope
times and dominant periods of the variables that oscillate
(:mod:`ergodex.validation.timescales`; a damped cosine ``exp(−t/τ) cos(ωt)`` has the integral
``τ / (1 + ω²τ²)``, far shorter than ``τ``) set the windows instead: the lag window covers 3
integrated times and :data:`_PERIODS_IN_LAG` dominant period, the Welch segment
:data:`_PERIODS_IN_SEGMENT` of them (as far as the pieces allow), so the band of an oscillation
is compared. Gaps and spin-up of envelope length were tried and measured: on the convection
loop (Lorenz-63, whose ``dT_up`` keeps its phase for ~4.4 time units at a period of 0.76) they
left a 120-time-unit reference too few pieces to detect a time-scale change ×1.5, so a correct
surrogate came out inconclusive; they stay on the integrated time until the power statement can
use overlapping pieces. (:func:`_gap` keeps the fallback for an explicit longer time.)
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ergodex import stats
from ergodex.exceptions import DataError, SettingsError
from ergodex.validation.pieces import PieceSettings, _reference_pieces
from ergodex.validation.spec import (
    _GAP_TIMES,
    _LAG_TIMES,
    _REGIME_STATISTICS,
    _SPINUP_TIMES,
    PERSISTENCE_STATISTICS,
    CheckSpec,
)
from ergodex.validation.timescales import TimeScales, oscillation_time_scales

# Dominant periods the default lag window covers (beside 3 integrated times): one. Longer windows
# add lags where both autocorrelations are mostly noise and dilute the row: measured on the
# station ring's 6-mode white-noise closure (tests/test_fitting_ring.py), the autocorrelation
# ratio is 3.4 with one period and 2.3 with two (1.3 time units vs 3.3).
_PERIODS_IN_LAG = 1.0
# Dominant periods and decorrelation times the Welch segment covers (enough to see a spectral
# peak and its width; common practice, no source).
_PERIODS_IN_SEGMENT = 4.0
_ENVELOPES_IN_SEGMENT = 2.0


@dataclass(frozen=True)
class CheckPlan:
    """The derived settings of one check (times in the reference's time unit).

    ``pieces`` holds what the per-piece statistics need; ``integrated_times`` the integrated
    autocorrelation time per variable, ``time_scales`` the envelope times and dominant periods,
    ``decorrelation_time`` the longest integrated time (at least one sampling interval), from
    which the unset gap and spin-up follow; the lag window covers 3 integrated times and one
    dominant period, the Welch segment 4 dominant periods and 2 decorrelation times.
    ``gap_note`` says why the gap is shorter than the default rule, if it is.
    """

    pieces: PieceSettings
    integrated_times: tuple[float, ...]
    time_scales: TimeScales
    decorrelation_time: float
    gap: float
    spinup: float
    piece_length: int
    n_reference_pieces: int
    pool: int
    n_out: int
    piece_info: dict[str, Any] = field(default_factory=dict, hash=False)
    gap_note: str | None = None

    @property
    def dt(self) -> float:
        return self.pieces.dt

    @property
    def variables(self) -> tuple[str, ...]:
        return self.pieces.variables

    @property
    def statistics(self) -> tuple[str, ...]:
        return self.pieces.statistics

    @property
    def pieces_per_member(self) -> int:
        return self.n_out // self.piece_length


def derive_plan(spec: CheckSpec, reference, stacked: np.ndarray) -> tuple[CheckPlan, np.ndarray]:
    """The plan of a check of ``reference`` (a Series; ``stacked`` its runs end to end) and the
    reference pieces it cuts, ``(n_pieces, piece_length, n_vars)``.

    Regimes that need fitting are fitted on the reference here; regime statistics are dropped
    without regimes. Raises DataError for pieces too short for the lag window and SettingsError
    for settings the reference cannot meet (segment, pool, member length).
    """
    variables = tuple(reference.names)
    dt = float(reference.dt)
    regimes = spec.regimes
    if regimes is not None and regimes.needs_fit:
        regimes = regimes.fit(stacked, variables)
    wanted = tuple(spec.statistics)
    if regimes is not None and spec.persistence:
        wanted += tuple(s for s in PERSISTENCE_STATISTICS if s not in wanted)
    statistics = tuple(s for s in wanted if regimes is not None or s not in _REGIME_STATISTICS)

    tau = np.atleast_1d(stats.integrated_autocorrelation_time(list(reference.runs), dt))
    scales = oscillation_time_scales(list(reference.runs), dt)
    tau_d = float(max(np.max(tau), dt))  # gaps and spin-up: see the module docstring
    period = scales.dominant_period
    tau_int = float(max(np.max(tau), dt))
    gap, gap_note = _gap(spec, tau_d, tau_int)
    try:
        ref_pieces, piece_info = _reference_pieces(reference, spec.min_pieces, gap)
    except DataError:
        if gap_note is None:
            raise
        # the envelope gap does not fit the record: the integrated-time gap, said so
        gap = _GAP_TIMES * float(max(np.max(tau), dt))
        ref_pieces, piece_info = _reference_pieces(reference, spec.min_pieces, gap)
    else:
        gap_note = None
    L = ref_pieces.shape[1]
    if spec.max_lag is None:
        max_lag_time = max(_LAG_TIMES * tau_int, _PERIODS_IN_LAG * (period or 0.0))
    else:
        max_lag_time = float(spec.max_lag)
    max_lag = int(np.clip(round(max_lag_time / dt), 1, max(1, L // 4)))
    if spec.nperseg is not None:
        nperseg = int(spec.nperseg)
    else:
        segment = max(_PERIODS_IN_SEGMENT * (period or 0.0), _ENVELOPES_IN_SEGMENT * tau_d)
        nperseg = int(max(8, min(256, L // 8), min(round(segment / dt), L // 8)))
    if nperseg > L:
        raise SettingsError(f"nperseg {nperseg} exceeds the reference piece length {L} samples")
    if L < 4 * max_lag or L < 16:
        raise DataError(
            f"{reference.source or 'reference data'}: reference pieces of {L} samples "
            "are too short "
            f"(need at least {max(16, 4 * max_lag)} for lags up to {max_lag} samples); "
            "supply longer runs"
        )
    spinup = _SPINUP_TIMES * tau_d if spec.spinup is None else float(spec.spinup)
    n_ref = ref_pieces.shape[0]
    pool = spec.pool if spec.pool is not None else max(1, n_ref // 2)
    if 2 * pool > n_ref:
        raise SettingsError(
            f"pool {pool} needs at least {2 * pool} reference pieces; the reference "
            f"gives {n_ref} (set min_pieces ≥ {2 * pool})"
        )
    # by default every member covers one pooled group, so there are as many model groups as
    # members and the model side of each row is averaged over all of them
    member_time = L * dt * pool if spec.length is None else float(spec.length)
    n_out = round(member_time / dt)
    if n_out < L:
        raise SettingsError(
            f"length {member_time:g} is shorter than one reference piece "
            f"({L * dt:g} time units); members must cover at least one piece"
        )
    plan = CheckPlan(
        pieces=PieceSettings(
            statistics=statistics,
            variables=variables,
            dt=dt,
            max_lag_samples=max_lag,
            nperseg=nperseg,
            regimes=regimes,
        ),
        integrated_times=tuple(float(t) for t in tau),
        time_scales=scales,
        decorrelation_time=tau_d,
        gap=gap,
        spinup=spinup,
        piece_length=L,
        n_reference_pieces=n_ref,
        pool=int(pool),
        n_out=int(n_out),
        piece_info=piece_info,
        gap_note=gap_note,
    )
    return plan, ref_pieces


def _gap(spec: CheckSpec, tau_d: float, tau_int: float) -> tuple[float, str | None]:
    """The gap between blocks of one run, and the note to give if it must fall back.

    The default is :data:`_GAP_TIMES` decorrelation times; when that is longer than the
    integrated-time rule (an oscillating record) and the record cannot hold it, the check falls
    back to the integrated-time gap and says so (``settings["gap_note"]``).
    """
    if spec.gap is not None:
        return float(spec.gap), None
    gap = _GAP_TIMES * tau_d
    if tau_d <= tau_int:
        return gap, None
    return gap, (
        f"the record is too short for gaps of {gap:.3g} time units ({_GAP_TIMES:g} envelope "
        f"times) between its blocks; gaps of {_GAP_TIMES * tau_int:.3g} ({_GAP_TIMES:g} "
        f"integrated autocorrelation times) were used, so neighbouring pieces still share phase"
    )
