"""HTML built from escaped parts: Markup, tags, tables, sections, figures, the page template.

Every string that comes from the data, the config or the run folder is escaped
with `html.escape`; only `Markup`, built here from escaped parts, goes in as it is.
The page is `report.html` (a `string.Template`) and its CSS `report.css`, both
package data beside this module.
"""

from __future__ import annotations

import base64
import html
import warnings
from contextvars import ContextVar
from functools import partial
from typing import TYPE_CHECKING, Any, Callable, Iterable, Sequence

from gridplan.common.errors import GridplanError
from gridplan.common.forked import run_parts

if TYPE_CHECKING:  # pragma: no cover - typing only
    from matplotlib.figure import Figure

#: Resolution of the PNG figures embedded in a page.
FIGURE_DPI = 130


# --- escaping ----------------------------------------------------------------------------------

class Markup(str):
    """Text that is already HTML (built here from escaped parts); never escaped again."""


def esc(value: Any) -> str:
    """HTML-escape any value's text, quotes included (Markup passes through)."""
    if isinstance(value, Markup):
        return value
    return html.escape("" if value is None else str(value), quote=True)


def join(parts: Iterable[Any]) -> Markup:
    return Markup("".join(esc(p) for p in parts))


def tag(name: str, content: Any = "", **attributes: Any) -> Markup:
    """<name attr="...">content</name>, with attribute values and plain content escaped."""
    attrs = "".join(f' {k.rstrip("_").replace("_", "-")}="{esc(v)}"'
                    for k, v in attributes.items() if v is not None)
    return Markup(f"<{name}{attrs}>{esc(content)}</{name}>")


# --- small builders -------------------------------------------------------------------------

def table(headers: Sequence[str], rows: Iterable[Sequence[Any]], *, css: str = "",
           row_classes: Sequence[str | None] | None = None, caption: str | None = None,
           keep_whole: Sequence[int] = ()) -> Markup:
    """A table with escaped cells (Markup cells are kept as they are).

    Cells in the columns numbered in `keep_whole` are never broken across lines.
    """
    head = "".join(f"<th scope=\"col\">{esc(h)}</th>" for h in headers)
    body = []
    for n, row in enumerate(rows):
        cls = row_classes[n] if row_classes is not None else None
        cells = "".join(f"<td class=\"whole\">{esc(c)}</td>" if i in keep_whole else f"<td>{esc(c)}</td>"
                        for i, c in enumerate(row))
        opening = f"<tr class=\"{esc(cls)}\">" if cls else "<tr>"
        body.append(f"{opening}{cells}</tr>")
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return Markup(f"<table class=\"{esc(css)}\">{cap}<thead><tr>{head}</tr></thead>"
                  f"<tbody>{''.join(body)}</tbody></table>")


def facts(pairs: Iterable[tuple[str, Any]]) -> Markup:
    """A two-column table of name and value."""
    rows = "".join(f"<tr><th scope=\"row\">{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in pairs)
    return Markup(f"<table class=\"facts\"><tbody>{rows}</tbody></table>")


def section(ident: str, number: int, title: str, body: Iterable[Any]) -> Markup:
    return Markup(f"<section id=\"{esc(ident)}\"><h2><span class=\"num\">{number}</span> "
                  f"{esc(title)}</h2>{join(body)}</section>")


def para(text: Any, css: str | None = None) -> Markup:
    return tag("p", text, class_=css)


def png_figure(figure: "Figure", alt: str, caption: str) -> Markup:
    from gridplan.showing.figures import figure_to_png_bytes
    with warnings.catch_warnings():
        # long labels on a small grid: the picture is still drawn, only less tidily
        warnings.filterwarnings("ignore", message="constrained_layout not applied")
        png = figure_to_png_bytes(figure, dpi=FIGURE_DPI)
    data = base64.b64encode(png).decode("ascii")
    return Markup(f"<figure><img src=\"data:image/png;base64,{data}\" alt=\"{esc(alt)}\">"
                  f"<figcaption>{esc(caption)}</figcaption></figure>")


def _figure(make: Callable[[], "Figure"], alt: str, caption: str) -> Markup:
    """A figure, or a note saying why it could not be drawn."""
    try:
        figure = make()
    except GridplanError as problem:
        return para(f"This picture could not be drawn: {problem}", "note")
    return png_figure(figure, alt, caption)


#: Figures asked for while a page is built by `with_figures`; None outside it.
_PENDING: ContextVar[list | None] = ContextVar("gridplan_pending_figures", default=None)


def _placeholder(number: int) -> str:
    # An HTML comment: escaped data can never contain "<", so it cannot collide.
    return f"<!--gridplan-figure-{number}-->"


def drawn(make: Callable[[], "Figure"], alt: str, caption: str) -> Markup:
    """A figure, or a note saying why it could not be drawn.

    While `with_figures` builds a page, the figure is only noted here and a
    placeholder stands in its place until all of the page's figures are drawn.
    """
    pending = _PENDING.get()
    if pending is None:
        return _figure(make, alt, caption)
    pending.append(partial(_figure, make, alt, caption))
    return Markup(_placeholder(len(pending) - 1))


def with_figures(build: Callable[[], str], jobs: int | None = None) -> str:
    """The text `build()` returns, with the figures it asked for drawn side by side.

    Drawing is most of a page's time and its figures do not depend on each
    other, so they are drawn `jobs` at a time (None: every core) by
    `gridplan.common.forked`; the page is the same either way.
    """
    pending: list = []
    token = _PENDING.set(pending)
    try:
        page = build()
    finally:
        _PENDING.reset(token)
    if len(pending) > 1:
        from gridplan.showing.figures import load_drawing_libraries
        load_drawing_libraries()       # once here, not once in every forked drawer
    for number, markup in enumerate(run_parts(pending, jobs)):
        page = page.replace(_placeholder(number), markup, 1)
    return page


def page_style() -> str:
    """The report's CSS, kept beside this module as package data (report.css, CSS only)."""
    from importlib.resources import files
    return files("gridplan.showing").joinpath("report.css").read_text(encoding="utf-8")


def render_page(**fields: Any) -> str:
    """The page template (report.html, package data) filled in, every field escaped.

    Only Markup, built here from escaped parts, goes in as it is; any other
    value is escaped, so a field cannot inject HTML by mistake.
    """
    from importlib.resources import files
    from string import Template
    page = Template(files("gridplan.showing").joinpath("report.html").read_text(encoding="utf-8"))
    return page.substitute({name: esc(value) for name, value in fields.items()})
