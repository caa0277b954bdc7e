"""Tests of the readers: good files in every format, and every kind of bad input."""

from __future__ import annotations

import re
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from ergodex.exceptions import DataError
from ergodex.readers import read_csv, read_dataset, read_npz, read_series
from ergodex.series import Series
from ergodex.writers import write_csv, write_dataset, write_netcdf, write_npz

HYPOTHESIS = settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)


@pytest.fixture(params=["python", "compiled"])
def parser(request, monkeypatch):
    """Run a CSV test through both parsers: the Python one and the compiled scanner."""
    from ergodex.readers import csv_reader

    monkeypatch.setattr(
        csv_reader, "_FAST_PARSE_MIN_BYTES", 0 if request.param == "compiled" else 1 << 60
    )
    return request.param


def _write(tmp_path: Path, text: str, name: str = "data.csv") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _sample(rng, lengths=(40, 40, 40), n_var=3, dt=0.02) -> Series:
    runs = [rng.normal(size=(n, n_var)) * 10 ** rng.uniform(-3, 3) for n in lengths]
    return Series.from_arrays(
        runs, [f"v{i}" for i in range(n_var)], dt, run_labels=[f"r{i}" for i in range(len(lengths))]
    )


# --- good CSV -----------------------------------------------------------------------------------
def test_csv_time_and_run_columns(parser, tmp_path):
    text = (
        "time,run,a,b\n"
        "0.0,x,1.0,2.0\n0.1,x,1.5,2.5\n0.2,x,1.25,-3e-2\n"
        "0.0,y,4.0,5.0\n0.1,y,4.5,5.5\n"
    )
    s = read_csv(_write(tmp_path, text))
    assert s.names == ("a", "b") and s.dt == 0.1
    assert s.run_labels == ("x", "y") and s.lengths == (3, 2)
    np.testing.assert_array_equal(s.runs[0], [[1.0, 2.0], [1.5, 2.5], [1.25, -0.03]])
    assert s.source.endswith("data.csv")


def test_csv_without_time_needs_dt_and_numeric_run_column(parser, tmp_path):
    p = _write(tmp_path, "run,a\n1,0.5\n1,0.7\n2,0.1\n2,0.2\n")
    with pytest.raises(DataError, match=r"data\.csv: there is no 'time' column and no dt"):
        read_csv(p)
    s = read_csv(p, dt=0.5)
    assert s.run_labels == ("1", "2") and s.dt == 0.5


def test_csv_crlf_bom_quoted_header(parser, tmp_path):
    p = tmp_path / "w.csv"
    p.write_bytes(b'\xef\xbb\xbf"time","a"\r\n0,1\r\n1,2\r\n2,4\r\n')
    s = read_csv(p)
    assert s.names == ("a",) and s.dt == 1.0 and s.lengths == (3,)
    p.write_bytes(b"time,a\r0,1\r1,2\r2,4\r")  # line ends of old Mac files
    np.testing.assert_array_equal(read_csv(p).runs[0][:, 0], [1, 2, 4])


def test_dt_from_decimal_time_is_exact(tmp_path):
    # 0.1 steps summed in binary drift; the reader rounds dt to 12 significant digits.
    times = [repr(round(i * 0.1, 12)) for i in range(50)]
    text = "time,a\n" + "".join(f"{t},{i % 7}\n" for i, t in enumerate(times))
    assert read_csv(_write(tmp_path, text)).dt == 0.1


