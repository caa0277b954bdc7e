"""Configuration of the HTTP service: where it keeps things, who may write, how much it accepts.

Everything the server needs is gathered in one frozen :class:`ServiceSettings`, built once by
``ergodex serve`` (or by a script) and handed to :func:`ergodex.service.app.create_app`. Reading a
token file or the environment happens here and nowhere else, so that the request handlers only
ever compare against a value fixed at start-up.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

from ergodex.exceptions import SettingsError

#: Environment variable holding the bearer token when no ``--token-file`` is given.
TOKEN_ENV = "ERGODEX_TOKEN"

#: Shortest token accepted: a short token can be guessed by trying, whatever the comparison.
MIN_TOKEN_LENGTH = 16

#: Default upload limit (bytes). A few tens of runs of a few sensors at 10^5 samples fit easily.
DEFAULT_MAX_UPLOAD = 32 * 1024 * 1024

#: Default ceiling on what an uploaded archive declares it holds once inflated, as a multiple
#: of the upload limit: NPZ members of smooth float data rarely compress more than 2-4 times,
#: while a crafted archive inflates a thousand-fold (deflate's ceiling is about 1032:1).
DATASET_TO_UPLOAD_RATIO = 8

#: Default bound on queued + running jobs of one token, and of all tokens together.
DEFAULT_QUEUE_PER_TOKEN = 20
DEFAULT_QUEUE_TOTAL = 100

#: Default wall-clock limit of one job (seconds) and address-space limit of a worker (bytes).
DEFAULT_JOB_TIME_LIMIT = 3600.0
DEFAULT_JOB_MEMORY = 4096 * 1024 * 1024

#: Seconds the server waits for an upload to be read in its short-lived reader process.
DEFAULT_PARSE_TIME_LIMIT = 120.0

#: Sub-folder of the registry home where the service keeps its job table and uploaded datasets.
SERVICE_DIR = "service"


@dataclass(frozen=True)
class ServiceSettings:
    """Settings of one running service.

    Parameters
    ----------
    home
        Registry home (``registry.sqlite3`` and the version folders). The service keeps its own
        files (job table, uploaded datasets) in ``home/service/``.
    token
        Bearer token required by every write endpoint; ``None`` refuses every write (the service
        is never open for writing by accident).
    protect_reads
        When true, read endpoints need the token too (``/health`` stays open so that a load
        balancer can probe it).
    max_upload_bytes
        Largest dataset file accepted by the upload endpoint.
    max_dataset_bytes
        Largest total size an uploaded archive (NPZ) may declare for its members once inflated;
        checked on the zip directory before anything is inflated. ``None``:
        :data:`DATASET_TO_UPLOAD_RATIO` times ``max_upload_bytes``.
    workers
        Number of job worker processes started by the server (0: jobs queue up but none run,
        useful only in tests of the queue itself).
    poll_interval
        Seconds an idle worker sleeps between looks at the job table.
    queue_per_token, queue_total
        Most jobs queued or running at once for one token, and for the whole server; a
        submission beyond either is refused (429 ``queue-full``).
    job_time_limit
        Wall-clock seconds a job may run before its worker is ended (job failed, ``time-limit``).
    job_memory_bytes
        Address-space limit (``RLIMIT_AS``) of a worker while it runs a job, and of the process
        that reads an upload; a job that needs more fails with ``memory-limit``.
    parse_time_limit
        Seconds an upload may take to be read before it is refused.
    """

    home: Path
    token: str | None = field(default=None, repr=False)
    protect_reads: bool = False
    max_upload_bytes: int = DEFAULT_MAX_UPLOAD
    workers: int = 2
    poll_interval: float = 0.2
    max_dataset_bytes: int | None = None
    queue_per_token: int = DEFAULT_QUEUE_PER_TOKEN
    queue_total: int = DEFAULT_QUEUE_TOTAL
    job_time_limit: float = DEFAULT_JOB_TIME_LIMIT
    job_memory_bytes: int = DEFAULT_JOB_MEMORY
    parse_time_limit: float = DEFAULT_PARSE_TIME_LIMIT

    def __post_init__(self) -> None:
        object.__setattr__(self, "home", Path(self.home).expanduser().absolute())
        if self.token is not None:
            check_token(self.token)
        _positive_int("max_upload_bytes", self.max_upload_bytes)
        if self.max_dataset_bytes is None:
            object.__setattr__(
                self, "max_dataset_bytes", DATASET_TO_UPLOAD_RATIO * int(self.max_upload_bytes)
            )
        _positive_int("max_dataset_bytes", self.max_dataset_bytes)
        _positive_int("workers", self.workers, low=0)
        _positive_int("queue_per_token", self.queue_per_token)
        _positive_int("queue_total", self.queue_total)
        _positive_int("job_memory_bytes", self.job_memory_bytes)
        for name in ("poll_interval", "job_time_limit", "parse_time_limit"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise SettingsError(f"{name} must be a finite number of seconds > 0, got {value}")

    @property
    def service_dir(self) -> Path:
        """``home/service``: the job table and the uploaded datasets."""
        return self.home / SERVICE_DIR

    @property
    def jobs_path(self) -> Path:
        """The SQLite file holding jobs and dataset records."""
        return self.service_dir / "jobs.sqlite3"

    @property
    def datasets_dir(self) -> Path:
        """Folder of uploaded datasets, one sub-folder per dataset id."""
        return self.service_dir / "datasets"


def _positive_int(name: str, value, *, low: int = 1) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise SettingsError(f"{name} must be a whole number ≥ {low}, got {value!r}")


def check_token(token: str) -> None:
    """Refuse a token no client could send or that is too short to resist guessing.

    HTTP header values travel as ISO-8859-1 bytes, and clients differ on anything beyond
    printable ASCII, so a token with other characters would be accepted here and then refuse
    every client; it is refused at start-up instead.
    """
    bad = [c for c in token if not (" " < c <= "~")]
    if bad:
        raise SettingsError(
            f"the service token holds {len(bad)} character(s) that are spaces or outside "
            f"printable ASCII (first: {bad[0]!r}); HTTP clients cannot send it in a header; use "
            'letters, digits and punctuation only (for example: python -c "import secrets; '
            'print(secrets.token_urlsafe(32))")'
        )
    if len(token) < MIN_TOKEN_LENGTH:
        raise SettingsError(
            f"the service token is {len(token)} characters long; use at least "
            f'{MIN_TOKEN_LENGTH} (for example: python -c "import secrets; '
            f'print(secrets.token_urlsafe(32))")'
        )


def read_token(token_file: str | os.PathLike[str] | None = None, *, environ=None) -> str | None:
    """The bearer token from ``token_file`` (first line, stripped), else ``$ERGODEX_TOKEN``.

    Returns ``None`` when neither is set; an unreadable or empty token file is an error rather
    than silently falling back to no token.
    """
    environ = os.environ if environ is None else environ
    if token_file is not None:
        path = Path(token_file)
        from ergodex.limits import check_regular_file

        # a token is a line: refuse devices, pipes and anything over 64 KiB before reading
        check_regular_file(path, "a token file", max_bytes=65536, error=SettingsError)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise SettingsError(f"cannot read the token file {path}: {exc.strerror}") from exc
        except UnicodeDecodeError as exc:
            raise SettingsError(
                f"the token file {path} is not text (byte {exc.start} is not UTF-8); write the "
                "token in printable ASCII on its first line"
            ) from None
        lines = text.strip().splitlines()
        token = lines[0].strip() if lines else ""
        if not token:
            raise SettingsError(
                f"the token file {path} is empty; write the token on its first line"
            )
        return token
    token = environ.get(TOKEN_ENV, "").strip()
    return token or None
