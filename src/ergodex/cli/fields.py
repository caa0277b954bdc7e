"""Command-line options for gridded fields and delay embeddings, shared by fit and validate.

Kept in one module so that ``fit`` and ``validate`` each add one call: ``add_fit_options`` /
``add_check_options`` put the options on the parser, ``read_fit_input`` / ``read_check_input``
read DATA accordingly. With ``--variable`` DATA is a NetCDF file (or a quoted glob pattern of
files of one variable, joined along time) and the model is fitted on the amplitudes of the
field's leading EOFs; with ``--delays`` a single-index record is embedded in delay coordinates.
"""

from __future__ import annotations

import argparse
import glob
from collections.abc import Callable
from typing import Any

from ergodex.exceptions import DataError, SettingsError


def format_dt(dt: float, unit: str | None) -> str:
    """:func:`ergodex.series.format_dt`, imported when called (series loads numpy; --help does
    not)."""
    from ergodex.series import format_dt as series_format_dt

    return series_format_dt(dt, unit)


__all__ = [
    "add_check_options",
    "add_fit_options",
    "check_field_arg",
    "field_output_map",
    "read_check_input",
    "read_fit_input",
    "time_unit_note",
    "write_simulated_field",
]


def _common(group) -> None:
    group.add_argument(
        "--variable",
        metavar="NAME",
        default=None,
        help="read DATA as a gridded CF field: this variable on (time, [member], "
        "[level], lat, lon); DATA may be a quoted glob of files along time",
    )
    group.add_argument(
        "--box",
        metavar="LAT0,LAT1,LON0,LON1",
        default=None,
        help="keep this latitude-longitude box (degrees; LON0 > LON1 crosses the "
        "date line; write --box=-20,20,... when LAT0 is negative)",
    )
    group.add_argument(
        "--level",
        type=float,
        default=None,
        metavar="VALUE",
        help="select this value of a level (or other extra) coordinate",
    )
    group.add_argument(
        "--chunks",
        type=int,
        default=None,
        metavar="N",
        help="read lazily through dask, N time samples per chunk (files larger than memory)",
    )


def add_fit_options(parser: argparse.ArgumentParser) -> None:
    """Field and delay options of ``ergodex fit``."""
    group = parser.add_argument_group("gridded fields (NetCDF) and delay embeddings")
    _common(group)
    group.add_argument(
        "--modes", type=int, default=None, metavar="K", help="--variable: keep K EOF modes"
    )
    group.add_argument(
        "--variance",
        type=float,
        default=None,
        metavar="F",
        help="--variable: keep the fewest modes reaching this variance share (default 0.9)",
    )
    group.add_argument(
        "--north",
        action="store_true",
        help="--variable: keep the modes North et al. (1982) find separated",
    )
    group.add_argument(
        "--max-modes",
        type=int,
        default=None,
        metavar="K",
        help="--variable: at most K modes under --variance or --north",
    )
    group.add_argument(
        "--climatology",
        choices=("auto", "month", "day", "none"),
        default="auto",
        help="--variable: seasonal cycle removed before the EOFs, fitted on the "
        "fit data (default auto: none for yearly samples, calendar months for "
        "monthly ones, a smooth daily cycle for finer ones)",
    )
    group.add_argument(
        "--detrend", action="store_true", help="--variable: remove a linear trend per grid point"
    )
    group.add_argument(
        "--delays",
        type=int,
        default=None,
        metavar="M",
        help="embed each variable in M delay coordinates (single-index records)",
    )
    group.add_argument(
        "--delay-step",
        type=int,
        default=1,
        metavar="L",
        help="--delays: samples between delayed copies (default 1)",
    )


def add_check_options(parser: argparse.ArgumentParser) -> None:
    """Field options of ``ergodex validate`` (the reduction itself comes from the model)."""
    group = parser.add_argument_group("gridded fields (NetCDF)")
    _common(group)
    group.add_argument(
        "--region",
        metavar="LAT0,LAT1,LON0,LON1",
        action="append",
        default=[],
        help="--variable: also compare the mean over this box (repeatable; "
        "write --region=-20,... when LAT0 is negative)",
    )


