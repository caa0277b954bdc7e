"""Area-weighted EOF analysis of field anomalies, and how many modes to keep.

Each valid point's anomaly is multiplied by the square root of its area weight (cell area, or
cos latitude), so that the covariance the SVD diagonalises is the area-weighted one and a mode's
variance fraction is its share of the area-integrated variance [1]_. Modes are kept by a variance
fraction, a fixed count, or the North et al. rule of thumb [2]_: a mode is kept while its
eigenvalue stands clear of its neighbours by more than its sampling error
``λ sqrt(2 / n)``. Large grids go through a randomized SVD [3]_ (scikit-learn's
``randomized_svd``) that never forms the full decomposition; a lazy (dask) array goes through
the same algorithm streamed over its row chunks (one pass per product with the matrix).

References
----------
.. [1] H. von Storch and F. W. Zwiers, *Statistical Analysis in Climate Research*, Cambridge
   University Press (1999), ch. 13.
.. [2] G. R. North, T. L. Bell, R. F. Cahalan and F. J. Moeng, "Sampling errors in the
   estimation of empirical orthogonal functions", Mon. Wea. Rev. 110, 699–706 (1982).
.. [3] N. Halko, P. G. Martinsson and J. A. Tropp, "Finding structure with randomness",
   SIAM Review 53, 217–288 (2011).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, cast

import numpy as np

from ergodex.exceptions import DataError, SettingsError

__all__ = ["RULES", "EOFResult", "north_mode_count", "weighted_eof"]

RULES = ("variance", "count", "north")
#: Above this many matrix entries (samples × points) the automatic solver is randomized.
RANDOMIZED_ABOVE = 20_000_000
#: Modes computed when the count is chosen from the spectrum by a randomized solver.
_MAX_SEARCH_MODES = 100


@dataclass(frozen=True)
class EOFResult:
    """Leading EOFs of weighted anomalies.

    Attributes
    ----------
    components : ndarray (n_modes, n_points)
        Orthonormal patterns in weighted space (rows of V^T).
    singular_values : ndarray (n_computed,)
        Leading singular values (at least ``n_modes`` of them).
    total_variance : float
        Sum of squares of the weighted anomalies (the denominator of every fraction).
    variance_fraction : ndarray (n_modes,)
        Share of total weighted variance of each kept mode.
    solver : str
    """

    components: np.ndarray
    singular_values: np.ndarray
    total_variance: float
    variance_fraction: np.ndarray
    solver: str

    @property
    def n_modes(self) -> int:
        return int(self.components.shape[0])


def north_mode_count(eigenvalues: np.ndarray, n_samples: int) -> int:
    """Leading modes separated from their neighbours by more than North's sampling error.

    ``δλ_k = λ_k sqrt(2 / n)`` (North et al. 1982, eq. 24); mode k counts while
    ``λ_k − λ_{k+1} > δλ_k``. Returns at least 1.
    """
    lam = np.asarray(eigenvalues, dtype=np.float64)
    err = lam * np.sqrt(2.0 / n_samples)
    k = 0
    while k + 1 < lam.size and lam[k] - lam[k + 1] > err[k]:
        k += 1
    return max(1, k)


def _check(rule: str, n_modes: int | None, variance: float | None) -> None:
    if rule not in RULES:
        raise SettingsError(f"mode rule must be one of {list(RULES)}; got {rule!r}")
    if rule == "count" and (
        isinstance(n_modes, bool) or not isinstance(n_modes, (int, np.integer)) or n_modes < 1
    ):
        raise SettingsError(f"--modes must be an integer ≥ 1; got {n_modes!r}")
    if rule == "variance" and not (isinstance(variance, (int, float)) and 0 < variance <= 1):
        raise SettingsError(f"--variance must be a fraction in (0, 1]; got {variance!r}")


def weighted_eof(
    anomalies: Any,
    weights: np.ndarray,
    *,
    rule: str = "variance",
    n_modes: int | None = None,
    variance: float | None = 0.9,
    max_modes: int | None = None,
    solver: str = "auto",
    seed: int = 0,
    overwrite: bool = False,
) -> EOFResult:
    """Leading area-weighted EOFs of anomalies (n_samples, n_points), centred in time already.

    Parameters
    ----------
    anomalies : ndarray or dask array (n_samples, n_points)
    weights : ndarray (n_points,)
        Area weights; the anomalies are multiplied by ``sqrt(weights)``.
    rule : {"variance", "count", "north"}
    n_modes : int, for ``rule="count"``
    variance : float, for ``rule="variance"``: fewest modes reaching this share.
    max_modes : int, optional
        Upper bound on the count chosen by ``variance`` or ``north``.
    solver : {"auto", "full", "randomized"}
        ``auto``: full SVD for small matrices, randomized above :data:`RANDOMIZED_ABOVE`
        entries; dask arrays always use the streamed randomized SVD (:func:`_lazy_svd`).
    seed : int
        Seeds the randomized solvers.
    overwrite : bool, default False
        Weight a numpy ``anomalies`` in place instead of a copy (saves one copy of the field).
    """
    _check(rule, n_modes, variance)
    if solver not in ("auto", "full", "randomized"):
        raise SettingsError(f"solver must be auto, full or randomized; got {solver!r}")
    sqrt_w = np.sqrt(np.asarray(weights, dtype=np.float64))
    n, p = anomalies.shape
    if n < 2:
        raise DataError(f"{n} sample(s) cannot give EOFs; need at least 2")
    lazy = not isinstance(anomalies, np.ndarray)
    limit = min(n, p) if max_modes is None else min(n, p, int(max_modes))
    if rule == "count" and n_modes > min(n, p):
        raise SettingsError(f"--modes {n_modes} exceeds min(samples, points) = {min(n, p)}")
    # _check has made n_modes an integer for the count rule
    want = int(cast(int, n_modes)) if rule == "count" else min(limit, _MAX_SEARCH_MODES)
    if lazy:
        s, vt, total, used = _lazy_svd(anomalies, sqrt_w, want, seed)
    else:
        if overwrite and anomalies.dtype == np.float64:
            aw = anomalies
            aw *= sqrt_w
        else:
            aw = anomalies * sqrt_w
        total = float(np.einsum("ij,ij->", aw, aw))
        big = n * p > RANDOMIZED_ABOVE
        if solver == "full" or (solver == "auto" and not big) or want >= min(n, p):
            _, s, vt = np.linalg.svd(aw, full_matrices=False)
            used = "full"
        else:
            from sklearn.utils.extmath import randomized_svd

            _, s, vt = randomized_svd(aw, want, n_oversamples=20, n_iter=5, random_state=seed)
            used = "randomized"
    if not total > 0:
        raise DataError("the anomalies have zero variance everywhere; nothing to reduce")
    fractions = s**2 / total
    if rule == "count":
        assert n_modes is not None  # checked by _check
        k = int(n_modes)
    elif rule == "variance":
        assert variance is not None  # checked by _check
        reach = np.flatnonzero(np.cumsum(fractions) >= variance - 1e-12)
        k = int(reach[0]) + 1 if reach.size else s.size
    else:
        k = north_mode_count(s**2 / (n - 1), n)
    k = max(1, min(k, limit, s.size))
    return EOFResult(
        components=np.ascontiguousarray(vt[:k]),
        singular_values=s,
        total_variance=total,
        variance_fraction=fractions[:k],
        solver=used,
    )


def _lazy_svd(anomalies, sqrt_w, want: int, seed: int, n_iter: int = 4, oversample: int = 20):
    """Randomized SVD (Halko et al. 2011, algorithm 4.4) of a dask array, one row chunk at a time.

    Every product with the matrix is its own pass over the row chunks, each computed and
    dropped before the next is read, so memory holds a chunk plus (n_samples + n_points) x
    (k + oversampling) numbers, never the matrix: a file larger than memory goes through. Each
    pass rereads the file (2 n_iter + 2 passes).
    """
    n, p = anomalies.shape
    ell = min(want + oversample, n, p)
    rows = np.cumsum((0,) + tuple(anomalies.chunks[0]))

    def blocks():
        for i in range(len(rows) - 1):
            yield rows[i], rows[i + 1], np.asarray(anomalies.blocks[i].compute()) * sqrt_w

    rng = np.random.default_rng(seed)
    omega = rng.standard_normal((p, ell))
    y = np.empty((n, ell))
    total = 0.0
    for a, b, blk in blocks():  # Y = A Ω, and the total sum of squares
        y[a:b] = blk @ omega
        total += float(np.einsum("ij,ij->", blk, blk))
    q, _ = np.linalg.qr(y)
    for _ in range(n_iter):  # power iterations, re-orthonormalised
        z = np.zeros((p, ell))
        for a, b, blk in blocks():
            z += blk.T @ q[a:b]
        z, _ = np.linalg.qr(z)
        for a, b, blk in blocks():
            y[a:b] = blk @ z
        q, _ = np.linalg.qr(y)
    bt = np.zeros((p, ell))  # B^T = A^T Q
    for a, b, blk in blocks():
        bt += blk.T @ q[a:b]
    _, s, vt = np.linalg.svd(bt.T, full_matrices=False)
    return s[:want], vt[:want], total, "streamed-randomized"
