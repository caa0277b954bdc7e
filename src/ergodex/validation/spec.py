"""Settings of a check (:class:`CheckSpec`) and the constants its defaults are derived from."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ergodex import stats
from ergodex.check_names import ALL_STATISTICS, DEFAULT_STATISTICS, DEFAULT_TOLERANCE
from ergodex.exceptions import SettingsError
from ergodex.nullfloor import DEFAULT_REPLICATES
from ergodex.regimes import RegimeSet

# DEFAULT_TOLERANCE, ALL_STATISTICS and DEFAULT_STATISTICS live in ergodex.check_names (imported
# above) so that the command line's --help need not import numpy.
_REGIME_STATISTICS = ("occupancy", "residence", "transitions")
#: The rows ``CheckSpec.persistence`` adds whenever regimes are given.
PERSISTENCE_STATISTICS = ("residence", "transitions")

# Decorrelation-time multiples for the defaults: gap between reference blocks and spin-up (5: the
# correlation left after 5 integrated times is below e^-5 ≈ 0.7 % for exponential decay) and the
# autocorrelation lag (3: the part of the ACF that carries information). Common practice, no source.
# The decorrelation time is the longer of the integrated and the envelope time (plan.py).
_GAP_TIMES = 5.0
_SPINUP_TIMES = 5.0
_LAG_TIMES = 3.0

#: What each row's distance is measured in.
DISTANCE_UNITS = {
    "histogram": "units of the variable (Wasserstein-1)",
    "quantiles": "units of the variable",
    "autocorrelation": "correlation (dimensionless)",
    "spectrum": "fraction of the mean total power (dimensionless)",
    "occupancy": "fraction of time",
    "residence": "time units",
    "transitions": "transition probability (dimensionless)",
}


def distance_units(statistics, time_unit: str | None = None) -> dict[str, str]:
    """The unit of each scored statistic's distance (:data:`DISTANCE_UNITS`), residence times in
    the data's time unit when it has one."""
    units = {s: DISTANCE_UNITS[s] for s in statistics}
    if "residence" in units and time_unit:
        units["residence"] = time_unit
    return units


