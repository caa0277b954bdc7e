"""Tests of the Series data model, its validation, fingerprint and splits."""

from __future__ import annotations

import hashlib
import struct

import numpy as np
import pytest

from ergodex.exceptions import DataError
from ergodex.series import Series, cut_blocks, split_blocks, split_runs


def _series(rng, lengths=(50, 30), n_var=3, dt=0.1, **kw):
    runs = [rng.normal(size=(n, n_var)) for n in lengths]
    names = [f"v{i}" for i in range(n_var)]
    return Series.from_arrays(runs, names, dt, **kw)


def test_from_arrays_accepts_2d_3d_and_list():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(2, 20, 3))
    a = Series.from_arrays(x, ["a", "b", "c"], 0.5)
    b = Series.from_arrays([x[0], x[1]], ["a", "b", "c"], 0.5)
    c = Series.from_arrays(x[0], ["a", "b", "c"], 0.5)
    assert a.n_runs == 2 and c.n_runs == 1
    assert a.lengths == (20, 20) and a.n_samples == 40 and a.n_variables == 3
    assert a.fingerprint() == b.fingerprint()
    assert a.duration == (10.0, 10.0)
    np.testing.assert_array_equal(a.stacked(), np.concatenate([x[0], x[1]]))
    assert a.column("b") == 1


def test_runs_are_read_only_copies():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(20, 2))
    s = Series.from_arrays(x, ["a", "b"], 1.0)
    x[0, 0] = 99.0
    assert s.runs[0][0, 0] != 99.0
    assert s.runs[0].dtype == np.float64 and s.runs[0].flags.c_contiguous
    with pytest.raises(ValueError):
        s.runs[0][0, 0] = 1.0


@pytest.mark.parametrize(
    ("names", "match"),
    [
        (["a", "a", "b"], "'a' appears twice"),
        (["a", "", "b"], "empty"),
        (["a", " b", "c"], "white space"),
        (["a", "b/c", "d"], "contains the character '/'"),
        (["a", "b,c", "d"], "contains the character ','"),
        (["a", "time", "d"], "reserved"),
        (["a", "b"], "3 columns but 2 variable names"),
    ],
)
def test_bad_names(names, match):
    rng = np.random.default_rng(3)
    with pytest.raises(DataError, match=match):
        Series.from_arrays(rng.normal(size=(10, 3)), names, 0.1, source="x.csv")


def test_non_finite_value_names_source_run_row_column_value():
    rng = np.random.default_rng(4)
    runs = [rng.normal(size=(10, 2)), rng.normal(size=(10, 2))]
    runs[1][6, 1] = np.inf
    with pytest.raises(DataError, match=r"^data\.npz: run 1, row 7, column 'b': value inf") as info:
        Series.from_arrays(runs, ["a", "b"], 0.1, source="data.npz")
    # the advice in the caller's own terms: a keyword in Python, an option on the command line
    assert str(info.value).endswith("split the run there (read with split_at_gaps=True)")
    assert info.value.for_command_line().endswith("split the run there (use --split-at-gaps)")


@pytest.mark.parametrize("dt", [0.0, -1.0, float("nan"), float("inf"), "x"])
def test_bad_dt(dt):
    rng = np.random.default_rng(5)
    with pytest.raises(DataError, match="dt must be"):
        Series.from_arrays(rng.normal(size=(10, 2)), ["a", "b"], dt)


def test_constant_variable_and_empty_runs_rejected():
    rng = np.random.default_rng(6)
    x = rng.normal(size=(10, 2))
    x[:, 1] = 3.5
    with pytest.raises(DataError, match="column 'b': every value is 3.5"):
        Series.from_arrays(x, ["a", "b"], 0.1)
    with pytest.raises(DataError, match="no runs"):
        Series.from_arrays([], ["a", "b"], 0.1)
    with pytest.raises(DataError, match="run 0: has no samples"):
        Series.from_arrays(np.zeros((0, 2)), ["a", "b"], 0.1)
    with pytest.raises(DataError, match="dimensions"):
        Series.from_arrays(np.zeros(5), ["a"], 0.1)


