"""Statistics of pooled groups of pieces, assembled from parts computed once per piece.

A check compares *groups*: several equal-length pieces laid end to end. The noise floor draws
its groups from a handful of reference pieces (8 pieces give 70 overlapping groups of 4), so
computing every group's statistics on its own copy repeats the same work and holds tens of
copies of the data at once. Here each piece's additive parts are computed once and each
group's statistics are assembled from them; the results equal the statistics of the
concatenated group (to rounding):

- **autocorrelation**: sums of lagged products within each piece (one FFT per piece), the
  products that straddle each join between consecutive pieces (the last ``max_lag`` samples of
  one piece against the first ``max_lag`` of the next), and the partial sums that turn
  products about a common centre into products about the group's own mean;
- **Welch spectra**: sums of segment periodograms inside each piece (one sum per alignment of
  the segment grid, which depends on the piece's place in the group) plus the segments that
  straddle the joins;
- **quantile function and quantiles**: order statistics of the union of the group's pieces,
  found in one sort of all pieces per variable with block counts per piece (pieces shared by
  many groups), or by sorting each group's pieces together (groups that share no piece);
- **regimes**: each piece's episodes (label, length), joined across the boundaries, give the
  occupancy, mean residence times and jump-chain transitions of the group.

Work is spread over threads (numpy's FFT and sort release the interpreter lock), with BLAS
pinned to one thread inside; ``workers=1`` computes the same numbers in the calling thread.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Sequence
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import numpy as np

from ergodex import stats
from ergodex.exceptions import SettingsError

__all__ = [
    "MAX_QUANTILE_POINTS",
    "GroupStatistics",
    "default_workers",
    "group_statistics",
    "resolve_workers",
    "thread_map",
]

#: Quantile functions are compared on at most this many probability levels (exact when a
#: group is shorter); the approximation error is far below the sampling noise of a group.
MAX_QUANTILE_POINTS = 2000
# Order statistics of shared pieces: positions of the joint sort are counted per piece at
# every _BLOCK-th position, and the last block is resolved sample by sample.
_BLOCK = 16
# Numbers in one temporary array of pair distances (8 MB of float64).
_PAIR_BLOCK = 1_000_000
# Welch segments transformed at once inside one piece (bounds the temporary arrays).
_SEGMENT_BATCH = 2048


# ---------------------------------------------------------------------------------------------
# Threads
# ---------------------------------------------------------------------------------------------


def default_workers() -> int:
    """Cores this process may run on (the default number of threads for the statistics)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - platforms without sched_getaffinity
        return max(1, os.cpu_count() or 1)


def resolve_workers(workers: int | None) -> int:
    """``workers`` as a positive thread count; None means :func:`default_workers`."""
    if workers is None:
        return default_workers()
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 1:
        raise SettingsError(f"workers must be a positive integer; got {workers!r}")
    return int(workers)


def thread_map(fn: Callable[[Any], Any], items: Iterable[Any], workers: int | None) -> list:
    """``[fn(x) for x in items]``, over ``workers`` threads with BLAS pinned to one thread.

    numpy's FFT, sort and element-wise loops release the interpreter lock, so threads use
    every core; BLAS's own threads would then compete with them (and hurt under load).
    """
    items = list(items)
    n = min(resolve_workers(workers), len(items))
    if n <= 1:
        return [fn(x) for x in items]
    with _blas_controller().limit(limits=1, user_api="blas"), ThreadPoolExecutor(n) as pool:
        return list(pool.map(fn, items))


_CONTROLLER: Any = None


def _blas_controller() -> Any:
    """threadpoolctl's view of the loaded BLAS libraries, made once: making it scans every
    loaded library (about 10 ms), limiting through it then costs microseconds."""
    global _CONTROLLER
    if _CONTROLLER is None:
        from threadpoolctl import ThreadpoolController

        _CONTROLLER = ThreadpoolController()
    return _CONTROLLER


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


