"""The sections of the validation report, one function each: verdict banner, scorecard,
distributions, regimes, projection, stability, model, fit settings, selection and provenance.

Each returns ``(anchor, heading, html)`` (or None when its evidence is missing);
:func:`ergodex.report.html.render_report` puts them in order on the page.
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ergodex import __version__
from ergodex.report import figures
from ergodex.report.markup import (
    _MISSING,
    _array,
    _as_dict,
    _by_variable,
    _esc,
    _field,
    _figure,
    _key_value_table,
    _number,
    _section,
    _value_text,
)

_BANNER_REASONS = 4


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
    threshold = _field(scorecard, "threshold", None) or {}
    if threshold:
        from ergodex.validation import threshold_line

        detail += " " + str(threshold_line(threshold)) + "."
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
