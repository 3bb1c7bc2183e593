"""Build HTML safely: the element builder every part of the report page uses, and small cell and table helpers.

Every string from the dataset (file names, category names, evidence, lint messages) passes through
:func:`el`, which escapes text and attribute values by default and refuses event-handler attributes and
URL schemes. :class:`Markup` marks what was built here and so needs no more escaping.
"""

from __future__ import annotations

import html
import math
import re
from pathlib import Path
from typing import Any, Iterable
from urllib.parse import quote


class Markup(str):
    """HTML built here and therefore safe; any plain ``str`` is escaped when it meets markup."""

    __slots__ = ()


_ATTR_NAME = re.compile(r"^[a-zA-Z][a-zA-Z0-9_:.-]*$")
_URL_SCHEME = re.compile(r"^\s*[a-zA-Z][a-zA-Z0-9+.-]*:")
_VOID_TAGS = frozenset({"img", "meta", "br", "hr", "input", "link"})
_SVG_EMPTY_TAGS = frozenset({"rect", "circle", "polygon", "line", "path"})


def escape(value: Any) -> Markup:
    """Text escaped for HTML content and quoted attributes (``html.escape(quote=True)``)."""
    if isinstance(value, Markup):
        return value
    return Markup(html.escape(str(value), quote=True))


def join(children: Iterable[Any]) -> Markup:
    """Concatenate children (strings escaped, ``None`` / ``False`` dropped, nested lists flattened)."""
    parts: list[str] = []
    for child in children:
        if child is None or child is False:
            continue
        if isinstance(child, (list, tuple)):
            parts.append(join(child))
        else:
            parts.append(escape(child))
    return Markup("".join(parts))


def el(tag: str, attrs: dict[str, Any] | None = None, *children: Any) -> Markup:
    """One element. Attribute values are escaped and double-quoted; ``None`` / ``False`` values are left out.

    Refused (``ValueError``): odd attribute names, ``on*`` event handlers, and ``src`` / ``href`` values that
    carry a URL scheme (``javascript:``, ``http:``, ``data:``): this page links only to relative files.
    """
    out = [f"<{tag}"]
    for name, value in (attrs or {}).items():
        if value is None or value is False:
            continue
        if not _ATTR_NAME.match(name) or name.lower().startswith("on"):
            raise ValueError(f"attribute {name!r} is not allowed on <{tag}>")
        if name in ("src", "href") and _URL_SCHEME.match(str(value)):
            raise ValueError(f"<{tag} {name}={str(value)[:40]!r}>: only relative links are allowed")
        out.append(f" {name}" if value is True else f' {name}="{escape(value)}"')
    if tag in _VOID_TAGS:
        return Markup("".join(out) + ">")
    if tag in _SVG_EMPTY_TAGS and not children:
        return Markup("".join(out) + "/>")
    return Markup("".join(out) + ">" + join(children) + f"</{tag}>")


def fmt(value: Any, digits: int = 3) -> str:
    """A number for people: ``1,234``, ``12.35``, ``0.0412``; missing as an en dash."""
    if value is None:
        return "\u2013"
    try:
        number = float(value)
    except (TypeError, ValueError):
        return str(value)
    if not math.isfinite(number):
        return "\u2013"
    if number == int(number) and abs(number) < 1e15:
        return f"{int(number):,}"
    if abs(number) >= 100:
        return f"{number:,.0f}"
    if abs(number) >= 1:
        return f"{number:.2f}"
    return f"{number:.{digits}g}"


def count_text(n: int, one: str, many: str) -> str:
    """``1 box``, ``2,345 boxes``."""
    return f"{n:,} {one if n == 1 else many}"


def ordinal(percent: float) -> str:
    """A percentile as ``91st percentile``; missing as ``""``."""
    if not math.isfinite(percent):
        return ""
    n = int(round(percent))
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix} percentile"


def num_cell(value: Any, text: str | None = None) -> Markup:
    """Right-aligned numeric cell; ``data-v`` holds the raw number for sorting."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        number = math.nan
    raw = repr(number) if math.isfinite(number) else ""
    return el("td", {"class": "num", "data-v": raw}, fmt(value) if text is None else text)


def data_table(columns: list[tuple[str, str]], rows: list[list[Any]], *, row_classes: list[str] | None = None,
               sortable: bool = True, scroll: bool = False) -> Markup:
    """A data table; ``columns`` = (header, "num" | "text"); cells are Markup (from :func:`num_cell`) or text."""
    head = el("tr", None, [el("th", {"class": "num" if kind == "num" else None, "data-type": kind, "scope": "col"},
                              el("button", {"type": "button"}, label) if sortable else label)
                           for label, kind in columns])
    body = [el("tr", {"class": (row_classes[i] or None) if row_classes else None},
               [cell if isinstance(cell, Markup) and cell.startswith("<td") else el("td", None, cell) for cell in row])
            for i, row in enumerate(rows)]
    table = el("table", {"class": "data sortable" if sortable else "data"}, el("thead", None, head),
               el("tbody", None, body))
    return el("div", {"class": "scroll"}, table) if scroll else table


def tag_list(why: str) -> Markup:
    """The ``why`` tags (``small;occluded``) as tag chips; nothing when there are none."""
    tags = [t.strip() for t in str(why).split(";") if t.strip()]
    return el("div", {"class": "tags"}, [el("span", {"class": "tag"}, t) for t in tags]) if tags else Markup("")


def plot_image(plots: dict[str, Path], name: str, alt: str) -> Markup:
    """The PNG plot ``name`` from ``RUNDIR/plots``, or nothing when it was not written."""
    if name not in plots:
        return Markup("")
    return el("div", {"class": "plot"}, el("img", {"src": f"../plots/{quote(plots[name].name)}", "alt": alt}))
