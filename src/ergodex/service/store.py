"""The job table (SQLite): jobs and uploaded datasets, shared by the server and its workers.

Jobs are rows in ``home/service/jobs.sqlite3``; each worker claims the oldest queued row with one
``UPDATE … RETURNING`` statement, which SQLite runs under its write lock, so two workers can never
claim the same job. Because the rows live on disk, a restart loses no queued or finished job; a
job that was ``running`` when the server died is marked ``failed`` with that reason at the next
start, never left running forever.

Every claim carries a fresh random ``claim`` value, and a worker may only finish the row whose
claim it holds. A worker orphaned by a killed server (it notices and exits within a second, but
could be mid-write) therefore cannot overwrite the verdict the restarted server recorded.

Job states: ``queued`` → ``running`` → ``succeeded`` | ``failed``; a queued or running job can be
``cancelled`` by a client (a running one by ending its worker process, which the pool replaces).
Each job carries the hash of the token that submitted it (``owner``), and
:meth:`JobStore.submit` refuses a job beyond the bound of queued + running jobs per owner or in
all (:class:`QueueFull`).

This module sits below both :mod:`ergodex.service.jobs` (the worker processes) and
:mod:`ergodex.service.tasks` (what a job does), which both read the table.
"""

from __future__ import annotations

import builtins
import json
import os
import secrets
import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ergodex.timestamps import utc_now

QUEUED = "queued"
RUNNING = "running"
SUCCEEDED = "succeeded"
FAILED = "failed"
CANCELLED = "cancelled"
JOB_STATES = (QUEUED, RUNNING, SUCCEEDED, FAILED, CANCELLED)
#: States in which a job is finished for good.
FINISHED_STATES = (SUCCEEDED, FAILED, CANCELLED)

#: Job kinds the workers know how to run (see :mod:`ergodex.service.tasks`).
JOB_KINDS = ("fit", "validate", "retrain")

#: Error code stored on a job that a stopped or crashed server left running.
INTERRUPTED = "interrupted"


_SCHEMA = """
CREATE TABLE IF NOT EXISTS jobs (
    seq            INTEGER PRIMARY KEY AUTOINCREMENT,
    id             TEXT NOT NULL UNIQUE,
    kind           TEXT NOT NULL,
    params         TEXT NOT NULL,
    state          TEXT NOT NULL,
    created        TEXT NOT NULL,
    started        TEXT,
    finished       TEXT,
    claim          TEXT,
    worker_pid     INTEGER,
    result         TEXT,
    error_code     TEXT,
    error_message  TEXT,
    owner          TEXT
);
CREATE INDEX IF NOT EXISTS jobs_state ON jobs(state, seq);
CREATE TABLE IF NOT EXISTS datasets (
    id          TEXT PRIMARY KEY,
    fingerprint TEXT NOT NULL,
    filename    TEXT NOT NULL,
    format      TEXT NOT NULL,
    size_bytes  INTEGER NOT NULL,
    sha256      TEXT NOT NULL,
    variables   TEXT NOT NULL,
    dt          REAL NOT NULL,
    runs        INTEGER NOT NULL,
    samples     INTEGER NOT NULL,
    options     TEXT NOT NULL,
    created     TEXT NOT NULL
);
"""


def _job_time() -> str:
    """Job times in ISO 8601 UTC with milliseconds: jobs queued in one second keep their order."""
    return utc_now("milliseconds")


