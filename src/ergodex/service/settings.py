"""Configuration of the HTTP service: where it keeps things, who may write, how much it accepts.

Everything the server needs is gathered in one frozen :class:`ServiceSettings`, built once by
``ergodex serve`` (or by a script) and handed to :func:`ergodex.service.app.create_app`. Reading a
token file or the environment happens here and nowhere else, so that the request handlers only
ever compare against a value fixed at start-up.
"""

from __future__ import annotations

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
    workers
        Number of job worker processes started by the server (0: jobs queue up but none run,
        useful only in tests of the queue itself).
    poll_interval
        Seconds an idle worker sleeps between looks at the job table.
    """

    home: Path
    token: str | None = field(default=None, repr=False)
    protect_reads: bool = False
    max_upload_bytes: int = DEFAULT_MAX_UPLOAD
    workers: int = 2
    poll_interval: float = 0.2

    def __post_init__(self) -> None:
        object.__setattr__(self, "home", Path(self.home).expanduser().absolute())
        if self.token is not None and len(self.token) < MIN_TOKEN_LENGTH:
            raise SettingsError(
                f"the service token is {len(self.token)} characters long; use at least "
                f"{MIN_TOKEN_LENGTH} (for example: python -c \"import secrets; "
                f"print(secrets.token_urlsafe(32))\")"
            )
        if int(self.max_upload_bytes) < 1:
            raise SettingsError(
                f"max_upload_bytes must be a positive number of bytes, got {self.max_upload_bytes}"
            )
        if int(self.workers) < 0:
            raise SettingsError(f"workers must be 0 or more, got {self.workers}")
        if not self.poll_interval > 0:
            raise SettingsError(f"poll_interval must be > 0 seconds, got {self.poll_interval}")

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


def read_token(token_file: str | os.PathLike[str] | None = None, *, environ=None) -> str | None:
    """The bearer token from ``token_file`` (first line, stripped), else ``$ERGODEX_TOKEN``.

    Returns ``None`` when neither is set; an unreadable or empty token file is an error rather
    than silently falling back to no token.
    """
    environ = os.environ if environ is None else environ
    if token_file is not None:
        path = Path(token_file)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise SettingsError(f"cannot read the token file {path}: {exc.strerror}") from exc
        lines = text.strip().splitlines()
        token = lines[0].strip() if lines else ""
        if not token:
            raise SettingsError(f"the token file {path} is empty; write the token on its first line")
        return token
    token = environ.get(TOKEN_ENV, "").strip()
    return token or None
