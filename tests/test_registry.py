"""The registry: versions, statuses, integrity, names, lineage, export/import (real SQLite, real
files)."""

from __future__ import annotations

import hashlib
import json
import os
import sqlite3
import subprocess
import sys
import time

import numpy as np
import pytest

from ergodex.exceptions import IntegrityError, ModelFileError, RegistryError
from ergodex.registry import (
    CAUTION,
    INDEX_FILE,
    RECORD_FORMAT,
    SCHEMA_VERSION,
    STAGING_DIR,
    Registry,
    format_ref,
    parse_ref,
    split_ref,
    validate_name,
)
from ergodex.scenarios import lorenz63_surrogate
from ergodex.surrogate import Surrogate


def _card(
    surrogate: Surrogate | None = None, verdict: str = "pass", data_fp: str | None = None
) -> dict:
    """A scorecard dict shaped as docs/formats.md describes (verdict, rows, fingerprints)."""
    return {
        "verdict": verdict,
        "rows": [
            {
                "statistic": "wasserstein1",
                "variable": "flow",
                "value": 0.1,
                "noise_floor": 0.2,
                "ratio": 0.5,
                "tolerance": 2.0,
                "verdict": verdict,
            }
        ],
        "data_fingerprint": "sha256:" + "ab" * 32 if data_fp is None else data_fp,
        "model_fingerprint": surrogate.fingerprint() if surrogate is not None else "",
    }


def _evidence(tmp_path, rng) -> os.PathLike:
    path = tmp_path / "evidence.npz"
    np.savez(path, reference_histogram=rng.random(35), model_histogram=rng.random(35))
    return path


@pytest.fixture()
def full_version(tmp_path):
    """A registry with one version carrying every kind of artifact."""
    rng = np.random.default_rng(7)
    truth = lorenz63_surrogate()
    reg = Registry(tmp_path / "home")
    info = reg.register(
        "convection-loop",
        truth,
        scorecard=_card(truth),
        report_html="<html><body>report</body></html>",
        evidence_path=_evidence(tmp_path, rng),
        fit_settings={"method": "sparse", "prune_below": 0.1},
        note="true equations",
        datasets={"fit": "sha256:" + "01" * 32},
    )
    return reg, info, truth


def test_register_load_round_trip_and_hashes(full_version):
    reg, info, truth = full_version
    assert (info.name, info.version, info.status) == ("convection-loop", 1, "candidate")
    assert info.folder == reg.home / "convection-loop" / "1"
    assert set(info.artifacts) == {
        "model.json",
        "scorecard.json",
        "report.html",
        "fit-settings.json",
        "evidence.npz",
        "record.json",
    }
    # Every recorded hash is the sha256 of the file on disk (hashlib, outside the registry code).
    for filename, digest in info.artifacts.items():
        assert hashlib.sha256((info.folder / filename).read_bytes()).hexdigest() == digest
    loaded = reg.load("convection-loop/1")
    assert loaded == truth
    np.testing.assert_array_equal(loaded.coefficients, truth.coefficients)
    assert reg.get("convection-loop/1").model_fingerprint == truth.fingerprint()


def test_record_holds_lineage_and_package_versions(full_version):
    reg, info, truth = full_version
    record = json.loads(reg.artifact(info.ref, "record.json"))
    assert record["format"] == RECORD_FORMAT
    roles = {d["role"]: d["fingerprint"] for d in record["datasets"]}
    assert roles == {"fit": "sha256:" + "01" * 32, "check": "sha256:" + "ab" * 32}
    assert record["packages"]["numpy"] == np.__version__
    child = reg.register("convection-loop", truth, parent="convection-loop/1")
    assert child.version == 2 and child.parent == "convection-loop/1"
    assert reg.register("convection-loop", truth, parent=2).parent == "convection-loop/2"
    with pytest.raises(RegistryError, match="parent convection-loop/9 is not in the registry"):
        reg.register("convection-loop", truth, parent="convection-loop/9")


