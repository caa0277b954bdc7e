"""Request and response bodies of the HTTP service (pydantic models → the OpenAPI document).

Every response the service sends has a model here, so that ``/openapi.json`` describes exactly
what a client receives; the tests check the running server against that document.
"""

from ergodex.exceptions import require

require("pydantic", "service", "the HTTP service")

from typing import Any, Final, Literal  # noqa: E402

from pydantic import BaseModel, ConfigDict, Field, field_validator  # noqa: E402

#: A model name as the registry accepts it (see ergodex.registry.validate_name).
NAME_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$"
#: The word that names a model's accepted version (``/models/NAME/current``, ``"version":
#: "current"``), as in the registry's references ``NAME/current``.
CURRENT: Final = "current"
#: A dataset id: the hex sha256 digest of the data's fingerprint.
DATASET_PATTERN = r"^[0-9a-f]{64}$"
#: A job id.
JOB_PATTERN = r"^[0-9a-f]{32}$"


class _Strict(BaseModel):
    # Unknown keys are mistakes worth reporting; NaN and infinity are never a valid setting.
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


class ErrorBody(BaseModel):
    """Every error: a stable machine-readable ``code`` and a one-line ``message``."""

    code: str = Field(description="stable error code, e.g. 'not-found', 'invalid-dataset'")
    message: str = Field(description="what was wrong, in one line")


class WorkerCounts(BaseModel):
    configured: int
    alive: int


class Health(BaseModel):
    status: Literal["ok", "degraded"] = Field(
        description="'degraded' when fewer job workers are alive than configured"
    )
    version: str
    workers: WorkerCounts
    jobs: dict[str, int] = Field(description="number of jobs in each state")
    writes_enabled: bool = Field(description="false when no token is configured")
    reads_protected: bool


class DatasetInfo(BaseModel):
    id: str = Field(description="dataset id: hex digest of the data fingerprint")
    fingerprint: str = Field(description="sha256 fingerprint of values, dt and names")
    filename: str
    format: Literal["csv", "npz", "netcdf"]
    size_bytes: int
    sha256: str = Field(description="sha256 of the uploaded file's bytes")
    variables: list[str]
    dt: float
    runs: int
    samples: int
    options: dict[str, Any] = Field(description="reader options given with the upload")
    created: str
    already_present: bool = Field(
        False, description="true when the same data had been uploaded before"
    )


class CheckOptions(_Strict):
    """Settings of a statistical check (see ergodex.validation.CheckSpec); unset: defaults."""

    # Upper bounds keep one request from occupying a worker for days.
    members: int | None = Field(None, ge=2, le=1024, description="ensemble members")
    length: float | None = Field(
        None, gt=0, le=1e5, description="time units per member after spin-up"
    )
    spinup: float | None = Field(None, ge=0, le=1e5, description="time units discarded first")
    seed: int | None = Field(None, ge=0, le=2**63 - 1)
    bins: int | None = Field(None, ge=2, le=10_000)
    max_lag: float | None = Field(None, gt=0, description="largest autocorrelation lag (time)")
    tolerance: float | None = Field(
        None, gt=0, description="largest allowed row ratio when false_reject_rate is 'fixed'"
    )
    false_reject_rate: float | Literal["fixed"] | None = Field(
        None,
        description="rate at which a right model fails; the threshold on the largest row ratio "
        "comes from a bootstrap of the reference (default 0.05); 'fixed': tolerance per row",
    )
    null_replicates: int | None = Field(
        None, ge=10, le=1000, description="bootstrap replicates behind that threshold"
    )
    tolerances: dict[str, float] | None = Field(None, description="tolerance per statistic")
    statistics: list[str] | None = Field(None, description="statistics to compare")
    regimes: dict[str, Any] | None = Field(
        None, description="regime definitions as in a regimes file, as a JSON object"
    )
    persistence: bool | None = Field(
        None, description="with regimes, score residence times and transitions too (default)"
    )


