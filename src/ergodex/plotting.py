"""Figures of a check, for notebooks and scripts: the report's figures on your own axes.

Each function takes a :class:`~ergodex.validation.CheckResult` (or its
:class:`~ergodex.validation.Evidence`), or for :func:`plot_selection_front` a
:class:`~ergodex.fitting.selection.SelectionResult`, and draws with the same drawing function the
HTML report uses (:mod:`ergodex.report.figures`), so the two always agree.

- ``ax=None``: a new :class:`matplotlib.figure.Figure` (built without ``pyplot``, so no global
  figure list grows) laid out like the report's, which is returned; a notebook shows it.
- ``ax=`` one Axes, or a sequence with one Axes per panel: drawn there, and ``ax`` is returned.

Nothing here calls ``pyplot.show``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ergodex.exceptions import DataError, SettingsError

__all__ = [
    "plot_histograms",
    "plot_autocorrelation",
    "plot_spectra",
    "plot_regimes",
    "plot_transitions",
    "plot_projection",
    "plot_selection_front",
]


def _evidence(result: Any) -> Any:
    evidence = getattr(result, "evidence", result)
    if evidence is None:
        raise SettingsError(
            "this CheckResult holds no evidence (check(..., evidence=False)): "
            "rerun check with evidence=True to draw its figures"
        )
    if not hasattr(evidence, "hist_edges"):
        raise SettingsError(
            f"expected a CheckResult or its Evidence, got {type(result).__name__} (a Scorecard "
            "alone holds no curves: keep the CheckResult that check() returns)"
        )
    return evidence


def _pick(evidence: Any, variables: str | Sequence[str] | None) -> tuple[list[str], list[int]]:
    names = [str(n) for n in np.asarray(evidence.variables).tolist()]
    if variables is None:
        return names, list(range(len(names)))
    wanted = [variables] if isinstance(variables, str) else list(variables)
    missing = [v for v in wanted if v not in names]
    if missing:
        raise DataError(
            f"no variable named {missing[0]!r} in the check; the variables are {', '.join(names)}"
        )
    return wanted, [names.index(v) for v in wanted]


def _panels(ax: Any, n: int, what: str, **grid: Any) -> tuple[Any, list]:
    """(figure or None, axes): a new report-style grid, or the caller's axes checked for count."""
    from matplotlib.axes import Axes

    from ergodex.report import figures

    if ax is None:
        return figures._grid_figure(n, **grid)
    axes = [ax] if isinstance(ax, Axes) else list(np.ravel(np.asarray(ax, dtype=object)))
    if len(axes) != n or not all(isinstance(a, Axes) for a in axes):
        raise SettingsError(
            f"ax: {what} needs {n} matplotlib Axes (one per panel), got {len(axes)}; pass that "
            "many, or choose fewer with variables=[...]"
        )
    return None, axes


def _done(figure: Any, axes: list, ax: Any, legend: bool = True) -> Any:
    from ergodex.report import figures

    if figure is None:
        return ax
    if legend:
        figures._legend(figure, axes)
    return figure


def _curves(evidence: Any, prefix: str, index: list[int]) -> tuple:
    """Reference, surrogate and piece curves of the chosen variables, one row per variable."""
    ref = np.asarray(getattr(evidence, f"{prefix}_reference"), dtype=float)[:, index].T
    mod = np.asarray(getattr(evidence, f"{prefix}_model"), dtype=float)[:, index].T
    pieces: np.ndarray | None
    pieces = np.asarray(getattr(evidence, f"{prefix}_reference_pieces"), dtype=float)
    pieces = np.swapaxes(pieces[:, :, index], 1, 2) if pieces.ndim == 3 and len(pieces) else None
    return ref, mod, pieces


def plot_histograms(
    result: Any, *, variables: str | Sequence[str] | None = None, ax: Any = None
) -> Any:
    """Marginal densities of reference and surrogate, with the spread of reference pieces.

    Returns the new Figure (``ax=None``) or ``ax``.
    """
    from ergodex.report import figures

    evidence = _evidence(result)
    names, index = _pick(evidence, variables)
    figure, axes = _panels(ax, len(names), "plot_histograms")
    pieces = np.asarray(evidence.hist_reference_pieces, dtype=float)
    figures.draw_histograms(
        axes,
        names,
        np.asarray(evidence.hist_edges)[index],
        np.asarray(evidence.hist_reference)[index],
        np.asarray(evidence.hist_model)[index],
        pieces[:, index] if pieces.ndim == 3 and len(pieces) else None,
    )
    return _done(figure, axes, ax)


def plot_autocorrelation(
    result: Any, *, variables: str | Sequence[str] | None = None, ax: Any = None
) -> Any:
    """Autocorrelation against lag (time units) of reference and surrogate, per variable."""
    from ergodex.report import figures

    evidence = _evidence(result)
    names, index = _pick(evidence, variables)
    figure, axes = _panels(ax, len(names), "plot_autocorrelation")
    figures.draw_autocorrelation(axes, names, evidence.acf_lags, *_curves(evidence, "acf", index))
    return _done(figure, axes, ax)


