"""Registry recovery and truthfulness: lost, emptied, older or corrupt index; changed files;
foreign scorecards; one accepted version per name. Real SQLite, real files under tmp_path."""

from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
import subprocess
import sys

import pytest

from ergodex.cli import main
from ergodex.exceptions import IntegrityError, RegistryError
from ergodex.registry import INDEX_FILE, QUARANTINE_DIR, STATUS_FILE, Registry
from ergodex.scenarios import lorenz63_surrogate

DATA_FP = "sha256:" + "5e" * 32


def _card(surrogate, verdict: str = "pass") -> dict:
    return {
        "verdict": verdict,
        "data_fingerprint": DATA_FP,
        "model_fingerprint": surrogate.fingerprint(),
    }


def _sha256(path) -> str:
    # Reference: Python's hashlib (FIPS 180-4 SHA-256), independent of the registry's own code.
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _tree(home) -> dict[str, str]:
    """Every file under the version folders with its sha256 (to show nothing was deleted)."""
    return {
        str(p.relative_to(home)): _sha256(p)
        for p in sorted(home.rglob("*"))
        if p.is_file()
        and p.parts[len(home.parts)] not in (QUARANTINE_DIR, ".staging")
        and not p.name.startswith(INDEX_FILE)
        and p.name != STATUS_FILE
    }


@pytest.fixture()
def populated(tmp_path):
    """loop/1 accepted, loop/2 candidate, ring/1 rejected; every registry closed afterwards."""
    truth = lorenz63_surrogate()
    other = lorenz63_surrogate(rho=24.0)
    home = tmp_path / "home"
    with Registry(home) as reg:
        reg.register("loop", truth, scorecard=_card(truth), note="first")
        reg.register("loop", other, scorecard=_card(other))
        reg.register("ring", truth, scorecard=_card(truth, "fail"))
        reg.accept("loop/1", reason="passed")
        reg.reject("ring/1", reason="failed its check")
        reg.record_event("loop/1", "drift-check-passed", "new data match")
    return home, truth, other


def _statuses(reg: Registry) -> dict[str, str]:
    return {i.ref: i.status for m in reg.list_models() for i in reg.versions(m.name)}


EXPECTED = {"loop/1": "accepted", "loop/2": "candidate", "ring/1": "rejected"}


@pytest.mark.parametrize("damage", ["emptied", "deleted", "corrupt"])
def test_lost_or_corrupt_index_is_rebuilt_from_the_folders(populated, damage, caplog):
    home, truth, other = populated
    before = _tree(home)
    with Registry(home) as reg:
        history_before = [(e.version, e.event, e.reason) for e in reg.history("loop")]
    index = home / INDEX_FILE
    if damage == "emptied":
        index.write_bytes(b"")
    elif damage == "deleted":
        index.unlink()
    else:
        index.write_bytes(b"this is not an SQLite file" * 40)
    with caplog.at_level(logging.WARNING, logger="ergodex.registry"):
        reg = Registry(home)
        assert _statuses(reg) == EXPECTED
    assert "rebuilt loop/1, loop/2, ring/1 from the folders' own records" in caplog.text
    assert _tree(home) == before  # nothing deleted, nothing changed
    # The history survives, with one "recovered" event per version.
    history = [
        (e.version, e.event, e.reason) for e in reg.history("loop") if e.event != "recovered"
    ]
    assert history == history_before
    assert sum(e.event == "recovered" for e in reg.history("loop")) == 2
    assert reg.load("loop") == truth and reg.load("loop/2") == other
    assert all(i.integrity == "ok" for i in reg.check_integrity())
    if damage == "corrupt":  # the damaged file is kept for inspection, never deleted
        kept = [p for p in (home / QUARANTINE_DIR).iterdir() if p.name.endswith(INDEX_FILE)]
        assert len(kept) == 1 and kept[0].read_bytes().startswith(b"this is not an SQLite")
    # A second open finds nothing more to repair.
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="ergodex.registry"):
        assert _statuses(Registry(home)) == EXPECTED
    assert caplog.text == ""


def test_register_after_a_lost_index_never_reuses_a_number(populated):
    home, truth, _ = populated
    (home / INDEX_FILE).unlink()
    reg = Registry(home)
    info = reg.register("loop", truth, scorecard=_card(truth))
    assert info.version == 3
    assert (home / "loop" / "1" / "model.json").is_file()
    assert [i.version for i in reg.versions("loop")] == [1, 2, 3]


