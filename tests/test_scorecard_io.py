"""The scorecard as a file and as a table: round trips, null for non-finite numbers, clear
errors for bad files, and the terminal table's content (gaps found by mutation testing)."""

from __future__ import annotations

import json
import math

import pytest

from ergodex import CAUTION
from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.regimes import RegimeSet
from ergodex.validation import CheckSpec, Scorecard, ScoreRow

NAN = float("nan")


def _regimes():
    return RegimeSet.from_dict(
        {
            "regime": [
                {"name": "warm", "kind": "threshold", "rules": [{"variable": "x", "above": 0.5}]}
            ]
        }
    )


def _card(rows=None, **kw):
    rows = (
        rows
        if rows is not None
        else [
            ScoreRow("histogram", "x", 0.25, 0.125, 2.0, 2.75, "pass"),
            ScoreRow("spectrum", "temperature", 5.0, 1.0, 5.0, 3.0, "fail"),
            ScoreRow("quantiles", "x", NAN, 0.5, NAN, 2.75, "fail"),
        ]
    )
    base = dict(
        verdict="fail",
        rows=rows,
        reasons=["spectrum of temperature: too far"],
        blowups={"count": 1, "members": [3], "times": [2.5], "allowed_fraction": 0.0},
        member_agreement={
            "ratio": 1.5,
            "tolerance": 2.75,
            "verdict": "pass",
            "collapsed_members": [],
            "outlying_members": [],
            "per_variable": {"x": 1.5},
        },
        spec=CheckSpec(
            members=4,
            regimes=_regimes(),
            tolerances={"spectrum": 3.0},
            statistics=("histogram", "spectrum", "quantiles", "occupancy"),
            pool=2,
            seed=9,
        ),
        model_fingerprint="sha256:aa",
        data_fingerprint="sha256:bb",
        created="2026-01-01T00:00:00Z",
        ergodex_version="0.1.0",
        settings={"pool": 2, "gap": math.inf},
    )
    base.update(kw)
    return Scorecard(**base)


def test_check_spec_round_trips_with_regimes_and_every_setting():
    spec = _card().spec
    d = json.loads(json.dumps(spec.to_dict()))
    assert d["regimes"] == _regimes().to_dict() and d["pool"] == 2
    assert d["statistics"] == ["histogram", "spectrum", "quantiles", "occupancy"]
    again = CheckSpec.from_dict(d)
    assert isinstance(again.regimes, RegimeSet) and again.regimes.names == ("warm",)
    assert again.statistics == spec.statistics and again.pool == 2
    assert again.to_dict() == spec.to_dict()
    # a null tolerances table reads as no overrides
    assert CheckSpec.from_dict({"tolerances": None}).tolerances == {}
    with pytest.raises(SettingsError, match="check settings must be a table; got list"):
        CheckSpec.from_dict([1])
    with pytest.raises(SettingsError, match="check settings: regimes"):
        CheckSpec.from_dict({"regimes": {"regime": []}})


def test_non_finite_numbers_are_written_as_null_and_read_back():
    row = ScoreRow("spectrum", "x", math.inf, NAN, NAN, 2.75, "fail")
    assert row.to_dict() == {
        "statistic": "spectrum",
        "variable": "x",
        "value": None,
        "noise_floor": None,
        "ratio": None,
        "tolerance": 2.75,
        "verdict": "fail",
    }
    finite = ScoreRow("spectrum", "x", 1.5, 0.5, 3.0, 2.75, "fail").to_dict()
    assert (finite["value"], finite["noise_floor"], finite["ratio"]) == (1.5, 0.5, 3.0)
    back = ScoreRow.from_dict(row.to_dict())
    assert back.ratio == math.inf  # a failing row with no ratio reads back as beyond any tolerance
    assert math.isnan(back.value) and math.isnan(back.noise_floor)


