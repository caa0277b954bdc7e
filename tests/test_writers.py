"""Tests of the writers: exact round trips, atomic replacement, dataset manifests."""

from __future__ import annotations

import os
import tomllib

import numpy as np
import pytest

from ergodex.exceptions import DataError, SettingsError
from ergodex.readers import read_dataset, read_series
from ergodex.series import Series
from ergodex.writers import write_csv, write_dataset, write_npz


def _series(rng, lengths=(25, 25), labels=("a", "b")):
    runs = [rng.normal(size=(n, 2)) * [1e-7, 3e5] for n in lengths]
    return Series.from_arrays(runs, ["p", "q"], 0.1, run_labels=list(labels))


def test_csv_layout_and_exact_values(tmp_path):
    rng = np.random.default_rng(1)
    s = _series(rng)
    p = write_csv(tmp_path / "x.csv", s)
    lines = p.read_text().splitlines()
    assert lines[0] == "time,run,p,q"
    assert lines[1].startswith("0.0,a,") and lines[4].startswith("0.3,a,")  # decimal times
    assert read_series(p).fingerprint() == s.fingerprint()
    one = s.select_runs([0])
    lines = write_csv(tmp_path / "y.csv", one, time=False).read_text().splitlines()
    assert lines[0] == "p,q"
    assert read_series(tmp_path / "y.csv", dt=0.1).fingerprint() == one.fingerprint()


def test_digits_rounds_values(tmp_path):
    rng = np.random.default_rng(2)
    s = _series(rng)
    back = read_series(write_csv(tmp_path / "r.csv", s, digits=6))
    np.testing.assert_allclose(back.stacked(), s.stacked(), rtol=5e-6)  # 6 significant digits
    with pytest.raises(SettingsError, match="digits"):
        write_csv(tmp_path / "r.csv", s, digits=0)


def test_write_replaces_atomically_and_leaves_no_temporary(tmp_path):
    rng = np.random.default_rng(3)
    s = _series(rng)
    target = write_npz(tmp_path / "d.npz", s)
    before = target.read_bytes()
    bad = Series.from_arrays([rng.normal(size=(5, 2))], ["p", "q"], 0.1, run_labels=["x,y"])
    with pytest.raises(DataError, match="run label 'x,y' cannot be written"):
        write_csv(
            tmp_path / "d.csv",
            Series.from_arrays(
                [bad.runs[0], bad.runs[0] + 1], ["p", "q"], 0.1, run_labels=["x,y", "z"]
            ),
        )
    assert not (tmp_path / "d.csv").exists()
    assert target.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["d.npz"]  # no temporary file left behind
    with pytest.raises(DataError, match="does not exist"):
        write_npz(tmp_path / "missing" / "d.npz", s)


def test_dataset_manifest_is_valid_toml_with_awkward_strings(tmp_path):
    rng = np.random.default_rng(4)
    s = _series(rng, lengths=(10, 11, 12), labels=("run 1", "run/2", "run-3"))
    manifest = write_dataset(
        tmp_path / "ds",
        s,
        name='loop "A" \\ Ω',
        units=["K", "m s-1"],
        holdout=[-1],
        description="line one\nline two\x7f",
        provenance={"seed": 4, "noise": 0.05, "ok": True},
    )
    doc = tomllib.loads(manifest.read_text())
    assert doc["name"] == 'loop "A" \\ Ω' and doc["description"] == "line one\nline two\x7f"
    # unsafe labels become run-<k> file names; the held-out run is recorded by its new label
    assert doc["files"] == ["run-1.csv", "run-2.csv", "run-3.csv"] and doc["holdout"] == ["run-3"]
    d = read_dataset(tmp_path / "ds")
    assert d.series.fingerprint() == s.fingerprint() and d.series.units == ("K", "m s-1")
    fit, check = d.split()
    np.testing.assert_array_equal(check.runs[0], s.runs[2])


@pytest.mark.parametrize("fmt", ["npz", "nc"])
def test_dataset_in_other_formats(tmp_path, fmt):
    if fmt == "nc":
        pytest.importorskip("xarray")
    rng = np.random.default_rng(5)
    s = _series(rng)
    write_dataset(tmp_path / fmt, s, name="x", fmt=fmt, holdout=["b"])
    d = read_dataset(tmp_path / fmt)
    assert d.series.fingerprint() == s.fingerprint() and d.holdout == ("b",)