def test_load_by_name_returns_the_one_accepted_version(tmp_path):
    reg = Registry(tmp_path)
    truth = lorenz63_surrogate()
    other = lorenz63_surrogate(rho=24.0)
    reg.register("loop", truth, scorecard=_card(truth))
    with pytest.raises(
        RegistryError, match=r"loop has no accepted version \(1 candidate\).*accept"
    ):
        reg.load("loop")
    reg.register("loop", other, scorecard=_card(other))
    reg.register("loop", truth, scorecard=_card(truth))
    reg.accept("loop/1")
    assert reg.load("loop") == truth
    reg.accept("loop/2")  # retires version 1 in the same transaction
    assert reg.get("loop").version == 2
    assert reg.load("loop") == other
    assert reg.get("loop/1").status == "retired"
    reg.retire("loop/2", reason="drifted")
    with pytest.raises(
        RegistryError, match=r"loop has no accepted version \(1 candidate, 2 retired\)"
    ):
        reg.load("loop")  # a retired version never comes back by itself
    with pytest.raises(RegistryError, match="no model named 'nothing'.*registered: loop"):
        reg.get("nothing")
    with pytest.raises(RegistryError, match=r"loop/7 does not exist; versions of loop run 1..3"):
        reg.get("loop/7")


def test_accepting_needs_a_passing_scorecard_on_recorded_data(tmp_path):
    reg = Registry(tmp_path)
    truth = lorenz63_surrogate()
    reg.register("loop", truth, scorecard=_card(truth, verdict="fail"))
    reg.register("loop", truth)  # no scorecard
    reg.register("loop", truth, scorecard=_card(truth, data_fp=""))
    with pytest.raises(RegistryError, match="was made for another model"):
        reg.register("loop", truth, scorecard=_card(lorenz63_surrogate(rho=20.0)))
    assert [i.version for i in reg.versions("loop")] == [1, 2, 3]  # nothing written
    with pytest.raises(
        RegistryError, match="loop/1 cannot be accepted: its scorecard's verdict is 'fail'"
    ):
        reg.accept("loop/1")
    with pytest.raises(RegistryError, match="loop/2 cannot be accepted: it has no scorecard"):
        reg.accept("loop/2")
    with pytest.raises(RegistryError, match="does not record the fingerprint of the data"):
        reg.accept("loop/3")
    with pytest.raises(RegistryError, match="override needs a non-empty reason"):
        reg.accept("loop/1", override=True, reason="  ")
    assert reg.get("loop/1").status == "candidate"
    info = reg.accept("loop/1", override=True, reason="only member disagreement failed; reviewed")
    assert info.status == "accepted"
    last = reg.history("loop")[-1]
    assert (last.event, last.override, last.version) == ("accepted", True, 1)
    assert last.reason == "only member disagreement failed; reviewed"


def test_status_transitions_and_events(tmp_path, monkeypatch):
    monkeypatch.setenv("USER", "operator7")
    monkeypatch.setenv("LOGNAME", "operator7")
    reg = Registry(tmp_path)
    truth = lorenz63_surrogate()
    for _ in range(3):
        reg.register("loop", truth, scorecard=_card(truth))
    with pytest.raises(RegistryError, match="name a version"):
        reg.accept("loop")
    with pytest.raises(RegistryError, match="needs a non-empty reason"):
        reg.reject("loop/2", reason="")
    reg.reject("loop/2", reason="worse spectra")
    with pytest.raises(RegistryError, match="loop/2 is rejected; it cannot become accepted"):
        reg.accept("loop/2")
    with pytest.raises(RegistryError, match="loop/3 is candidate; it cannot become retired"):
        reg.retire("loop/3", reason="x")
    reg.accept("loop/1")
    with pytest.raises(RegistryError, match="loop/1 is accepted; it cannot become rejected"):
        reg.reject("loop/1", reason="x")
    event = reg.record_event("loop/1", "drift-detected", "autocorrelation moved")
    assert (event.from_status, event.to_status) == ("accepted", "accepted")
    assert reg.get("loop/1").status == "accepted"
    with pytest.raises(RegistryError, match="reserved for status changes"):
        reg.record_event("loop/1", "accepted", "sneaky")
    with pytest.raises(RegistryError, match="event name 'Bad Event'"):
        reg.record_event("loop/1", "Bad Event", "")
    reg.retire("loop/1", reason="replaced")
    history = reg.history("loop")
    assert [(e.version, e.event) for e in history] == [
        (1, "registered"),
        (2, "registered"),
        (3, "registered"),
        (2, "rejected"),
        (1, "accepted"),
        (1, "drift-detected"),
        (1, "retired"),
    ]
    assert all(e.actor == "operator7" for e in history)
    assert [e.id for e in history] == sorted(e.id for e in history)
    assert history[-1].time.endswith("Z") and history[-1].reason == "replaced"
    assert [e.event for e in reg.history("loop/1")] == [
        "registered",
        "accepted",
        "drift-detected",
        "retired",
    ]
    summary = reg.list_models()[0]
    assert (summary.versions, summary.latest, summary.accepted) == (3, 3, None)
    assert summary.statuses == {"candidate": 1, "accepted": 0, "rejected": 1, "retired": 1}


