"""The noise-floor machinery: reference pieces, their per-piece statistics, pair distances
between samples, and the groups of pieces whose distances make the floor."""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ergodex import stats
from ergodex.exceptions import DataError, SettingsError
from ergodex.regimes import RegimeSet, mean_residence_times, occupancy, transition_matrix


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

    def histogram_only(self) -> PieceSettings:
        """The same settings reduced to the histogram (member agreement, run consistency)."""
        return replace(self, statistics=("histogram",), regimes=None)


# Quantile functions are compared on at most this many probability levels (exact when a piece
# is shorter); the approximation error is far below the sampling noise of a piece.
_MAX_QUANTILE_POINTS = 2000


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


class _PieceStats:
    """The per-piece statistics every row needs, computed once per set of pieces."""

    def __init__(self, pieces: np.ndarray, settings: PieceSettings):
        self.n = pieces.shape[0]
        stats_wanted = settings.statistics
        L = pieces.shape[1]
        if "histogram" in stats_wanted:
            k = min(L, _MAX_QUANTILE_POINTS)
            srt = np.sort(pieces, axis=1)
            idx = np.minimum(np.ceil((np.arange(k) + 0.5) / k * L).astype(int) - 1, L - 1)
            self.qf = srt[:, np.maximum(idx, 0), :]  # (P, K, n)
        if "quantiles" in stats_wanted:
            self.quant = np.quantile(pieces, stats.DEFAULT_QUANTILES, axis=1).transpose(1, 0, 2)
        if "autocorrelation" in stats_wanted:
            self.acf = _acf_pieces(pieces, settings.max_lag_samples)
        if "spectrum" in stats_wanted:
            _, psd = stats.welch_psd(
                np.ascontiguousarray(pieces.transpose(0, 2, 1)), settings.dt, settings.nperseg
            )
            self.psd = psd.transpose(0, 2, 1)  # (P, n_freq, n)
        regimes = settings.regimes
        if regimes is not None:
            nr = regimes.n_regimes
            labels = [regimes.classify(p, settings.variables) for p in pieces]
            self.occ = np.stack([occupancy(lab, nr) for lab in labels])
            if "residence" in stats_wanted:
                self.res = np.stack([mean_residence_times(lab, settings.dt, nr) for lab in labels])
            if "transitions" in stats_wanted:
                self.trans = np.stack([transition_matrix(lab, nr) for lab in labels])


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
    a: _PieceStats,
    b: _PieceStats,
    index: tuple[np.ndarray, np.ndarray] | None = None,
) -> np.ndarray:
    """Distances between samples of ``a`` and samples of ``b``: (n_pairs, n_rows).

    ``index`` gives the pairs ``(a[index[0][k]], b[index[1][k]])``; by default every pair.
    """

    def pairs(x, y, fn):
        out = []
        if index is None:
            # every pair: broadcast a few rows of x against all of y at a time, which avoids
            # copying y for each pair; the chunk keeps the temporary array to a few tens of MB
            per_row = max(1, y[0].size * y.shape[0])
            step = max(1, int(4_000_000 // per_row))
            for s in range(0, x.shape[0], step):
                xa = x[s : s + step]
                d = fn(xa[:, None], y[None, :])
                out.append(d.reshape((-1,) + d.shape[2:]))
            return np.concatenate(out)
        ii, jj = np.ravel(index[0]), np.ravel(index[1])
        for s in range(0, ii.size, 64):
            out.append(fn(x[ii[s : s + 64]], y[jj[s : s + 64]]))
        return np.concatenate(out) if out else np.zeros((0,) + fn(x[:1], y[:1]).shape[1:])

    if statistic == "histogram":
        # Wasserstein-1 between equal-length samples: mean |sorted a − sorted b| (Villani 2009)
        return pairs(a.qf, b.qf, lambda x, y: np.mean(np.abs(x - y), axis=-2))
    if statistic == "quantiles":
        return pairs(a.quant, b.quant, lambda x, y: np.mean(np.abs(x - y), axis=-2))
    if statistic == "autocorrelation":
        return pairs(
            a.acf,
            b.acf,
            lambda x, y: np.sqrt(np.mean((x[..., 1:, :] - y[..., 1:, :]) ** 2, axis=-2)),
        )
    if statistic == "spectrum":

        def l1(x, y):
            return np.sum(np.abs(x - y), axis=-2) / (0.5 * np.sum(x + y, axis=-2))

        return pairs(a.psd, b.psd, l1)
    if statistic == "occupancy":
        return pairs(a.occ[:, :-1], b.occ[:, :-1], lambda x, y: np.abs(x - y))
    if statistic == "residence":
        return pairs(a.res[:, :-1], b.res[:, :-1], lambda x, y: np.abs(x - y))
    if statistic == "transitions":
        return pairs(
            a.trans, b.trans, lambda x, y: np.sqrt(np.sum((x - y) ** 2, axis=(-2, -1)))[..., None]
        )
    raise SettingsError(f"unknown statistic {statistic!r}")  # pragma: no cover - checked in spec


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
