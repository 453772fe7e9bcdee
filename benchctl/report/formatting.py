"""Small text helpers shared by the report, comparison and datasheet outputs."""

from __future__ import annotations

import html
import math
from typing import Any

DASH = "—"


def fmt(value: Any, digits: int = 6) -> str:
    """Format a value for a table: numbers with ``digits`` significant digits, None as a dash."""
    if value is None:
        return DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return f"{value:.{digits}g}"
    return str(value)


def h(value: Any) -> str:
    """HTML-escape any value (quotes included), for text and attribute positions."""
    return html.escape(value if isinstance(value, str) else fmt(value), quote=True)


_MD_SPECIAL = str.maketrans({c: "\\" + c for c in "\\|*`<>[]#"})


def md(value: Any) -> str:
    """Escape a value for a Markdown table cell (pipes, emphasis, HTML, line breaks)."""
    text = value if isinstance(value, str) else fmt(value)
    return text.translate(_MD_SPECIAL).replace("\r", " ").replace("\n", " ")


def md_table(header: list[str], rows: list[list[Any]]) -> str:
    """Return a GitHub-flavoured Markdown table."""
    lines = ["| " + " | ".join(md(c) for c in header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(md(c) for c in row) + " |" for row in rows]
    return "\n".join(lines) + "\n"


def json_safe(obj: Any) -> Any:
    """``obj`` with every NaN or infinity replaced by None, recursively (strict JSON)."""
    if isinstance(obj, dict):
        return {k: json_safe(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [json_safe(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj
