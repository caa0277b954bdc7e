"""The noise-floor machinery: reference pieces, their per-piece statistics, pair distances
between samples, and the groups of pieces whose distances make the floor."""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ergodex import stats
from ergodex.exceptions import DataError
from ergodex.group_stats import GroupStatistics, group_statistics, pair_distances
from ergodex.regimes import RegimeSet


@dataclass(frozen=True)
class PieceSettings:
    """What the per-piece statistics need: which statistics, at which lags, sampling and
    Welch segment, on which variables and regimes (a part of the check's plan)."""

    statistics: tuple[str, ...]
    variables: tuple[str, ...]
    dt: float
    max_lag_samples: int
    nperseg: int
    regimes: RegimeSet | None = None
    workers: int = 1  # threads for the statistics; the numbers do not depend on it

    def histogram_only(self) -> PieceSettings:
        """The same settings reduced to the histogram (member agreement, run consistency)."""
        return replace(self, statistics=("histogram",), regimes=None)


def _reference_pieces(reference, min_pieces: int, gap_time: float) -> tuple[np.ndarray, dict]:
    """Equal-length, nearly independent pieces of the reference: (n_pieces, L, n_vars)."""
    from ergodex.series import cut_blocks

    info: dict[str, Any] = {"piece_source": "runs"}
    series = reference
    if reference.n_runs < min_pieces:
        blocks = -(-min_pieces // reference.n_runs)  # ceiling division
        try:
            series = cut_blocks(reference, blocks, gap_time)
        except DataError as exc:
            raise DataError(
                f"{reference.source or 'reference data'}: too short for a noise floor: "
                f"{reference.n_runs} run(s) cannot give {min_pieces} pieces separated by "
                f"{gap_time:.3g} time units ({exc}); supply more or longer runs"
            ) from None
        info = {"piece_source": "blocks", "blocks_per_run": blocks}
    length = min(series.lengths)
    pieces = np.stack([np.asarray(r[:length], float) for r in series.runs])
    info["piece_length_samples"] = int(length)
    info["n_reference_pieces"] = int(pieces.shape[0])
    return pieces, info


def _PieceStats(pieces, settings: PieceSettings, groups=None) -> GroupStatistics:
    """The statistics every row needs, of each group of pieces laid end to end (each piece
    alone without ``groups``), assembled from per-piece parts (:mod:`ergodex.group_stats`).

    ``pieces`` is an array (P, L, n) or a sequence of (L, n) arrays (views: nothing is copied
    as a whole); the result equals the statistics of the concatenated groups to rounding.
    """
    return group_statistics(
        pieces,
        groups,
        statistics=settings.statistics,
        max_lag=settings.max_lag_samples,
        dt=settings.dt,
        nperseg=settings.nperseg,
        regimes=settings.regimes,
        variables=settings.variables,
        workers=settings.workers,
    )


def _acf_pieces(pieces: np.ndarray, max_lag: int) -> np.ndarray:
    """Autocorrelation of each piece separately (P, max_lag + 1, n), as stats.autocorrelation."""
    d = np.ascontiguousarray((pieces - pieces.mean(axis=1, keepdims=True)).transpose(0, 2, 1))
    L = d.shape[2]
    nfft = stats.fast_fft_length(L + max_lag)  # enough padding for lags ≤ max_lag
    f = np.fft.rfft(d, n=nfft, axis=2)
    acov = np.fft.irfft(f.real**2 + f.imag**2, n=nfft, axis=2)[:, :, : max_lag + 1]
    acov = acov.transpose(0, 2, 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return acov / acov[:, :1]


def _pair_distances(
    statistic: str,
    a: GroupStatistics,
    b: GroupStatistics,
    index: tuple[np.ndarray, np.ndarray] | None = None,
) -> np.ndarray:
    """Distances between samples of ``a`` and samples of ``b``: (n_pairs, n_rows).

    ``index`` gives the pairs ``(a[index[0][k]], b[index[1][k]])``; by default every pair.
    Spread over the threads ``a`` was computed with (the numbers do not depend on them).
    """
    return pair_distances(statistic, a, b, index, workers=getattr(a, "workers", 1))


def _reference_groups(n: int, pool: int, rng, max_splits: int = 64):
    """Groups of ``pool`` reference pieces and the disjoint pairs of groups behind the floor.

    ``pool == 1``: every piece is a group and every pair of pieces counts. When the pieces split
    exactly in two (``2 pool == n``) and there are at most ``max_splits`` such splits, all of
    them are used (no extra randomness in the floor); otherwise ``max_splits`` random splits
    (seeded) each give two disjoint groups.
    """
    if pool == 1:
        return [(i,) for i in range(n)], np.triu_indices(n, 1)
    if 2 * pool == n and math.comb(n - 1, pool - 1) <= max_splits:
        # every split once: the group holding piece 0, and its complement
        splits = [
            (tuple(a), tuple(sorted(set(range(n)) - {0, *a[1:]})))
            for a in ((0, *rest) for rest in itertools.combinations(range(1, n), pool - 1))
        ]
    else:
        splits = []
        for _ in range(max_splits):
            perm = rng.permutation(n)
            splits.append(
                (tuple(sorted(perm[:pool].tolist())), tuple(sorted(perm[pool : 2 * pool].tolist())))
            )
    groups: dict[tuple[int, ...], int] = {}
    left = [groups.setdefault(a, len(groups)) for a, _ in splits]
    right = [groups.setdefault(b, len(groups)) for _, b in splits]
    return list(groups), (np.array(left), np.array(right))


def _row_labels(statistic: str, variables, regimes) -> list[str]:
    if statistic in ("occupancy", "residence"):
        return list(regimes.names)
    if statistic == "transitions":
        return ["all regimes"]
    return list(variables)