def test_scorecard_json_round_trip_is_strict_json(tmp_path):
    card = _card()
    path = tmp_path / "card.json"
    text = card.to_json(path)
    assert path.read_text(encoding="utf-8") == text
    assert text.endswith("}\n") and text.startswith('{\n  "format"')  # indented by 2
    assert "NaN" not in text and "Infinity" not in text
    d = json.loads(text)
    assert d["settings"]["gap"] is None and d["rows"][2]["ratio"] is None
    for again in (
        Scorecard.from_json(path),
        Scorecard.from_json(str(path)),
        Scorecard.from_json("  " + text),
    ):
        assert again.to_dict() == card.to_dict()
    assert Scorecard.from_json(text).spec.regimes.names == ("warm",)
    # a missing folder is not created: the caller chooses where scorecards go
    with pytest.raises(DataError, match="no-such-folder does not exist; create it first"):
        card.to_json(tmp_path / "no-such-folder" / "card.json")
    assert not (tmp_path / "no-such-folder").exists()


def test_bad_scorecard_files_give_one_clear_line(tmp_path):
    with pytest.raises(
        ModelFileError,
        match=r"^scorecard: not a scorecard of format "
        r"'ergodex-scorecard/2' \(format: 'list'\)",
    ):
        Scorecard.from_dict([])
    with pytest.raises(
        ModelFileError, match=r"^scorecard: not a scorecard .*\(format: 'other/2'\)"
    ):
        Scorecard.from_json('{"format": "other/2"}')
    with pytest.raises(ModelFileError, match=r"^scorecard: not valid JSON at line 1, column 12 "):
        Scorecard.from_json('{"format": ')
    d = _card().to_dict()
    del d["rows"]
    with pytest.raises(ModelFileError, match="^scorecard: missing key 'rows'$"):
        Scorecard.from_dict(d)
    d = _card().to_dict()
    d["rows"] = 5
    with pytest.raises(ModelFileError, match=r"^scorecard: malformed scorecard \("):
        Scorecard.from_dict(d)
    d = _card().to_dict()
    d.pop("settings")
    assert Scorecard.from_dict(d).settings == {}  # settings are optional
    bad = tmp_path / "bad.json"
    bad.write_text('{\n  "format": \n', encoding="utf-8")
    with pytest.raises(ModelFileError, match=rf"^{bad}: not valid JSON at line 3, column 1 "):
        Scorecard.from_json(bad)
    card_path = tmp_path / "card.json"
    d = _card().to_dict()
    d["format"] = "x"
    card_path.write_text(json.dumps(d), encoding="utf-8")
    with pytest.raises(ModelFileError, match=rf"^{card_path}: not a scorecard"):
        Scorecard.from_json(card_path)
    missing = tmp_path / "missing.json"
    with pytest.raises(ModelFileError, match=rf"^{missing}: file not found$"):
        Scorecard.from_json(missing)
    utf = tmp_path / "ünï.json"
    utf.write_text(_card(reasons=["Δ ratio — 2×"]).to_json(), encoding="utf-8")
    assert Scorecard.from_json(utf).reasons == ["Δ ratio — 2×"]


def test_table_shows_rows_blow_ups_agreement_reasons_and_the_caution():
    lines = _card().table().splitlines()
    assert lines[0] == (
        "verdict: FAIL   largest ratio 5 (spectrum temperature); a ratio is the "
        "model's distance from the data over the data's own noise floor"
    )
    assert lines[1] == ""
    assert lines[2] == ("statistic  variable          value  noise floor    ratio    tol  verdict")
    assert lines[3] == ("histogram  x                  0.25        0.125        2   2.75  pass")
    assert lines[4] == ("spectrum   temperature           5            1        5   3.00  fail")
    assert lines[5] == ("quantiles  x                   n/a          0.5      n/a   2.75  fail")
    assert lines[6:] == [
        "",
        "blow-ups: 1 of 4 members",
        "member agreement: ratio 1.5 (tolerance 2.75) pass",
        "",
        "- spectrum of temperature: too far",
        "",
        f"Caution: {CAUTION}",
    ]


