"""Self-contained HTML report of a campaign, and PNG copies of its charts.

Owns the report layout and the embedding of charts. The HTML file carries everything
inline: styles, the chart specifications and the Vega, Vega-Lite and Vega-Embed
JavaScript (bundled by vl-convert), so it opens on a machine with no network and can be
filed in a commissioning record as one file.

The page is streamed: written to a temporary file beside the target as it is made and
renamed at the end, with tests taken one at a time from any iterable, so a campaign of
thousands of tests needs no more memory than one of a few.

Layout
------
:mod:`.document`
    :func:`write_report`: the head, the sections in order, the atomic write.
:mod:`.sections`, :mod:`.cards`
    One function per section of the page.
:mod:`.page`
    Escaping, safe JSON, tables and chart elements.
:mod:`.texts`
    Methods with their sources, safety cautions.
:mod:`.vega`
    vl-convert: the JavaScript bundle and PNG export.
``assets/``
    The page's CSS and JavaScript, shipped as package data.
"""

from __future__ import annotations

from mapper.presentation.report.cards import test_sort_key
from mapper.presentation.report.document import ReportInfo, write_report
from mapper.presentation.report.page import safe_json
from mapper.presentation.report.texts import CAUTIONS, METHOD_NOTES
from mapper.presentation.report.vega import javascript_bundle, write_pngs

__all__ = [
    "CAUTIONS",
    "METHOD_NOTES",
    "ReportInfo",
    "javascript_bundle",
    "safe_json",
    "test_sort_key",
    "write_pngs",
    "write_report",
]
