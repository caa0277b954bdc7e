"""Assemble the validation report: one self-contained HTML page from a check result.

The page needs no network and no other file: styles are inline, figures are SVG documents embedded
as ``data:`` URIs in ``<img>`` elements, and there is no script at all. Every string that comes from
a user (variable and regime names, notes, settings, titles) passes through :func:`html.escape`.
Sections whose evidence is missing (no regimes defined, no spectra computed) are left out.
"""

from __future__ import annotations

import base64
import dataclasses
import datetime as _dt
import html
import math
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ergodex import CAUTION, __version__
from ergodex.exceptions import SettingsError
from ergodex.report import figures

_MISSING = "\u2013"  # en dash for values that are absent or not a number
_BANNER_REASONS = 4


# ----------------------------------------------------------------------------------------------
# Small helpers: reading fields from objects or mappings, formatting, escaping
# ----------------------------------------------------------------------------------------------


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


# ----------------------------------------------------------------------------------------------
# Sections
# ----------------------------------------------------------------------------------------------


def _ordered_rows(rows: Sequence[Any]) -> list[Any]:
    """Failing rows first (largest ratio first), then rows without a verdict, then passing rows.

    Passing rows keep the validator's order, which groups them by statistic.
    """

    def ratio(row: Any) -> float:
        value = _field(row, "ratio")
        try:
            x = float(value)
        except (TypeError, ValueError):
            return -math.inf
        return math.inf if math.isnan(x) else x

    failing = [r for r in rows if str(_field(r, "verdict", "")).lower() == "fail"]
    passing = [r for r in rows if str(_field(r, "verdict", "")).lower() == "pass"]
    other = [r for r in rows if r not in failing and r not in passing]
    failing.sort(key=ratio, reverse=True)
    return failing + other + passing


def _scorecard_section(scorecard: Any) -> tuple[str, str, str]:
    rows = list(_field(scorecard, "rows", []) or [])
    ordered = _ordered_rows(rows)
    body_rows = []
    for row in ordered:
        verdict = str(_field(row, "verdict", "")).lower()
        ratio = _field(row, "ratio")
        tolerance = _field(row, "tolerance")
        try:
            fill = min(1.0, float(ratio) / (2.0 * float(tolerance)))
            fill = 0.0 if math.isnan(fill) else max(fill, 0.0)
        except (TypeError, ValueError, ZeroDivisionError):
            fill = 0.0
        # A small bar drawn by CSS: half the cell is the tolerance, so a failing ratio crosses the
        # tick in the middle. Pure CSS keeps the page free of scripts.
        bar = (
            f'<span class="gauge" aria-hidden="true"><span class="fill {_esc(verdict)}" '
            f'style="width:{100 * fill:.0f}%"></span></span>'
        )
        body_rows.append(
            f'<tr class="row-{_esc(verdict or "none")}">'
            f"<td>{_esc(_field(row, 'statistic', ''))}</td>"
            f"<td>{_esc(_field(row, 'variable', ''))}</td>"
            f'<td class="num">{_number(_field(row, "value"))}</td>'
            f'<td class="num">{_number(_field(row, "noise_floor"))}</td>'
            f'<td class="num ratio">{_number(ratio)} {bar}</td>'
            f'<td class="num">{_number(tolerance)}</td>'
            f'<td class="verdict-cell {_esc(verdict)}">{_esc(verdict or _MISSING)}</td></tr>'
        )
    if not body_rows:
        table = '<p class="muted">The scorecard has no rows.</p>'
    else:
        table = (
            '<table class="scorecard"><thead><tr><th>statistic</th><th>variable or regime</th>'
            '<th class="num">model distance</th><th class="num">noise floor</th>'
            '<th class="num">ratio</th><th class="num">tolerance</th><th>verdict</th></tr></thead>'
            f"<tbody>{''.join(body_rows)}</tbody></table>"
        )
    intro = (
        "<p>Each row compares one statistic of the surrogate's long runs with the reference data. "
        "<em>Model distance</em> is the distance between surrogate and reference; the "
        "<em>noise floor</em> is the same distance between independent pieces of the reference "
        "itself, i.e. how far two honest samples of the truth already differ. A row passes when "
        "the ratio of the two stays within the tolerance. Failing rows are listed first.</p>"
    )
    return _section("scorecard", "Scorecard", intro + table)


