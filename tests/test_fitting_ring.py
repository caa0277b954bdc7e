"""The reduced-order case: a ring of 40 weather stations (Lorenz-96, N=40, F=8) on its leading
modes.

A surrogate on k principal components claims to reproduce the statistics of those k modes, not
of the 40 stations: with 10 modes about half of the variance is left out (measured on the sample
data), so station marginals rebuilt from the modes are narrower than the readings whatever the
dynamics. The validator therefore compares a surrogate whose transform changes the variables in
its model space: the held-out runs are mapped through the transform stored in the surrogate
itself (fitted on the training runs only), and mode statistics are compared against the held-out
runs' own noise floor, with the default tolerance and statistics.

The held-out runs are the committed sample's (``datasets/station-ring/dataset.toml``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from ergodex.fitting import make_fitter
from ergodex.model_space import transform_series
from ergodex.pipeline import _demo_recipe
from ergodex.readers import read_dataset
from ergodex.surrogate import Surrogate
from ergodex.validation import DEFAULT_TOLERANCE, CheckSpec, check

pytestmark = pytest.mark.slow

DATASET = Path(__file__).resolve().parents[1] / "datasets" / "station-ring"

#: The reduced model the ring demo uses (one source: ``ergodex.pipeline._demo_recipe``).
RING_RECIPE = _demo_recipe("ring")
RING_LIM = RING_RECIPE["settings"]


@pytest.fixture(scope="module")
def ring():
    if not DATASET.is_dir():
        pytest.skip("the committed station-ring sample is not present")
    return read_dataset(DATASET).split()


def _check_in_model_space(surrogate, held_out, seed):
    """The same check done by hand: held-out runs mapped through the surrogate's transform."""
    reference = transform_series(surrogate.transform, held_out)
    bare = Surrogate(
        surrogate.variables,
        surrogate.terms,
        surrogate.coefficients,
        kind=surrogate.kind,
        noise=surrogate.noise,
        settings=surrogate.settings,
    )
    return check(bare, reference, CheckSpec(seed=seed)).scorecard


def test_leading_modes_of_the_ring_come_in_pairs(ring):
    # A statistically homogeneous ring has a circulant covariance, whose eigenvectors are the
    # Fourier modes: each wavenumber gives a pair of modes of equal variance (Gray, Toeplitz and
    # Circulant Matrices: A Review, 2006, section 3.1). This is why the mode counts tried below
    # are even: an odd count cuts a travelling wave in half. Tolerance: the two variances of a
    # pair are estimated from 4000 correlated samples (about 150 decorrelation times of 0.27),
    # so a relative sampling error of order 2/sqrt(150) ≈ 0.16 is expected.
    fit_data, _ = ring
    X = fit_data.stacked() - fit_data.stacked().mean(axis=0)
    variances = np.linalg.svd(X, compute_uv=False) ** 2 / X.shape[0]
    for j in range(0, 10, 2):
        a, b = variances[j], variances[j + 1]
        assert abs(a - b) / (0.5 * (a + b)) < 0.35


def test_linear_inverse_model_on_ten_modes_passes_on_held_out_runs(ring):
    # Linear inverse model: L = log(C(τ₀) C(0)⁻¹)/τ₀, Q = −(L C(0) + C(0) Lᵀ) (Penland &
    # Sardeshmukh 1995); the surrogate's stationary covariance is C(0) by construction, and its
    # lagged covariances follow exp(Lτ) C(0), matching the data at τ₀ = 0.25 (about one
    # decorrelation time of a station).
    # This holds for the committed sample; regenerated with other seeds the same recipe mostly
    # fails (two training runs misestimate the leading modes' variance), see _demo_recipe.
    fit_data, held_out = ring
    assert RING_RECIPE["method"] == "linear-inverse"
    fitter = make_fitter("linear-inverse", RING_LIM).fit(fit_data)
    surrogate = fitter.surrogate_
    assert surrogate.transform is not None and surrogate.n_variables == 10
    # every eigenvalue of L must decay, or the model cannot be stationary (Penland 1989)
    assert fitter.stable_ and np.all(fitter.L_eigenvalues_.real < 0)
    scorecard = check(surrogate, held_out, CheckSpec(seed=2026)).scorecard
    assert scorecard.settings["compared_in"].startswith("model space")
    assert {row.variable for row in scorecard.rows} == set(surrogate.variables)
    assert scorecard.data_fingerprint == held_out.fingerprint()  # the data given, not the modes
    assert scorecard.blowups["count"] == 0
    assert scorecard.spec.tolerance == DEFAULT_TOLERANCE  # the calibrated default, not loosened
    assert {row.statistic for row in scorecard.rows} >= {
        "histogram",
        "autocorrelation",
        "spectrum",
        "quantiles",
    }
    assert scorecard.passed, scorecard.table()
    # mapping the held-out runs by hand and checking the bare model gives the same rows
    by_hand = _check_in_model_space(surrogate, held_out, seed=2026)
    np.testing.assert_allclose(
        [r.ratio for r in by_hand.rows], [r.ratio for r in scorecard.rows], rtol=1e-12
    )


def test_white_noise_closure_on_six_modes_fails_on_autocorrelation(ring):
    # The same check rejects a wrong reduced model: a quadratic drift from one-step differences
    # with a white-noise closure, on 6 modes, leaves the unresolved modes' memory out and
    # decorrelates at the wrong rate (the failure that motivates memory closures, Kravtsov,
    # Kondrashov & Ghil 2005). Measured here: largest ratio 4.6 (spectrum) and autocorrelation
    # up to 3.4 with the lag window covering the modes' dominant period (about 8 when the window
    # stopped at 3 integrated times, a sixth of the period), so the assertion does not hang on
    # sampling noise.
    fit_data, held_out = ring
    fitter = make_fitter("quadratic-noise", {"n_modes": 6}).fit(fit_data)
    scorecard = check(fitter.surrogate_, held_out, CheckSpec(seed=2026)).scorecard
    assert not scorecard.passed
    worst = max(scorecard.rows, key=lambda row: row.ratio)
    assert worst.ratio > 1.5 * DEFAULT_TOLERANCE
    autocorrelation = max(r.ratio for r in scorecard.rows if r.statistic == "autocorrelation")
    assert autocorrelation > DEFAULT_TOLERANCE


def test_ring_demo_fits_checks_and_accepts_the_reduced_model(tmp_path):
    # The path `ergodex demo --scenario ring` runs: regenerate the sample (same seed as the
    # committed one), fit on the two training runs, check on the two held-out runs, register.
    from ergodex.pipeline import run_demo

    result = run_demo(scenario="ring", home=tmp_path / "models", data_root=tmp_path / "datasets")
    flow = result.flow
    assert flow.surrogate.transform is not None and flow.surrogate.n_variables == 10
    assert flow.check.scorecard.settings["compared_in"].startswith("model space")
    assert flow.passed, flow.check.scorecard.table()
    assert flow.status == "accepted"
    assert result.report_path is not None and result.report_path.is_file()