@pytest.mark.parametrize(
    "filename",
    [
        "model.json",
        "scorecard.json",
        "report.html",
        "fit-settings.json",
        "evidence.npz",
        "record.json",
    ],
)
def test_flipped_byte_in_any_artifact_is_caught_on_load(full_version, filename):
    reg, info, _ = full_version
    path = info.folder / filename
    data = bytearray(path.read_bytes())
    position = len(data) // 2
    data[position] ^= 0x01
    os.chmod(path, 0o644)
    path.write_bytes(bytes(data))
    expected = info.artifacts[filename]
    actual = hashlib.sha256(bytes(data)).hexdigest()
    pattern = (
        rf"{filename}: sha256 mismatch for convection-loop/1: expected {expected}, actual {actual}"
    )
    with pytest.raises(IntegrityError, match=pattern):
        reg.load("convection-loop/1")
    with pytest.raises(IntegrityError, match="changed after it was registered"):
        reg.artifact("convection-loop/1", filename)
    with pytest.raises(IntegrityError, match=filename):
        reg.export("convection-loop/1", info.folder.parent.parent.parent / "exported")


def test_missing_artifact_is_caught(full_version):
    reg, info, _ = full_version
    (info.folder / "report.html").unlink()
    with pytest.raises(IntegrityError, match=r"report.html: file of convection-loop/1 is missing"):
        reg.load("convection-loop/1")


BAD_NAMES = [
    "../x",
    "a/b",
    "",
    "a" * 500,
    "nul\x00byte",
    "..",
    ".hidden",
    "a\\b",
    "x@1",
    "with space",
    "con",
    "registry.sqlite3",
    "tab\tname",
    "é-accent",
    "trailing.",
]


@pytest.mark.parametrize("name", BAD_NAMES)
def test_bad_names_are_refused_and_nothing_is_written(tmp_path, name):
    home = tmp_path / "home"
    reg = Registry(home)
    with pytest.raises(RegistryError, match="model name"):
        reg.register(name, lorenz63_surrogate())
    assert not home.exists()
    with pytest.raises(RegistryError, match="model name"):
        validate_name(name)


def test_good_names_and_references():
    for name in ("loop", "Loop-2", "station_ring.v1", "a" * 64, "9lives"):
        assert validate_name(name) == name
    assert parse_ref("loop/12") == ("loop", 12)
    assert parse_ref("loop") == ("loop", None)
    assert parse_ref("loop/current") == ("loop", None)  # the accepted version, by its word
    assert split_ref("loop/current") == ("loop", None, True)
    assert split_ref("loop") == ("loop", None, False)
    assert format_ref("loop", 12) == "loop/12"
    for ref in ("loop/", "loop/0", "loop/-1", "loop/x", "loop/1/2", "loop/Current"):
        with pytest.raises(
            RegistryError, match="version after '/' must be a positive whole number or 'current'"
        ):
            parse_ref(ref)