def _verdict_banner(scorecard: Any) -> str:
    verdict = str(_field(scorecard, "verdict", "")).lower() or "unknown"
    rows = list(_field(scorecard, "rows", []) or [])
    n_fail = sum(1 for r in rows if str(_field(r, "verdict", "")).lower() == "fail")
    ratios = []
    for r in rows:
        try:
            ratios.append(float(_field(r, "ratio")))
        except (TypeError, ValueError):
            pass
    finite = [x for x in ratios if not math.isnan(x)]
    worst = max(finite) if finite else float("nan")
    if verdict == "pass":
        headline = "The surrogate's long-run statistics match the reference within its noise."
    elif verdict == "fail":
        headline = "The surrogate's long-run statistics differ from the reference beyond its noise."
    elif verdict == "inconclusive":
        headline = (
            "Inconclusive: the record cannot tell whether the long-run statistics match "
            "(not a pass; the reasons say what more data would settle it)."
        )
    else:
        headline = "The check has no verdict."
    if rows:
        detail = (
            f"{len(rows) - n_fail} of {len(rows)} rows within tolerance; "
            f"largest ratio to the noise floor {_number(worst)}."
        )
    else:
        detail = "No statistic could be compared."
    power = _field(scorecard, "power", None) or {}
    if power:
        from ergodex.validation import power_lines

        detail += " " + "; ".join(power_lines(power)) + "."
    reasons = [str(r) for r in (_field(scorecard, "reasons", []) or [])]
    reasons_html = ""
    if reasons:
        # The banner stays short: the first few reasons (the validator lists the worst first),
        # the rest folded away (<details> needs no script) and in the scorecard table anyway.
        shown, folded = reasons[:_BANNER_REASONS], reasons[_BANNER_REASONS:]
        items = "".join(f"<li>{_esc(r)}</li>" for r in shown)
        reasons_html = f'<ul class="reasons">{items}</ul>'
        if folded:
            more = "".join(f"<li>{_esc(r)}</li>" for r in folded)
            reasons_html += (
                f"<details><summary>{len(folded)} more reasons</summary>"
                f'<ul class="reasons">{more}</ul></details>'
            )
    return (
        f'<div class="banner {_esc(verdict)}" role="status">'
        f'<p class="verdict-line">Verdict: <strong id="verdict" data-verdict="{_esc(verdict)}">'
        f"{_esc(verdict)}</strong></p>"
        f'<p class="headline">{_esc(headline)}</p><p class="detail">{_esc(detail)}</p>'
        f"{reasons_html}</div>"
    )


def _variable_names(evidence: Any, surrogate: Any) -> list[str]:
    names = _field(evidence, "variables")
    if names is None or np.size(names) == 0:
        names = _field(surrogate, "variables", ()) or ()
    return [str(n) for n in np.asarray(names).tolist()]


def _curves(evidence: Any, prefix: str, n_points: int, n_vars: int) -> tuple:
    """Reference, surrogate and reference-piece curves ``<prefix>_*`` in figure order."""
    return tuple(
        _by_variable(_array(evidence, f"{prefix}_{kind}"), n_points, n_vars)
        for kind in ("reference", "model", "reference_pieces")
    )