# --- bad CSV: each message names file, line, column and value ----------------------------------
BAD_CSV = [
    (
        "time,a,b\n0,1,2\n1,nan,3\n2,1,2\n",
        r"data\.csv: line 3, column 'a': the cell 'nan' is not finite",
    ),
    ("time,a,b\n0,1,2\n1,abc,3\n2,1,2\n", r"data\.csv: line 3, column 'a': 'abc' is not a number"),
    (
        "time,a,b\n0,1,2\n1,1,2\n2,,3\n",
        r"data\.csv: line 4, column 'a': the cell is empty \(a missing value\)",
    ),
    ("time,a,b\n0,1,2\n1,2,3\n1,1,2\n", r"line 4, column 'time': time 1\.0 does not increase"),
    ("time,a,b\n0,1,2\n1,2,3\n2.5,1,2\n3.5,1,2\n", r"line 4, column 'time': step 1\.5 .* differs"),
    ("time,a,b\n0,1,2\n1,2\n2,1,2\n", r"line 3: has 2 cells, the header has 3; missing column 'b'"),
    ("time,a,b\n0,1,2\n1,2,3,9\n2,1,2\n", r"line 3: has 4 cells, .* extra cell '9'"),
    ("time,a,a\n0,1,2\n1,2,3\n", r"line 1: column name 'a' appears twice \(columns 2 and 3\)"),
    ("time,,b\n0,1,2\n1,2,3\n", r"line 1, column 2: the header cell is empty"),
    ("", r"data\.csv: line 1: the file is empty"),
    ("time,a,b\n", r"data\.csv: has a header but no data rows"),
    ("time,a,b\n0,1,2\n\n1,2,3\n", r"line 3: blank line inside the data"),
    (
        "time,run,a\n0,x,1\n1,x,2\n0,y,1\n1,y,3\n0,x,5\n1,x,6\n",
        r"line 6, column 'run': run 'x' appears again",
    ),
    ("time,a,b\n0,1,2\n1,1,3\n2,1,2\n", r"column 'a': every value is 1\.0 \(a constant variable\)"),
    ("time,a,b\n0,1,2\n1,1e999,3\n2,3,2\n", r"line 3, column 'a': the cell '1e999' is not finite"),
    ("time,a/b\n0,1\n1,2\n", r"line 1: column 2 name 'a/b' contains the character '/'"),
    ("time,a\n0,1\n", r"every run has a single row, so the time column gives no dt"),
    (
        "time,run,a\n0,x,1\n1,x,2\n0,y,1\n",
        r"line 4: this run has 1 samples, fewer than min_samples=2",
    ),
]


@pytest.mark.parametrize(("text", "match"), BAD_CSV)
def test_bad_csv_messages(parser, tmp_path, text, match):
    with pytest.raises(DataError, match=match) as info:
        read_series(_write(tmp_path, text))
    assert "\n" not in str(info.value)


def test_bad_bytes_and_missing_file(tmp_path):
    p = tmp_path / "bin.csv"
    p.write_bytes(b"time,a\n0,1\n1,\xff\n")
    with pytest.raises(DataError, match=r"bin\.csv: line 3: byte b'\\xff' is not UTF-8"):
        read_series(p)
    with pytest.raises(DataError, match="file not found"):
        read_series(tmp_path / "nope.csv")


def test_unknown_extension_lists_known(tmp_path):
    with pytest.raises(DataError, match=r"unknown file type '\.xlsx'; known: \.csv, \.nc, \.npz"):
        read_series(tmp_path / "data.xlsx")


def test_split_at_gaps_splits_and_never_interpolates(parser, tmp_path):
    rows = [
        f"{i * 0.5},{v},{w}"
        for i, (v, w) in enumerate(
            [(1, 2), (2, 3), (3, 1), ("nan", 5), (4, 4), (5, 2), (6, 7), (7, ""), (8, 1), (9, 0)]
        )
    ]
    p = _write(tmp_path, "time,a,b\n" + "\n".join(rows) + "\n")
    with pytest.raises(DataError, match="line 5, column 'a'"):
        read_series(p)
    s = read_series(p, split_at_gaps=True)
    assert s.lengths == (3, 3, 2) and s.dt == 0.5
    np.testing.assert_array_equal(s.runs[1][:, 0], [4, 5, 6])
    with pytest.raises(DataError, match=r"line 10 to line 11: this piece between gaps has 2"):
        read_series(p, split_at_gaps=True, min_samples=3)


# --- same data in every format ------------------------------------------------------------------
def test_csv_npz_netcdf_identical_values_and_fingerprint(tmp_path):
    pytest.importorskip("xarray")
    rng = np.random.default_rng(11)
    s = _sample(rng)
    paths = [
        write_csv(tmp_path / "d.csv", s),
        write_npz(tmp_path / "d.npz", s),
        write_netcdf(tmp_path / "d.nc", s),
    ]
    read = [read_series(p) for p in paths]
    for r in read:
        assert r.names == s.names and r.dt == s.dt and r.run_labels == s.run_labels
        for a, b in zip(r.runs, s.runs):
            np.testing.assert_array_equal(a, b)
        assert r.fingerprint() == s.fingerprint()


