"""The job table (SQLite) and the worker processes that run jobs.

Why a table and processes rather than threads: fitting and checking a surrogate take seconds to
minutes of CPU and hold the GIL for much of it, so running them in the request thread (or a thread
pool) would stall every read. Jobs are rows in ``home/service/jobs.sqlite3``; the server starts a
few worker processes, and each claims the oldest queued row with one ``UPDATE … RETURNING``
statement. SQLite runs that statement under its write lock, so two workers can never claim the
same job. Because the rows live on disk, a restart loses no queued or finished job; a job that
was ``running`` when the server died is marked ``failed`` with that reason at the next start,
never left running forever.

Every claim carries a fresh random ``claim`` value, and a worker may only finish the row whose
claim it holds. A worker orphaned by a killed server (it notices and exits within a second, but
could be mid-write) therefore cannot overwrite the verdict the restarted server recorded.

Job states: ``queued`` → ``running`` → ``succeeded`` | ``failed``; a queued or running job can be
``cancelled`` by a client (a running one by ending its worker process, which the pool replaces).

Limits: each job carries the hash of the token that submitted it (``owner``), and
:meth:`JobStore.submit` refuses a job beyond the bound of queued + running jobs per owner or in
all (:class:`QueueFull`). A worker runs each job under an address-space limit (``RLIMIT_AS``),
and the server's supervisor ends a worker whose job outlives the wall-clock limit; both end as
failed jobs with their own codes (``memory-limit``, ``time-limit``).
"""

from __future__ import annotations

import builtins
import json
import logging
import multiprocessing
import os
import secrets
import sqlite3
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ergodex.timestamps import utc_now

log = logging.getLogger(__name__)

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

#: Scheduling priority added to worker processes (POSIX ``nice``): reads stay quick under load.
WORKER_NICENESS = 10

#: Error code stored on a job that a stopped or crashed server left running.
INTERRUPTED = "interrupted"
#: Error codes of jobs stopped by the per-job limits.
TIME_LIMIT = "time-limit"
MEMORY_LIMIT = "memory-limit"

#: Exit status of a worker that stops after losing the claim on its job (cancelled or timed out
#: meanwhile): a fresh worker replaces it, so it never picks up a job it might be killed during.
CLAIM_LOST_EXIT = 75

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


def hold_home_lock(settings) -> Any:
    """Take the one-server-per-home lock (``home/service/server.lock``); return its open file.

    Two servers on one home would each declare the other's running jobs interrupted at start-up.
    The lock is an ``flock`` held for the server's life; the kernel drops it when the process
    dies, however it dies, so a crashed server never blocks the next start.
    """
    from ergodex.exceptions import SettingsError

    settings.service_dir.mkdir(parents=True, exist_ok=True)
    handle = open(settings.service_dir / "server.lock", "a+")  # noqa: SIM115 - held open
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX: no lock, one server per home by convention
        return handle
    try:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        handle.close()
        raise SettingsError(
            f"another ergodex serve is already using the home {settings.home}; stop it first or "
            "give this one another --home"
        ) from None
    handle.seek(0)
    handle.truncate()
    handle.write(f"{os.getpid()}\n")
    handle.flush()
    return handle


# -- worker processes ---------------------------------------------------------------------------


def _die_with_parent(parent_pid: int) -> None:
    """Make this worker exit when the server process that started it is gone.

    A worker of a SIGKILLed server would otherwise live on as an orphan and keep running its job
    while the restarted server declares that job interrupted. On Linux the kernel kills us
    (prctl PR_SET_PDEATHSIG); everywhere a watchdog thread checks the parent every half second.
    """
    try:  # Linux only; elsewhere the watchdog below does the job, a little later
        import ctypes
        import signal

        libc = ctypes.CDLL(None, use_errno=True)
        pr_set_pdeathsig = 1  # from <linux/prctl.h>
        libc.prctl(pr_set_pdeathsig, int(signal.SIGKILL), 0, 0, 0)
    except (OSError, AttributeError):  # pragma: no cover - non-Linux
        pass

    def watch() -> None:
        while True:
            if os.getppid() != parent_pid:
                os._exit(70)
            time.sleep(0.5)

    if os.getppid() != parent_pid:  # the parent died before prctl took effect
        os._exit(70)
    threading.Thread(target=watch, name="ergodex-parent-watch", daemon=True).start()


