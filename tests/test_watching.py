"""The inbox watcher: complete files only, each file once (even across restarts), bad files aside.

Every retrain here is real (fit, check, register in a real SQLite registry) but tiny: four runs of
20 time units per file and a 4-member check, so that 21 files take seconds. The verdicts of such a
small check are not the point here (tests/test_retraining.py checks decisions on honest sizes);
the inbox's bookkeeping is.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

import ergodex
from ergodex.cli import main
from ergodex.exceptions import SettingsError
from ergodex.readers import read_series
from ergodex.registry import Registry
from ergodex.validation import CheckSpec
from ergodex.watching import (
    CLAIMED_FOLDER,
    DONE_FOLDER,
    LEDGER_NAME,
    MAX_ATTEMPTS,
    REJECTED_FOLDER,
    Ledger,
    _Watcher,
    file_sha256,
    is_candidate_name,
    read_ledger,
    watch,
)
from retrain_support import write_csv

NAME = "loop-inbox"
TINY = CheckSpec(members=4)


def _drop(folder: Path, name: str, text: str) -> Path:
    """Write under a temporary name, then rename: how a complete file should arrive."""
    part = folder / (name + ".part")
    part.write_text(text, encoding="utf-8")
    os.replace(part, folder / name)
    return folder / name


def _csv_texts(tmp_path: Path, n_files: int) -> list[str]:
    """``n_files`` different convection-loop CSV files of 4 runs x 20 time units each."""
    from ergodex.scenarios import convection_loop

    data = convection_loop(seed=7, n_runs=4 * n_files, duration=20.0, dt=0.02, spinup=10.0)
    texts = []
    for i in range(n_files):
        part = data.select_runs(range(4 * i, 4 * i + 4))
        texts.append(write_csv(tmp_path / f"src-{i}.csv", part).read_text(encoding="utf-8"))
    return texts


def test_temporary_and_hidden_names_are_not_datasets():
    for name in ("data.csv", "run 3.npz", "x.nc"):
        assert is_candidate_name(name)
    for name in (
        ".data.csv",
        "data.csv.part",
        "data.csv.tmp",
        "data.csv~",
        "~$data.csv",
        "data.CSV.PART",
        LEDGER_NAME,
    ):
        assert not is_candidate_name(name)


def test_a_file_is_taken_only_after_two_polls_with_the_same_size(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    watcher = _Watcher(inbox, NAME, Registry(tmp_path / "home"), {})  # settle 0: two polls
    try:
        growing = inbox / "growing.csv"
        growing.write_text("a,b\n")
        (inbox / "sub").mkdir()  # folders are never taken
        assert watcher.stable_files() == []  # first sight
        with open(growing, "a") as handle:
            handle.write("1,2\n")
        assert watcher.stable_files() == []  # changed since the last poll
        assert watcher.stable_files() == ["growing.csv"]
    finally:
        watcher.ledger.close()


class _Clock:
    """A clock the test moves by hand, so the quiet-period rule is checked to the tick."""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


def test_a_file_is_taken_only_once_unchanged_for_the_quiet_period(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    clock = _Clock()
    watcher = _Watcher(inbox, NAME, Registry(tmp_path / "home"), {}, settle=0.5, clock=clock)
    try:
        slow = inbox / "slow.csv"
        slow.write_text("time,x\n0,1\n")
        (inbox / "slow.csv.part").write_text("time,x\n")  # a temporary name: never taken
        assert watcher.stable_files() == []  # first sight at t = 0
        clock.now = 0.3
        assert watcher.stable_files() == []  # unchanged, but only for 0.3 s of 0.5
        with open(slow, "a") as handle:  # the writer goes on before the quiet period ends
            handle.write("1,2\n")
        clock.now = 0.6
        assert watcher.stable_files() == []  # changed: the quiet period starts again at 0.6
        clock.now = 1.0
        assert watcher.stable_files() == []  # 0.4 s quiet
        clock.now = 1.1
        assert watcher.stable_files() == ["slow.csv"]  # 0.5 s quiet: settled
        # Replaced by write-then-rename (a new inode, same size and time): settles afresh.
        twin = inbox / "twin.tmp"
        twin.write_text(slow.read_text())
        os.utime(twin, ns=(slow.stat().st_atime_ns, slow.stat().st_mtime_ns))
        os.replace(twin, slow)
        clock.now = 1.2
        assert watcher.stable_files() == []
        clock.now = 1.7
        assert watcher.stable_files() == ["slow.csv"]
    finally:
        watcher.ledger.close()


def test_a_file_that_vanishes_or_changes_after_it_settled_is_not_claimed(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    clock = _Clock()
    watcher = _Watcher(inbox, NAME, Registry(tmp_path / "home"), {}, settle=0.5, clock=clock)
    try:
        gone = inbox / "gone.csv"
        late = inbox / "late.csv"
        gone.write_text("time,x\n0,1\n")
        late.write_text("time,x\n0,1\n")
        watcher.stable_files()
        clock.now = 1.0
        assert watcher.stable_files() == ["gone.csv", "late.csv"]
        gone.unlink()  # removed by its owner between the scan and the claim
        assert watcher.take("gone.csv") is None
        with open(late, "a") as handle:  # written to between the scan and the claim
            handle.write("1,2\n")
        assert watcher.take("late.csv") is None
        # Back in the inbox, whole, waiting to settle again; nothing in the ledger or work area.
        assert late.read_text() == "time,x\n0,1\n1,2\n"
        assert watcher.ledger.rows() == []
        assert list((inbox / CLAIMED_FOLDER).iterdir()) == []
        assert watcher.stable_files() == []
    finally:
        watcher.ledger.close()


def test_an_older_ledger_gains_the_new_columns_and_keeps_its_rows(tmp_path):
    path = tmp_path / LEDGER_NAME
    with sqlite3.connect(path) as conn:  # the first ledger format, as written before
        conn.execute(
            "CREATE TABLE inbox_files (file_name TEXT NOT NULL, size INTEGER NOT NULL, sha256 TEXT"
            " NOT NULL, model_name TEXT NOT NULL, state TEXT NOT NULL CHECK (state IN"
            " ('processing', 'done', 'rejected')), attempts INTEGER NOT NULL DEFAULT 0, outcome"
            " TEXT, exit_code INTEGER, error TEXT, moved_to TEXT, owner TEXT, first_seen TEXT NOT"
            " NULL, updated TEXT NOT NULL, PRIMARY KEY (file_name, size, sha256))"
        )
        conn.execute(
            "INSERT INTO inbox_files VALUES ('a.csv', 3, 'abc', 'm', 'done', 1, 'kept',"
            " 0, NULL, 'done/a.csv', 'h:1', 't', 't')"
        )
    conn.close()
    with Ledger(path) as ledger:
        (row,) = ledger.rows()
        assert row["state"] == "done" and row["reason"] is None
        assert ledger.claim("a.csv", 3, "abc", "m", settings_fingerprint="f")[0] == "done"
        assert ledger.claim("b.csv", 3, "abd", "m", settings_fingerprint="f")[0] == "go"
    assert sorted(r["file_name"] for r in read_ledger(tmp_path)) == ["a.csv", "b.csv"]


def test_watch_refuses_a_missing_folder_and_bad_settings(tmp_path):
    registry = Registry(tmp_path / "home")
    with pytest.raises(SettingsError, match="does not exist"):
        watch(tmp_path / "nope", NAME, registry=registry, once=True)
    (tmp_path / "inbox").mkdir()
    with pytest.raises(SettingsError, match="poll interval"):
        watch(tmp_path / "inbox", NAME, registry=registry, poll_interval=0)
    with pytest.raises(SettingsError, match="quiet period"):
        watch(tmp_path / "inbox", NAME, registry=registry, settle=-1.0)
    with pytest.raises(SettingsError, match="not found"):
        watch(tmp_path / "inbox", NAME, registry=registry, config=tmp_path / "missing.toml")


def test_a_file_interrupted_too_often_is_moved_aside_without_a_retrain(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    path = _drop(inbox, "stuck.csv", "time,x\n0,1\n1,2\n")
    # A watcher that died mid-retrain MAX_ATTEMPTS times left the file claimed in the ledger.
    with Ledger(inbox / LEDGER_NAME) as ledger:
        for _ in range(MAX_ATTEMPTS):
            ledger.claim("stuck.csv", path.stat().st_size, file_sha256(path), NAME)
    registry = Registry(tmp_path / "home")
    items = watch(inbox, NAME, registry=registry, once=True, poll_interval=0.05, settle=0.05)
    assert [(i.file_name, i.state) for i in items] == [("stuck.csv", "rejected")]
    assert "interrupted" in items[0].error and items[0].reason == "interrupted"
    assert (inbox / REJECTED_FOLDER / "stuck.csv").exists()
    assert registry.list_models() == []  # no retrain ran
    assert read_ledger(inbox)[0]["state"] == "rejected"


def test_a_file_claimed_by_another_live_watcher_is_left_to_it(tmp_path):
    import socket
    import sqlite3
    import subprocess
    import sys

    inbox = tmp_path / "inbox"
    inbox.mkdir()
    path = _drop(inbox, "busy.csv", "time,flow\n0,1\n0.02,broken\n")
    with Ledger(inbox / LEDGER_NAME) as ledger:
        ledger.claim("busy.csv", path.stat().st_size, file_sha256(path), NAME)
    other = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        with sqlite3.connect(inbox / LEDGER_NAME) as conn:  # the claim now belongs to `other`
            conn.execute("UPDATE inbox_files SET owner=?", (f"{socket.gethostname()}:{other.pid}",))
        registry = Registry(tmp_path / "home")
        assert (
            watch(inbox, NAME, registry=registry, once=True, poll_interval=0.05, settle=0.05) == []
        )
        assert path.exists()
    finally:
        other.kill()
        other.wait()
    # Its owner is gone: the claim is stale, the file gets its second attempt (and, unreadable,
    # is moved aside with its error).
    items = watch(inbox, NAME, registry=registry, once=True, poll_interval=0.05, settle=0.05)
    assert [(i.file_name, i.state) for i in items] == [("busy.csv", "rejected")]
    assert "broken" in items[0].error
    assert read_ledger(inbox)[0]["attempts"] == 2


@pytest.mark.slow
def test_twenty_files_dropped_quickly_are_each_retrained_once(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    registry = Registry(tmp_path / "home")
    texts = _csv_texts(tmp_path, 21)
    good = [f"batch-{i:02d}.csv" for i in range(20)]

    stop = threading.Event()
    handled: list = []
    errors: list = []

    def run_watcher():
        try:
            handled.extend(
                watch(
                    inbox,
                    NAME,
                    registry=registry,
                    spec=TINY,
                    report=False,
                    poll_interval=0.05,
                    settle=0.1,
                    max_files=21,
                    stop_event=stop,
                )
            )
        except BaseException as exc:  # surfaced in the main thread below
            errors.append(exc)

    watcher = threading.Thread(target=run_watcher)
    watcher.start()
    try:
        for i, name in enumerate(good):
            _drop(inbox, name, texts[i])
            if i == 7:
                _drop(inbox, "broken.csv", "time,flow\n0.0,1.0\n0.02,not-a-number\n")
        # Never renamed into place, and hidden: both must be left alone.
        (inbox / "late.csv.part").write_text(texts[20])
        (inbox / ".hidden.csv").write_text(texts[20])
        watcher.join(timeout=300)
    finally:
        stop.set()
        watcher.join(timeout=30)
    assert not errors, errors
    assert not watcher.is_alive()

    names = [item.file_name for item in handled]
    assert sorted(names) == sorted(good + ["broken.csv"])  # each exactly once
    assert {i.file_name: i.state for i in handled}["broken.csv"] == "rejected"
    assert all(i.state == "done" for i in handled if i.file_name != "broken.csv")
    # One registered refit per good file: a file retrained twice would show up here.
    assert len(registry.versions(NAME)) == 20
    done = inbox / DONE_FOLDER
    assert sorted(p.name for p in done.glob("*.csv")) == good
    for name in good:
        record = json.loads((done / f"{name}.decision.json").read_text())
        assert record["data"]["fingerprint"] == read_series(done / name).fingerprint()
    error = (inbox / REJECTED_FOLDER / "broken.csv.error.txt").read_text().strip()
    assert "broken.csv" in error and "\n" not in error
    assert (inbox / "late.csv.part").exists() and (inbox / ".hidden.csv").exists()
    ledger = read_ledger(inbox)
    assert len(ledger) == 21
    assert sorted(r["state"] for r in ledger).count("done") == 20

    # A restart: the same file dropped again is recognised by name, size and sha256 and not
    # retrained; a new file is.
    shutil.copy(done / good[0], inbox / good[0])
    _drop(inbox, "batch-20.csv", texts[20])
    again = watch(
        inbox,
        NAME,
        registry=registry,
        spec=TINY,
        report=False,
        once=True,
        poll_interval=0.05,
        settle=0.1,
    )
    by_name = {i.file_name: i for i in again}
    assert set(by_name) == {good[0], "batch-20.csv"}
    assert by_name[good[0]].skipped and by_name[good[0]].state == "done"
    assert not by_name["batch-20.csv"].skipped
    assert len(registry.versions(NAME)) == 21
    assert (done / "batch-00.2.csv").exists()  # moved beside the first copy, never overwritten


def test_watch_command_says_what_it_watches_and_handles_a_bad_file(tmp_path, capsys):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    _drop(inbox, "garbage.npz", "this is not an npz archive")
    code = main(
        [
            "watch",
            str(inbox),
            "--name",
            NAME,
            "--once",
            "--interval",
            "0.05",
            "--settle",
            "0.1",
            "--home",
            str(tmp_path / "home"),
            "--no-report",
            "--log-level",
            "INFO",
        ]
    )
    assert code == 0
    start, line, *rest = capsys.readouterr().out.splitlines()
    assert rest == []
    assert start.startswith(f"watching {inbox} ") and NAME in start
    for part in ("0.1 s", CLAIMED_FOLDER, str(inbox / DONE_FOLDER), str(inbox / REJECTED_FOLDER)):
        assert part in start
    assert line.startswith("garbage.npz: rejected (bad data): ")
    assert (inbox / REJECTED_FOLDER / "garbage.npz.error.txt").exists()
    assert read_ledger(inbox)[0]["reason"] == "data"
    assert not (tmp_path / "home" / NAME).exists()


def test_watch_command_bad_folder_is_bad_input(tmp_path, capsys):
    code = main(
        [
            "watch",
            str(tmp_path / "missing"),
            "--name",
            NAME,
            "--once",
            "--home",
            str(tmp_path / "home"),
        ]
    )
    assert code == 2
    assert "does not exist" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("given", "expected"),
    [
        ("loop@1", "write loop/1, not loop@1"),  # the hint every other command gives
        ("loop@accepted", "write loop/current, not loop@accepted"),
        ("loop/1", "give loop without /VERSION"),
        ("loop/current", "give loop without /VERSION"),
    ],
)
def test_watch_command_refuses_a_version_in_the_name_saying_what_to_write(
    tmp_path, capsys, given, expected
):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    argv = ["watch", str(inbox), "--name", given, "--once", "--home", str(tmp_path / "home")]
    code = main(argv)
    out, err = capsys.readouterr()
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and expected in err
    assert list(inbox.iterdir()) == []  # refused before the ledger or a folder is made


# --- end to end: real retrains, real threads and processes ------------------------------------
def _watch_in_thread(inbox: Path, registry: Registry, *, timeout: float = 240.0, **kw):
    """Run :func:`watch` in its own thread (as a service would); fail if it does not return."""
    stop = threading.Event()
    handled: list = []
    errors: list = []

    def run():
        try:
            handled.extend(
                watch(
                    inbox,
                    NAME,
                    registry=registry,
                    spec=TINY,
                    report=False,
                    poll_interval=0.02,
                    stop_event=stop,
                    **kw,
                )
            )
        except BaseException as exc:  # surfaced in the test thread below
            errors.append(exc)

    thread = threading.Thread(target=run)
    thread.start()
    return thread, stop, handled, errors


def _finish(thread, stop, errors, timeout: float = 240.0) -> None:
    thread.join(timeout=timeout)
    stop.set()
    thread.join(timeout=30)
    assert not thread.is_alive(), "the watcher did not return"
    assert not errors, errors


def _sha(text: str) -> str:
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _started(event: threading.Event, handled: list, timeout: float = 120.0) -> bool:
    """Wait for ``event``; give up early once the watcher handled a file without setting it."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and not handled:
        if event.wait(0.05):
            return True
    return event.is_set()


