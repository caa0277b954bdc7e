"""Preparing a field for reduction: anomalies from a seasonal cycle, and an optional linear trend.

Both are fitted on the fit data only and kept (as plain lists of numbers) inside the model's field
transform, so a surrogate's output — anomalies in mode space — maps back to absolute values on the
grid at any date of the model calendar. Pure numerics on arrays; dates come as cftime objects.

- ``month``: twelve calendar-month means per point (monthly or finer data).
- ``day``: a smooth daily cycle, the mean plus the first ``n_harmonics`` annual harmonics fitted by
  least squares against the fraction of the calendar year (365, 366 or 360 days, as the model
  calendar says); three harmonics are the usual choice for daily climatologies (common practice,
  no source).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.fields.calendar import days_in_year

__all__ = ["CLIMATOLOGIES", "LinearTrend", "SeasonalCycle", "year_fraction"]

CLIMATOLOGIES = ("month", "day")


def year_fraction(dates: np.ndarray, calendar: str) -> np.ndarray:
    """Fraction of the calendar year elapsed at each date, in [0, 1)."""
    doy = np.array([d.dayofyr - 1 + (d.hour + d.minute / 60.0) / 24.0 for d in dates])
    return doy / days_in_year(dates, calendar)


def _harmonics(fraction: np.ndarray, n: int) -> np.ndarray:
    angle = 2.0 * np.pi * fraction
    cols = [np.ones_like(angle)]
    for h in range(1, n + 1):
        cols += [np.cos(h * angle), np.sin(h * angle)]
    return np.stack(cols, axis=1)


class SeasonalCycle:
    """A per-point seasonal cycle (climatology) fitted on dates of a model calendar.

    Parameters
    ----------
    kind : {"month", "day"}
    n_harmonics : int, default 3
        Annual harmonics of the ``day`` cycle.

    Attributes
    ----------
    coefficients_ : ndarray (12, n_points) for ``month``; (1 + 2 n_harmonics, n_points) for ``day``
    """

    def __init__(self, kind: str = "month", *, n_harmonics: int = 3) -> None:
        self.kind = kind
        self.n_harmonics = n_harmonics

    def _check(self) -> None:
        if self.kind not in CLIMATOLOGIES:
            raise SettingsError(
                f"climatology must be one of {list(CLIMATOLOGIES)}; got {self.kind!r}"
            )
        if (
            isinstance(self.n_harmonics, bool)
            or not isinstance(self.n_harmonics, int)
            or not 1 <= self.n_harmonics <= 6
        ):
            raise SettingsError(f"n_harmonics must be an integer 1..6; got {self.n_harmonics!r}")

    def design(self, dates: np.ndarray) -> np.ndarray:
        """Regressors at ``dates``: one-hot calendar months, or the annual harmonics."""
        if self.kind == "month":
            months = np.array([d.month - 1 for d in dates], dtype=int)
            return np.eye(12)[months]
        return _harmonics(year_fraction(dates, self.calendar_), self.n_harmonics)

    def fit(self, X: Any, dates: np.ndarray, calendar: str) -> SeasonalCycle:
        """Fit on ``X`` (n_samples, n_points; numpy or dask) sampled at ``dates``.

        Least squares through the normal equations, so a lazy array is reduced chunk by chunk;
        with one-hot months the solution is the mean of each calendar month.
        """
        self._check()
        self.calendar_ = calendar
        if self.kind == "month":
            present = {d.month for d in dates}
            missing = sorted(set(range(1, 13)) - present)
            if missing:
                raise DataError(
                    f"a monthly climatology needs every calendar month in the fit "
                    f"data; month(s) {missing} are absent; use a longer record, "
                    f"--climatology day, or --climatology none"
                )
        elif np.ptp(year_fraction(dates, calendar)) < 0.5:
            raise DataError("a daily climatology needs fit data spanning most of a year")
        design = self.design(dates)
        rhs = (X.T @ design).T
        if hasattr(rhs, "compute"):
            rhs = rhs.compute()
        self.coefficients_ = np.linalg.solve(design.T @ design, np.asarray(rhs))
        return self

    def evaluate(self, dates: np.ndarray) -> np.ndarray:
        """The cycle at ``dates``: (n_dates, n_points)."""
        return self.design(dates) @ self.coefficients_

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "n_harmonics": int(self.n_harmonics),
            "calendar": self.calendar_,
            "coefficients": self.coefficients_.tolist(),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], n_points: int) -> SeasonalCycle:
        t = cls(str(d.get("kind")), n_harmonics=int(d.get("n_harmonics", 3)))
        try:
            t._check()
        except SettingsError as exc:
            raise ModelFileError(f"field transform climatology: {exc}") from None
        rows = 12 if t.kind == "month" else 1 + 2 * t.n_harmonics
        coef = np.asarray(d.get("coefficients"), dtype=np.float64)
        if coef.shape != (rows, n_points) or not np.all(np.isfinite(coef)):
            raise ModelFileError(
                f"field transform climatology: coefficients of shape "
                f"{coef.shape}, expected ({rows}, {n_points}) finite numbers"
            )
        t.coefficients_ = coef
        t.calendar_ = str(d.get("calendar", "standard"))
        return t


class LinearTrend:
    """A straight line per point against the sample index, fitted by least squares.

    Attributes
    ----------
    intercept_, slope_ : ndarray (n_points,)
        Value at sample 0 and change per sample.
    """

    def fit(self, X: Any, steps: np.ndarray) -> LinearTrend:
        """Fit on ``X`` (n_samples, n_points; numpy or dask) at sample indices ``steps``."""
        s = np.asarray(steps, dtype=np.float64)
        if np.ptp(s) == 0:
            raise DataError("detrending needs at least two distinct times")
        sc = s - s.mean()
        # the centred regressor sums to zero, so X need not be centred (one pass over X)
        slope, mean = X.T @ sc, X.mean(axis=0)
        if hasattr(slope, "compute"):
            import dask

            slope, mean = dask.compute(slope, mean)
        self.slope_ = np.asarray(slope) / (sc @ sc)
        self.intercept_ = np.asarray(mean) - self.slope_ * s.mean()
        return self

    def evaluate(self, steps: np.ndarray) -> np.ndarray:
        return self.intercept_ + np.asarray(steps, dtype=np.float64)[:, None] * self.slope_

    def to_dict(self) -> dict[str, Any]:
        return {"intercept": self.intercept_.tolist(), "slope": self.slope_.tolist()}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], n_points: int) -> LinearTrend:
        t = cls()
        for key in ("intercept", "slope"):
            arr = np.asarray(d.get(key), dtype=np.float64)
            if arr.shape != (n_points,) or not np.all(np.isfinite(arr)):
                raise ModelFileError(f"field transform trend: {key!r} must be {n_points} numbers")
            setattr(t, f"{key}_", arr)
        return t
