"""The scorecard: one row per statistic and variable against its noise floor, and the verdict."""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path

from ergodex import CAUTION
from ergodex.exceptions import ModelFileError, SettingsError
from ergodex.files import atomic_write_text
from ergodex.jsonable import jsonable
from ergodex.validation.spec import CheckSpec

SCORECARD_FORMAT = "ergodex-scorecard/2"
#: Formats still read: a /1 scorecard was checked with the fixed tolerance (its spec, written
#: before ``false_reject_rate`` existed, is read with ``false_reject_rate = None``).
READABLE_SCORECARD_FORMATS = ("ergodex-scorecard/1", SCORECARD_FORMAT)


def _finite_or_none(x):
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def _none_to_nan(x):
    return float("nan") if x is None else float(x)


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

    JSON layout (``format = "ergodex-scorecard/2"``; /1, without ``threshold``, is still read);
    non-finite numbers are written as null:

    - ``verdict``: ``"pass"``, ``"fail"`` or ``"inconclusive"`` (the record cannot detect a
      ±50 % change of time scale or variance, is too short, or its runs disagree; not passed);
      ``reasons``: list of one-line explanations (why inconclusive; rows that drove a failure,
      largest ratio first; blow-ups; member disagreement).
    - ``power``: what the record can detect (see :mod:`ergodex.power`): ``record_time``,
      ``record_decorrelation_times``, ``piece_decorrelation_times``, ``detectable``
      {time_scale, variance_up, variance_down: smallest rejected factor or null},
      ``required_factor``, ``sufficient``, ``reference_consistency``, ``method``.
    - ``threshold``: how the threshold on the largest ratio was set (:mod:`ergodex.nullfloor`):
      ``false_reject_rate`` (null: the fixed tolerance), ``threshold``, ``null_quantile``,
      ``floor``, ``replicates``, ``block_samples``, ``null_median``, ``seed``, ``method``.
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
    threshold: dict = field(default_factory=dict)

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
            "threshold": jsonable(self.threshold),
        }

    @classmethod
    def from_dict(cls, d: dict, *, source: str = "scorecard") -> Scorecard:
        if not isinstance(d, dict) or d.get("format") not in READABLE_SCORECARD_FORMATS:
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
                spec=CheckSpec.from_dict(_spec_of(d)),
                model_fingerprint=d["model_fingerprint"],
                data_fingerprint=d["data_fingerprint"],
                created=d["created"],
                ergodex_version=d["ergodex_version"],
                settings=dict(d.get("settings", {})),
                power=dict(d.get("power") or {}),
                threshold=dict(d.get("threshold") or {}),
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
        line = threshold_line(self.threshold)
        if line:
            lines.append(line)
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


def _spec_of(d: dict) -> dict:
    """The check settings of a scorecard dict; a /1 scorecard was checked with the fixed
    tolerance, which its spec (written before ``false_reject_rate`` existed) does not say."""
    spec = d["spec"]
    if d.get("format") == "ergodex-scorecard/1" and isinstance(spec, dict):
        spec = {"false_reject_rate": None, **spec}
    return spec


def threshold_line(threshold: dict) -> str | None:
    """How the threshold on the largest ratio was set, in one line (None without the block)."""
    if not threshold:
        return None
    value = _fmt(_none_to_nan(threshold.get("threshold")))
    if threshold.get("false_reject_rate") is None:
        return f"threshold: the fixed tolerance {value} on every row"
    rate = 100 * float(threshold["false_reject_rate"])
    floor = threshold.get("floor")
    quantile = _none_to_nan(threshold.get("null_quantile"))
    how = (
        f"the floor {floor:g} (the bootstrap gave {_fmt(quantile)})"
        if floor is not None and floor >= quantile
        else f"the {100 - rate:g} % point of a right model's largest ratio"
    )
    return (
        f"threshold {value} = {how}; targets a false-reject rate of {rate:g} % "
        f"({threshold.get('replicates')} bootstrap replicates of the reference)"
    )


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

    periods = power.get("record_dominant_periods")
    return [
        f"record: {_fmt(_none_to_nan(power.get('record_time')))} time units = "
        f"{_fmt(_none_to_nan(power.get('record_decorrelation_times')))} decorrelation times "
        f"(pieces of {_fmt(_none_to_nan(power.get('piece_decorrelation_times')))})"
        + (
            f" = {_fmt(periods)} dominant periods of {_fmt(power['dominant_period'])}"
            if periods is not None
            else ""
        ),
        f"smallest change it detects: time scale {factor('time_scale')}, variance "
        f"{factor('variance_up')} / {factor('variance_down')}",
    ]


def _fmt(x: float) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "n/a"
    if math.isinf(x):
        return "inf"
    return f"{x:.3g}" if abs(x) < 1e4 else f"{x:.3e}"