def test_table_of_a_card_without_rows_or_agreement():
    card = _card(rows=[], reasons=[], member_agreement={}, blowups={}, verdict="pass")
    lines = card.table().splitlines()
    assert lines[0] == "verdict: PASS"
    assert lines[2] == "statistic  variable       value  noise floor    ratio    tol  verdict"
    assert lines[3:] == ["", "blow-ups: 0 of 4 members", "", f"Caution: {CAUTION}"]
    none_ratio = _card(member_agreement={"ratio": None, "tolerance": 2.0, "verdict": "fail"})
    assert "member agreement: ratio n/a (tolerance 2.00) fail" in none_ratio.table()
    bare = _card(member_agreement={"ratio": 1.0}).table().splitlines()
    assert "member agreement: ratio 1 (tolerance nan) " in bare
    # a NaN row is never the "largest ratio", even when every other ratio is below 1
    rows = [
        ScoreRow("spectrum", "x", NAN, 1.0, NAN, 2.75, "fail"),
        ScoreRow("histogram", "y", 0.5, 1.0, 0.5, 2.75, "pass"),
    ]
    assert "largest ratio 0.5 (histogram y)" in _card(rows=rows).table().splitlines()[0]


def test_large_and_infinite_numbers_in_the_table():
    rows = [
        ScoreRow("spectrum", "x", 12000.0, 1.0, 12000.0, 2.75, "fail"),
        ScoreRow("histogram", "x", 9999.0, 0.0, math.inf, 2.75, "fail"),
    ]
    lines = _card(rows=rows).table().splitlines()
    assert "largest ratio inf (histogram x)" in lines[0]
    assert lines[3].split()[2:5] == ["1.200e+04", "1", "1.200e+04"]
    assert lines[4].split()[2:5] == ["1e+04", "0", "inf"]  # 9999 below 1e4: 3 digits
    assert (
        _card(rows=[ScoreRow("spectrum", "x", 1e4, 1.0, 1e4, 2.75, "fail")])
        .table()
        .splitlines()[3]
        .split()[2]
        == "1.000e+04"
    )  # 1e4 itself is written in e-notation


def _evidence():
    import numpy as np

    from ergodex.validation import EVIDENCE_FIELDS, Evidence

    return Evidence(**{k: np.zeros(2) for k in EVIDENCE_FIELDS})


def test_evidence_files_name_themselves_in_errors(tmp_path):
    import io

    import numpy as np

    from ergodex.validation import Evidence

    with pytest.raises(DataError, match="missing-folder does not exist"):
        _evidence().to_npz(tmp_path / "missing-folder" / "e.npz")
    good = tmp_path / "e.npz"
    _evidence().to_npz(good)
    with open(good, "rb") as handle:  # a named file object: errors and reads use its name
        assert Evidence.from_npz(handle).blowup_times.shape == (2,)
    wrong = tmp_path / "wrong.npz"
    np.savez(wrong, format=np.array("ergodex-evidence/0"), variables=np.zeros(1))
    with open(wrong, "rb") as handle:
        with pytest.raises(
            ModelFileError,
            match=rf"^{wrong}: not an evidence file of format "
            rf"'ergodex-evidence/1'$",
        ):
            Evidence.from_npz(handle)
    with pytest.raises(ModelFileError, match="^evidence: not an evidence file"):
        Evidence.from_npz(io.BytesIO(wrong.read_bytes()))
    partial = tmp_path / "partial.npz"
    np.savez(partial, format=np.array("ergodex-evidence/1"), variables=np.zeros(1))
    with pytest.raises(ModelFileError, match=rf"^{partial}: evidence file lacks \['hist_edges'"):
        Evidence.from_npz(partial)
    with pytest.raises(ModelFileError, match="^evidence: cannot read evidence"):
        Evidence.from_npz(io.BytesIO(b"PK\x03\x04 broken"))
