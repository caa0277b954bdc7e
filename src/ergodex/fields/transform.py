"""The field transform: grid values ↔ mode amplitudes, stored in the model file.

:class:`FieldModes` is a :class:`~ergodex.model_space.Transform` (kind ``field-modes``) whose data
space is the field's valid grid points and whose model space is the amplitudes of its leading
area-weighted EOFs. Forward: subtract the seasonal cycle and the trend at each sample's date (on
the model calendar), subtract the remaining time mean, weight by sqrt(area), project on the EOFs.
Inverse: the same steps backwards, so a surrogate's output maps back to absolute values.

Rows of :meth:`forward` / :meth:`inverse` are consecutive samples starting at the first sample of
the fit data (step 0 of the clock); :meth:`forward_at` / :meth:`inverse_at` take the sample
indices explicitly (data that starts elsewhere, or simulated output placed after the record).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.fields.calendar import Clock
from ergodex.fields.preparing import CLIMATOLOGIES, LinearTrend, SeasonalCycle
from ergodex.fields.reading import Field
from ergodex.fields.reducing import EOFResult, weighted_eof
from ergodex.model_space import Transform
from ergodex.series import Series

__all__ = ["FieldModes", "modes_series"]


def _floats(value: Any, name: str, shape: tuple[int, ...] | None = None) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        raise ModelFileError(f"field transform: {name!r} must be numbers") from None
    if (shape is not None and arr.shape != shape) or not np.all(np.isfinite(arr)):
        raise ModelFileError(
            f"field transform: {name!r} has shape {arr.shape}, expected {shape} finite numbers"
        )
    return arr


class FieldModes(Transform):
    """Seasonal anomalies, optional detrending and area-weighted EOFs of a gridded field.

    Parameters
    ----------
    n_modes : int, optional
        Keep this many modes (rule ``count``).
    variance : float, optional
        Keep the fewest modes reaching this share of the weighted variance (default 0.9 when
        neither ``n_modes`` nor ``north`` is given).
    north : bool, default False
        Keep the modes separated by North's rule (capped by ``max_modes``).
    climatology : {"auto", "month", "day", None}, default "auto"
        Seasonal cycle removed before the EOFs (fitted on the fit data only); ``auto``: none for
        yearly samples, calendar months for monthly ones, the smooth daily cycle for finer ones.
    detrend : bool, default False
        Remove a per-point linear trend (after the seasonal cycle).
    max_modes : int, optional
    solver : {"auto", "full", "randomized"}
    seed : int, default 0

    Attributes
    ----------
    clock_, lat_, lon_, mask_, area_, variable_, units_, cycle_, trend_, mean_, components_,
    variance_fraction_, total_variance_, singular_values_, eof_solver_

    References
    ----------
    See :mod:`ergodex.fields.reducing` (EOFs, North's rule) and
    :mod:`ergodex.fields.preparing` (climatology).
    """

    kind = "field-modes"

    def __init__(
        self,
        n_modes: int | None = None,
        *,
        variance: float | None = None,
        north: bool = False,
        climatology: str | None = "auto",
        detrend: bool = False,
        max_modes: int | None = None,
        solver: str = "auto",
        seed: int = 0,
    ) -> None:
        super().__init__()
        self.n_modes = n_modes
        self.variance = variance
        self.north = north
        self.climatology = climatology
        self.detrend = detrend
        self.max_modes = max_modes
        self.solver = solver
        self.seed = seed

    # -- settings ----------------------------------------------------------------------------
    @property
    def rule(self) -> str:
        if self.north:
            return "north"
        return "count" if self.n_modes is not None else "variance"

    def _check_settings(self) -> None:
        chosen = sum([self.n_modes is not None, self.variance is not None, bool(self.north)])
        if chosen > 1:
            raise SettingsError("give at most one of --modes, --variance and --north")
        if self.climatology not in (None, "auto", *CLIMATOLOGIES):
            raise SettingsError(
                f"climatology must be auto, month, day or none; got {self.climatology!r}"
            )
        if not isinstance(self.detrend, bool):
            raise SettingsError(f"detrend must be True or False; got {self.detrend!r}")

    def _settings_repr(self) -> str:
        return (
            f"n_modes={self.n_modes}, variance={self.variance}, north={self.north}, "
            f"climatology={self.climatology!r}, detrend={self.detrend}"
        )

    # -- fitting -------------------------------------------------------------------------------
    def fit(self, X: Any, *, names: Sequence[str] | None = None) -> FieldModes:
        """Fit on a :class:`~ergodex.fields.reading.Field` (every member is used)."""
        if not isinstance(X, Field):
            raise SettingsError(
                "a field-modes transform is fitted on a Field "
                "(ergodex.fields.read_field), not on a table of columns"
            )
        self._check_settings()
        field = X
        self.clock_ = field.clock
        self.lat_, self.lon_, self.mask_ = field.lat.copy(), field.lon.copy(), field.mask.copy()
        self.area_ = np.asarray(field.area, dtype=np.float64)
        self.area_source_ = field.area_source
        self.variable_, self.units_ = field.variable, field.units
        self.attrs_ = dict(field.attrs)
        self.dims_ = dict(field.names)
        values = field.values.reshape((-1, field.n_points))
        steps = np.tile(field.steps, field.n_members)
        self.cycle_ = None
        self.trend_ = None
        self.climatology_ = self.climatology
        if self.climatology == "auto":
            self.climatology_ = {"years": None, "months": "month"}.get(self.clock_.unit, "day")
        if self.climatology_ is not None:
            dates = self.clock_.dates_at(steps)
            self.cycle_ = SeasonalCycle(self.climatology_).fit(values, dates, self.clock_.calendar)
        self.mean_ = np.zeros(field.n_points)
        if isinstance(values, np.ndarray):
            # one float64 working copy, changed in place (the benchmark's memory budget)
            anomalies = _anomalies(values, steps, self._cycle_only)
            if self.detrend:
                self.trend_ = LinearTrend().fit(anomalies, steps)
                _subtract_rows(anomalies, steps, self.trend_.evaluate)
            self.mean_ = anomalies.mean(axis=0)
            anomalies -= self.mean_
        else:
            if self.detrend:
                self.trend_ = LinearTrend().fit(_minus(values, steps, self._cycle_only), steps)
            self.mean_ = np.asarray(_minus(values, steps, self._baseline).mean(axis=0).compute())
            anomalies = _minus(values, steps, self._baseline)
        variance = self.variance if (self.variance is not None or self.rule != "variance") else 0.9
        eof: EOFResult = weighted_eof(
            anomalies,
            self.area_,
            rule=self.rule,
            n_modes=self.n_modes,
            variance=variance,
            max_modes=self.max_modes,
            solver=self.solver,
            seed=self.seed,
            overwrite=True,
        )
        del anomalies
        self.components_ = eof.components
        self.variance_fraction_ = eof.variance_fraction
        self.total_variance_ = eof.total_variance
        self.singular_values_ = eof.singular_values
        self.eof_solver_ = eof.solver
        self.n_fit_samples_ = int(values.shape[0])
        self.record_end_ = int(field.steps[-1]) + 1  # first step after the fit record
        self.input_names_ = field.point_names()
        return self

    # -- maps ----------------------------------------------------------------------------------
    @property
    def sqrt_weights(self) -> np.ndarray:
        return np.sqrt(self.area_)

    @property
    def n_modes_(self) -> int:
        return int(self.components_.shape[0])

    def _cycle_only(self, steps: np.ndarray) -> np.ndarray:
        if self.cycle_ is None:
            return np.zeros((np.size(steps), self.area_.size))
        return self.cycle_.evaluate(self.clock_.dates_at(steps))

    def _baseline(self, steps: np.ndarray) -> np.ndarray:
        """Seasonal cycle + trend + time mean at sample indices: (n, n_points)."""
        steps = np.asarray(steps)
        base = self._cycle_only(steps) + self.mean_
        if self.trend_ is not None:
            base += self.trend_.evaluate(steps)
        return base

    def anomalies_at(self, X: np.ndarray, steps: np.ndarray) -> np.ndarray:
        """Grid values → anomalies (seasonal cycle, trend and mean removed)."""
        return np.asarray(X, dtype=np.float64) - self._baseline(steps)

    def project(self, anomalies: np.ndarray) -> np.ndarray:
        """Anomalies (n, n_points) → mode amplitudes (n, n_modes)."""
        return (anomalies * self.sqrt_weights) @ self.components_.T

    def reconstruct(self, Z: np.ndarray) -> np.ndarray:
        """Mode amplitudes (n, n_modes) → anomalies on the grid points (n, n_points)."""
        w = self.sqrt_weights
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(w > 0, (np.asarray(Z) @ self.components_) / w, 0.0)

    def forward_at(self, X: np.ndarray, steps: np.ndarray) -> np.ndarray:
        """Grid values at sample indices ``steps`` → mode amplitudes."""
        self._require_fitted()
        return self.project(self.anomalies_at(X, steps))

    def inverse_at(self, Z: np.ndarray, steps: np.ndarray) -> np.ndarray:
        """Mode amplitudes at sample indices ``steps`` → absolute grid values."""
        self._require_fitted()
        return self.reconstruct(Z) + self._baseline(steps)

    def _forward(self, X: np.ndarray) -> np.ndarray:
        return self.forward_at(X, np.arange(X.shape[0]))

    def _inverse(self, Z: np.ndarray) -> np.ndarray:
        return self.inverse_at(Z, np.arange(Z.shape[0]))

    def _output_names(self) -> tuple[str, ...]:
        return tuple(f"mode_{i + 1}" for i in range(self.n_modes_))

    @property
    def dt_text(self) -> str:
        return self.clock_.dt_text

    def summary(self) -> dict[str, Any]:
        """What a person reads about the reduction (JSON-able)."""
        return {
            "variable": self.variable_,
            "units": self.units_,
            "grid": [int(self.lat_.size), int(self.lon_.size)],
            "valid_points": int(self.mask_.sum()),
            "area_weights": self.area_source_,
            "dt": self.clock_.step,
            "time_unit": self.clock_.unit,
            "calendar": self.clock_.calendar,
            "climatology": None if self.cycle_ is None else self.cycle_.kind,
            "detrend": self.detrend,
            "mode_rule": self.rule,
            "n_modes": self.n_modes_,
            "variance_fraction": [float(f) for f in self.variance_fraction_],
            "variance_captured": float(np.sum(self.variance_fraction_)),
            "eof_solver": self.eof_solver_,
        }

    # -- files ---------------------------------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON: settings, grid, clock, climatology, trend, EOFs.

        ``input_names`` is left out (one per grid point, derivable from the mask) and rebuilt on
        reading.
        """
        self._require_fitted()
        return {"kind": self.kind, "input_names": ["<grid>"], **self._state()}

    def _state(self) -> dict[str, Any]:
        return {
            "settings": {
                "n_modes": self.n_modes,
                "variance": self.variance,
                "north": bool(self.north),
                "climatology": self.climatology,
                "detrend": bool(self.detrend),
                "max_modes": self.max_modes,
                "solver": self.solver,
                "seed": int(self.seed),
            },
            "variable": self.variable_,
            "units": self.units_,
            "attrs": {
                k: (v.item() if isinstance(v, np.generic) else v) for k, v in self.attrs_.items()
            },
            "dims": self.dims_,
            "lat": self.lat_.tolist(),
            "lon": self.lon_.tolist(),
            "valid_points": np.flatnonzero(self.mask_.ravel()).tolist(),
            "area": self.area_.tolist(),
            "area_source": self.area_source_,
            "clock": self.clock_.to_dict(),
            "climatology": None if self.cycle_ is None else self.cycle_.to_dict(),
            "trend": None if self.trend_ is None else self.trend_.to_dict(),
            "mean": self.mean_.tolist(),
            "components": self.components_.tolist(),
            "variance_fraction": self.variance_fraction_.tolist(),
            "total_variance": float(self.total_variance_),
            "singular_values": self.singular_values_.tolist(),
            "eof_solver": self.eof_solver_,
            "n_fit_samples": int(self.n_fit_samples_),
            "record_end": int(self.record_end_),
        }

    @classmethod
    def _from_state(cls, d: Mapping[str, Any], n_inputs: int) -> FieldModes:
        s = d.get("settings") or {}
        t = cls(
            s.get("n_modes"),
            variance=s.get("variance"),
            north=bool(s.get("north")),
            climatology=s.get("climatology"),
            detrend=bool(s.get("detrend")),
            max_modes=s.get("max_modes"),
            solver=str(s.get("solver", "auto")),
            seed=int(s.get("seed", 0)),
        )
        t.lat_ = _floats(d["lat"], "lat")
        t.lon_ = _floats(d["lon"], "lon")
        valid = np.asarray(d["valid_points"], dtype=np.int64)
        size = t.lat_.size * t.lon_.size
        if valid.ndim != 1 or valid.size == 0 or valid.min() < 0 or valid.max() >= size:
            raise ModelFileError("field transform: 'valid_points' must index the grid")
        mask = np.zeros(size, bool)
        mask[valid] = True
        t.mask_ = mask.reshape(t.lat_.size, t.lon_.size)
        p = valid.size
        t.area_ = _floats(d["area"], "area", (p,))
        t.area_source_ = str(d.get("area_source", ""))
        t.variable_, t.units_ = str(d["variable"]), str(d.get("units", ""))
        t.attrs_ = dict(d.get("attrs") or {})
        t.dims_ = dict(d.get("dims") or {})
        t.clock_ = Clock.from_dict(d["clock"])
        t.cycle_ = (
            None if d.get("climatology") is None else SeasonalCycle.from_dict(d["climatology"], p)
        )
        t.trend_ = None if d.get("trend") is None else LinearTrend.from_dict(d["trend"], p)
        t.mean_ = _floats(d["mean"], "mean", (p,))
        comps = _floats(d["components"], "components")
        if comps.ndim != 2 or comps.shape[1] != p or comps.shape[0] < 1:
            raise ModelFileError(
                f"field transform: 'components' has shape {comps.shape}, expected (n_modes, {p})"
            )
        t.components_ = comps
        t.variance_fraction_ = _floats(
            d["variance_fraction"], "variance_fraction", (comps.shape[0],)
        )
        t.total_variance_ = float(d["total_variance"])
        t.singular_values_ = _floats(d.get("singular_values", []), "singular_values")
        t.eof_solver_ = str(d.get("eof_solver", ""))
        t.n_fit_samples_ = int(d.get("n_fit_samples", 0))
        t.record_end_ = int(d.get("record_end", 0))
        iy, ix = np.nonzero(t.mask_)
        t.input_names_ = tuple(f"{t.variable_}_{a}_{b}" for a, b in zip(iy, ix))
        return t


def modes_series(transform: FieldModes, field: Field) -> Series:
    """The field's mode amplitudes as a Series (one run per member), dt in the clock's unit.

    The field's samples are placed on the transform's clock by their dates, so data that starts
    after the fit data gets the right seasonal cycle.
    """
    transform._require_fitted()
    if (
        field.variable != transform.variable_
        or field.mask.shape != transform.mask_.shape
        or not np.array_equal(field.mask, transform.mask_)
    ):
        raise DataError(
            f"{field.source}: variable {field.variable!r} on a {field.mask.shape} "
            f"grid with {int(field.mask.sum())} valid points does not match the "
            f"model's {transform.variable_!r} on {transform.mask_.shape} with "
            f"{int(transform.mask_.sum())}; read the same variable and --box"
        )
    if field.clock.unit != transform.clock_.unit or field.clock.step != transform.clock_.step:
        raise DataError(
            f"{field.source}: variable {field.variable!r}, dimension 'time': samples "
            f"every {field.clock.dt_text}, the model's every {transform.dt_text}"
        )
    steps = transform.clock_.steps_of(
        field.clock.dates_at(field.steps), where=f"{field.source}: variable {field.variable!r}"
    )
    w = transform.components_ * transform.sqrt_weights
    runs = []
    for m in range(field.n_members):
        x = field.values[m]
        if isinstance(x, np.ndarray):
            z = np.concatenate(
                [(x[a:b] - transform._baseline(steps[a:b])) @ w.T for a, b in _blocks(x.shape[0])]
            )
        else:
            z = np.asarray((_minus(x, steps, transform._baseline) @ w.T).compute())
        runs.append(z)
    return Series.from_arrays(
        runs,
        transform.output_names,
        transform.clock_.step,
        run_labels=list(field.member_labels),
        source=field.source,
        time_unit=transform.clock_.unit,
    )


_BLOCK_ROWS = 256


def _blocks(n: int) -> list[tuple[int, int]]:
    return [(a, min(n, a + _BLOCK_ROWS)) for a in range(0, n, _BLOCK_ROWS)]


def _anomalies(values: np.ndarray, steps: np.ndarray, baseline) -> np.ndarray:
    """``values − baseline(steps)`` as a new float64 array, filled a block of rows at a time."""
    out = np.empty(values.shape, dtype=np.float64)
    for a, b in _blocks(values.shape[0]):
        np.subtract(values[a:b], baseline(steps[a:b]), out=out[a:b])
    return out


def _subtract_rows(x: np.ndarray, steps: np.ndarray, rows) -> None:
    """``x −= rows(steps)`` in place, a block of rows at a time."""
    for a, b in _blocks(x.shape[0]):
        x[a:b] -= rows(steps[a:b])


def _minus(values: Any, steps: np.ndarray, baseline) -> Any:
    """``values − baseline(steps)`` row by row; a dask array stays lazy (chunk by chunk)."""
    if isinstance(values, np.ndarray):
        return values - baseline(steps)

    def block(b, block_info=None):
        start, stop = block_info[0]["array-location"][0]
        return (
            b
            - baseline(steps[start:stop])[
                :, block_info[0]["array-location"][1][0] : block_info[0]["array-location"][1][1]
            ]
        )

    return values.map_blocks(block, dtype=np.float64)
