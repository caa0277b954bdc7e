"""``ergodex register`` and ``ergodex models …`` through the real command line (exit codes,
--json)."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from ergodex.cli import main
from ergodex.registry import Registry
from ergodex.scenarios import lorenz63_surrogate

VERSION_KEYS = {
    "ref",
    "name",
    "version",
    "status",
    "created",
    "note",
    "parent",
    "datasets",
    "verdict",
    "data_fingerprint",
    "model_fingerprint",
    "scorecard_model_fingerprint",
    "artifacts",
    "folder",
    "integrity",
    "integrity_problems",
}


@pytest.fixture()
def files(tmp_path):
    truth = lorenz63_surrogate()
    model = tmp_path / "model.json"
    truth.to_json(model)
    passing = tmp_path / "pass.json"
    passing.write_text(
        json.dumps(
            {
                "verdict": "pass",
                "data_fingerprint": "sha256:" + "ef" * 32,
                "model_fingerprint": truth.fingerprint(),
            }
        )
    )
    failing = tmp_path / "fail.json"
    failing.write_text(
        json.dumps(
            {
                "verdict": "fail",
                "data_fingerprint": "sha256:" + "ef" * 32,
                "model_fingerprint": truth.fingerprint(),
            }
        )
    )
    return {
        "model": str(model),
        "pass": str(passing),
        "fail": str(failing),
        "home": str(tmp_path / "home"),
        "truth": truth,
    }


def _run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_register_list_show_accept_history(files, capsys):
    home = files["home"]
    code, out, _ = _run(
        capsys,
        "register",
        files["model"],
        "--name",
        "loop",
        "--scorecard",
        files["pass"],
        "--note",
        "first fit",
        "--home",
        home,
        "--json",
    )
    assert code == 0
    info = json.loads(out)
    assert set(info) == VERSION_KEYS
    assert (info["ref"], info["status"], info["verdict"], info["note"]) == (
        "loop/1",
        "candidate",
        "pass",
        "first fit",
    )

    code, out, _ = _run(
        capsys,
        "register",
        files["model"],
        "--name",
        "loop",
        "--scorecard",
        files["fail"],
        "--home",
        home,
    )
    assert code == 0 and "registered loop/2" in out

    code, out, _ = _run(capsys, "models", "list", "--home", home, "--json")
    listing = json.loads(out)
    assert listing["home"] == str(Registry(home).home)
    assert listing["models"] == [
        {
            "name": "loop",
            "versions": 2,
            "latest": 2,
            "accepted": None,
            "statuses": {"candidate": 2, "accepted": 0, "rejected": 0, "retired": 0},
            "integrity_failed": [],
        }
    ]

    code, _, err = _run(capsys, "models", "accept", "loop/2", "--home", home)
    assert code == 2
    assert (
        err.count("\n") == 1
        and "loop/2 cannot be accepted: its scorecard's verdict is 'fail'" in err
    )
    code, _, err = _run(capsys, "models", "accept", "loop/2", "--override", "--home", home)
    assert code == 2 and "needs a non-empty reason" in err
    assert _run(capsys, "models", "accept", "loop/1", "--home", home)[0] == 0
    code, out, _ = _run(capsys, "models", "show", "loop/1", "--home", home)
    assert code == 0 and "loop/1  [accepted]" in out and "not a certification" in out
    code, _, _ = _run(
        capsys,
        "models",
        "accept",
        "loop/2",
        "--override",
        "--reason",
        "regime occupancy failed by a hair; reviewed",
        "--home",
        home,
    )
    assert code == 0

    code, out, _ = _run(capsys, "models", "show", "loop", "--home", home, "--json")
    shown = json.loads(out)
    assert set(shown) == VERSION_KEYS
    assert (shown["version"], shown["status"], shown["integrity"]) == (2, "accepted", "ok")
    code, out, _ = _run(capsys, "models", "show", "loop", "--all", "--home", home, "--json")
    # Exactly one accepted version per name: accepting 2 retired 1.
    assert [(v["version"], v["status"]) for v in json.loads(out)["versions"]] == [
        (1, "retired"),
        (2, "accepted"),
    ]

    assert (
        _run(capsys, "models", "retire", "loop/2", "--reason", "superseded", "--home", home)[0] == 0
    )
    code, out, _ = _run(capsys, "models", "history", "loop", "--home", home, "--json")
    history = json.loads(out)
    assert history["name"] == "loop"
    assert [(e["version"], e["event"], e["override"]) for e in history["events"]] == [
        (1, "registered", False),
        (2, "registered", False),
        (1, "accepted", False),
        (2, "accepted", True),
        (1, "retired", False),
        (2, "retired", False),
    ]
    assert history["events"][4]["reason"] == "replaced by version 2"
    assert history["integrity_failed"] == []
    assert set(history["events"][0]) == {
        "id",
        "time",
        "name",
        "version",
        "event",
        "from_status",
        "to_status",
        "actor",
        "reason",
        "override",
    }
    code, out, _ = _run(capsys, "models", "history", "loop", "--home", home)
    assert "OVERRIDE" in out and "superseded" in out


@pytest.mark.parametrize("name", ["../x", "a/b", "", "a" * 500, "bad\x00name"])
def test_bad_names_exit_2_and_write_nothing(files, capsys, name, tmp_path):
    code, out, err = _run(
        capsys, "register", files["model"], "--name", name, "--home", files["home"]
    )
    assert code == 2
    assert err.startswith("ergodex: error: model name") and err.count("\n") == 1
    assert not (tmp_path / "home").exists()
    code, _, err = _run(capsys, "models", "show", name + "/1", "--home", files["home"])
    # "a/b/1" reads as version "b/1" of model "a"
    assert code == 2 and ("model name" in err or "version after '/'" in err)


@pytest.mark.parametrize(
    "argv",
    [
        ["models", "show", "loop@1"],
        ["models", "accept", "loop@1"],
        ["models", "history", "loop@1"],
        ["report", "loop@1"],
        ["validate", "loop@1", "data.csv"],
        ["simulate", "loop@1", "--members", "2", "--steps", "3"],
        ["retrain", "loop@1", "data.csv"],
        ["register", "MODEL", "--name", "loop", "--parent", "loop@1"],
    ],
)
def test_a_reference_in_the_former_at_form_exits_2_saying_how_to_write_it(files, capsys, argv):
    argv = [files["model"] if a == "MODEL" else a for a in argv]
    _run(capsys, "register", files["model"], "--name", "loop", "--home", files["home"])
    code, out, err = _run(capsys, *argv, "--home", files["home"])
    assert code == 2 and out == ""
    assert err.count("\n") == 1 and "write loop/1, not loop@1" in err
    assert len(Registry(files["home"]).versions("loop")) == 1  # nothing registered


def test_a_reference_is_not_taken_for_the_version_folder_of_the_same_path(
    files, capsys, monkeypatch
):
    """Inside the registry home, loop/1 is also a folder: a folder is never a model file."""
    _run(capsys, "register", files["model"], "--name", "loop", "--home", files["home"])
    monkeypatch.chdir(files["home"])
    argv = ["simulate", "loop/1", "--members", "2", "--steps", "3", "--dt", "0.01"]
    code, out, err = _run(capsys, *argv, "--home", ".")
    assert code == 0, err
    lines = out.splitlines()
    assert lines[0] == "time,run,flow,dT_across,dT_up"  # the registered model's variables
    assert len(lines) == 1 + 2 * 3


def test_unknown_refs_and_missing_reason_are_usage_errors(files, capsys):
    home = files["home"]
    _run(capsys, "register", files["model"], "--name", "loop", "--home", home)
    code, _, err = _run(capsys, "models", "show", "loop/5", "--home", home)
    assert code == 2 and "loop/5 does not exist" in err
    code, _, err = _run(capsys, "models", "show", "loop", "--home", home)
    assert code == 2 and "no accepted version" in err
    with pytest.raises(SystemExit) as info:
        main(["models", "reject", "loop/1", "--home", home])
    assert info.value.code == 2
    assert "--reason" in capsys.readouterr().err


def test_export_import_round_trip_through_cli(files, capsys, tmp_path):
    home = files["home"]
    _run(
        capsys,
        "register",
        files["model"],
        "--name",
        "loop",
        "--scorecard",
        files["pass"],
        "--home",
        home,
    )
    out_dir = tmp_path / "export"
    code, out, _ = _run(capsys, "models", "export", "loop/1", "--to", str(out_dir), "--home", home)
    assert code == 0 and (out_dir / "README.md").exists()
    other = str(tmp_path / "other")
    code, out, _ = _run(capsys, "models", "import", str(out_dir), "--name", "copy", "--home", other)
    assert code == 0 and "copy/1" in out
    assert Registry(other).load("copy/1") == files["truth"]
    # A changed byte in the exported folder: refused, named, nothing registered.
    scorecard = out_dir / "scorecard.json"
    scorecard.write_text(scorecard.read_text().replace("pass", "PASS"))
    code, _, err = _run(capsys, "models", "import", str(out_dir), "--name", "copy", "--home", other)
    assert code == 2 and "scorecard.json: sha256 mismatch" in err
    assert [v.version for v in Registry(other).versions("copy")] == [1]


def test_console_process_exits_2_with_one_line(files, tmp_path):
    proc = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from ergodex.cli import main; sys.exit(main())",
            "register",
            files["model"],
            "--name",
            "../escape",
            "--home",
            files["home"],
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 2
    assert proc.stderr.strip().splitlines() == [
        "ergodex: error: model name '../escape' contains a path separator; "
        "use letters, digits, . _ -"
    ]
    assert not (tmp_path / "home").exists() and not (tmp_path / "escape").exists()
