"""Plot methods of the transition matrices and of the selection front: axes in, artists drawn."""

from __future__ import annotations

import numpy as np
import pytest

from ergodex.surrogate import Surrogate, polynomial_terms
from ergodex.validation import CheckSpec, check

pytest.importorskip("xarray")
matplotlib = pytest.importorskip("matplotlib")


def _ou_model(damping: float = 1.0) -> Surrogate:
    A = np.array([[-damping, 0.5], [-0.5, -0.8]])
    return Surrogate(
        ("u", "v"),
        polynomial_terms(2, 1),
        np.column_stack([np.zeros(2), A]),
        kind="linear-stochastic",
        noise=0.4 * np.eye(2),
        provenance={"dt": 0.1, "model_range": {"u": [-2.0, 2.0], "v": [-2.0, 2.0]}},
    )


@pytest.fixture(scope="module")
def data():
    import ergodex

    return ergodex.simulate(_ou_model(), members=4, steps=3000, seed=5, spinup=10.0)


@pytest.fixture(scope="module")
def regime_result(data):
    from ergodex.regimes import RegimeSet

    regimes = RegimeSet.from_dict(
        {
            "regime": [
                {"name": "east", "kind": "ball", "centre": {"u": 0.4, "v": 0.0}, "radius": 0.3},
                {"name": "west", "kind": "ball", "centre": {"u": -0.4, "v": 0.0}, "radius": 0.3},
            ]
        }
    )
    return check(_ou_model(), data, CheckSpec(members=8, seed=3, regimes=regimes))


def test_plot_transitions_draws_both_matrices_with_their_values(regime_result):
    import matplotlib.pyplot as plt
    from matplotlib.figure import Figure
    from matplotlib.image import AxesImage

    before = plt.get_fignums()
    evidence = regime_result.evidence
    names = [str(n) for n in np.asarray(evidence.regime_names).tolist()]
    axes = Figure().subplots(1, 2)
    assert regime_result.plot_transitions(ax=axes) is axes
    for ax, matrix in zip(axes, (evidence.transitions_reference, evidence.transitions_model)):
        images = [a for a in ax.get_children() if isinstance(a, AxesImage)]
        assert len(images) == 1
        np.testing.assert_array_equal(images[0].get_array(), np.asarray(matrix, dtype=float))
        assert images[0].get_clim() == (0.0, 1.0)  # one shared scale for both panels
        # one printed value per cell, row-major, as the matrix holds it
        cells = [t.get_text() for t in ax.texts]
        expected = ["–" if not np.isfinite(v) else f"{v:.2f}" for v in np.ravel(matrix)]
        assert cells == expected
        assert [t.get_text() for t in ax.get_xticklabels()] == names
    figure = regime_result.plot_transitions()
    assert isinstance(figure, Figure)
    assert len(figure.axes) == 3  # two matrices and the colour bar
    with pytest.raises(Exception, match="needs 2 matplotlib Axes"):
        regime_result.plot_transitions(ax=Figure().subplots())
    assert plt.get_fignums() == before  # nothing went through pyplot


def test_plot_transitions_without_regimes_says_what_to_give(data):
    result = check(_ou_model(), data, CheckSpec(members=8, seed=3))
    with pytest.raises(Exception, match=r"CheckSpec\(regimes="):
        result.plot_transitions()


def test_selection_plot_front_marks_the_chosen_candidate(data):
    from matplotlib.collections import PathCollection
    from matplotlib.figure import Figure

    from ergodex.fitting import select

    fit_part, reference = data.isel(member=[0, 1]), data.isel(member=[2, 3])
    chosen = select(
        fit_part,
        [("linear-inverse", {}), ("linear-inverse", {"tau0": 0.3})],
        CheckSpec(members=8, seed=1),
        reference=reference,
        progress=False,
    )
    ax = Figure().subplots()
    assert chosen.plot_front(ax=ax) is ax
    points = [c for c in ax.collections if isinstance(c, PathCollection)]
    assert points[0].get_label() == "candidate"
    drawn = np.asarray(points[0].get_offsets())
    expected = [(c.n_terms, c.statistical_score) for c in chosen.front]
    np.testing.assert_allclose(drawn, np.array(expected, dtype=float))
    assert chosen.chosen is not None  # both candidates fit this linear process
    ring = np.asarray(points[1].get_offsets())[0]
    picked = chosen.candidates[chosen.chosen]
    np.testing.assert_allclose(ring, [picked.n_terms, picked.statistical_score])
    assert [line.get_ydata()[0] for line in ax.lines] == [chosen.spec["tolerance"]]
    assert isinstance(chosen.plot_front(), Figure)
