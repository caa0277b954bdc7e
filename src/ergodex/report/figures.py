"""Figures of the validation report: arrays in, panels drawn, one SVG document (text) out.

Each figure has one drawing function, ``draw_*(axes, ...)``, that takes plain numpy arrays (no
Evidence object, no files) and draws on the matplotlib axes it is given; the ``*_figure``
functions lay out a grid of panels, call it and return the SVG of the figure. The report uses the
SVG functions; :mod:`ergodex.plotting` (``CheckResult.plot_histograms(ax=...)`` and friends)
calls the same drawing functions on a user's axes, so a notebook and the report show the same
picture. Report figures are drawn on a
:class:`matplotlib.figure.Figure` built directly rather than through ``pyplot``: ``pyplot`` keeps a
global list of open figures and a global backend, which would leak into (and be disturbed by) any
other code running in the same process, e.g. a notebook or the HTTP service. Saving to ``svg``
selects matplotlib's SVG writer for this one call; dense point clouds are rasterised inside the SVG
by the Agg renderer so that the file stays small.

Colours come from the Okabe–Ito palette, chosen to stay distinguishable under the common forms of
colour-vision deficiency; reference and surrogate keep the same colour (and line style, so that a
grey print still separates them) in every figure.

References
----------
.. [1] Okabe, M. and Ito, K. (2008). Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people. https://jfly.uni-koeln.de/color/
.. [2] Nuñez, J. R., Anderton, C. R. and Renslow, R. S. (2018). Optimizing colormaps with
   consideration for color vision deficiency to enable accurate interpretation of scientific data.
   PLoS ONE 13(7): e0199239 (the "cividis" colour map used for transition matrices).
"""

from __future__ import annotations

import io
import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import LogLocator, MaxNLocator, NullLocator

# Okabe–Ito colours [1]. Reference = blue, surrogate = orange: the pair most widely separated for
# both red-green deficiencies; the band of reference pieces is a light tint of the reference blue.
REFERENCE_COLOUR = "#0072B2"
REFERENCE_BAND = "#9CC7E4"
SURROGATE_COLOUR = "#E69F00"
SURROGATE_DARK = "#B07800"  # orange darkened for thin lines on white
GRID_COLOUR = "#E3E3E3"
TEXT_COLOUR = "#222222"
MUTED_COLOUR = "#666666"

REFERENCE_LABEL = "reference data"
BAND_LABEL = "spread of reference pieces"
SURROGATE_LABEL = "surrogate"

_FONT = 8.5  # points; figures are shown near their natural size on a laptop screen
_PANEL_WIDTH = 3.3  # inches per panel
_PANEL_HEIGHT = 2.35
_MAX_COLUMNS = 3

# When a surrogate's histogram peak exceeds the reference's by more than this factor the y axis is
# clipped (and the clipped peak labelled), so that a collapse to spikes does not flatten the
# reference curve into the axis — the reader must still see both shapes.
_CLIP_FACTOR = 3.0


def figure_to_svg(figure: Figure) -> str:
    """Serialise a figure to an SVG document (text), with no date stamp so output is repeatable."""
    buffer = io.StringIO()
    figure.savefig(buffer, format="svg", metadata={"Date": None}, facecolor="white")
    return buffer.getvalue()


