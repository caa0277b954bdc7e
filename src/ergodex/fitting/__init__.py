"""Fitters: turn a Series into a Surrogate.

Four methods, listed in :data:`FITTERS` under the names the command line and fit-settings files
use: ``"sparse"`` (:class:`~ergodex.fitting.sparse.SparseODE`, sparse nonlinear ODEs through
pysindy), ``"linear-inverse"`` (:class:`~ergodex.fitting.linear_inverse.LinearInverseModel`) and
``"quadratic-noise"`` (:class:`~ergodex.fitting.quadratic_noise.QuadraticNoiseModel`) and
``"calibrated-linear-inverse"`` (:class:`~ergodex.fitting.calibrated.CalibratedLinearInverse`, a
linear inverse model with cubic damping tuned to the data's statistics). The classes load on
first use so that importing this package stays cheap (pysindy takes seconds to import).
"""

from __future__ import annotations

from ergodex.fitting.base import (
    FITTERS,
    Fitter,
    check_fit_settings,
    fitter_class,
    load_fit_settings,
    make_fitter,
    parse_fit_settings,
)

__all__ = [
    "FITTERS",
    "Fitter",
    "check_fit_settings",
    "fitter_class",
    "load_fit_settings",
    "make_fitter",
    "parse_fit_settings",
    "SparseODE",
    "LinearInverseModel",
    "QuadraticNoiseModel",
    "CalibratedLinearInverse",
    "select",
    "SelectionResult",
]

_LAZY = {
    "SparseODE": "ergodex.fitting.sparse",
    "LinearInverseModel": "ergodex.fitting.linear_inverse",
    "QuadraticNoiseModel": "ergodex.fitting.quadratic_noise",
    "CalibratedLinearInverse": "ergodex.fitting.calibrated",
    "select": "ergodex.fitting.selection",
    "SelectionResult": "ergodex.fitting.selection",
}


def __getattr__(name: str):
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'ergodex.fitting' has no attribute {name!r}")
