"""Small HTML building blocks that escape every piece of text they are given.

Text is escaped unless it is an :class:`Html` fragment built by these helpers, so a file name,
a layout cell or a metadata value can never become markup: :func:`render` is the one place
that decides. Images are embedded as base64 ``data:`` URIs; nothing refers outside the file.
"""

from __future__ import annotations

import base64
import hashlib
import html
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path

import numpy as np

from beatlab.io.writers import atomic_path
from beatlab.report._format import MISSING, format_number
from beatlab.report._style import CSS

__all__ = [
    "Html",
    "badge",
    "cards",
    "element",
    "embed_png",
    "figure",
    "join",
    "key_values",
    "page",
    "render",
    "table",
    "write_document",
]

_PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


class Html(str):
    """A fragment of markup that is already safe to insert as it is.

    Adding text to it escapes the text: ``Html("<b>") + "<i>"`` is ``<b>&lt;i&gt;``.
    """

    __slots__ = ()

    def __add__(self, other) -> Html:
        return Html(str.__add__(self, render(other)))

    def __radd__(self, other) -> Html:
        return Html(str.__add__(render(other), self))


def render(value) -> Html:
    """The value as safe markup: :class:`Html` unchanged, anything else escaped as text.

    Parameters
    ----------
    value : object
        An :class:`Html` fragment, or any value (shown through ``str``; quotes escaped too, so
        the result is safe inside an attribute).

    Returns
    -------
    Html
    """
    if isinstance(value, Html):
        return value
    return Html(html.escape("" if value is None else str(value), quote=True))


def join(parts: Iterable, separator: str = "") -> Html:
    """Render each part and join them (the separator is escaped as text)."""
    return Html(render(separator).join(render(p) for p in parts))


def element(tag: str, content="", *, cls: str | None = None, **attrs) -> Html:
    """``<tag attrs>content</tag>`` with escaped attribute values and content.

    Parameters
    ----------
    tag : str
        Element name (a constant of the calling code, never data).
    content : object
        Rendered with :func:`render`; pass :class:`Html` for nested markup.
    cls : str, optional
        The ``class`` attribute.
    **attrs
        Further attributes; ``None`` leaves one out, ``True`` writes it without a value.
        Underscores in names become hyphens.

    Returns
    -------
    Html
    """
    parts = [tag]
    if cls:
        parts.append(f'class="{render(cls)}"')
    for name, value in attrs.items():
        if value is None or value is False:
            continue
        name = name.rstrip("_").replace("_", "-")
        parts.append(name if value is True else f'{name}="{render(value)}"')
    return Html(f"<{' '.join(parts)}>{render(content)}</{tag}>")


def badge(text: str, *, kind: str) -> Html:
    """A small coloured label (``ok``, ``error``, ``excluded``, ``flag``)."""
    return element("span", text, cls=f"badge {kind}")


def table(
    headers: Sequence,
    rows: Iterable[Sequence],
    *,
    numeric: Iterable[int] = (),
    titles: Sequence[str | None] | None = None,
    cls: str | None = None,
) -> Html:
    """A table with a header row; numeric columns right-aligned in tabular figures.

    Parameters
    ----------
    headers : sequence
        Header cells (text or :class:`Html`).
    rows : iterable of sequence
        Body rows, one cell per header; cells are rendered with :func:`render`.
    numeric : iterable of int
        Indices of the columns to align as numbers.
    titles : sequence of str or None, optional
        A tooltip per header (e.g. the column's name in the file).
    cls : str, optional
        Class of the ``<table>``.

    Returns
    -------
    Html
        The table wrapped in a horizontally scrolling block.
    """
    numeric = set(numeric)
    titles = list(titles) if titles is not None else [None] * len(headers)
    head = join(
        element("th", h, cls="num" if i in numeric else None, scope="col", title=titles[i])
        for i, h in enumerate(headers)
    )
    body = join(
        element(
            "tr",
            join(
                element("td", cell, cls="num" if i in numeric else None)
                for i, cell in enumerate(row)
            ),
        )
        for row in rows
    )
    inner = element("thead", element("tr", head)) + element("tbody", body)
    return element("div", element("table", Html(inner), cls=cls), cls="scroll")