def _grid_figure(
    n_panels: int,
    *,
    width: float = _PANEL_WIDTH,
    height: float = _PANEL_HEIGHT,
    columns: int | None = None,
    legend: bool = True,
    left: float = 0.62,
    bottom: float = 0.5,
    right: float = 0.15,
) -> tuple[Figure, list]:
    """A grid of panels with margins fixed in inches.

    Fixed margins instead of matplotlib's constrained layout: the layout engine measures every
    tick label several times and was most of the time spent drawing a report; the panels here
    have predictable labels, so fixed room for them is enough.
    """
    n_columns = min(n_panels, columns or _MAX_COLUMNS)
    n_rows = math.ceil(n_panels / n_columns)
    top_room = 0.34 if legend else 0.05  # inches above the first row, for the shared legend
    gap_x, gap_y, title = left, bottom + 0.12, 0.26
    fig_width = width * n_columns
    fig_height = height * n_rows + top_room
    figure = Figure(figsize=(fig_width, fig_height))
    panel_w = (fig_width - left - right - gap_x * (n_columns - 1)) / n_columns
    panel_h = (fig_height - top_room - bottom - title - (gap_y + title) * (n_rows - 1)) / n_rows
    figure.subplots_adjust(
        left=left / fig_width,
        right=1 - right / fig_width,
        bottom=bottom / fig_height,
        top=1 - (top_room + title) / fig_height,
        wspace=gap_x / panel_w,
        hspace=(gap_y + title) / panel_h,
    )
    axes = figure.subplots(n_rows, n_columns, squeeze=False).ravel().tolist()
    for extra in axes[n_panels:]:
        extra.set_visible(False)
    for ax in axes[:n_panels]:
        _style_axes(ax)
    return figure, axes[:n_panels]


def _style_axes(ax) -> None:
    ax.tick_params(labelsize=_FONT - 0.5, colors=TEXT_COLOUR, length=3)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(MUTED_COLOUR)
    ax.grid(True, color=GRID_COLOUR, linewidth=0.6)
    ax.set_axisbelow(True)
    # Five or so ticks per axis read well on small panels, and fewer ticks draw faster.
    ax.xaxis.set_major_locator(MaxNLocator(nbins=5))
    ax.yaxis.set_major_locator(MaxNLocator(nbins=5))


def _title(ax, text: str, colour: str = TEXT_COLOUR) -> None:
    # An explicit y turns off matplotlib's automatic title placement, which measures every tick
    # label of the axes again; the panels here have no labels above them, so 1.0 is right.
    ax.set_title(text, fontsize=_FONT + 0.5, color=colour, loc="left", y=1.0, pad=4)


def _legend(figure: Figure, axes: list, *, n_columns: int = 3) -> None:
    handles, labels = axes[0].get_legend_handles_labels()
    if handles:
        figure.legend(
            handles,
            labels,
            loc="upper center",
            bbox_to_anchor=(0.5, 1.0),
            ncols=n_columns,
            fontsize=_FONT,
            frameon=False,
            borderaxespad=0.2,
        )


def _note_missing_model(ax, values: np.ndarray) -> None:
    """Say so in the panel when the surrogate produced nothing to draw (every member blew up)."""
    if not np.any(np.isfinite(values)):
        ax.text(
            0.5,
            0.5,
            "no surrogate output\n(every member blew up)",
            transform=ax.transAxes,
            ha="center",
            va="center",
            fontsize=_FONT,
            color=SURROGATE_DARK,
            bbox={"facecolor": "white", "edgecolor": SURROGATE_COLOUR, "pad": 3.0},
        )


def _curve_panel(
    ax,
    x: np.ndarray,
    band: tuple[np.ndarray, np.ndarray] | None,
    reference: np.ndarray,
    model: np.ndarray,
    *,
    widths: tuple[float, float],
) -> None:
    """Reference band, reference curve and dashed surrogate curve on one panel (line and band
    figures draw these alike); a surrogate curve with no finite value is noted on the panel."""
    if band is not None:
        ax.fill_between(
            x, band[0], band[1], color=REFERENCE_BAND, alpha=0.7, linewidth=0, label=BAND_LABEL
        )
    ax.plot(x, reference, color=REFERENCE_COLOUR, linewidth=widths[0], label=REFERENCE_LABEL)
    ax.plot(
        x,
        model,
        color=SURROGATE_COLOUR,
        linewidth=widths[1],
        linestyle=(0, (4, 2)),
        label=SURROGATE_LABEL,
    )
    _note_missing_model(ax, np.asarray(model, dtype=float))


