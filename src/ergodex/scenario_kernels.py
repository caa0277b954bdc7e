"""Compiled data generators of the scenarios: Lorenz-63 and Lorenz-96 by RK4, the double well by
Euler-Maruyama.

The RK4 loops step with :func:`ergodex.kernels.rk4_stepper` (members as columns) around the
reference right-hand sides written out here, compiled without fused multiply-add, so that they
do numpy's arithmetic (:func:`ergodex.scenarios.rk4_trajectories` with
:func:`~ergodex.scenarios.lorenz63_rhs` / :func:`~ergodex.scenarios.lorenz96_rhs`) in the same
order. Importing this module imports numba; :mod:`ergodex.scenarios` imports it when a scenario
is generated. The loops are cached on disk by numba.
"""

from __future__ import annotations

import numba as nb
import numpy as np

from ergodex.kernels import rk4_stepper

__all__ = ["double_well_euler_maruyama", "lorenz63_rk4", "lorenz96_rk4"]


@nb.njit
def lorenz63_columns(params, x, out):  # pragma: no cover - compiled
    """Lorenz (1963) eq. 25-27 for every column of ``x`` (3, M); ``params = (sigma, rho, beta)``."""
    sigma, rho, beta = params
    for c in range(x.shape[1]):
        X = x[0, c]
        Y = x[1, c]
        Z = x[2, c]
        out[0, c] = sigma * (Y - X)
        out[1, c] = X * (rho - Z) - Y
        out[2, c] = X * Y - beta * Z


@nb.njit
def lorenz96_columns(forcing, x, out):  # pragma: no cover - compiled
    """``(x_{i+1} - x_{i-2}) x_{i-1} - x_i + F`` (cyclic, Lorenz 1996) for every column."""
    n, M = x.shape
    for i in range(n):
        ip = (i + 1) % n
        im = (i - 1) % n
        imm = (i - 2) % n
        for c in range(M):
            out[i, c] = (x[ip, c] - x[imm, c]) * x[im, c] - x[i, c] + forcing


_lorenz63_step = rk4_stepper(lorenz63_columns)
_lorenz96_step = rk4_stepper(lorenz96_columns)


@nb.njit(cache=True)
def _columns(x0):  # pragma: no cover - compiled
    M, n = x0.shape
    x = np.empty((n, M))
    for c in range(M):
        for i in range(n):
            x[i, c] = x0[c, i]
    return x, (np.empty((n, M)), np.empty((4, n, M)))


@nb.njit(cache=True)
def lorenz63_rk4(x0, h, n_out, substeps, sigma, rho, beta, out):  # pragma: no cover - compiled
    """RK4 of every row of ``x0`` (M, 3); ``out[:, j]`` (M, n_out, 3) after ``j * substeps``."""
    x, work = _columns(x0)
    params = (sigma, rho, beta)
    for j in range(n_out):
        if j > 0:
            for _ in range(substeps):
                _lorenz63_step(params, x, h, work)
        for c in range(x.shape[1]):
            for i in range(3):
                out[c, j, i] = x[i, c]


@nb.njit(cache=True)
def lorenz96_rk4(x0, h, n_out, substeps, forcing, out):  # pragma: no cover - compiled
    """RK4 of every row of ``x0`` (M, n); ``out[:, j]`` (M, n_out, n) after ``j * substeps``."""
    x, work = _columns(x0)
    for j in range(n_out):
        if j > 0:
            for _ in range(substeps):
                _lorenz96_step(forcing, x, h, work)
        for c in range(x.shape[1]):
            for i in range(x.shape[0]):
                out[c, j, i] = x[i, c]


@nb.njit(cache=True)
def double_well_euler_maruyama(x, h, amp, dw, out, first):  # pragma: no cover - compiled
    """Euler-Maruyama of ``dx = (x - x^3) dt + amp dW`` for every entry of ``x`` (in place).

    ``dw`` (n_chunk, substeps, n_runs) standard normals; ``out[:, first + k]`` gets the state
    after chunk row ``k`` when that index is not negative.
    """
    for k in range(dw.shape[0]):
        for j in range(dw.shape[1]):
            for m in range(x.shape[0]):
                xm = x[m]
                x[m] = xm + (xm - xm * xm * xm) * h + amp * dw[k, j, m]
        if first + k >= 0:
            out[:, first + k] = x
