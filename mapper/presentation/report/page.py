"""The page being written: HTML escaping, safe JSON, tables, and the chart elements.

Safety of the page: every name and note that came from user files is escaped as text
(:func:`html.escape`), and chart specifications are embedded as JSON with ``<``, ``>``
and ``&`` written as ``\\u003c``, ``\\u003e``, ``\\u0026``, so a note cannot close the
script element or inject markup.
"""

from __future__ import annotations

import functools
import html
import json
import math
from collections.abc import Iterable, Sequence
from importlib import resources
from typing import IO, TYPE_CHECKING, Any

if TYPE_CHECKING:
    from mapper.presentation.png_export import PngExport


@functools.lru_cache(maxsize=8)
def asset(name: str) -> str:
    """Text of a file shipped in ``mapper/presentation/report/assets`` (CSS, JavaScript)."""
    return resources.files("mapper.presentation.report").joinpath("assets", name).read_text(encoding="utf-8")


def safe_json(spec: Any) -> str:
    """JSON text safe inside an HTML ``<script>`` element.

    ``<``, ``>`` and ``&`` (which JSON allows only inside strings) become unicode escapes,
    so no string can close the element or open a comment; JSON.parse restores them.
    """
    text = json.dumps(spec, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    for raw, escaped in (("<", "\\u003c"), (">", "\\u003e"), ("&", "\\u0026"),
                         ("\u2028", "\\u2028"), ("\u2029", "\\u2029")):
        text = text.replace(raw, escaped)
    return text


def esc(value: Any) -> str:
    """The value as HTML text, escaped; None as the empty string, booleans as yes / no."""
    if isinstance(value, bool):
        return "yes" if value else "no"
    return html.escape("" if value is None else str(value), quote=True)


def num(value: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant digits, "–" when not finite, text otherwise.

    Booleans read "yes" / "no" and None reads as nothing: no Python value reaches the page.
    """
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return ""
    try:
        x = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if not math.isfinite(x):
        return "–"
    return f"{x:.{digits}g}"


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]]) -> str:
    """An HTML table; numbers right-aligned with four significant digits."""
    head = "".join(f"<th>{esc(h)}</th>" for h in headers)
    body = []
    for row in rows:
        cells = []
        for cell in row:
            numeric = isinstance(cell, (int, float)) and not isinstance(cell, bool)
            cells.append(f'<td class="num">{num(cell)}</td>' if numeric else f"<td>{esc(cell)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


class Page:
    """Writes HTML parts to a file as they come; a chart's PNG is handed on at once too.

    Nothing of a chart is kept after it is written, so the report of a long campaign
    needs no more memory than that of a short one.
    """

    def __init__(self, sink: IO[str], pngs: PngExport | None = None) -> None:
        self.sink = sink
        self.pngs = pngs
        self.n_charts = 0
        self._next_id = 0

    def add(self, text: str) -> None:
        self.sink.write(text)

    def reserve(self) -> str:
        """An element id for a chart that will be written later (ids follow page order)."""
        spec_id = f"spec-{self._next_id}"
        self._next_id += 1
        return spec_id

    def chart(self, name: str, chart: Any, label: str, *, spec_id: str | None = None) -> None:
        """Embed an altair chart or a Vega-Lite dict (and write its PNG when asked)."""
        spec = chart if isinstance(chart, dict) else chart.to_dict(validate=False)
        self.embed(label, [safe_json(spec)], spec_id=spec_id)
        if self.pngs is not None:
            self.pngs.add(name, spec)

    def embed(self, label: str, json_parts: Iterable[str], *, spec_id: str | None = None) -> None:
        """Write a chart's element and its specification, given as pieces of JSON text."""
        spec_id = spec_id or self.reserve()
        self.n_charts += 1
        self.add(f'<div class="chart" role="img" aria-label="{esc(label)}" data-spec="{spec_id}"></div>'
                 f'<script type="application/json" id="{spec_id}">')
        for part in json_parts:
            self.add(part)
        self.add("</script>")
