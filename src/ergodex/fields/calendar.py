"""Model calendars: CF time coordinates to a uniform step with its unit, and steps back to dates.

A CF time coordinate stores numbers ("days since 1850-01-01") on a named calendar (``standard``,
``noleap``, ``360_day``, ...). A field's samples must be uniform either in elapsed time (hours or
days apart) or in calendar months (monthly means, whose lengths in days differ). :class:`Clock`
holds which, the step and the origin, so that a sample index maps back to a date on the model's
own calendar (through cftime) — what the seasonal climatology and the NetCDF writer need.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, ModelFileError

__all__ = ["Clock", "clock_from_times", "days_in_year", "decode_times"]

#: Relative spread of steps still read as uniform (timestamps written with float32 rounding).
_STEP_TOLERANCE = 1e-3

_YEAR_DAYS = {
    "noleap": 365.0,
    "365_day": 365.0,
    "all_leap": 366.0,
    "366_day": 366.0,
    "360_day": 360.0,
}


def _cftime():
    from ergodex.exceptions import require

    return require("cftime", "netcdf", "decoding model calendars")


def decode_times(numbers: np.ndarray, units: str, calendar: str, *, where: str) -> np.ndarray:
    """cftime dates of CF time numbers; DataError naming ``where`` when the units are unreadable."""
    cftime = _cftime()
    try:
        return np.asarray(
            cftime.num2date(
                np.asarray(numbers, dtype=np.float64),
                units,
                calendar=calendar,
                only_use_cftime_datetimes=True,
            )
        )
    except Exception as exc:  # noqa: BLE001 - cftime raises ValueError or its own types
        raise DataError(
            f"{where}: cannot decode times with units {units!r} and calendar "
            f"{calendar!r} ({exc}); give CF units such as 'days since 2000-01-01'"
        ) from None


def days_in_year(dates: np.ndarray, calendar: str) -> np.ndarray:
    """Length in days of the calendar year of each date (365/366 on real calendars)."""
    fixed = _YEAR_DAYS.get(calendar)
    if fixed is not None:
        return np.full(len(dates), fixed)
    cftime = _cftime()
    out = np.empty(len(dates))
    for i, d in enumerate(dates):
        start = cftime.datetime(d.year, 1, 1, calendar=calendar)
        end = cftime.datetime(d.year + 1, 1, 1, calendar=calendar)
        out[i] = (end - start).days
    return out


@dataclass(frozen=True)
class Clock:
    """Uniform sampling on a model calendar: sample ``s`` lies at ``origin + s * step`` units.

    Attributes
    ----------
    unit : str
        ``"hours"``, ``"days"`` (elapsed time) or ``"months"``, ``"years"`` (calendar months).
    step : float
        Sampling interval in ``unit`` (the ``dt`` a fitted model sees).
    origin : float
        Position of sample 0: days (or hours) since ``epoch``, or a month count
        ``12 year + month - 1``.
    epoch : str
        ``"days since ..."`` units of the elapsed-time origin (the file's own reference date).
    calendar : str
        The CF calendar name.
    day : float
        Day of month (with fraction) of monthly samples, kept for writing dates back.
    """

    unit: str
    step: float
    origin: float
    epoch: str
    calendar: str
    day: float = 15.0

    @property
    def dt_text(self) -> str:
        """The step with its unit, as printed everywhere (``"6 hours"``, ``"1 months"``)."""
        from ergodex.series import format_dt

        return format_dt(self.step, self.unit)

    def steps_of(self, dates: np.ndarray, *, where: str) -> np.ndarray:
        """Sample indices (relative to ``origin``) of the given dates; DataError when off-grid."""
        pos = self._positions(dates)
        per_step = self.step * (12.0 if self.unit == "years" else 1.0)
        steps = (pos - self.origin) / per_step
        rounded = np.round(steps)
        bad = np.flatnonzero(np.abs(steps - rounded) > 0.05)
        if bad.size:
            raise DataError(
                f"{where}: time index {int(bad[0])} ({dates[bad[0]]}) falls between "
                f"the model's samples every {self.dt_text}; resample the data"
            )
        return rounded.astype(np.int64)

    def dates_at(self, steps: np.ndarray) -> np.ndarray:
        """cftime dates of sample indices."""
        cftime = _cftime()
        steps = np.asarray(steps, dtype=np.float64)
        if self.unit in ("hours", "days"):
            per_day = 24.0 if self.unit == "hours" else 1.0
            days = (self.origin + steps * self.step) / per_day
            return decode_times(days, self.epoch, self.calendar, where="model clock")
        months = self.origin + steps * (self.step * (12.0 if self.unit == "years" else 1.0))
        months = np.round(months).astype(np.int64)
        day = int(min(28, max(1, np.floor(self.day))))
        return np.array(
            [
                cftime.datetime(int(m // 12), int(m % 12) + 1, day, calendar=self.calendar)
                for m in months
            ]
        )

    def numbers_at(self, steps: np.ndarray, units: str) -> np.ndarray:
        """CF time numbers (in ``units``) of sample indices, for writing."""
        cftime = _cftime()
        return np.asarray(
            cftime.date2num(list(self.dates_at(steps)), units, calendar=self.calendar),
            dtype=np.float64,
        )

    def _positions(self, dates: np.ndarray) -> np.ndarray:
        cftime = _cftime()
        if self.unit in ("hours", "days"):
            days = np.asarray(
                cftime.date2num(list(dates), self.epoch, calendar=self.calendar), dtype=np.float64
            )
            return days * (24.0 if self.unit == "hours" else 1.0)
        return np.array([12.0 * d.year + d.month - 1 for d in dates])

    def to_dict(self) -> dict[str, Any]:
        return {
            "unit": self.unit,
            "step": float(self.step),
            "origin": float(self.origin),
            "epoch": self.epoch,
            "calendar": self.calendar,
            "day": float(self.day),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Clock:
        try:
            clock = cls(
                str(d["unit"]),
                float(d["step"]),
                float(d["origin"]),
                str(d["epoch"]),
                str(d["calendar"]),
                float(d.get("day", 15.0)),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelFileError(f"field transform: malformed clock ({exc})") from None
        if clock.unit not in ("hours", "days", "months", "years") or not clock.step > 0:
            raise ModelFileError(
                f"field transform: clock unit {clock.unit!r} / step {clock.step} is not valid"
            )
        return clock


def _epoch_days(units: str) -> str:
    """``"<anything> since X"`` -> ``"days since X"`` (the reference date kept)."""
    _, _, since = units.partition(" since ")
    return f"days since {since.strip()}"


def clock_from_times(dates: np.ndarray, units: str, calendar: str, *, where: str) -> Clock:
    """The uniform clock of a series of dates, or DataError naming ``where`` and the bad step.

    Tries elapsed time first (all steps equal within 0.1 %), then calendar months (monthly or
    yearly means, whose lengths in days differ).
    """
    cftime = _cftime()
    if len(dates) < 2:
        raise DataError(f"{where}: {len(dates)} time sample(s); need at least 2")
    epoch = _epoch_days(units)
    days = np.asarray(cftime.date2num(list(dates), epoch, calendar=calendar), dtype=np.float64)
    steps = np.diff(days)
    if np.any(steps <= 0):
        i = int(np.flatnonzero(steps <= 0)[0]) + 1
        raise DataError(
            f"{where}: times are not increasing at time index {i} "
            f"({dates[i - 1]} then {dates[i]}); sort the file along time"
        )
    median = float(np.median(steps))
    if np.max(np.abs(steps - median)) <= _STEP_TOLERANCE * median:
        if median < 1.0 - 1e-9:
            return Clock("hours", median * 24.0, days[0] * 24.0, epoch, calendar)
        return Clock("days", median, days[0], epoch, calendar)
    months = np.array([12 * d.year + d.month - 1 for d in dates], dtype=np.int64)
    dm = np.diff(months)
    if dm.size and np.all(dm == dm[0]) and dm[0] > 0:
        day = float(np.median([d.day for d in dates]))
        if dm[0] % 12 == 0:
            return Clock("years", float(dm[0] // 12), float(months[0]), epoch, calendar, day)
        return Clock("months", float(dm[0]), float(months[0]), epoch, calendar, day)
    i = int(np.argmax(np.abs(steps - median))) + 1
    raise DataError(
        f"{where}: time steps are not uniform: step {i} is {steps[i - 1]:g} days, "
        f"the usual step {median:g} days; resample the data to a uniform step"
    )
