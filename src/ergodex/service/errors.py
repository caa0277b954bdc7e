"""Stable error codes of the HTTP service, shared by the request handlers and the job workers.

Clients branch on ``code`` (a short kebab-case word that never changes meaning), and show
``message`` (one line, naming the thing that was wrong) to people.
"""

from __future__ import annotations

from ergodex.exceptions import (
    DataError,
    ErgodexError,
    IntegrityError,
    ModelFileError,
    ModelLimitError,
    OptionalDependencyError,
    RegistryError,
    SettingsError,
    one_line,
)

#: Library error class → stable code, most specific first (IntegrityError is a RegistryError).
_CODES: tuple[tuple[type[BaseException], str], ...] = (
    (IntegrityError, "integrity-error"),
    (RegistryError, "registry-error"),
    (DataError, "data-error"),
    (SettingsError, "settings-error"),
    (ModelFileError, "model-file-error"),
    (ModelLimitError, "model-limit"),  # too stiff for the substep floor, or over its time
    (OptionalDependencyError, "missing-dependency"),
    (ErgodexError, "ergodex-error"),
)


def describe_error(exc: BaseException) -> tuple[str, str]:
    """``(code, message)`` for an exception raised while serving a request or running a job.

    An error ergodex raised on purpose keeps its own message; anything else is an
    ``internal-error`` whose message names the exception type, so that a failed job always
    says something a person can act on or report.
    """
    for cls, code in _CODES:
        if isinstance(exc, cls):
            return code, one_line(str(exc)) or cls.__name__
    return "internal-error", one_line(f"{type(exc).__name__}: {exc}")


class ApiError(ErgodexError):
    """A request the service refuses: carries the HTTP status and the stable error code."""

    def __init__(
        self, status: int, code: str, message: str, *, headers: dict[str, str] | None = None
    ):
        super().__init__(message)
        self.status = int(status)
        self.code = code
        self.headers = dict(headers or {})


#: HTTP status → code for errors raised by the web framework itself (unknown route, wrong method).
HTTP_CODES = {
    400: "bad-request",
    401: "unauthorized",
    403: "forbidden",
    404: "not-found",
    405: "method-not-allowed",
    406: "not-acceptable",
    413: "upload-too-large",
    415: "unsupported-type",
    422: "invalid-request",
    429: "queue-full",
}