def _paths(data: str) -> list[str]:
    if any(c in data for c in "*?["):
        found = sorted(glob.glob(data))
        if not found:
            raise DataError(f"{data}: no file matches this pattern")
        return found
    return [data]


def read_field_arg(args: argparse.Namespace):
    """The Field that DATA and the field options name."""
    from ergodex.fields import parse_box, read_field

    if args.chunks is not None and args.chunks < 1:
        raise SettingsError(f"--chunks must be at least 1; got {args.chunks}")
    box = parse_box(args.box) if args.box else None
    return read_field(
        _paths(args.data), args.variable, box=box, level=args.level, chunks=args.chunks
    )


def read_fit_input(args: argparse.Namespace, read_series: Callable) -> tuple[Any, Callable, str]:
    """DATA as the fitter sees it: ``(series, finish, note)``.

    ``finish(surrogate)`` gives the fitted model its transform (field modes or delays);
    ``note`` is one line for the terminal (dt with its unit, modes kept).
    """
    field_only = ("box", "level", "chunks", "modes", "variance", "max_modes")
    if args.variable is None:
        used = [o for o in field_only if getattr(args, o) is not None]
        used += [o for o in ("north", "detrend") if getattr(args, o)]
        used += ["climatology"] if args.climatology != "auto" else []
        if used:
            raise SettingsError(
                f"--{used[0].replace('_', '-')} needs --variable NAME (a gridded NetCDF field)"
            )
        series = read_series(args.data, dt=args.dt)
        if args.delays is None:
            return series, (lambda s: s), f"dt {format_dt(series.dt, series.time_unit)}"
        from ergodex.fields.modelling import attach_transform, delay_series

        if args.delays < 2 or args.delay_step < 1:
            raise SettingsError(
                f"--delays must be at least 2 and --delay-step at least 1; got "
                f"{args.delays} and {args.delay_step}"
            )
        transform, embedded = delay_series(series, args.delays, args.delay_step)
        note = (
            f"dt {format_dt(series.dt, series.time_unit)}; {args.delays} delay coordinates "
            f"{args.delay_step} sample(s) apart"
        )
        return embedded, (lambda s: attach_transform(s, transform)), note
    if getattr(args, "reference", None):
        raise SettingsError(
            "--reference is not supported with --variable; check the chosen "
            "model with ergodex validate MODEL DATA --variable NAME"
        )
    if args.delays is not None:
        raise SettingsError("--delays applies to single-index records, not with --variable")
    from ergodex.fields import FieldModes, modes_series
    from ergodex.fields.modelling import attach_transform

    field = read_field_arg(args)
    transform = FieldModes(
        args.modes,
        variance=args.variance,
        north=args.north,
        climatology=None if args.climatology == "none" else args.climatology,
        detrend=args.detrend,
        max_modes=args.max_modes,
    ).fit(field)
    series = modes_series(transform, field)
    info = transform.summary()
    note = (
        f"{field.variable} on {field.mask.shape[0]}x{field.mask.shape[1]} grid "
        f"({info['valid_points']} valid points), dt {transform.dt_text} "
        f"({field.clock.calendar} calendar); {transform.n_modes_} modes capture "
        f"{100 * info['variance_captured']:.1f} % of the area-weighted variance"
    )

    def finish(surrogate):
        return attach_transform(
            surrogate,
            transform,
            field={
                "source": field.source,
                "variable": field.variable,
                "box": None if args.box is None else args.box,
                "level": args.level,
                "time_unit": field.clock.unit,
                "dt": field.clock.step,
                "calendar": field.clock.calendar,
                "n_modes": transform.n_modes_,
                "variance_captured": info["variance_captured"],
            },
        )

    return series, finish, note


def read_check_input(args: argparse.Namespace, surrogate, read_series: Callable):
    """DATA for ``validate``: ``(series, field or None)``, the field read as the model was."""
    from ergodex.fields.modelling import field_transform_of

    transform = field_transform_of(surrogate)
    if args.variable is None:
        if transform is not None:
            raise SettingsError(
                f"the model reduces the gridded variable "
                f"{transform.variable_!r}; pass --variable "
                f"{transform.variable_} (and the same --box)"
            )
        if args.region:
            raise SettingsError("--region needs --variable NAME (a gridded NetCDF field)")
        return read_series(args.data, dt=args.dt), None
    if transform is None:
        raise SettingsError("--variable: this model was not fitted on a gridded field")
    from ergodex.fields import modes_series

    field = read_field_arg(args)
    return modes_series(transform, field), field