def worker_main(
    jobs_path: str,
    home: str,
    parent_pid: int,
    control,
    poll_interval: float,
    memory_bytes: int | None = None,
) -> None:
    """Loop of one worker process: claim a queued job, run it, record the outcome.

    ``control`` is the reading end of a pipe whose writing end the server holds: the worker
    stops when the server sends on it or closes it (which also happens when the server dies).
    Every outcome is recorded: an :class:`~ergodex.exceptions.ErgodexError` as a failure with a
    code named after its class, a ``MemoryError`` (the job hit ``memory_bytes``, set as the
    address-space limit while it runs) as ``memory-limit``, anything else as
    ``internal-error`` with its type and message. After a memory failure, or when its claim was
    withdrawn (the job was cancelled or timed out meanwhile), the worker exits and the pool
    starts a fresh one.
    """
    _die_with_parent(parent_pid)
    # numpy starts its BLAS threads on import: do it before any ceiling, once per worker.
    import numpy  # noqa: F401

    from ergodex.service.limits import apply_memory_limit, is_memory_error

    try:
        # Jobs are batch work: when cores are short, the server's request thread goes first.
        os.nice(WORKER_NICENESS)
    except (AttributeError, OSError):  # pragma: no cover - not POSIX
        pass
    from ergodex.service import tasks  # heavy imports happen lazily inside the tasks
    from ergodex.service.errors import describe_error

    store = JobStore(jobs_path)
    pid = os.getpid()
    while True:
        try:
            job = store.claim(pid)
        except sqlite3.OperationalError as exc:  # a long lock held elsewhere: try again later
            log.warning("worker %d could not claim a job: %s", pid, exc)
            job = None
        if job is None:
            if control.poll(poll_interval):  # a message or EOF: either way, time to stop
                return
            continue
        log.info("worker %d runs job %s (%s)", pid, job.id, job.kind)
        out_of_memory = False
        try:
            apply_memory_limit(memory_bytes)
            try:
                result = tasks.run(job.kind, job.params, home=Path(home), job_id=job.id)
            finally:
                apply_memory_limit(None)
        except Exception as exc:  # noqa: BLE001 - every failure must end up on the job row
            apply_memory_limit(None)
            if is_memory_error(exc):
                out_of_memory = True
                code = MEMORY_LIMIT
                allowed = (
                    f"this server allows one job ({memory_bytes / 2**20:.0f} MiB, --job-memory-mb)"
                    if memory_bytes
                    else "this machine could give it"
                )
                message = (
                    f"the job needed more memory than {allowed}; ask for less (fewer members, "
                    "a shorter length, a smaller dataset)"
                )
            else:
                code, message = describe_error(exc)
                if code == "internal-error":
                    log.exception("job %s failed unexpectedly", job.id)
            recorded = store.fail(job.id, job.claim or "", code, message)
        else:
            recorded = store.succeed(job.id, job.claim or "", result)
        if not recorded:
            log.warning(
                "job %s finished after its claim was withdrawn; worker %d stops", job.id, pid
            )
            os._exit(CLAIM_LOST_EXIT)
        if out_of_memory:  # a heap that hit its ceiling may be fragmented: start afresh
            os._exit(CLAIM_LOST_EXIT)
        if control.poll(0):
            return


