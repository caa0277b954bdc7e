"""The classical fourth-order Runge-Kutta step (RK4) on numpy arrays.

The one numpy form of RK4 in ergodex: the numpy ensemble engine (:mod:`ergodex.integrate`), the
Lyapunov exponents (:mod:`ergodex.lyapunov`) and :func:`ergodex.scenarios.rk4_trajectories` step
with it. The compiled form, for loops that must not return to Python between steps, is
:func:`ergodex.kernels.rk4_stepper`, which does the same arithmetic in the same order.

References
----------
.. [1] W. Kutta, "Beitrag zur naeherungsweisen Integration totaler Differentialgleichungen",
   Z. Math. Phys. 46, 435-453 (1901).
.. [2] E. Hairer, S. P. Norsett and G. Wanner, Solving Ordinary Differential Equations I, 2nd ed.,
   Springer (1993), section II.1.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["rk4_step"]


def rk4_step(f: Callable[[np.ndarray], np.ndarray], x: np.ndarray, h: float) -> np.ndarray:
    """One RK4 step of ``dx/dt = f(x)`` from ``x`` with step ``h``; returns the new state.

    ``f`` maps an array of states to their derivatives elementwise in the leading axes (e.g.
    ``(M, n) -> (M, n)``), so many members step at once.
    """
    k1 = f(x)
    k2 = f(x + 0.5 * h * k1)
    k3 = f(x + 0.5 * h * k2)
    k4 = f(x + h * k3)
    return x + (h / 6.0) * (k1 + 2.0 * k2 + 2.0 * k3 + k4)
