"""What a job does: fit, validate or retrain, through the same Python API as the command line.

These functions run inside a worker process (see :mod:`ergodex.service.jobs`). Their parameters
are the JSON stored on the job row (already checked by the HTTP layer's request models), and they
return a JSON-ready dict that becomes the job's result. They import the numerical stack lazily:
a worker pays for pysindy only when a job needs it.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from ergodex.exceptions import DataError, RegistryError
from ergodex.jsonable import jsonable
from ergodex.service.settings import ServiceSettings
from ergodex.service.store import JobStore


def dataset_path(home: Path, dataset_id: str) -> tuple[Path, dict[str, Any]]:
    """Path of an uploaded dataset's stored file and its record; ``DataError`` if unknown."""
    settings = ServiceSettings(home=home)
    record = JobStore(settings.jobs_path).get_dataset(dataset_id)
    if record is None:
        raise DataError(f"no uploaded dataset with id {dataset_id!r}; upload it first")
    return settings.datasets_dir / dataset_id / record["filename"], record


def load_dataset(home: Path, dataset_id: str):
    """Read an uploaded dataset back through the same reader that accepted it."""
    from ergodex.readers import read_series

    path, record = dataset_path(home, dataset_id)
    return read_series(path, **(record.get("options") or {}))


def check_spec(options: dict[str, Any] | None):
    """A validated :class:`~ergodex.validation.CheckSpec` from the request's check options.

    Unset options keep the library's defaults; a bad value raises ``SettingsError``.
    """
    from ergodex.validation import CheckSpec

    return CheckSpec.from_dict({k: v for k, v in (options or {}).items() if v is not None})


def version_ref(name: str, version: int | str) -> str:
    """Registry reference: ``name/current`` (the accepted version) for ``"current"``, else
    ``name/N``. ``"accepted"``, the word before ``current``, can still come from the stored
    parameters of a job queued by an earlier server."""
    from ergodex.registry import CURRENT, format_ref

    if str(version) in (CURRENT, "accepted"):
        return format_ref(name, CURRENT)
    return format_ref(name, int(version))


def run_fit(params: dict[str, Any], *, home: Path, job_id: str) -> dict[str, Any]:
    """Fit on an uploaded dataset, check on held-out runs, register a new version."""
    from ergodex.pipeline import fit_check_register
    from ergodex.registry import Registry
    from ergodex.series import split_runs

    data = load_dataset(home, params["dataset"])
    if params.get("check_dataset"):
        fit_data, check_data = data, load_dataset(home, params["check_dataset"])
    else:
        fit_data, check_data = split_runs(data, int(params.get("holdout") or 1))
    flow = fit_check_register(
        fit_data,
        check_data,
        method=params.get("method", "sparse"),
        settings=params.get("settings") or {},
        spec=check_spec(params.get("check")),
        registry=Registry(home),
        name=params["name"],
        accept=bool(params.get("accept", False)),
        note=params.get("note") or f"fitted by service job {job_id}",
    )
    scorecard = flow.check.scorecard
    return {
        "name": flow.name,
        "version": flow.version,
        "status": flow.status,
        "verdict": scorecard.verdict,
        "reasons": list(scorecard.reasons),
        "model_fingerprint": flow.surrogate.fingerprint(),
        "fit_fingerprint": fit_data.fingerprint(),
        "check_fingerprint": check_data.fingerprint(),
    }


def run_validate(params: dict[str, Any], *, home: Path, job_id: str) -> dict[str, Any]:
    """Check a registered version against an uploaded dataset; the scorecard is the result.

    The version itself is immutable, so the scorecard is not written into its folder; the
    check is recorded as an event in the version's history instead.
    """
    from ergodex.registry import Registry
    from ergodex.validation import validate

    registry = Registry(home)
    ref = version_ref(params["name"], params["version"])
    info = registry.get(ref)
    surrogate = registry.load(ref)
    data = load_dataset(home, params["dataset"])
    scorecard = validate(surrogate, data, check_spec(params.get("check")))
    exact_ref = info.ref
    try:
        registry.record_event(
            exact_ref,
            "checked",
            f"service job {job_id}: {scorecard.verdict} on dataset {data.fingerprint()}",
        )
    except RegistryError:  # an event the registry refuses must not lose the check itself
        pass
    return {
        "name": info.name,
        "version": info.version,
        "verdict": scorecard.verdict,
        "reasons": list(scorecard.reasons),
        "data_fingerprint": data.fingerprint(),
        "scorecard": scorecard.to_dict(),
    }


def run_retrain(params: dict[str, Any], *, home: Path, job_id: str) -> dict[str, Any]:
    """Retrain a registered model on an uploaded dataset (see
    :func:`ergodex.retraining.retrain`)."""
    from ergodex.registry import Registry
    from ergodex.retraining import retrain

    data = load_dataset(home, params["dataset"])  # read with the options given at upload
    kwargs: dict[str, Any] = {"seed": int(params.get("seed", 0))}
    if params.get("method"):
        kwargs["config"] = (params["method"], params.get("settings") or {})
    if params.get("check"):
        kwargs["spec"] = check_spec(params["check"])
    if params.get("holdout"):
        kwargs["holdout"] = int(params["holdout"])
    return retrain(Registry(home), params["name"], data, **kwargs).to_dict()


RUNNERS: dict[str, Callable[..., dict[str, Any]]] = {
    "fit": run_fit,
    "validate": run_validate,
    "retrain": run_retrain,
}


def run(kind: str, params: dict[str, Any], *, home: Path, job_id: str) -> dict[str, Any]:
    """Run one job of the given kind and return its JSON-ready result."""
    return jsonable(RUNNERS[kind](params, home=home, job_id=job_id))
