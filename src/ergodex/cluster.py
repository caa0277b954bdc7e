"""Work on a Dask cluster: the one way to reach a scheduler, and an ensemble spread over it.

``open_client(scheduler)`` accepts what every ``--scheduler`` option takes (an address such as
``tcp://host:8786``, or a ``dask.distributed.Client`` already open) and closes only the clients
it opened. ``integrate_scattered`` runs the members of an ensemble in chunks on the cluster's
workers and joins the chunks into one :class:`~ergodex.integrate.EnsembleResult`.

A deterministic surrogate gives the same members wherever they run (each member is integrated
on its own, with the substep chosen once, here, from all starting states), so a check on a
cluster gives the same scorecard as on one machine. A stochastic surrogate draws each chunk's
noise from its own stream (spawned from the seed): repeatable with the same number of chunks,
and a different draw from the one-machine run.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import numpy as np

from ergodex.exceptions import OptionalDependencyError, SettingsError

__all__ = ["integrate_scattered", "open_client"]


@contextmanager
def open_client(scheduler: Any, *, what: str = "running on a cluster") -> Iterator[Any]:
    """A ``dask.distributed.Client`` for ``scheduler`` (an address or a Client), closed after
    use when it was opened here."""
    try:
        from dask.distributed import Client
    except ImportError:
        raise OptionalDependencyError(
            f"{what} needs the optional package 'dask[distributed]'; "
            "install it with pip install 'ergodex[dask]'"
        ) from None
    if isinstance(scheduler, str):
        try:
            client = Client(scheduler, timeout=20)
        except (OSError, TimeoutError) as exc:
            raise SettingsError(
                f"cannot reach the Dask scheduler at {scheduler!r}: {exc}"
            ) from None
        try:
            yield client
        finally:
            client.close()
    elif isinstance(scheduler, Client):
        yield scheduler
    else:
        raise SettingsError(
            "scheduler must be an address such as 'tcp://127.0.0.1:8786' or a "
            f"dask.distributed.Client; got {type(scheduler).__name__}"
        )


def _chunk(surrogate, x0, seed, kwargs):
    """One chunk of members, on a worker (imports there)."""
    from ergodex.integrate import integrate_ensemble

    return integrate_ensemble(surrogate, x0, seed=seed, **kwargs)


def integrate_scattered(
    surrogate,
    initial_states,
    *,
    scheduler: Any,
    dt_out: float,
    n_out: int,
    spinup: float = 0.0,
    substep: float | None = None,
    stiffness_states=None,
    method: str = "auto",
    bound=None,
    seed: int | None = None,
    keep=None,
    time_limit: float | None = None,
    max_memory=None,
    n_chunks: int | None = None,
    progress=None,
):
    """:func:`ergodex.integrate.integrate_ensemble` with the members spread over Dask workers.

    The substep is chosen here from every starting state (and ``stiffness_states``), as the
    one-machine run chooses it, and given to every chunk. ``n_chunks`` defaults to the
    cluster's worker threads (at most one chunk per member). Progress counts finished chunks.
    """
    from ergodex.integrate import (
        METHODS,
        SAFETY,
        EnsembleResult,
        _choose,
        _resolve_keep,
        ensemble_memory,
    )
    from ergodex.limits import check_memory

    x0 = np.asarray(initial_states, dtype=float)
    members = x0.shape[0]
    n_kept = surrogate.n_variables if keep is None else len(_resolve_keep(surrogate, keep))
    check_memory(
        ensemble_memory(members, n_out, n_kept, surrogate.n_variables, surrogate.n_terms),
        f"an ensemble of {members} members x {n_out} outputs x {n_kept} variables",
        "use fewer members or outputs",
        max_memory,
    )
    resolved = ("heun" if surrogate.is_stochastic else "rk4") if method == "auto" else method
    if resolved not in METHODS:
        raise SettingsError(f"method {method!r} is not one of auto, {', '.join(METHODS)}")
    stochastic = bool(METHODS[resolved][0])
    rho = None
    if substep is None:
        sample = x0 if stiffness_states is None else np.vstack([x0, stiffness_states])
        substep, _, rho = _choose(surrogate, sample, dt_out, resolved, SAFETY)
    kwargs = dict(
        dt_out=dt_out,
        n_out=n_out,
        spinup=spinup,
        substep=substep,
        method=method,
        bound=bound,
        keep=keep,
        time_limit=time_limit,
        max_memory=max_memory,
    )
    with open_client(scheduler, what="an ensemble on a cluster") as client:
        if n_chunks is None:
            n_chunks = max(1, sum(client.nthreads().values()))
        n_chunks = max(1, min(int(n_chunks), members))
        bounds = np.linspace(0, members, n_chunks + 1).round().astype(int)
        seeds: list[int | None]
        if stochastic:
            base = np.random.SeedSequence(seed)
            seeds = [int(s.generate_state(1)[0]) for s in base.spawn(n_chunks)]
        else:
            seeds = [seed] * n_chunks
        futures = [
            client.submit(_chunk, surrogate, x0[a:b], s, kwargs, pure=False)
            for (a, b), s in zip(zip(bounds[:-1], bounds[1:]), seeds)
        ]
        parts = []
        for i, future in enumerate(futures):
            parts.append(future.result())
            if progress is not None:
                progress(math.ceil((i + 1) * n_out / n_chunks), n_out)
    first = parts[0]
    blown = np.concatenate([p.blown_up for p in parts])
    n_blown = int(np.count_nonzero(blown))
    status = "ok" if n_blown == 0 else ("all-blowup" if n_blown == members else "blowup")
    blowup_time = np.concatenate([p.blowup_time for p in parts])
    how = (
        f"{first.method} ({first.engine}) on {n_chunks} Dask chunk(s), substep "
        f"{first.substep:.6g} ({first.substeps_per_output} per output)"
    )
    if rho is not None:
        how += f" chosen from spectral radius {rho:.4g}"
    if n_blown:
        message = (
            f"{n_blown} of {members} members blew up (non-finite or outside the bound), first "
            f"at t={float(np.nanmin(blowup_time)):.6g}; {how}"
        )
    else:
        message = (
            f"{members} members integrated to t={first.times[-1]:.6g} after spin-up "
            f"{first.spinup:.6g}; {how}"
        )
    return EnsembleResult(
        times=first.times,
        states=np.concatenate([p.states for p in parts]),
        blown_up=blown,
        blowup_time=blowup_time,
        last_finite=np.concatenate([p.last_finite for p in parts]),
        method=first.method,
        substep=first.substep,
        substeps_per_output=first.substeps_per_output,
        seed=seed if stochastic else None,
        status=status,
        message=message,
        variables=first.variables,
        spinup=first.spinup,
        spectral_radius=rho,
        engine=first.engine,
        bound=first.bound,
    )