class FitJobRequest(_Strict):
    dataset: str = Field(pattern=DATASET_PATTERN, description="id of an uploaded dataset")
    name: str = Field(pattern=NAME_PATTERN, description="registry name for the new version")
    method: str = Field("sparse", description="fit method: sparse, linear-inverse, quadratic-noise")
    settings: dict[str, Any] = Field(default_factory=dict, description="fitter settings")
    check_dataset: str | None = Field(
        None, pattern=DATASET_PATTERN, description="held-out dataset; default: last runs of dataset"
    )
    holdout: int = Field(1, ge=1, le=10_000, description="runs held out when no check_dataset")
    check: CheckOptions | None = None
    accept: bool = Field(False, description="accept the new version if its scorecard passes")
    note: str | None = Field(None, max_length=2000)


class ValidateJobRequest(_Strict):
    name: str = Field(pattern=NAME_PATTERN)
    version: int | Literal["current"] = Field(
        CURRENT, description="version number, or 'current' for the accepted version"
    )

    @field_validator("version", mode="before")
    @classmethod
    def _former_word(cls, value: Any) -> Any:
        if value == "accepted":  # the word before 'current'
            raise ValueError("write 'current', not 'accepted', for the accepted version")
        return value

    dataset: str = Field(pattern=DATASET_PATTERN, description="id of an uploaded dataset")
    check: CheckOptions | None = None


class RetrainJobRequest(_Strict):
    name: str = Field(pattern=NAME_PATTERN, description="registered model to retrain")
    dataset: str = Field(pattern=DATASET_PATTERN, description="id of an uploaded dataset")
    method: str | None = Field(None, description="fit method of the refit; default: as before")
    settings: dict[str, Any] | None = None
    check: CheckOptions | None = None
    holdout: int | None = Field(None, ge=1, le=10_000)
    seed: int = Field(0, ge=0, le=2**63 - 1)


JobKind = Literal["fit", "validate", "retrain"]
JobState = Literal["queued", "running", "succeeded", "failed", "cancelled"]


class JobInfo(BaseModel):
    id: str
    kind: JobKind
    state: JobState
    params: dict[str, Any]
    created: str
    started: str | None = None
    finished: str | None = None
    result: dict[str, Any] | None = Field(None, description="set when state is 'succeeded'")
    error: ErrorBody | None = Field(
        None, description="set when state is 'failed' or 'cancelled' (code 'cancelled')"
    )


class JobList(BaseModel):
    jobs: list[JobInfo]


class DatasetList(BaseModel):
    datasets: list[DatasetInfo]


class ModelSummaryOut(BaseModel):
    name: str
    versions: int
    latest: int
    accepted: int | None
    statuses: dict[str, int]
    integrity_failed: list[int] = Field(
        default_factory=list, description="versions whose files no longer match their sha256"
    )


class ModelList(BaseModel):
    models: list[ModelSummaryOut]


class VersionOut(BaseModel):
    name: str
    version: int
    ref: str
    status: Literal["candidate", "accepted", "rejected", "retired"]
    created: str
    artifacts: dict[str, str] = Field(description="file name → sha256 of every stored file")
    note: str = ""
    parent: str | None = None
    datasets: list[dict[str, Any]] = Field(default_factory=list)
    verdict: str | None = None
    data_fingerprint: str | None = None
    model_fingerprint: str | None = None
    integrity: Literal["ok", "failed"] | None = Field(
        None, description="'failed' when a file no longer matches its sha256: distrust the status"
    )
    integrity_problems: list[str] = Field(default_factory=list)


class VersionList(BaseModel):
    name: str
    versions: list[VersionOut]


class EventOut(BaseModel):
    id: int
    time: str
    version: int
    event: str
    from_status: str | None
    to_status: str | None
    actor: str
    reason: str
    override: bool


class History(BaseModel):
    name: str
    events: list[EventOut]


class AcceptRequest(_Strict):
    reason: str = Field(default="", max_length=2000)
    override: bool = Field(
        default=False, description="accept without a passing scorecard; needs a reason"
    )


class ReasonRequest(_Strict):
    reason: str = Field(min_length=1, max_length=2000)