@pytest.mark.parametrize(
    ("old", "now"),
    [("loop@3", "loop/3"), ("loop@accepted", "loop/current"), ("loop@", "loop/")],
)
def test_a_reference_in_the_former_at_form_says_how_to_write_it(old, now):
    with pytest.raises(RegistryError, match=f"write {now}, not {old} "):
        parse_ref(old)


def test_current_names_the_accepted_version_for_reads_and_status_changes(tmp_path):
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    for _ in range(2):
        reg.register("loop", truth, scorecard=_card(truth, data_fp="sha256:" + "ab" * 32))
    with pytest.raises(RegistryError, match="loop has no accepted version"):
        reg.get("loop/current")
    reg.accept("loop/2")
    assert reg.get("loop/current").version == reg.get("loop").version == 2
    assert [e.version for e in reg.history("loop/current")] == [2, 2]  # registered, accepted
    assert [i.ref for i in reg.check_integrity("loop/current")] == ["loop/2"]
    assert reg.retire("loop/current", reason="drifted").ref == "loop/2"
    with pytest.raises(RegistryError, match="name a version to accept: loop/VERSION"):
        reg.accept("loop/current")


def test_names_differing_only_in_case_are_refused(tmp_path):
    reg = Registry(tmp_path)
    reg.register("Loop", lorenz63_surrogate())
    # On a case-insensitive filesystem both names would share one folder.
    with pytest.raises(
        RegistryError, match="differs only in letter case from the registered 'Loop'"
    ):
        reg.register("loop", lorenz63_surrogate())
    assert [m.name for m in reg.list_models()] == ["Loop"]


def test_bad_inputs_leave_nothing_behind(tmp_path):
    home = tmp_path / "home"
    reg = Registry(home)
    truth = lorenz63_surrogate()
    (tmp_path / "broken.json").write_text('{"format": "nope"')
    with pytest.raises(ModelFileError, match="broken.json"):
        reg.register("loop", tmp_path / "broken.json")
    with pytest.raises(ModelFileError, match="'verdict' must be 'pass', 'fail' or 'inconclusive'"):
        reg.register("loop", truth, scorecard={"verdict": "maybe"})
    with pytest.raises(RegistryError, match="does not exist"):
        reg.register("loop", truth, scorecard=tmp_path / "missing.json")
    # Object arrays can only be read through pickle: refused.
    np.save(tmp_path / "plain.npy", np.zeros(3))
    objects = tmp_path / "objects.npz"
    np.savez(objects, bad=np.array([{"a": 1}], dtype=object))
    with pytest.raises(ModelFileError, match="object arrays are refused"):
        reg.register("loop", truth, evidence_path=objects)
    assert not home.exists()


def test_index_schema_wal_and_newer_schema_refused(full_version):
    reg, _, _ = full_version
    conn = sqlite3.connect(reg.home / INDEX_FILE)
    try:
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert conn.execute("SELECT version FROM schema_version").fetchall() == [(SCHEMA_VERSION,)]
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        assert {"versions", "artifacts", "events", "models", "schema_version"} <= tables
        conn.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
        conn.commit()
    finally:
        conn.close()
    reg.close()
    with pytest.raises(RegistryError, match="newer than this ergodex understands"):
        Registry(reg.home).get("convection-loop/1")


def test_empty_or_missing_registry_reads_without_writing(tmp_path):
    reg = Registry(tmp_path / "nowhere")
    assert reg.list_models() == []
    with pytest.raises(RegistryError, match="the registry is empty"):
        reg.load("loop")
    assert not (tmp_path / "nowhere").exists()


def test_home_defaults_to_environment_then_models_folder(tmp_path, monkeypatch):
    monkeypatch.setenv("ERGODEX_HOME", str(tmp_path / "env-home"))
    assert Registry().home == tmp_path / "env-home"
    monkeypatch.delenv("ERGODEX_HOME")
    monkeypatch.chdir(tmp_path)
    assert Registry().home == tmp_path / "models"