def key_values(pairs: Iterable[tuple], *, cls: str = "kv") -> Html:
    """A two-column table of (name, value) pairs.

    Text values are shown as they are (the caller formats them); numbers, booleans and None
    go through :func:`format_number`, lists and dicts as their formatted items.
    """
    rows = [
        element("tr", element("th", name, scope="row") + element("td", _value_cell(value)))
        for name, value in pairs
    ]
    return element("div", element("table", element("tbody", join(rows)), cls=cls), cls="scroll")


def _value_cell(value) -> Html | str:
    if isinstance(value, str):  # Html, or text the caller has formatted already
        return value
    if isinstance(value, (list, tuple)):
        return ", ".join(format_number(v) for v in value) or MISSING
    if isinstance(value, Mapping):
        return "; ".join(f"{k}: {format_number(v)}" for k, v in value.items()) or MISSING
    return format_number(value)


def cards(items: Iterable[tuple[str, str, str]]) -> Html:
    """A row of headline numbers: (label, value text, unit) each."""
    boxes = []
    for label, value, unit in items:
        number = element("span", value, cls="value")
        if unit and value != MISSING:
            number += element("span", unit, cls="unit")
        boxes.append(element("div", element("div", label, cls="label") + number, cls="card"))
    return element("div", join(boxes), cls="cards")


def _png_size(data: bytes) -> tuple[int, int] | None:
    """(width, height) in pixels from the IHDR chunk, None when the bytes are not a PNG."""
    if len(data) < 24 or not data.startswith(_PNG_MAGIC) or data[12:16] != b"IHDR":
        return None
    return int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")


#: Figures are saved at this resolution (beatlab.plots.style); 100 px per inch on screen.
FIGURE_DPI = 300
#: Embedded images keep this many pixels per on-screen pixel (sharp on high-density screens).
EMBED_DENSITY = 2


def _shrink(data: bytes, width_px: int) -> bytes:
    """The PNG at `width_px` wide (aspect kept, 256 colours), or `data` when that fails.

    A box filter by an integer factor, then a small resize: fast, and plots with their flat
    colours and anti-aliased lines lose nothing visible at 256 colours.
    """
    import io

    try:
        from PIL import Image

        with Image.open(io.BytesIO(data)) as image:
            return _shrink_image(image, width_px)
    except (ImportError, OSError, ValueError):
        return data