class WorkerPool:
    """The worker processes of one server.

    Parameters
    ----------
    jobs_path, home
        The job table and the registry home handed to each worker.
    size
        Number of worker processes.
    poll_interval
        Seconds an idle worker waits before looking for work again.
    memory_bytes
        Address-space limit of a worker while it runs a job (``None``: none).
    """

    def __init__(
        self,
        jobs_path: Path,
        home: Path,
        *,
        size: int,
        poll_interval: float = 0.2,
        memory_bytes: int | None = None,
    ):
        self.jobs_path = Path(jobs_path)
        self.home = Path(home)
        self.size = int(size)
        self.poll_interval = float(poll_interval)
        self.memory_bytes = memory_bytes
        # The supervisor thread and request threads (cancel) both replace workers.
        self._lock = threading.RLock()
        # spawn, not fork: the server process has threads (event loop, thread pool), and forking
        # a threaded process can copy a held lock into the child.
        self._context = multiprocessing.get_context("spawn")
        self._controls: list[Any] = []
        self.processes: list[multiprocessing.process.BaseProcess] = []

    def _spawn(self, index: int) -> tuple[Any, multiprocessing.process.BaseProcess]:
        reader, writer = self._context.Pipe(duplex=False)
        process = self._context.Process(
            target=worker_main,
            args=(
                str(self.jobs_path),
                str(self.home),
                os.getpid(),
                reader,
                self.poll_interval,
                self.memory_bytes,
            ),
            name=f"ergodex-worker-{index}",
            daemon=True,
        )
        process.start()
        reader.close()  # only the worker reads; our copy would hide the end-of-file
        return writer, process

    def start(self) -> None:
        """Start the workers (no-op for size 0)."""
        for index in range(self.size):
            writer, process = self._spawn(index)
            self._controls.append(writer)
            self.processes.append(process)

    def replace_dead(self, store: JobStore) -> list[str]:
        """Fail the job of any worker that died (killed, out of memory, crashed) and restart it.

        Returns the ids of the jobs marked failed. Called periodically by the server, so that a
        job whose worker vanished is never left ``running`` until the next restart.
        """
        failed: list[str] = []
        with self._lock:
            for index, process in enumerate(self.processes):
                if process.is_alive() or process.exitcode is None:
                    continue
                if process.exitcode == CLAIM_LOST_EXIT:
                    log.info(
                        "worker %s (pid %s) stopped after its job; starting another",
                        process.name,
                        process.pid,
                    )
                else:
                    log.warning(
                        "worker %s (pid %s) died with exit code %s; starting another",
                        process.name,
                        process.pid,
                        process.exitcode,
                    )
                failed += store.fail_running(
                    f"the worker process running this job died (exit code {process.exitcode}); "
                    "submit it again",
                    worker_pids=[process.pid] if process.pid is not None else [],
                )
                self._respawn(index)
        return failed

    def _respawn(self, index: int) -> None:
        try:
            self._controls[index].close()
        except OSError:  # pragma: no cover - already closed
            pass
        self._controls[index], self.processes[index] = self._spawn(index)

    def end_worker(self, pid: int | None) -> bool:
        """End the worker with this pid (its job's row was already settled) and replace it.

        Returns ``False`` when no worker of this pool has that pid (it ended already).
        """
        with self._lock:
            for index, process in enumerate(self.processes):
                if pid is None or process.pid != pid or not process.is_alive():
                    continue
                process.kill()  # SIGKILL: the job may hold the GIL in a long C call
                process.join(10.0)
                log.info("ended worker %s (pid %s) and started another", process.name, pid)
                self._respawn(index)
                return True
        return False

    def enforce_time_limit(self, store: JobStore, seconds: float) -> list[str]:
        """Fail every job running longer than ``seconds`` (code ``time-limit``), end its worker.

        The row is settled first, withdrawing the claim, so a worker that finishes in the
        meantime records nothing and stops by itself instead of taking another job.
        """
        ended = []
        for job in store.overdue(seconds):
            message = (
                f"the job ran longer than this server allows one job ({seconds:g} s, "
                "--job-time-limit) and was stopped; ask for less work or a longer limit"
            )
            if store.fail_claimed(job, TIME_LIMIT, message):
                self.end_worker(job.worker_pid)
                ended.append(job.id)
        return ended

    def alive(self) -> int:
        """How many workers are running."""
        return sum(1 for process in self.processes if process.is_alive())

    def stop(self, store: JobStore, *, grace: float = 5.0) -> list[str]:
        """Ask workers to stop; after ``grace`` seconds, end those still busy.

        Jobs that were running in an ended worker are marked failed (returned ids), so a clean
        shutdown never leaves a job ``running``.
        """
        for writer in self._controls:
            try:
                writer.send_bytes(b"stop")
                writer.close()
            except OSError:  # the worker is gone already
                pass
        self._controls = []
        deadline = time.monotonic() + grace
        for process in self.processes:
            process.join(max(0.0, deadline - time.monotonic()))
        ended = []
        for process in self.processes:
            if process.is_alive():
                process.terminate()
                process.join(5.0)
                if process.is_alive():  # pragma: no cover - ignores SIGTERM
                    process.kill()
                    process.join(5.0)
                ended.append(process.pid)
        self.processes = []
        return store.fail_running(
            "the server shut down while this job was running; submit it again",
            worker_pids=[pid for pid in ended if pid is not None],
        )
