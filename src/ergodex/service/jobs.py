"""The worker processes that run jobs from the job table (:mod:`ergodex.service.store`).

Why a table and processes rather than threads: fitting and checking a surrogate take seconds to
minutes of CPU and hold the GIL for much of it, so running them in the request thread (or a thread
pool) would stall every read. The server starts a few worker processes; each claims the oldest
queued row of the job table (see :mod:`ergodex.service.store` for the claim and its guarantees),
runs it through :mod:`ergodex.service.tasks` and records the result on the row.

Limits: a worker runs each job under an address-space limit (``RLIMIT_AS``), and the server's
supervisor ends a worker whose job outlives the wall-clock limit; both end as failed jobs with
their own codes (``memory-limit``, ``time-limit``). The bound on queued + running jobs is the
store's (:class:`~ergodex.service.store.QueueFull`).
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import sqlite3
import threading
import time
from pathlib import Path
from typing import Any

# The job table's names, re-exported: the server and older imports read them from here.
from ergodex.service.store import (
    CANCELLED,
    FAILED,
    FINISHED_STATES,
    INTERRUPTED,
    JOB_KINDS,
    JOB_STATES,
    QUEUED,
    RUNNING,
    SUCCEEDED,
    JobRecord,
    JobStore,
    QueueFull,
)

__all__ = [
    "CANCELLED",
    "CLAIM_LOST_EXIT",
    "FAILED",
    "FINISHED_STATES",
    "INTERRUPTED",
    "JOB_KINDS",
    "JOB_STATES",
    "MEMORY_LIMIT",
    "QUEUED",
    "RUNNING",
    "SUCCEEDED",
    "TIME_LIMIT",
    "WORKER_NICENESS",
    "JobRecord",
    "JobStore",
    "QueueFull",
    "WorkerPool",
    "hold_home_lock",
    "worker_main",
]

log = logging.getLogger(__name__)

#: Scheduling priority added to worker processes (POSIX ``nice``): reads stay quick under load.
WORKER_NICENESS = 10

#: Error codes of jobs stopped by the per-job limits.
TIME_LIMIT = "time-limit"
MEMORY_LIMIT = "memory-limit"

#: Exit status of a worker that stops after losing the claim on its job (cancelled or timed out
#: meanwhile): a fresh worker replaces it, so it never picks up a job it might be killed during.
CLAIM_LOST_EXIT = 75


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
