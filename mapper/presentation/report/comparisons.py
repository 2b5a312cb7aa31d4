"""The comparisons as compact tables, with a sentence for the notable ones only.

Three kinds are recognised by their fields: repeats at one level (``consistent``), up
against down steps (``up``, ``down``) and one campaign against another (``campaign_a``,
``campaign_b``). Anything else is listed by level and parameter with its sentence.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from mapper.presentation.report.page import Page, esc, table
from mapper.presentation.report.texts import PARAMETER_LABELS, label, value_text


def _kind(item: Mapping[str, Any]) -> str:
    if "campaign_a" in item or "value_a" in item:
        return "campaigns"
    if "up" in item and "down" in item:
        return "directions"
    if "consistent" in item or "test_ids" in item:
        return "repeats"
    return str(item.get("kind") or "other")


def notable(item: Mapping[str, Any]) -> bool:
    """A comparison worth a sentence: repeats that disagree, a difference beyond the 95 %
    uncertainty, a parameter that moved between campaigns."""
    if item.get("notable") is not None:
        return bool(item.get("notable"))
    if "parameter" in item and item.get("parameter") is None:
        return True  # a finding about the whole comparison (e.g. no shared range)
    if "consistent" in item:
        return item.get("consistent") is False
    for key in ("differs", "moved", "significant"):
        if key in item:
            return bool(item.get(key))
    return False


def _parameter(item: Mapping[str, Any]) -> str:
    name = item.get("parameter")
    return "all parameters" if name is None else PARAMETER_LABELS.get(str(name), label(str(name)))


def _z(item: Mapping[str, Any]) -> str:
    try:
        z = float(item.get("z"))  # type: ignore[arg-type]  # None and text fall through
    except (TypeError, ValueError):
        return ""
    return f" ({abs(z):.1f} standard errors)" if math.isfinite(z) else ""


def _significance(item: Mapping[str, Any]) -> str:
    return ("beyond the 95 % uncertainty" if notable(item) else "inside the uncertainty") + _z(item)


def _percent(value: Any) -> str:
    try:
        x = float(value)
    except (TypeError, ValueError):
        return ""
    return f"{100 * x:+.0f} %" if math.isfinite(x) else ""


def _p_text(p: Any) -> str:
    if not isinstance(p, (int, float)) or isinstance(p, bool) or not math.isfinite(p):
        return ""
    return " (p < 0.001)" if p < 0.001 else f" (p {p:.2g})"


def _repeat_rows(items: Sequence[Mapping[str, Any]]) -> str:
    rows = []
    for item in items:
        p = item.get("p_value")
        spread = "consistent with the intervals" if item.get("consistent") else "wider than the intervals"
        rows.append((item.get("level"), value_text(item.get("direction")), _parameter(item),
                     item.get("n_tests"), item.get("min"), item.get("max"),
                     spread + _p_text(p)))
    return table(["Level", "Step", "Parameter", "Tests", "Lowest", "Highest", "Significance"], rows)


def _direction_rows(items: Sequence[Mapping[str, Any]]) -> str:
    rows = [(item.get("level"), _parameter(item), item.get("up"), item.get("down"),
             item.get("difference"), _significance(item)) for item in items]
    return table(["Level", "Parameter", "Up steps", "Down steps", "Difference", "Significance"], rows)


def _campaign_rows(items: Sequence[Mapping[str, Any]]) -> str:
    rows = [(item.get("level"), _parameter(item), item.get("value_a"), item.get("value_b"),
             _percent(item.get("change")), _significance(item)) for item in items]
    return table(["Level", "Parameter", "Older campaign", "Newer campaign", "Difference",
                  "Significance"], rows)


def _other_rows(items: Sequence[Mapping[str, Any]]) -> str:
    rows = [(item.get("level"), _parameter(item), str(item.get("sentence") or ""))
            for item in items]
    return table(["Level", "Parameter", "Finding"], rows)


_KINDS = (
    ("repeats", "Repeated tests at one level", _repeat_rows),
    ("directions", "Up against down steps", _direction_rows),
    ("campaigns", "Against another campaign", _campaign_rows),
)


def comparisons_section(page: Page, comparisons: Sequence[Mapping[str, Any]] | None) -> None:
    """One compact table per kind; below each, the sentences of the notable rows only."""
    page.add('<section id="comparisons"><h2>Comparisons</h2>')
    if not comparisons:
        page.add('<p class="muted">No comparisons were made.</p></section>')
        return
    groups: dict[str, list[Mapping[str, Any]]] = {}
    for item in comparisons:
        groups.setdefault(_kind(item), []).append(item)
    known = {kind for kind, _, _ in _KINDS}
    order = [k for k in _KINDS if k[0] in groups]
    order += [(kind, "Other findings", _other_rows) for kind in groups if kind not in known]
    for kind, heading, render in order:
        items = groups[kind]
        page.add(f"<h3>{esc(heading)}</h3>")
        if kind == "campaigns":
            first = items[0]
            page.add(f'<p class="muted">Older: {esc(first.get("campaign_a"))}; newer: '
                     f"{esc(first.get('campaign_b'))}.</p>")
        page.add(render(items))
        sentences = [str(i.get("sentence") or "") for i in items if notable(i) and i.get("sentence")]
        if sentences:
            page.add('<ul class="notable">' + "".join(f"<li>{esc(s)}</li>" for s in sentences) + "</ul>")
        else:
            page.add('<p class="muted">Nothing notable: every difference is inside the uncertainty.</p>')
    page.add("</section>")
