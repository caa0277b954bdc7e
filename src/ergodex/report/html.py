"""Assemble the validation report: one self-contained HTML page from a check result.

The page needs no network and no other file: styles are inline, figures are SVG documents embedded
as ``data:`` URIs in ``<img>`` elements, and there is no script at all. Every string that comes from
a user (variable and regime names, notes, settings, titles) passes through :func:`html.escape`.
Sections whose evidence is missing (no regimes defined, no spectra computed) are left out.
The sections are drawn in :mod:`ergodex.report.sections` from the pieces in
:mod:`ergodex.report.markup`; this module holds the page around them (style, header, order).
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from ergodex import CAUTION, __version__
from ergodex.exceptions import SettingsError
from ergodex.report.markup import _as_dict, _esc, _field
from ergodex.report.sections import (
    _distribution_sections,
    _model_section,
    _projection_section,
    _provenance_section,
    _regime_section,
    _scorecard_section,
    _selection_section,
    _settings_section,
    _stability_section,
    _variable_names,
    _verdict_banner,
)

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
