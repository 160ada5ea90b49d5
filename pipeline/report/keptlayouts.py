"""A certificate's text drawn from the shaping its layout already did, instead of shaped again.

WeasyPrint shapes every run of text while it breaks lines (a Pango layout per text box), then
lets that layout go (``Layout.deactivate``, to save the memory of long documents) and, when it
draws the page, makes a new layout for the same text and shapes it again
(``Layout.reactivate``): every word of a certificate is shaped twice. A certificate is a page
or three, so :func:`keeping_layouts` lets each text box keep its layout while the certificate is
laid out, and :func:`drawing_kept_layouts` draws from it when it is what a new one would be:
the same style, no justification spacing to add (which only drawing adds), and all of its
text on one line (so that the width it was broken at changes nothing; drawing shows the first
line only). Any other layout is made again as before. The layouts are let go as each text is
drawn, as before. The same PDF bytes (tests/test_pdf_fast_paths.py compares them).

It fits ``weasyprint.text.line_break.Layout`` of the WeasyPrint pinned in constraints.txt
(pinned.py's FITS); with any other version every layout is let go and made
again (said once in the log), slower but the same pages.
"""

from __future__ import annotations

import contextlib
import functools
import logging
from collections.abc import Iterator
from typing import Any

from pipeline.report.pinned import weasyprint_fits

log = logging.getLogger(__name__)


@functools.lru_cache(maxsize=1)
def _weasyprint() -> dict[str, Any] | None:
    """WeasyPrint's Layout class and its two methods, or None if this is not the WeasyPrint FITS."""
    from weasyprint.text.ffi import ffi, pango
    from weasyprint.text.line_break import Layout

    if not weasyprint_fits("certificate text is shaped again to be drawn"):
        return None
    return {"Layout": Layout, "deactivate": Layout.deactivate, "reactivate": Layout.reactivate,
            "pango": pango, "NULL": ffi.NULL}


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