def _band(pieces: np.ndarray | None, axis: int = 0) -> tuple[np.ndarray, np.ndarray] | None:
    """Lowest and highest value over reference pieces (the honest spread of the truth itself)."""
    if pieces is None or np.size(pieces) == 0 or np.shape(pieces)[axis] < 2:
        return None
    with np.errstate(all="ignore"):
        return np.nanmin(pieces, axis=axis), np.nanmax(pieces, axis=axis)


def _densities(mass: np.ndarray, edges: np.ndarray) -> tuple[np.ndarray, float, float]:
    """Bin masses (with under/overflow at both ends) → density inside the range, mass outside.

    Accepts counts or probabilities: both are normalised by their total, so the area of the density
    inside the range plus the two outside masses is one.
    """
    mass = np.asarray(mass, dtype=float)
    total = np.nansum(mass)
    if not np.isfinite(total) or total <= 0:
        nan = np.full(len(edges) - 1, np.nan)
        return nan, float("nan"), float("nan")
    mass = mass / total
    widths = np.diff(edges)
    return mass[1:-1] / widths, float(mass[0]), float(mass[-1])


def histogram_figure(
    variables: Sequence[str],
    edges: np.ndarray,
    reference: np.ndarray,
    model: np.ndarray,
    reference_pieces: np.ndarray | None = None,
) -> str:
    """Marginal densities of reference and surrogate per variable, with the reference pieces' band.

    Parameters
    ----------
    variables : sequence of str, length n_vars
    edges : array (n_vars, n_bins + 1)
        Bin edges per variable (shared by reference and surrogate).
    reference, model : array (n_vars, n_bins + 2)
        Bin masses or counts; first and last entries hold the mass below and above the edges.
    reference_pieces : array (n_pieces, n_vars, n_bins + 2), optional
        Same for each reference piece; drawn as the band between the lowest and highest piece.
    """
    figure, axes = _grid_figure(len(variables))
    draw_histograms(axes, variables, edges, reference, model, reference_pieces)
    _legend(figure, axes)
    return figure_to_svg(figure)


def draw_histograms(
    axes: Sequence,
    variables: Sequence[str],
    edges: np.ndarray,
    reference: np.ndarray,
    model: np.ndarray,
    reference_pieces: np.ndarray | None = None,
) -> None:
    """Draw :func:`histogram_figure`'s panels, one variable per axes (arguments alike)."""
    edges = np.atleast_2d(np.asarray(edges, dtype=float))
    for j, (ax, name) in enumerate(zip(axes, variables)):
        ref_density, ref_below, ref_above = _densities(reference[j], edges[j])
        mod_density, mod_below, mod_above = _densities(model[j], edges[j])
        top = np.nanmax(ref_density) if np.any(np.isfinite(ref_density)) else 1.0
        if reference_pieces is not None and np.size(reference_pieces):
            piece_densities = np.array([_densities(p[j], edges[j])[0] for p in reference_pieces])
            band = _band(piece_densities)
            if band is not None:
                low, high = band
                ax.fill_between(
                    edges[j],
                    np.append(low, low[-1]),
                    np.append(high, high[-1]),
                    step="post",
                    color=REFERENCE_BAND,
                    alpha=0.7,
                    linewidth=0,
                    label=BAND_LABEL,
                )
                top = max(top, float(np.nanmax(high)))
        ax.stairs(
            ref_density, edges[j], color=REFERENCE_COLOUR, linewidth=1.6, label=REFERENCE_LABEL
        )
        ax.stairs(
            mod_density,
            edges[j],
            color=SURROGATE_COLOUR,
            linewidth=1.8,
            linestyle=(0, (4, 2)),
            label=SURROGATE_LABEL,
        )
        _note_missing_model(ax, mod_density)
        model_top = float(np.nanmax(mod_density)) if np.any(np.isfinite(mod_density)) else 0.0
        if model_top > _CLIP_FACTOR * top:
            limit = _CLIP_FACTOR * top
            ax.set_ylim(0, limit)
            peak = int(np.nanargmax(mod_density))
            centre = 0.5 * (edges[j][peak] + edges[j][peak + 1])
            ax.annotate(
                f"surrogate peak\n{model_top / top:.0f}\u00d7 reference max",
                xy=(centre, limit),
                xytext=(0, -4),
                textcoords="offset points",
                ha="center",
                va="top",
                fontsize=_FONT - 1,
                color=SURROGATE_DARK,
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.85, "pad": 1.0},
            )
        else:
            ax.set_ylim(0, 1.08 * max(top, model_top))
        ax.set_xlim(edges[j][0], edges[j][-1])
        _title(ax, str(name))
        ax.set_ylabel("density", fontsize=_FONT)
        outside = []
        if (ref_below + ref_above) > 0 or (mod_below + mod_above) > 0:
            outside.append(
                f"outside range: ref {100 * (ref_below + ref_above):.1f}%, "
                f"surr {100 * (mod_below + mod_above):.1f}%"
            )
        if outside:
            ax.set_xlabel(outside[0], fontsize=_FONT - 1, color=MUTED_COLOUR)