@dataclass(frozen=True)
class JobRecord:
    """One row of the job table, with JSON columns decoded."""

    id: str
    kind: str
    params: dict[str, Any]
    state: str
    created: str
    started: str | None
    finished: str | None
    worker_pid: int | None
    result: dict[str, Any] | None
    error_code: str | None
    error_message: str | None
    claim: str | None = None
    owner: str | None = None

    @classmethod
    def from_row(cls, row: sqlite3.Row) -> JobRecord:
        return cls(
            id=row["id"],
            kind=row["kind"],
            params=json.loads(row["params"]),
            state=row["state"],
            created=row["created"],
            started=row["started"],
            finished=row["finished"],
            worker_pid=row["worker_pid"],
            result=json.loads(row["result"]) if row["result"] is not None else None,
            error_code=row["error_code"],
            error_message=row["error_message"],
            claim=row["claim"],
            owner=row["owner"] if "owner" in row.keys() else None,  # noqa: SIM118 - a Row
        )


class QueueFull(Exception):
    """A submission beyond a queue bound; ``scope`` is ``"token"`` or ``"server"``."""

    def __init__(self, scope: str, limit: int):
        super().__init__(f"{scope} queue bound {limit} reached")
        self.scope = scope
        self.limit = int(limit)


class JobStore:
    """Jobs and uploaded-dataset records in one SQLite file, safe across processes.

    Every call opens its own short-lived connection, so one store object can be shared by the
    request threads of the server and re-created cheaply inside each worker process.

    Parameters
    ----------
    path
        The SQLite file (created with its folder on first use).
    """

    def __init__(self, path: str | os.PathLike[str]):
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        with self._connect() as db:
            # WAL lets readers (status polls) proceed while a worker writes a result.
            db.execute("PRAGMA journal_mode=WAL")
            db.executescript(_SCHEMA)
            columns = {row["name"] for row in db.execute("PRAGMA table_info(jobs)")}
            if "owner" not in columns:  # a job table written before queue bounds existed
                db.execute("ALTER TABLE jobs ADD COLUMN owner TEXT")

    @contextmanager
    def _connect(self) -> Iterator[sqlite3.Connection]:
        db = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        db.row_factory = sqlite3.Row
        try:
            db.execute("PRAGMA busy_timeout=30000")
            yield db
        finally:
            db.close()

    # -- jobs ---------------------------------------------------------------------------------

    def submit(
        self,
        kind: str,
        params: dict[str, Any],
        *,
        owner: str | None = None,
        per_owner: int | None = None,
        total: int | None = None,
    ) -> JobRecord:
        """Queue a job and return its record (state ``queued``).

        With ``per_owner`` / ``total``, refuse (:class:`QueueFull`) when the owner already has
        that many jobs queued or running, or the server has. Counting and inserting happen in
        one write transaction, so concurrent submissions cannot overshoot a bound.
        """
        if kind not in JOB_KINDS:
            raise ValueError(f"unknown job kind {kind!r}; known: {list(JOB_KINDS)}")
        job_id = secrets.token_hex(16)
        active = "state IN (?, ?)"
        with self._connect() as db:
            db.execute("BEGIN IMMEDIATE")
            try:
                if total is not None:
                    (n,) = db.execute(
                        f"SELECT COUNT(*) FROM jobs WHERE {active}", (QUEUED, RUNNING)
                    ).fetchone()
                    if n >= total:
                        raise QueueFull("server", total)
                if per_owner is not None:
                    (n,) = db.execute(
                        f"SELECT COUNT(*) FROM jobs WHERE {active} AND owner IS ?",
                        (QUEUED, RUNNING, owner),
                    ).fetchone()
                    if n >= per_owner:
                        raise QueueFull("token", per_owner)
                db.execute(
                    "INSERT INTO jobs (id, kind, params, state, created, owner) "
                    "VALUES (?, ?, ?, ?, ?, ?)",
                    (job_id, kind, json.dumps(params, sort_keys=True), QUEUED, _job_time(), owner),
                )
            except BaseException:
                db.execute("ROLLBACK")
                raise
            db.execute("COMMIT")
        record = self.get(job_id)
        assert record is not None
        return record

    def get(self, job_id: str) -> JobRecord | None:
        """The job with this id, or ``None``."""
        with self._connect() as db:
            row = db.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return JobRecord.from_row(row) if row is not None else None

    def list(self, *, state: str | None = None, limit: int = 100) -> list[JobRecord]:
        """Newest jobs first, optionally only those in one state."""
        query = "SELECT * FROM jobs"
        args: list[Any] = []
        if state is not None:
            query += " WHERE state = ?"
            args.append(state)
        query += " ORDER BY seq DESC LIMIT ?"
        args.append(int(limit))
        with self._connect() as db:
            rows = db.execute(query, args).fetchall()
        return [JobRecord.from_row(row) for row in rows]

    def counts(self) -> dict[str, int]:
        """Number of jobs in each state (every state present, zero when none)."""
        with self._connect() as db:
            rows = db.execute("SELECT state, COUNT(*) AS n FROM jobs GROUP BY state").fetchall()
        counts = {state: 0 for state in JOB_STATES}
        counts.update({row["state"]: row["n"] for row in rows})
        return counts

    def claim(self, worker_pid: int) -> JobRecord | None:
        """Atomically move the oldest queued job to ``running`` for this worker, or ``None``.

        One statement does the choosing and the update, so SQLite's write lock makes the claim
        atomic: a second worker running the same statement sees the row no longer queued.
        """
        token = secrets.token_hex(16)
        with self._connect() as db:
            row = db.execute(
                "UPDATE jobs SET state = ?, claim = ?, worker_pid = ?, started = ? "
                "WHERE seq = (SELECT seq FROM jobs WHERE state = ? ORDER BY seq LIMIT 1) "
                "AND state = ? RETURNING *",
                (RUNNING, token, worker_pid, _job_time(), QUEUED, QUEUED),
            ).fetchone()
        return JobRecord.from_row(row) if row is not None else None

    def succeed(self, job_id: str, claim: str, result: dict[str, Any]) -> bool:
        """Record a result; ``False`` when the claim was lost (the job was failed meanwhile)."""
        with self._connect() as db:
            cursor = db.execute(
                "UPDATE jobs SET state = ?, result = ?, finished = ? "
                "WHERE id = ? AND claim = ? AND state = ?",
                (
                    SUCCEEDED,
                    json.dumps(result, sort_keys=True),
                    _job_time(),
                    job_id,
                    claim,
                    RUNNING,
                ),
            )
            return cursor.rowcount == 1

    def fail(self, job_id: str, claim: str, code: str, message: str) -> bool:
        """Record a failure; ``False`` when the claim was lost."""
        with self._connect() as db:
            cursor = db.execute(
                "UPDATE jobs SET state = ?, error_code = ?, error_message = ?, finished = ? "
                "WHERE id = ? AND claim = ? AND state = ?",
                (FAILED, code, message, _job_time(), job_id, claim, RUNNING),
            )
            return cursor.rowcount == 1

    def cancel(self, job_id: str) -> tuple[JobRecord | None, JobRecord | None]:
        """Cancel a queued or running job; return ``(job before, job after)``.

        ``after`` is ``None`` when nothing changed (unknown job, or already finished); a job
        that was running still has its worker busy, and the caller must end that worker (the
        worker cannot record anything any more: its claim is withdrawn).
        """
        with self._connect() as db:
            row = db.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
            if row is None:
                return None, None
            before = JobRecord.from_row(row)
            if before.state not in (QUEUED, RUNNING):
                return before, None
            after = db.execute(
                "UPDATE jobs SET state = ?, finished = ?, claim = NULL, error_code = ?, "
                "error_message = ? WHERE id = ? AND state = ? AND claim IS ? RETURNING *",
                (
                    CANCELLED,
                    _job_time(),
                    "cancelled",
                    "cancelled at a client's request",
                    job_id,
                    before.state,
                    before.claim,
                ),
            ).fetchone()
        if after is None:  # it moved on meanwhile (claimed or finished): look again
            return self.cancel(job_id)
        return before, JobRecord.from_row(after)

    def overdue(self, seconds: float) -> builtins.list[JobRecord]:
        """Running jobs started more than ``seconds`` ago (by the job table's clock)."""
        with self._connect() as db:
            rows = db.execute("SELECT * FROM jobs WHERE state = ?", (RUNNING,)).fetchall()
        now = _parse_job_time(_job_time())
        return [
            job
            for job in map(JobRecord.from_row, rows)
            if job.started is not None and now - _parse_job_time(job.started) > seconds
        ]

    def fail_claimed(self, job: JobRecord, code: str, message: str) -> bool:
        """Fail a running job whose claim is still ``job.claim`` (withdrawing the claim)."""
        with self._connect() as db:
            cursor = db.execute(
                "UPDATE jobs SET state = ?, error_code = ?, error_message = ?, finished = ?, "
                "claim = NULL WHERE id = ? AND claim IS ? AND state = ?",
                (FAILED, code, message, _job_time(), job.id, job.claim, RUNNING),
            )
            return cursor.rowcount == 1

    def fail_running(
        self, reason: str, *, worker_pids: builtins.list[int] | None = None
    ) -> builtins.list[str]:
        """Mark running jobs failed (all, or those of the given workers); return their ids.

        Called at start-up (a previous server died with these jobs in hand) and at shutdown for
        workers that had to be stopped mid-job.
        """
        query = (
            "UPDATE jobs SET state = ?, error_code = ?, error_message = ?, finished = ?, "
            "claim = NULL WHERE state = ?"
        )
        args: list[Any] = [FAILED, INTERRUPTED, reason, _job_time(), RUNNING]
        if worker_pids is not None:
            if not worker_pids:
                return []
            query += f" AND worker_pid IN ({', '.join('?' for _ in worker_pids)})"
            args.extend(worker_pids)
        with self._connect() as db:
            rows = db.execute(query + " RETURNING id", args).fetchall()
        return [row["id"] for row in rows]

    # -- datasets -----------------------------------------------------------------------------

    def add_dataset(self, record: dict[str, Any]) -> bool:
        """Insert a dataset record; ``False`` when one with this id already exists."""
        row = dict(record)
        row["variables"] = json.dumps(list(row["variables"]))
        row["options"] = json.dumps(dict(row.get("options") or {}), sort_keys=True)
        columns = (
            "id",
            "fingerprint",
            "filename",
            "format",
            "size_bytes",
            "sha256",
            "variables",
            "dt",
            "runs",
            "samples",
            "options",
            "created",
        )
        with self._connect() as db:
            cursor = db.execute(
                f"INSERT OR IGNORE INTO datasets ({', '.join(columns)}) "
                f"VALUES ({', '.join('?' for _ in columns)})",
                [row[c] for c in columns],
            )
            return cursor.rowcount == 1

    def get_dataset(self, dataset_id: str) -> dict[str, Any] | None:
        """The record of an uploaded dataset, or ``None``."""
        with self._connect() as db:
            row = db.execute("SELECT * FROM datasets WHERE id = ?", (dataset_id,)).fetchone()
        return _dataset_dict(row) if row is not None else None

    def list_datasets(self, *, limit: int = 100) -> builtins.list[dict[str, Any]]:
        """Newest uploads first."""
        with self._connect() as db:
            rows = db.execute(
                "SELECT * FROM datasets ORDER BY created DESC LIMIT ?", (int(limit),)
            ).fetchall()
        return [_dataset_dict(row) for row in rows]


def _parse_job_time(text: str) -> float:
    """Seconds since the epoch of a job time (ISO 8601 UTC, as written by :func:`_job_time`)."""
    from datetime import datetime

    return datetime.fromisoformat(text).timestamp()


def _dataset_dict(row: sqlite3.Row) -> dict[str, Any]:
    record = dict(row)
    record["variables"] = json.loads(record["variables"])
    record["options"] = json.loads(record["options"])
    return record
