"""Persistence rows (residence times, transitions) with regimes, k-means regimes from the command
line, and the residence time of core regimes against the exact mean first-passage time.

The overdamped double well ``dx = (x − x³) dt + s dW`` (potential ``U = x⁴/4 − x²/2``,
``D = s²/2``) has the exact mean first-passage time from ``x₀`` to ``b > x₀`` (reflecting at
−∞) ``T = (1/D) ∫_{x₀}^{b} dy e^{U(y)/D} ∫_{−∞}^{y} dz e^{−U(z)/D}`` (C. W. Gardiner, *Handbook
of Stochastic Methods*, §5.2.7, mean first-passage time in one dimension), computed here by
``scipy.integrate.quad``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.integrate

from ergodex import scenarios, validation
from ergodex.cli import main
from ergodex.cli.checks import regimes_option
from ergodex.exceptions import SettingsError
from ergodex.regimes import KMeansRule, RegimeSet, residence_times
from ergodex.validation import CheckSpec
from ergodex.writers import write_csv

NOISE = 0.7


def _potential(x: float) -> float:
    return x**4 / 4 - x**2 / 2


def _mfpt(x0: float, b: float, noise: float = NOISE) -> float:
    """Gardiner §5.2.7: the exact mean first-passage time from x0 to b (reflecting at −∞)."""
    d = noise**2 / 2
    shift = 0.25  # U's minimum is −1/4: shifting keeps the exponentials in range

    def inner(y: float) -> float:
        return scipy.integrate.quad(lambda z: math.exp(-(_potential(z) + shift) / d), -np.inf, y)[0]

    outer = scipy.integrate.quad(lambda y: math.exp((_potential(y) + shift) / d) * inner(y), x0, b)
    return outer[0] / d


def _cores(a: float, *, hold: bool) -> RegimeSet:
    return RegimeSet.from_dict(
        {
            "hold": hold,
            "regime": [
                {"name": "left", "kind": "threshold", "rules": [{"variable": "x", "below": -a}]},
                {"name": "right", "kind": "threshold", "rules": [{"variable": "x", "above": a}]},
            ],
        }
    )


def test_core_regime_residence_time_is_the_exact_mean_first_passage_time():
    a, dt = 0.5, 0.01
    # Euler–Maruyama with step 0.002 (substeps of dt), 4 runs × 5000 time units: ~1000 visits
    data = scenarios.double_well(seed=7, n_runs=4, duration=5000.0, dt=dt, substeps=5)
    labels = [_cores(a, hold=True).classify(run, data.names) for run in data.runs]
    visits = residence_times(labels, dt, 2)
    # a path sampled every dt is seen to cross a level late: the continuity correction of
    # discretely monitored barriers moves each level out by 0.5826 s √dt (M. Broadie,
    # P. Glasserman and S. Kou, Math. Finance 7, 325–349, 1997; from memory)
    shift = 0.5826 * NOISE * math.sqrt(dt)
    exact = _mfpt(-a, a)
    sampled = _mfpt(-a - shift, a + shift)
    assert sampled / exact - 1 < 0.07  # the correction is small at this sampling
    for durations in visits[:2]:  # left → right and, by symmetry, right → left
        assert durations.size > 500
        # visits are independent (strong Markov property at each entry); 4 standard errors
        se = durations.std(ddof=1) / math.sqrt(durations.size)
        assert abs(durations.mean() - sampled) < 4 * se, (durations.mean(), sampled, exact)
    # without hold, every crossing of a core's edge ends a visit: the flicker at the edge makes
    # residence times far shorter than the passage between the wells
    plain = residence_times(
        [_cores(a, hold=False).classify(r, data.names) for r in data.runs], dt, 2
    )
    assert plain[0].mean() < 0.5 * exact


def test_hold_survives_files_and_fitting_and_plain_sets_keep_their_dictionaries():
    held = _cores(0.5, hold=True)
    assert held.to_dict()["hold"] is True
    assert RegimeSet.from_dict(held.to_dict()).hold
    assert "hold" not in _cores(0.5, hold=False).to_dict()
    # by hand: none before the first visit, then the last regime through none, reset by NaN
    x = np.array([0.0, -1.0, 0.0, 0.2, 0.6, 0.0, np.nan, 0.0, 0.9])[:, None]
    assert held.classify(x, ["x"]).tolist() == [-1, 0, 0, 0, 1, 1, -1, -1, 1]
    with pytest.raises(SettingsError, match="'hold' must be true or false"):
        RegimeSet.from_dict({"hold": "yes", "regime": held.to_dict()["regime"]})
    fitted = RegimeSet([KMeansRule("k", 2)], hold=True).fit(np.array([[-1.0], [1.0]] * 5), ["x"])
    assert fitted.hold and fitted.n_regimes == 2


def _double_well_case(seed: int):
    data = scenarios.double_well(seed=seed, n_runs=4, duration=400.0)
    return scenarios.double_well_surrogate(), data


def test_regimes_add_residence_and_transition_rows_by_default_and_persistence_false_drops_them():
    model, data = _double_well_case(21)
    regimes = _cores(0.5, hold=True)
    spec = CheckSpec(seed=1, members=4, regimes=regimes)
    assert spec.persistence is True  # the documented default
    rows = {(r.statistic, r.variable) for r in validation.validate(model, data, spec).rows}
    assert {("residence", "left"), ("residence", "right"), ("transitions", "all regimes")} <= rows
    assert {("occupancy", "left"), ("histogram", "x")} <= rows
    off = CheckSpec(seed=1, members=4, regimes=regimes, persistence=False)
    stats_off = {r.statistic for r in validation.validate(model, data, off).rows}
    assert stats_off == {"histogram", "autocorrelation", "spectrum", "quantiles", "occupancy"}
    # without regimes the persistence setting changes nothing
    plain = {
        r.statistic for r in validation.validate(model, data, CheckSpec(seed=1, members=4)).rows
    }
    assert "residence" not in plain and "occupancy" not in plain
    with pytest.raises(SettingsError, match="persistence must be true or false"):
        CheckSpec(persistence="no").check_settings()


def test_regimes_option_reads_kmeans_requests_and_refuses_malformed_ones():
    three = regimes_option("kmeans:3")
    assert three.needs_fit and three.regimes[0].clusters == 3 and three.regimes[0].seed == 0
    assert regimes_option("kmeans:4:7").regimes[0].seed == 7
    for bad in ("kmeans:x", "kmeans:", "kmeans:3:1:2", "kmeans:1"):
        with pytest.raises(SettingsError):
            regimes_option(bad)


def test_validate_with_kmeans_regimes_fits_them_on_the_reference(tmp_path, capsys):
    model, data = _double_well_case(22)
    write_csv(tmp_path / "dw.csv", data)
    model.to_json(tmp_path / "dw.json")
    out = tmp_path / "card.json"
    code = main(
        [
            "validate",
            str(tmp_path / "dw.json"),
            str(tmp_path / "dw.csv"),
            "--regimes",
            "kmeans:2",
            "--members",
            "4",
            "--seed",
            "3",
            "--json",
            str(out),
        ]
    )
    assert code in (0, 3), capsys.readouterr()
    card = validation.Scorecard.from_json(out)
    assert {"kmeans0", "kmeans1"} <= {r.variable for r in card.rows}
    assert {"residence", "transitions"} <= {r.statistic for r in card.rows}
    # two clusters of the symmetric double-well density split at 0, with centres at the
    # conditional means ±E[x | x > 0] of p ∝ exp(−2U/s²) (Risken; scipy quadrature); the
    # sample of 4 × 400 time units (~130 hops) leaves a few per cent of sampling error
    used = card.settings["regimes_used"]["regime"]
    centres = sorted(entry["centre"]["x"] for entry in used)

    def density(x):
        return math.exp(-2 * (_potential(x) + 0.25) / NOISE**2)

    half = scipy.integrate.quad(lambda x: x * density(x), 0, np.inf)[0]
    mean_right = half / scipy.integrate.quad(density, 0, np.inf)[0]
    assert centres[0] == pytest.approx(-mean_right, rel=0.1)
    assert centres[1] == pytest.approx(mean_right, rel=0.1)