def autocorrelation_figure(
    variables: Sequence[str],
    lags: np.ndarray,
    reference: np.ndarray,
    model: np.ndarray,
    reference_pieces: np.ndarray | None = None,
) -> str:
    """Autocorrelation against lag per variable; reference band from the reference pieces.

    Parameters
    ----------
    lags : array (n_lags,)
        Lags in time units.
    reference, model : array (n_vars, n_lags)
    reference_pieces : array (n_pieces, n_vars, n_lags), optional
    """
    figure, axes = _grid_figure(len(variables))
    draw_autocorrelation(axes, variables, lags, reference, model, reference_pieces)
    _legend(figure, axes)
    return figure_to_svg(figure)


def draw_autocorrelation(
    axes: Sequence,
    variables: Sequence[str],
    lags: np.ndarray,
    reference: np.ndarray,
    model: np.ndarray,
    reference_pieces: np.ndarray | None = None,
) -> None:
    """Draw :func:`autocorrelation_figure`'s panels, one variable per axes (arguments alike)."""
    lags = np.asarray(lags, dtype=float)
    band = _band(reference_pieces)
    for j, (ax, name) in enumerate(zip(axes, variables)):
        _curve_panel(
            ax,
            lags,
            None if band is None else (band[0][j], band[1][j]),
            reference[j],
            model[j],
            widths=(1.6, 1.8),
        )
        ax.axhline(0.0, color=MUTED_COLOUR, linewidth=0.7)
        ax.set_xlim(lags[0], lags[-1])
        ax.set_ylim(-1.05, 1.05)
        _title(ax, str(name))
        ax.set_xlabel("lag (time units)", fontsize=_FONT)
        ax.set_ylabel("autocorrelation", fontsize=_FONT)


def spectrum_figure(
    variables: Sequence[str],
    frequencies: np.ndarray,
    reference: np.ndarray,
    model: np.ndarray,
    reference_pieces: np.ndarray | None = None,
) -> str:
    """Power spectral densities on log–log axes per variable, reference band from pieces.

    Parameters
    ----------
    frequencies : array (n_freq,)
        Frequencies in cycles per time unit; the zero frequency cannot be shown on a log axis and
        is left out.
    reference, model : array (n_vars, n_freq)
    reference_pieces : array (n_pieces, n_vars, n_freq), optional
    """
    figure, axes = _grid_figure(len(variables))
    draw_spectra(axes, variables, frequencies, reference, model, reference_pieces)
    _legend(figure, axes)
    return figure_to_svg(figure)