def _distribution_sections(evidence: Any, names: list[str]) -> list[tuple[str, str, str]]:
    sections = []
    wide = len(names) >= 3  # three panels to a row fill the column; fewer keep their own size
    edges = _array(evidence, "hist_edges")
    hist_ref = _array(evidence, "hist_reference")
    hist_mod = _array(evidence, "hist_model")
    if edges is not None and hist_ref is not None and hist_mod is not None:
        svg = figures.histogram_figure(
            names, edges, hist_ref, hist_mod, _array(evidence, "hist_reference_pieces")
        )
        body = (
            "<p>Share of time each variable spends at each value (density), from long surrogate "
            "runs and from the reference data, on the reference's bins. A surrogate curve inside "
            "the shaded band differs from the data no more than the data's own pieces differ from "
            "one another.</p>"
            + _figure(
                svg,
                "histograms of each variable, reference and surrogate",
                "Marginal distributions. Mass outside the reference's range is noted under "
                "a panel when there is any.",
                wide=wide,
            )
        )
        sections.append(_section("distributions", "Distributions", body))
    n_vars = len(names)
    lags = _array(evidence, "acf_lags")
    if lags is not None:
        acf_ref, acf_mod, acf_pieces = _curves(evidence, "acf", lags.size, n_vars)
        if acf_ref is not None and acf_mod is not None:
            svg = figures.autocorrelation_figure(names, lags, acf_ref, acf_mod, acf_pieces)
            body = (
                "<p>How quickly each variable forgets its past. Matching autocorrelation means "
                "the surrogate has the right time scales, not only the right values.</p>"
                + _figure(
                    svg,
                    "autocorrelation of each variable against lag",
                    "Autocorrelation against lag.",
                    wide=wide,
                )
            )
            sections.append(_section("autocorrelation", "Autocorrelation", body))
    freq = _array(evidence, "psd_freq")
    if freq is not None and np.any(freq > 0):
        psd_ref, psd_mod, psd_pieces = _curves(evidence, "psd", freq.size, n_vars)
        if psd_ref is not None and psd_mod is not None:
            svg = figures.spectrum_figure(names, freq, psd_ref, psd_mod, psd_pieces)
            body = (
                "<p>Power spectral density on logarithmic axes: where in frequency each "
                "variable's variance lives.</p>"
                + _figure(
                    svg, "power spectra of each variable on log axes", "Power spectra.", wide=wide
                )
            )
            sections.append(_section("spectra", "Power spectra", body))
    return sections


def _regime_section(evidence: Any) -> tuple[str, str, str] | None:
    regime_names = _field(evidence, "regime_names")
    occ_ref = _array(evidence, "occupancy_reference")
    occ_mod = _array(evidence, "occupancy_model")
    if regime_names is None or np.size(regime_names) == 0 or occ_ref is None or occ_mod is None:
        return None
    names = [str(n) for n in np.asarray(regime_names).tolist()]
    parts = [
        "<p>Regimes are the named regions of state space given to the check. Bars compare the "
        "fraction of time spent in each and how long a visit lasts on average; the whiskers on "
        "the reference bars span its pieces.</p>",
        _figure(
            figures.regime_figure(
                names,
                occ_ref,
                occ_mod,
                occupancy_pieces=_array(evidence, "occupancy_reference_pieces"),
                residence_reference=_array(evidence, "residence_reference"),
                residence_model=_array(evidence, "residence_model"),
            ),
            "regime occupancy and residence times, reference and surrogate",
            "Regime occupancy and mean residence time.",
        ),
    ]
    trans_ref = _array(evidence, "transitions_reference")
    trans_mod = _array(evidence, "transitions_model")
    if trans_ref is not None and trans_mod is not None:
        parts.append(
            _figure(
                figures.transition_figure(names, trans_ref, trans_mod),
                "regime transition matrices, reference and surrogate",
                "Of the departures from the row's regime, the fraction that go next to the "
                "column's regime (changes of regime only, so the diagonal is zero).",
            )
        )
    return _section("regimes", "Regimes", "".join(parts))


