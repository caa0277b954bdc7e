"""How ergodex objects show themselves: one-line reprs and small HTML tables for notebooks.

A ``Scorecard`` (or ``CheckResult``), a ``Surrogate`` and a registry ``VersionInfo`` in a notebook
cell show a short table, not a dump of every field; ``repr`` is one line. The classes call these
functions from their ``__repr__`` and ``_repr_html_`` so that the formatting lives in one place.
"""

from __future__ import annotations

import html
import math
from typing import Any

__all__ = ["scorecard_repr", "scorecard_html", "surrogate_html", "version_repr", "version_html"]

#: At most this many rows of a scorecard go into its HTML table (the failing ones first).
MAX_ROWS = 24
#: At most this many equations go into a surrogate's HTML table.
MAX_EQUATIONS = 12

_STYLE = "border-collapse:collapse;font-size:12px;font-family:system-ui,sans-serif;margin:2px 0"
_CELL = "padding:2px 8px;border-bottom:1px solid #ddd;text-align:left"
_COLOURS = {
    "pass": "#1b7a3a",
    "fail": "#b3261e",
    "inconclusive": "#6b5300",
    "accepted": "#1b7a3a",
    "rejected": "#b3261e",
}


def _esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _number(x: Any) -> str:
    if x is None:
        return "n/a"
    x = float(x)
    if math.isnan(x):
        return "n/a"
    if math.isinf(x):
        return "inf"
    return f"{x:.3g}"


def _short_hash(fingerprint: Any) -> str:
    text = str(fingerprint or "")
    return text[:19] + "…" if len(text) > 20 else text


def _badge(word: Any) -> str:
    colour = _COLOURS.get(str(word), "#555")
    return (
        f'<span style="color:white;background:{colour};padding:1px 6px;border-radius:3px;'
        f'font-weight:600">{_esc(str(word).upper())}</span>'
    )


def _table(rows: list[tuple[str, str]]) -> str:
    """Two-column table: escaped labels, values already HTML."""
    body = "".join(
        f'<tr><th style="{_CELL}">{_esc(k)}</th><td style="{_CELL}">{v}</td></tr>' for k, v in rows
    )
    return f'<table style="{_STYLE}">{body}</table>'


def _caution() -> str:
    from ergodex import CAUTION

    return f'<p style="font-size:11px;color:#555;max-width:60em">Caution: {_esc(CAUTION)}</p>'


# --- scorecards ----------------------------------------------------------------------------------
def _worst(card: Any) -> Any:
    rows = [r for r in card.rows if not math.isnan(r.ratio)]
    return max(rows, key=lambda r: r.ratio) if rows else None


def scorecard_repr(card: Any) -> str:
    """One line: verdict, number of rows, the largest ratio and where, blow-ups, fingerprints."""
    worst = _worst(card)
    where = f" ({worst.statistic} {worst.variable})" if worst is not None else ""
    blown = card.blowups.get("count", 0)
    return (
        f"Scorecard(verdict={card.verdict!r}, rows={len(card.rows)}, "
        f"largest_ratio={_number(card.largest_ratio)}{where}, "
        f"blowups={blown}/{card.spec.members}, model={_short_hash(card.model_fingerprint)})"
    )


def _threshold_text(card: Any) -> str:
    """The threshold the largest ratio was held to, and the false-reject rate it targets."""
    th = getattr(card, "threshold", None) or {}
    if th.get("false_reject_rate") is not None:
        return (
            f"threshold {_number(th.get('threshold'))} "
            f"(false-reject rate {100 * float(th['false_reject_rate']):g} %)"
        )
    return f"tolerance {_number(th.get('threshold', card.spec.tolerance))}"


