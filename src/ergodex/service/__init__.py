"""The ergodex HTTP service: uploads, fit/validate/retrain jobs, and the registry over HTTP.

Importing this package is cheap and needs no web framework; :func:`create_app` imports FastAPI
(the ``service`` extra) on first use and raises
:class:`~ergodex.exceptions.OptionalDependencyError` with the install hint when it is missing.

Modules: :mod:`~ergodex.service.settings` (configuration), :mod:`~ergodex.service.auth` (bearer
token), :mod:`~ergodex.service.jobs` (SQLite job table and worker processes),
:mod:`~ergodex.service.tasks` (what a job runs), :mod:`~ergodex.service.datasets` (uploads),
:mod:`~ergodex.service.reader` (reads an upload in a child process),
:mod:`~ergodex.service.limits` (memory ceilings, archive sizes, the cost of a check),
:mod:`~ergodex.service.schemas` and :mod:`~ergodex.service.app` (the FastAPI application).
"""

from __future__ import annotations

from typing import Any

from ergodex.service.settings import ServiceSettings, read_token

__all__ = ["ServiceSettings", "create_app", "read_token"]


def create_app(settings: ServiceSettings, *, start_workers: bool = True) -> Any:
    """Build the FastAPI application (see :func:`ergodex.service.app.create_app`)."""
    from ergodex.service.app import create_app as _create_app

    return _create_app(settings, start_workers=start_workers)