def _projection_section(evidence: Any, names: list[str]) -> tuple[str, str, str] | None:
    ref = _array(evidence, "sample_reference")
    mod = _array(evidence, "sample_model")
    if ref is None or ref.ndim != 2:
        return None
    if mod is None:
        mod = np.empty((0, ref.shape[1]))
    finite = ref[np.all(np.isfinite(ref), axis=1)]
    if len(finite) < 3:
        return None
    svg = figures.projection_figure(names, ref, mod)
    how = (
        "the two variables"
        if ref.shape[1] == 2
        else "the two leading principal components of the standardised reference states; the "
        "surrogate is projected on the same axes"
    )
    body = (
        f"<p>The shape of the attractor: sampled states of reference and surrogate, plotted on "
        f"{how}. Statistics can agree on average while the shape differs; this picture shows "
        f"it.</p>"
        + _figure(
            svg,
            "2-D projection of reference and surrogate states",
            "Reference (left) and surrogate (right) states on the same axes.",
        )
    )
    return _section("attractor", "Attractor shape", body)


def _stability_section(scorecard: Any, evidence: Any) -> tuple[str, str, str]:
    blowups = _as_dict(_field(scorecard, "blowups"))
    count = blowups.get("count")
    times = _array(evidence, "blowup_times")
    if times is None and blowups.get("times") is not None:
        times = np.asarray(blowups.get("times"), dtype=float)
    finite_times = times[np.isfinite(times)] if times is not None else np.empty(0)
    if count is None:
        count = int(finite_times.size)
    spec = _as_dict(_field(scorecard, "spec"))
    members = spec.get("members")
    parts = []
    if count:
        first = _number(np.min(finite_times)) if finite_times.size else _MISSING
        parts.append(
            f'<p class="alert">{_esc(count)} of {_esc(members if members is not None else "?")} '
            f"surrogate members blew up (non-finite or far outside the data's range); the first "
            f"at time {first}. Their states after the blow-up are left out of every statistic, and "
            f"the blow-ups count against the verdict.</p>"
        )
    else:
        parts.append(
            f"<p>No member blew up ({_esc(members if members is not None else '?')} members).</p>"
        )
    if count and blowups:
        parts.append("<h3>Blow-ups</h3>" + _key_value_table(blowups))
    agreement = _as_dict(_field(scorecard, "member_agreement"))
    if agreement:
        parts.append(
            "<h3>Member agreement</h3><p>Whether the surrogate's members, started from different "
            "states, settle on the same statistics. Disagreement points to several attractors or "
            "a collapse onto a fixed point or cycle.</p>" + _key_value_table(agreement)
        )
    return _section("stability", "Blow-ups and member agreement", "".join(parts))


def _model_section(surrogate: Any) -> tuple[str, str, str]:
    parts = []
    try:
        equations = list(surrogate.equations())
    except Exception as exc:  # noqa: BLE001 - an unreadable model must not stop the report
        equations = []
        parts.append(f'<p class="alert">The equations could not be listed: {_esc(exc)}</p>')
    if equations:
        items = "".join(f"<li><code>{_esc(e)}</code></li>" for e in equations)
        parts.append(f'<ul class="equations">{items}</ul>')
    facts: dict[str, Any] = {}
    for key in ("kind", "n_variables", "n_terms"):
        value = _field(surrogate, key)
        if value is not None:
            facts[key.replace("_", " ")] = value
    transform = _field(surrogate, "transform")
    if transform is not None:
        description = _as_dict(transform)
        facts["transform"] = description.get("kind", type(transform).__name__)
    noise = _field(surrogate, "noise")
    if noise is not None:
        noise = np.asarray(noise, dtype=float)
        facts["noise"] = "additive white noise, variances per unit time: " + ", ".join(
            _number(v) for v in np.diag(noise)
        )
    else:
        facts["noise"] = "none (deterministic)"
    parts.append(_key_value_table(facts))
    return _section("equations", "Equations", "".join(parts))


def _settings_section(
    surrogate: Any, fit_summary: Mapping[str, Any] | None
) -> tuple[str, str, str] | None:
    settings = _as_dict(_field(surrogate, "settings"))
    summary = _as_dict(fit_summary)
    if not settings and not summary:
        return None
    parts = []
    if summary:
        parts.append("<h3>Fit summary</h3>" + _key_value_table(summary))
    if settings:
        parts.append("<h3>Settings stored in the model</h3>" + _key_value_table(settings))
    return _section("fit", "Fit settings", "".join(parts))