def plot_spectra(
    result: Any, *, variables: str | Sequence[str] | None = None, ax: Any = None
) -> Any:
    """Power spectral densities (log-log) of reference and surrogate, per variable."""
    from ergodex.report import figures

    evidence = _evidence(result)
    names, index = _pick(evidence, variables)
    figure, axes = _panels(ax, len(names), "plot_spectra")
    figures.draw_spectra(axes, names, evidence.psd_freq, *_curves(evidence, "psd", index))
    return _done(figure, axes, ax)


def plot_regimes(result: Any, *, ax: Any = None) -> Any:
    """Time spent in each regime, and mean residence times (two panels) when the check had them."""
    from ergodex.report import figures

    evidence = _evidence(result)
    regime_names = [str(n) for n in np.asarray(evidence.regime_names).tolist()]
    if not regime_names:
        raise SettingsError("plot_regimes: the check had no regimes (give CheckSpec(regimes=...))")
    n_panels = (
        2 if figures.has_residence(evidence.residence_reference, evidence.residence_model) else 1
    )
    if ax is not None and not isinstance(ax, (list, tuple, np.ndarray)):
        n_panels = 1  # one Axes given: occupancy only
    width = max(figures._PANEL_WIDTH, 0.75 * len(regime_names) + 1.2)
    figure, axes = _panels(ax, n_panels, "plot_regimes", width=width, height=2.5, columns=2)
    pieces = np.asarray(evidence.occupancy_reference_pieces)
    figures.draw_regimes(
        axes,
        regime_names,
        evidence.occupancy_reference,
        evidence.occupancy_model,
        occupancy_pieces=pieces if pieces.size else None,
        residence_reference=evidence.residence_reference,
        residence_model=evidence.residence_model,
    )
    return _done(figure, axes, ax)


def plot_transitions(result: Any, *, ax: Any = None) -> Any:
    """Regime transition matrices of reference and surrogate (two panels, row: from, to: column).

    With ``ax=None`` the new Figure carries the shared colour bar, as in the report.
    """
    from ergodex.report import figures

    evidence = _evidence(result)
    regime_names = [str(n) for n in np.asarray(evidence.regime_names).tolist()]
    reference = np.asarray(getattr(evidence, "transitions_reference", []), dtype=float)
    if not regime_names or reference.size == 0:
        raise SettingsError(
            "plot_transitions: the check had no regimes (give CheckSpec(regimes=...))"
        )
    if ax is None:
        figure, axes = figures.transition_panels(regime_names)
    else:
        figure, axes = _panels(ax, 2, "plot_transitions")
    image = figures.draw_transitions(
        axes, regime_names, reference, np.asarray(evidence.transitions_model, dtype=float)
    )
    if figure is not None:
        figures.colour_bar(figure, axes[1], image)
    return _done(figure, axes, ax, legend=False)


def plot_projection(result: Any, *, ax: Any = None) -> Any:
    """Sampled states of reference (first panel) and surrogate (second) on the same 2-D axes."""
    from ergodex.report import figures

    evidence = _evidence(result)
    names = [str(n) for n in np.asarray(evidence.variables).tolist()]
    figure, axes = _panels(ax, 2, "plot_projection", width=3.6, height=3.2, columns=2, legend=False)
    figures.draw_projection(axes, names, evidence.sample_reference, evidence.sample_model)
    return _done(figure, axes, ax, legend=False)


def plot_selection_front(selection: Any, *, ax: Any = None) -> Any:
    """Candidates of a sweep: number of terms against statistical score, the chosen one ringed.

    ``selection`` is a :class:`~ergodex.fitting.selection.SelectionResult`; candidates whose fit
    failed have no point. The dotted line is the check's tolerance.
    """
    from ergodex.report import figures

    front = getattr(selection, "front", None)
    if front is None:
        raise SettingsError(
            f"expected a SelectionResult (what select() returns), got {type(selection).__name__}"
        )

    def number(value: Any) -> float:
        return float("nan") if value is None else float(value)

    terms = np.array([number(c.n_terms) for c in front])
    scores = np.array([number(c.statistical_score) for c in front])
    chosen = next((k for k, c in enumerate(front) if c.index == selection.chosen), None)
    tolerance = (selection.spec or {}).get("tolerance")
    figure, axes = _panels(ax, 1, "plot_selection_front", width=4.6, height=2.8)
    figures.draw_selection(
        axes[0],
        terms,
        scores,
        chosen,
        score_label="statistical score (ratio to noise floor)",
        tolerance=None if tolerance is None else float(tolerance),
    )
    return _done(figure, axes, ax)