def test_fingerprint_matches_documented_encoding():
    # Recompute the documented byte encoding independently with hashlib/struct.
    rng = np.random.default_rng(7)
    s = _series(rng, lengths=(5, 4), n_var=2, dt=0.25)
    h = hashlib.sha256(b"ergodex-series-v1\x00")
    h.update(struct.pack("<QQ", 2, 2))
    for name in ("v0", "v1"):
        h.update(struct.pack("<Q", 2) + name.encode())
    h.update(struct.pack("<d", 0.25))
    for run in s.runs:
        h.update(struct.pack("<Q", run.shape[0]))
        h.update(b"".join(struct.pack("<d", v) for v in run.ravel(order="C")))
    assert s.fingerprint() == "sha256:" + h.hexdigest()


def test_fingerprint_sensitive_to_values_dt_names_and_run_boundaries():
    rng = np.random.default_rng(8)
    x = rng.normal(size=(40, 2))
    base = Series.from_arrays(x, ["a", "b"], 0.1)
    y = x.copy()
    y[17, 1] = np.nextafter(y[17, 1], np.inf)
    variants = [
        Series.from_arrays(y, ["a", "b"], 0.1),
        Series.from_arrays(x, ["a", "c"], 0.1),
        Series.from_arrays(x, ["a", "b"], 0.1 + 1e-15),
        Series.from_arrays([x[:20], x[20:]], ["a", "b"], 0.1),
        Series.from_arrays(x[:, ::-1], ["b", "a"], 0.1),
    ]
    prints = {v.fingerprint() for v in variants}
    assert base.fingerprint() not in prints and len(prints) == len(variants)
    # Labels, units and source are not data identity.
    same = Series.from_arrays(x, ["a", "b"], 0.1, units=["m", "s"], run_labels=["r"], source="f")
    assert same.fingerprint() == base.fingerprint()
    # -0.0 and 0.0 are the same number.
    z = x.copy()
    z[0, 0] = 0.0
    w = z.copy()
    w[0, 0] = -0.0
    assert (
        Series.from_arrays(z, ["a", "b"], 0.1).fingerprint()
        == Series.from_arrays(w, ["a", "b"], 0.1).fingerprint()
    )


def test_split_runs_by_count_index_and_label():
    rng = np.random.default_rng(9)
    s = _series(rng, lengths=(20, 21, 22, 23), run_labels=["a", "b", "c", "d"])
    fit, check = split_runs(s, 1)
    assert fit.lengths == (20, 21, 22) and check.lengths == (23,)
    fit, check = split_runs(s, ["b", 3])
    assert fit.run_labels == ("a", "c") and check.run_labels == ("b", "d")
    np.testing.assert_array_equal(check.runs[0], s.runs[1])
    with pytest.raises(DataError, match="keep at least 1"):
        split_runs(s, 4)
    with pytest.raises(DataError, match="no run labelled 'z'"):
        split_runs(s, ["z"])


def test_split_blocks_leaves_gaps_and_keeps_order():
    # Values equal to the sample index make the kept positions visible.
    n = 100
    idx = np.arange(n, dtype=float)
    s = Series.from_arrays(np.column_stack([idx, -idx]), ["i", "j"], 0.5)
    cut = cut_blocks(s, 3, gap=5.0)  # 10 samples between blocks
    assert cut.lengths == (26, 26, 26)
    starts = [int(r[0, 0]) for r in cut.runs]
    assert starts == [0, 36, 72]
    fit, check = split_blocks(s, 3, gap=5.0)
    assert fit.n_runs == 2 and check.n_runs == 1
    assert check.runs[0][0, 0] == 72.0 and check.run_labels == ("0/2",)
    # consecutive blocks are separated by at least the gap
    assert fit.runs[1][0, 0] - fit.runs[0][-1, 0] - 1 >= 10
    with pytest.raises(DataError, match="too short"):
        cut_blocks(s, 3, gap=100.0)
    with pytest.raises(DataError, match="n_blocks >= 2"):
        split_blocks(s, 1, gap=0.0)


def test_select_runs_and_unknown_column():
    rng = np.random.default_rng(10)
    s = _series(rng, lengths=(10, 11, 12))
    t = s.select_runs([2, 0])
    assert t.lengths == (12, 10)
    with pytest.raises(DataError, match="out of range"):
        s.select_runs([5])
    with pytest.raises(DataError, match="no variable named 'q'; the variables are v0, v1, v2"):
        s.column("q")
