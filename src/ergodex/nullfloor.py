"""The family-wise threshold of a check, from the reference's own null distribution.

A check passes a surrogate when its *largest* row ratio (model distance over the reference's
noise floor) is small enough. How large the largest ratio of a perfect surrogate gets depends on
the shape of the check: more rows give a larger maximum (the maximum of ``k`` independent rows
with distribution ``F`` has distribution ``F^k``), strongly correlated rows behave like one, a
noise floor built from few pieces is itself noisy. A fixed tolerance is right for one shape only.

This module derives the threshold from the data instead. A *replicate* is a whole check played
out where the truth is known: a pseudo-reference (as many pieces as the real reference) and a
pseudo-model (as many groups as the real model) are both drawn from the reference by a moving-
block bootstrap [1]_, and scored through the check's own rows, so the replicate's ratios are
those of a surrogate that is exactly right. To keep the cost near that of the check itself, the
pseudo-model groups of all replicates are drawn from one bootstrap pool of
:data:`MODEL_POOL_FACTOR` times as many groups (their statistics are computed once), each
replicate taking its own random selection; the pseudo-reference is drawn afresh every time (it
carries most of the variation of a ratio: the floor and every value rest on its few pieces).
The ``1 − rate`` quantile of the largest ratio over the replicates is the threshold that rejects
a right surrogate with probability ``rate`` (the *false-reject rate*). The quantile is the
Harrell–Davis estimator [2]_ (a smooth weighted sum of all order statistics), steadier than one
order statistic for a few dozen replicates.

Blocks are a few lag windows long, so the autocorrelation up to the check's largest lag is kept
within blocks; both sides of a replicate are built the same way, so what the joins between blocks
do to a statistic they do to both sides.

Draws are smoothed (a little independent noise is added, :func:`smoothing_bandwidth`): an
unsmoothed bootstrap repeats the record's extreme samples in several pseudo-pieces at once and
so makes the floor of an extreme quantile collapse.

The module is numerics only: the check hands in its scoring as a function, so that the same row
machinery (and nothing written twice) scores the data and the replicates.

References
----------
.. [1] H. R. Künsch, "The jackknife and the bootstrap for general stationary observations",
   Ann. Statist. 17, 1217–1241 (1989) (moving-block bootstrap).
.. [2] F. E. Harrell and C. E. Davis, "A new distribution-free quantile estimator",
   Biometrika 69, 635–640 (1982).
.. [3] B. W. Silverman, *Density Estimation for Statistics and Data Analysis*, Chapman & Hall
   (1986), eq. (3.31).
.. [4] P. Hall, T. J. DiCiccio and J. P. Romano, "On smoothing and the bootstrap", Ann.
   Statist. 17, 692–704 (1989).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import numpy as np

__all__ = [
    "DEFAULT_FALSE_REJECT_RATE",
    "DEFAULT_REPLICATES",
    "NullThreshold",
    "block_bootstrap",
    "block_length",
    "harrell_davis_quantile",
    "quantile_of_largest",
]

#: The false-reject rate a check targets by default: a right surrogate fails one check in 20.
#: (common practice, no source: the conventional 5 % significance level)
DEFAULT_FALSE_REJECT_RATE = 0.05
#: Replicates of the null distribution per check (measured in ``benchmarks/calibration.py``).
DEFAULT_REPLICATES = 40
#: Block length of the bootstrap in lag windows: a block keeps every lag the check compares
#: for most of its products (a fraction ≈ 1/BLOCK_LAGS of the products at the largest lag cross a
#: join).
BLOCK_LAGS = 4
#: Floor pairs scored per replicate (of the check's own splits): the reference side of a
#: replicate still has as many pieces as the real reference, only fewer of its splits are used.
MAX_REPLICATE_SPLITS = 4
#: The pool of pseudo-model groups shared by the replicates holds this many times the groups
#: of one replicate.
MODEL_POOL_FACTOR = 3

METHOD = (
    "moving-block bootstrap of the reference (Künsch 1989): pseudo-reference and pseudo-model "
    "drawn from the reference and scored through the check's own rows; threshold = the "
    "Harrell–Davis (1 − rate) quantile of the largest row ratio over the replicates"
)


def block_length(piece_length: int, max_lag_samples: int) -> int:
    """Samples per bootstrap block: :data:`BLOCK_LAGS` lag windows, at most one piece."""
    return int(np.clip(BLOCK_LAGS * max(1, int(max_lag_samples)), 2, max(2, piece_length)))


def block_bootstrap(
    pieces: np.ndarray, n_pieces: int, length: int, block: int, rng: np.random.Generator
) -> np.ndarray:
    """``n_pieces`` pseudo-pieces of ``length`` samples, each blocks of ``pieces`` laid end to end.

    Moving-block bootstrap [1]_: each block starts at a uniformly drawn sample of a uniformly
    drawn piece (blocks never cross from one piece into another, so no gap or run boundary is
    bridged inside a block).

    Parameters
    ----------
    pieces : (n, L, n_vars) array
    n_pieces, length : int
        Shape of the draw: (n_pieces, length, n_vars).
    block : int
        Samples per block (≤ L).
    rng : numpy.random.Generator
    """
    pieces = np.asarray(pieces, float)
    n, L, _ = pieces.shape
    block = int(min(max(1, block), L))
    per_piece = -(-int(length) // block)  # ceiling division
    which = rng.integers(0, n, size=(n_pieces, per_piece))
    start = rng.integers(0, L - block + 1, size=(n_pieces, per_piece))
    rows = start[..., None] + np.arange(block)
    drawn = pieces[which[..., None], rows]  # (n_pieces, per_piece, block, n_vars)
    return drawn.reshape(n_pieces, per_piece * block, -1)[:, :length]


def smoothing_bandwidth(n_samples: int) -> float:
    """Standard deviation of the noise added to bootstrap draws, in units of the data's.

    Silverman's rule of thumb ``0.9 n^(-1/5)`` [3]_. Without it, the bootstrap copies the
    record's extreme samples into several pseudo-pieces at once, so two pseudo-groups can share
    their largest value exactly and the noise floor of an extreme quantile collapses, which a
    real record never does (the bootstrap of extremes is known to fail unsmoothed [4]_).
    """
    return 0.9 * max(1, int(n_samples)) ** -0.2


def _covariance_factor(x: np.ndarray) -> np.ndarray:
    """``F`` with ``F Fᵀ`` the covariance of the rows of ``x``; columns by decreasing variance,
    each with its largest entry positive (so that the same direction gives the same column)."""
    w, v = np.linalg.eigh(np.atleast_2d(np.cov(x, rowvar=False)))
    order = np.argsort(w)[::-1]
    w, v = np.clip(w[order], 0.0, None), v[:, order]
    v = v * np.where(v[np.argmax(np.abs(v), axis=0), np.arange(v.shape[1])] < 0, -1.0, 1.0)
    return v * np.sqrt(w)


def harrell_davis_quantile(x: np.ndarray, q: float) -> float:
    """The Harrell–Davis estimate [2]_ of the ``q`` quantile of the sample ``x``.

    A weighted sum of the order statistics ``x_(i)`` with weights
    ``I_{i/n}(a, b) − I_{(i−1)/n}(a, b)``, ``a = q (n + 1)``, ``b = (1 − q)(n + 1)``
    (``I`` the regularised incomplete beta function). Non-finite values sort last (an infinite
    ratio is a replicate that rejects at any finite threshold).
    """
    from scipy.special import betainc

    x = np.asarray(x, float).ravel()
    x = np.sort(np.where(np.isnan(x), np.inf, x))
    n = x.size
    if n == 0:
        return float("nan")
    if n == 1:
        return float(x[0])
    a, b = q * (n + 1), (1.0 - q) * (n + 1)
    cdf = betainc(a, b, np.arange(n + 1) / n)
    w = np.diff(cdf)
    finite = np.isfinite(x)
    if not finite.all():
        # weight on infinite order statistics: the quantile is infinite only if it dominates
        if w[~finite].sum() > 0.5:
            return float("inf")
        w = w[finite] / w[finite].sum()
        x = x[finite]
    return float(np.dot(w, x))


def quantile_of_largest(row_ratios: np.ndarray, rate: float) -> float:
    """The ``1 − rate`` quantile of the largest row ratio over replicates.

    Parameters
    ----------
    row_ratios : (n_replicates, n_rows) array
        Each replicate's ratio per row; NaN ratios are ignored within a replicate.
    rate : float in (0, 1)
        The false-reject rate targeted.

    Returns
    -------
    float
        The threshold ``t`` with ``P(max_rows ratio > t) ≈ rate`` under the replicates'
        distribution (Harrell–Davis estimate).
    """
    r = np.asarray(row_ratios, float)
    if r.ndim != 2 or r.shape[0] == 0:
        raise ValueError(f"row_ratios must be (n_replicates, n_rows); got shape {r.shape}")
    return harrell_davis_quantile(_largest(r), 1.0 - float(rate))


def _largest(row_ratios: np.ndarray) -> np.ndarray:
    """Each replicate's largest ratio, ignoring NaN rows (all NaN: NaN, which sorts last)."""
    r = np.asarray(row_ratios, float)
    filled = np.where(np.isnan(r), -np.inf, r).max(axis=1)
    return np.where(np.isnan(r).all(axis=1), np.nan, filled)