def _candidate_rows(selection: Any) -> tuple[list[dict[str, Any]], int | None]:
    """Candidates of a sweep as plain dicts, and the row position of the chosen one if known.

    Accepts a :class:`ergodex.fitting.selection.SelectionResult` (its ``front``: candidates by
    number of terms; ``chosen`` is a candidate's ``index``), its ``to_dict()`` form, or a plain
    list of candidate records.
    """
    if isinstance(selection, Mapping):
        front = selection.get("front", selection.get("candidates", []))
        chosen = selection.get("chosen_index", selection.get("chosen"))
    elif isinstance(selection, Sequence) and not isinstance(selection, str):
        front, chosen = selection, None
    else:
        front = _field(selection, "front", None)
        if front is None:
            front = _field(selection, "candidates", [])
        chosen = _field(selection, "chosen_index", _field(selection, "chosen"))
    rows = []
    for candidate in front or []:
        record = _as_dict(candidate)
        row: dict[str, Any] = {}
        for key, value in record.items():
            if key in ("model_json", "scorecard"):
                continue  # the whole model and scorecard: far too long for a table cell
            if key == "reasons" and isinstance(value, (list, tuple)):
                value = "; ".join(str(v) for v in value)
            if (
                isinstance(value, (int, float, str, bool, np.integer, np.floating))
                or value is None
                or isinstance(value, Mapping)
            ):
                row[key] = value
        rows.append(row)
    if isinstance(chosen, bool) or not isinstance(chosen, (int, np.integer)):
        chosen = None
    position = None
    if chosen is not None:
        if rows and all("index" in row for row in rows):
            position = next((i for i, row in enumerate(rows) if row["index"] == chosen), None)
        elif 0 <= chosen < len(rows):
            position = int(chosen)
    return rows, position


def _selection_section(selection: Any, tolerance: Any) -> tuple[str, str, str] | None:
    if selection is None:
        return None
    rows, chosen = _candidate_rows(selection)
    if not rows:
        return None
    columns: list[str] = []
    for row in rows:
        for key in row:
            if key not in columns:
                columns.append(key)
    head = "".join(f"<th>{_esc(c.replace('_', ' '))}</th>" for c in columns)
    body = []
    for i, row in enumerate(rows):
        cells = []
        for c in columns:
            value = row.get(c)
            if isinstance(value, (float, np.floating)):
                cells.append(f'<td class="num">{_number(value)}</td>')
            elif c == "verdict":
                cells.append(f'<td class="verdict-cell {_esc(value)}">{_esc(value)}</td>')
            else:
                cells.append(f"<td>{_value_text(value)}</td>")
        mark = ' class="chosen"' if i == chosen else ""
        body.append(f"<tr{mark}>{''.join(cells)}</tr>")
    message = _field(selection, "message", "") if not isinstance(selection, Sequence) else ""
    parts = [
        "<p>Candidates tried in the sweep, simplest first; the chosen one is highlighted."
        + (f" {_esc(message)}" if message else "")
        + "</p>"
    ]
    x_key = next((k for k in ("n_terms", "complexity") if k in columns), None)
    y_key = next(
        (k for k in ("statistical_score", "largest_ratio", "score", "ratio") if k in columns), None
    )
    if x_key and y_key:

        def number(v: Any) -> float:
            try:
                return float(v)
            except (TypeError, ValueError):
                return float("nan")

        x = np.array([number(r.get(x_key)) for r in rows])
        y = np.array([number(r.get(y_key)) for r in rows])
        if np.any(np.isfinite(x) & np.isfinite(y)):
            tol = number(tolerance) if tolerance is not None else None
            parts.append(
                _figure(
                    figures.selection_figure(
                        x,
                        y,
                        chosen,
                        complexity_label=x_key.replace("_", " "),
                        score_label=y_key.replace("_", " ") + " (ratio to noise floor)"
                        if y_key == "statistical_score"
                        else y_key.replace("_", " "),
                        tolerance=tol,
                    ),
                    "selection front: number of terms against check score",
                    "Candidates of the sweep.",
                )
            )
    parts.append(
        f'<table class="front"><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'
    )
    return _section("selection", "Selection", "".join(parts))


