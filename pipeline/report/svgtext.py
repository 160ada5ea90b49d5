"""A plot label drawn as one run of text instead of letter by letter.

WeasyPrint draws every SVG ``<text>`` letter by letter (each letter laid out on its
own, so that per-letter ``x``, ``dx`` or ``rotate`` lists work): a tick label of five
characters costs six text layouts, and the labels were a fifth of a failed cell's
certificate. The certificate's plots (svgplot.py) never use per-letter positions, and
the shipped font has no kerning and no ligatures (templates/fonts/make_font.py), so a
label laid out whole has the very advance of its letters laid out one by one: the same
glyphs at the same places, in one text object. ``drawing_labels_whole`` puts this in
place for the duration of one PDF writing; any text it does not fit (per-letter lists,
``textLength``, letter spacing, nested ``tspan``) is drawn by WeasyPrint as before.

It reproduces the simple case of ``weasyprint.svg.text.text`` of the WeasyPrint pinned
in constraints.txt (FITS); with any other version WeasyPrint draws every label itself
(said once in the log), which is slower but the same page.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import logging
from collections.abc import Iterator
from math import inf
from typing import Any

from pipeline.report.pinned import weasyprint_fits

log = logging.getLogger(__name__)

_PER_LETTER = ("dx", "dy", "rotate", "textLength", "lengthAdjust", "letter-spacing")
_TEXT_TAGS = ("a", "text", "textPath", "tspan")  # the tags WeasyPrint draws with its text()


@functools.lru_cache(maxsize=1)
def _weasyprint() -> dict[str, Any] | None:
    """WeasyPrint's pieces this module uses, or None if this WeasyPrint is not the one it fits."""

    if not weasyprint_fits("plot labels are drawn letter by letter"):
        return None
    svg = importlib.import_module("weasyprint.svg")
    text_module = importlib.import_module("weasyprint.svg.text")
    if any(svg.TAGS[tag] is not text_module.text for tag in _TEXT_TAGS) or svg.text is not text_module.text:
        log.warning("WeasyPrint's SVG text drawing is not its own: plot labels are drawn by it")
        return None
    from weasyprint.css.properties import INITIAL_VALUES
    from weasyprint.draw.text import draw_emojis, draw_first_line
    from weasyprint.matrix import Matrix
    from weasyprint.svg.bounding_box import extend_bounding_box
    from weasyprint.svg.utils import normalize, size
    from weasyprint.text.line_break import split_first_line

    return {
        "svg": svg,
        "original": text_module.text,
        "Style": text_module.Style,
        "TextBox": text_module.TextBox,
        "INITIAL_VALUES": INITIAL_VALUES,
        "draw_emojis": draw_emojis,
        "draw_first_line": draw_first_line,
        "Matrix": Matrix,
        "extend_bounding_box": extend_bounding_box,
        "normalize": normalize,
        "size": size,
        "split_first_line": split_first_line,
    }


def _positions(w: dict[str, Any], value: str | None) -> list[str]:
    return w["normalize"](value).split(" ") if value else []


def whole(svg: Any, node: Any, font_size: float) -> None:
    """Draw an SVG text node as WeasyPrint's text() does, with its letters as one run."""
    w = _weasyprint()
    assert w is not None, "drawing_labels_whole() installs this only for the WeasyPrint it fits"
    xs = _positions(w, node.attrib.get("x"))
    ys = _positions(w, node.attrib.get("y"))
    if (
        node.tag != "text"
        or not node.text
        or len(xs) > 1
        or len(ys) > 1
        or any(name in node.attrib for name in _PER_LETTER)
        or list(node)
    ):
        w["original"](svg, node, font_size)
        return
    style = w["Style"]()
    style.update(w["INITIAL_VALUES"])
    style.font_config = svg.font_config
    style["font_family"] = [font.strip("\"'") for font in node.get("font-family", "sans-serif").split(",")]
    style["font_style"] = node.get("font-style", "normal")
    style["font_weight"] = node.get("font-weight", 400)
    style["font_size"] = font_size
    if node.get("direction") in ("ltr", "rtl"):
        style["direction"] = node.get("direction")
    if style["font_weight"] == "normal":
        style["font_weight"] = 400
    elif style["font_weight"] == "bold":
        style["font_weight"] = 700
    else:
        try:
            style["font_weight"] = int(style["font_weight"])
        except ValueError:
            style["font_weight"] = 400

    layout, _, _, width, height, baseline = w["split_first_line"](node.text, style, svg.context, inf, 0)

    ascent, descent = font_size * 0.8, font_size * 0.2
    y_align = 0.0
    display_anchor = node.get("display-anchor")
    alignment_baseline = node.get("dominant-baseline", node.get("alignment-baseline"))
    if display_anchor == "middle":
        y_align = -height / 2
    elif display_anchor == "top":
        pass
    elif display_anchor == "bottom":
        y_align = -height
    elif alignment_baseline in ("central", "middle"):
        y_align = (ascent + descent) / 2 - descent
    elif alignment_baseline in ("text-before-edge", "before_edge", "top", "hanging", "text-top"):
        y_align = ascent
    elif alignment_baseline in ("text-after-edge", "after_edge", "bottom", "text-bottom"):
        y_align = -descent

    # the first letter's position, as WeasyPrint sets it; the others follow at their advance
    x = w["size"](xs[0], font_size, svg.inner_width) if xs else None
    y = w["size"](ys[0], font_size, svg.inner_height) if ys else None
    if x:
        svg.cursor_d_position[0] = 0
    if y:
        svg.cursor_d_position[1] = 0
    x = svg.cursor_position[0] if x is None else x
    y = svg.cursor_position[1] if y is None else y
    svg.cursor_position = x + width, y
    x_position = x + svg.cursor_d_position[0]
    y_position = y + svg.cursor_d_position[1] + y_align
    box = ((x_position, y_position - baseline), (x_position + width, y_position - baseline + height))
    node.text_bounding_box = w["extend_bounding_box"](node.text_bounding_box, box)

    svg.stream.push_state()
    fill, stroke = svg.set_graphical_state(node, font_size)
    svg.stream.begin_text()
    layout.reactivate(style)
    svg.fill_stroke(fill, stroke, text=True)
    text_box = w["TextBox"](layout, style)
    text_box.baseline = baseline
    matrix = w["Matrix"](a=1, d=-1, e=x_position, f=y_position)
    emojis = w["draw_first_line"](svg.stream, text_box, "none", "none", matrix)
    svg.stream.end_text()
    svg.stream.pop_state()
    w["draw_emojis"](svg.stream, style, x, y, emojis)


@contextlib.contextmanager
def drawing_labels_whole() -> Iterator[bool]:
    """Within the block, WeasyPrint draws SVG labels with :func:`whole`; yields whether it does.

    The caller holds a lock that keeps other renders in this process out of the block
    (pdf.py's render lock): the switch is process-wide while it lasts.
    """
    w = _weasyprint()
    if w is None:
        yield False
        return
    svg = w["svg"]
    original = w["original"]
    for tag in _TEXT_TAGS:
        svg.TAGS[tag] = whole
    svg.text = whole  # draw_node tells text nodes by this name
    try:
        yield True
    finally:
        for tag in _TEXT_TAGS:
            svg.TAGS[tag] = original
        svg.text = original
