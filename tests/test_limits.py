"""Resource limits: file kinds and sizes, JSON/TOML nesting, memory estimates and refusals."""

from __future__ import annotations

import errno
import json
import os

import numpy as np
import pytest

from ergodex.exceptions import DataError, ModelFileError, ModelLimitError, SettingsError
from ergodex.files import atomic_write_text, check_writable
from ergodex.integrate import ensemble_memory, integrate_ensemble
from ergodex.limits import (
    MAX_NESTING,
    check_memory,
    check_regular_file,
    load_json_text,
    load_toml_file,
    memory_limit,
    nesting_depth,
    parse_size,
)
from ergodex.scenarios import ou_surrogate


def test_sizes_use_binary_units():
    # K/M/G as powers of 1024, as `ls -h` and `free -h` print them (common practice, no source)
    assert parse_size("512M") == 512 * 1024**2
    assert parse_size("2G") == 2 * 1024**3
    assert parse_size("1.5GiB") == int(1.5 * 1024**3)
    assert parse_size("100") == 100
    for bad in ("lots", "-5G", "0", "1e400", "", "1Q", True):
        with pytest.raises(SettingsError):
            parse_size(bad, "--max-memory")


def test_memory_limit_reads_option_then_environment(monkeypatch):
    monkeypatch.setenv("ERGODEX_MAX_MEMORY", "3G")
    assert memory_limit() == 3 * 1024**3
    assert memory_limit("1G") == 1024**3
    monkeypatch.delenv("ERGODEX_MAX_MEMORY")
    assert memory_limit() >= 1 << 28  # half the available memory, at least 256 MiB


def test_memory_refusal_names_estimate_limit_and_remedies():
    with pytest.raises(
        SettingsError,
        match=r"needs about 2 GiB.*limit of 1 GiB.*fewer members"
        r".*--max-memory.*ERGODEX_MAX_MEMORY",
    ):
        check_memory(2 * 1024**3, "a run", "use fewer members", "1G")
    check_memory(1024**3, "a run", "use fewer members", "1G")  # at the limit: allowed


def test_ensemble_memory_counts_each_copy_of_the_outputs():
    # 1000 members x 500 outputs x 3 variables of float64 = 12 MB per copy
    one = ensemble_memory(1000, 500, 3, 3)
    assert 12_000_000 <= one <= 12_000_000 + 10 * 2**20
    three = ensemble_memory(1000, 500, 3, 3, copies=3)
    assert three - one == 2 * 12_000_000


def test_special_files_and_oversize_files_are_refused(tmp_path, monkeypatch):
    link = tmp_path / "data.csv"
    os.symlink("/dev/zero", link)
    with pytest.raises(DataError, match="not a regular file"):
        check_regular_file(link, "a CSV file")
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    with pytest.raises(DataError, match="not a regular file"):
        check_regular_file(fifo, "a CSV file")
    with pytest.raises(DataError, match="is a folder"):
        check_regular_file(tmp_path, "a CSV file")
    big = tmp_path / "big.csv"
    big.write_bytes(b"x" * 2048)
    monkeypatch.setenv("ERGODEX_MAX_FILE_SIZE", "1K")
    with pytest.raises(DataError, match="over the limit of 1 KiB.*ERGODEX_MAX_FILE_SIZE"):
        check_regular_file(big, "a CSV file")


def test_nesting_is_bounded_without_recursion():
    deep = json.loads("[" * 500 + "]" * 500)
    assert nesting_depth(deep) == 500
    assert nesting_depth({"a": [1, {"b": []}]}) == 4  # object, list, object, list
    assert nesting_depth(7) == 0
    ok = "[" * MAX_NESTING + "]" * MAX_NESTING
    assert nesting_depth(load_json_text(ok, "x")) == MAX_NESTING
    for text in ("[" * (MAX_NESTING + 1) + "]" * (MAX_NESTING + 1), "[" * 100_000 + "]" * 100_000):
        with pytest.raises(ModelFileError, match="nested too deeply"):
            load_json_text(text, "m.json", error=ModelFileError)


def test_json_refuses_nan_infinity_and_giant_integers():
    for text, needle in (
        ("[NaN]", "NaN"),
        ("[-Infinity]", "Infinity"),
        ("[" + "1" * 5001 + "]", "4300 digits"),
        ("[1,", "line 1"),
    ):
        with pytest.raises(DataError, match=needle):
            load_json_text(text, "x.json")