def _provenance_section(scorecard: Any, surrogate: Any) -> tuple[str, str, str]:
    card = {}
    for key in (
        "model_fingerprint",
        "data_fingerprint",
        "fingerprints",
        "created",
        "ergodex_version",
    ):
        value = _field(scorecard, key)
        if value not in (None, "", {}):
            card[key.replace("_", " ")] = value
    spec = _as_dict(_field(scorecard, "spec"))
    if "seed" in spec:
        card["seed"] = spec["seed"]
    parts = ["<h3>Check</h3>" + _key_value_table(card)]
    if spec:
        parts.append(
            "<h3>Check settings (enough to repeat the check exactly)</h3>" + _key_value_table(spec)
        )
    derived = _as_dict(_field(scorecard, "settings"))
    if derived:
        parts.append(
            "<h3>Settings the check derived from the data</h3>" + _key_value_table(derived)
        )
    model = {}
    try:
        model["model fingerprint (now)"] = surrogate.fingerprint()
    except Exception:  # noqa: BLE001 - provenance is best effort, the rest must still render
        pass
    model.update(_as_dict(_field(surrogate, "provenance")))
    if model:
        parts.append("<h3>Model</h3>" + _key_value_table(model))
    parts.append(
        "<h3>Report</h3>"
        + _key_value_table(
            {
                "written by": f"ergodex {__version__}",
                "written at": _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%d %H:%M:%S UTC"),
            }
        )
    )
    return _section("provenance", "Provenance", "".join(parts))


# ----------------------------------------------------------------------------------------------
# The page
# ----------------------------------------------------------------------------------------------