def draw_spectra(
    axes: Sequence,
    variables: Sequence[str],
    frequencies: np.ndarray,
    reference: np.ndarray,
    model: np.ndarray,
    reference_pieces: np.ndarray | None = None,
) -> None:
    """Draw :func:`spectrum_figure`'s panels, one variable per axes (arguments alike)."""
    frequencies = np.asarray(frequencies, dtype=float)
    keep = frequencies > 0
    f = frequencies[keep]
    band = _band(reference_pieces)

    def positive(values: np.ndarray) -> np.ndarray:
        values = np.asarray(values, dtype=float)[keep]
        return np.where(values > 0, values, np.nan)

    for j, (ax, name) in enumerate(zip(axes, variables)):
        band_j = None if band is None else (positive(band[0][j]), positive(band[1][j]))
        finite = positive(reference[j])
        _curve_panel(ax, f, band_j, finite, positive(model[j]), widths=(1.4, 1.6))
        ax.set_xscale("log")
        ax.set_yscale("log")
        # Ticks on decades only: minor ticks add little on axes spanning many decades and cost
        # most of the drawing time (each tick is several artists).
        ax.xaxis.set_minor_locator(NullLocator())
        ax.yaxis.set_minor_locator(NullLocator())
        ax.yaxis.set_major_locator(LogLocator(numticks=6))
        if np.any(np.isfinite(finite)):
            # Keep the reference's dynamic range in view; a surrogate that collapses to a fixed
            # point has a spectrum many decades lower, which should show as a line leaving the axes.
            low = np.nanmin(finite)
            high = np.nanmax(finite)
            if band_j is not None:
                high = max(high, np.nanmax(band_j[1]))
            # ...but not more than nine decades below the peak, where only round-off lives.
            ax.set_ylim(max(low / 10, high * 1e-9), high * 3)
        ax.set_xlim(f[0], f[-1])
        _title(ax, str(name))
        ax.set_xlabel("frequency (cycles per time unit)", fontsize=_FONT)
        ax.set_ylabel("power spectral density", fontsize=_FONT)


def _grouped_bars(
    ax,
    names: Sequence[str],
    reference: np.ndarray,
    model: np.ndarray,
    reference_range: tuple[np.ndarray, np.ndarray] | None = None,
) -> None:
    x = np.arange(len(names))
    width = 0.38
    ref = np.asarray(reference, dtype=float)
    mod = np.asarray(model, dtype=float)
    ax.bar(x - width / 2, ref, width, color=REFERENCE_COLOUR, label=REFERENCE_LABEL)
    if reference_range is not None:
        low, high = reference_range
        ax.errorbar(
            x - width / 2,
            ref,
            yerr=[np.clip(ref - low, 0, None), np.clip(high - ref, 0, None)],
            fmt="none",
            ecolor=TEXT_COLOUR,
            elinewidth=1.0,
            capsize=3,
            label=BAND_LABEL,
        )
    # Hatching keeps the two bar families apart on a grey print.
    ax.bar(
        x + width / 2,
        np.nan_to_num(mod),
        width,
        color=SURROGATE_COLOUR,
        hatch="///",
        edgecolor="white",
        linewidth=0,
        label=SURROGATE_LABEL,
    )
    ax.set_xticks(x, [str(n) for n in names], fontsize=_FONT - 0.5)
    ax.grid(False, axis="x")


def regime_figure(
    regime_names: Sequence[str],
    occupancy_reference: np.ndarray,
    occupancy_model: np.ndarray,
    *,
    occupancy_pieces: np.ndarray | None = None,
    residence_reference: np.ndarray | None = None,
    residence_model: np.ndarray | None = None,
) -> str:
    """Fraction of time in each regime (and mean residence time) for reference and surrogate.

    Parameters
    ----------
    occupancy_reference, occupancy_model : array (n_regimes,)
        Fraction of samples in each regime.
    occupancy_pieces : array (n_pieces, n_regimes), optional
        Per reference piece; drawn as a range bar on the reference.
    residence_reference, residence_model : array (n_regimes,), optional
        Mean residence time per regime, time units.
    """
    with_residence = has_residence(residence_reference, residence_model)
    n_panels = 2 if with_residence else 1
    width = max(_PANEL_WIDTH, 0.75 * len(regime_names) + 1.2)
    figure, axes = _grid_figure(n_panels, width=width, height=2.5, columns=2)
    draw_regimes(
        axes,
        regime_names,
        occupancy_reference,
        occupancy_model,
        occupancy_pieces=occupancy_pieces,
        residence_reference=residence_reference,
        residence_model=residence_model,
    )
    _legend(figure, axes)
    return figure_to_svg(figure)


