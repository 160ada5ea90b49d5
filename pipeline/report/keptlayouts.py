"""A certificate's text drawn from the shaping its layout already did, instead of shaped again.

WeasyPrint shapes every run of text while it breaks lines (a Pango layout per text box), then
lets that layout go (``Layout.deactivate``, to save the memory of long documents) and, when it
draws the page, makes a new layout for the same text and shapes it again
(``Layout.reactivate``): every word of a certificate is shaped twice. A certificate is a page
or three, so :func:`keeping_layouts` lets each text box keep its layout while the certificate is
laid out, and :func:`drawing_kept_layouts` draws from it when it is what a new one would be:
the same style, no justification spacing to add (which only drawing adds), and all of its
text on one line (so that the width it was broken at changes nothing; drawing shows the first
line only). Any other layout is made again as before. The same PDF bytes
(tests/test_pdf_fast_paths.py compares them).

Most of a certificate's text is the same from one certificate to the next (headings, check
names and windows, the notice), and breaking a line of it gives the same result for the same
text in the same style at the same width: :func:`breaking_lines_once` keeps, for the process,
the line breaks of texts that fit on one line (``weasyprint.text.line_break.split_first_line``
as layout calls it: the layout, the length, the width, the height and the baseline), keyed by
the text, the very style object (kept from one certificate to the next by stylecache.py), the
width and the other arguments, the MAX_LINES most recently used. A kept layout is shared by
the text boxes that use it, so it is never let go while kept; drawing sets it to one paragraph
(as it does every layout) and changes nothing else, as long as no text is cut with an
ellipsis (no template or stylesheet of formgate asks for one: a test checks it, and a style
that inherits a block ellipsis is never kept).

It fits ``weasyprint.text.line_break.Layout`` of the WeasyPrint pinned in constraints.txt
(FITS, the same pin as svgtext.py's); with any other version every layout is let go and made
again (said once in the log), slower but the same pages.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import logging
from collections import OrderedDict
from collections.abc import Iterator
from typing import Any

from pipeline.report.svgtext import FITS

log = logging.getLogger(__name__)

MAX_LINES = 4096  # texts whose line breaks are kept (a certificate has a few hundred)
_BREAKERS = ("inline", "preferred")  # the layout modules that call split_first_line by name


@functools.lru_cache(maxsize=1)
def _weasyprint() -> dict[str, Any] | None:
    """WeasyPrint's Layout class and its two methods, or None if this is not the WeasyPrint FITS."""
    import weasyprint
    from weasyprint.text.ffi import ffi, pango
    from weasyprint.text.line_break import Layout

    if weasyprint.__version__ != FITS:
        log.warning(
            "WeasyPrint %s is not %s: certificate text is shaped again to be drawn (slower, same page)",
            weasyprint.__version__,
            FITS,
        )
        return None
    from weasyprint.text.line_break import split_first_line

    breakers = [importlib.import_module(f"weasyprint.layout.{name}") for name in _BREAKERS]
    if any(module.split_first_line is not split_first_line for module in breakers):
        log.warning("WeasyPrint's layout breaks lines its own way: certificate text is shaped again")
        return None
    return {"Layout": Layout, "deactivate": Layout.deactivate, "reactivate": Layout.reactivate,
            "pango": pango, "NULL": ffi.NULL, "split_first_line": split_first_line,
            "breakers": breakers}


def _keep(layout: Any) -> None:
    """``Layout.deactivate`` while a certificate is laid out: the layout stays as it is."""


def _reactivate(layout: Any, style: Any) -> None:
    """``Layout.reactivate``: the kept layout when it is what a new one would be, else a new one."""
    w = _weasyprint()
    assert w is not None, "drawing_kept_layouts() installs this only for the WeasyPrint it fits"
    if (
        getattr(layout, "layout", None) is not None
        and layout.style is style
        and not layout.justification_spacing
        and w["pango"].pango_layout_get_line_readonly(layout.layout, 1) == w["NULL"]  # one line
    ):
        return
    w["reactivate"](layout, style)


@contextlib.contextmanager
def keeping_layouts() -> Iterator[bool]:
    """Within the block, text boxes laid out keep their layouts; yields whether they do.

    The caller holds a lock that keeps other layouts in this process out of the block
    (stylecache.sharing_styles' lock): the switch is process-wide while it lasts.
    """
    w = _weasyprint()
    if w is None:
        yield False
        return
    w["Layout"].deactivate = _keep
    try:
        yield True
    finally:
        w["Layout"].deactivate = w["deactivate"]


@contextlib.contextmanager
def drawing_kept_layouts() -> Iterator[bool]:
    """Within the block, text is drawn from its kept layout where it can be; yields whether it is.

    The caller holds pdf.py's render lock: the switch is process-wide while it lasts.
    """
    w = _weasyprint()
    if w is None:
        yield False
        return
    w["Layout"].reactivate = _reactivate
    try:
        yield True
    finally:
        w["Layout"].reactivate = w["reactivate"]


def _breaking_once(kept: OrderedDict[Any, Any]) -> Any:
    w = _weasyprint()
    assert w is not None, "breaking_lines_once() installs this only for the WeasyPrint it fits"
    split_first_line = w["split_first_line"]

    def split_once(
        text: str, style: Any, context: Any, max_width: Any, justification_spacing: float,
        is_line_start: bool = True, minimum: bool = False,
    ) -> Any:
        key = (text, id(style), max_width, justification_spacing, is_line_start, minimum)
        found = kept.get(key)
        # the very style (kept alive by ``kept``), its layout not let go
        if found is not None and found[0] is style and getattr(found[1][0], "layout", None) is not None:
            kept.move_to_end(key)
            return found[1]
        result = split_first_line(
            text, style, context, max_width, justification_spacing, is_line_start, minimum
        )
        resume_at = result[2]
        if resume_at is None and not justification_spacing and style["block_ellipsis"] == "none":
            kept[key] = (style, result)  # the whole text on one line
            if len(kept) > MAX_LINES:
                kept.popitem(last=False)
        return result

    return split_once


@contextlib.contextmanager
def breaking_lines_once(kept: OrderedDict[Any, Any]) -> Iterator[bool]:
    """Within the block, a text that fits on one line is broken once per style and width in
    the process, its result kept in ``kept``; yields whether it is. Use it inside
    :func:`keeping_layouts` (a kept layout must not be let go), one block at a time."""
    w = _weasyprint()
    if w is None:
        yield False
        return
    split_once = _breaking_once(kept)
    for module in w["breakers"]:
        module.split_first_line = split_once
    try:
        yield True
    finally:
        for module in w["breakers"]:
            module.split_first_line = w["split_first_line"]