def check_field_arg(args: argparse.Namespace, surrogate, field, spec):
    """Run the field check (mode rows plus grid rows) with the ``--region`` boxes, under the
    ``--time-limit`` and ``--max-memory`` of ``validate``."""
    from ergodex.fields import parse_box
    from ergodex.fields.checking import check_field

    regions = [parse_box(text) for text in args.region]
    return check_field(
        surrogate,
        field,
        spec,
        regions=regions,
        time_limit=getattr(args, "time_limit", None),
        max_memory=getattr(args, "max_memory", None),
    )


def field_output_map(surrogate, dt: float):
    """For a field model: model states → absolute grid values on dates after the fit record.

    Output sample ``i`` lies ``i + 1`` steps after the last sample of the fit data, so the seasonal
    cycle (and a fitted trend, extrapolated) follow the model calendar. None for other models.
    """
    import numpy as np

    from ergodex.fields.modelling import field_transform_of

    transform = field_transform_of(surrogate)
    if transform is None:
        return None
    if abs(dt - transform.clock_.step) > 1e-9 * transform.clock_.step:
        raise SettingsError(
            f"--dt {dt:g}: a field model writes its grid at its own step, "
            f"{transform.dt_text}; leave --dt out"
        )
    return lambda z: transform.inverse_at(z, transform.record_end_ + np.arange(len(z)))


def write_simulated_field(path, surrogate, series, args: argparse.Namespace):
    """Write simulated grid values as CF NetCDF on the model's grid, mask and calendar."""
    import numpy as np

    from ergodex import __version__
    from ergodex.fields.modelling import field_transform_of
    from ergodex.fields.writing import write_field

    t = field_transform_of(surrogate)
    n = min(series.lengths)
    values = np.stack([r[:n] for r in series.runs])
    model_name = str(getattr(args, "model", ""))
    version = _registered_version(model_name, getattr(args, "home", None))
    return write_field(
        path,
        values,
        variable=t.variable_,
        lat=t.lat_,
        lon=t.lon_,
        mask=t.mask_,
        clock=t.clock_,
        steps=t.record_end_ + np.arange(n),
        time_units=t.dims_.get("time_units") or t.clock_.epoch,
        units=t.units_,
        attrs=t.attrs_,
        member_dim="member",
        dims=t.dims_,
        global_attrs={
            "title": f"ergodex simulation of {t.variable_}",
            "ergodex_model": str(model_name),
            "ergodex_model_fingerprint": surrogate.fingerprint(),
            "ergodex_model_version": version,
            "ergodex_version": __version__,
            "ergodex_members": ", ".join(series.run_labels or ()),
        },
    )


def time_unit_note(surrogate) -> str | None:
    """One line naming a model's time unit (its rates and times are in that unit), or None.

    The one place fit, validate, simulate and demo word it: a field model's clock (with its
    calendar), else the ``time_unit`` its fitter recorded from the data (NetCDF times).
    """
    from ergodex.fields.modelling import field_transform_of

    t = field_transform_of(surrogate)
    if t is not None:
        unit, dt, calendar = t.clock_.unit, t.clock_.step, f", {t.clock_.calendar} calendar"
    else:
        provenance = surrogate.provenance
        unit, dt, calendar = provenance.get("time_unit"), provenance.get("dt"), ""
        if not isinstance(unit, str) or not unit or not isinstance(dt, (int, float)):
            return None
    return (
        f"time unit: {unit} (dt = {format_dt(float(dt), unit)}{calendar}); "
        f"times and rates are in {unit}"
    )


def _registered_version(ref: str, home) -> str | None:
    """``NAME/VERSION`` of a registered model reference (None for a model file)."""
    from ergodex.cli.common import is_model_file, resolve_home

    if is_model_file(ref):
        return None
    from ergodex.registry import Registry

    info = Registry(resolve_home(home)).get(ref)
    return info.ref
