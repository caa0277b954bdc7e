"""The validation report: one self-contained HTML page a modeller can read in a minute.

:func:`render_report` turns a :class:`~ergodex.validation.CheckResult` and the checked surrogate
into a page with the verdict, the scorecard (failing rows first), figures of reference against
surrogate statistics, the equations, the settings and the provenance; :func:`write_report` writes
it atomically. Figures live in :mod:`ergodex.report.figures`, the sections in
:mod:`ergodex.report.sections` (built from :mod:`ergodex.report.markup`), the page in
:mod:`ergodex.report.html`.
"""

from __future__ import annotations

from ergodex.report.html import CAUTION, render_report, write_report

__all__ = ["CAUTION", "render_report", "write_report"]