@dataclass
class CheckSpec:
    """Every setting needed to repeat a check exactly.

    Parameters
    ----------
    members : int, default 16
        Ensemble members, each started from a reference state drawn with ``seed``.
    length : float, optional
        Time integrated per member after spin-up; default ``pool`` reference pieces. Members are
        cut into pieces of the reference pieces' length (at least one).
    spinup : float, optional
        Time integrated and discarded before output; default 5 decorrelation times (the
        longest integrated autocorrelation time, or envelope time of an oscillating variable:
        :mod:`ergodex.validation.plan`).
    seed : int, default 0
        Seeds the draw of starting states and the noise of stochastic surrogates.
    bins : int or "fd", default 35
        Histogram bins (figures and evidence); see :func:`ergodex.stats.histogram_edges`.
    max_lag : float, optional
        Largest autocorrelation lag in time units; default 3 integrated autocorrelation times
        or one dominant period, whichever is longer (at most a quarter piece).
    regimes : RegimeSet, optional
        Regimes for the occupancy/residence/transition rows (skipped without). ``kmeans``
        entries are fitted on the reference only (scikit-learn KMeans, seeded).
    persistence : bool, default True
        With regimes, also score how long the system stays in each regime and where it goes
        next (the ``residence`` and ``transitions`` rows), whatever ``statistics`` lists; False
        scores only the rows ``statistics`` names.
    tolerance : float, default :data:`DEFAULT_TOLERANCE`
        With ``false_reject_rate`` None, the largest allowed ratio of model distance to noise
        floor, for every row. Always the tolerance of member agreement and reference
        consistency.
    tolerances : dict, optional
        Per-statistic overrides, e.g. ``{"spectrum": 3.0}``; a statistic named here keeps its
        own tolerance and is left out of the family the threshold is derived for.
    false_reject_rate : float or None, default None
        None (``"fixed"`` in settings files and on the command line): every row is held to
        ``tolerance``. A rate (e.g. :data:`~ergodex.nullfloor.DEFAULT_FALSE_REJECT_RATE`,
        0.05): the threshold on the largest row ratio is the ``1 − false_reject_rate`` quantile
        of the largest ratio of a right surrogate, from a block bootstrap of the reference
        (:mod:`ergodex.nullfloor`), following the number of rows, their correlation and the
        record. Opt-in for now: with 40 replicates the estimate is noisy on few rows (3.8 on the
        convection loop's 12 rows) and too cautious on many (4–6.5 on 160 rows of the ring), and
        it costs 3–4 checks (``benchmarks/README.md``).
    null_replicates : int, default 40
        Bootstrap replicates behind that threshold.
    threshold_floor : float or None, default :data:`DEFAULT_TOLERANCE`
        The smallest threshold the bootstrap may give (None or ``"none"``: no floor); see
        ``benchmarks/README.md`` for the measurement behind the default.
    statistics : tuple of str
        Which rows to compute (see the module docstring).
    min_pieces : int, default 8
        Fewest reference pieces for a noise floor; runs are split into blocks when there are
        fewer runs.
    gap : float, optional
        Time left out between blocks of one run; default 5 decorrelation times (integrated
        autocorrelation times).
    nperseg : int, optional
        Welch segment length in samples; default ``min(256, piece length // 8)``, raised to
        cover 4 dominant periods and 2 decorrelation times up to ``piece length // 8``.
    max_blowup_fraction : float, default 0
        Fraction of members allowed to blow up before the check fails.
    pool : int, optional
        Pieces pooled into one compared sample (the floor compares two disjoint groups of
        ``pool`` reference pieces; the value compares groups of ``pool`` model pieces with groups
        of reference pieces). Default half the reference pieces: pooling averages out more of
        the sampling noise than single pieces do, so real differences stand out further.
    """

    members: int = 16
    length: float | None = None
    spinup: float | None = None
    seed: int = 0
    bins: int | str = stats.DEFAULT_BINS
    max_lag: float | None = None
    regimes: RegimeSet | None = None
    tolerance: float = DEFAULT_TOLERANCE
    tolerances: dict[str, float] = field(default_factory=dict)
    statistics: tuple[str, ...] = DEFAULT_STATISTICS
    min_pieces: int = 8
    gap: float | None = None
    nperseg: int | None = None
    max_blowup_fraction: float = 0.0
    pool: int | None = None
    false_reject_rate: float | None = None
    null_replicates: int = DEFAULT_REPLICATES
    threshold_floor: float | None = DEFAULT_TOLERANCE
    persistence: bool = True

    def check_settings(self) -> None:
        """Raise SettingsError naming the first setting that breaks its rule."""

        def positive_int(name, v, low=1):
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < low:
                raise SettingsError(f"{name} must be an integer ≥ {low}; got {v!r}")

        def positive_float(name, v, allow_none=True, allow_zero=False):
            if v is None and allow_none:
                return
            ok = (
                isinstance(v, (int, float, np.floating))
                and not isinstance(v, bool)
                and math.isfinite(v)
            )
            if not ok or v < 0 or (v == 0 and not allow_zero):
                raise SettingsError(
                    f"{name} must be a {'non-negative' if allow_zero else 'positive'} "
                    f"number; got {v!r}"
                )

        positive_int("members", self.members, 2)
        positive_float("length", self.length)
        positive_float("spinup", self.spinup, allow_zero=True)
        positive_int("seed", self.seed, 0)
        if not (
            self.bins == "fd"
            or (
                isinstance(self.bins, (int, np.integer))
                and not isinstance(self.bins, bool)
                and self.bins >= 1
            )
        ):
            raise SettingsError(f"bins must be a positive integer or 'fd'; got {self.bins!r}")
        positive_float("max_lag", self.max_lag)
        positive_float("tolerance", self.tolerance, allow_none=False)
        if not isinstance(self.tolerances, dict):
            raise SettingsError(
                f"tolerances must be a table statistic → number; got {self.tolerances!r}"
            )
        for k, v in self.tolerances.items():
            if k not in ALL_STATISTICS:
                raise SettingsError(
                    f"tolerances: unknown statistic {k!r}; known: {list(ALL_STATISTICS)}"
                )
            positive_float(f"tolerances.{k}", v, allow_none=False)
        if isinstance(self.statistics, str) or not self.statistics:
            raise SettingsError(f"statistics must be a non-empty list; got {self.statistics!r}")
        for s in self.statistics:
            if s not in ALL_STATISTICS:
                raise SettingsError(
                    f"statistics: unknown statistic {s!r}; known: {list(ALL_STATISTICS)}"
                )
        positive_int("min_pieces", self.min_pieces, 2)
        positive_float("gap", self.gap, allow_zero=True)
        if self.nperseg is not None:
            positive_int("nperseg", self.nperseg, 8)
        positive_float(
            "max_blowup_fraction", self.max_blowup_fraction, allow_none=False, allow_zero=True
        )
        if self.max_blowup_fraction >= 1:
            raise SettingsError(
                f"max_blowup_fraction must be below 1; got {self.max_blowup_fraction}"
            )
        if self.pool is not None:
            positive_int("pool", self.pool, 1)
        if self.false_reject_rate is not None:
            positive_float("false_reject_rate", self.false_reject_rate, allow_none=False)
            if self.false_reject_rate >= 0.5:
                raise SettingsError(
                    f"false_reject_rate must be between 0 and 0.5 (or 'fixed' for the fixed "
                    f"tolerance); got {self.false_reject_rate!r}"
                )
        positive_int("null_replicates", self.null_replicates, 10)
        positive_float("threshold_floor", self.threshold_floor)
        if not isinstance(self.persistence, (bool, np.bool_)):
            raise SettingsError(f"persistence must be true or false; got {self.persistence!r}")
        if self.regimes is not None and not isinstance(self.regimes, RegimeSet):
            raise SettingsError(f"regimes must be a RegimeSet; got {type(self.regimes).__name__}")

    def tolerance_for(self, statistic: str) -> float:
        return float(self.tolerances.get(statistic, self.tolerance))

    def to_dict(self) -> dict:
        return {
            "members": int(self.members),
            "length": self.length,
            "spinup": self.spinup,
            "seed": int(self.seed),
            "bins": self.bins,
            "max_lag": self.max_lag,
            "regimes": None if self.regimes is None else self.regimes.to_dict(),
            "tolerance": float(self.tolerance),
            "tolerances": dict(self.tolerances),
            "statistics": list(self.statistics),
            "min_pieces": int(self.min_pieces),
            "gap": self.gap,
            "nperseg": self.nperseg,
            "max_blowup_fraction": float(self.max_blowup_fraction),
            "pool": None if self.pool is None else int(self.pool),
            "false_reject_rate": _float_or_none(self.false_reject_rate),
            "null_replicates": int(self.null_replicates),
            "threshold_floor": _float_or_none(self.threshold_floor),
            "persistence": bool(self.persistence),
        }

    @classmethod
    def from_dict(cls, d: dict) -> CheckSpec:
        if not isinstance(d, dict):
            raise SettingsError(f"check settings must be a table; got {type(d).__name__}")
        known = set(cls.__dataclass_fields__)
        unknown = set(d) - known
        if unknown:
            raise SettingsError(
                f"unknown check setting(s) {sorted(unknown)}; known: {sorted(known)}"
            )
        kw = dict(d)
        if kw.get("regimes") is not None:
            kw["regimes"] = RegimeSet.from_dict(kw["regimes"], source="check settings: regimes")
        if "statistics" in kw and isinstance(kw["statistics"], list):
            kw["statistics"] = tuple(kw["statistics"])
        if "tolerances" in kw and kw["tolerances"] is None:
            kw["tolerances"] = {}
        for key, word in (("false_reject_rate", "fixed"), ("threshold_floor", "none")):
            if isinstance(kw.get(key), str):
                if kw[key].strip().lower() != word:
                    raise SettingsError(f"{key} must be a number or {word!r}; got {kw[key]!r}")
                kw[key] = None
        spec = cls(**kw)
        spec.check_settings()
        return spec


def _float_or_none(x) -> float | None:
    return None if x is None else float(x)
