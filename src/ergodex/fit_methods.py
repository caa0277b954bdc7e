"""The fit methods by name and where their classes live, without importing any numerics.

:data:`ergodex.fitting.base.FITTERS` imports a class from here on first use; the command line
lists the names in ``--help`` and checks ``--method`` against them without loading numpy,
scikit-learn or pysindy.
"""

from __future__ import annotations

__all__ = ["FIT_METHODS"]

#: Method name → (module, class). The order is the order ``--help`` shows them in.
FIT_METHODS: dict[str, tuple[str, str]] = {
    "sparse": ("ergodex.fitting.sparse", "SparseODE"),
    "linear-inverse": ("ergodex.fitting.linear_inverse", "LinearInverseModel"),
    "quadratic-noise": ("ergodex.fitting.quadratic_noise", "QuadraticNoiseModel"),
    "calibrated-linear-inverse": ("ergodex.fitting.calibrated", "CalibratedLinearInverse"),
}