_STYLE = """
:root { --ref: #0072B2; --band: #9CC7E4; --surr: #E69F00; --pass: #009E73; --fail: #D55E00;
        --ink: #222; --muted: #666; --rule: #ddd; --paper: #fff; --tint: #f6f7f8; }
* { box-sizing: border-box; }
html { background: var(--tint); }
body { margin: 0 auto; max-width: 1100px; padding: 1.2rem 1.6rem 3rem; background: var(--paper);
       color: var(--ink); font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto,
       "Helvetica Neue", Arial, sans-serif; }
h1 { font-size: 1.55rem; margin: 0.2rem 0 0.1rem; font-weight: 600; }
h2 { font-size: 1.2rem; margin: 2rem 0 0.5rem; padding-bottom: 0.2rem;
     border-bottom: 1px solid var(--rule); font-weight: 600; }
h3 { font-size: 1rem; margin: 1.2rem 0 0.4rem; font-weight: 600; }
p { margin: 0.4rem 0 0.6rem; max-width: 75ch; }
.subtitle, .muted { color: var(--muted); }
code { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 0.92em; }
.banner { margin: 1rem 0; padding: 0.8rem 1.1rem; border-left: 8px solid var(--muted);
          background: var(--tint); }
.banner.pass { border-color: var(--pass); background: #e9f6f1; }
.banner.fail { border-color: var(--fail); background: #fbeee6; }
.banner p { margin: 0.15rem 0; }
.verdict-line { font-size: 1.35rem; }
.verdict-line strong { text-transform: uppercase; letter-spacing: 0.06em; }
.banner.pass .verdict-line strong { color: #00664a; }
.banner.fail .verdict-line strong { color: #a2400a; }
.banner.inconclusive .verdict-line strong { color: #6b5300; }
.reasons { margin: 0.4rem 0 0.2rem 1.1rem; padding: 0; }
.banner details { margin-top: 0.2rem; font-size: 0.92rem; }
.banner summary { cursor: pointer; color: var(--muted); }
.caution { border: 1px solid #c9b26b; background: #fdf9ea; padding: 0.6rem 1rem; margin: 1rem 0; }
.caution p { margin: 0; max-width: none; }
nav.toc { font-size: 0.92rem; margin: 0.5rem 0 0; }
nav.toc a { color: var(--ref); margin-right: 0.9rem; text-decoration: none; white-space: nowrap; }
nav.toc a:hover { text-decoration: underline; }
table { border-collapse: collapse; margin: 0.4rem 0 0.8rem; font-size: 0.92rem; }
th, td { padding: 0.28rem 0.7rem; border-bottom: 1px solid var(--rule); text-align: left;
         vertical-align: top; }
thead th { border-bottom: 2px solid #bbb; font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { font-weight: 500; color: var(--muted); white-space: nowrap; }
table.kv td { overflow-wrap: anywhere; }
table.scorecard { width: 100%; }
tr.row-fail td { background: #fbeee6; }
tr.row-fail td:first-child { box-shadow: inset 4px 0 0 var(--fail); }
td.verdict-cell { font-weight: 600; text-transform: uppercase; font-size: 0.85rem; }
td.verdict-cell.pass { color: #00664a; }
td.verdict-cell.fail { color: #a2400a; }
.gauge { display: inline-block; width: 70px; height: 8px; margin-left: 0.4rem;
         background: linear-gradient(to right, transparent 49%, #888 49%, #888 51%, transparent 51%),
                     #eee; vertical-align: middle; position: relative; }
.gauge .fill { display: block; height: 100%; background: var(--pass); }
.gauge .fill.fail { background: var(--fail); }
table.front tr.chosen td { background: #fff4dc; font-weight: 600; }
figure { margin: 0.8rem 0 1.2rem; }
figure img { display: block; max-width: 100%; height: auto; }
figure.wide img { width: 100%; }
figcaption { color: var(--muted); font-size: 0.88rem; margin-top: 0.2rem; }
.key { font-size: 0.9rem; color: var(--muted); }
.swatch { display: inline-block; width: 1.6em; height: 0.7em; margin: 0 0.35em 0 0.9em;
          vertical-align: middle; }
.swatch.ref { background: var(--ref); height: 3px; }
.swatch.band { background: var(--band); }
.swatch.surr { height: 0; border-top: 3px dashed var(--surr); }
.key .swatch:first-child { margin-left: 0; }
ul.equations { list-style: none; padding: 0; margin: 0.4rem 0 0.8rem; }
ul.equations li { margin: 0.2rem 0; }
.alert { color: #a2400a; font-weight: 500; }
footer { margin-top: 2.5rem; padding-top: 0.6rem; border-top: 1px solid var(--rule);
         color: var(--muted); font-size: 0.85rem; }
@media (max-width: 700px) { body { padding: 0.8rem; font-size: 14px; } .gauge { display: none; } }
@media print {
  @page { size: A4; margin: 14mm; }
  html, body { background: #fff; }
  body { max-width: none; padding: 0; font-size: 10.5pt; }
  nav.toc { display: none; }
  * { -webkit-print-color-adjust: exact; print-color-adjust: exact; }
  h2 { break-after: avoid; page-break-after: avoid; }
  figure, tr, .banner, .caution { break-inside: avoid; page-break-inside: avoid; }
  figure img { max-height: 240mm; }
  a { color: inherit; text-decoration: none; }
}
"""  # noqa: E501


