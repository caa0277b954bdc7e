"""The FastAPI application of the ergodex HTTP service (build it with :func:`create_app`).

The service is a thin shell over the Python API, like the command line: uploads go through
:func:`ergodex.readers.read_series`, jobs through :mod:`ergodex.service.tasks` (which call the
pipeline, validation and retraining), and every model read through
:class:`ergodex.registry.Registry`, whose verified bytes are sent unchanged.

Endpoints (all bodies JSON unless said otherwise; every error is ``{"code", "message"}``):

=======  =================================================  =====
method   path                                               auth
=======  =================================================  =====
GET      /health                                            open
POST     /datasets            (multipart ``file``, ``dt``)  write
GET      /datasets, /datasets/{id}                          read
POST     /jobs/fit, /jobs/validate, /jobs/retrain           write
POST     /jobs/{id}/cancel                                  write
GET      /jobs, /jobs/{id}                                  read
GET      /models, /models/{name}, /models/{name}/history    read
GET      /models/{name}/versions/{n}, /models/{name}/current   read
GET      …/versions/{n}/model.json|scorecard.json|report.html          read
GET      /models/{name}/current/model.json|scorecard.json|report.html  read
POST     …/versions/{n}/accept|reject|retire                write
=======  =================================================  =====

"read" endpoints are open unless the server runs with ``protect_reads``.

Limits: uploads are read in a child process (:mod:`ergodex.service.reader`), never here; a
submission beyond the queue bounds gets 429 ``queue-full`` with ``Retry-After``; check options
whose estimated memory exceeds the job memory limit get 422 ``invalid-settings``; the supervisor
thread fails jobs over the wall-clock limit and replaces dead workers.
"""

# No ``from __future__ import annotations``: FastAPI reads the annotations of the handlers
# defined inside create_app at definition time.

from ergodex.exceptions import require

require("fastapi", "service", "the HTTP service")
require("python_multipart", "service", "dataset uploads to the HTTP service")

import json  # noqa: E402
import logging  # noqa: E402
import os  # noqa: E402
import threading  # noqa: E402
from contextlib import asynccontextmanager  # noqa: E402
from typing import Annotated, Any, Literal, cast  # noqa: E402

from fastapi import (  # noqa: E402
    APIRouter,
    Body,
    Depends,
    FastAPI,
    File,
    Form,
    Path,
    Query,
    Request,
    Response,
    UploadFile,
)
from fastapi.exceptions import RequestValidationError  # noqa: E402
from fastapi.responses import JSONResponse  # noqa: E402
from fastapi.security import HTTPBearer  # noqa: E402
from starlette.concurrency import run_in_threadpool  # noqa: E402
from starlette.exceptions import HTTPException as StarletteHTTPException  # noqa: E402

from ergodex import CAUTION, __version__  # noqa: E402
from ergodex.exceptions import (  # noqa: E402
    ErgodexError,
    IntegrityError,
    RegistryError,
    one_line,
)
from ergodex.service import schemas  # noqa: E402
from ergodex.service.auth import (  # noqa: E402
    MESSAGES,
    NO_TOKEN_CONFIGURED,
    authorize,
    bearer_token,
    owner_key,
)
from ergodex.service.datasets import store_upload  # noqa: E402
from ergodex.service.errors import HTTP_CODES, ApiError, describe_error  # noqa: E402
from ergodex.service.jobs import (  # noqa: E402
    JOB_STATES,
    RUNNING,
    JobRecord,
    JobStore,
    QueueFull,
    WorkerPool,
    hold_home_lock,
)
from ergodex.service.limits import CHECK_MEMORY_FACTOR, check_memory_estimate  # noqa: E402
from ergodex.service.settings import ServiceSettings  # noqa: E402
from ergodex.service.tasks import version_ref  # noqa: E402 - light: the numerics load lazily

log = logging.getLogger(__name__)

#: Largest JSON body of a non-upload request; job requests are small.
MAX_JSON_BODY = 1 << 20
#: Allowance for the multipart envelope around an uploaded file.
MULTIPART_SLACK = 1 << 16

#: Seconds a client refused for a full queue is told to wait (``Retry-After``).
RETRY_AFTER_SECONDS = 30

#: Seconds between the supervisor's rounds (dead workers, jobs over the time limit).
SUPERVISE_INTERVAL = 0.5