def _shrink_image(image, width_px: int) -> bytes:
    """The PNG bytes of :func:`_shrink` from a PIL image (RGB or RGBA)."""
    import io

    from PIL import Image

    image = image.convert("RGB")
    factor = max(1, image.width // width_px)
    if factor > 1:
        image = image.reduce(factor)
    height = max(1, round(image.height * width_px / image.width))
    if image.width != width_px:
        image = image.resize((width_px, height), Image.Resampling.BILINEAR)
    small = image.quantize(colors=256, method=Image.Quantize.FASTOCTREE)
    buffer = io.BytesIO()
    small.save(buffer, format="PNG", compress_level=6)  # 9: ~3x the time, ~5 % smaller
    return buffer.getvalue()


def embed_png(
    path: str | os.PathLike,
    *,
    alt: str,
    max_display_px: int = 1000,
    density: int = EMBED_DENSITY,
) -> Html | None:
    """An ``<img>`` holding the PNG file as a base64 ``data:`` URI.

    The image is shown at its size on paper (100 px per inch of figure) and at most
    `max_display_px` wide; it is embedded at `density` pixels per shown pixel,
    downsampled from the saved file when that is larger (a report of a plate stays tens of
    MB smaller than the figures it shows, with no visible loss).

    Parameters
    ----------
    path : path-like
        The PNG file.
    alt : str
        Alternative text (escaped).
    max_display_px : int
        Largest shown width, in CSS pixels.
    density : int
        Embedded pixels per shown pixel.

    Returns
    -------
    Html or None
        None when the file cannot be read or is not a PNG image.
    """
    read = _read_png(path, density=density, max_display_px=max_display_px)
    if read is None:
        return None
    data, width, shrink_to = read
    if shrink_to:
        data = _SHRUNK.pop(_shrink_key(data, shrink_to), None) or _shrink(data, shrink_to)
    source = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
    return Html(f'<img src="{render(source)}" alt="{render(alt)}" width="{width}">')


def _read_png(path, *, density: int, max_display_px: int) -> tuple[bytes, int, int] | None:
    """The file's bytes, its shown width and the width to shrink it to (0: as it is), or
    None when it cannot be read or is no PNG."""
    try:
        data = Path(path).read_bytes()
    except OSError:
        return None
    size = _png_size(data)
    if size is None:
        return None
    width = max(1, min(max_display_px, round(size[0] * 100 / FIGURE_DPI)))
    return data, width, density * width if size[0] > density * width else 0


# Embedded images shrunk ahead of time, where the figures were drawn: the digest of the PNG
# file's bytes and the width -> the bytes embed_png would make of them.
_SHRUNK: dict[bytes, bytes] = {}


def _shrink_key(data: bytes, width_px: int) -> bytes:
    return hashlib.sha256(data).digest() + width_px.to_bytes(4, "big")


def shrink_ahead(
    path: str | os.PathLike,
    *,
    density: int = EMBED_DENSITY,
    max_display_px: int = 1000,
    pixels: np.ndarray | None = None,
) -> tuple[bytes, bytes] | None:
    """Shrink a figure now as :func:`embed_png` will embed it: ``(key, bytes)`` for
    :func:`keep_shrunk`, or None when it needs no shrinking or is no PNG.

    A recording's figures are drawn in parallel processes and its report is written after
    them by one; shrinking each where it was drawn takes that work off the report.
    ``pixels``: the file's image as drawn, (height, width, 4) uint8 RGBA, which saves
    decoding the file again (the same bytes result: PNG is lossless).
    """
    read = _read_png(path, density=density, max_display_px=max_display_px)
    if read is None or not read[2]:
        return None
    data, _, shrink_to = read
    if pixels is None or _png_size(data) != (pixels.shape[1], pixels.shape[0]):
        return _shrink_key(data, shrink_to), _shrink(data, shrink_to)
    from PIL import Image

    image = Image.fromarray(np.ascontiguousarray(pixels, dtype=np.uint8), "RGBA")
    return _shrink_key(data, shrink_to), _shrink_image(image, shrink_to)


def keep_shrunk(prepared: Iterable[tuple[bytes, bytes] | None]) -> None:
    """Keep images shrunk by :func:`shrink_ahead` for the next :func:`embed_png` of the same
    file bytes (each is used once)."""
    _SHRUNK.update(item for item in prepared if item is not None)


def figure(path: str | os.PathLike, *, alt: str, caption, density: int = EMBED_DENSITY) -> Html:
    """A ``<figure>`` with the embedded PNG and its caption, or a note when it is unreadable."""
    image = embed_png(path, alt=alt, density=density)
    if image is None:
        note = f"{Path(path).name}: not a readable PNG image, left out"
        return element("p", note, cls="note missing")
    return element("figure", image + element("figcaption", caption))


def page(*, title: str, subtitle, nav: Sequence[tuple[str, str]], body: Html, footer: Html) -> str:
    """The whole document: inline stylesheet, header, navigation, body and footer.

    Parameters
    ----------
    title : str
        Page title and main heading.
    subtitle : object
        Line under the heading (text or :class:`Html`).
    nav : sequence of (str, str)
        (anchor id, label) of the sections, for in-page links.
    body : Html
        The sections.
    footer : Html
        The footer's content.

    Returns
    -------
    str
        The HTML text.
    """
    links = join(element("a", label, href=f"#{anchor}") for anchor, label in nav)
    header = element(
        "header",
        element("h1", title) + element("p", subtitle, cls="subtitle"),
        cls="top",
    )
    main = element("main", header + element("nav", links, cls="toc") + body, cls="page")
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        '<meta name="generator" content="beatlab">\n'
        '<link rel="icon" href="data:,">\n'
        f"{element('title', title)}\n<style>\n{CSS}</style>\n</head>\n<body>\n"
        f"{main}\n{element('footer', footer, cls='page')}\n</body>\n</html>\n"
    )


def write_document(text: str, path: str | os.PathLike) -> Path:
    """Write the HTML text atomically (UTF-8) and return the path."""
    path = Path(path)
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return path
