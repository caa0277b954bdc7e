"""Latitude–longitude maps for the report: reference, surrogate and their difference.

Plain panels (matplotlib ``pcolormesh`` on the grid's own coordinates, no map projection or
coastline data): masked points stay blank. Each plotting function takes an axis and returns it;
:func:`grid_maps_svg` composes them into one SVG figure for the HTML report.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

__all__ = [
    "MAP_KEY_PREFIX",
    "evidence_maps",
    "grid_maps_svg",
    "map_section",
    "plot_map",
    "stored_map_sections",
]

#: Key prefix of the grid maps stored in an evidence NPZ beside its fixed fields
#: (``grid_map_reference_variance`` holds the map ``reference variance`` on the valid points).
MAP_KEY_PREFIX = "grid_map_"


def _edges(c: np.ndarray) -> np.ndarray:
    """Cell edges from centres (half a step beyond each end)."""
    c = np.asarray(c, dtype=np.float64)
    if c.size == 1:
        return np.array([c[0] - 0.5, c[0] + 0.5])
    mid = 0.5 * (c[1:] + c[:-1])
    return np.concatenate([[2 * c[0] - mid[0]], mid, [2 * c[-1] - mid[-1]]])


def plot_map(
    values: np.ndarray,
    lat: np.ndarray,
    lon: np.ndarray,
    *,
    ax=None,
    title: str = "",
    cmap: str = "viridis",
    vmin: float | None = None,
    vmax: float | None = None,
):
    """Draw a (n_lat, n_lon) map (NaN = masked) on ``ax`` with a colour bar; return the axis."""
    if ax is None:
        from matplotlib.figure import Figure

        ax = Figure(figsize=(3.4, 2.6)).subplots()
    mesh = ax.pcolormesh(
        _edges(lon),
        _edges(lat),
        np.ma.masked_invalid(values),
        cmap=cmap,
        vmin=vmin,
        vmax=vmax,
        shading="flat",
    )
    ax.figure.colorbar(mesh, ax=ax, shrink=0.85)
    ax.set_title(title, fontsize=8.5)
    ax.set_xlabel("longitude (°E)", fontsize=7.5)
    ax.set_ylabel("latitude (°N)", fontsize=7.5)
    ax.tick_params(labelsize=7)
    ax.set_aspect("equal", adjustable="box")
    return ax


def grid_maps_svg(
    maps: Mapping[str, np.ndarray],
    lat: np.ndarray,
    lon: np.ndarray,
    mask: np.ndarray,
    *,
    statistics=("variance", "lag-1"),
) -> str:
    """One SVG: a row per statistic with reference, surrogate and surrogate − reference."""
    from matplotlib.figure import Figure

    from ergodex.report.figures import figure_to_svg

    rows = [s for s in statistics if f"reference {s}" in maps]
    figure = Figure(figsize=(10.5, 3.0 * max(1, len(rows))))
    axes = figure.subplots(max(1, len(rows)), 3, squeeze=False)
    for r, stat in enumerate(rows):
        grid = {}
        for who in ("reference", "surrogate"):
            v = maps.get(f"{who} {stat}")
            if v is not None:
                g = np.full(mask.shape, np.nan)
                g[mask] = v
                grid[who] = g
        both = [g for g in grid.values()]
        lo = float(np.nanmin([np.nanmin(g) for g in both]))
        hi = float(np.nanmax([np.nanmax(g) for g in both]))
        for c, who in enumerate(("reference", "surrogate")):
            if who in grid:
                plot_map(
                    grid[who], lat, lon, ax=axes[r, c], title=f"{who}: {stat}", vmin=lo, vmax=hi
                )
            else:
                axes[r, c].set_visible(False)
        if "surrogate" in grid:
            diff = grid["surrogate"] - grid["reference"]
            m = float(np.nanmax(np.abs(diff))) or 1.0
            plot_map(
                diff,
                lat,
                lon,
                ax=axes[r, 2],
                title=f"surrogate − reference: {stat}",
                cmap="RdBu_r",
                vmin=-m,
                vmax=m,
            )
        else:
            axes[r, 2].set_visible(False)
    figure.subplots_adjust(left=0.06, right=0.98, bottom=0.1, top=0.9, wspace=0.35, hspace=0.45)
    return figure_to_svg(figure)


def map_section(field_check) -> tuple[str, str, str]:
    """A report section (anchor, heading, html) with the grid maps and the reduction summary."""
    from ergodex.report.markup import _figure, _key_value_table, _section

    svg = grid_maps_svg(field_check.maps, field_check.lat, field_check.lon, field_check.mask)
    s = field_check.summary
    caption = (
        f"Grid-point variance and lag-one autocorrelation of {s.get('variable', '')} "
        f"anomalies, averaged over pieces: reference (as its {s.get('n_modes')} kept modes "
        f"carry it), surrogate, and their difference. Masked points are blank. The kept "
        f"modes capture {100 * s.get('variance_captured', float('nan')):.1f} % of the "
        f"area-weighted variance of the fit data."
    )
    table = _key_value_table(s)
    body = _figure(svg, "maps of variance and lag-one autocorrelation", caption, wide=True) + table
    return _section("grid-maps", "Maps on the grid", body)


def evidence_maps(field_check) -> dict[str, np.ndarray]:
    """A field check's maps (values on the valid points) as extra arrays of its evidence file,
    so that ``ergodex report`` redraws them from the registry (grid and mask come from the
    model's transform)."""
    return {
        MAP_KEY_PREFIX + name.replace(" ", "_"): np.asarray(values, dtype=np.float64)
        for name, values in field_check.maps.items()
    }


def stored_map_sections(surrogate, evidence_bytes: bytes, *, name: str) -> list:
    """The map section of a field model's stored check, from its evidence bytes.

    Empty for a model of plain columns, or evidence written without maps (before they were
    stored, or by the plain check). A map whose size is not the model's number of valid points
    raises :class:`~ergodex.exceptions.ModelFileError` naming ``name`` and the map.
    """
    import io

    from ergodex.exceptions import ModelFileError
    from ergodex.fields.checking import FieldCheck
    from ergodex.fields.modelling import field_transform_of

    transform = field_transform_of(surrogate)
    if transform is None:
        return []
    try:
        with np.load(io.BytesIO(evidence_bytes), allow_pickle=False) as z:
            maps = {
                key[len(MAP_KEY_PREFIX) :].replace("_", " "): np.asarray(z[key], float)
                for key in z.files
                if key.startswith(MAP_KEY_PREFIX)
            }
    except (OSError, ValueError) as exc:
        raise ModelFileError(f"{name}: cannot read the grid maps ({exc})") from None
    n_valid = int(np.count_nonzero(transform.mask_))
    for key, values in maps.items():
        if values.shape != (n_valid,):
            raise ModelFileError(
                f"{name}: grid map {key!r} has shape {values.shape}; the model "
                f"has {n_valid} valid grid points"
            )
    if not maps:
        return []
    check = FieldCheck(
        result=None,
        maps=maps,
        lat=transform.lat_,
        lon=transform.lon_,
        mask=transform.mask_,
        summary=transform.summary(),
    )
    return [map_section(check)]