def _before_last_run(text: str) -> int:
    """Offset of the last run's first line in a CSV written by ``write_csv`` (run, time, ...)."""
    last = text.rstrip("\n").rsplit("\n", 1)[1].split(",", 1)[0]
    return text.index(f"\n{last},") + 1


def test_a_file_replaced_while_the_previous_one_is_retrained_is_retrained_too(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    registry = Registry(tmp_path / "home")
    first, second = _csv_texts(tmp_path, 2)
    _drop(inbox, "feed.csv", first)
    busy, replaced = threading.Event(), threading.Event()

    def progress(step: str) -> None:
        if step == "refit" and not busy.is_set():
            busy.set()  # the first retrain is under way: let the writer replace the file now
            assert replaced.wait(60)

    thread, stop, handled, errors = _watch_in_thread(
        inbox, registry, settle=0.2, max_files=2, progress=progress
    )
    try:
        assert _started(busy, handled), f"the first retrain never started: {handled}"
        _drop(inbox, "feed.csv", second)  # write-then-rename, as documented, mid-retrain
        replaced.set()
        _finish(thread, stop, errors)
    finally:
        replaced.set()
        stop.set()
    assert [(i.file_name, i.state, i.skipped) for i in handled] == [
        ("feed.csv", "done", False),
        ("feed.csv", "done", False),
    ]
    assert [i.sha256 for i in handled] == [_sha(first), _sha(second)]
    assert len(registry.versions(NAME)) == 2  # both contents retrained
    done = inbox / DONE_FOLDER
    assert (done / "feed.csv").read_text() == first
    assert (done / "feed.2.csv").read_text() == second
    rows = {r["sha256"]: r for r in read_ledger(inbox)}
    assert set(rows) == {_sha(first), _sha(second)}
    assert [rows[_sha(t)]["size"] for t in (first, second)] == [
        len(first.encode()),
        len(second.encode()),
    ]
    assert {r["state"] for r in rows.values()} == {"done"}


def test_a_slowly_written_file_is_taken_whole(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    registry = Registry(tmp_path / "home")
    (text,) = _csv_texts(tmp_path, 1)
    full = text.encode("utf-8")
    # Three of the four runs first, as an instrument that writes one run at a time would.
    cut = _before_last_run(text)
    thread, stop, handled, errors = _watch_in_thread(inbox, registry, settle=1.0, max_files=1)
    try:
        with open(inbox / "slow.csv", "wb") as handle:  # written in place, under its final name
            handle.write(full[:cut])
            handle.flush()
            os.fsync(handle.fileno())
            time.sleep(0.1)  # a pause far shorter than the quiet period (the watcher polls 0.02)
            handle.write(full[cut:])
        _finish(thread, stop, errors)
    finally:
        stop.set()
    (item,) = handled
    assert item.state == "done" and item.sha256 == hashlib.sha256(full).hexdigest()
    assert item.decision.data["n_runs"] == 4
    (row,) = read_ledger(inbox)
    assert row["size"] == len(full) == (inbox / DONE_FOLDER / "slow.csv").stat().st_size


def test_a_settings_rejection_is_retried_once_the_settings_are_fixed(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    registry = Registry(tmp_path / "home")
    good, fixed = _csv_texts(tmp_path, 2)
    rejected = inbox / REJECTED_FOLDER
    _drop(inbox, "a.csv", good)
    _drop(inbox, "broken.csv", "time,flow\n0.0,1.0\n0.02,not-a-number\n")
    quick = {"spec": TINY, "report": False, "once": True, "poll_interval": 0.05, "settle": 0.1}

    # A watcher configured to hold out 5 runs of files that have 4: a mistake of the watcher.
    items = watch(inbox, NAME, registry=registry, holdout=5, **quick)
    assert {i.file_name: (i.state, i.reason) for i in items} == {
        "a.csv": ("rejected", "settings"),
        "broken.csv": ("rejected", "data"),
    }
    assert registry.list_models() == []
    # Restarted with the same mistake: nothing is tried again.
    assert watch(inbox, NAME, registry=registry, holdout=5, **quick) == []
    assert (rejected / "a.csv").exists()

    # The setting fixed: a.csv comes back from rejected/ and is retrained; the bad data stay.
    items = watch(inbox, NAME, registry=registry, **quick)
    assert [(i.file_name, i.state, i.outcome is not None) for i in items] == [
        ("a.csv", "done", True)
    ]
    assert (inbox / DONE_FOLDER / "a.csv").read_text() == good
    assert not (rejected / "a.csv").exists() and not (rejected / "a.csv.error.txt").exists()
    assert (rejected / "broken.csv").exists() and (rejected / "broken.csv.error.txt").exists()
    assert len(registry.versions(NAME)) == 1

    # A corrected broken.csv is new content under the old name: processed.
    _drop(inbox, "broken.csv", fixed)
    items = watch(inbox, NAME, registry=registry, **quick)
    assert [(i.file_name, i.state) for i in items] == [("broken.csv", "done")]
    assert len(registry.versions(NAME)) == 2

    # Asked explicitly, the bad-data file is tried again (and, the same bytes, fails the same).
    items = watch(inbox, NAME, registry=registry, retry_rejected=True, **quick)
    assert [(i.file_name, i.state, i.reason, i.skipped) for i in items] == [
        ("broken.csv", "rejected", "data", False)
    ]
    assert "not-a-number" in (rejected / "broken.csv.error.txt").read_text()
    states = sorted((r["file_name"], r["state"], r["reason"]) for r in read_ledger(inbox))
    assert states == [
        ("a.csv", "done", None),
        ("broken.csv", "done", None),
        ("broken.csv", "rejected", "data"),
    ]


def test_a_file_removed_mid_retrain_does_not_stop_the_queue(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    registry = Registry(tmp_path / "home")
    texts = _csv_texts(tmp_path, 2)
    _drop(inbox, "a.csv", texts[0])
    _drop(inbox, "b.csv", texts[1])
    os.utime(inbox / "a.csv", (1_000_000, 1_000_000))  # a.csv is the older: handled first
    removed: list[Path] = []

    def progress(step: str) -> None:
        if step == "refit" and not removed:
            # Someone tidies the watcher's work area while the first retrain runs.
            removed.extend((inbox / CLAIMED_FOLDER).glob("*/a.csv"))
            for path in removed:
                path.unlink()

    thread, stop, handled, errors = _watch_in_thread(
        inbox, registry, settle=0.1, max_files=2, progress=progress
    )
    try:
        _finish(thread, stop, errors)
    finally:
        stop.set()
    assert len(removed) == 1
    first, second = handled
    assert (first.file_name, first.state, first.moved_to) == ("a.csv", "done", None)
    assert "removed during the retrain" in first.error
    assert (inbox / DONE_FOLDER / "a.csv.decision.json").exists()  # the decision stands
    assert (second.file_name, second.state) == ("b.csv", "done")
    assert (inbox / DONE_FOLDER / "b.csv").read_text() == texts[1]
    assert sorted((r["file_name"], r["state"]) for r in read_ledger(inbox)) == [
        ("a.csv", "done"),
        ("b.csv", "done"),
    ]


def test_a_watcher_killed_mid_retrain_is_recovered_at_the_next_start(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    home = tmp_path / "home"
    (text,) = _csv_texts(tmp_path, 1)
    _drop(inbox, "feed.csv", text)
    script = (
        "import os, signal, sys\n"
        "from ergodex.watching import watch\n"
        "from ergodex.registry import Registry\n"
        "from ergodex.validation import CheckSpec\n"
        "def progress(step):\n"
        "    if step == 'refit':\n"
        "        os.kill(os.getpid(), signal.SIGKILL)\n"
        "watch(sys.argv[1], sys.argv[2], registry=Registry(sys.argv[3]), spec=CheckSpec(members=4),"
        " report=False, poll_interval=0.02, settle=0.1, max_files=1, progress=progress)\n"
    )
    env = dict(os.environ, PYTHONPATH=str(Path(ergodex.__file__).parents[1]))
    killed = subprocess.run(
        [sys.executable, "-c", script, str(inbox), NAME, str(home)],
        env=env,
        timeout=180,
        capture_output=True,
        text=True,
        check=False,
    )
    assert killed.returncode == -9, killed.stderr
    (row,) = read_ledger(inbox)
    assert (row["state"], row["attempts"]) == ("processing", 1)
    claimed = Path(row["claimed_path"])
    assert claimed.read_text() == text and not (inbox / "feed.csv").exists()
    # A file caught half-way through its claim by the same dead watcher goes back to the inbox.
    host, _, pid = row["owner"].rpartition(":")
    take = inbox / CLAIMED_FOLDER / f".take-{pid}@{host}-9"
    take.mkdir()
    (take / "late.csv").write_text("time,flow\n0.0,1.0\n0.02,not-a-number\n")

    registry = Registry(home)
    items = watch(
        inbox,
        NAME,
        registry=registry,
        spec=TINY,
        report=False,
        once=True,
        poll_interval=0.05,
        settle=0.1,
    )
    assert [(i.file_name, i.state, i.reason) for i in items] == [
        ("feed.csv", "done", None),
        ("late.csv", "rejected", "data"),
    ]
    rows = {r["file_name"]: r for r in read_ledger(inbox)}
    assert (rows["feed.csv"]["state"], rows["feed.csv"]["attempts"]) == ("done", 2)
    assert (inbox / DONE_FOLDER / "feed.csv").read_text() == text
    assert len(registry.versions(NAME)) == 1
    assert list((inbox / CLAIMED_FOLDER).iterdir()) == []


def test_a_file_its_writer_goes_on_writing_after_the_claim_is_retrained_whole(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    registry = Registry(tmp_path / "home")
    (text,) = _csv_texts(tmp_path, 1)
    full = text.encode("utf-8")
    cut = _before_last_run(text)
    busy, written = threading.Event(), threading.Event()

    def progress(step: str) -> None:
        if step == "refit" and not busy.is_set():
            busy.set()  # the claimed bytes are being retrained: let the writer go on now
            assert written.wait(60)

    # A writer that pauses longer than the quiet period, keeping its file open: the first part
    # is claimed, and the rest lands in the claimed copy (the same open file) mid-retrain.
    with open(inbox / "stalls.csv", "wb") as writer:
        writer.write(full[:cut])
        writer.flush()
        thread, stop, handled, errors = _watch_in_thread(
            inbox, registry, settle=0.2, max_files=2, progress=progress
        )
        try:
            assert _started(busy, handled), f"the first retrain never started: {handled}"
            writer.write(full[cut:])
            writer.flush()
        finally:
            written.set()
    try:
        _finish(thread, stop, errors)
    finally:
        stop.set()
    first, second = handled
    assert first.state == "done" and "written to during the retrain" in first.error
    assert first.sha256 == hashlib.sha256(full[:cut]).hexdigest()
    assert first.decision.data["n_runs"] == 3
    assert (second.state, second.sha256) == ("done", hashlib.sha256(full).hexdigest())
    assert second.decision.data["n_runs"] == 4
    # The first decision's record keeps its name; the whole file is filed beside it.
    done = inbox / DONE_FOLDER
    assert sorted(p.name for p in done.iterdir()) == [
        "stalls.2.csv",
        "stalls.2.csv.decision.json",
        "stalls.csv.decision.json",
    ]
    assert (done / "stalls.2.csv").read_bytes() == full
    sizes = sorted(r["size"] for r in read_ledger(inbox))
    assert sizes == [cut, len(full)]


def test_the_watch_command_says_what_it_watches_before_any_file_arrives(tmp_path):
    import selectors

    inbox = tmp_path / "inbox"
    inbox.mkdir()
    env = dict(os.environ, PYTHONPATH=str(Path(ergodex.__file__).parents[1]))
    command = [
        sys.executable,
        "-c",
        "import sys; from ergodex.cli import main; sys.exit(main())",
        "watch",
        str(inbox),
        "--name",
        NAME,
        "--settle",
        "0.2",
        "--interval",
        "0.05",
        "--max-files",
        "1",
        "--home",
        str(tmp_path / "home"),
        "--no-report",
    ]
    proc = subprocess.Popen(
        command, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True
    )
    try:
        with selectors.DefaultSelector() as selector:  # the line must come while it waits
            selector.register(proc.stdout, selectors.EVENT_READ)
            assert selector.select(timeout=60), "no start line within 60 s"
        start = proc.stdout.readline()
        assert start.startswith(f"watching {inbox} ") and "0.2 s" in start
        assert proc.poll() is None  # still watching: nothing has arrived yet
        _drop(inbox, "late.csv", "time,flow\n0.0,1.0\n0.02,not-a-number\n")
        out, err = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert out.startswith("late.csv: rejected (bad data): ")


@pytest.mark.slow
def test_two_watcher_processes_on_one_folder_retrain_each_file_once(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    home = tmp_path / "home"
    texts = _csv_texts(tmp_path, 4)
    names = [f"part-{i}.csv" for i in range(4)]
    for name, text in zip(names, texts):
        _drop(inbox, name, text)
    script = (
        "import sys\n"
        "from ergodex.watching import watch\n"
        "from ergodex.registry import Registry\n"
        "from ergodex.validation import CheckSpec\n"
        "items = watch(sys.argv[1], sys.argv[2], registry=Registry(sys.argv[3]),"
        " spec=CheckSpec(members=4), report=False, once=True, poll_interval=0.05, settle=0.3)\n"
        "print(' '.join(f'{i.file_name}:{i.state}' for i in items))\n"
    )
    env = dict(os.environ, PYTHONPATH=str(Path(ergodex.__file__).parents[1]))
    procs = [
        subprocess.Popen(
            [sys.executable, "-c", script, str(inbox), NAME, str(home)],
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        for _ in range(2)
    ]
    handled = []
    try:
        for proc in procs:
            out, err = proc.communicate(timeout=300)
            assert proc.returncode == 0, err
            handled.extend(tuple(word.split(":")) for word in out.split())
    finally:
        for proc in procs:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
    # Every file once, by one of the two. (Whether a tiny check accepts each file is not the
    # point here: a file the check cannot use is rejected, and that too happens once.)
    assert sorted(name for name, _ in handled) == names
    done = sorted(name for name, state in handled if state == "done")
    assert len(Registry(home).versions(NAME)) == len(done) > 0  # one refit per retrain
    rows = read_ledger(inbox)
    assert sorted((r["file_name"], r["state"], r["attempts"]) for r in rows) == sorted(
        (name, state, 1) for name, state in handled
    )
    assert sorted(p.name for p in (inbox / DONE_FOLDER).glob("*.csv")) == done
    assert list((inbox / CLAIMED_FOLDER).iterdir()) == []


def test_a_watcher_stopped_with_ctrl_c_mid_retrain_runs_the_file_again_uncounted(tmp_path):
    inbox = tmp_path / "inbox"
    inbox.mkdir()
    home = tmp_path / "home"
    (text,) = _csv_texts(tmp_path, 1)
    _drop(inbox, "feed.csv", text)
    script = (
        "import os, signal, sys\n"
        "from ergodex.watching import watch\n"
        "from ergodex.registry import Registry\n"
        "from ergodex.validation import CheckSpec\n"
        "def progress(step):\n"
        "    if step == 'refit':\n"
        "        os.kill(os.getpid(), signal.SIGINT)  # as Ctrl-C in a terminal\n"
        "try:\n"
        "    watch(sys.argv[1], sys.argv[2], registry=Registry(sys.argv[3]),"
        " spec=CheckSpec(members=4), report=False, poll_interval=0.02, settle=0.1, max_files=1,"
        " progress=progress)\n"
        "except KeyboardInterrupt:\n"
        "    sys.exit(130)\n"
    )
    env = dict(os.environ, PYTHONPATH=str(Path(ergodex.__file__).parents[1]))
    stopped = subprocess.run(
        [sys.executable, "-c", script, str(inbox), NAME, str(home)],
        env=env,
        timeout=180,
        capture_output=True,
        text=True,
        check=False,
    )
    assert stopped.returncode == 130, stopped.stderr
    (row,) = read_ledger(inbox)
    assert (row["state"], row["attempts"], row["owner"]) == ("processing", 0, None)
    assert Path(row["claimed_path"]).read_text() == text
    items = watch(
        inbox,
        NAME,
        registry=Registry(home),
        spec=TINY,
        report=False,
        once=True,
        poll_interval=0.05,
        settle=0.1,
    )
    assert [(i.file_name, i.state) for i in items] == [("feed.csv", "done")]
    (row,) = read_ledger(inbox)
    assert (row["state"], row["attempts"]) == ("done", 1)
