"""Fit settings under names of ergodex's own; files of the old versions still read, new files
with an old name refused in one line (model format ergodex-model/2, fit-settings ergodex-fit/2)."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

from ergodex.cli import main
from ergodex.exceptions import ModelFileError, SettingsError
from ergodex.fitting import make_fitter, parse_fit_settings
from ergodex.fitting.selection import parse_selection
from ergodex.fitting.sparse import sparse_settings_table
from ergodex.setting_names import RENAMED_SETTINGS, upgrade_settings
from ergodex.surrogate import FORMAT, OLD_FORMAT, Surrogate, polynomial_terms

OLD_SPARSE = {"method": "sparse", "threshold": 0.2, "optimizer": "stlsq", "n_models": 7}


def _decay_model(settings: dict) -> Surrogate:
    # dx/dt = -x, dy/dt = -2y: any small model serves; only its settings matter here
    return Surrogate(
        ("x", "y"),
        polynomial_terms(2, 1, include_bias=False),
        np.array([[-1.0, 0.0], [0.0, -2.0]]),
        settings=settings,
    )


def _old_file_dict() -> dict:
    """A model dict as ergodex-model/1 wrote it: old format string, old setting names."""
    d = _decay_model(OLD_SPARSE).to_dict()
    d["format"] = OLD_FORMAT
    return d


def test_every_old_name_maps_to_a_current_setting():
    renamed = RENAMED_SETTINGS["sparse"]
    assert set(renamed.values()) <= set(sparse_settings_table)
    assert not set(renamed) & set(sparse_settings_table)  # no old name survives in the table
    assert len(set(renamed.values())) == len(renamed)  # one new name per old one


def test_old_model_file_is_read_in_the_new_names_and_keeps_its_fingerprint(tmp_path):
    d = _old_file_dict()
    path = tmp_path / "old.json"
    path.write_text(json.dumps(d))
    model = Surrogate.from_json(path)
    assert model.settings == {"method": "sparse", "prune_below": 0.2, "regression": "stlsq",
                              "resamples": 7}  # fmt: skip
    # the ergodex-model/1 fingerprint rule: sha256 of the sorted, compact JSON of the file
    # without its provenance (docs/formats.md)
    body = {k: v for k, v in d.items() if k != "provenance"}
    canon = json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)
    assert model.fingerprint() == "sha256:" + hashlib.sha256(canon.encode()).hexdigest()
    # written again it is a current-version file, read back in the same names, and its
    # fingerprint is still the old file's (a scorecard made for the old file still matches)
    again = json.loads(model.to_json())
    assert again["format"] == FORMAT and again["settings"]["prune_below"] == 0.2
    assert Surrogate.from_dict(again).settings == model.settings
    assert Surrogate.from_dict(again).fingerprint() == model.fingerprint()


def test_new_model_file_with_an_old_name_is_refused(tmp_path):
    d = _decay_model(OLD_SPARSE).to_dict()  # format ergodex-model/2, old names inside
    path = tmp_path / "m.json"
    path.write_text(json.dumps(d))
    with pytest.raises(
        ModelFileError,
        match=r"m\.json: field 'settings': key 'threshold' is the old name of 'prune_below'",
    ):
        Surrogate.from_json(path)


def test_cli_refuses_a_new_model_file_with_an_old_name(tmp_path, capsys):
    path = tmp_path / "m.json"
    path.write_text(json.dumps(_decay_model(OLD_SPARSE).to_dict()))
    code = main(["simulate", str(path), "--members", "1", "--steps", "3"])
    err = capsys.readouterr().err
    assert code == 2
    assert "m.json" in err and "'threshold'" in err and "'prune_below'" in err
    assert len(err.strip().splitlines()) == 1


def test_fit_config_with_an_old_name_is_refused_with_the_new_one(tmp_path, capsys):
    data = tmp_path / "d.csv"
    rng = np.random.default_rng(1)
    data.write_text("t,a\n" + "".join(f"{k * 0.1:g},{v:.6f}\n" for k, v in
                                       enumerate(rng.normal(size=50))))  # fmt: skip
    config = tmp_path / "fit.toml"
    config.write_text('method = "sparse"\n[settings]\nthreshold = 0.1\n')
    out = tmp_path / "m.json"
    code = main(["fit", str(data), "--config", str(config), "--out", str(out)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and not out.exists()
    assert "fit.toml" in err[-1] and "'threshold'" in err[-1] and "prune_below" in err[-1]


def test_old_version_fit_settings_are_mapped():
    document = {
        "format": "ergodex-fit/1",
        "method": "sparse",
        "settings": {"threshold": 0.3, "library": "polynomial"},
        "select": {"thresholds": [0.1, 1.0], "candidates": [{"method": "sparse", "alpha": 0.0}]},
    }
    method, settings = parse_fit_settings(document, source="old.toml")
    assert (method, settings) == ("sparse", {"prune_below": 0.3, "terms": "polynomial"})
    candidates = parse_selection(document, method=method, settings=settings, source="old.toml")
    assert candidates == [
        ("sparse", {"prune_below": 0.1, "terms": "polynomial"}),
        ("sparse", {"prune_below": 1.0, "terms": "polynomial"}),
        ("sparse", {"ridge": 0.0}),
    ]


def test_current_fit_settings_refuse_old_names_everywhere():
    with pytest.raises(SettingsError, match=r"x\.toml: \[settings\]: key 'max_iter'.*'iterations'"):
        parse_fit_settings({"settings": {"max_iter": 5}}, source="x.toml")
    with pytest.raises(SettingsError, match=r"\[select\]: key 'thresholds'.*'prune_below'"):
        parse_selection({"select": {"thresholds": [1.0]}}, method="sparse", settings={})
    with pytest.raises(SettingsError, match=r"entry 1: key 'trapping'.*bounded_quadratic"):
        parse_selection(
            {"select": {"candidates": [{"method": "sparse", "trapping": True}]}},
            method="sparse",
            settings={},
        )
    with pytest.raises(SettingsError, match="key 'format' must be 'ergodex-fit/2'"):
        parse_fit_settings({"format": "ergodex-fit/9"}, source="x.toml")
    with pytest.raises(SettingsError, match="key 'alpha' is the old name of 'ridge'"):
        make_fitter("sparse", {"alpha": 0.1})


def test_recorded_settings_without_a_format_are_read_as_the_old_version():
    # a registry's fit-settings.json stored before the renames has no format key
    recorded = {"method": "sparse", "settings": {"fd_order": 2, "ensemble": True}}
    assert parse_fit_settings(recorded, recorded=True) == (
        "sparse",
        {"difference_order": 2, "bootstrap": True},
    )
    with pytest.raises(SettingsError, match="'fd_order' is the old name"):
        parse_fit_settings(recorded)


def test_upgrade_leaves_other_methods_and_new_names_alone():
    assert upgrade_settings("linear-inverse", {"tau0": 1.0}) == {"tau0": 1.0}
    assert upgrade_settings("sparse", {"prune_below": 0.1, "degree": 3}) == {
        "prune_below": 0.1,
        "degree": 3,
    }
    # both names in one old table: the new one was added by hand and wins
    assert upgrade_settings("sparse", {"threshold": 1.0, "prune_below": 0.1}) == {
        "prune_below": 0.1
    }