class GroupStatistics:
    """Per-group statistics, one leading entry per group.

    Attributes (present when the statistic was asked for): ``qf`` (G, K, n) quantile function
    at ``K = min(group length, MAX_QUANTILE_POINTS)`` midpoints; ``quant`` (G, levels, n);
    ``acf`` (G, max_lag + 1, n); ``psd`` (G, n_freq, n); ``occ`` (G, regimes + 1); ``res``
    (G, regimes + 1) mean residence times; ``trans`` (G, regimes + 1, regimes + 1).
    """

    n: int
    qf: np.ndarray
    quant: np.ndarray
    acf: np.ndarray
    psd: np.ndarray
    occ: np.ndarray
    res: np.ndarray
    trans: np.ndarray

    def __init__(self, n: int, workers: int | None = 1):
        self.n = int(n)
        self.workers = workers  # threads for distances to other groups (same numbers for any)


# ---------------------------------------------------------------------------------------------
# The whole computation
# ---------------------------------------------------------------------------------------------


def group_statistics(
    pieces: Sequence[np.ndarray] | np.ndarray,
    groups: Sequence[Sequence[int]] | None = None,
    *,
    statistics: Sequence[str],
    max_lag: int = 1,
    dt: float = 1.0,
    nperseg: int = 8,
    regimes=None,
    variables: Sequence[str] = (),
    quantile_levels: Sequence[float] = stats.DEFAULT_QUANTILES,
    workers: int | None = 1,
) -> GroupStatistics:
    """Statistics of each group of pieces laid end to end, from per-piece parts.

    Parameters
    ----------
    pieces : array (P, L, n) or sequence of P arrays (L, n)
        Equal-length pieces (views are fine: nothing is copied as a whole).
    groups : sequence of sequences of piece indices, optional
        Each group's pieces in the order they are laid end to end; default each piece alone.
    statistics : names among histogram, quantiles, autocorrelation, spectrum, occupancy,
        residence, transitions (the regime ones only with ``regimes``).
    max_lag, dt, nperseg
        Largest autocorrelation lag (samples, below the piece length), sampling interval and
        Welch segment length (at most the piece length).
    regimes : RegimeSet, optional
        Classifies states for the regime statistics (occupancy always, with regimes).
    variables : names of the columns (for ``regimes.classify``).
    workers : threads (None: every core).

    Returns
    -------
    GroupStatistics
        Equal (to rounding) to the statistics of ``np.concatenate([pieces[i] for i in g])``:
        :func:`ergodex.stats.autocorrelation` of one run, :func:`ergodex.stats.welch_psd`,
        ``numpy.quantile`` and the regime functions of :mod:`ergodex.regimes`.
    """
    pieces = list(pieces) if not isinstance(pieces, np.ndarray) else list(pieces)
    if not pieces:
        raise SettingsError("no pieces to compute statistics of")
    L, n_vars = pieces[0].shape
    if any(p.shape != (L, n_vars) for p in pieces):
        raise SettingsError("pieces must all have the same shape")
    groups = [tuple(int(i) for i in g) for g in (groups or [(i,) for i in range(len(pieces))])]
    if not groups or any(len(g) == 0 for g in groups):
        raise SettingsError("every group needs at least one piece")
    used = sorted({i for g in groups for i in g})
    out = GroupStatistics(len(groups), workers)
    wanted = set(statistics)
    if wanted & {"histogram", "quantiles"}:
        qf, quant = _order_statistics(
            pieces, groups, quantile_levels, "histogram" in wanted, workers
        )
        if "histogram" in wanted:
            out.qf = qf
        if "quantiles" in wanted:
            out.quant = quant
    if "autocorrelation" in wanted:
        out.acf = _group_acf(pieces, groups, used, int(max_lag), workers)
    if "spectrum" in wanted:
        out.psd = _group_psd(pieces, groups, float(dt), int(nperseg), workers)
    if regimes is not None:
        occ, res, trans = _group_regimes(
            pieces, groups, used, regimes, tuple(variables), float(dt), wanted, workers
        )
        out.occ = occ
        if "residence" in wanted:
            out.res = res
        if "transitions" in wanted:
            out.trans = trans
    return out


# ---------------------------------------------------------------------------------------------
# Order statistics: quantile function and quantiles
# ---------------------------------------------------------------------------------------------


