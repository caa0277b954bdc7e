"""The command line as a whole: every command is wired in, usage errors exit 2 on one line."""

from __future__ import annotations

import subprocess
import sys

import pytest

from ergodex.cli import COMMAND_HELP, COMMAND_MODULES, build_parser, main


def test_every_command_module_is_wired_in():
    parser = build_parser(load_all=True)
    subparsers = next(a for a in parser._actions if a.dest == "command")
    # Each module contributes its command under its own name (the README's command list).
    assert set(COMMAND_MODULES) <= set(subparsers.choices)
    assert all(subparsers.choices[name] is not None for name in COMMAND_MODULES)


def test_command_list_without_imports_matches_the_modules():
    # ``--help`` lists the commands from COMMAND_HELP without importing their modules: the
    # listing must be the one the modules themselves would give, in the same order.
    lazy = build_parser().format_help()
    full = build_parser(load_all=True).format_help()
    assert lazy == full
    assert list(COMMAND_HELP) == list(COMMAND_MODULES)


def test_choosing_a_command_loads_only_that_command():
    parser = build_parser()
    subparsers = next(a for a in parser._actions if a.dest == "command")
    args = parser.parse_args(["models", "list"])
    assert args.command == "models" and callable(args.func)
    assert subparsers.choices["models"] is not None
    assert subparsers.choices["fit"] is None  # still pending: its module was not needed


def test_no_command_prints_help_and_exits_2(capsys):
    assert main([]) == 2
    assert "usage" in capsys.readouterr().err


def test_unknown_command_is_a_usage_error_with_exit_2():
    with pytest.raises(SystemExit) as info:
        main(["no-such-command"])
    assert info.value.code == 2


def test_console_script_error_is_one_line_without_traceback(tmp_path):
    bad = tmp_path / "broken.csv"
    bad.write_text("time,flow,dT_across,dT_up\n0.0,1,2,3\n0.01,1,nan,3\n0.02,1,2,4\n")
    proc = subprocess.run(
        [
            sys.executable,
            "-c",
            "import sys; from ergodex.cli import main; sys.exit(main())",
            "fit",
            str(bad),
            "--out",
            str(tmp_path / "model.json"),
        ],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert "Traceback" not in proc.stderr
    assert "broken.csv" in lines[0] and "dT_across" in lines[0]
    assert not (tmp_path / "model.json").exists()


BAD_CSV = {
    # name: (file text, the line and column the one-line message must name)
    "nan": ("0.01,1.1,nan,3.1", "line 3", "dT_across"),
    "text": ("0.01,1.1,2.1,warm", "line 3", "dT_up"),
    "missing-column": ("0.01,1.1,2.1", "line 3", "dT_up"),
}


@pytest.mark.parametrize("case", [*BAD_CSV, "time-not-increasing"])
@pytest.mark.parametrize("command", ["validate", "retrain"])
def test_bad_csv_exits_2_naming_file_line_and_column_and_writes_nothing(
    tmp_path, capsys, case, command
):
    from ergodex.scenarios import lorenz63_surrogate

    rows = ["time,flow,dT_across,dT_up", "0.00,1.0,2.0,3.0"]
    if case == "time-not-increasing":
        rows += ["0.02,1.1,2.1,3.1", "0.01,1.2,2.2,3.2"]
        where, column = "line 4", "time"
    else:
        text, where, column = BAD_CSV[case]
        rows += [text, "0.02,1.2,2.2,3.2"]
    bad = tmp_path / "sensors.csv"
    bad.write_text("\n".join(rows) + "\n")
    model = tmp_path / "model.json"
    lorenz63_surrogate().to_json(model)
    home = tmp_path / "home"
    out = tmp_path / "out.json"
    if command == "validate":
        argv = ["validate", str(model), str(bad), "--json", str(out)]
    else:
        argv = ["retrain", "loop", str(bad), "--home", str(home), "--json", str(out)]

    assert main(argv) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1
    assert "sensors.csv" in err[0] and where in err[0] and column in err[0]
    assert not out.exists()
    # Nothing written to the registry: no index, no version folder.
    assert not (home / "registry.sqlite3").exists()
    assert not (home / "loop").exists()