def test_ragged_runs_csv_and_npz(parser, tmp_path):
    rng = np.random.default_rng(12)
    s = _sample(rng, lengths=(30, 17, 5))
    for p in (write_csv(tmp_path / "r.csv", s), write_npz(tmp_path / "r.npz", s)):
        assert read_series(p).fingerprint() == s.fingerprint()
    with pytest.raises(DataError, match="runs of one length"):
        write_netcdf(tmp_path / "r.nc", s)


# --- NPZ ----------------------------------------------------------------------------------------
def test_npz_bad_inputs(tmp_path):
    p = tmp_path / "a.npz"
    np.savez(p, values=np.ones((5, 2)))
    with pytest.raises(DataError, match=r"a\.npz: no 'names' array"):
        read_npz(p)
    np.savez(p, values=np.arange(10.0).reshape(5, 2), names=np.array(["a", "b"]))
    with pytest.raises(DataError, match="no 'dt' in the archive"):
        read_npz(p)
    assert read_npz(p, dt=0.5).n_samples == 5
    np.savez(p, values=np.arange(5.0), names=np.array(["a"]), dt=1.0)
    with pytest.raises(DataError, match=r"'values' has shape \(5,\)"):
        read_npz(p)
    np.savez(p, values=np.arange(10.0).reshape(5, 2), names=np.array(["a"]), dt=1.0)
    with pytest.raises(DataError, match="'names' has 1 entries but 'values' has 2 columns"):
        read_npz(p)
    np.savez(
        p, values=np.arange(10.0).reshape(5, 2), names=np.array(["a", "b"], dtype=object), dt=1.0
    )
    with pytest.raises(DataError, match="cannot be read as an NPZ archive"):
        read_npz(p)  # object arrays need pickle, which is refused
    np.savez(
        p,
        values=np.arange(10.0).reshape(5, 2),
        names=np.array(["a", "b"]),
        dt=1.0,
        lengths=np.array([2, 2]),
    )
    with pytest.raises(DataError, match="must be positive and add up to the 5 rows"):
        read_npz(p)


# --- dataset folders ----------------------------------------------------------------------------
def test_dataset_round_trip_holdout_and_order(tmp_path):
    rng = np.random.default_rng(13)
    s = _sample(rng, lengths=(20, 21, 22, 23))
    manifest = write_dataset(
        tmp_path / "ds",
        s,
        name="demo",
        holdout=["r3"],
        provenance={"seed": 13, "generator": "test"},
    )
    d = read_dataset(tmp_path / "ds")
    assert d.name == "demo" and d.holdout == ("r3",) and d.provenance["seed"] == 13
    assert d.series.fingerprint() == s.fingerprint()
    fit, check = d.split()
    assert check.run_labels == ("r3",) and fit.n_runs == 3
    assert read_series(manifest).fingerprint() == s.fingerprint()
    # Columns in another order are put back in the manifest's order.
    f = tmp_path / "ds" / "r0.csv"
    lines = f.read_text().splitlines()
    swapped = [",".join([c.split(",")[0], *c.split(",")[1:][::-1]]) for c in lines]
    f.write_text("\n".join(swapped) + "\n")
    np.testing.assert_array_equal(read_series(tmp_path / "ds").runs[0], s.runs[0])