def _ranks(n_total: int, levels: Sequence[float], with_qf: bool):
    """The 0-based ranks needed: quantile-function midpoints, then each level's two neighbours.

    Returns ``(ranks, k, lower_rank, gamma)``; ``numpy.quantile``'s linear rule interpolates
    between ranks ``floor(q (N − 1))`` and the next with weight ``gamma``.
    """
    k = min(n_total, MAX_QUANTILE_POINTS) if with_qf else 0
    idx = np.minimum(np.ceil((np.arange(k) + 0.5) / k * n_total).astype(int) - 1, n_total - 1)
    qf_ranks = np.maximum(idx, 0)
    lv = np.asarray(levels, float)
    virtual = lv * (n_total - 1)
    lower = np.floor(virtual).astype(int)
    upper = np.minimum(lower + 1, n_total - 1)
    gamma = virtual - lower
    return np.concatenate([qf_ranks, lower, upper]), k, gamma


def _lerp(a: np.ndarray, b: np.ndarray, t: np.ndarray) -> np.ndarray:
    """numpy's own interpolation between neighbouring order statistics (``numpy.quantile``)."""
    diff = b - a
    out = a + diff * t
    return np.where(t >= 0.5, b - diff * (1.0 - t), out)


def _order_statistics(pieces, groups, levels, with_qf: bool, workers):
    """(qf (G, K, n) or None, quantiles (G, levels, n)) of every group."""
    L, n_vars = pieces[0].shape
    by_size: dict[int, list[int]] = {}
    for gi, g in enumerate(groups):
        by_size.setdefault(len(g), []).append(gi)
    if with_qf and len(by_size) > 1:
        raise SettingsError(
            "groups of different lengths give quantile functions of different sizes"
        )
    nl = len(levels)
    quant = np.empty((len(groups), nl, n_vars))
    qf = None
    for size, members in by_size.items():
        sub = [groups[gi] for gi in members]
        ranks, k, gamma = _ranks(size * L, levels, with_qf)
        values = np.empty((len(sub), ranks.size, n_vars))  # written in place: no second copy
        if _shared_is_cheaper(sub, L, ranks.size):
            _shared_order_stats(pieces, sub, ranks, workers, out=values)
        else:
            _separate_order_stats(pieces, sub, ranks, workers, out=values)
        quant[members] = _lerp(values[:, k : k + nl], values[:, k + nl :], gamma[None, :, None])
        if with_qf:
            qf = values[:, :k]  # one size of group: every group, in order
    return qf, quant


def _shared_is_cheaper(groups, piece_length: int, n_ranks: int) -> bool:
    """Whether one joint sort of the pieces beats sorting every group's samples.

    Sorting each group touches every piece once per group that holds it; the joint sort touches
    each piece once but then resolves ``n_ranks`` positions per group over a block of
    ``_BLOCK`` samples. Measured on the 2-core machine (benchmarks/check_scaling.py): the joint
    sort pays off once groups reuse pieces and a group is longer than a few ranks' blocks.
    """
    reused = sum(len(g) for g in groups) > len({i for g in groups for i in g})
    return reused and len(groups[0]) * piece_length > 4 * n_ranks * _BLOCK


def _separate_order_stats(pieces, groups, ranks, workers, out=None) -> np.ndarray:
    """Order statistics at ``ranks`` of each group, sorting each group's samples once."""
    n_vars = pieces[0].shape[1]
    if out is None:
        out = np.empty((len(groups), len(ranks), n_vars))

    def one(gi: int) -> None:
        data = np.concatenate([pieces[i] for i in groups[gi]])
        data.sort(axis=0)
        out[gi] = data[ranks]

    thread_map(one, range(len(groups)), workers)
    return out


