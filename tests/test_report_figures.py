"""The report's figure helpers, checked against reference libraries (numpy, scikit-learn, scipy)."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from ergodex import stats
from ergodex.report import figures


@pytest.fixture(scope="module")
def loop_series():
    """Two runs of the convection-loop scenario (real scenario data, not invented values)."""
    from ergodex.scenarios import convection_loop

    return convection_loop(seed=3, n_runs=2, duration=20.0, dt=0.02)


def test_densities_match_numpy_density_histogram():
    rng = np.random.default_rng(11)
    x = rng.gamma(2.0, 1.5, size=5000)
    edges = stats.histogram_edges(x, 30)
    density, below, above = figures._densities(stats.histogram(x, edges), edges)
    # numpy.histogram(density=True) is the reference implementation of a normalised histogram;
    # every value lies inside the reference's own edges, so no mass is outside (exact).
    expected, _ = np.histogram(x, bins=edges, density=True)
    np.testing.assert_allclose(density, expected, rtol=1e-12)
    assert below == 0.0 and above == 0.0


def test_densities_keep_outside_mass_out_of_the_area():
    rng = np.random.default_rng(12)
    x = rng.normal(size=4000)
    edges = np.linspace(-1.0, 1.0, 21)
    density, below, above = figures._densities(stats.histogram(x, edges), edges)
    # Standard normal tail mass beyond one standard deviation, analytic: erfc(1/sqrt 2)/2 ~ 0.159.
    # Tolerance: 4 binomial standard errors of a fraction near 0.16 from 4000 samples
    # (sqrt(0.16*0.84/4000) ~ 0.0058).
    tail = 0.5 * math.erfc(1.0 / math.sqrt(2.0))
    assert below == pytest.approx(tail, abs=0.024)
    assert above == pytest.approx(tail, abs=0.024)
    assert np.sum(density * np.diff(edges)) + below + above == pytest.approx(1.0, abs=1e-12)


def test_projection_basis_matches_scikit_learn_pca(loop_series):
    from sklearn.decomposition import PCA
    from sklearn.preprocessing import StandardScaler

    states = loop_series.stacked()
    centre, scale, directions, explained = figures.projection_basis(states)
    # scikit-learn's PCA on standardised states is the reference (population std, as here).
    standard = StandardScaler().fit_transform(states)
    pca = PCA(n_components=2).fit(standard)
    np.testing.assert_allclose(explained, pca.explained_variance_ratio_, rtol=1e-8)
    # Directions agree up to sign (SVD leaves the sign free; ours is fixed by convention).
    for k in range(2):
        assert abs(np.dot(directions[:, k], pca.components_[k])) == pytest.approx(1.0, abs=1e-8)


def _svg_root(svg: str) -> ET.Element:
    return ET.fromstring(svg.encode("utf-8"))


def test_figures_are_valid_svg_with_the_same_colours_for_reference_and_surrogate(loop_series):
    series = loop_series
    runs = list(series.runs)
    names = list(series.names)
    edges = np.array([stats.histogram_edges(np.vstack(runs)[:, j], 30) for j in range(3)])
    hist = [np.array([stats.histogram(r[:, j], edges[j]) for j in range(3)]) for r in runs]
    lag = 100
    acf = [stats.autocorrelation(r, lag).T for r in runs]
    spectra = [stats.power_spectrum(r, series.dt) for r in runs]
    svgs = [
        figures.histogram_figure(names, edges, hist[0], hist[1], np.array(hist)),
        figures.autocorrelation_figure(
            names, np.arange(lag + 1) * series.dt, acf[0], acf[1], np.array(acf)
        ),
        figures.spectrum_figure(
            names,
            spectra[0][0],
            spectra[0][1].T,
            spectra[1][1].T,
            np.array([s[1].T for s in spectra]),
        ),
    ]
    for svg in svgs:
        root = _svg_root(svg)  # raises on malformed XML
        assert root.tag.endswith("svg")
        lowered = svg.lower()
        assert figures.REFERENCE_COLOUR.lower() in lowered
        assert figures.SURROGATE_COLOUR.lower() in lowered
    # The point clouds are rasterised inside the SVG; their panel titles carry the colours.
    projection = figures.projection_figure(names, runs[0], runs[1])
    assert _svg_root(projection).find("{http://www.w3.org/2000/svg}g") is not None
    assert "<image" in projection
    assert figures.REFERENCE_COLOUR.lower() in projection.lower()
    assert figures.SURROGATE_DARK.lower() in projection.lower()


def test_histogram_of_a_collapsed_surrogate_clips_the_axis_and_labels_the_peak(loop_series):
    series = loop_series
    x = series.stacked()
    edges = np.array([stats.histogram_edges(x[:, j], 30) for j in range(3)])
    reference = np.array([stats.histogram(x[:, j], edges[j]) for j in range(3)])
    # Lorenz-63 at rho=22 settles on the fixed points C+ and C- (Lorenz 1963: they are stable for
    # rho below about 24.74), so a surrogate with that rho puts all its mass at two points.
    from ergodex.scenarios import lorenz63_fixed_points

    points = np.repeat(lorenz63_fixed_points(rho=22.0), 500, axis=0)
    model = np.array([stats.histogram(points[:, j], edges[j]) for j in range(3)])
    svg = figures.histogram_figure(list(series.names), edges, reference, model)
    # matplotlib writes each text's content as a comment beside its glyph paths.
    assert "surrogate peak" in svg
    plain = figures.histogram_figure(list(series.names), edges, reference, reference)
    assert "surrogate peak" not in plain