#: Reason stored on jobs that a previous server process left running.
INTERRUPTED_REASON = (
    "the server stopped (crashed or was killed) while this job was running; its work was lost, "
    "submit it again"
)

ERRORS: dict[int | str, dict[str, Any]] = {
    "4XX": {"model": schemas.ErrorBody, "description": "refused: see code and message"},
    "5XX": {"model": schemas.ErrorBody, "description": "server fault (e.g. integrity-error)"},
}

#: The three files of a version that can be downloaded, with their media types.
ARTIFACTS = {
    "model.json": "application/json",
    "scorecard.json": "application/json",
    "report.html": "text/html; charset=utf-8",
}


def _error_response(
    status: int, code: str, message: str, extra_headers: dict[str, str] | None = None
) -> JSONResponse:
    headers = {"WWW-Authenticate": "Bearer"} if status == 401 else {}
    headers.update(extra_headers or {})
    return JSONResponse(
        status_code=status, content={"code": code, "message": message}, headers=headers
    )


def _refusal(reason: str) -> ApiError:
    """The error for a refused token check (403 when writes are disabled, else 401)."""
    status = 403 if reason == NO_TOKEN_CONFIGURED else 401
    return ApiError(status, reason, MESSAGES[reason])


class BodyLimit:
    """ASGI middleware: refuse oversized request bodies before any handler parses them.

    Uploads also have their token checked here, so that a client without the token cannot make
    the server buffer a file. Bodies within the limit are buffered and replayed to the app.
    """

    def __init__(self, app, settings: ServiceSettings):
        self.app = app
        self.settings = settings

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http" or scope["method"] in ("GET", "HEAD", "OPTIONS"):
            await self.app(scope, receive, send)
            return
        is_upload = scope["path"].rstrip("/") == "/datasets"
        limit = self.settings.max_upload_bytes + MULTIPART_SLACK if is_upload else MAX_JSON_BODY
        headers = {k.lower(): v for k, v in scope.get("headers", [])}
        if is_upload:
            header = headers.get(b"authorization", b"").decode("latin-1") or None
            reason = authorize(header, self.settings.token)
            if reason is not None:
                error = _refusal(reason)
                await _error_response(error.status, error.code, str(error))(scope, receive, send)
                return
        too_large = _error_response(
            413,
            "upload-too-large" if is_upload else "body-too-large",
            f"the request body is larger than this server's limit of {limit} bytes"
            + (f" (files up to {self.settings.max_upload_bytes} bytes)" if is_upload else ""),
        )
        declared = headers.get(b"content-length")
        if declared is not None:
            try:
                if int(declared) > limit:
                    await too_large(scope, receive, send)
                    return
            except ValueError:
                await _error_response(400, "bad-request", "Content-Length is not a number")(
                    scope, receive, send
                )
                return
        chunks, size = [], 0
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return
            body = message.get("body", b"")
            size += len(body)
            if size > limit:
                await too_large(scope, receive, send)
                return
            chunks.append(body)
            if not message.get("more_body", False):
                break
        buffered = {"type": "http.request", "body": b"".join(chunks), "more_body": False}
        sent = False

        async def replay():
            nonlocal sent
            if not sent:
                sent = True
                return buffered
            return await receive()

        await self.app(scope, replay, send)


def _job_out(job: JobRecord, clean=one_line) -> schemas.JobInfo:
    result = job.result
    if job.kind == "retrain" and isinstance(result, dict):
        from ergodex.retraining import OLD_DECISION_FORMATS, upgrade_decision

        if result.get("format") in OLD_DECISION_FORMATS:  # stored by an earlier server
            result = upgrade_decision(result, f"result of job {job.id}")
    error = None
    if job.error_code is not None:
        error = schemas.ErrorBody(code=job.error_code, message=clean(job.error_message or ""))
    return schemas.JobInfo(
        id=job.id,
        # the store writes only these values; pydantic checks them again here
        kind=cast(schemas.JobKind, job.kind),
        state=cast(schemas.JobState, job.state),
        params=job.params,
        created=job.created,
        started=job.started,
        finished=job.finished,
        result=result,
        error=error,
    )


def _version_out(info) -> schemas.VersionOut:
    data = info.to_dict()
    data.pop("folder", None)  # a server path tells a client nothing it can use
    prefix = f"{info.folder}{os.sep}"
    data["integrity_problems"] = [
        p.replace(prefix, f"{info.ref}/") for p in data.get("integrity_problems", [])
    ]
    fields = schemas.VersionOut.model_fields
    return schemas.VersionOut(**{k: v for k, v in data.items() if k in fields})


