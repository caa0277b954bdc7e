"""The coordinator of a check: :func:`check` and :func:`validate`, and the run of one check as
a sequence of named steps (plan → starts → integration → blow-ups → pooling → rows → verdict).

The method is described in :mod:`ergodex.validation`.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ergodex import stats
from ergodex.exceptions import DataError, SettingsError
from ergodex.group_stats import GroupStatistics, resolve_workers
from ergodex.timestamps import utc_now
from ergodex.validation.evidence import _evidence
from ergodex.validation.pieces import (
    _pair_distances,
    _PieceStats,
    _reference_groups,
    _row_labels,
)
from ergodex.validation.plan import CheckPlan, derive_plan
from ergodex.validation.result import CheckResult
from ergodex.validation.scorecard import Scorecard, ScoreRow, _fmt
from ergodex.validation.spaces import ComparedSpace, compared_space
from ergodex.validation.spec import CheckSpec, distance_units
from ergodex.validation.threshold import null_threshold
from ergodex.validation.verdict import (
    _blowup_accounting,
    _decide,
    _member_agreement,
    _power,
    _score_rows,
)

log = logging.getLogger(__name__)


def check(
    surrogate,
    reference,
    spec: CheckSpec | None = None,
    *,
    initial_states=None,
    dt: float | None = None,
    progress=False,
    time_limit: float | None = None,
    max_memory: int | str | None = None,
    evidence: bool = True,
    workers: int | None = None,
    scheduler: Any = None,
) -> CheckResult:
    """Check a surrogate against reference data; returns a :class:`CheckResult`, the scorecard
    *and* the evidence behind it.

    Use ``check`` when you want figures or files: ``result.plot_histograms()`` and the other
    plots, an evidence NPZ or a report. This is what the command ``ergodex validate`` runs. For
    the verdict alone use :func:`validate` (or ``check(..., evidence=False)``), which skips the
    arrays and gives the same scorecard.

    Parameters
    ----------
    surrogate : Surrogate
    reference : Series, pandas.DataFrame or xarray.Dataset/DataArray
        The data, in data space (converted by :func:`ergodex.frames.as_series`). Its runs (or
        blocks of them) provide the noise floor.
    spec : CheckSpec, optional
        Settings; defaults as documented on :class:`CheckSpec`.
    initial_states : array_like, shape (members, n_variables), optional
        Data-space starting states, one per member, instead of states drawn from the reference
        (their fingerprint goes into the scorecard's settings).
    dt : float, optional
        Sampling interval when ``reference`` is a table without times.
    progress : bool or callable(done, total)
        Progress of the ensemble integration and the scoring (see :mod:`ergodex.progress`).
    time_limit : float, optional
        Wall-clock budget of the ensemble integration in seconds (default: none).
    max_memory : int or str, optional
        Memory limit (default: ``$ERGODEX_MAX_MEMORY``, else half the available memory); a check
        whose ensemble would need more is refused before anything is allocated.
    evidence : bool, default True
        Build the arrays behind the figures and reports (:class:`Evidence`). They cost a
        tenth to a quarter of a check; with False, ``result.evidence`` is None (the verdict and
        scorecard are the same), and the figures can be recomputed later from the scorecard's
        spec and seed.
    workers : int, optional
        Threads for the statistics (default: every core); the numbers are the same for any
        count (numpy's FFT and sort release the interpreter lock; BLAS is held to one thread).
    scheduler : str or dask.distributed.Client, optional
        Integrate the members on a Dask cluster (an address such as ``tcp://host:8786``, or a
        connected client), see :func:`ergodex.cluster.integrate_scattered`: a deterministic
        surrogate gives the same scorecard as on this machine.

    Returns
    -------
    CheckResult
        ``.scorecard`` (verdict, table, reasons) and ``.evidence`` (None with ``evidence=False``).

    Raises
    ------
    DataError
        When the reference is too short for a noise floor or its variables do not match the model.
    SettingsError
        For bad settings, or an ensemble whose estimated memory exceeds the limit. A surrogate
        that blows up is a finding in the scorecard, never an error.
    ModelLimitError
        When the surrogate is too stiff for the substep floor or the integration exceeds
        ``time_limit`` (a model failure: exit code 1 on the command line).

    References
    ----------
    .. [1] C. Villani, *Optimal Transport: Old and New*, Springer (2009) (Wasserstein-1).
    .. [2] P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 70–73 (1967) (spectra).
    .. [3] A. D. Sokal (1997), Monte Carlo methods in statistical mechanics (decorrelation time).
    """
    from ergodex.frames import as_series
    from ergodex.progress import reporter

    reference = as_series(reference, dt=dt, what="reference")
    log.info(
        "check: %s surrogate against %d runs (%d samples) of %s",
        getattr(surrogate, "kind", type(surrogate).__name__),
        reference.n_runs,
        reference.n_samples,
        ", ".join(reference.names),
    )
    with reporter(progress, 1, desc="check", unit="output") as update:
        result = _check(
            surrogate,
            reference,
            spec,
            initial_states,
            update,
            time_limit=time_limit,
            max_memory=max_memory,
            evidence=evidence,
            workers=workers,
            scheduler=scheduler,
        )
    card = result.scorecard
    settings = card.settings
    log.info(
        "check: %d members of %g time units after a spin-up of %g; %s",
        card.spec.members,
        settings.get("member_length", float("nan")),
        settings.get("spinup", float("nan")),
        settings.get("integration", {}).get("message", ""),
    )
    log.info(
        "check verdict: %s (largest ratio %s over %d rows)%s",
        card.verdict,
        _fmt(card.largest_ratio),
        len(card.rows),
        "; " + "; ".join(card.reasons[:3]) if card.reasons else "",
    )
    return result


def _check(
    surrogate,
    reference,
    spec,
    initial_states,
    update,
    *,
    time_limit: float | None = None,
    max_memory: int | str | None = None,
    evidence: bool = True,
    workers: int | None = None,
    scheduler: Any = None,
) -> CheckResult:
    """The check itself, on a Series; ``update(done, total)`` (or None) hears of its progress."""
    spec = _as_spec(spec)
    threads = resolve_workers(workers)
    space = compared_space(surrogate, reference)
    stacked = space.reference.stacked()
    plan, ref_pieces = derive_plan(spec, space.reference, stacked)
    plan = replace(plan, pieces=replace(plan.pieces, workers=threads))
    _refuse_oversized(surrogate, spec, plan, max_memory)

    # the fourth seed (for the threshold) leaves the first three as they were
    seeds = np.random.SeedSequence(spec.seed).generate_state(4)
    rng = np.random.default_rng(int(seeds[0]))
    starts, starts_note = _draw_starts(
        surrogate, spec, space, stacked, initial_states, len(reference.names), rng
    )
    run = _integrate(
        surrogate,
        space,
        plan,
        starts,
        stacked,
        int(seeds[1]),
        update,
        time_limit,
        max_memory,
        scheduler,
    )
    alive = ~np.asarray(run.blown_up, bool)
    model = _model_output(run, alive, space, plan, spec.members)
    settings = _settings(surrogate, reference, space, plan, starts_note, int(seeds[0]), run)

    blowup_times = np.where(alive, np.nan, np.asarray(run.blowup_time, float))
    blowups, blowup_fail, blowup_reasons = _blowup_accounting(
        blowup_times, spec.max_blowup_fraction
    )
    scored = _score(
        space.reference, ref_pieces, model, alive, plan, spec, int(seeds[2]), int(seeds[3])
    )
    settings.update(scored.settings)
    verdict, reasons = _decide(
        scored.rows,
        blowup_fail=blowup_fail,
        blowup_reasons=blowup_reasons,
        any_alive=bool(alive.any()),
        agreement_verdict=scored.agreement.get("verdict"),
        agreement_reasons=scored.agreement.pop("_reasons", []),
        weak_reasons=scored.weak_reasons,
        reference_reasons=scored.consistency.pop("_reasons", []),
    )
    import ergodex

    scorecard = Scorecard(
        verdict=verdict,
        rows=scored.rows,
        reasons=reasons,
        blowups=blowups,
        power=scored.power,
        threshold=scored.threshold,
        member_agreement=scored.agreement,
        spec=spec,
        model_fingerprint=surrogate.fingerprint(),
        data_fingerprint=reference.fingerprint(),
        created=utc_now(),
        ergodex_version=ergodex.__version__,
        settings=settings,
    )
    arrays = None
    if evidence:  # last: the scorecard never depends on it (it only draws from rng after use)
        arrays = _evidence(
            space.reference,
            stacked,
            ref_pieces,
            scored.ref_stats,
            model,
            alive,
            blowup_times,
            spec,
            plan.pieces,
            rng,
        )
    if update is not None:
        update(plan.n_out + 1, plan.n_out + 1)  # the integration's outputs, then the scoring
    return CheckResult(scorecard, arrays)


@dataclass
class _Scored:
    """What scoring the pooled groups gives: rows, member agreement, power and consistency."""

    ref_stats: GroupStatistics
    rows: list[ScoreRow]
    agreement: dict
    power: dict
    weak_reasons: list[str]
    consistency: dict
    settings: dict[str, Any]
    threshold: dict


def _score(
    reference,
    ref_pieces: np.ndarray,
    model: np.ndarray,
    alive,
    plan: CheckPlan,
    spec,
    seed: int,
    threshold_seed: int,
) -> _Scored:
    """Pool pieces into groups, build the noise floors and the threshold, score the rows, the
    members' agreement and the record's power. ``seed`` draws the reference groups,
    ``threshold_seed`` the bootstrap behind the threshold."""
    ref_stats = _PieceStats(ref_pieces, plan.pieces)
    # A group is its pieces laid end to end. The autocorrelation and Welch segments then span
    # pool − 1 joins (a fraction ≈ max_lag / L of the lagged products); model groups are built
    # the same way, so the effect is common to both sides of every comparison.
    ref_groups, floor_index = _reference_groups(
        plan.n_reference_pieces, plan.pool, np.random.default_rng(seed)
    )
    # the groups' statistics from the pieces' parts: no group is copied
    group_stats = ref_stats if plan.pool == 1 else _PieceStats(ref_pieces, plan.pieces, ref_groups)
    settings: dict[str, Any] = {
        "pool": plan.pool,
        "n_reference_groups": len(ref_groups),
        "n_floor_pairs": int(floor_index[0].size),
    }
    floors = {
        s: np.nanmean(_pair_distances(s, group_stats, group_stats, floor_index), axis=0)
        for s in plan.statistics
    }
    # the threshold depends on the reference and the settings only (as many model groups as
    # the members would give without blow-ups), never on the model checked
    threshold = null_threshold(
        ref_pieces,
        ref_groups,
        floor_index,
        plan.pieces,
        spec,
        pool=plan.pool,
        n_model_groups=max(1, spec.members * plan.pieces_per_member // plan.pool),
        seed=threshold_seed,
    )
    settings["threshold"] = threshold["threshold"]

    def tolerance_for(statistic: str) -> float:
        return float(spec.tolerances.get(statistic, threshold["threshold"]))

    power, weak_reasons, consistency = _power(
        reference,
        ref_pieces,
        plan.piece_info,
        ref_groups,
        floor_index,
        group_stats,
        floors,
        plan.pieces,
        spec,
        # the power statement's record-length rule counts integrated autocorrelation times (on
        # which it was calibrated); an oscillation's length is stated in dominant periods below
        max(*plan.integrated_times, plan.dt),
        plan.gap,
        tolerance_for,
    )
    period = plan.time_scales.dominant_period
    power["dominant_period"] = period
    power["record_dominant_periods"] = None if period is None else power["record_time"] / period
    rows: list[ScoreRow] = []
    if alive.any():
        mod_stats, settings["n_model_groups"] = _model_groups(model, alive, plan)
        rows = _rows(mod_stats, group_stats, floors, plan, tolerance_for)
        agreement = _member_agreement(
            model, alive, plan.piece_length, ref_stats, ref_pieces, spec, plan.pieces
        )
    else:
        agreement = {
            "ratio": None,
            "tolerance": spec.tolerance,
            "verdict": "fail",
            "collapsed_members": [],
            "outlying_members": [],
            "per_variable": {},
        }
    return _Scored(
        ref_stats, rows, agreement, power, weak_reasons, consistency, settings, threshold
    )


def _as_spec(spec) -> CheckSpec:
    """The spec, or the defaults for None, with its settings checked."""
    spec = CheckSpec() if spec is None else spec
    if not isinstance(spec, CheckSpec):
        raise SettingsError(f"spec must be a CheckSpec; got {type(spec).__name__}")
    spec.check_settings()
    return spec


def _refuse_oversized(surrogate, spec: CheckSpec, plan: CheckPlan, max_memory) -> None:
    """Refuse before the start states, the run and the model array are allocated."""
    from ergodex.integrate import ensemble_memory
    from ergodex.limits import check_memory

    # the run's outputs, the data-space model array and the statistics' pieces: three copies
    check_memory(
        ensemble_memory(
            spec.members,
            plan.n_out,
            surrogate.n_variables,
            surrogate.n_variables,
            surrogate.n_terms,
            copies=3,
        ),
        f"a check of {spec.members} members x {plan.n_out} outputs x "
        f"{surrogate.n_variables} variables",
        "use fewer members or a shorter length",
        max_memory,
    )


def _draw_starts(
    surrogate, spec: CheckSpec, space: ComparedSpace, stacked, initial_states, n_data: int, rng
) -> tuple[np.ndarray, str]:
    """One starting state per member in the compared space, and how they were chosen."""
    if initial_states is None:
        starts = stacked[rng.choice(stacked.shape[0], size=spec.members, replace=True)]
        return starts, "drawn from the reference"
    starts = np.array(initial_states, dtype=float)
    if starts.shape != (spec.members, n_data) or not np.all(np.isfinite(starts)):
        raise DataError(
            f"initial_states must be finite with shape ({spec.members}, {n_data}) "
            f"(members × variables); got shape {starts.shape}"
        )
    if space.in_model_space:
        starts = surrogate.transform.forward(starts)
    import hashlib

    digest = hashlib.sha256(np.ascontiguousarray(starts, "<f8").tobytes()).hexdigest()
    return starts, "given: sha256:" + digest


def _integrate(
    surrogate,
    space: ComparedSpace,
    plan: CheckPlan,
    starts: np.ndarray,
    stacked: np.ndarray,
    seed: int,
    update,
    time_limit: float | None,
    max_memory,
    scheduler: Any = None,
):
    """The ensemble run from ``starts``, with the blow-up bound taken from the reference; on a
    Dask cluster when ``scheduler`` is given."""
    from ergodex.integrate import blowup_bound, integrate_ensemble

    z0 = space.to_model(starts)
    bound = blowup_bound(space.to_model(stacked), factor=10.0)
    keep = None
    observed = space.observed
    if observed != list(surrogate.variables):
        # hidden variables start at 0 (their level is unknown; the spin-up forgets the choice)
        # and carry no blow-up bound (they have no reference range); only observed ones are
        # kept, which Surrogate.to_data_space accepts as they are
        columns = [list(surrogate.variables).index(v) for v in observed]
        z_all = np.zeros((z0.shape[0], surrogate.n_variables))
        z_all[:, columns] = z0
        z0 = z_all
        bound_all = np.tile([-np.inf, np.inf], (surrogate.n_variables, 1))
        bound_all[columns] = bound
        bound = bound_all
        if len(observed) < surrogate.n_variables:
            keep = columns
    integrate: Any = integrate_ensemble
    where: dict[str, Any] = {}
    if scheduler is not None:
        from ergodex.cluster import integrate_scattered

        integrate, where = integrate_scattered, {"scheduler": scheduler}
    return integrate(
        surrogate,
        z0,
        dt_out=plan.dt,
        n_out=plan.n_out,
        spinup=plan.spinup,
        bound=bound,
        seed=seed,
        keep=keep,
        time_limit=time_limit,
        max_memory=max_memory,
        progress=None if update is None else (lambda d, t: update(d, t + 1)),
        **where,
    )


def _model_output(run, alive, space: ComparedSpace, plan: CheckPlan, members: int) -> np.ndarray:
    """The members' output in the reference's space and column order; NaN for blown-up ones.

    Written over the run's own array when the shapes allow (no second copy of the ensemble).
    """
    variables = plan.variables
    n_vars = len(variables)
    states = run.states
    model = states if states.shape[2] == n_vars else np.empty((members, plan.n_out, n_vars))
    model[~alive] = np.nan
    for m in np.flatnonzero(alive):
        x = space.to_data(states[m])
        if x.shape[1] != n_vars:
            raise DataError(
                f"the model's data space has {x.shape[1]} variables, the reference "
                f"{n_vars} ({list(variables)})"
            )
        model[m] = x if space.order is None else x[:, space.order]
    return model


def _settings(
    surrogate, data_reference, space: ComparedSpace, plan: CheckPlan, starts_note, start_seed, run
) -> dict[str, Any]:
    """The scorecard's ``settings``: what was derived from the spec and the data."""
    from ergodex.series import format_dt

    dt = plan.dt
    time_unit = getattr(data_reference, "time_unit", None)
    regimes = plan.pieces.regimes
    return {
        **plan.piece_info,
        "piece_length_time": plan.piece_length * dt,
        "gap": plan.gap,
        "spinup": plan.spinup,
        "max_lag": plan.pieces.max_lag_samples * dt,
        "max_lag_samples": plan.pieces.max_lag_samples,
        "nperseg": plan.pieces.nperseg,
        "decorrelation_time": plan.decorrelation_time,
        "integrated_autocorrelation_time": dict(zip(plan.variables, plan.integrated_times)),
        "envelope_time": dict(zip(plan.variables, plan.time_scales.envelope_times)),
        "dominant_period": dict(zip(plan.variables, plan.time_scales.periods)),
        # Welch frequency spacing, cycles per time unit
        "spectral_resolution": 1.0 / (plan.pieces.nperseg * dt),
        "member_length": plan.n_out * dt,
        "pieces_per_member": plan.pieces_per_member,
        "statistics": list(plan.statistics),
        "dt": dt,
        # every time above is in this unit; "dt_text" is dt as printed (format_dt)
        "time_unit": time_unit,
        "dt_text": format_dt(dt, time_unit),
        "start_seed": start_seed,
        "starts": starts_note,
        "noise_seed": run.seed,
        "integration": run.summary(),
        "regimes_used": None if regimes is None else regimes.to_dict(),
        "quantile_levels": list(stats.DEFAULT_QUANTILES),
        "compared_in": "model space (reference mapped through the surrogate's transform)"
        if space.in_model_space
        else "data space",
        "hidden_variables": [v for v in surrogate.variables if v not in space.observed],
        "distance_units": distance_units(plan.statistics, time_unit),
    }


def _model_groups(model: np.ndarray, alive, plan: CheckPlan) -> tuple[GroupStatistics, int]:
    """The statistics of the surviving members' pooled groups, and how many groups there are."""
    L, pool = plan.piece_length, plan.pool
    # pieces in member-minor order, so that a pooled group takes one piece from each of
    # ``pool`` different members, as a reference group takes independent pieces; views into
    # the run, never copied as a whole
    model_pieces = [
        model[m, k * L : (k + 1) * L]
        for k in range(plan.pieces_per_member)
        for m in np.flatnonzero(alive)
    ]
    n_groups = len(model_pieces) // pool
    if n_groups == 0:
        model_pieces = model_pieces * pool  # fewer survivors than pool
        n_groups = 1
    groups = [tuple(range(g * pool, (g + 1) * pool)) for g in range(n_groups)]
    return _PieceStats(model_pieces, plan.pieces, groups), int(n_groups)


def _rows(
    mod_stats: GroupStatistics,
    group_stats: GroupStatistics,
    floors: dict[str, np.ndarray],
    plan: CheckPlan,
    tolerance_for: Callable[[str], float],
) -> list[ScoreRow]:
    """Every scored row: the mean distance of model groups from reference groups over the floor,
    against ``tolerance_for(statistic)``."""
    rows: list[ScoreRow] = []
    for s in plan.statistics:
        distances = _pair_distances(s, mod_stats, group_stats)
        with warnings.catch_warnings():
            # a column with no finite pair (e.g. every member settled on one point) is NaN on
            # purpose: the verdict fails that row and names it
            warnings.simplefilter("ignore", RuntimeWarning)
            value = np.nanmean(distances, axis=0)
        labels = _row_labels(s, plan.variables, plan.pieces.regimes)
        rows.extend(_score_rows(s, labels, value, floors[s], tolerance_for(s)))
    return rows


def validate(
    surrogate,
    reference,
    spec: CheckSpec | None = None,
    *,
    initial_states=None,
    dt: float | None = None,
    progress=False,
    workers: int | None = None,
    scheduler: Any = None,
) -> Scorecard:
    """Check a surrogate against reference data; returns only the :class:`Scorecard`.

    The same check and the same scorecard as :func:`check` (``check(...).scorecard``), without
    building the evidence arrays, so it is cheaper: use it where the verdict and the table are all
    you need (a script's pass/fail, a sweep). Use :func:`check` for figures, an evidence file or
    a report. Note that the command ``ergodex validate`` runs :func:`check`, not this function.
    """
    return check(
        surrogate,
        reference,
        spec,
        initial_states=initial_states,
        dt=dt,
        progress=progress,
        evidence=False,
        workers=workers,
        scheduler=scheduler,
    ).scorecard
