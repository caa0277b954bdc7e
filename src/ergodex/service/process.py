"""Run ``ergodex serve`` as a child process from a script (tests, benchmarks, notebooks).

:class:`ServerProcess` starts the real command line in its own process, reads the port it
listens on from its first line of output, waits until ``/health`` answers, and stops it (SIGTERM,
then SIGKILL) on exit. Only the standard library is used, so this works wherever ergodex does.
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections import deque
from pathlib import Path

from ergodex.exceptions import ErgodexError

_LISTENING = re.compile(r"listening on (http://\S+)")


class ServerProcess:
    """An ``ergodex serve`` child process.

    Parameters
    ----------
    home
        Registry home of the server.
    token_file
        File holding the write token (``None``: the server refuses writes, unless the
        environment passed in ``env`` holds ``ERGODEX_TOKEN``).
    workers
        Job worker processes.
    extra_args
        Further ``ergodex serve`` options, e.g. ``["--max-upload-mb", "0.1"]``.
    env
        Environment of the child (default: this process's, without ``ERGODEX_TOKEN``).
    start_timeout
        Seconds to wait for the server to answer ``/health``.

    Examples
    --------
    >>> with ServerProcess(home, token_file=path) as server:  # doctest: +SKIP
    ...     urllib.request.urlopen(server.url + "/health")
    """

    def __init__(
        self,
        home: str | os.PathLike[str],
        *,
        token_file: str | os.PathLike[str] | None = None,
        workers: int = 2,
        extra_args: list[str] | None = None,
        env: dict[str, str] | None = None,
        start_timeout: float = 60.0,
    ):
        self.home = Path(home)
        self.token_file = None if token_file is None else Path(token_file)
        self.workers = int(workers)
        self.extra_args = list(extra_args or [])
        if env is None:
            env = {k: v for k, v in os.environ.items() if k != "ERGODEX_TOKEN"}
        self.env = env
        self.start_timeout = float(start_timeout)
        self.process: subprocess.Popen | None = None
        self.url: str | None = None
        self.output: deque[str] = deque(maxlen=200)
        self._reader: threading.Thread | None = None

    @property
    def pid(self) -> int | None:
        return None if self.process is None else self.process.pid

    def command(self) -> list[str]:
        """The command line that starts the server."""
        cmd = [
            sys.executable,
            "-c",
            "import sys; from ergodex.cli import main; sys.exit(main())",
            "serve",
            "--host",
            "127.0.0.1",
            "--port",
            "0",
            "--home",
            str(self.home),
            "--workers",
            str(self.workers),
        ]
        if self.token_file is not None:
            cmd += ["--token-file", str(self.token_file)]
        return cmd + self.extra_args

    def start(self) -> ServerProcess:
        """Start the server and wait until it answers; raise with its output if it does not."""
        self.process = subprocess.Popen(
            self.command(),
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
            env=self.env,
        )
        found = threading.Event()

        def read() -> None:
            assert self.process is not None and self.process.stdout is not None
            for line in self.process.stdout:
                self.output.append(line.rstrip("\n"))
                match = _LISTENING.search(line)
                if match and self.url is None:
                    self.url = match.group(1)
                    found.set()
            found.set()

        self._reader = threading.Thread(target=read, daemon=True)
        self._reader.start()
        deadline = time.monotonic() + self.start_timeout
        found.wait(self.start_timeout)
        while self.url is not None and time.monotonic() < deadline:
            if self.process.poll() is not None:
                break
            try:
                with urllib.request.urlopen(self.url + "/health", timeout=5) as response:
                    json.load(response)
                return self
            except (urllib.error.URLError, OSError):
                time.sleep(0.1)
        self.stop()
        raise ErgodexError(
            "ergodex serve did not come up; its output was:\n" + "\n".join(self.output)
        )

    def kill(self) -> None:
        """SIGKILL the server (a crash, as far as the job table can tell)."""
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(30)

    def stop(self, timeout: float = 30.0) -> int | None:
        """Stop the server (SIGTERM, then SIGKILL after ``timeout``); return its exit code."""
        if self.process is None:
            return None
        if self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(timeout)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(30)
        if self._reader is not None:
            self._reader.join(5)
        return self.process.returncode

    def __enter__(self) -> ServerProcess:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()