def _event_out(event) -> schemas.EventOut:
    data = event.to_dict()
    fields = schemas.EventOut.model_fields
    return schemas.EventOut(**{k: v for k, v in data.items() if k in fields})


def _registry_get(registry, ref: str):
    """Version info, or 404 for an unknown name or version (500 for a damaged registry)."""
    try:
        return registry.get(ref)
    except IntegrityError as exc:
        raise ApiError(500, "integrity-error", one_line(str(exc))) from None
    except RegistryError as exc:
        raise ApiError(404, "not-found", one_line(str(exc))) from None


def create_app(settings: ServiceSettings, *, start_workers: bool = True) -> FastAPI:
    """Build the service for one registry home.

    Parameters
    ----------
    settings
        Home, token, upload limit, number of workers.
    start_workers
        Start the job worker processes when the app starts (a script that only wants to read
        the registry over HTTP may pass ``False``; jobs then wait in the queue).

    Notes
    -----
    At start-up, jobs that a previous server left ``running`` are marked ``failed`` with the
    reason, before any worker starts; at shutdown, workers get a few seconds to finish and a
    job still running is marked failed.
    """
    from ergodex.registry import Registry

    settings.service_dir.mkdir(parents=True, exist_ok=True)
    store = JobStore(settings.jobs_path)
    registry = Registry(settings.home)
    pool = WorkerPool(
        settings.jobs_path,
        settings.home,
        size=settings.workers if start_workers else 0,
        poll_interval=settings.poll_interval,
        memory_bytes=settings.job_memory_bytes,
    )

    @asynccontextmanager
    async def lifespan(app: FastAPI):
        # Taken before touching the jobs another server may be running (``ergodex serve`` takes
        # it earlier still, to report a clash as a one-line error).
        lock = app.state.home_lock or hold_home_lock(settings)
        failed = store.fail_running(INTERRUPTED_REASON)
        if failed:
            log.warning("marked %d interrupted job(s) failed: %s", len(failed), ", ".join(failed))
        pool.start()

        # A thread of its own, not the request thread pool: when every pooled thread is busy
        # (slow clients, uploads being read), time limits and dead workers are still handled.
        stop_supervisor = threading.Event()

        def supervise() -> None:
            while not stop_supervisor.wait(SUPERVISE_INTERVAL):
                try:
                    pool.enforce_time_limit(store, settings.job_time_limit)
                    pool.replace_dead(store)
                except Exception:  # noqa: BLE001 - the supervisor must outlive a bad round
                    log.exception("supervisor round failed; trying again")

        supervisor = threading.Thread(target=supervise, name="ergodex-supervisor", daemon=True)
        supervisor.start()
        try:
            yield
        finally:
            stop_supervisor.set()
            await run_in_threadpool(supervisor.join, 30.0)
            await run_in_threadpool(pool.stop, store)
            lock.close()

    app = FastAPI(
        title="ergodex service",
        version=__version__,
        summary="Upload time series, run fit/validate/retrain jobs, read the surrogate registry.",
        description=(
            "Write endpoints need `Authorization: Bearer <token>`. Every error is a JSON object "
            "with a stable `code` and a one-line `message`. " + CAUTION
        ),
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.store = store
    app.state.pool = pool
    app.state.home_lock = None
    app.add_middleware(BodyLimit, settings=settings)

    # -- errors -------------------------------------------------------------------------------

    home_text = str(registry.home)

    def clean(message: str) -> str:
        # Where the server keeps its files is none of a client's business.
        return one_line(message.replace(home_text, "<home>"))

    @app.exception_handler(ApiError)
    async def _api_error(request: Request, exc: ApiError):
        return _error_response(exc.status, exc.code, clean(str(exc)), exc.headers)

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError):
        parts = []
        for error in exc.errors()[:5]:
            where = ".".join(str(p) for p in error.get("loc", ()))
            parts.append(f"{where}: {error.get('msg', 'invalid')}")
        return _error_response(422, "invalid-request", one_line("; ".join(parts) or "invalid"))

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException):
        code = HTTP_CODES.get(exc.status_code, "http-error")
        response = _error_response(exc.status_code, code, one_line(str(exc.detail)))
        if exc.headers:
            response.headers.update(exc.headers)
        return response

    @app.exception_handler(ErgodexError)
    async def _ergodex(request: Request, exc: ErgodexError):
        code, message = describe_error(exc)
        status = 500 if isinstance(exc, IntegrityError) else 422
        return _error_response(status, code, clean(message))

    @app.exception_handler(Exception)
    async def _unexpected(request: Request, exc: Exception):
        log.exception("unexpected error on %s %s", request.method, request.url.path)
        return _error_response(500, "internal-error", f"{type(exc).__name__}: see the server log")

    # -- access -------------------------------------------------------------------------------

    bearer = HTTPBearer(
        auto_error=False,
        description="the server's token (--token-file or ERGODEX_TOKEN)",
    )

    def write_access(request: Request, _credentials=Depends(bearer)) -> None:
        reason = authorize(request.headers.get("authorization"), settings.token)
        if reason is not None:
            raise _refusal(reason)

    read_dependencies = [Depends(write_access)] if settings.protect_reads else []
    reads = APIRouter(dependencies=read_dependencies, responses=ERRORS)
    writes = APIRouter(dependencies=[Depends(write_access)], responses=ERRORS)

    # -- health -------------------------------------------------------------------------------

    @app.get("/health", response_model=schemas.Health, tags=["service"], responses=ERRORS)
    def health() -> schemas.Health:
        """Liveness and a summary: workers alive, jobs per state, whether writes are enabled."""
        alive = pool.alive()
        return schemas.Health(
            status="ok" if alive >= pool.size else "degraded",
            version=__version__,
            workers=schemas.WorkerCounts(configured=pool.size, alive=alive),
            jobs=store.counts(),
            writes_enabled=settings.token is not None,
            reads_protected=settings.protect_reads,
        )

    # -- datasets -----------------------------------------------------------------------------

    @writes.post(
        "/datasets",
        status_code=201,
        response_model=schemas.DatasetInfo,
        tags=["datasets"],
        responses={
            200: {
                "model": schemas.DatasetInfo,
                "description": "the same data was uploaded before; its record is returned",
            }
        },
    )
    async def upload_dataset(
        response: Response,
        file: Annotated[UploadFile, File(description="CSV, NPZ or NetCDF file; a plain name")],
        dt: Annotated[
            float | None,
            Form(
                gt=0, allow_inf_nan=False, description="sampling interval, for files without time"
            ),
        ] = None,
    ) -> schemas.DatasetInfo:
        """Upload a dataset file; it is read and checked like on the command line.

        The server does not read it itself: an NPZ archive's declared inflated size is checked
        first (413 ``dataset-too-large``), then a short-lived process under the job memory
        limit reads the file and returns what the record needs.

        Refused with 4xx and nothing stored: names with folder parts, unknown file types,
        content that is not of its type, data the reader rejects, files over the size limit.
        """
        record, created = await run_in_threadpool(
            store_upload, settings, store, file.filename, file.file, options={"dt": dt}
        )
        if not created:
            response.status_code = 200
        return schemas.DatasetInfo(**record, already_present=not created)

    @reads.get("/datasets", response_model=schemas.DatasetList, tags=["datasets"])
    def list_datasets(
        limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    ) -> schemas.DatasetList:
        """Uploaded datasets, newest first."""
        return schemas.DatasetList(
            datasets=[schemas.DatasetInfo(**r) for r in store.list_datasets(limit=limit)]
        )

    @reads.get("/datasets/{dataset_id}", response_model=schemas.DatasetInfo, tags=["datasets"])
    def get_dataset(
        dataset_id: Annotated[str, Path(pattern=schemas.DATASET_PATTERN)],
    ) -> schemas.DatasetInfo:
        """One uploaded dataset's record."""
        record = store.get_dataset(dataset_id)
        if record is None:
            raise ApiError(404, "not-found", f"no uploaded dataset with id {dataset_id}")
        return schemas.DatasetInfo(**record)

    # -- jobs ---------------------------------------------------------------------------------

    def need_dataset(dataset_id: str) -> dict[str, Any]:
        record = store.get_dataset(dataset_id)
        if record is None:
            raise ApiError(404, "not-found", f"no uploaded dataset with id {dataset_id}")
        return record

    def check_options(options: schemas.CheckOptions | None, reference: dict[str, Any]) -> None:
        """Refuse bad check options, and options whose ensemble cannot fit the memory limit.

        ``reference`` is the record of the dataset the check compares with (its ``dt`` turns a
        length into steps, its variables and samples size the ensemble).
        """
        values = options.model_dump() if options is not None else {}
        if options is not None:
            from ergodex.service.tasks import check_spec

            try:
                check_spec(values)
            except Exception as exc:  # noqa: BLE001 - whatever the options break, the client's
                if not isinstance(exc, ErgodexError):
                    log.info("check options refused with %r", exc)
                raise ApiError(422, "invalid-settings", one_line(f"check options: {exc}")) from None
        estimate = check_memory_estimate(
            values,
            dt=float(reference["dt"]),
            variables=len(reference["variables"]),
            samples=int(reference["samples"]),
        )
        if estimate > settings.job_memory_bytes:
            raise ApiError(
                422,
                "invalid-settings",
                f"check options: members × length ask for about {estimate / 2**20:.0f} MiB "
                f"(members × steps × variables × 8 bytes × {CHECK_MEMORY_FACTOR}), over this "
                f"server's job memory limit of {settings.job_memory_bytes / 2**20:.0f} MiB; use "
                "fewer members or a shorter length",
            )

    def check_fit(method: str, fit_settings: dict[str, Any]) -> None:
        from ergodex.fitting import check_fit_settings

        try:
            check_fit_settings(method, fit_settings)
        except Exception as exc:  # noqa: BLE001 - the settings are the client's
            if not isinstance(exc, ErgodexError):
                log.info("fit settings refused with %r", exc)
            raise ApiError(422, "invalid-settings", one_line(str(exc))) from None

    def check_name(name: str) -> None:
        from ergodex.registry import validate_name

        try:
            validate_name(name)
        except RegistryError as exc:
            raise ApiError(422, "invalid-name", one_line(str(exc))) from None

    def submit(kind: str, body, request: Request) -> schemas.JobInfo:
        owner = owner_key(bearer_token(request.headers.get("authorization")))
        try:
            job = store.submit(
                kind,
                body.model_dump(mode="json"),
                owner=owner,
                per_owner=settings.queue_per_token,
                total=settings.queue_total,
            )
        except QueueFull as exc:
            whose = "this token has" if exc.scope == "token" else "the server has"
            option = "--queue-per-token" if exc.scope == "token" else "--queue-limit"
            raise ApiError(
                429,
                "queue-full",
                f"{whose} {exc.limit} jobs queued or running, its limit ({option}); wait for "
                "some to finish or cancel some, then submit again",
                headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
            ) from None
        return _job_out(job, clean)

    @writes.post("/jobs/fit", status_code=202, response_model=schemas.JobInfo, tags=["jobs"])
    def submit_fit(body: schemas.FitJobRequest, request: Request) -> schemas.JobInfo:
        """Queue a fit: fit on the dataset, check on held-out runs, register a new version."""
        check_name(body.name)
        check_fit(body.method, body.settings)
        reference = need_dataset(body.dataset)
        if body.check_dataset:
            reference = need_dataset(body.check_dataset)
        check_options(body.check, reference)
        return submit("fit", body, request)

    @writes.post("/jobs/validate", status_code=202, response_model=schemas.JobInfo, tags=["jobs"])
    def submit_validate(body: schemas.ValidateJobRequest, request: Request) -> schemas.JobInfo:
        """Queue a check of a registered version against a dataset (scorecard in the result)."""
        _registry_get(registry, version_ref(body.name, body.version))
        check_options(body.check, need_dataset(body.dataset))
        return submit("validate", body, request)

    @writes.post("/jobs/retrain", status_code=202, response_model=schemas.JobInfo, tags=["jobs"])
    def submit_retrain(body: schemas.RetrainJobRequest, request: Request) -> schemas.JobInfo:
        """Queue a retrain: check the accepted model on new data, refit, promote or keep."""
        try:
            registry.versions(body.name)
        except RegistryError as exc:
            raise ApiError(404, "not-found", one_line(str(exc))) from None
        if body.method is not None or body.settings:
            check_fit(body.method or "sparse", body.settings or {})
        check_options(body.check, need_dataset(body.dataset))
        return submit("retrain", body, request)

    @writes.post(
        "/jobs/{job_id}/cancel",
        response_model=schemas.JobInfo,
        tags=["jobs"],
        responses={409: {"model": schemas.ErrorBody, "description": "the job had finished"}},
    )
    def cancel_job(job_id: Annotated[str, Path(pattern=schemas.JOB_PATTERN)]) -> schemas.JobInfo:
        """Cancel a queued or running job (a running job's worker is ended and replaced).

        Cancelling a cancelled job again returns it unchanged; a job that succeeded or failed
        is refused with 409 ``job-finished``.
        """
        before, after = store.cancel(job_id)
        if before is None:
            raise ApiError(404, "not-found", f"no job with id {job_id}")
        if after is None:
            if before.state == "cancelled":
                return _job_out(before, clean)
            raise ApiError(
                409, "job-finished", f"job {job_id} has already {before.state}; nothing to cancel"
            )
        if before.state == RUNNING:
            pool.end_worker(before.worker_pid)
        return _job_out(after, clean)

    @reads.get("/jobs", response_model=schemas.JobList, tags=["jobs"])
    def list_jobs(
        state: Annotated[Literal[JOB_STATES] | None, Query()] = None,  # type: ignore[valid-type]
        limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    ) -> schemas.JobList:
        """Jobs, newest first, optionally in one state."""
        return schemas.JobList(
            jobs=[_job_out(j, clean) for j in store.list(state=state, limit=limit)]
        )

    @reads.get("/jobs/{job_id}", response_model=schemas.JobInfo, tags=["jobs"])
    def get_job(job_id: Annotated[str, Path(pattern=schemas.JOB_PATTERN)]) -> schemas.JobInfo:
        """A job's state, and its result or error once finished."""
        job = store.get(job_id)
        if job is None:
            raise ApiError(404, "not-found", f"no job with id {job_id}")
        return _job_out(job, clean)

    # -- models -------------------------------------------------------------------------------

    ModelName = Annotated[str, Path(pattern=schemas.NAME_PATTERN, description="model name")]
    VersionNumber = Annotated[int, Path(ge=1, le=999_999_999, description="version number")]

    @reads.get("/models", response_model=schemas.ModelList, tags=["models"])
    def list_models() -> schemas.ModelList:
        """Every registered model name with its version counts."""
        return schemas.ModelList(
            models=[schemas.ModelSummaryOut(**m.to_dict()) for m in registry.list_models()]
        )

    @reads.get("/models/{name}", response_model=schemas.VersionList, tags=["models"])
    def list_versions(name: ModelName) -> schemas.VersionList:
        """Every version of a model, oldest first."""
        try:
            versions = registry.versions(name)
        except RegistryError as exc:
            raise ApiError(404, "not-found", one_line(str(exc))) from None
        return schemas.VersionList(name=name, versions=[_version_out(v) for v in versions])

    @reads.get("/models/{name}/history", response_model=schemas.History, tags=["models"])
    def history(name: ModelName) -> schemas.History:
        """Every status change and recorded event of a model, oldest first."""
        try:
            events = registry.history(name)
        except RegistryError as exc:
            raise ApiError(404, "not-found", one_line(str(exc))) from None
        return schemas.History(name=name, events=[_event_out(e) for e in events])

    # The former alias of the accepted version, /models/NAME/versions/accepted[/FILE], is now
    # /models/NAME/current[/FILE]: say so (declared first, so that the numbered routes below do
    # not answer it with a validation error).
    @reads.get("/models/{name}/versions/accepted", include_in_schema=False)
    @reads.get("/models/{name}/versions/accepted/{filename}", include_in_schema=False)
    def former_alias(name: ModelName, filename: str | None = None) -> Response:
        rest = f"/{filename}" if filename else ""
        now = f"/models/{name}/{schemas.CURRENT}{rest}"
        message = f"/models/{name}/versions/accepted{rest} is now {now}: use that path"
        raise ApiError(404, "not-found", one_line(message))

    @reads.get(
        "/models/{name}/versions/{version}", response_model=schemas.VersionOut, tags=["models"]
    )
    def get_version(name: ModelName, version: VersionNumber) -> schemas.VersionOut:
        """One version's status, artifact hashes and lineage."""
        return _version_out(_registry_get(registry, version_ref(name, version)))

    @reads.get(
        f"/models/{{name}}/{schemas.CURRENT}",
        response_model=schemas.VersionOut,
        tags=["models"],
    )
    def get_current(name: ModelName) -> schemas.VersionOut:
        """The accepted version of a model (the one downstream users load)."""
        return _version_out(_registry_get(registry, version_ref(name, schemas.CURRENT)))

    def download(name: str, version: int | str, filename: str) -> Response:
        info = _registry_get(registry, version_ref(name, version))
        if filename not in info.artifacts:
            raise ApiError(
                404,
                "not-found",
                f"{info.ref} has no {filename} (it holds {', '.join(sorted(info.artifacts))})",
            )
        try:
            data = registry.artifact(info, filename)
        except IntegrityError as exc:
            raise ApiError(500, "integrity-error", one_line(str(exc))) from None
        return Response(
            content=data,
            media_type=ARTIFACTS[filename],
            headers={"ETag": f'"{info.artifacts[filename]}"'},
        )

    def _file_route(filename: str, schema: dict[str, Any], summary: str):
        media = ARTIFACTS[filename].split(";")[0]
        responses: dict[int | str, dict[str, Any]] = {
            200: {
                "description": f"the stored {filename}, byte for byte (verified)",
                "content": {media: {"schema": schema}},
            }
        }
        operation = f"download_{filename.replace('.', '_')}"

        @reads.get(
            f"/models/{{name}}/versions/{{version}}/{filename}",
            response_class=Response,
            tags=["models"],
            summary=summary,
            operation_id=operation,
            responses=responses,
        )
        def route(name: ModelName, version: VersionNumber) -> Response:
            return download(name, version, filename)

        @reads.get(
            f"/models/{{name}}/{schemas.CURRENT}/{filename}",
            response_class=Response,
            tags=["models"],
            summary=summary.replace("a version's", "the accepted version's"),
            operation_id=f"{operation}_current",
            responses=responses,
        )
        def current_route(name: ModelName) -> Response:
            return download(name, schemas.CURRENT, filename)

        return route, current_route

    _file_route("model.json", {"type": "object"}, "Download a version's model.json")
    _file_route("scorecard.json", {"type": "object"}, "Download a version's scorecard.json")
    _file_route("report.html", {"type": "string"}, "Download a version's report.html")

    def change(name: str, version: int, action: str, **kwargs) -> schemas.VersionOut:
        ref = version_ref(name, version)
        _registry_get(registry, ref)
        try:
            info = getattr(registry, action)(ref, **kwargs)
        except IntegrityError as exc:
            raise ApiError(500, "integrity-error", one_line(str(exc))) from None
        except RegistryError as exc:
            raise ApiError(409, "status-conflict", one_line(str(exc))) from None
        return _version_out(info)

    @writes.post(
        "/models/{name}/versions/{version}/accept",
        response_model=schemas.VersionOut,
        tags=["models"],
    )
    def accept(
        name: ModelName,
        version: VersionNumber,
        # A frozen-in-practice default (never mutated), so one shared instance is safe.
        body: Annotated[schemas.AcceptRequest, Body()] = schemas.AcceptRequest(),  # noqa: B008
    ) -> schemas.VersionOut:
        """Accept a candidate (needs its passing scorecard, or override with a reason)."""
        return change(name, version, "accept", reason=body.reason, override=body.override)

    @writes.post(
        "/models/{name}/versions/{version}/reject",
        response_model=schemas.VersionOut,
        tags=["models"],
    )
    def reject(
        name: ModelName, version: VersionNumber, body: schemas.ReasonRequest
    ) -> schemas.VersionOut:
        """Reject a candidate (a reason is required)."""
        return change(name, version, "reject", reason=body.reason)

    @writes.post(
        "/models/{name}/versions/{version}/retire",
        response_model=schemas.VersionOut,
        tags=["models"],
    )
    def retire(
        name: ModelName, version: VersionNumber, body: schemas.ReasonRequest
    ) -> schemas.VersionOut:
        """Retire an accepted version (a reason is required)."""
        return change(name, version, "retire", reason=body.reason)

    app.include_router(writes)
    app.include_router(reads)
    return app


def openapi_document(settings: ServiceSettings) -> dict[str, Any]:
    """The OpenAPI document of the service (without starting it), e.g. for documentation."""
    return create_app(settings, start_workers=False).openapi()


def dump_openapi(settings: ServiceSettings) -> str:
    """The OpenAPI document as indented JSON text."""
    return json.dumps(openapi_document(settings), indent=2, sort_keys=True)