def test_export_import_round_trip_verifies(full_version, tmp_path):
    reg, info, truth = full_version
    reg.accept(info.ref)
    out = reg.export("convection-loop", tmp_path / "for-partner")
    readme = (out / "README.md").read_text()
    for line in truth.equations():
        assert line in readme
    assert CAUTION in readme
    manifest = json.loads((out / "manifest.json").read_text())
    assert (manifest["name"], manifest["version"], manifest["status"]) == (
        "convection-loop",
        1,
        "accepted",
    )
    for filename, digest in manifest["files"].items():
        assert hashlib.sha256((out / filename).read_bytes()).hexdigest() == digest
    with pytest.raises(RegistryError, match="exists and is not empty"):
        reg.export("convection-loop", out)

    other = Registry(tmp_path / "partner-home")
    imported = other.import_folder(out)
    assert (imported.ref, imported.status) == ("convection-loop/1", "candidate")
    assert other.load("convection-loop/1") == truth
    for filename in ("model.json", "scorecard.json", "report.html", "evidence.npz"):
        assert other.artifact(imported.ref, filename) == reg.artifact(info.ref, filename)
    assert other.history("convection-loop")[0].event == "imported"
    # Imported as a candidate: the scorecard still passes, so this registry may accept it.
    assert other.accept(imported.ref).status == "accepted"
    assert other.import_folder(out, name="renamed").ref == "renamed/1"

    tampered = bytearray((out / "model.json").read_bytes())
    tampered[10] ^= 0x20
    (out / "model.json").write_bytes(bytes(tampered))
    with pytest.raises(
        IntegrityError, match=r"model.json: sha256 mismatch: expected .*changed after export"
    ):
        other.import_folder(out)
    assert [v.version for v in other.versions("convection-loop")] == [1]


def _lineage(tmp_path):
    """loop/1 and its child loop/2 (parent loop/1), every registry closed afterwards."""
    truth = lorenz63_surrogate()
    reg = Registry(tmp_path / "home")
    reg.register("loop", truth, scorecard=_card(truth, data_fp="sha256:" + "cd" * 32))
    reg.register("loop", truth, scorecard=_card(truth, data_fp="sha256:" + "cd" * 32), parent=1)
    reg.close()
    return reg.home


def test_an_index_of_schema_1_gets_its_parents_rewritten_as_name_slash_version(tmp_path):
    home = _lineage(tmp_path)
    # As schema 1 stored it: the parent in the former NAME@VERSION form.
    conn = sqlite3.connect(home / INDEX_FILE)
    with conn:
        conn.execute("UPDATE versions SET parent = 'loop@1' WHERE version = 2")
        conn.execute("UPDATE schema_version SET version = 1")
    conn.close()
    reg = Registry(home)
    assert reg.get("loop/2").parent == "loop/1"
    conn = sqlite3.connect(home / INDEX_FILE)
    try:
        assert conn.execute("SELECT version FROM schema_version").fetchall() == [(SCHEMA_VERSION,)]
    finally:
        conn.close()
    reg.close()


def _rewrite_record(folder, change) -> None:
    """Change a version's record.json as an earlier ergodex would have written it, keeping the
    folder's status record (which names the record's sha256) consistent."""
    path = folder / "record.json"
    record = json.loads(path.read_text())
    change(record)
    os.chmod(path, 0o644)
    data = (json.dumps(record, indent=2, sort_keys=True) + "\n").encode()
    path.write_bytes(data)
    status_path = folder / "status.json"
    status = json.loads(status_path.read_text())
    status["record_sha256"] = hashlib.sha256(data).hexdigest()
    status_path.write_text(json.dumps(status))