class NullThreshold:
    """The family-wise threshold of a check from replicates of a right surrogate.

    Parameters
    ----------
    false_reject_rate : float, default 0.05
        Probability that a surrogate whose statistics are those of the reference fails.
    n_replicates : int, default :data:`DEFAULT_REPLICATES`
    floor : float, optional
        Smallest threshold returned (None: no floor).
    seed : int, default 0
        Seeds the bootstrap draws.

    Attributes (after :meth:`fit`)
    ------------------------------
    row_ratios_ : (n_replicates, n_rows) array
    largest_ratios_ : (n_replicates,) array
    quantile_ : float
        The Harrell–Davis ``1 − false_reject_rate`` quantile of ``largest_ratios_``.
    threshold_ : float
        ``max(quantile_, floor)``.
    block_ : int
        Samples per bootstrap block.
    smoothing_ : (n_vars,) array
        Standard deviation of the noise added to every bootstrap draw (smoothed bootstrap: the
        data's covariance times :func:`smoothing_bandwidth` squared).
    """

    def __init__(
        self,
        *,
        false_reject_rate: float = DEFAULT_FALSE_REJECT_RATE,
        n_replicates: int = DEFAULT_REPLICATES,
        floor: float | None = None,
        seed: int = 0,
    ) -> None:
        self.false_reject_rate = false_reject_rate
        self.n_replicates = n_replicates
        self.floor = floor
        self.seed = seed

    def fit(
        self,
        pieces: np.ndarray,
        prepare_model: Callable[[np.ndarray], Any],
        score: Callable[[np.ndarray, Any, np.ndarray], np.ndarray],
        *,
        n_model_groups: int,
        pool: int,
        max_lag_samples: int,
    ) -> NullThreshold:
        """Draw the replicates and set the threshold.

        Parameters
        ----------
        pieces : (n, L, n_vars) array
            The reference pieces of the check.
        prepare_model : callable(groups) -> prepared
            Computes whatever the scoring needs of the pool of pseudo-model groups
            ((n_pool, pool·L, n_vars), once).
        score : callable(pseudo_reference, prepared, chosen) -> (n_rows,) ratios
            The check's own scoring of ``pseudo_reference`` ((n, L, n_vars) pieces) against the
            pool's groups ``chosen`` (``n_model_groups`` indices).
        n_model_groups, pool : int
            As in the check (the model side of a replicate has as many groups of as many
            pieces).
        max_lag_samples : int
            The check's largest autocorrelation lag (sets the block length).
        """
        rate = float(self.false_reject_rate)
        if not 0.0 < rate < 1.0:
            raise ValueError(f"false_reject_rate must be between 0 and 1; got {rate!r}")
        if int(self.n_replicates) < 2:
            raise ValueError(f"n_replicates must be at least 2; got {self.n_replicates!r}")
        pieces = np.asarray(pieces, float)
        n, L, n_vars = pieces.shape
        self.block_ = block_length(L, max_lag_samples)
        rng = np.random.default_rng(self.seed)
        factor = smoothing_bandwidth(n * L) * _covariance_factor(pieces.reshape(-1, n_vars))
        self.smoothing_ = np.sqrt(np.sum(factor**2, axis=1))
        draws = iter(range(1 << 30))

        def draw(count: int) -> np.ndarray:
            x = block_bootstrap(pieces, count, L, self.block_, rng)
            # a generator per draw, variable-major: the noise along the data's first principal
            # direction is the same numbers for any number of variables
            noise = np.random.default_rng([int(self.seed), 1, next(draws)])
            z = noise.standard_normal((n_vars, count, L))
            return x + np.einsum("kpl,ik->pli", z, factor)

        n_pool = MODEL_POOL_FACTOR * int(n_model_groups)
        prepared = prepare_model(draw(n_pool * pool).reshape(n_pool, pool * L, n_vars))
        out = []
        for _ in range(int(self.n_replicates)):
            reference = draw(n)
            chosen = np.sort(rng.choice(n_pool, size=int(n_model_groups), replace=False))
            out.append(np.asarray(score(reference, prepared, chosen), float))
        self.row_ratios_ = np.array(out, float)
        self.largest_ratios_ = _largest(self.row_ratios_)
        self.quantile_ = quantile_of_largest(self.row_ratios_, rate)
        floor = -math.inf if self.floor is None else float(self.floor)
        self.threshold_ = float(max(self.quantile_, floor))
        return self

    def to_dict(self) -> dict:
        """The scorecard's ``threshold`` block."""
        return {
            "false_reject_rate": float(self.false_reject_rate),
            "threshold": self.threshold_,
            "null_quantile": self.quantile_,
            "floor": None if self.floor is None else float(self.floor),
            "replicates": int(self.n_replicates),
            "block_samples": int(self.block_),
            "smoothing": [float(h) for h in self.smoothing_],
            "null_median": float(np.nanmedian(self.largest_ratios_)),
            "seed": int(self.seed),
            "method": METHOD,
        }
