"""Quadratic drift whose quadratic part conserves energy: a constrained least-squares fit.

For a drift ``fᵢ(x) = cᵢ + Σⱼ Lᵢⱼ xⱼ + Qᵢ(x)`` with ``Qᵢ`` quadratic, the quadratic part moves
energy ``½ Σ xᵢ²`` between variables without making or destroying it when ``Σᵢ xᵢ Qᵢ(x) = 0``
for every ``x`` — as the advective terms of a Galerkin model of an incompressible flow do. A
model fitted without that constraint usually breaks it a little, and the broken part can feed
energy into the modes without bound (quadratic models that blow up); with it, boundedness
hinges on the linear part alone (Schlegel & Noack 2015). ``Σᵢ xᵢ Qᵢ(x)`` is a cubic polynomial,
so the identity is linear in the coefficients: every cubic monomial's coefficient must vanish,
e.g. ``Q₁(x₁x₂) + Q₂(x₁²) = 0`` for ``x₁²x₂`` and ``Q₁(x₂x₃) + Q₂(x₁x₃) + Q₃(x₁x₂) = 0`` for
``x₁x₂x₃``. The fit minimises the squared tendency residual over the null space of those
constraints (all outputs at once, since the constraints tie them together).

Numerics only: no I/O.

References
----------
.. [1] M. Schlegel and B. R. Noack, "On long-term boundedness of Galerkin models",
   J. Fluid Mech. 765, 325-352 (2015).
.. [2] G. H. Golub and C. F. Van Loan, Matrix Computations, 4th ed., Johns Hopkins (2013),
   section 6.2 -- least squares with linear equality constraints by the null-space method.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from scipy.linalg import null_space

__all__ = ["energy_constraints", "energy_preserving_regression", "quadratic_energy_rate"]


def energy_constraints(terms: Sequence) -> np.ndarray:
    """Rows ``A`` with ``A · vec(Ξ) = 0`` ⇔ the degree-2 part of ``Ξ`` conserves energy.

    Parameters
    ----------
    terms : sequence of Term
        Monomial terms (``powers`` tuples of length n); the drift of variable i is
        ``Σₜ Ξ[i, t] · termₜ(x)``.

    Returns
    -------
    ndarray (n_cubic_monomials, n · n_terms)
        One row per cubic monomial ``xᵢ · termₜ`` that can arise, acting on ``Ξ`` flattened
        row by row (variable-major). Terms of other degrees get zero columns.
    """
    powers = [tuple(int(p) for p in t.powers) for t in terms]
    n = len(powers[0]) if powers else 0
    n_terms = len(powers)
    rows: dict[tuple[int, ...], int] = {}
    entries: list[tuple[int, int]] = []
    for t, p in enumerate(powers):
        if sum(p) != 2:
            continue
        for i in range(n):
            cubic = list(p)
            cubic[i] += 1
            row = rows.setdefault(tuple(cubic), len(rows))
            entries.append((row, i * n_terms + t))
    A = np.zeros((len(rows), n * n_terms))
    for row, column in entries:
        A[row, column] = 1.0
    return A


def quadratic_energy_rate(coefficients: np.ndarray, terms: Sequence, X: np.ndarray) -> np.ndarray:
    """``Σᵢ xᵢ Qᵢ(x)`` at each row of ``X``: the energy the quadratic part makes per unit time."""
    X = np.atleast_2d(np.asarray(X, dtype=float))
    rate = np.zeros(X.shape[0])
    for t, term in enumerate(terms):
        p = np.asarray(term.powers)
        if p.sum() != 2:
            continue
        value = np.prod(X**p, axis=1)
        rate += value * (X @ coefficients[:, t])
    return rate


def energy_preserving_regression(
    Theta: np.ndarray, Y: np.ndarray, terms: Sequence, ridge: float
) -> np.ndarray:
    """Ridge least squares ``Y ≈ Θ Ξᵀ`` subject to the energy constraints of ``terms``.

    The same objective as :func:`ergodex.fitting.quadratic_noise.ridge_regression` (columns of
    Θ scaled to unit RMS, penalty ``ridge · N`` on the scaled coefficients), minimised over the
    null space of :func:`energy_constraints` (null-space method, Golub & Van Loan §6.2).

    Returns
    -------
    ndarray (n_targets, n_terms)
    """
    n_rows, n_terms = Theta.shape
    n = Y.shape[1]
    scale = np.sqrt(np.mean(Theta**2, axis=0))
    scale[scale == 0] = 1.0
    A = Theta / scale
    gram = A.T @ A + ridge * n_rows * np.eye(n_terms)
    right = A.T @ Y  # (n_terms, n)
    # Constraints on the scaled coefficients Ξ̃ = Ξ · scale (per column).
    constraints = energy_constraints(terms) / np.tile(scale, n)
    if constraints.shape[0] == 0:
        solution = np.linalg.solve(gram, right)
        return (solution / scale[:, None]).T
    basis = null_space(constraints)  # (n · n_terms, k), orthonormal
    # Objective Σᵢ ξ̃ᵢᵀ G ξ̃ᵢ − 2 ξ̃ᵢᵀ rᵢ with vec(Ξ̃) = basis · η: block-diagonal G.
    k = basis.shape[1]
    blocks = basis.reshape(n, n_terms, k)
    reduced = basis.T @ (gram @ blocks).reshape(n * n_terms, k)  # Σᵢ Bᵢᵀ G Bᵢ
    rhs = basis.T @ right.T.ravel()  # Σᵢ Bᵢᵀ rᵢ
    eta = np.linalg.lstsq(reduced, rhs, rcond=None)[0]
    scaled = (basis @ eta).reshape(n, n_terms)
    return scaled / scale[None, :]
