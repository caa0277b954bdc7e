"""The small pieces the report's sections are built from: fields, numbers, escaping, tables.

Reading a field from an object or a mapping alike (results and scorecards arrive as either),
evidence arrays by variable, number and value formatting, HTML escaping, key-value tables,
embedded SVG figures and the section wrapper. No section logic lives here.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

_MISSING = "\u2013"  # en dash for values that are absent or not a number


def _field(obj: Any, name: str, default: Any = None) -> Any:
    """Attribute ``name`` of ``obj``, or key ``name`` of a mapping, else ``default``."""
    if obj is None:
        return default
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _as_dict(obj: Any) -> dict[str, Any]:
    """A plain mapping view of a settings-like object (dict, dataclass, or ``to_dict()``)."""
    if obj is None:
        return {}
    if isinstance(obj, Mapping):
        return dict(obj)
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict):
        return dict(to_dict())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return dataclasses.asdict(obj)
    if hasattr(obj, "__dict__"):
        return {k: v for k, v in vars(obj).items() if not k.startswith("_")}
    return {"value": obj}


def _array(evidence: Any, name: str) -> np.ndarray | None:
    """Evidence field as an array, or ``None`` when absent or empty (the section is then left
    out)."""
    value = _field(evidence, name)
    if value is None:
        return None
    array = np.asarray(value)
    if array.size == 0:
        return None
    return array


def _by_variable(array: np.ndarray | None, n_points: int, n_vars: int) -> np.ndarray | None:
    """Put a curve array in figure order: (..., n_vars, n_points).

    The validator stores curves as (n_points, n_vars) per statistic, the layout that
    :func:`ergodex.stats.autocorrelation` and :func:`ergodex.stats.power_spectrum` return (pieces:
    (n_pieces, n_points, n_vars)); figures want one row per variable. Arrays already in figure
    order pass through; any other shape means the evidence does not fit and the figure is left out.
    """
    if array is None or array.ndim < 2:
        return None
    if array.shape[-2:] == (n_points, n_vars):
        return np.swapaxes(array, -1, -2)
    if array.shape[-2:] == (n_vars, n_points):
        return array
    return None


def _esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _number(value: Any) -> str:
    """Three significant figures; dash for missing or not-a-number, ∞ for infinities."""
    if value is None:
        return _MISSING
    try:
        x = float(value)
    except (TypeError, ValueError):
        return _esc(value)
    if math.isnan(x):
        return _MISSING
    if math.isinf(x):
        return "\u221e" if x > 0 else "\u2212\u221e"
    if x == 0:
        return "0"
    if 1e-3 <= abs(x) < 1e5:
        digits = max(0, 2 - int(math.floor(math.log10(abs(x)))))
        return f"{x:.{digits}f}"
    return f"{x:.3g}"


def _value_text(value: Any) -> str:
    """Escaped text of a setting or provenance value (lists and arrays compactly)."""
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (float, np.floating)):
        # Four significant figures without padding: settings read as typed (0.01, 10, 2.667)
        # and measured values stay short.
        return _number(value) if not math.isfinite(value) else _esc(f"{value:.4g}")
    if isinstance(value, (list, tuple)):
        if all(isinstance(v, (int, float, str, bool)) or v is None for v in value):
            return ", ".join(_value_text(v) for v in value) if value else "none"
        # A list of records (e.g. regime definitions): one per line.
        return "<br>".join(_value_text(v) for v in value)
    if isinstance(value, Mapping):
        if not value:
            return "none"
        return "; ".join(f"{_esc(k)}: {_value_text(v)}" for k, v in value.items())
    if value is None:
        return "none"
    return _esc(value)


def _flatten(mapping: Mapping[str, Any], prefix: str = "") -> list[tuple[str, Any]]:
    rows: list[tuple[str, Any]] = []
    for key, value in mapping.items():
        label = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            rows.extend(_flatten(value, prefix=f"{label}."))
        elif dataclasses.is_dataclass(value) and not isinstance(value, type):
            rows.extend(_flatten(dataclasses.asdict(value), prefix=f"{label}."))
        elif hasattr(value, "to_dict") and callable(value.to_dict):
            rows.extend(_flatten(value.to_dict(), prefix=f"{label}."))
        else:
            rows.append((label, value))
    return rows


def _key_value_table(mapping: Mapping[str, Any], *, css_class: str = "kv") -> str:
    rows = _flatten(mapping)
    if not rows:
        return '<p class="muted">none recorded</p>'
    body = "".join(
        f'<tr><th scope="row">{_esc(k)}</th><td>{_value_text(v)}</td></tr>' for k, v in rows
    )
    return f'<table class="{css_class}"><tbody>{body}</tbody></table>'


def _figure(svg: str, alt: str, caption: str, *, wide: bool = False) -> str:
    """An SVG figure inlined as a data URI; ``wide`` figures fill the text column."""
    data = base64.b64encode(svg.encode("utf-8")).decode("ascii")
    css = ' class="wide"' if wide else ""
    return (
        f'<figure{css}><img src="data:image/svg+xml;base64,{data}" alt="{_esc(alt)}">'
        f"<figcaption>{caption}</figcaption></figure>"
    )


def _section(anchor: str, heading: str, body: str) -> tuple[str, str, str]:
    return anchor, heading, f'<section id="{anchor}"><h2>{_esc(heading)}</h2>{body}</section>'
