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
use overlapping pieces.
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
    # gaps and spin-up follow the integrated time (see the module docstring)
    tau_d = tau_int = float(max(np.max(tau), dt))
    period = scales.dominant_period
    gap = _GAP_TIMES * tau_d if spec.gap is None else float(spec.gap)
    ref_pieces, piece_info = _reference_pieces(reference, spec.min_pieces, gap)
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
    )
    return plan, ref_pieces