def test_dataset_mixed_dt_and_bad_manifests(tmp_path):
    rng = np.random.default_rng(14)
    s = _sample(rng, lengths=(20, 20))
    folder = tmp_path / "ds"
    write_dataset(folder, s, name="demo")
    write_csv(folder / "r1.csv", Series.from_arrays(s.runs[1], s.names, 0.04))
    with pytest.raises(
        DataError, match=r"r1\.csv: mixed dt: dataset\.toml says dt=0\.02 but the file has dt=0\.04"
    ):
        read_series(folder)
    write_csv(folder / "r1.csv", s.select_runs([1]))
    assert read_series(folder).n_runs == 2
    m = folder / "dataset.toml"
    text = m.read_text()
    m.write_text(text.replace('"r1.csv"', '"../r1.csv"'))
    with pytest.raises(DataError, match="must be a relative path inside the dataset folder"):
        read_series(folder)
    m.write_text(text.replace("holdout = []", 'holdout = ["zz"]'))
    with pytest.raises(DataError, match=r"held-out run\(s\) \['zz'\] not found"):
        read_series(folder)
    m.write_text(text + "colour = 3\n")
    with pytest.raises(DataError, match="unknown key"):
        read_series(folder)
    m.write_text(text.replace("dt = 0.02", 'dt = "fast"'))
    with pytest.raises(DataError, match="'dt' must be a number > 0"):
        read_series(folder)
    m.write_text("name = [")
    with pytest.raises(DataError, match="is not valid TOML"):
        read_series(folder)
    (folder / "dataset.toml").unlink()
    with pytest.raises(DataError, match="folder without a dataset.toml"):
        read_series(folder)


# --- property tests: malformed input gives DataError or a correct read --------------------------
def _read_or_dataerror(path: Path, **kw):
    try:
        return read_series(path, **kw)
    except DataError as exc:
        msg = str(exc)
        assert msg and "\n" not in msg
        return None


@HYPOTHESIS
@given(data=st.binary(max_size=400), ext=st.sampled_from([".csv", ".npz", ".toml", ".nc"]))
def test_random_bytes_never_crash(tmp_path, data, ext):
    p = tmp_path / f"x{ext}"
    p.write_bytes(data)
    _read_or_dataerror(p, dt=None if ext == ".toml" else 0.1)


_CELL = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True, width=64).map(repr),
    st.integers(-(10**30), 10**30).map(str),
    st.sampled_from(["", " ", "abc", "1e999", "-1e-400", "nan", "1,2", '"3"', "1_0", "0x10", "١"]),
    st.text(max_size=4),
)


@HYPOTHESIS
@given(
    # header cells without line breaks, so that the test knows where the header ends
    names=st.lists(
        st.text(st.characters(blacklist_characters="\r\n", codec="utf-8"), max_size=6),
        min_size=1,
        max_size=4,
    ),
    rows=st.lists(st.lists(_CELL, min_size=0, max_size=5), min_size=0, max_size=6),
)
def test_malformed_csv_dataerror_or_correct(parser, tmp_path, names, rows):
    text = ",".join(names) + "\n" + "".join(",".join(r) + "\n" for r in rows)
    p = tmp_path / "m.csv"
    p.write_text(text, encoding="utf-8")
    s = _read_or_dataerror(p, dt=1.0)
    if s is not None:
        # A successful read returns exactly the numbers written (checked against Python's float).
        header = [n.strip().strip('"').strip() for n in names]
        body = text.split("\n", 1)[1].replace("\r", "\n").rstrip("\n").split("\n")
        cols = [header.index(n) for n in s.names]
        expect = np.array([[float(line.split(",")[c]) for c in cols] for line in body])
        np.testing.assert_array_equal(s.stacked(), expect)


@HYPOTHESIS
@given(
    grid=st.lists(
        st.lists(
            st.floats(allow_nan=False, allow_infinity=False, width=64), min_size=3, max_size=3
        ),
        min_size=2,
        max_size=8,
    ),
    name=st.text(min_size=1, max_size=8),
)
def test_numeric_csv_round_trip_is_exact(parser, tmp_path, grid, name):
    # a header cell called time or run is a special column, not this variable
    assume(name.strip().strip('"').strip().lower() not in ("time", "run"))
    values = np.array(grid)
    text = (
        "time,"
        + ",".join([name, "b", "c"])
        + "\n"
        + "".join(f"{i},{','.join(map(repr, row))}\n" for i, row in enumerate(grid))
    )
    p = tmp_path / "n.csv"
    p.write_text(text, encoding="utf-8")
    s = _read_or_dataerror(p)
    if s is not None:
        np.testing.assert_array_equal(s.runs[0], values)
    else:
        # refused only for an unusable name or a constant column
        bad_name = re.search(r'[,"/\\\n\r]', name) or name != name.strip() or not name.strip()
        constant = (values.max(axis=0) == values.min(axis=0)).any()
        assert (
            bad_name
            or constant
            or not name.isprintable()
            or name.lower() in ("time", "run", "b", "c")
        )


