"""How stiff a surrogate is: its Jacobian as a sparse table, and its largest eigenvalue magnitude.

The automatic substep of :func:`ergodex.integrate.choose_substep` needs the spectral radius of the
Jacobian at states typical of a run. Building dense Jacobians and all their eigenvalues costs
``n**3`` per state, which dominated a 200-variable ``simulate``. Here the Jacobian is built from
the term table in O(active terms) per state (:class:`SparseJacobian`), and its spectral radius is

- computed exactly (dense eigenvalues of the small matrix) up to :data:`DENSE_MAX` variables;
- above that, estimated from the Ritz values of a short Arnoldi process (Jacobian–vector products
  only), multiplied by :data:`RITZ_MARGIN` and never above the Gershgorin bound (the smaller of the
  largest absolute row sum and column sum), which holds for every matrix.

Numerics only: no I/O.

References
----------
.. [1] Saad, Y. (2011). Numerical Methods for Large Eigenvalue Problems, 2nd ed., SIAM, ch. 6
   (Arnoldi's method; Ritz values approximate the outermost eigenvalues first).
.. [2] Horn, R. A. & Johnson, C. R. (2013). Matrix Analysis, 2nd ed., Cambridge University
   Press, sec. 6.1 (Gershgorin discs: the spectral radius is at most any induced matrix norm).
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = [
    "DENSE_MAX",
    "KRYLOV_STEPS",
    "RITZ_MARGIN",
    "SparseJacobian",
    "spectral_radius",
    "states_to_measure",
]

#: Up to this many variables the eigenvalues of the (small) dense Jacobian are computed exactly.
DENSE_MAX = 32
#: Arnoldi steps (the dimension of the Krylov space) for larger models.
KRYLOV_STEPS = 24
#: Krylov estimates cost about ``KRYLOV_STEPS**2 * n`` per state: larger models are measured at
#: fewer states (at least 16), so that choosing a substep stays a few per cent of a run.
_KRYLOV_BUDGET = 1 << 21
#: Factor on the largest Ritz value magnitude. Ritz values approach the outermost eigenvalue from
#: inside the spectrum's hull; 24 steps gave at least 0.93 of the true radius at every state (a
#: Lorenz-96 ring of 200 stations, a random sparse quadratic model of 100 variables) and the
#: largest radius over the states within 0.2 % (rings of 40-400 stations, random models of
#: 40-300 variables), so the factor 1.15 keeps the estimate at or above the true radius
#: (checked in tests/test_stiffness.py; measured here, no published source).
RITZ_MARGIN = 1.15
# Work arrays (states x Jacobian entries, states x Krylov steps x variables) stay near 32 MB.
_WORK_FLOATS = 1 << 22


class SparseJacobian:
    """The Jacobian of a surrogate's deterministic part as entries ``(row, col)`` evaluated at
    many states, built from its term table.

    ``values(x)`` returns an array (M, n_entries): the entry ``(rows[e], cols[e])`` of the
    Jacobian at each state, in O(active terms) work per state. Entries are unique and sorted by
    row, so row sums and Jacobian–vector products are reductions over contiguous slices.
    """

    def __init__(self, surrogate: Any) -> None:
        tables = surrogate.term_tables()
        n = surrogate.n_variables
        kinds = tables["kind"]
        fptr, fvar, fpow = tables["factor_ptr"], tables["factor_var"], tables["factor_pow"]
        cptr, ctarget, cvalue = tables["coef_ptr"], tables["coef_target"], tables["coef_value"]
        # One "derivative" per (active term, variable it depends on): d theta_a / d x_k.
        d_var: list[int] = []  # k
        d_kind: list[int] = []  # 0 monomial, 1 sin, 2 cos
        d_scale: list[float] = []  # exponent p (monomial) or frequency (sin/cos)
        d_factors: list[list[tuple[int, int]]] = []  # monomial: (variable, exponent) of the rest
        e_row: list[int] = []
        e_col: list[int] = []
        e_weight: list[float] = []
        e_deriv: list[int] = []
        for a in range(len(kinds)):
            if kinds[a] == 0:
                factors = list(
                    zip(fvar[fptr[a] : fptr[a + 1]].tolist(), fpow[fptr[a] : fptr[a + 1]].tolist())
                )
                derivs = []
                for k, p in factors:
                    rest = [(j, q - 1 if j == k else q) for j, q in factors]
                    derivs.append((k, 0, float(p), [(j, q) for j, q in rest if q > 0]))
            else:
                derivs = [
                    (int(tables["variable"][a]), int(kinds[a]), float(tables["frequency"][a]), [])
                ]
            for k, kind, scale, rest in derivs:
                d = len(d_var)
                d_var.append(k)
                d_kind.append(kind)
                d_scale.append(scale)
                d_factors.append(rest)
                for c in range(cptr[a], cptr[a + 1]):
                    e_row.append(int(ctarget[c]))
                    e_col.append(k)
                    e_weight.append(float(cvalue[c]))
                    e_deriv.append(d)
        self.n_variables = n
        self._d_var = np.array(d_var, dtype=np.int64)
        self._d_kind = np.array(d_kind, dtype=np.int8)
        self._d_scale = np.array(d_scale, dtype=np.float64)
        width = max([len(f) for f in d_factors], default=0)
        # Padded factor table: variable 0 with exponent 0 contributes a factor 1.
        self._f_var = np.zeros((len(d_var), width), dtype=np.int64)
        self._f_pow = np.zeros((len(d_var), width), dtype=np.float64)
        for d, rest in enumerate(d_factors):
            for f, (j, q) in enumerate(rest):
                self._f_var[d, f], self._f_pow[d, f] = j, q
        # Raw contributions, grouped by their (row, col) position; positions sorted by row.
        row = np.array(e_row, dtype=np.int64)
        col = np.array(e_col, dtype=np.int64)
        position = row * n + col
        order = np.argsort(position, kind="stable")
        self._e_weight = np.array(e_weight, dtype=np.float64)[order]
        self._e_deriv = np.array(e_deriv, dtype=np.int64)[order]
        unique, self._e_start = np.unique(position[order], return_index=True)
        self.rows = (unique // n).astype(np.int64)
        self.cols = (unique % n).astype(np.int64)
        present, self._row_start = np.unique(self.rows, return_index=True)
        self._present_rows = present

    @property
    def n_entries(self) -> int:
        """Number of structurally non-zero Jacobian entries."""
        return len(self.rows)

    def values(self, x: np.ndarray) -> np.ndarray:
        """Entries of the Jacobian at states ``x`` (M, n) -> (M, n_entries)."""
        m = x.shape[0]
        if self.n_entries == 0:
            return np.zeros((m, 0))
        deriv = np.empty((m, len(self._d_var)))
        mono = self._d_kind == 0
        if np.any(mono):
            rest = x[:, self._f_var[mono]] ** self._f_pow[mono]  # (M, D, width); x**0 == 1
            deriv[:, mono] = self._d_scale[mono] * np.prod(rest, axis=2)
        for kind, fn in ((1, np.cos), (2, np.sin)):
            pick = self._d_kind == kind
            if np.any(pick):
                f = self._d_scale[pick]
                sign = 1.0 if kind == 1 else -1.0  # d sin(f x) = f cos(f x); d cos(f x) = -f sin
                deriv[:, pick] = sign * f * fn(f * x[:, self._d_var[pick]])
        contributions = deriv[:, self._e_deriv] * self._e_weight
        return np.add.reduceat(contributions, self._e_start, axis=1)

    def dense(self, values: np.ndarray) -> np.ndarray:
        """Dense Jacobians (M, n, n) from ``values`` (M, n_entries)."""
        n = self.n_variables
        out = np.zeros((values.shape[0], n * n))
        out[:, self.rows * n + self.cols] = values
        return out.reshape(-1, n, n)

    def matvec(self, values: np.ndarray, v: np.ndarray) -> np.ndarray:
        """Jacobian–vector products ``J(x_m) v_m`` (M, n) for entries ``values`` (M, n_entries)."""
        out = np.zeros_like(v)
        if self.n_entries:
            out[:, self._present_rows] = np.add.reduceat(
                values * v[:, self.cols], self._row_start, axis=1
            )
        return out

    def norm_bound(self, values: np.ndarray) -> np.ndarray:
        """Gershgorin bound per state: min(largest absolute row sum, largest column sum) (M,)."""
        m, n = values.shape[0], self.n_variables
        if self.n_entries == 0:
            return np.zeros(m)
        magnitude = np.abs(values)
        by_row = np.add.reduceat(magnitude, self._row_start, axis=1).max(axis=1)
        by_col = np.zeros((n, m))
        np.add.at(by_col, self.cols, magnitude.T)
        return np.minimum(by_row, by_col.max(axis=0))


def _ritz_radius(
    jac: SparseJacobian, values: np.ndarray, steps: int, rng: np.random.Generator
) -> np.ndarray:
    """Largest Ritz value magnitude per state after ``steps`` Arnoldi steps (M,)."""
    m, n = values.shape[0], jac.n_variables
    basis = np.zeros((m, steps + 1, n))
    hess = np.zeros((m, steps + 1, steps))
    start = rng.standard_normal((m, n))
    basis[:, 0] = start / np.linalg.norm(start, axis=1, keepdims=True)
    for j in range(steps):
        w = jac.matvec(values, basis[:, j])
        # classical Gram-Schmidt twice: orthogonal to working precision (Saad, sec. 6.3)
        done = basis[:, : j + 1]
        for _ in range(2):
            h = np.matmul(done, w[:, :, None])  # (M, j + 1, 1)
            w = w - np.matmul(h.transpose(0, 2, 1), done)[:, 0]
            hess[:, : j + 1, j] += h[:, :, 0]
        norm = np.linalg.norm(w, axis=1)
        hess[:, j + 1, j] = norm
        # a breakdown (invariant subspace found) leaves the later columns zero: exact Ritz values
        alive = norm > 1e-12 * np.maximum(1.0, np.abs(hess[:, : j + 2, j]).max(axis=1))
        basis[alive, j + 1] = w[alive] / norm[alive, None]
    ritz = np.linalg.eigvals(hess[:, :steps, :steps])
    return np.abs(ritz).max(axis=1)


def spectral_radius(surrogate: Any, states: np.ndarray, *, seed: int = 0) -> float:
    """Largest eigenvalue magnitude of the Jacobian over ``states`` (finite, shape (M, n)).

    Exact up to :data:`DENSE_MAX` variables; above, ``RITZ_MARGIN`` times the largest Ritz value
    of :data:`KRYLOV_STEPS` Arnoldi steps, capped by the Gershgorin bound. States whose Jacobian
    is not finite are skipped. ``seed`` fixes the Arnoldi start vectors (the result is
    deterministic).
    """
    jac = SparseJacobian(surrogate)
    n = surrogate.n_variables
    if jac.n_entries == 0 or len(states) == 0:
        return 0.0
    dense = n <= DENSE_MAX
    steps = min(n, KRYLOV_STEPS)
    width = jac._f_var.shape[1] + 1
    per_state = max(2 * jac.n_entries + width * len(jac._d_var), n * n if dense else 3 * steps * n)
    batch = max(1, _WORK_FLOATS // per_state)
    rng = np.random.default_rng(seed)
    rho = 0.0
    for begin in range(0, len(states), batch):
        with np.errstate(all="ignore"):
            values = jac.values(states[begin : begin + batch])
        values = values[np.all(np.isfinite(values), axis=1)]
        if not len(values):
            continue
        bound = jac.norm_bound(values)
        if dense:
            matrices = jac.dense(values)
            try:
                radius = np.abs(np.linalg.eigvals(matrices)).max(axis=1)
            except np.linalg.LinAlgError:  # no convergence: the norm bound holds
                radius = bound
        else:
            with np.errstate(all="ignore"):
                radius = np.minimum(bound, RITZ_MARGIN * _ritz_radius(jac, values, steps, rng))
            radius = np.where(np.isfinite(radius), radius, bound)
        rho = max(rho, float(np.max(radius)))
    return rho


def states_to_measure(n_variables: int, max_states: int = 256) -> int:
    """How many sample states :func:`spectral_radius` is worth calling on for ``n_variables``."""
    if n_variables <= DENSE_MAX:
        return max_states
    steps = min(n_variables, KRYLOV_STEPS)
    return max(16, min(max_states, _KRYLOV_BUDGET // (steps * steps * n_variables)))
