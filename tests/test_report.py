"""The validation report, rendered from real checks of the convection-loop scenario."""

from __future__ import annotations

import base64
import dataclasses
import html
import html.parser
import math
import re
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from ergodex.exceptions import SettingsError
from ergodex.report import CAUTION, render_report, write_report
from report_support import loop_check, loop_page


class _Page(html.parser.HTMLParser):
    """Collects the tags, attributes and scorecard rows of a report page."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[tuple[str, dict[str, str | None]]] = []
        self.section_ids: list[str] = []
        self.rows: list[list[str]] = []
        self._in_scorecard = False
        self._row: list[str] | None = None
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        if tag == "section" and attributes.get("id"):
            self.section_ids.append(attributes["id"])
        if tag == "table" and "scorecard" in (attributes.get("class") or ""):
            self._in_scorecard = True
        if self._in_scorecard and tag == "tr":
            self._row = []
        if self._row is not None and tag == "td":
            self._cell = []

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None and self._row is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        if tag == "tr" and self._row is not None:
            if self._row:
                self.rows.append(self._row)
            self._row = None
        if tag == "table":
            self._in_scorecard = False

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _parse(page: str) -> _Page:
    parser = _Page()
    parser.feed(page)
    return parser


def _images(parsed: _Page) -> list[str]:
    return [attrs.get("src") or "" for tag, attrs in parsed.tags if tag == "img"]


@pytest.fixture(scope="module")
def true_model():
    return loop_check(28.0)


@pytest.fixture(scope="module")
def collapsed_model():
    return loop_check(22.0)


@pytest.fixture(scope="module")
def true_page():
    return loop_page(28.0)


def _without_figures(result):
    """The same check without its evidence arrays: the page then has no figures (and is quick)."""
    return dataclasses.replace(result, evidence=None)


def test_report_of_the_true_model_is_self_contained(true_page):
    page = true_page
    parsed = _parse(page)
    tags = {tag for tag, _ in parsed.tags}
    # Nothing that could fetch or run anything: no scripts, external styles, frames or objects.
    assert not tags & {"script", "link", "iframe", "object", "embed", "base"}
    for tag, attrs in parsed.tags:
        for name in ("src", "href"):
            value = attrs.get(name)
            if value is not None:
                assert value.startswith(("data:", "#")), (tag, name, value[:60])
    images = _images(parsed)
    # distributions, autocorrelation, spectra, regime bars, transitions, attractor projection
    assert len(images) == 6
    for src in images:
        assert src.startswith("data:image/svg+xml;base64,")
        svg = base64.b64decode(src.split(",", 1)[1]).decode("utf-8")
        root = ET.fromstring(svg.encode("utf-8"))  # well-formed SVG
        assert root.get("width") and root.get("height")
        # Inside the figures, links point within the document or carry their data inline.
        for element in root.iter():
            for key, value in element.attrib.items():
                if key.endswith("href"):
                    assert value.startswith(("#", "data:")), value[:60]


def test_report_shows_the_verdict_scorecard_and_caution(true_model, true_page):
    result, surrogate = true_model
    card = result.scorecard
    page = true_page
    parsed = _parse(page)
    verdict = re.search(r'id="verdict" data-verdict="(\w+)">(\w+)<', page)
    assert verdict is not None
    # The true equations must pass their own check (a perfect surrogate must pass).
    assert card.verdict == "pass"
    assert verdict.group(1) == verdict.group(2) == card.verdict
    assert len(parsed.rows) == len(card.rows)
    statistics = {(row[0], row[1]) for row in parsed.rows}
    assert statistics == {(r.statistic, r.variable) for r in card.rows}
    for anchor in (
        "scorecard",
        "distributions",
        "autocorrelation",
        "spectra",
        "regimes",
        "attractor",
        "stability",
        "equations",
        "provenance",
    ):
        assert anchor in parsed.section_ids
    assert html.escape(CAUTION) in page
    for equation in surrogate.equations():
        assert html.escape(equation) in page
    assert card.data_fingerprint in page and card.model_fingerprint in page


def test_failing_surrogate_puts_failing_rows_first_and_says_fail(collapsed_model):
    result, surrogate = collapsed_model
    card = result.scorecard
    assert card.verdict == "fail"
    page = loop_page(22.0)
    parsed = _parse(page)
    assert re.search(r'data-verdict="fail">fail<', page)
    verdicts = [row[-1].lower() for row in parsed.rows]
    assert "fail" in verdicts
    first_pass = verdicts.index("pass") if "pass" in verdicts else len(verdicts)
    assert all(v == "fail" for v in verdicts[:first_pass])
    assert "fail" not in verdicts[first_pass:]
    # Worst first: the first row is the failing row with the largest ratio.
    worst = max((r for r in card.rows if r.verdict == "fail"), key=lambda r: r.ratio)
    assert (parsed.rows[0][0], parsed.rows[0][1]) == (worst.statistic, worst.variable)
    assert "distributions" in parsed.section_ids


def test_failing_surrogate_curves_leave_the_reference_band(true_model, collapsed_model):
    from ergodex.report.markup import _by_variable

    # What the autocorrelation figure draws, in the layout it draws it: at rho = 22 the members
    # spiral towards the fixed points, so the surrogate's autocorrelation stays high and leaves
    # the band of the reference pieces over most lags; the true equations stay inside it.
    def outside_fraction(result):
        evidence = result.evidence
        n_lags, n_vars = evidence.acf_lags.size, evidence.variables.size
        model = _by_variable(evidence.acf_model, n_lags, n_vars)
        pieces = _by_variable(evidence.acf_reference_pieces, n_lags, n_vars)
        outside = (model < pieces.min(axis=0)) | (model > pieces.max(axis=0))
        return outside.mean(axis=1)  # per variable

    assert np.max(outside_fraction(collapsed_model[0])) > 0.5
    assert np.max(outside_fraction(true_model[0])) < 0.5


def test_rows_judged_against_a_stricter_tolerance_are_reordered(true_model):
    result, surrogate = true_model
    card = result.scorecard
    # The same measured rows, judged against a tolerance at their median ratio: about half fail.
    strict = float(np.median([r.ratio for r in card.rows]))
    rows = [
        dataclasses.replace(r, tolerance=strict, verdict="pass" if r.ratio <= strict else "fail")
        for r in card.rows
    ]
    n_fail = sum(r.verdict == "fail" for r in rows)
    assert 0 < n_fail < len(rows)
    stricter = dataclasses.replace(
        _without_figures(result), scorecard=dataclasses.replace(card, rows=rows)
    )
    parsed = _parse(render_report(stricter, surrogate))
    verdicts = [row[-1].lower() for row in parsed.rows]
    assert verdicts == ["fail"] * n_fail + ["pass"] * (len(rows) - n_fail)
    shown = [float(row[4].split()[0]) for row in parsed.rows[:n_fail]]
    assert shown == sorted(shown, reverse=True)


def test_user_strings_are_escaped(true_model):
    result, surrogate = true_model
    hostile = '<script>alert("x")</script> & <b>bold</b>'
    # Names in the page's own HTML (figures are base64 images, where markup cannot act); the
    # evidence keeps only its names so no figure is drawn and the test stays quick.
    names_only = dataclasses.replace(
        result.evidence,
        **{f.name: None for f in dataclasses.fields(result.evidence) if f.name != "variables"},
        variables=np.array([f"{v}{hostile}" for v in result.evidence.variables]),
    )
    rows = [
        dataclasses.replace(r, variable=f"{r.variable}{hostile}") for r in result.scorecard.rows
    ]
    card = dataclasses.replace(result.scorecard, rows=rows, reasons=[hostile])
    page = render_report(
        dataclasses.replace(result, evidence=names_only, scorecard=card),
        surrogate,
        title=hostile,
        fit_summary={"note": hostile, hostile: 1},
    )
    assert "<script" not in page and "<b>" not in page
    escaped = "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &lt;b&gt;bold&lt;/b&gt;"
    # title (twice), subtitle, banner reason, every scorecard row, both fit-summary cells
    assert page.count(escaped) >= 2 + 1 + 1 + len(rows) + 2
    assert "<img" not in page


def test_missing_optional_evidence_leaves_its_section_out(true_model):
    result, surrogate = true_model
    empty = np.zeros(0)
    no_extras = dataclasses.replace(
        result.evidence,
        regime_names=np.array([], dtype="<U1"),
        occupancy_reference=empty,
        occupancy_reference_pieces=np.zeros((4, 0)),
        occupancy_model=empty,
        residence_reference=empty,
        residence_model=empty,
        transitions_reference=np.zeros((0, 0)),
        transitions_model=np.zeros((0, 0)),
        psd_freq=empty,
        psd_reference=np.zeros((0, 3)),
        psd_reference_pieces=np.zeros((4, 0, 3)),
        psd_model=np.zeros((0, 3)),
        acf_lags=None,
        acf_reference=None,
        acf_reference_pieces=None,
        acf_model=None,
    )
    parsed = _parse(render_report(dataclasses.replace(result, evidence=no_extras), surrogate))
    for absent in ("regimes", "spectra", "autocorrelation"):
        assert absent not in parsed.section_ids
    assert {"distributions", "attractor"} <= set(parsed.section_ids)
    assert len(_images(parsed)) == 2

    bare = _parse(render_report(_without_figures(result), surrogate))
    assert _images(bare) == []
    assert {"scorecard", "equations", "provenance"} <= set(bare.section_ids)


def test_selection_front_is_shown_when_given(true_model, collapsed_model):
    from ergodex.fitting.selection import Candidate, SelectionResult

    result, surrogate = true_model
    # Two real candidates: the rho = 22 model and the true equations, scored by their checks.
    candidates = [
        Candidate(
            index=index,
            method="true equations",
            settings={"rho": rho},
            verdict=check.scorecard.verdict,
            n_terms=int(np.count_nonzero(model.coefficients)),
            statistical_score=check.scorecard.largest_ratio,
            reasons=list(check.scorecard.reasons[:2]),
        )
        for index, rho, (check, model) in ((0, 22, collapsed_model), (1, 28, true_model))
    ]
    selection = SelectionResult(
        candidates=candidates,
        chosen=1,
        spec=result.scorecard.spec.to_dict(),
        backend="sequential",
        data_fingerprint=result.scorecard.data_fingerprint,
        reference_fingerprint=result.scorecard.data_fingerprint,
    )
    page = render_report(_without_figures(result), surrogate, selection=selection)
    parsed = _parse(page)
    assert "selection" in parsed.section_ids
    assert len(_images(parsed)) == 1  # the front: terms against score
    rows = re.findall(r"<tr( class=\"chosen\")?><td>(\d+)</td>", page)
    # Both candidates listed; the highlighted row is candidate 1 (the true equations), found by
    # its index even though the front is ordered by number of terms.
    assert sorted(index for _, index in rows) == ["0", "1"]
    assert [index for mark, index in rows if mark] == ["1"]


def test_write_report_is_atomic_and_keeps_the_old_page_on_error(true_model, tmp_path):
    result, surrogate = true_model
    target = tmp_path / "out" / "report.html"
    written = write_report(target, _without_figures(result), surrogate, title="first")
    assert written == target
    before = target.read_text(encoding="utf-8")
    assert "<title>first</title>" in before
    with pytest.raises(SettingsError, match="scorecard"):
        write_report(target, object(), surrogate, title="second")
    assert target.read_text(encoding="utf-8") == before
    assert sorted(p.name for p in target.parent.iterdir()) == ["report.html"]


def test_report_numbers_match_the_scorecard(true_model, true_page):
    result, _ = true_model
    parsed = _parse(true_page)
    by_key = {(r.statistic, r.variable): r for r in result.scorecard.rows}
    for row in parsed.rows:
        expected = by_key[(row[0], row[1])]
        for shown, value in zip(
            row[2:6], (expected.value, expected.noise_floor, expected.ratio, expected.tolerance)
        ):
            number = float(shown.split()[0])
            # Three significant figures: relative rounding error at most 5e-3.
            assert math.isclose(number, value, rel_tol=5e-3, abs_tol=1e-12), (row, value)


def test_surrogate_that_blows_up_is_reported_not_a_crash():
    from ergodex import scenarios
    from ergodex.validation import CheckSpec, check
    from report_support import loop_reference

    # With beta = -1 the dT_up equation feeds itself (d dT_up/dt = flow dT_across + dT_up), so
    # trajectories leave any bounded region: every member must be flagged as blown up.
    surrogate = scenarios.lorenz63_surrogate(beta=-1.0)
    result = check(surrogate, loop_reference(), CheckSpec(seed=7))
    blowups = result.scorecard.blowups
    assert blowups["count"] == 16
    page = render_report(result, surrogate)
    assert 'data-verdict="fail"' in page
    assert "16 of 16 surrogate members blew up" in page
    assert "No statistic could be compared." in page
    # The reference is still drawn, with the missing surrogate said in every panel.
    assert len(_images(_parse(page))) == 4  # histograms, autocorrelation, spectra, attractor