@HYPOTHESIS
@given(
    shape=st.lists(st.integers(0, 4), min_size=0, max_size=4),
    n_names=st.integers(0, 4),
    dt=st.one_of(st.floats(), st.integers(-2, 2)),
    names=st.lists(st.text(max_size=5), max_size=4),
    dtype=st.sampled_from(["f8", "i4", "U3", "c16", "?"]),
    extra=st.booleans(),
)
def test_malformed_npz_dataerror_or_correct(tmp_path, shape, n_names, dt, names, dtype, extra):
    rng = np.random.default_rng(0)
    values = (rng.normal(size=shape) * 5).astype(dtype) if dtype != "U3" else np.full(shape, "a")
    arrays = {"values": values, "names": np.array(names[:n_names], dtype=str), "dt": np.array(dt)}
    if extra:
        arrays["lengths"] = np.array(shape[:1] or [1])
    p = tmp_path / "m.npz"
    np.savez(p, **arrays)
    s = _read_or_dataerror(p)
    if s is not None:
        np.testing.assert_array_equal(
            s.stacked(), np.asarray(values, float).reshape(-1, s.n_variables)
        )


@HYPOTHESIS
@given(cut=st.integers(0, 2000))
def test_truncated_npz_and_csv(parser, tmp_path, cut):
    rng = np.random.default_rng(3)
    s = _sample(rng, lengths=(10, 12))
    full_npz = write_npz(tmp_path / "full.npz", s).read_bytes()
    full_csv = write_csv(tmp_path / "full.csv", s).read_bytes()
    (tmp_path / "t.npz").write_bytes(full_npz[: cut % (len(full_npz) + 1)])
    (tmp_path / "t.csv").write_bytes(full_csv[: cut * 3 % (len(full_csv) + 1)])
    _read_or_dataerror(tmp_path / "t.npz")
    r = _read_or_dataerror(tmp_path / "t.csv")
    if r is not None:
        # A cut file that still reads is a shorter file, read exactly as Python's float parses
        # its remaining cells (a cut inside a number leaves a shorter number).
        text = (tmp_path / "t.csv").read_text()
        rows = [line.split(",")[2:] for line in text.rstrip("\n").split("\n")[1:]]
        np.testing.assert_array_equal(r.stacked(), [[float(c) for c in row] for row in rows])
        assert r.n_samples <= s.n_samples


_TOML_VALUE = st.one_of(
    st.integers(-5, 5).map(str),
    st.floats(allow_nan=False).map(repr),
    st.text(max_size=6).map(lambda t: '"' + t.replace("\\", "").replace('"', "") + '"'),
    st.just('["a.csv"]'),
    st.just('["../x.csv"]'),
    st.just('["/etc/passwd"]'),
    st.just("[]"),
    st.just('["v0", "v1"]'),
    st.just('["a/b"]'),
)


@HYPOTHESIS
@given(
    entries=st.dictionaries(
        st.sampled_from(["name", "dt", "variables", "files", "units", "holdout", "colour"]),
        _TOML_VALUE,
        max_size=7,
    )
)
def test_malformed_manifest(tmp_path, entries):
    folder = tmp_path / "ds"
    folder.mkdir(exist_ok=True)
    (folder / "a.csv").write_text("time,v0,v1\n0,1,2\n1,2,3\n2,3,5\n")
    text = "".join(f"{k} = {v}\n" for k, v in entries.items())
    (folder / "dataset.toml").write_text(text, encoding="utf-8")
    s = _read_or_dataerror(folder)
    if s is not None:
        np.testing.assert_array_equal(s.runs[0], [[1, 2], [2, 3], [3, 5]])


def test_zip_that_is_not_npz(tmp_path):
    p = tmp_path / "z.npz"
    with zipfile.ZipFile(p, "w") as z:
        z.writestr("values.npy", b"not an array")
    with pytest.raises(
        DataError, match=r"z\.npz: member .values. of the archive is not a NumPy array"
    ):
        read_series(p)