def test_register_picks_past_the_highest_folder_even_without_recovery(tmp_path):
    truth = lorenz63_surrogate()
    home = tmp_path / "home"
    reg = Registry(home)
    reg.register("loop", truth)
    # A registry object opened before the folder appeared (no recovery since): the number is
    # still chosen past every folder on disk, so nothing is overwritten.
    (home / "loop" / "7").mkdir()
    (home / "loop" / "7" / "notes.txt").write_text("kept")
    assert reg.register("loop", truth).version == 8
    assert (home / "loop" / "7" / "notes.txt").read_text() == "kept"


def test_older_copy_of_the_index_is_detected_and_folders_win(populated, caplog):
    home, truth, other = populated
    backup = home.parent / "backup.sqlite3"
    shutil.copyfile(home / INDEX_FILE, backup)
    with Registry(home) as reg:
        reg.register("loop", truth, scorecard=_card(truth))  # loop/3
        reg.accept("loop/2")  # retires loop/1
        reg.record_event("loop/2", "drift-detected", "spectrum moved")
        expected = _statuses(reg)
        events = [(e.version, e.event, e.reason) for e in reg.history("loop")]
    assert expected == {
        **EXPECTED,
        "loop/1": "retired",
        "loop/2": "accepted",
        "loop/3": "candidate",
    }
    shutil.copyfile(backup, home / INDEX_FILE)  # the older copy is restored
    with caplog.at_level(logging.WARNING, logger="ergodex.registry"):
        reg = Registry(home)
        assert _statuses(reg) == expected
    assert "older than the version folders" in caplog.text
    assert "loop/1" in caplog.text and "loop/3" in caplog.text and "ring/1" not in caplog.text
    # Same events (events of one millisecond may come back in another order across versions).
    assert sorted(
        (e.version, e.event, e.reason) for e in reg.history("loop") if e.event != "recovered"
    ) == sorted(events)
    assert reg.load("loop") == other


def test_unknown_numbered_folder_is_quarantined_not_removed(populated, caplog):
    home, _, _ = populated
    stray = home / "loop" / "5"
    stray.mkdir()
    (stray / "model.json").write_text("{}")  # no record: not written by the registry
    elsewhere = home / "notes" / "3"  # a name the registry never used: left alone
    elsewhere.mkdir(parents=True)
    with caplog.at_level(logging.WARNING, logger="ergodex.registry"):
        reg = Registry(home)
    assert not stray.exists() and elsewhere.exists()
    kept = [p for p in (home / QUARANTINE_DIR).iterdir() if p.name.endswith("-loop-5")]
    assert len(kept) == 1 and (kept[0] / "model.json").read_text() == "{}"
    assert "not written by this registry" in caplog.text
    assert _statuses(reg) == EXPECTED


