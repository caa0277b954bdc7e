"""``ergodex report NAME/V`` of a field model redraws the grid maps from the registry; evidence
written without maps (older files, the plain check) still reads and reports."""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("xarray")
pytest.importorskip("cftime")

from ergodex.cli import main
from ergodex.fields.maps import MAP_KEY_PREFIX
from ergodex.validation import Evidence
from fields_support import write_cf

LAT = np.array([-10.0, -5.0, 0.0, 5.0, 10.0, 15.0])
LON = np.arange(8) * 10.0 + 120.0


def _field(tmp_path, seed, name):
    from ergodex.scenarios import ornstein_uhlenbeck

    series = ornstein_uhlenbeck(seed=seed, n_runs=2, duration=120.0, dt=0.25)
    q, _ = np.linalg.qr(np.random.default_rng(99).standard_normal((LAT.size * LON.size, 2)))
    x = np.stack([r @ q.T for r in series.runs]).reshape(2, -1, LAT.size, LON.size)
    x[:, :, 0, 0] = np.nan  # one land point: 47 valid points remain
    return write_cf(
        tmp_path / name,
        15.0 + x,
        lat=LAT,
        lon=LON,
        times=0.25 * np.arange(x.shape[1]),
        calendar="noleap",
        member="member",
    )


def test_report_from_the_registry_redraws_the_maps_and_old_evidence_still_reads(tmp_path, capsys):
    fit, check = _field(tmp_path, 41, "fit.nc"), _field(tmp_path, 42, "check.nc")
    model, card, home = tmp_path / "m.json", tmp_path / "card.json", tmp_path / "home"
    assert (
        main(
            [
                "fit",
                str(fit),
                "--variable",
                "tas",
                "--modes",
                "2",
                "--climatology",
                "none",
                "--method",
                "linear-inverse",
                "--out",
                str(model),
                "--quiet",
            ]
        )
        == 0
    )
    assert main(
        [
            "validate",
            str(model),
            str(check),
            "--variable",
            "tas",
            "--members",
            "4",
            "--seed",
            "2",
            "--json",
            str(card),
            "--quiet",
        ]
    ) in (0, 1, 3)  # any verdict
    evidence = tmp_path / "card.evidence.npz"
    with np.load(evidence, allow_pickle=False) as z:
        maps = {k: z[k] for k in z.files if k.startswith(MAP_KEY_PREFIX)}
    assert set(maps) == {
        MAP_KEY_PREFIX + k
        for k in ("reference_variance", "reference_lag-1", "surrogate_variance", "surrogate_lag-1")
    }
    assert all(v.shape == (LAT.size * LON.size - 1,) for v in maps.values())
    Evidence.from_npz(evidence)  # the fixed fields read as before

    assert (
        main(
            ["register", str(model), "--name", "sst", "--scorecard", str(card), "--home", str(home)]
        )
        == 0
    )
    out = tmp_path / "again.html"
    assert main(["report", "sst/1", "--home", str(home), "--out", str(out)]) == 0
    page = out.read_text()
    assert "Maps on the grid" in page
    assert "Grid-point variance and lag-one autocorrelation of tas anomalies" in page

    # evidence without the maps (as written before they were stored): a page without maps
    old = tmp_path / "old.npz"
    Evidence.from_npz(evidence).to_npz(old)
    with np.load(old, allow_pickle=False) as z:
        assert not any(k.startswith(MAP_KEY_PREFIX) for k in z.files)
    assert (
        main(
            [
                "register",
                str(model),
                "--name",
                "sst",
                "--scorecard",
                str(card),
                "--evidence",
                str(old),
                "--home",
                str(home),
            ]
        )
        == 0
    )
    assert main(["report", "sst/2", "--home", str(home), "--out", str(out)]) == 0
    assert "Maps on the grid" not in out.read_text()


def test_extra_evidence_arrays_may_not_replace_a_fixed_field(tmp_path):
    from ergodex.exceptions import SettingsError

    rng = np.random.default_rng(43)
    arrays = {name: rng.normal(size=3) for name in ("blowup_times",)}
    fake = Evidence.__new__(Evidence)
    with pytest.raises(SettingsError, match=r"extra array 'blowup_times' would replace"):
        Evidence.to_npz(fake, tmp_path / "e.npz", extra=arrays)
    assert not (tmp_path / "e.npz").exists()