def test_a_version_1_record_is_indexed_again_with_its_parent_in_todays_form(tmp_path, caplog):
    home = _lineage(tmp_path)
    assert RECORD_FORMAT == "ergodex-record/2"

    def as_version_1(record):
        record.update(format="ergodex-record/1", parent="loop@1")

    _rewrite_record(home / "loop" / "2", as_version_1)
    (home / INDEX_FILE).unlink()
    reg = Registry(home)  # rebuilt from the folders' own records
    info = reg.get("loop/2")
    assert (info.parent, info.integrity) == ("loop/1", "ok")
    reg.close()


def test_a_version_2_record_with_a_reference_in_the_former_form_is_not_indexed(tmp_path, caplog):
    home = _lineage(tmp_path)
    _rewrite_record(home / "loop" / "2", lambda record: record.update(parent="loop@1"))
    (home / INDEX_FILE).unlink()
    with caplog.at_level("WARNING", logger="ergodex.registry"):
        reg = Registry(home)
        assert [v.version for v in reg.versions("loop")] == [1]
    assert (
        "record.json: holds the reference 'loop@1' in the former NAME@VERSION form" in caplog.text
    )
    reg.close()


def test_an_export_of_format_1_is_imported_with_its_parent_in_todays_form(tmp_path):
    home = _lineage(tmp_path)
    reg = Registry(home)
    out = reg.export("loop/2", tmp_path / "out")
    manifest_path = out / "manifest.json"
    manifest = json.loads(manifest_path.read_text())
    assert (manifest["format"], manifest["parent"]) == ("ergodex-export/2", "loop/1")
    manifest.update(format="ergodex-export/1", parent="loop@1")
    manifest_path.write_text(json.dumps(manifest))
    other = Registry(tmp_path / "other")
    imported = other.import_folder(out)
    record = json.loads(other.artifact(imported, "record.json"))
    assert record["imported_from"]["ref"] == "loop/2"
    assert record["imported_from"]["parent"] == "loop/1"
    # The same manifest under today's format must not hold the former form.
    manifest["format"] = "ergodex-export/2"
    manifest_path.write_text(json.dumps(manifest))
    with pytest.raises(RegistryError, match=r"manifest.json: holds the reference 'loop@1'"):
        other.import_folder(out)
    reg.close()
    other.close()


def test_sweep_removes_only_leftovers_of_dead_registrations(tmp_path):
    reg = Registry(tmp_path / "home")
    truth = lorenz63_surrogate()
    reg.register("loop", truth)
    staging = reg.home / STAGING_DIR
    # A process that has exited: its pid is free (waited for, so not even a zombie).
    proc = subprocess.run(
        [sys.executable, "-c", "import os; print(os.getpid())"],
        capture_output=True,
        text=True,
        check=True,
    )
    import socket

    dead = staging / f"{int(proc.stdout)}.deadbeef.{socket.gethostname()}"
    alive = staging / f"{os.getpid()}.cafef00d.{socket.gethostname()}"
    stale = staging / f"{os.getpid()}.0ddba11.{socket.gethostname()}"  # our pid, but 2 days old
    for folder in (dead, alive, stale):
        folder.mkdir(parents=True)
        (folder / "model.json").write_text("{}")
    two_days_ago = time.time() - 2 * 24 * 3600
    os.utime(stale, (two_days_ago, two_days_ago))
    # A version folder moved into place by a registration killed before its commit.
    orphan = reg.home / "loop" / "2"
    orphan.mkdir()
    (orphan / "record.json").write_text(json.dumps({"format": RECORD_FORMAT, "name": "loop"}))
    # Something another tool keeps under the home: never touched.
    foreign = reg.home / "notes" / "3"
    foreign.mkdir(parents=True)
    reg.close()

    reopened = Registry(reg.home)  # the startup sweep
    assert not dead.exists() and alive.exists() and not stale.exists()
    assert not orphan.exists() and foreign.exists()
    # Moved aside, never deleted: the record of the orphan is still there to inspect.
    quarantined = sorted(p.name for p in (reg.home / ".quarantine").iterdir())
    assert len(quarantined) == 3 and sum(n.endswith("-loop-2") for n in quarantined) == 1
    assert (
        reg.home
        / ".quarantine"
        / next(n for n in quarantined if n.endswith("-loop-2"))
        / "record.json"
    ).is_file()
    assert reopened.register("loop", truth).version == 2
    assert reopened.verify("loop/2").version == 2


