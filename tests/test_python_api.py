"""The Python API: check/validate on tables, progress, logs, reprs, HTML displays and plots."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest

from ergodex.surrogate import Surrogate, polynomial_terms
from ergodex.validation import CheckSpec, check, validate

pd = pytest.importorskip("pandas")
xr = pytest.importorskip("xarray")


def _ou_model() -> Surrogate:
    A = np.array([[-1.0, 0.5], [-0.5, -0.8]])
    return Surrogate(
        ("u", "v"),
        polynomial_terms(2, 1),
        np.column_stack([np.zeros(2), A]),
        kind="linear-stochastic",
        noise=0.4 * np.eye(2),
        provenance={"dt": 0.1, "model_range": {"u": [-2.0, 2.0], "v": [-2.0, 2.0]}},
    )


@pytest.fixture(scope="module")
def model_and_data():
    import ergodex

    model = _ou_model()
    ds = ergodex.simulate(model, members=4, steps=3000, seed=11, spinup=10.0)
    return model, ds


@pytest.fixture(scope="module")
def result(model_and_data):
    model, ds = model_and_data
    return check(model, ds, CheckSpec(members=8, seed=2))


def test_check_and_validate_take_tables_with_progress_and_logs(model_and_data, result, caplog):
    model, ds = model_and_data
    frame = ds.to_dataframe().reset_index()[["member", "time", "u", "v"]]
    calls = []
    with caplog.at_level("INFO", logger="ergodex.validation"):
        card = validate(
            model,
            frame,
            CheckSpec(members=8, seed=2),
            progress=lambda done, total: calls.append((done, total)),
        )
    # the same data as a DataFrame, a Dataset or a Series give the same check
    assert card.data_fingerprint == result.scorecard.data_fingerprint
    assert [r.ratio for r in card.rows] == [r.ratio for r in result.scorecard.rows]
    assert calls[-1][0] == calls[-1][1] and len(calls) >= 2
    assert all(b[0] >= a[0] for a, b in zip(calls, calls[1:]))
    assert any(r.getMessage().startswith("check verdict: " + card.verdict) for r in caplog.records)


def test_scorecard_and_result_show_short_reprs_and_html_tables(result):
    card = result.scorecard
    text = repr(card)
    assert len(text) < 200 and f"verdict={card.verdict!r}" in text
    assert repr(result) == f"CheckResult({text})"
    page = card._repr_html_()
    root = ET.fromstring(page)  # well-formed markup
    tables = root.findall(".//table")
    body_rows = [tr for tr in tables[0].findall("tr") if tr.find("td") is not None]
    assert len(body_rows) == len(card.rows)
    assert card.verdict.upper() in page and "not a certification" in page
    assert result._repr_html_() == page


def test_surrogate_and_version_displays(tmp_path, result, model_and_data):
    from ergodex.pipeline import register_checked
    from ergodex.registry import Registry

    model, _ = model_and_data
    page = model._repr_html_()
    ET.fromstring(page)
    assert "d u/dt = -u + 0.5 v" in page and "linear-stochastic" in page
    assert len(repr(model)) < 160
    info = register_checked(Registry(tmp_path / "home"), "ou", model, result, report=False)
    assert repr(info) == (
        f"VersionInfo('ou/1', status={info.status!r}, "
        f"verdict={result.scorecard.verdict!r}, created={info.created!r})"
    )
    html = info._repr_html_()
    ET.fromstring(html)
    assert "ou/1" in html and "model.json" in html


def test_plots_draw_on_given_axes_and_return_figures_without_pyplot(result):
    import matplotlib.pyplot as plt
    from matplotlib.figure import Figure
    from matplotlib.patches import StepPatch

    from ergodex.report import figures

    before = plt.get_fignums()
    figure = result.plot_histograms()
    assert isinstance(figure, Figure)
    assert len([a for a in figure.axes if a.get_visible()]) == 2
    # on the caller's axes: one panel per chosen variable, the reference and surrogate stairs
    own = Figure()
    ax = own.subplots()
    assert result.plot_histograms(variables="v", ax=ax) is ax
    steps = [p for p in ax.patches if isinstance(p, StepPatch)]
    assert len(steps) == 2
    assert ax.get_title(loc="left") == "v"
    axes = Figure().subplots(1, 2)
    assert result.plot_autocorrelation(ax=axes) is axes
    colours = {line.get_color() for line in axes[0].lines}
    assert {figures.REFERENCE_COLOUR, figures.SURROGATE_COLOUR} <= colours
    lags = result.evidence.acf_lags
    np.testing.assert_array_equal(axes[1].lines[0].get_xdata(), lags)
    np.testing.assert_allclose(axes[1].lines[0].get_ydata(), result.evidence.acf_reference[:, 1])
    spectra = result.plot_spectra(variables=["u"], ax=Figure().subplots())
    assert spectra.get_xscale() == "log" and spectra.get_yscale() == "log"
    assert isinstance(result.plot_projection(), Figure)
    with pytest.raises(Exception, match="needs 2 matplotlib Axes"):
        result.plot_histograms(ax=Figure().subplots())
    assert plt.get_fignums() == before  # nothing went through pyplot's figure list


def test_select_takes_a_dataset_and_counts_candidates(model_and_data):
    from ergodex.fitting import select

    _, ds = model_and_data
    fit_part, reference = ds.isel(member=[0, 1]), ds.isel(member=[2, 3])
    calls = []
    chosen = select(
        fit_part,
        [("linear-inverse", {}), ("linear-inverse", {"tau0": 0.2})],
        CheckSpec(members=8, seed=1),
        reference=reference,
        progress=lambda done, total: calls.append((done, total)),
    )
    assert calls == [(1, 2), (2, 2)]
    assert len(chosen.candidates) == 2
    from ergodex.frames import as_series

    assert chosen.data_fingerprint == as_series(fit_part).fingerprint()


def test_retrain_steps_follow_the_progress_convention_and_the_older_named_form():
    from ergodex.retraining import _STEPS, _steps

    counted, named = [], []
    with _steps(lambda done, total: counted.append((done, total))) as step:
        for name in _STEPS:
            step(name)
    assert counted[-1] == (5, 5) and [d for d, _ in counted] == [0, 1, 2, 3, 4, 5]
    with _steps(named.append) as step:  # one argument: the step's name (the older form)
        for name in _STEPS:
            step(name)
    assert named == list(_STEPS)


def test_progress_true_draws_a_text_bar_and_bad_values_are_refused(capsys):
    from ergodex.exceptions import SettingsError
    from ergodex.progress import reporter

    with reporter(True, 4, desc="demo-bar") as update:
        for k in range(1, 5):
            update(k, 4)
    assert "demo-bar" in capsys.readouterr().err  # tqdm writes to stderr
    with pytest.raises(SettingsError, match="progress must be True, False or a callable"):
        with reporter("yes", 4, desc="fit"):
            pass
