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
   tolerance, the members agree with one another, and no member blew up. The default tolerance
   was calibrated on known systems (``benchmarks/calibration.py``, figures in
   ``benchmarks/README.md``).
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
"""

from __future__ import annotations

import itertools
import json
import logging
import math
import os
import zipfile
import zlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from ergodex import CAUTION, stats
from ergodex.check_names import ALL_STATISTICS, DEFAULT_STATISTICS, DEFAULT_TOLERANCE
from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.files import atomic_write_path, atomic_write_text
from ergodex.jsonable import jsonable
from ergodex.regimes import (
    NONE_NAME,
    RegimeSet,
    mean_residence_times,
    occupancy,
    transition_matrix,
)
from ergodex.timestamps import utc_now

__all__ = [
    "ALL_STATISTICS",
    "DEFAULT_STATISTICS",
    "DEFAULT_TOLERANCE",
    "SCORECARD_FORMAT",
    "CheckResult",
    "CheckSpec",
    "Evidence",
    "ScoreRow",
    "Scorecard",
    "align_columns",
    "check",
    "data_variables",
    "validate",
]

log = logging.getLogger(__name__)

SCORECARD_FORMAT = "ergodex-scorecard/1"
EVIDENCE_FORMAT = "ergodex-evidence/1"

# DEFAULT_TOLERANCE, ALL_STATISTICS and DEFAULT_STATISTICS live in ergodex.check_names (imported
# above) so that the command line's --help need not import numpy.
_REGIME_STATISTICS = ("occupancy", "residence", "transitions")

# Decorrelation-time multiples for the defaults: gap between reference blocks and spin-up (5: the
# correlation left after 5 integrated times is below e^-5 ≈ 0.7 % for exponential decay) and the
# autocorrelation lag (3: the part of the ACF that carries information). Common practice, no source.
_GAP_TIMES = 5.0
_SPINUP_TIMES = 5.0
_LAG_TIMES = 3.0
# Quantile functions are compared on at most this many probability levels (exact when a piece
# is shorter); the approximation error is far below the sampling noise of a piece.
_MAX_QUANTILE_POINTS = 2000
# A member whose every variable varies less than this fraction of the reference's standard
# deviation has settled on a fixed point.
_COLLAPSE_FRACTION = 1e-6
_SAMPLE_SIZE = 2000


def _finite_or_none(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _none_to_nan(x):
    return float("nan") if x is None else float(x)


# ---------------------------------------------------------------------------------------------
# Settings
# ---------------------------------------------------------------------------------------------


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
        Time integrated and discarded before output; default 5 decorrelation times.
    seed : int, default 0
        Seeds the draw of starting states and the noise of stochastic surrogates.
    bins : int or "fd", default 35
        Histogram bins (figures and evidence); see :func:`ergodex.stats.histogram_edges`.
    max_lag : float, optional
        Largest autocorrelation lag in time units; default 3 decorrelation times.
    regimes : RegimeSet, optional
        Regimes for the occupancy/residence/transition rows (skipped without).
    tolerance : float, default :data:`DEFAULT_TOLERANCE`
        Largest allowed ratio of model distance to noise floor, for every row.
    tolerances : dict, optional
        Per-statistic overrides, e.g. ``{"spectrum": 3.0}``.
    statistics : tuple of str
        Which rows to compute (see the module docstring).
    min_pieces : int, default 8
        Fewest reference pieces for a noise floor; runs are split into blocks when there are
        fewer runs.
    gap : float, optional
        Time left out between blocks of one run; default 5 decorrelation times.
    nperseg : int, optional
        Welch segment length in samples; default ``min(256, piece length // 8)``.
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
        spec = cls(**kw)
        spec.check_settings()
        return spec


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


@dataclass
class ScoreRow:
    """One row of the scorecard: a statistic of one variable (or regime) against its noise floor.

    ``value`` is the mean distance between model pieces and reference pieces, ``noise_floor`` the
    mean distance between reference pieces, ``ratio = value / noise_floor``; the row passes when
    ``ratio <= tolerance``. Non-finite numbers are stored as None in JSON.
    """

    statistic: str
    variable: str
    value: float
    noise_floor: float
    ratio: float
    tolerance: float
    verdict: str

    def to_dict(self) -> dict:
        return {
            "statistic": self.statistic,
            "variable": self.variable,
            "value": _finite_or_none(self.value),
            "noise_floor": _finite_or_none(self.noise_floor),
            "ratio": _finite_or_none(self.ratio),
            "tolerance": float(self.tolerance),
            "verdict": self.verdict,
        }

    @classmethod
    def from_dict(cls, d: dict) -> ScoreRow:
        ratio = d["ratio"]
        if ratio is None and d["verdict"] == "fail":
            ratio = float("inf")
        return cls(
            d["statistic"],
            d["variable"],
            _none_to_nan(d["value"]),
            _none_to_nan(d["noise_floor"]),
            _none_to_nan(ratio),
            float(d["tolerance"]),
            d["verdict"],
        )


@dataclass
class Scorecard:
    """The verdict of a check, with everything needed to repeat it.

    JSON layout (``format = "ergodex-scorecard/1"``); non-finite numbers are written as null:

    - ``verdict``: ``"pass"``, ``"fail"`` or ``"inconclusive"`` (the record cannot detect a
      ±50 % change of time scale or variance, is too short, or its runs disagree; not passed);
      ``reasons``: list of one-line explanations (why inconclusive; rows that drove a failure,
      largest ratio first; blow-ups; member disagreement).
    - ``power``: what the record can detect (see :mod:`ergodex.power`): ``record_time``,
      ``record_decorrelation_times``, ``piece_decorrelation_times``, ``detectable``
      {time_scale, variance_up, variance_down: smallest rejected factor or null},
      ``required_factor``, ``sufficient``, ``reference_consistency``, ``method``.
    - ``rows``: list of {statistic, variable, value, noise_floor, ratio, tolerance, verdict}.
    - ``blowups``: {count, members, times (time after spin-up; negative during spin-up),
      allowed_fraction}.
    - ``member_agreement``: {ratio, tolerance, verdict, collapsed_members, outlying_members,
      per_variable}.
    - ``spec``: the :class:`CheckSpec` as given; ``settings``: what was derived from it and the
      data (piece length, numbers of pieces, gap, spin-up, lag, decorrelation times, Welch
      segment, integration method and step, seeds).
    - ``model_fingerprint``, ``data_fingerprint``, ``created`` (UTC, ISO 8601),
      ``ergodex_version``.
    """

    verdict: str
    rows: list[ScoreRow]
    reasons: list[str]
    blowups: dict
    member_agreement: dict
    spec: CheckSpec
    model_fingerprint: str
    data_fingerprint: str
    created: str
    ergodex_version: str
    settings: dict = field(default_factory=dict)
    power: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return self.verdict == "pass"

    @property
    def largest_ratio(self) -> float:
        ratios = [r.ratio for r in self.rows if not math.isnan(r.ratio)]
        return max(ratios) if ratios else float("nan")

    def to_dict(self) -> dict:
        return {
            "format": SCORECARD_FORMAT,
            "verdict": self.verdict,
            "rows": [r.to_dict() for r in self.rows],
            "reasons": list(self.reasons),
            "blowups": jsonable(self.blowups),
            "member_agreement": jsonable(self.member_agreement),
            "spec": self.spec.to_dict(),
            "settings": jsonable(self.settings),
            "model_fingerprint": self.model_fingerprint,
            "data_fingerprint": self.data_fingerprint,
            "created": self.created,
            "ergodex_version": self.ergodex_version,
            "power": jsonable(self.power),
        }

    @classmethod
    def from_dict(cls, d: dict, *, source: str = "scorecard") -> Scorecard:
        if not isinstance(d, dict) or d.get("format") != SCORECARD_FORMAT:
            got = d.get("format") if isinstance(d, dict) else type(d).__name__
            raise ModelFileError(
                f"{source}: not a scorecard of format {SCORECARD_FORMAT!r} (format: {got!r})"
            )
        try:
            return cls(
                verdict=d["verdict"],
                rows=[ScoreRow.from_dict(r) for r in d["rows"]],
                reasons=list(d["reasons"]),
                blowups=dict(d["blowups"]),
                member_agreement=dict(d["member_agreement"]),
                spec=CheckSpec.from_dict(d["spec"]),
                model_fingerprint=d["model_fingerprint"],
                data_fingerprint=d["data_fingerprint"],
                created=d["created"],
                ergodex_version=d["ergodex_version"],
                settings=dict(d.get("settings", {})),
                power=dict(d.get("power") or {}),
            )
        except KeyError as exc:
            raise ModelFileError(f"{source}: missing key {exc.args[0]!r}") from None
        except (TypeError, ValueError, SettingsError) as exc:
            raise ModelFileError(f"{source}: malformed scorecard ({exc})") from None

    def to_json(self, path: str | os.PathLike | None = None) -> str:
        """The JSON text; also written (atomically) to ``path`` when given."""
        text = json.dumps(self.to_dict(), indent=2, allow_nan=False) + "\n"
        if path is not None:
            atomic_write_text(path, text, make_folder=False)
        return text

    @classmethod
    def from_json(cls, text_or_path: str | os.PathLike) -> Scorecard:
        source = "scorecard"
        text = str(text_or_path)
        if not text.lstrip().startswith("{"):
            from ergodex.limits import read_text_file

            p = Path(text_or_path)
            text = read_text_file(p, "a scorecard (JSON)", error=ModelFileError)
            source = str(p)
        from ergodex.limits import load_json_text

        d = load_json_text(text, source, error=ModelFileError)
        return cls.from_dict(d, source=source)

    def table(self) -> str:
        """A readable terminal table of the rows, blow-ups, member agreement and verdict."""
        head = f"verdict: {self.verdict.upper()}"
        if self.rows:
            worst = max(self.rows, key=lambda r: -1 if math.isnan(r.ratio) else r.ratio)
            head += (
                f"   largest ratio {_fmt(worst.ratio)} ({worst.statistic} {worst.variable}); "
                f"a ratio is the model's distance from the data over the data's own noise floor"
            )
        lines = [head, ""]
        w_stat = max([len("statistic")] + [len(r.statistic) for r in self.rows])
        w_var = max([len("variable")] + [len(r.variable) for r in self.rows])
        lines.append(
            f"{'statistic':<{w_stat}}  {'variable':<{w_var}}  {'value':>10}  "
            f"{'noise floor':>11}  {'ratio':>7}  {'tol':>5}  verdict"
        )
        for r in self.rows:
            lines.append(
                f"{r.statistic:<{w_stat}}  {r.variable:<{w_var}}  {_fmt(r.value):>10}  "
                f"{_fmt(r.noise_floor):>11}  {_fmt(r.ratio):>7}  {r.tolerance:>5.2f}  "
                f"{r.verdict}"
            )
        b = self.blowups
        lines.append("")
        lines.extend(power_lines(self.power))
        lines.append(f"blow-ups: {b.get('count', 0)} of {self.spec.members} members")
        m = self.member_agreement
        if m:
            lines.append(
                f"member agreement: ratio {_fmt(_none_to_nan(m.get('ratio')))} "
                f"(tolerance {m.get('tolerance', float('nan')):.2f}) {m.get('verdict', '')}"
            )
        if self.reasons:
            lines.append("")
            lines.extend(f"- {reason}" for reason in self.reasons)
        lines.append("")
        lines.append(f"Caution: {CAUTION}")
        return "\n".join(lines)

    def __repr__(self) -> str:
        from ergodex.display import scorecard_repr

        return scorecard_repr(self)

    def _repr_html_(self) -> str:
        """A small table for notebooks: verdict, rows (failing first), blow-ups, caution."""
        from ergodex.display import scorecard_html

        return scorecard_html(self)


def power_lines(power: dict) -> list[str]:
    """What the record can detect, in two lines (none for a scorecard without the block)."""
    if not power:
        return []
    det = power.get("detectable", {})

    from ergodex.power import LADDER

    def factor(key: str) -> str:
        if key not in det:
            return "not scored"
        f = det[key]
        if f is None:
            top = 1.0 / LADDER[-1] if key == "variance_down" else LADDER[-1]
            return f"none up to ×{top:.3g}"
        return f"×{f:.3g}"

    return [
        f"record: {_fmt(_none_to_nan(power.get('record_time')))} time units = "
        f"{_fmt(_none_to_nan(power.get('record_decorrelation_times')))} decorrelation times "
        f"(pieces of {_fmt(_none_to_nan(power.get('piece_decorrelation_times')))})",
        f"smallest change it detects: time scale {factor('time_scale')}, variance "
        f"{factor('variance_up')} / {factor('variance_down')}",
    ]


def _fmt(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    if math.isinf(x):
        return "inf"
    return f"{x:.3g}" if abs(x) < 1e4 else f"{x:.3e}"


#: Evidence arrays, in order: name → (dtype kind, description). The report reads these names.
EVIDENCE_FIELDS = {
    "variables": "names of the data-space variables (n_vars,)",
    "hist_edges": "bin edges (n_vars, n_bins + 1)",
    "hist_reference": "reference masses incl. under/overflow (n_vars, n_bins + 2)",
    "hist_reference_pieces": "per reference piece (n_pieces, n_vars, n_bins + 2)",
    "hist_model": "model masses, all surviving members (n_vars, n_bins + 2)",
    "acf_lags": "lags in time units (n_lags,)",
    "acf_reference": "(n_lags, n_vars)",
    "acf_reference_pieces": "(n_pieces, n_lags, n_vars)",
    "acf_model": "(n_lags, n_vars)",
    "psd_freq": "frequencies, cycles per time unit (n_freq,)",
    "psd_reference": "(n_freq, n_vars)",
    "psd_reference_pieces": "(n_pieces, n_freq, n_vars)",
    "psd_model": "(n_freq, n_vars)",
    "regime_names": "regime names, 'none' last (n_regimes + 1,); empty without regimes",
    "occupancy_reference": "(n_regimes + 1,)",
    "occupancy_reference_pieces": "(n_pieces, n_regimes + 1)",
    "occupancy_model": "(n_regimes + 1,)",
    "residence_reference": "mean residence time per regime (n_regimes + 1,)",
    "residence_model": "(n_regimes + 1,)",
    "transitions_reference": "jump-chain transition matrix (n_regimes + 1, n_regimes + 1)",
    "transitions_model": "(n_regimes + 1, n_regimes + 1)",
    "sample_reference": "random reference states (N, n_vars)",
    "sample_model": "random model states (N, n_vars)",
    "blowup_times": "blow-up time per member, NaN where none (n_members,)",
}


@dataclass
class Evidence:
    """The arrays behind a scorecard, for figures and reports (see :data:`EVIDENCE_FIELDS`).

    Stored as NPZ with fixed key names and no pickled objects (names are fixed-width unicode
    arrays), so ``numpy.load(path, allow_pickle=False)`` reads it anywhere.
    """

    variables: np.ndarray
    hist_edges: np.ndarray
    hist_reference: np.ndarray
    hist_reference_pieces: np.ndarray
    hist_model: np.ndarray
    acf_lags: np.ndarray
    acf_reference: np.ndarray
    acf_reference_pieces: np.ndarray
    acf_model: np.ndarray
    psd_freq: np.ndarray
    psd_reference: np.ndarray
    psd_reference_pieces: np.ndarray
    psd_model: np.ndarray
    regime_names: np.ndarray
    occupancy_reference: np.ndarray
    occupancy_reference_pieces: np.ndarray
    occupancy_model: np.ndarray
    residence_reference: np.ndarray
    residence_model: np.ndarray
    transitions_reference: np.ndarray
    transitions_model: np.ndarray
    sample_reference: np.ndarray
    sample_model: np.ndarray
    blowup_times: np.ndarray

    def to_npz(
        self, path: str | os.PathLike, *, extra: dict[str, np.ndarray] | None = None
    ) -> None:
        """Write every array to ``path`` (compressed NPZ, atomically).

        ``extra`` arrays (e.g. a field check's grid maps) are stored beside the fixed ones under
        their own keys; :meth:`from_npz` ignores them, so files with and without them read alike.
        """
        path = Path(path)
        clash = sorted(set(extra or {}) & {*EVIDENCE_FIELDS, "format"})
        if clash:
            raise SettingsError(f"evidence: extra array {clash[0]!r} would replace a fixed field")
        # Any values: numpy's stub types savez's keyword arrays as its own bool option
        arrays: dict[str, Any] = {name: np.asarray(getattr(self, name)) for name in EVIDENCE_FIELDS}
        arrays["format"] = np.array(EVIDENCE_FORMAT)
        arrays.update({key: np.asarray(value) for key, value in (extra or {}).items()})

        def write(tmp: Path) -> None:
            with open(tmp, "wb") as handle:  # a file object: savez must not add ".npz"
                np.savez_compressed(handle, **arrays)

        atomic_write_path(path, write, make_folder=False)

    @classmethod
    def from_npz(cls, source: str | os.PathLike | BinaryIO, *, name: str | None = None) -> Evidence:
        """Read evidence written by :meth:`to_npz`, never unpickling anything.

        Parameters
        ----------
        source : path or binary file object
            The NPZ file, or a readable, seekable binary file object holding its bytes (e.g.
            ``io.BytesIO`` of bytes a registry has verified), which is left open.
        name : str, optional
            What error messages call the file (default: the path, or the file object's name).

        Raises
        ------
        ModelFileError
            When the content is not an evidence file of this format or cannot be read.
        """
        if isinstance(source, (str, os.PathLike)):
            source = Path(source)
            label = name or str(source)
        else:
            label = name or str(getattr(source, "name", "") or "evidence")
        try:
            loaded = np.load(source, allow_pickle=False)
            if not isinstance(loaded, np.lib.npyio.NpzFile):  # a bare .npy array
                raise ModelFileError(f"{label}: not an evidence file of format {EVIDENCE_FORMAT!r}")
            with loaded as z:
                if "format" not in z.files or str(z["format"]) != EVIDENCE_FORMAT:
                    raise ModelFileError(
                        f"{label}: not an evidence file of format {EVIDENCE_FORMAT!r}"
                    )
                missing = [k for k in EVIDENCE_FIELDS if k not in z.files]
                if missing:
                    raise ModelFileError(f"{label}: evidence file lacks {missing}")
                return cls(**{k: z[k] for k in EVIDENCE_FIELDS})
        except ModelFileError:
            raise
        # empty, truncated or corrupt content fails inside numpy, zipfile or zlib
        except (OSError, ValueError, EOFError, zipfile.BadZipFile, zlib.error) as exc:
            raise ModelFileError(f"{label}: cannot read evidence ({exc})") from None


@dataclass
class CheckResult:
    """A scorecard and the evidence behind it (None when ``check(..., evidence=False)``)."""

    scorecard: Scorecard
    evidence: Evidence | None

    @property
    def passed(self) -> bool:
        return self.scorecard.passed

    def __repr__(self) -> str:
        return f"CheckResult({self.scorecard!r})"

    def _repr_html_(self) -> str:
        return self.scorecard._repr_html_()

    # Figures (see ergodex.plotting): ax=None returns a new Figure, else draws on ax, returns it.
    def plot_histograms(self, *, variables=None, ax=None):
        """Marginal densities, reference and surrogate.

        See :func:`ergodex.plotting.plot_histograms`.
        """
        from ergodex.plotting import plot_histograms

        return plot_histograms(self, variables=variables, ax=ax)

    def plot_autocorrelation(self, *, variables=None, ax=None):
        """Autocorrelation against lag (:func:`ergodex.plotting.plot_autocorrelation`)."""
        from ergodex.plotting import plot_autocorrelation

        return plot_autocorrelation(self, variables=variables, ax=ax)

    def plot_spectra(self, *, variables=None, ax=None):
        """Power spectra on log axes (:func:`ergodex.plotting.plot_spectra`)."""
        from ergodex.plotting import plot_spectra

        return plot_spectra(self, variables=variables, ax=ax)

    def plot_regimes(self, *, ax=None):
        """Regime occupancy and residence times (:func:`ergodex.plotting.plot_regimes`)."""
        from ergodex.plotting import plot_regimes

        return plot_regimes(self, ax=ax)

    def plot_transitions(self, *, ax=None):
        """Regime transition matrices (:func:`ergodex.plotting.plot_transitions`)."""
        from ergodex.plotting import plot_transitions

        return plot_transitions(self, ax=ax)

    def plot_projection(self, *, ax=None):
        """Reference and surrogate states in 2-D (:func:`ergodex.plotting.plot_projection`)."""
        from ergodex.plotting import plot_projection

        return plot_projection(self, ax=ax)


# ---------------------------------------------------------------------------------------------
# Pieces and their statistics
# ---------------------------------------------------------------------------------------------


def _reference_pieces(reference, min_pieces: int, gap_time: float) -> tuple[np.ndarray, dict]:
    """Equal-length, nearly independent pieces of the reference: (n_pieces, L, n_vars)."""
    from ergodex.series import cut_blocks

    info: dict[str, Any] = {"piece_source": "runs"}
    series = reference
    if reference.n_runs < min_pieces:
        blocks = -(-min_pieces // reference.n_runs)  # ceiling division
        try:
            series = cut_blocks(reference, blocks, gap_time)
        except DataError as exc:
            raise DataError(
                f"{reference.source or 'reference data'}: too short for a noise floor: "
                f"{reference.n_runs} run(s) cannot give {min_pieces} pieces separated by "
                f"{gap_time:.3g} time units ({exc}); supply more or longer runs"
            ) from None
        info = {"piece_source": "blocks", "blocks_per_run": blocks}
    length = min(series.lengths)
    pieces = np.stack([np.asarray(r[:length], float) for r in series.runs])
    info["piece_length_samples"] = int(length)
    info["n_reference_pieces"] = int(pieces.shape[0])
    return pieces, info


class _PieceStats:
    """The per-piece statistics every row needs, computed once per set of pieces."""

    def __init__(self, pieces: np.ndarray, ctx: dict):
        self.n = pieces.shape[0]
        stats_wanted = ctx["statistics"]
        L = pieces.shape[1]
        if "histogram" in stats_wanted:
            k = min(L, _MAX_QUANTILE_POINTS)
            srt = np.sort(pieces, axis=1)
            idx = np.minimum(np.ceil((np.arange(k) + 0.5) / k * L).astype(int) - 1, L - 1)
            self.qf = srt[:, np.maximum(idx, 0), :]  # (P, K, n)
        if "quantiles" in stats_wanted:
            self.quant = np.quantile(pieces, stats.DEFAULT_QUANTILES, axis=1).transpose(1, 0, 2)
        if "autocorrelation" in stats_wanted:
            self.acf = _acf_pieces(pieces, ctx["max_lag_samples"])
        if "spectrum" in stats_wanted:
            _, psd = stats.welch_psd(
                np.ascontiguousarray(pieces.transpose(0, 2, 1)), ctx["dt"], ctx["nperseg"]
            )
            self.psd = psd.transpose(0, 2, 1)  # (P, n_freq, n)
        regimes = ctx.get("regimes")
        if regimes is not None:
            nr = regimes.n_regimes
            labels = [regimes.classify(p, ctx["variables"]) for p in pieces]
            self.occ = np.stack([occupancy(lab, nr) for lab in labels])
            if "residence" in stats_wanted:
                self.res = np.stack([mean_residence_times(lab, ctx["dt"], nr) for lab in labels])
            if "transitions" in stats_wanted:
                self.trans = np.stack([transition_matrix(lab, nr) for lab in labels])


def _acf_pieces(pieces: np.ndarray, max_lag: int) -> np.ndarray:
    """Autocorrelation of each piece separately (P, max_lag + 1, n), as stats.autocorrelation."""
    d = np.ascontiguousarray((pieces - pieces.mean(axis=1, keepdims=True)).transpose(0, 2, 1))
    L = d.shape[2]
    nfft = stats.fast_fft_length(L + max_lag)  # enough padding for lags ≤ max_lag
    f = np.fft.rfft(d, n=nfft, axis=2)
    acov = np.fft.irfft(f.real**2 + f.imag**2, n=nfft, axis=2)[:, :, : max_lag + 1]
    acov = acov.transpose(0, 2, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return acov / acov[:, :1]


def _pair_distances(
    statistic: str,
    a: _PieceStats,
    b: _PieceStats,
    index: tuple[np.ndarray, np.ndarray] | None = None,
) -> np.ndarray:
    """Distances between samples of ``a`` and samples of ``b``: (n_pairs, n_rows).

    ``index`` gives the pairs ``(a[index[0][k]], b[index[1][k]])``; by default every pair.
    """

    def pairs(x, y, fn):
        out = []
        if index is None:
            # every pair: broadcast a few rows of x against all of y at a time, which avoids
            # copying y for each pair; the chunk keeps the temporary array to a few tens of MB
            per_row = max(1, y[0].size * y.shape[0])
            step = max(1, int(4_000_000 // per_row))
            for s in range(0, x.shape[0], step):
                xa = x[s : s + step]
                d = fn(xa[:, None], y[None, :])
                out.append(d.reshape((-1,) + d.shape[2:]))
            return np.concatenate(out)
        ii, jj = np.ravel(index[0]), np.ravel(index[1])
        for s in range(0, ii.size, 64):
            out.append(fn(x[ii[s : s + 64]], y[jj[s : s + 64]]))
        return np.concatenate(out) if out else np.zeros((0,) + fn(x[:1], y[:1]).shape[1:])

    if statistic == "histogram":
        # Wasserstein-1 between equal-length samples: mean |sorted a − sorted b| (Villani 2009)
        return pairs(a.qf, b.qf, lambda x, y: np.mean(np.abs(x - y), axis=-2))
    if statistic == "quantiles":
        return pairs(a.quant, b.quant, lambda x, y: np.mean(np.abs(x - y), axis=-2))
    if statistic == "autocorrelation":
        return pairs(
            a.acf,
            b.acf,
            lambda x, y: np.sqrt(np.mean((x[..., 1:, :] - y[..., 1:, :]) ** 2, axis=-2)),
        )
    if statistic == "spectrum":

        def l1(x, y):
            return np.sum(np.abs(x - y), axis=-2) / (0.5 * np.sum(x + y, axis=-2))

        return pairs(a.psd, b.psd, l1)
    if statistic == "occupancy":
        return pairs(a.occ[:, :-1], b.occ[:, :-1], lambda x, y: np.abs(x - y))
    if statistic == "residence":
        return pairs(a.res[:, :-1], b.res[:, :-1], lambda x, y: np.abs(x - y))
    if statistic == "transitions":
        return pairs(
            a.trans, b.trans, lambda x, y: np.sqrt(np.sum((x - y) ** 2, axis=(-2, -1)))[..., None]
        )
    raise SettingsError(f"unknown statistic {statistic!r}")  # pragma: no cover - checked in spec


def _row_labels(statistic: str, variables, regimes) -> list[str]:
    if statistic in ("occupancy", "residence"):
        return list(regimes.names)
    if statistic == "transitions":
        return ["all regimes"]
    return list(variables)


# ---------------------------------------------------------------------------------------------
# The check
# ---------------------------------------------------------------------------------------------


def _observed_variables(surrogate) -> list[str]:
    """:attr:`Surrogate.observed_variables`, refused when it names variables the model lacks.

    The rest of the model's variables are hidden (unobserved) states, e.g. the memory level of
    empirical model reduction (Kravtsov, Kondrashov & Ghil 2005).
    """
    observed = list(surrogate.observed_variables)
    unknown = [v for v in observed if v not in surrogate.variables]
    if unknown:
        raise DataError(
            f"the model's settings list observed variables {unknown} that it does not have "
            f"(variables: {list(surrogate.variables)})"
        )
    return observed


def _compared_space(surrogate, reference, observed):
    """The reference in the space the check compares in, and whether that is the model space.

    A surrogate whose transform changes the variables (PCA modes, a delay embedding) claims the
    statistics of its model variables only: a reduced model cannot hold the variance its
    transform leaves out, so comparing in data space would fail even the exact dynamics of the
    kept modes. The reference is then mapped, run by run, through the surrogate's own stored
    transform and compared there. A transform that keeps the variables (standardising) changes
    no ratio, and the check stays in data space.
    """
    transform = surrogate.transform
    if transform is not None:
        reference = align_columns(surrogate, reference)  # the same variables in any order
    if transform is None or tuple(transform.output_names) == tuple(reference.names):
        return reference, False
    from ergodex.model_space import transform_series
    from ergodex.series import Series

    mapped = transform_series(transform, reference)
    if observed != list(mapped.names):
        mapped = Series.from_arrays(
            [run[:, [mapped.names.index(v) for v in observed]] for run in mapped.runs],
            observed,
            mapped.dt,
            run_labels=mapped.run_labels,
            source=mapped.source,
            time_unit=mapped.time_unit,
        )
    return mapped, True


def _data_space_names(surrogate, reference, observed) -> np.ndarray | None:
    """Column order mapping model output (data space) onto the reference's variables.

    Without a transform, the model's data space is its ``observed`` variables (in that order);
    they must be the reference's variables, in any order.
    """
    if surrogate.transform is None:
        return _column_order(observed, reference)[1]
    return None


def _column_order(names, series) -> tuple[list[int], np.ndarray]:
    """Where each of ``names`` is in ``series`` and back: the one column matcher.

    Returns ``(take, back)``: ``series`` columns ``take`` are ``names`` in order, and ``back``
    maps ``names`` order onto the series' columns. The same set of names in any order is
    accepted; another set raises :class:`DataError`.
    """
    names = list(names)
    if sorted(names) != sorted(series.names):
        raise DataError(
            f"{series.source or 'reference data'}: variables {list(series.names)} do not "
            f"match the model's {names}; check the data file or the model"
        )
    return [series.names.index(n) for n in names], np.array([names.index(n) for n in series.names])


def data_variables(surrogate) -> tuple[str, ...]:
    """Names of the data columns a surrogate reads: its transform's inputs, else its observed
    variables (hidden variables have no data)."""
    if surrogate.transform is not None:
        return tuple(surrogate.transform.input_names)
    return tuple(_observed_variables(surrogate))


def align_columns(surrogate, series):
    """``series`` with its columns in the surrogate's data order (:func:`data_variables`).

    Data files may list the same variables in another order; :func:`check` accepts that, and
    every other path that hands data to a model (retraining, simulation start states, a
    transform) goes through here to accept it the same way. Another set of variables raises
    :class:`DataError`.
    """
    names = data_variables(surrogate)
    if tuple(series.names) == names:
        return series
    take = _column_order(names, series)[0]
    from ergodex.series import Series

    return Series.from_arrays(
        [run[:, take] for run in series.runs],
        names,
        series.dt,
        units=None if series.units is None else [series.units[j] for j in take],
        run_labels=series.run_labels,
        source=series.source,
        time_unit=series.time_unit,
    )


def check(
    surrogate,
    reference,
    spec: CheckSpec | None = None,
    *,
    initial_states=None,
    dt: float | None = None,
    progress=False,
    time_limit: float | None = None,
    max_memory: int | str | None = None,
    evidence: bool = True,
) -> CheckResult:
    """Validate a surrogate against reference data: scorecard plus evidence.

    Parameters
    ----------
    surrogate : Surrogate
    reference : Series, pandas.DataFrame or xarray.Dataset/DataArray
        The data, in data space (converted by :func:`ergodex.frames.as_series`). Its runs (or
        blocks of them) provide the noise floor.
    spec : CheckSpec, optional
        Settings; defaults as documented on :class:`CheckSpec`.
    initial_states : array_like, shape (members, n_variables), optional
        Data-space starting states, one per member, instead of states drawn from the reference
        (their fingerprint goes into the scorecard's settings).
    dt : float, optional
        Sampling interval when ``reference`` is a table without times.
    progress : bool or callable(done, total)
        Progress of the ensemble integration and the scoring (see :mod:`ergodex.progress`).
    time_limit : float, optional
        Wall-clock budget of the ensemble integration in seconds (default: none).
    max_memory : int or str, optional
        Memory limit (default: ``$ERGODEX_MAX_MEMORY``, else half the available memory); a check
        whose ensemble would need more is refused before anything is allocated.
    evidence : bool, default True
        Build the arrays behind the figures and reports (:class:`Evidence`). They cost a
        tenth to a quarter of a check; with False, ``result.evidence`` is None (the verdict and
        scorecard are the same), and the figures can be recomputed later from the scorecard's
        spec and seed.

    Returns
    -------
    CheckResult

    Raises
    ------
    DataError
        When the reference is too short for a noise floor or its variables do not match the model.
    SettingsError
        For bad settings, or an ensemble whose estimated memory exceeds the limit. A surrogate
        that blows up is a finding in the scorecard, never an error.
    ModelLimitError
        When the surrogate is too stiff for the substep floor or the integration exceeds
        ``time_limit`` (a model failure: exit code 1 on the command line).

    References
    ----------
    .. [1] C. Villani, *Optimal Transport: Old and New*, Springer (2009) (Wasserstein-1).
    .. [2] P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 70–73 (1967) (spectra).
    .. [3] A. D. Sokal (1997), Monte Carlo methods in statistical mechanics (decorrelation time).
    """
    from ergodex.frames import as_series
    from ergodex.progress import reporter

    reference = as_series(reference, dt=dt, what="reference")
    log.info(
        "check: %s surrogate against %d runs (%d samples) of %s",
        getattr(surrogate, "kind", type(surrogate).__name__),
        reference.n_runs,
        reference.n_samples,
        ", ".join(reference.names),
    )
    with reporter(progress, 1, desc="check", unit="output") as update:
        result = _check(
            surrogate,
            reference,
            spec,
            initial_states,
            update,
            time_limit=time_limit,
            max_memory=max_memory,
            evidence=evidence,
        )
    card = result.scorecard
    settings = card.settings
    log.info(
        "check: %d members of %g time units after a spin-up of %g; %s",
        card.spec.members,
        settings.get("member_length", float("nan")),
        settings.get("spinup", float("nan")),
        settings.get("integration", {}).get("message", ""),
    )
    log.info(
        "check verdict: %s (largest ratio %s over %d rows)%s",
        card.verdict,
        _fmt(card.largest_ratio),
        len(card.rows),
        "; " + "; ".join(card.reasons[:3]) if card.reasons else "",
    )
    return result


def _check(
    surrogate,
    reference,
    spec,
    initial_states,
    update,
    *,
    time_limit: float | None = None,
    max_memory: int | str | None = None,
    evidence: bool = True,
) -> CheckResult:
    """The check itself, on a Series; ``update(done, total)`` (or None) hears of its progress."""
    import ergodex
    from ergodex.integrate import blowup_bound, ensemble_memory, integrate_ensemble
    from ergodex.limits import check_memory

    spec = CheckSpec() if spec is None else spec
    if not isinstance(spec, CheckSpec):
        raise SettingsError(f"spec must be a CheckSpec; got {type(spec).__name__}")
    spec.check_settings()
    data_reference = reference
    observed = _observed_variables(surrogate)
    reference, in_model_space = _compared_space(surrogate, reference, observed)
    variables = tuple(reference.names)
    n_vars = len(variables)
    dt = float(reference.dt)
    order = None if in_model_space else _data_space_names(surrogate, reference, observed)
    if in_model_space:

        def to_model(x):
            return np.asarray(x, dtype=float)

        to_data = to_model
    elif order is None:
        to_model, to_data = surrogate.to_model_space, surrogate.to_data_space
    else:
        # reference columns -> the model's observed order (the inverse of ``order``)
        to_observed = np.argsort(order)

        def to_model(x):
            return surrogate.to_model_space(np.asarray(x, dtype=float)[:, to_observed])

        to_data = surrogate.to_data_space

    stacked = reference.stacked()
    regimes = spec.regimes
    if regimes is not None and regimes.needs_fit:
        regimes = regimes.fit(stacked, variables)
    statistics = tuple(
        s for s in spec.statistics if regimes is not None or s not in _REGIME_STATISTICS
    )

    # -- decorrelation time and derived settings -----------------------------------------
    tau = np.atleast_1d(stats.integrated_autocorrelation_time(list(reference.runs), dt))
    tau_d = float(max(np.max(tau), dt))
    gap = _GAP_TIMES * tau_d if spec.gap is None else float(spec.gap)
    ref_pieces, piece_info = _reference_pieces(reference, spec.min_pieces, gap)
    L = ref_pieces.shape[1]
    max_lag_time = _LAG_TIMES * tau_d if spec.max_lag is None else float(spec.max_lag)
    max_lag = int(np.clip(round(max_lag_time / dt), 1, max(1, L // 4)))
    nperseg = int(spec.nperseg) if spec.nperseg is not None else int(max(8, min(256, L // 8)))
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
    pieces_per_member = n_out // L
    # refuse before the start states, the run and the model array are allocated
    # the run's outputs, the data-space model array and the statistics' pieces: three copies
    check_memory(
        ensemble_memory(
            spec.members,
            n_out,
            surrogate.n_variables,
            surrogate.n_variables,
            surrogate.n_terms,
            copies=3,
        ),
        f"a check of {spec.members} members x {n_out} outputs x {surrogate.n_variables} variables",
        "use fewer members or a shorter length",
        max_memory,
    )

    seeds = np.random.SeedSequence(spec.seed).generate_state(3)
    rng = np.random.default_rng(int(seeds[0]))
    if initial_states is None:
        starts = stacked[rng.choice(stacked.shape[0], size=spec.members, replace=True)]
        starts_note = "drawn from the reference"
    else:
        starts = np.array(initial_states, dtype=float)
        n_data = len(data_reference.names)
        if starts.shape != (spec.members, n_data) or not np.all(np.isfinite(starts)):
            raise DataError(
                f"initial_states must be finite with shape ({spec.members}, {n_data}) "
                f"(members × variables); got shape {starts.shape}"
            )
        if in_model_space:
            starts = surrogate.transform.forward(starts)
        import hashlib

        starts_note = (
            "given: sha256:"
            + hashlib.sha256(np.ascontiguousarray(starts, "<f8").tobytes()).hexdigest()
        )
    z0 = to_model(starts)
    z_ref = to_model(stacked)
    bound = blowup_bound(z_ref, factor=10.0)
    keep = None
    if observed != list(surrogate.variables):
        # hidden variables start at 0 (their level is unknown; the spin-up forgets the choice)
        # and carry no blow-up bound (they have no reference range); only observed ones are
        # kept, which Surrogate.to_data_space accepts as they are
        columns = [list(surrogate.variables).index(v) for v in observed]
        z_all = np.zeros((z0.shape[0], surrogate.n_variables))
        z_all[:, columns] = z0
        z0 = z_all
        bound_all = np.tile([-np.inf, np.inf], (surrogate.n_variables, 1))
        bound_all[columns] = bound
        bound = bound_all
        if len(observed) < surrogate.n_variables:
            keep = columns
    run = integrate_ensemble(
        surrogate,
        z0,
        dt_out=dt,
        n_out=n_out,
        spinup=spinup,
        bound=bound,
        seed=int(seeds[1]),
        keep=keep,
        time_limit=time_limit,
        max_memory=max_memory,
        progress=None if update is None else (lambda d, t: update(d, t + 1)),
    )

    # -- model output in data space -----------------------------------------------------------
    alive = ~np.asarray(run.blown_up, bool)
    model = np.full((spec.members, n_out, n_vars), np.nan)
    for m in np.flatnonzero(alive):
        x = to_data(run.states[m])
        if x.shape[1] != n_vars:
            raise DataError(
                f"the model's data space has {x.shape[1]} variables, the reference "
                f"{n_vars} ({list(variables)})"
            )
        model[m] = x if order is None else x[:, order]

    ctx = {
        "statistics": statistics,
        "max_lag_samples": max_lag,
        "dt": dt,
        "nperseg": nperseg,
        "regimes": regimes,
        "variables": variables,
    }
    from ergodex.series import format_dt

    time_unit = getattr(data_reference, "time_unit", None)
    settings = {
        **piece_info,
        "piece_length_time": L * dt,
        "gap": gap,
        "spinup": spinup,
        "max_lag": max_lag * dt,
        "max_lag_samples": max_lag,
        "nperseg": nperseg,
        "decorrelation_time": tau_d,
        "integrated_autocorrelation_time": {v: float(t) for v, t in zip(variables, tau)},
        "member_length": n_out * dt,
        "pieces_per_member": pieces_per_member,
        "statistics": list(statistics),
        "dt": dt,
        # every time above is in this unit; "dt_text" is dt as printed (format_dt)
        "time_unit": time_unit,
        "dt_text": format_dt(dt, time_unit),
        "start_seed": int(seeds[0]),
        "starts": starts_note,
        "noise_seed": run.seed,
        "integration": run.summary(),
        "regimes_used": None if regimes is None else regimes.to_dict(),
        "quantile_levels": list(stats.DEFAULT_QUANTILES),
        "compared_in": "model space (reference mapped through the surrogate's transform)"
        if in_model_space
        else "data space",
        "hidden_variables": [v for v in surrogate.variables if v not in observed],
    }

    # -- blow-ups -------------------------------------------------------------------------
    blowup_times = np.where(alive, np.nan, np.asarray(run.blowup_time, float))
    blowups, blowup_fail, blowup_reasons = _blowup_accounting(
        blowup_times, spec.max_blowup_fraction
    )

    ref_stats = _PieceStats(ref_pieces, ctx)
    # A group is its pieces laid end to end. The autocorrelation and Welch segments then span
    # pool − 1 joins (a fraction ≈ max_lag / L of the lagged products); model groups are built
    # the same way, so the effect is common to both sides of every comparison.
    ref_groups, floor_index = _reference_groups(n_ref, pool, np.random.default_rng(int(seeds[2])))
    group_stats = (
        ref_stats
        if pool == 1
        else _PieceStats(
            np.stack([ref_pieces[list(g)].reshape(-1, n_vars) for g in ref_groups]), ctx
        )
    )
    settings["pool"] = pool
    settings["n_reference_groups"] = len(ref_groups)
    settings["n_floor_pairs"] = int(floor_index[0].size)
    floors = {
        s: np.nanmean(_pair_distances(s, group_stats, group_stats, floor_index), axis=0)
        for s in statistics
    }
    power, weak_reasons, consistency = _power(
        reference,
        ref_pieces,
        piece_info,
        ref_groups,
        floor_index,
        group_stats,
        floors,
        ctx,
        spec,
        tau_d,
        gap,
    )
    rows: list[ScoreRow] = []
    agreement: dict = {}
    if alive.any():
        # pieces in member-minor order, so that a pooled group takes one piece from each of
        # ``pool`` different members, as a reference group takes independent pieces
        live_pieces = model[alive][:, : pieces_per_member * L].reshape(
            -1, pieces_per_member, L, n_vars
        )
        model_pieces = live_pieces.transpose(1, 0, 2, 3).reshape(-1, L, n_vars)
        n_groups = model_pieces.shape[0] // pool
        if n_groups == 0:
            model_pieces = np.concatenate([model_pieces] * pool)  # fewer survivors than pool
            n_groups = 1
        model_groups = model_pieces[: n_groups * pool].reshape(n_groups, pool * L, n_vars)
        mod_stats = _PieceStats(model_groups, ctx)
        settings["n_model_groups"] = int(n_groups)
        for s in statistics:
            value = np.nanmean(_pair_distances(s, mod_stats, group_stats), axis=0)
            rows.extend(
                _score_rows(
                    s, _row_labels(s, variables, regimes), value, floors[s], spec.tolerance_for(s)
                )
            )
        agreement = _member_agreement(model, alive, L, ref_stats, ref_pieces, spec, ctx)
    else:
        agreement = {
            "ratio": None,
            "tolerance": spec.tolerance,
            "verdict": "fail",
            "collapsed_members": [],
            "outlying_members": [],
            "per_variable": {},
        }

    verdict, reasons = _decide(
        rows,
        blowup_fail=blowup_fail,
        blowup_reasons=blowup_reasons,
        any_alive=bool(alive.any()),
        agreement_verdict=agreement.get("verdict"),
        agreement_reasons=agreement.pop("_reasons", []),
        weak_reasons=weak_reasons,
        reference_reasons=consistency.pop("_reasons", []),
    )
    scorecard = Scorecard(
        verdict=verdict,
        rows=rows,
        reasons=reasons,
        blowups=blowups,
        power=power,
        member_agreement=agreement,
        spec=spec,
        model_fingerprint=surrogate.fingerprint(),
        data_fingerprint=data_reference.fingerprint(),
        created=utc_now(),
        ergodex_version=ergodex.__version__,
        settings=settings,
    )
    arrays = None
    if evidence:  # last: the scorecard never depends on it (it only draws from rng after use)
        arrays = _evidence(
            reference, stacked, ref_pieces, ref_stats, model, alive, blowup_times, spec, ctx, rng
        )
    if update is not None:
        update(n_out + 1, n_out + 1)  # the integration's outputs, then the scoring
    return CheckResult(scorecard, arrays)


def _power(
    reference,
    ref_pieces,
    piece_info,
    groups,
    floor_index,
    group_stats,
    floors,
    ctx,
    spec,
    tau_d,
    gap,
) -> tuple[dict, list[str], dict]:
    """The power statement, the reasons the record is too weak, and the reference's consistency.

    See :mod:`ergodex.power` for the method (rescaled copies of the reference scored through
    the check's own rows; Bretherton et al. 1999 for the effective sample size it matches).
    """
    from ergodex import power as pw

    dt = ctx["dt"]
    L = ref_pieces.shape[1]
    detect = pw.detectable_changes(
        ref_pieces, groups, floor_index, group_stats, floors, ctx, spec.tolerance_for
    )
    record_time = float(sum(r.shape[0] for r in reference.runs) * dt)
    power, weak = pw.power_statement(
        detect, record_time=record_time, piece_time=L * dt, decorrelation_time=tau_d
    )
    per_run = piece_info.get("blocks_per_run", 1)
    run_of_piece = np.arange(ref_pieces.shape[0]) // per_run
    consistency = pw.reference_consistency(
        ref_pieces, run_of_piece, int(math.ceil(gap / dt)), ctx, spec.tolerance
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


def _reference_groups(n: int, pool: int, rng, max_splits: int = 64):
    """Groups of ``pool`` reference pieces and the disjoint pairs of groups behind the floor.

    ``pool == 1``: every piece is a group and every pair of pieces counts. When the pieces split
    exactly in two (``2 pool == n``) and there are at most ``max_splits`` such splits, all of
    them are used (no extra randomness in the floor); otherwise ``max_splits`` random splits
    (seeded) each give two disjoint groups.
    """
    if pool == 1:
        return [(i,) for i in range(n)], np.triu_indices(n, 1)
    if 2 * pool == n and math.comb(n - 1, pool - 1) <= max_splits:
        # every split once: the group holding piece 0, and its complement
        splits = [
            (tuple(a), tuple(sorted(set(range(n)) - {0, *a[1:]})))
            for a in ((0, *rest) for rest in itertools.combinations(range(1, n), pool - 1))
        ]
    else:
        splits = []
        for _ in range(max_splits):
            perm = rng.permutation(n)
            splits.append(
                (tuple(sorted(perm[:pool].tolist())), tuple(sorted(perm[pool : 2 * pool].tolist())))
            )
    groups: dict[tuple[int, ...], int] = {}
    left = [groups.setdefault(a, len(groups)) for a, _ in splits]
    right = [groups.setdefault(b, len(groups)) for _, b in splits]
    return list(groups), (np.array(left), np.array(right))


def _ratio(value: float, floor: float) -> float:
    if math.isnan(value) or math.isnan(floor):
        return float("nan")
    if floor <= 0:
        return 0.0 if value <= 0 else float("inf")
    return float(value / floor)


def _member_agreement(model, alive, L, ref_stats, ref_pieces, spec, ctx) -> dict:
    """Do the members tell the same story? Compares each member's first piece with the others'.

    A surrogate with several attractors (or one whose members collapse to different fixed
    points) gives members whose marginals differ by far more than the reference's noise floor,
    even when the pooled statistics happen to look right.
    """
    tol = spec.tolerance
    variables = ctx["variables"]
    members = np.flatnonzero(alive)
    ref_sd = np.nanstd(ref_pieces.reshape(-1, ref_pieces.shape[2]), axis=0)
    first = model[members, :L]  # each member's first piece, without copying whole members
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
    ctx_h = dict(ctx, statistics=("histogram",), regimes=None)
    mem = _PieceStats(first, ctx_h)
    ref_h = ref_stats if hasattr(ref_stats, "qf") else _PieceStats(ref_pieces, ctx_h)
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


def _model_acf(live: list[np.ndarray], max_lag: int, like: np.ndarray) -> np.ndarray:
    """Autocorrelation of the model output; NaN for a variable that never moves.

    A surrogate that settled on a fixed point is a model failure (the scorecard says so), not
    bad input: its undefined autocorrelation is shown as missing rather than raised.
    """
    try:
        return stats.autocorrelation(live, max_lag)
    except DataError:
        out = np.full_like(like, np.nan)
        for j in range(like.shape[1]):
            try:
                out[:, j] = stats.autocorrelation([x[:, [j]] for x in live], max_lag)[:, 0]
            except DataError:
                continue
        return out


def _evidence(
    reference, stacked, ref_pieces, ref_stats, model, alive, blowup_times, spec, ctx, rng
) -> Evidence:
    """Arrays for the figures; per-piece reference statistics come from ``ref_stats`` when the
    scored statistics already computed them."""
    variables = ctx["variables"]
    n_vars = len(variables)
    dt = ctx["dt"]
    live = [model[m] for m in np.flatnonzero(alive)]
    pooled = np.concatenate(live) if live else np.full((1, n_vars), np.nan)

    edges = (
        np.stack([stats.histogram_edges(stacked[:, j], spec.bins) for j in range(n_vars)])
        if spec.bins != "fd"
        else None
    )
    if edges is None:  # Freedman–Diaconis gives a different count per variable: use the largest
        counts = [stats.histogram_edges(stacked[:, j], "fd").size - 1 for j in range(n_vars)]
        edges = np.stack([stats.histogram_edges(stacked[:, j], max(counts)) for j in range(n_vars)])

    def hist(x):
        return np.stack([stats.histogram(x[..., j], edges[j]) for j in range(n_vars)])

    max_lag = ctx["max_lag_samples"]
    acf_ref = stats.autocorrelation(list(reference.runs), max_lag)
    freq, psd_ref = stats.power_spectrum(list(reference.runs), dt, nperseg=ctx["nperseg"])
    if hasattr(ref_stats, "psd"):
        psd_pieces = ref_stats.psd
    else:
        psd_pieces = stats.welch_psd(
            np.ascontiguousarray(ref_pieces.transpose(0, 2, 1)), dt, ctx["nperseg"]
        )[1].transpose(0, 2, 1)
    acf_pieces = ref_stats.acf if hasattr(ref_stats, "acf") else _acf_pieces(ref_pieces, max_lag)
    if live:
        acf_mod = _model_acf(live, max_lag, acf_ref)
        psd_mod = stats.power_spectrum(live, dt, nperseg=ctx["nperseg"])[1]
    else:
        acf_mod = np.full_like(acf_ref, np.nan)
        psd_mod = np.full_like(psd_ref, np.nan)

    regimes = ctx["regimes"]
    if regimes is not None:
        nr = regimes.n_regimes
        names = np.array(list(regimes.names) + [NONE_NAME])
        ref_labels = [regimes.classify(r, variables) for r in reference.runs]
        mod_labels = [regimes.classify(x, variables) for x in live]
        occ_ref = occupancy(ref_labels, nr)
        occ_pieces = ref_stats.occ  # regimes in ctx: _PieceStats always computes occupancy
        res_ref = mean_residence_times(ref_labels, dt, nr)
        trans_ref = transition_matrix(ref_labels, nr)
        if live:
            occ_mod = occupancy(mod_labels, nr)
            res_mod = mean_residence_times(mod_labels, dt, nr)
            trans_mod = transition_matrix(mod_labels, nr)
        else:
            occ_mod, res_mod = np.full(nr + 1, np.nan), np.full(nr + 1, np.nan)
            trans_mod = np.full((nr + 1, nr + 1), np.nan)
    else:
        names = np.array([], dtype="<U1")
        occ_ref = occ_mod = res_ref = res_mod = np.zeros(0)
        occ_pieces = np.zeros((ref_pieces.shape[0], 0))
        trans_ref = trans_mod = np.zeros((0, 0))

    def sample(x):
        x = x[np.all(np.isfinite(x), axis=1)]
        if x.shape[0] == 0:
            return np.zeros((0, n_vars))
        idx = np.sort(rng.integers(0, x.shape[0], size=min(_SAMPLE_SIZE, x.shape[0])))
        return x[idx]

    return Evidence(
        variables=np.array(variables),
        hist_edges=edges,
        hist_reference=hist(stacked),
        hist_reference_pieces=np.stack([hist(p) for p in ref_pieces]),
        hist_model=hist(pooled),
        acf_lags=np.arange(max_lag + 1) * dt,
        acf_reference=acf_ref,
        acf_reference_pieces=acf_pieces,
        acf_model=acf_mod,
        psd_freq=freq,
        psd_reference=psd_ref,
        psd_reference_pieces=psd_pieces,
        psd_model=psd_mod,
        regime_names=names,
        occupancy_reference=occ_ref,
        occupancy_reference_pieces=occ_pieces,
        occupancy_model=occ_mod,
        residence_reference=res_ref,
        residence_model=res_mod,
        transitions_reference=trans_ref,
        transitions_model=trans_mod,
        sample_reference=sample(stacked),
        sample_model=sample(pooled),
        blowup_times=np.asarray(blowup_times, float),
    )


def validate(
    surrogate,
    reference,
    spec: CheckSpec | None = None,
    *,
    initial_states=None,
    dt: float | None = None,
    progress=False,
) -> Scorecard:
    """Like :func:`check`, returning only the scorecard (no evidence is built for it)."""
    return check(
        surrogate,
        reference,
        spec,
        initial_states=initial_states,
        dt=dt,
        progress=progress,
        evidence=False,
    ).scorecard