def _shared_order_stats(pieces, groups, ranks, workers, out=None) -> np.ndarray:
    """Order statistics at ``ranks`` of groups drawn from a few shared pieces.

    Per variable, every used piece is sorted together once; the count of each piece's samples
    among the first ``b · _BLOCK`` positions of that sort is kept for every block ``b``. A
    group's rank at a block boundary is then a weighted sum of those counts (weights: how many
    times the group holds each piece), found by bisection, and the position within the block
    by counting its samples one by one. No group's samples are ever gathered.
    """
    used = sorted({i for g in groups for i in g})
    slot = {p: s for s, p in enumerate(used)}
    P = len(used)
    L, n_vars = pieces[0].shape
    weights = np.zeros((len(groups), P))
    for gi, g in enumerate(groups):
        for i in g:
            weights[gi, slot[i]] += 1
    targets = np.asarray(ranks) + 1  # the r-th smallest is where the count first reaches r + 1
    if out is None:
        out = np.empty((len(groups), targets.size, n_vars))

    def one_variable(j: int) -> None:
        values = np.concatenate([np.asarray(pieces[p][:, j], float) for p in used])
        order = np.argsort(values)  # ties may come in any order: their value is the same
        srt = values[order]
        del values
        np.floor_divide(order, L, out=order)
        lab = order.astype(np.int32)  # the piece (slot) of each sorted sample
        del order
        n_total = lab.size
        n_blocks = -(-n_total // _BLOCK)
        counts = np.zeros((n_blocks, P))
        chunk = _BLOCK * 65536  # samples counted at once (bounded temporary arrays)
        for c in range(0, n_total, chunk):
            part = lab[c : c + chunk]
            key = (np.arange(part.size) // _BLOCK) * P + part
            nb = -(-part.size // _BLOCK)
            counts[c // _BLOCK : c // _BLOCK + nb] = np.bincount(key, minlength=nb * P).reshape(
                nb, P
            )
        at_block = np.zeros((n_blocks + 1, P))
        np.cumsum(counts, axis=0, out=at_block[1:])
        del counts
        inside = np.arange(_BLOCK)
        for g0 in range(0, len(groups), 16):  # 16 groups at a time bound the count table
            wg = weights[g0 : g0 + 16]
            group_at_block = at_block @ wg.T  # (n_blocks + 1, g): exact small integers
            for k, w_row in enumerate(wg):
                col = group_at_block[:, k]
                block = np.searchsorted(col, targets, side="left") - 1  # col[b] < t <= col[b+1]
                pos = np.minimum(block[:, None] * _BLOCK + inside[None, :], n_total - 1)
                w = w_row[lab[pos]]  # positions past the end repeat the last sample: never needed
                reached = col[block][:, None] + np.cumsum(w, axis=1) >= targets[:, None]
                out[g0 + k, :, j] = srt[block * _BLOCK + np.argmax(reached, axis=1)]

    thread_map(one_variable, range(n_vars), workers)
    return out


# ---------------------------------------------------------------------------------------------
# Autocorrelation
# ---------------------------------------------------------------------------------------------


def _centre(pieces, used) -> np.ndarray:
    """A common centre (mean of the used pieces' means): products about it lose no precision."""
    return np.mean([np.asarray(pieces[i], float).mean(axis=0) for i in used], axis=0)


def _group_acf(pieces, groups, used, max_lag: int, workers) -> np.ndarray:
    """Autocorrelation of every group (G, max_lag + 1, n), as of its pieces laid end to end.

    With ``y`` the samples about a common centre ``c``, ``N = m L`` and the group mean ``μ``
    (of ``y``), the sum of lagged products about ``μ`` at lag ``k`` is
    ``Σ y_t y_{t+k} − μ (A_k + B_k) + (N − k) μ²``, where ``A_k`` sums all but the last ``k``
    samples and ``B_k`` all but the first ``k``; ``Σ y_t y_{t+k}`` is the pieces' own sums plus
    the products across each join.
    """
    L, n_vars = pieces[0].shape
    if not 0 <= max_lag < L:
        raise SettingsError(f"max_lag must be in [0, {L - 1}] for pieces of {L}; got {max_lag}")
    centre = _centre(pieces, used)
    nfft = stats.fast_fft_length(L + max_lag)

    def parts(i: int):
        y = np.ascontiguousarray((np.asarray(pieces[i], float) - centre).T)  # (n, L)
        f = np.fft.rfft(y, n=nfft, axis=1)
        lagged = np.fft.irfft(f.real**2 + f.imag**2, n=nfft, axis=1)[:, : max_lag + 1]
        head = np.concatenate([np.zeros((n_vars, 1)), np.cumsum(y[:, :max_lag], axis=1)], axis=1)
        tail = np.concatenate(
            [np.zeros((n_vars, 1)), np.cumsum(y[:, ::-1][:, :max_lag], axis=1)], axis=1
        )
        return lagged, y.sum(axis=1), head, tail, y[:, :max_lag].copy(), y[:, L - max_lag :].copy()

    got = dict(zip(used, thread_map(parts, used, workers)))
    joins = sorted({(g[j], g[j + 1]) for g in groups for j in range(len(g) - 1)})
    cross = _join_products(joins, got, max_lag)
    k = np.arange(max_lag + 1)
    out = np.empty((len(groups), max_lag + 1, n_vars))
    for gi, g in enumerate(groups):
        n_total = len(g) * L
        lagged = sum(got[i][0] for i in g)
        for j in range(len(g) - 1):
            lagged = lagged + cross[(g[j], g[j + 1])]
        total = sum(got[i][1] for i in g)
        mu = total / n_total  # (n,)
        a = total[:, None] - got[g[-1]][3]  # all but the last k samples
        b = total[:, None] - got[g[0]][2]  # all but the first k samples
        acov = lagged - mu[:, None] * (a + b) + (n_total - k)[None, :] * (mu**2)[:, None]
        out[gi] = acov.T
    with np.errstate(invalid="ignore", divide="ignore"):
        return out / out[:, :1]


def _join_products(joins, got, max_lag: int) -> dict:
    """Σ of the lagged products across the join of piece p into piece q, lags 0..max_lag."""
    if not joins or max_lag == 0:
        return {pq: 0.0 for pq in joins}
    nf = stats.fast_fft_length(2 * max_lag)
    n_vars = got[joins[0][0]][5].shape[0]
    step = max(1, _PAIR_BLOCK // (n_vars * nf))  # joins at a time: bounded temporary arrays
    out = {}
    for s in range(0, len(joins), step):
        part = joins[s : s + step]
        tails = np.stack([got[p][5] for p, _ in part])  # (J, n, K): last K samples of p
        heads = np.stack([got[q][4] for _, q in part])  # (J, n, K): first K samples of q
        c = np.fft.irfft(
            np.fft.rfft(tails, n=nf, axis=-1) * np.conj(np.fft.rfft(heads, n=nf, axis=-1)),
            n=nf,
            axis=-1,
        )[..., :max_lag]  # c[m] = Σ_i tail[i + m] head[i]
        products = np.concatenate([np.zeros(c.shape[:-1] + (1,)), c[..., ::-1]], axis=-1)
        out.update({pq: products[k] for k, pq in enumerate(part)})
    return out


# ---------------------------------------------------------------------------------------------
# Welch spectra
# ---------------------------------------------------------------------------------------------


def _hann(nperseg: int) -> np.ndarray:
    return 0.5 - 0.5 * np.cos(2.0 * np.pi * np.arange(nperseg) / nperseg)  # periodic Hann


def _periodogram_sum(segs: np.ndarray, window: np.ndarray) -> np.ndarray:
    """Σ over segments (axis -2) of |FFT(window · (segment − its mean))|²."""
    segs = segs - segs.mean(axis=-1, keepdims=True)
    segs *= window
    f = np.fft.rfft(segs, axis=-1)
    return (f.real**2 + f.imag**2).sum(axis=-2)


def _group_psd(pieces, groups, dt: float, nperseg: int, workers) -> np.ndarray:
    """Welch spectrum of every group (G, n_freq, n), as :func:`stats.welch_psd` of the group.

    The segment grid of a group starts at its first sample with a step of ``nperseg −
    nperseg // 2``; a piece at position ``j`` sees it shifted by ``j L`` samples, so its
    inside sums are kept per alignment, and the segments across each join are added.
    """
    L, n_vars = pieces[0].shape
    if not 2 <= nperseg <= L:
        raise SettingsError(f"nperseg must be in [2, {L}]; got {nperseg}")
    step = nperseg - nperseg // 2
    window = _hann(nperseg)
    align_of = [[(-(j * L)) % step for j in range(len(g))] for g in groups]
    needed: dict[int, set[int]] = {}
    for g, al in zip(groups, align_of):
        for i, a in zip(g, al):
            needed.setdefault(i, set()).add(a)

    def inside(i: int) -> dict[int, tuple[np.ndarray, int]]:
        y = np.ascontiguousarray(np.asarray(pieces[i], float).T)  # (n, L)
        view = np.lib.stride_tricks.sliding_window_view(y, nperseg, axis=-1)  # (n, L-npg+1, npg)
        res = {}
        for a in sorted(needed[i]):
            n_seg = 0 if a > L - nperseg else (L - nperseg - a) // step + 1
            total = np.zeros((n_vars, nperseg // 2 + 1))
            for s in range(0, n_seg, _SEGMENT_BATCH):
                e = min(n_seg, s + _SEGMENT_BATCH)
                total += _periodogram_sum(
                    view[:, a + s * step : a + (e - 1) * step + 1 : step], window
                )
            res[a] = (total, n_seg)
        return res

    inside_sums = dict(zip(needed, thread_map(inside, list(needed), workers)))

    # segments across joins: (previous piece, next piece, alignment of the previous piece)
    joins = sorted(
        {(g[j], g[j + 1], al[j]) for g, al in zip(groups, align_of) for j in range(len(g) - 1)}
    )
    join_sums: dict[tuple[int, int, int], tuple[np.ndarray, int]] = {}
    for p, q, a in joins:
        n_in = 0 if a > L - nperseg else (L - nperseg - a) // step + 1
        starts = np.arange(a + n_in * step, L, step)
        if starts.size == 0:
            join_sums[(p, q, a)] = (np.zeros((n_vars, nperseg // 2 + 1)), 0)
            continue
        yp = np.asarray(pieces[p], float)[L - nperseg :]  # the part of p any such segment sees
        yq = np.asarray(pieces[q], float)[: nperseg - 1]
        both = np.ascontiguousarray(np.concatenate([yp, yq]).T)  # (n, 2 nperseg - 1)
        offs = starts - (L - nperseg)
        segs = np.stack([both[:, o : o + nperseg] for o in offs], axis=1)  # (n, s, nperseg)
        join_sums[(p, q, a)] = (_periodogram_sum(segs, window), int(starts.size))

    scale = dt / np.sum(window**2)
    double = np.full(nperseg // 2 + 1, 2.0)
    double[0] = 1.0
    if nperseg % 2 == 0:
        double[-1] = 1.0
    out = np.empty((len(groups), nperseg // 2 + 1, n_vars))
    for gi, (g, al) in enumerate(zip(groups, align_of)):
        total = np.zeros((n_vars, nperseg // 2 + 1))
        count = 0
        for i, a in zip(g, al):
            t, c = inside_sums[i][a]
            total += t
            count += c
        for j in range(len(g) - 1):
            t, c = join_sums[(g[j], g[j + 1], al[j])]
            total += t
            count += c
        expected = (len(g) * L - nperseg) // step + 1
        assert count == expected, (count, expected)  # every segment of the group, once
        out[gi] = (total * (scale * double) / count).T
    return out


# ---------------------------------------------------------------------------------------------
# Regimes
# ---------------------------------------------------------------------------------------------


def _group_regimes(pieces, groups, used, regimes, variables, dt, wanted, workers):
    """Occupancy, mean residence times and transition matrices of every group, from episodes."""
    from ergodex.regimes import _episodes

    nr = regimes.n_regimes
    L = pieces[0].shape[0]

    def episodes(i: int):
        lab = np.asarray(regimes.classify(np.asarray(pieces[i], float), variables), np.int64)
        labels, _, lengths = _episodes(lab)
        return np.where(labels < 0, nr, labels), lengths

    eps = dict(zip(used, thread_map(episodes, used, workers)))
    occ = np.empty((len(groups), nr + 1))
    res = np.empty((len(groups), nr + 1))
    trans = np.empty((len(groups), nr + 1, nr + 1))
    for gi, g in enumerate(groups):
        labels = np.concatenate([eps[i][0] for i in g])
        lengths = np.concatenate([eps[i][1] for i in g])
        # an episode continues across a join when the label does not change there
        new = np.concatenate([[True], labels[1:] != labels[:-1]])
        starts = np.flatnonzero(new)
        labels = labels[starts]
        lengths = np.add.reduceat(lengths, starts)
        n_total = len(g) * L
        occ[gi] = np.bincount(labels, weights=lengths, minlength=nr + 1)[: nr + 1] / n_total
        if "residence" in wanted:
            # visits touching the group's start or end are censored (regimes.residence_times)
            keep_lab, keep_len = labels[1:-1], lengths[1:-1]
            dur = keep_len * dt
            res[gi] = [
                dur[keep_lab == r].mean() if np.any(keep_lab == r) else np.nan
                for r in range(nr + 1)
            ]
        if "transitions" in wanted:
            counts = np.zeros((nr + 1, nr + 1))
            if labels.size > 1:
                np.add.at(counts, (labels[:-1], labels[1:]), 1.0)
            rows = counts.sum(axis=1, keepdims=True)
            trans[gi] = np.divide(counts, rows, out=np.zeros_like(counts), where=rows > 0)
    return occ, res, trans


# ---------------------------------------------------------------------------------------------
# Distances between groups
# ---------------------------------------------------------------------------------------------


def _distance_function(
    statistic: str,
) -> tuple[str, Callable[[np.ndarray, np.ndarray], np.ndarray]]:
    """The attribute a statistic compares and its distance (leading axes: pairs)."""

    def mean_abs(x, y):
        return np.mean(np.abs(x - y), axis=-2)

    def rms_lags(x, y):
        return np.sqrt(np.mean((x[..., 1:, :] - y[..., 1:, :]) ** 2, axis=-2))

    def l1_relative(x, y):
        return np.sum(np.abs(x - y), axis=-2) / (0.5 * np.sum(x + y, axis=-2))

    def absolute(x, y):
        return np.abs(x[..., :-1] - y[..., :-1])  # the "none" entry is not a row

    def frobenius(x, y):
        return np.sqrt(np.sum((x - y) ** 2, axis=(-2, -1)))[..., None]

    table = {
        # Wasserstein-1 between equal-length samples: mean |sorted a − sorted b| (Villani 2009)
        "histogram": ("qf", mean_abs),
        "quantiles": ("quant", mean_abs),
        "autocorrelation": ("acf", rms_lags),
        "spectrum": ("psd", l1_relative),
        "occupancy": ("occ", absolute),
        "residence": ("res", absolute),
        "transitions": ("trans", frobenius),
    }
    if statistic not in table:
        raise SettingsError(f"unknown statistic {statistic!r}")
    return table[statistic]


def pair_distances(
    statistic: str,
    a: GroupStatistics,
    b: GroupStatistics,
    index: tuple[np.ndarray, np.ndarray] | None = None,
    *,
    workers: int | None = 1,
) -> np.ndarray:
    """Distances between groups of ``a`` and groups of ``b``: (n_pairs, n_rows).

    ``index`` gives the pairs ``(a[index[0][k]], b[index[1][k]])``; by default every pair, in
    the order ``a``-major. Pairs are taken in chunks (a few tens of MB at a time), spread over
    ``workers`` threads; the numbers do not depend on ``workers``.
    """
    name, fn = _distance_function(statistic)
    x, y = getattr(a, name), getattr(b, name)
    if index is None:
        # every pair: broadcast a block of x against a block of y, which avoids copying y for
        # each pair; blocks keep each temporary array to a few tens of MB
        per_pair = max(1, x[0].size)
        y_step = max(1, min(y.shape[0], int(_PAIR_BLOCK // per_pair)))
        x_step = max(1, int(_PAIR_BLOCK // (per_pair * y_step)))

        def rows(s: int) -> np.ndarray:
            xa = x[s : s + x_step, None]
            d = np.concatenate(
                [fn(xa, y[None, t : t + y_step]) for t in range(0, y.shape[0], y_step)], axis=1
            )
            return d.reshape((-1,) + d.shape[2:])

        return np.concatenate(thread_map(rows, range(0, x.shape[0], x_step), workers))
    ii, jj = np.ravel(index[0]), np.ravel(index[1])
    if ii.size == 0:
        return np.zeros((0,) + fn(x[:1], y[:1]).shape[1:])
    step = max(1, min(64, int(_PAIR_BLOCK // max(1, x[0].size))))

    def chosen(s: int) -> np.ndarray:
        return fn(x[ii[s : s + step]], y[jj[s : s + step]])

    return np.concatenate(thread_map(chosen, range(0, ii.size, step), workers))


def statistics_of(
    pieces: Sequence[np.ndarray] | np.ndarray,
    groups: Sequence[Sequence[int]] | None,
    ctx: dict,
) -> GroupStatistics:
    """:func:`group_statistics` with a check's settings (``ctx``: statistics, max_lag_samples,
    dt, nperseg, regimes, variables and optionally workers)."""
    return group_statistics(
        pieces,
        groups,
        statistics=ctx["statistics"],
        max_lag=ctx.get("max_lag_samples", 1),
        dt=ctx.get("dt", 1.0),
        nperseg=ctx.get("nperseg", 8),
        regimes=ctx.get("regimes"),
        variables=ctx.get("variables", ()),
        workers=ctx.get("workers", 1),
    )
