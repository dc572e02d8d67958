"""HTML building blocks of the training report: escaping, numbers, tables."""

from __future__ import annotations

import html
import math

from trainer.show import fmt


def esc(value) -> str:
    return html.escape(str(value))


def num(value, digits: int = 4) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        if not math.isfinite(value):
            return "∞" if value > 0 else "–"
        return fmt(value, digits)
    return esc(value)


class Raw(str):
    """Already-escaped HTML."""


def table(headers: list[str], rows: list[list], left: int = 1) -> str:
    """HTML table; the first ``left`` columns are left-aligned text."""
    def cell(tag, i, v):
        cls = ' class="l"' if i < left else ""
        return f"<{tag}{cls}>{v if isinstance(v, Raw) else num(v)}</{tag}>"

    head = "".join(cell("th", i, Raw(esc(h))) for i, h in enumerate(headers))
    body = "".join("<tr>" + "".join(cell("td", i, v) for i, v in enumerate(r)) + "</tr>"
                   for r in rows)
    return f"<table><tr>{head}</tr>{body}</table>"