def render_report(
    result: Any,
    surrogate: Any,
    *,
    title: str | None = None,
    fit_summary: Mapping[str, Any] | None = None,
    selection: Any = None,
    extra_sections: Sequence[tuple[str, str, str]] = (),
) -> str:
    """Render the validation report of one check as a self-contained HTML page.

    Parameters
    ----------
    result : ergodex.validation.CheckResult
        The check: ``result.scorecard`` (verdict, rows, reasons, blow-ups, member agreement,
        settings, fingerprints) and ``result.evidence`` (the arrays drawn in the figures). An
        evidence of ``None`` gives a page with the scorecard and model but no figures; a missing
        evidence field (no regimes, no spectra) leaves its section out.
    surrogate : ergodex.surrogate.Surrogate
        The checked model: its equations, settings and provenance are shown.
    title : str, optional
        Page title; defaults to "Validation report: <variables>".
    fit_summary : mapping, optional
        What the fit produced or used (method, settings, diagnostics), shown as a table.
    selection : ergodex.fitting.selection.SelectionResult, mapping or sequence, optional
        The candidates of a sweep (``front`` and the chosen index); shown as a table, and as a
        complexity-against-score plot when the candidates carry such numbers.
    extra_sections : sequence of (anchor, heading, html), optional
        Sections drawn right after the scorecard (e.g. the maps of a gridded field's check).

    Returns
    -------
    str
        The complete HTML document. Needs no network, script, font or other file to display.

    Raises
    ------
    SettingsError
        ``result`` carries no scorecard with a verdict.
    """
    scorecard = _field(result, "scorecard")
    if scorecard is None or _field(scorecard, "verdict") is None:
        raise SettingsError(
            "render_report needs a check result with a scorecard (e.g. from "
            f"ergodex.validation.check); got {type(result).__name__}"
        )
    evidence = _field(result, "evidence")
    names = _variable_names(evidence, surrogate)
    if title is None:
        title = "Validation report: " + ", ".join(names) if names else "Validation report"
    sections: list[tuple[str, str, str]] = [_scorecard_section(scorecard), *extra_sections]
    if evidence is not None:
        sections.extend(_distribution_sections(evidence, names))
        regime = _regime_section(evidence)
        if regime is not None:
            sections.append(regime)
        projection = _projection_section(evidence, names)
        if projection is not None:
            sections.append(projection)
    sections.append(_stability_section(scorecard, evidence))
    sections.append(_model_section(surrogate))
    fit = _settings_section(surrogate, fit_summary)
    if fit is not None:
        sections.append(fit)
    tolerance = _as_dict(_field(scorecard, "spec")).get("tolerance")
    chosen = _selection_section(selection, tolerance)
    if chosen is not None:
        sections.append(chosen)
    sections.append(_provenance_section(scorecard, surrogate))

    toc = " ".join(f'<a href="#{anchor}">{_esc(heading)}</a>' for anchor, heading, _ in sections)
    missing_evidence = (
        '<p class="muted">No evidence arrays were stored with this check, so the report shows '
        "the scorecard without figures.</p>"
        if evidence is None
        else ""
    )
    created = _field(scorecard, "created")
    subtitle_bits = []
    if names:
        subtitle_bits.append("variables: " + ", ".join(names))
    kind = _field(surrogate, "kind")
    if kind:
        subtitle_bits.append(f"model kind: {kind}")
    if created:
        subtitle_bits.append(f"checked {created}")
    subtitle = _esc(" \u00b7 ".join(subtitle_bits))
    caution = (
        f'<div class="caution" role="note"><p><strong>Caution.</strong> {_esc(CAUTION)}</p></div>'
    )
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        # No request may leave the page: forbid every fetch except inline data.
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; '
        "img-src data:; style-src 'unsafe-inline'\">"
        f"<title>{_esc(title)}</title><style>{_STYLE}</style></head><body>"
        f'<header><h1>{_esc(title)}</h1><p class="subtitle">{subtitle}</p>'
        f"{_verdict_banner(scorecard)}{caution}"
        f'<nav class="toc" aria-label="contents">{toc}</nav></header><main>{missing_evidence}'
        + "".join(body for _, _, body in sections)
        + f"</main><footer><p>{_esc(CAUTION)}</p><p>Written by ergodex {_esc(__version__)}."
        "</p></footer></body></html>\n"
    )


def write_report(path: str | os.PathLike[str], result: Any, surrogate: Any, **kwargs: Any) -> Path:
    """Render the report and write it to ``path`` atomically; return the path written.

    The page is written to a temporary file in the target folder and moved into place with
    :func:`os.replace`, so a reader never sees half a page and an interrupted write leaves the
    previous file intact. Keyword arguments go to :func:`render_report`.
    """
    target = Path(path)
    page = render_report(result, surrogate, **kwargs)  # render first: nothing is written on error
    from ergodex.files import atomic_write_text

    return atomic_write_text(target, page)