def has_residence(
    residence_reference: np.ndarray | None, residence_model: np.ndarray | None
) -> bool:
    """Whether the regime figure gets its second panel (mean residence times)."""
    return (
        residence_reference is not None
        and np.size(residence_reference) > 0
        and residence_model is not None
        and np.size(residence_model) > 0
    )


def draw_regimes(
    axes: Sequence,
    regime_names: Sequence[str],
    occupancy_reference: np.ndarray,
    occupancy_model: np.ndarray,
    *,
    occupancy_pieces: np.ndarray | None = None,
    residence_reference: np.ndarray | None = None,
    residence_model: np.ndarray | None = None,
) -> None:
    """Draw :func:`regime_figure`'s panels: occupancy on ``axes[0]``, residence on ``axes[1]``."""
    _grouped_bars(
        axes[0], regime_names, occupancy_reference, occupancy_model, _band(occupancy_pieces)
    )
    _title(axes[0], "time spent in each regime")
    axes[0].set_ylabel("fraction of time", fontsize=_FONT)
    if has_residence(residence_reference, residence_model) and len(axes) > 1:
        assert residence_reference is not None and residence_model is not None  # checked
        _grouped_bars(axes[1], regime_names, residence_reference, residence_model)
        _title(axes[1], "mean residence time")
        axes[1].set_ylabel("time units", fontsize=_FONT)


def transition_figure(regime_names: Sequence[str], reference: np.ndarray, model: np.ndarray) -> str:
    """Regime transition matrices (row: from, column: to) of reference and surrogate, side by side.

    Both share one colour scale from 0 to 1 (cividis [2]) and print each probability in its cell.
    """
    figure, axes = transition_panels(regime_names)
    image = draw_transitions(axes, regime_names, reference, model)
    colour_bar(figure, axes[1], image)
    return figure_to_svg(figure)


def transition_panels(regime_names: Sequence[str]) -> tuple[Figure, list]:
    """The two square panels of :func:`transition_figure`, with room for the names and a bar."""
    names = [str(n) for n in regime_names]
    size = max(2.6, 0.62 * len(names) + 1.5)
    label_room = 0.2 + 0.065 * max(len(n) for n in names)  # inches for the longest regime name
    return _grid_figure(
        2,
        width=size + label_room,
        height=size,
        columns=2,
        legend=False,
        left=label_room + 0.35,
        bottom=label_room * 0.6 + 0.45,
        right=1.1,
    )


def draw_transitions(
    axes: Sequence, regime_names: Sequence[str], reference: np.ndarray, model: np.ndarray
) -> Any:
    """Draw the reference matrix on ``axes[0]``, the surrogate's on ``axes[1]``.

    Returns the surrogate's image (one colour scale, 0 to 1, for both) for a colour bar.
    """
    names = [str(n) for n in regime_names]
    image = None
    for ax, matrix, label in (
        (axes[0], reference, REFERENCE_LABEL),
        (axes[1], model, SURROGATE_LABEL),
    ):
        matrix = np.asarray(matrix, dtype=float)
        ax.grid(False)
        image = ax.imshow(matrix, cmap="cividis", vmin=0.0, vmax=1.0)
        ticks = np.arange(len(names))
        ax.set_xticks(ticks, names, fontsize=_FONT - 1, rotation=30, ha="right")
        ax.set_yticks(ticks, names, fontsize=_FONT - 1)
        ax.set_xlabel("to", fontsize=_FONT)
        ax.set_ylabel("from", fontsize=_FONT)
        for (row, col), value in np.ndenumerate(matrix):
            text = "–" if not np.isfinite(value) else f"{value:.2f}"
            ax.text(
                col,
                row,
                text,
                ha="center",
                va="center",
                fontsize=_FONT - 1,
                color="white" if (np.isfinite(value) and value < 0.55) else "black",
            )
        colour = REFERENCE_COLOUR if label == REFERENCE_LABEL else SURROGATE_DARK
        _title(ax, label, colour)
    return image