def test_changed_scorecard_is_shown_as_failing_integrity(populated, capsys):
    home, truth, _ = populated
    card = home / "loop" / "1" / "scorecard.json"
    expected = _sha256(card)
    os.chmod(card, 0o644)
    card.write_text(json.dumps({**_card(truth), "verdict": "pass", "edited": True}))
    actual = _sha256(card)
    reg = Registry(home)
    info = reg.get("loop/1")
    assert (info.status, info.integrity) == ("accepted", "failed")
    assert info.integrity_problems == [f"{card}: expected sha256 {expected}, actual {actual}"]
    assert reg.get("loop/2").integrity == "ok"
    assert [m.integrity_failed for m in reg.list_models()] == [[1], []]
    with pytest.raises(IntegrityError, match="sha256 mismatch"):
        reg.load("loop")

    code = main(["models", "show", "loop/1", "--home", str(home)])
    out = capsys.readouterr().out
    assert code == 0 and "[accepted, INTEGRITY FAILED]" in out
    assert "scorecard:   pass (unverified: files changed)" in out
    code = main(["models", "list", "--home", str(home)])
    assert "INTEGRITY FAILED: loop/1" in capsys.readouterr().out
    code = main(["models", "history", "loop", "--home", str(home)])
    assert "loop/1 INTEGRITY FAILED" in capsys.readouterr().out
    code = main(["models", "verify", "--home", str(home)])
    out = capsys.readouterr().out
    assert code == 1
    assert "FAILED  loop/1 (accepted)" in out and str(card) in out
    assert expected in out and actual in out
    assert "3 versions checked" in out and "1 with changed files" in out
    code = main(["models", "verify", "loop/2", "--home", str(home), "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0 and report["ok"] and report["versions"][0]["integrity"] == "ok"

    # The index lost as well: the rebuilt index keeps the hashes the folder recorded, so the
    # change is still caught.
    (home / INDEX_FILE).unlink()
    assert Registry(home).get("loop/1").integrity == "failed"


def test_scorecard_of_another_model_is_refused(tmp_path, capsys):
    truth = lorenz63_surrogate()
    other = lorenz63_surrogate(rho=24.0)
    model = tmp_path / "model.json"
    truth.to_json(model)
    card = tmp_path / "scorecard.json"
    card.write_text(json.dumps(_card(other)))
    home = tmp_path / "home"
    code = main(
        ["register", str(model), "--name", "loop", "--scorecard", str(card), "--home", str(home)]
    )
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert "was made for another model" in err and other.fingerprint() in err
    assert Registry(home).list_models() == [] and not (home / "loop").exists()
    card.write_text(json.dumps(_card(truth)))
    assert (
        main(
            [
                "register",
                str(model),
                "--name",
                "loop",
                "--scorecard",
                str(card),
                "--home",
                str(home),
            ]
        )
        == 0
    )


def test_accepting_retires_the_previous_version_in_one_step(tmp_path):
    truth = lorenz63_surrogate()
    reg = Registry(tmp_path / "home")
    for _ in range(3):
        reg.register("loop", truth, scorecard=_card(truth))
    reg.accept("loop/1")
    reg.accept("loop/3")
    assert {i.version: i.status for i in reg.versions("loop")} == {
        1: "retired",
        2: "candidate",
        3: "accepted",
    }
    retired = [e for e in reg.history("loop/1") if e.event == "retired"]
    assert [(e.from_status, e.to_status, e.reason) for e in retired] == [
        ("accepted", "retired", "replaced by version 3")
    ]
    # The folders carry the same statuses, so a rebuilt index agrees.
    for number, status in ((1, "retired"), (3, "accepted")):
        record = json.loads((reg.home / "loop" / str(number) / STATUS_FILE).read_text())
        assert (record["status"], record["committed"]) == (status, True)
        assert record["events"][-1]["to_status"] == status
    assert sum(m.accepted is not None for m in reg.list_models()) == 1


def test_refused_acceptance_changes_nothing(tmp_path):
    truth = lorenz63_surrogate()
    reg = Registry(tmp_path / "home")
    reg.register("loop", truth, scorecard=_card(truth))
    reg.register("loop", truth, scorecard=_card(truth, "fail"))
    reg.accept("loop/1")
    with pytest.raises(RegistryError, match="cannot be accepted"):
        reg.accept("loop/2")
    assert reg.get("loop").version == 1 and reg.get("loop/1").status == "accepted"


def test_folder_written_before_status_records_gets_one(populated):
    home, _, _ = populated
    status = home / "ring" / "1" / STATUS_FILE
    status.unlink()  # as written by an ergodex that kept no status record in the folder
    reg = Registry(home)
    assert json.loads(status.read_text())["status"] == "rejected"
    assert _statuses(reg) == EXPECTED


def test_cli_warns_on_stderr_when_it_rebuilds(populated):
    home, _, _ = populated
    (home / INDEX_FILE).write_bytes(b"")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)}
    proc = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from ergodex.cli import main; sys.exit(main())",
            "models",
            "list",
            "--home",
            str(home),
        ],
        capture_output=True,
        text=True,
        env=env,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 0
    assert "WARNING" in proc.stderr and "rebuilt loop/1, loop/2, ring/1" in proc.stderr
    assert "loop" in proc.stdout and "ring" in proc.stdout and "no models" not in proc.stdout


@pytest.mark.slow
def test_service_marks_a_changed_version_and_keeps_server_paths_out(populated):
    httpx = pytest.importorskip("httpx")
    pytest.importorskip("fastapi")
    from ergodex.service.process import ServerProcess

    home, truth, _ = populated
    card = home / "loop" / "1" / "scorecard.json"
    expected = _sha256(card)
    os.chmod(card, 0o644)
    card.write_text(json.dumps({**_card(truth), "edited": True}))
    actual = _sha256(card)
    with (
        ServerProcess(home, workers=1) as server,
        httpx.Client(base_url=server.url, timeout=60) as client,
    ):
        shown = client.get("/models/loop/current").json()
        listing = client.get("/models").json()["models"]
        fine = client.get("/models/loop/versions/2").json()
    assert (shown["status"], shown["integrity"]) == ("accepted", "failed")
    assert shown["integrity_problems"] == [
        f"loop/1/scorecard.json: expected sha256 {expected}, actual {actual}"
    ]
    assert [m["integrity_failed"] for m in listing] == [[1], []]
    assert fine["integrity"] == "ok" and fine["integrity_problems"] == []