def test_toml_refuses_non_utf8_and_deep_nesting(tmp_path):
    latin = tmp_path / "r.toml"
    latin.write_bytes('name = "caf\xe9"\n'.encode("latin-1"))
    with pytest.raises(DataError, match=r"r\.toml: line 1.*not UTF-8"):
        load_toml_file(latin, "a regime file")
    deep = tmp_path / "d.toml"
    deep.write_text("a = " + "[" * 100_000 + "]" * 100_000 + "\n")
    with pytest.raises(DataError, match="nested too deeply"):
        load_toml_file(deep, "a regime file")


def test_full_disk_leaves_the_old_file_and_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "card.json"
    target.write_text("old")

    def full(*_args):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(os, "replace", full)
    with pytest.raises(DataError, match="No space left on device"):
        atomic_write_text(target, "new")
    assert target.read_text() == "old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["card.json"]


def test_outputs_are_probed_before_the_work(tmp_path):
    with pytest.raises(DataError, match="--out /proc/x.json: cannot write"):
        check_writable("/proc/x.json", "--out")
    with pytest.raises(DataError, match="device, pipe or socket"):
        check_writable("/dev/null", "--out")
    assert check_writable(tmp_path / "new" / "deeper" / "out.csv", "--out")
    assert list(tmp_path.iterdir()) == []  # the probe leaves nothing, creates no folder


# -- integration limits --------------------------------------------------------------------------


def _linear(rate: float):
    return ou_surrogate().with_noise(None).with_coefficients(rate * np.eye(2))


def test_substep_floor_fails_a_too_stiff_model():
    # dx/dt = -1e9 x: RK4 needs h <= 0.25 * 2.785 / 1e9 (stability boundary 2.785 on the negative
    # real axis: Hairer & Wanner, Solving ODEs II, sec. IV.2, from memory), below 0.1 / 1e6
    with pytest.raises(ModelLimitError, match=r"too stiff: needs substep 6\.96e-10 < floor 1e-07"):
        integrate_ensemble(_linear(-1e9), np.ones((2, 2)), dt_out=0.1, n_out=3)
    with pytest.raises(SettingsError, match="below the floor"):
        integrate_ensemble(_linear(-1.0), np.ones((2, 2)), dt_out=0.1, n_out=3, substep=1e-9)


def test_time_limit_stops_the_run():
    with pytest.raises(ModelLimitError, match="time limit of 0.2 s reached during the spin-up"):
        integrate_ensemble(
            _linear(-1e4), np.ones((64, 2)), dt_out=0.1, n_out=3, spinup=1e5, time_limit=0.2
        )


def test_run_stops_once_every_member_blew_up_in_the_spinup():
    # dx/dt = 1000 x leaves the bound [-10, 10] from x = 1 at t = ln(10) / 1000 ~ 2.3e-3 (analytic);
    # the spin-up of 1e9 time units would otherwise be ~1.4e12 substeps
    run = integrate_ensemble(
        _linear(1e3),
        np.ones((3, 2)),
        dt_out=0.1,
        n_out=5,
        spinup=1e9,
        bound=[[-10.0, 10.0], [-10.0, 10.0]],
    )
    assert run.status == "all-blowup"
    elapsed = run.blowup_time + run.spinup  # time since the start of the spin-up
    assert np.all((elapsed > 0.0023) & (elapsed < 0.0023 + 2 * run.substep))
    assert np.all(np.isnan(run.states))


def test_memory_is_refused_before_allocating():
    # 2 members x 1e9 outputs x 2 variables x 8 bytes = 32 GB per copy: far over 1 GiB
    with pytest.raises(SettingsError, match="2 members x 1000000000 outputs x 2 variables"):
        integrate_ensemble(_linear(-1.0), np.ones((2, 2)), dt_out=0.1, n_out=10**9, max_memory="1G")


def test_chunking_does_not_change_a_deterministic_run(monkeypatch):
    from ergodex import integrate

    rng = np.random.default_rng(3)
    x0 = rng.normal(size=(5, 2))
    surrogate = _linear(-1.0).with_coefficients([[-1.0, 0.5], [-0.5, -0.5]])
    whole = integrate_ensemble(surrogate, x0, dt_out=0.1, n_out=40, spinup=1.0)
    monkeypatch.setattr(integrate, "_WORK_PER_CALL", 7)
    pieces = integrate_ensemble(surrogate, x0, dt_out=0.1, n_out=40, spinup=1.0)
    np.testing.assert_array_equal(whole.states, pieces.states)
