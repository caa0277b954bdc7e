"""The check's family-wise threshold: the method of :mod:`ergodex.nullfloor`, scored through the
check's own pieces, groups and distances (so nothing about a statistic is written twice)."""

from __future__ import annotations

import hashlib
from collections import OrderedDict

import numpy as np

from ergodex import nullfloor
from ergodex.validation.pieces import PieceSettings, _pair_distances, _PieceStats
from ergodex.validation.spec import CheckSpec
from ergodex.validation.verdict import _ratio

#: Thresholds of recent checks: candidates of one selection (and repeated checks of one record)
#: share the reference, the settings and the seed, hence the threshold; it is computed once.
_RECENT: OrderedDict[str, dict] = OrderedDict()
_RECENT_SIZE = 8


def null_threshold(
    ref_pieces: np.ndarray,
    groups,
    floor_index,
    settings: PieceSettings,
    spec: CheckSpec,
    *,
    pool: int,
    n_model_groups: int,
    seed: int,
) -> dict:
    """The scorecard's ``threshold`` block: the threshold on the largest row ratio and how it
    was set.

    With ``spec.false_reject_rate`` None the fixed ``spec.tolerance``. Otherwise a replicate
    scores bootstrap pseudo-reference pieces, grouped by the first
    :data:`~ergodex.nullfloor.MAX_REPLICATE_SPLITS` of the check's own splits, against
    ``n_model_groups`` bootstrap model groups, through the same rows. Statistics with their own
    entry in ``spec.tolerances`` keep it and are left out of the family.
    """
    statistics = [s for s in settings.statistics if s not in spec.tolerances]
    if spec.false_reject_rate is None or not statistics:
        return {"false_reject_rate": None, "threshold": float(spec.tolerance)}
    key = hashlib.sha256(np.ascontiguousarray(ref_pieces, "<f8").tobytes())
    key.update(
        repr(
            (
                ref_pieces.shape,
                [tuple(g) for g in groups],
                [np.ravel(i).tolist() for i in floor_index],
                settings.variables,
                settings.dt,
                settings.max_lag_samples,
                settings.nperseg,
                None if settings.regimes is None else settings.regimes.to_dict(),
                statistics,
                spec.false_reject_rate,
                spec.null_replicates,
                spec.threshold_floor,
                pool,
                n_model_groups,
                seed,
            )
        ).encode()
    )
    digest = key.hexdigest()
    if digest in _RECENT:
        _RECENT.move_to_end(digest)
        return dict(_RECENT[digest])
    block = _fit(
        ref_pieces, groups, floor_index, settings, spec, statistics, pool, n_model_groups, seed
    )
    _RECENT[digest] = block
    while len(_RECENT) > _RECENT_SIZE:
        _RECENT.popitem(last=False)
    return dict(block)


def _fit(ref_pieces, groups, floor_index, settings, spec, statistics, pool, n_model_groups, seed):
    """The bootstrap behind :func:`null_threshold` (uncached)."""
    left = np.ravel(floor_index[0])[: nullfloor.MAX_REPLICATE_SPLITS]
    right = np.ravel(floor_index[1])[: nullfloor.MAX_REPLICATE_SPLITS]
    used = sorted(set(left.tolist()) | set(right.tolist()))
    position = {g: i for i, g in enumerate(used)}
    pairs = (np.array([position[g] for g in left]), np.array([position[g] for g in right]))
    n_vars = ref_pieces.shape[2]
    family = PieceSettings(
        statistics=tuple(statistics),
        variables=settings.variables,
        dt=settings.dt,
        max_lag_samples=settings.max_lag_samples,
        nperseg=settings.nperseg,
        regimes=settings.regimes,
    )

    def prepare(model_groups: np.ndarray) -> _PieceStats:
        return _PieceStats(model_groups, family)

    def score(reference: np.ndarray, model: _PieceStats, chosen: np.ndarray) -> np.ndarray:
        ref_stats = _PieceStats(
            np.stack([reference[list(groups[g])].reshape(-1, n_vars) for g in used]), family
        )
        out: list[float] = []
        for s in statistics:
            floor = np.nanmean(_pair_distances(s, ref_stats, ref_stats, pairs), axis=0)
            # every pool group against every reference group (the broadcast path, far cheaper
            # than indexed pairs), then the chosen groups' rows
            d = _pair_distances(s, model, ref_stats)
            d = d.reshape(-1, len(used), d.shape[-1])[chosen]
            value = np.nanmean(d.reshape(-1, d.shape[-1]), axis=0)
            out.extend(_ratio(float(v), float(f)) for v, f in zip(value, floor))
        return np.array(out)

    null = nullfloor.NullThreshold(
        false_reject_rate=spec.false_reject_rate,
        n_replicates=spec.null_replicates,
        floor=spec.threshold_floor,
        seed=seed,
    ).fit(
        ref_pieces,
        prepare,
        score,
        n_model_groups=n_model_groups,
        pool=pool,
        max_lag_samples=settings.max_lag_samples,
    )
    return null.to_dict()