def colour_bar(figure: Figure, beside: Any, image: Any) -> None:
    """A slim colour bar just right of the ``beside`` axes (in the room the layout left)."""
    right_edge = beside.get_position()
    bar_axes = figure.add_axes(
        (
            right_edge.x1 + 0.15 / figure.get_figwidth(),
            right_edge.y0,
            0.12 / figure.get_figwidth(),
            right_edge.height,
        )
    )
    bar = figure.colorbar(image, cax=bar_axes)
    bar.ax.tick_params(labelsize=_FONT - 1)


def projection_basis(
    reference_sample: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Centre, scale and two leading principal directions of the (standardised) reference sample.

    Returns ``(centre, scale, directions (n_vars, 2), explained fraction (2,))``. The surrogate's
    states are projected with the reference's basis so both clouds share one picture.
    """
    sample = np.asarray(reference_sample, dtype=float)
    sample = sample[np.all(np.isfinite(sample), axis=1)]
    centre = sample.mean(axis=0)
    scale = sample.std(axis=0)
    scale[scale == 0] = 1.0
    standard = (sample - centre) / scale
    _, singular, vt = np.linalg.svd(standard, full_matrices=False)
    explained = singular**2 / np.sum(singular**2)
    directions = vt[:2].T
    # Fix the sign of each direction (SVD leaves it arbitrary) so that repeated reports agree.
    for k in range(directions.shape[1]):
        if directions[np.argmax(np.abs(directions[:, k])), k] < 0:
            directions[:, k] *= -1
    return centre, scale, directions, explained[:2]


def projection_figure(
    variables: Sequence[str], reference_sample: np.ndarray, model_sample: np.ndarray
) -> str:
    """Reference and surrogate states in one 2-D projection, side by side on the same axes.

    With two variables the projection is the variables themselves; with more, the two leading
    principal components of the standardised reference sample (PCA), applied to both samples.
    """
    figure, axes = _grid_figure(2, width=3.6, height=3.2, columns=2, legend=False)
    draw_projection(axes, variables, reference_sample, model_sample)
    return figure_to_svg(figure)


def draw_projection(
    axes: Sequence, variables: Sequence[str], reference_sample: np.ndarray, model_sample: np.ndarray
) -> None:
    """Draw :func:`projection_figure`'s two panels: reference on ``axes[0]``, surrogate on
    ``axes[1]`` (arguments alike)."""
    reference_sample = np.asarray(reference_sample, dtype=float)
    model_sample = np.asarray(model_sample, dtype=float)
    reference_sample = reference_sample[np.all(np.isfinite(reference_sample), axis=1)]
    model_finite = (
        model_sample[np.all(np.isfinite(model_sample), axis=1)]
        if model_sample.size
        else model_sample.reshape(0, reference_sample.shape[1])
    )
    if reference_sample.shape[1] == 1:
        # One variable: a delay plot x(t) against x(t + 1 sample) is the only 2-D picture.
        ref_xy = np.column_stack([reference_sample[:-1, 0], reference_sample[1:, 0]])
        mod_xy = np.column_stack([model_finite[:-1, 0], model_finite[1:, 0]])
        labels = (f"{variables[0]}(t)", f"{variables[0]}(t + step)")
    elif reference_sample.shape[1] == 2:
        ref_xy, mod_xy = reference_sample, model_finite
        labels = (str(variables[0]), str(variables[1]))
    else:
        centre, scale, directions, explained = projection_basis(reference_sample)
        ref_xy = ((reference_sample - centre) / scale) @ directions
        mod_xy = ((model_finite - centre) / scale) @ directions
        labels = (
            f"principal component 1 ({100 * explained[0]:.0f}% of variance)",
            f"principal component 2 ({100 * explained[1]:.0f}% of variance)",
        )
    limits_from = ref_xy if len(ref_xy) else mod_xy
    pad_x = 0.08 * (np.ptp(limits_from[:, 0]) or 1.0)
    pad_y = 0.08 * (np.ptp(limits_from[:, 1]) or 1.0)
    for ax, points, colour, label in (
        (axes[0], ref_xy, REFERENCE_COLOUR, REFERENCE_LABEL),
        (axes[1], mod_xy, SURROGATE_COLOUR, SURROGATE_LABEL),
    ):
        if len(points):
            ax.scatter(
                points[:, 0],
                points[:, 1],
                s=2.0,
                color=colour,
                alpha=0.45,
                linewidths=0,
                rasterized=True,
            )
        else:
            ax.text(
                0.5,
                0.5,
                "no finite states",
                transform=ax.transAxes,
                ha="center",
                fontsize=_FONT,
                color=MUTED_COLOUR,
            )
        ax.set_xlim(limits_from[:, 0].min() - pad_x, limits_from[:, 0].max() + pad_x)
        ax.set_ylim(limits_from[:, 1].min() - pad_y, limits_from[:, 1].max() + pad_y)
        ax.set_xlabel(labels[0], fontsize=_FONT)
        ax.set_ylabel(labels[1], fontsize=_FONT)
        title_colour = REFERENCE_COLOUR if label == REFERENCE_LABEL else SURROGATE_DARK
        _title(ax, f"{label} ({len(points)} states)", title_colour)


def selection_figure(
    complexity: np.ndarray,
    score: np.ndarray,
    chosen: int | None,
    *,
    complexity_label: str = "number of terms",
    score_label: str = "largest ratio to noise floor",
    tolerance: float | None = None,
) -> str:
    """Candidates of a sweep: complexity against check score, the chosen one marked."""
    figure, axes = _grid_figure(1, width=4.6, height=2.8)
    draw_selection(
        axes[0],
        complexity,
        score,
        chosen,
        complexity_label=complexity_label,
        score_label=score_label,
        tolerance=tolerance,
    )
    _legend(figure, axes)
    return figure_to_svg(figure)


def draw_selection(
    ax: Any,
    complexity: np.ndarray,
    score: np.ndarray,
    chosen: int | None,
    *,
    complexity_label: str = "number of terms",
    score_label: str = "largest ratio to noise floor",
    tolerance: float | None = None,
) -> None:
    """Draw :func:`selection_figure`'s panel: one point per candidate, ``chosen`` ringed."""
    complexity = np.asarray(complexity, dtype=float)
    score = np.asarray(score, dtype=float)
    ax.scatter(complexity, score, s=22, color=MUTED_COLOUR, label="candidate", zorder=3)
    if chosen is not None and 0 <= chosen < len(score):
        ax.scatter(
            [complexity[chosen]],
            [score[chosen]],
            s=80,
            facecolors="none",
            edgecolors=SURROGATE_DARK,
            linewidths=2,
            label="chosen",
            zorder=4,
        )
    if tolerance is not None and np.isfinite(tolerance):
        ax.axhline(
            tolerance,
            color=TEXT_COLOUR,
            linewidth=0.9,
            linestyle=":",
            label=f"tolerance {tolerance:g}",
        )
    finite = score[np.isfinite(score)]
    if finite.size and np.all(finite > 0) and finite.max() / finite.min() > 30:
        ax.set_yscale("log")
    ax.set_xlabel(complexity_label, fontsize=_FONT)
    ax.set_ylabel(score_label, fontsize=_FONT)