def test_no_accepted_name_can_leave_the_home(tmp_path):
    hypothesis = pytest.importorskip("hypothesis")
    from hypothesis import strategies as st

    home = tmp_path.resolve()

    @hypothesis.settings(max_examples=300, deadline=None)
    @hypothesis.given(st.text(min_size=0, max_size=80))
    def check(name):
        try:
            validate_name(name)
        except RegistryError:
            return
        # Accepted names are one plain path component directly under the home.
        folder = (home / name / "1").resolve()
        assert folder.parent.parent == home and folder.parent.name == name

    check()


def test_forward_migration_upgrades_an_existing_index(full_version, monkeypatch):
    import ergodex.registry.index as registry_module

    reg, info, truth = full_version
    reg.close()
    # A later schema adds a column; an index written by this version must be upgraded in place,
    # keeping every version and event.
    monkeypatch.setitem(
        registry_module.MIGRATIONS,
        SCHEMA_VERSION + 1,
        ("ALTER TABLE versions ADD COLUMN reviewer TEXT",),
    )
    monkeypatch.setattr(registry_module, "SCHEMA_VERSION", SCHEMA_VERSION + 1)
    upgraded = Registry(reg.home)
    assert upgraded.load(info.ref) == truth
    conn = sqlite3.connect(reg.home / INDEX_FILE)
    try:
        assert conn.execute("SELECT version FROM schema_version").fetchall() == [
            (SCHEMA_VERSION + 1,)
        ]
        columns = {row[1] for row in conn.execute("PRAGMA table_info(versions)")}
        assert "reviewer" in columns
    finally:
        conn.close()
    assert [e.event for e in upgraded.history("convection-loop")] == ["registered"]


def test_threads_sharing_one_registry_get_distinct_versions(tmp_path):
    from concurrent.futures import ThreadPoolExecutor

    reg = Registry(tmp_path)
    truth = lorenz63_surrogate()
    with ThreadPoolExecutor(max_workers=4) as pool:
        numbers = list(pool.map(lambda _: reg.register("loop", truth).version, range(12)))
    assert sorted(numbers) == list(range(1, 13))
    assert all(reg.verify(f"loop/{v}").version == v for v in numbers)


@pytest.mark.slow
def test_real_scorecard_and_evidence_from_a_check(tmp_path):
    from ergodex.scenarios import convection_loop
    from ergodex.validation import CheckSpec, Evidence, Scorecard, check

    reference = convection_loop(seed=3, n_runs=4, duration=20.0)
    # rho = 14 is below the onset of chaos (Lorenz 1963: steady convection for 1 < rho < 24.74),
    # so this model settles on a fixed point and its statistics cannot match the chaotic data's.
    wrong = lorenz63_surrogate(rho=14.0)
    result = check(wrong, reference, CheckSpec(members=4, seed=1))
    evidence = tmp_path / "evidence.npz"
    result.evidence.to_npz(evidence)
    reg = Registry(tmp_path / "home")
    info = reg.register(
        "loop",
        wrong,
        scorecard=result.scorecard,
        evidence_path=evidence,
        datasets={"check": reference.fingerprint()},
    )
    assert info.verdict == result.scorecard.verdict == "fail"
    assert info.data_fingerprint == reference.fingerprint()
    assert info.model_fingerprint == wrong.fingerprint() == result.scorecard.model_fingerprint
    stored = Scorecard.from_json(reg.artifact(info.ref, "scorecard.json").decode())
    assert stored.to_dict() == result.scorecard.to_dict()
    Evidence.from_npz(reg.artifact_path(info.ref, "evidence.npz"))  # plain arrays, no pickle
    with pytest.raises(
        RegistryError, match="cannot be accepted: its scorecard's verdict is 'fail'"
    ):
        reg.accept(info.ref)