def scorecard_html(card: Any) -> str:
    """Verdict, reasons, the rows (failing and largest ratios first), blow-ups and the caution."""
    worst = _worst(card)
    head = (
        f"<div><b>Scorecard</b> {_badge(card.verdict)} largest ratio "
        f"<b>{_esc(_number(card.largest_ratio))}</b>"
        + (f" ({_esc(worst.statistic)} {_esc(worst.variable)})" if worst is not None else "")
        + f"; {_esc(_threshold_text(card))}</div>"
    )
    reasons = "".join(f"<li>{_esc(r)}</li>" for r in card.reasons[:5])
    reasons = f'<ul style="margin:2px 0">{reasons}</ul>' if reasons else ""

    def order(row: Any) -> tuple:
        ratio = -1.0 if math.isnan(row.ratio) else row.ratio
        return (row.verdict != "fail", -ratio)

    rows = sorted(card.rows, key=order)
    header = "".join(
        f'<th style="{_CELL}">{h}</th>'
        for h in ("statistic", "variable", "value", "noise floor", "ratio", "tolerance", "verdict")
    )
    body = "".join(
        f'<tr><td style="{_CELL}">{_esc(r.statistic)}</td><td style="{_CELL}">'
        f"{_esc(r.variable)}</td>"
        + "".join(
            f'<td style="{_CELL}">{_esc(_number(x))}</td>'
            for x in (r.value, r.noise_floor, r.ratio, r.tolerance)
        )
        + f'<td style="{_CELL};color:{_COLOURS.get(r.verdict, "#555")}">{_esc(r.verdict)}</td>'
        "</tr>"
        for r in rows[:MAX_ROWS]
    )
    more = (
        f'<p style="font-size:11px">… and {len(rows) - MAX_ROWS} more rows '
        "(<code>scorecard.table()</code> lists them all)</p>"
        if len(rows) > MAX_ROWS
        else ""
    )
    agreement = card.member_agreement or {}
    from ergodex.validation import power_lines

    power = [
        ("record" if k == 0 else "detects", _esc(line.split(": ", 1)[1]))
        for k, line in enumerate(power_lines(getattr(card, "power", {}) or {}))
    ]
    facts = _table(
        power
        + [
            ("blow-ups", _esc(f"{card.blowups.get('count', 0)} of {card.spec.members} members")),
            (
                "member agreement",
                _esc(
                    f"{agreement.get('verdict', 'n/a')} (ratio {_number(agreement.get('ratio'))})"
                ),
            ),
            ("model", f"<code>{_esc(_short_hash(card.model_fingerprint))}</code>"),
            ("data", f"<code>{_esc(_short_hash(card.data_fingerprint))}</code>"),
            ("created", _esc(card.created)),
        ]
    )
    table = f'<table style="{_STYLE}"><tr>{header}</tr>{body}</table>'
    return f"<div>{head}{reasons}{table}{more}{facts}{_caution()}</div>"


# --- surrogates ----------------------------------------------------------------------------------
def surrogate_html(surrogate: Any) -> str:
    """Kind, variables, terms, noise, transform, fingerprint and the first equations."""
    import numpy as np

    equations = surrogate.equations()
    shown = "\n".join(equations[:MAX_EQUATIONS])
    if len(equations) > MAX_EQUATIONS:
        shown += f"\n… {len(equations) - MAX_EQUATIONS} more (surrogate.equations())"
    transform = surrogate.transform
    provenance = surrogate.provenance
    facts = [
        ("kind", _esc(surrogate.kind)),
        ("variables", _esc(", ".join(surrogate.variables))),
        (
            "terms",
            _esc(
                f"{int(np.count_nonzero(surrogate.coefficients))} non-zero of "
                f"{surrogate.coefficients.size}"
            ),
        ),
        ("noise", "stochastic" if surrogate.is_stochastic else "none (deterministic)"),
        ("transform", _esc(type(transform).__name__) if transform is not None else "none"),
        (
            "fitted on",
            _esc(
                f"{provenance.get('fitted_on_runs', '?')} runs, "
                f"{provenance.get('fitted_on_samples', '?')} samples, "
                f"dt={provenance.get('dt', '?')}"
            )
            if provenance
            else "n/a",
        ),
        ("fingerprint", f"<code>{_esc(_short_hash(surrogate.fingerprint()))}</code>"),
    ]
    return (
        f"<div><b>Surrogate</b>{_table(facts)}"
        f'<pre style="font-size:11px;margin:2px 0">{_esc(shown)}</pre></div>'
    )


# --- registry versions ---------------------------------------------------------------------------
def version_repr(info: Any) -> str:
    """One line: reference, status, verdict, creation time."""
    return (
        f"VersionInfo({info.ref!r}, status={info.status!r}, verdict={info.verdict!r}, "
        f"created={info.created!r})"
    )


def version_html(info: Any) -> str:
    """Reference, status, verdict, lineage, data and model fingerprints, folder."""
    facts = [
        ("status", _badge(info.status)),
        ("verdict", _badge(info.verdict) if info.verdict else "no scorecard"),
        ("created", _esc(info.created)),
        ("parent", _esc(info.parent or "none")),
        ("note", _esc(info.note or "")),
        ("model", f"<code>{_esc(_short_hash(info.model_fingerprint))}</code>"),
        ("data", f"<code>{_esc(_short_hash(info.data_fingerprint))}</code>"),
        ("folder", f"<code>{_esc(info.folder)}</code>"),
        ("artifacts", _esc(", ".join(sorted(info.artifacts)))),
    ]
    return f"<div><b>{_esc(info.ref)}</b>{_table(facts)}</div>"
