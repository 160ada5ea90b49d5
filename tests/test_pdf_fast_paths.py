"""The certificate's fast paths give the very PDF bytes WeasyPrint gives without them.

svgpath.py reads a plot path's data once; stylecache.py keeps computed styles from one
certificate to the next in a process. Both are checked here against WeasyPrint doing the same
work itself, on real certificates rendered in turn (real WeasyPrint, real PDFs).
"""

from __future__ import annotations

import contextlib
import types
from collections.abc import Iterator

import pytest
import weasyprint

from pipeline.report import pdf, stylecache, svgpath
from pipeline.report.certificate import render_html
from tests.golden import cases


@pytest.fixture(scope="module")
def hazards() -> Iterator[types.ModuleType]:
    """pipeline.report.hazards when it exists, else the test stand-in with the same API."""
    module = cases.real_hazards() or cases.stand_in_hazards()
    with cases.hazards_in_use(module):
        yield module


@pytest.fixture(scope="module")
def htmls(hazards: types.ModuleType) -> list[str]:
    """Certificates of a passed, a failed and a held cell, and a passed cell's full one."""
    return [
        render_html(cases.pass_result()),
        render_html(cases.fail_result()),
        render_html(cases.hold_result()),
        render_html(cases.pass_result(), full=True),
    ]


@contextlib.contextmanager
def _not_used(*args: object) -> Iterator[bool]:
    yield False


# --- plot paths read once -------------------------------------------------------------------


@pytest.mark.parametrize(
    ("d", "expected"),
    [
        ("M13.00 6.59 13.70 8.92", [("M", (13.0, 6.59)), ("L", (13.7, 8.92))]),
        ("M1 2H5V-3h2v1l-1 1.6zm1 1 2 2", [("M", (1.0, 2.0)), ("H", (5.0,)), ("V", (-3.0,)), ("h", (2.0,)),
                                           ("v", (1.0,)), ("l", (-1.0, 1.6)), ("z", ()), ("m", (1.0, 1.0)),
                                           ("l", (2.0, 2.0))]),
        ("", []),
    ],
)
def test_path_data_is_read_into_its_commands(d: str, expected: list[tuple[str, tuple[float, ...]]]) -> None:
    assert svgpath.commands(d) == expected


@pytest.mark.parametrize(
    "d",
    ["M1 2C1 1 2 2 3 3", "M1 2A1 1 0 0 1 3 3", "M1e2 2", "M1mm 2", "M+1 2", "M1.5.5 2", "M1 2 3", "Z1", "1 2"],
    ids=["curve", "arc", "exponent", "unit", "plus", "two-points", "short", "close-number", "no-command"],
)
def test_path_data_with_anything_else_is_left_to_weasyprint(d: str, monkeypatch: pytest.MonkeyPatch) -> None:
    assert svgpath.commands(d) is None
    pieces = svgpath._weasyprint()
    assert pieces is not None  # the pinned WeasyPrint
    drawn = []
    monkeypatch.setitem(pieces, "original", lambda svg, node, size: drawn.append(node))
    node = {"d": d}
    svgpath.fast_path(object(), node, 10.0)
    assert drawn == [node]


def test_plot_paths_read_once_give_the_same_pdf_bytes(htmls: list[str], monkeypatch: pytest.MonkeyPatch) -> None:
    for html in htmls:
        document = pdf.lay_out(html)
        fast = pdf._write(document)
        with monkeypatch.context() as patch:
            patch.setattr(svgpath, "drawing_paths_fast", _not_used)
            own = pdf._write(document)
        assert fast == own


def test_another_weasyprint_draws_every_path_itself(monkeypatch: pytest.MonkeyPatch) -> None:
    import weasyprint.svg

    own = weasyprint.svg.TAGS["path"]
    monkeypatch.setattr(weasyprint, "__version__", "999.0")
    svgpath._weasyprint.cache_clear()
    try:
        with svgpath.drawing_paths_fast() as fast:
            assert not fast and weasyprint.svg.TAGS["path"] is own
    finally:
        monkeypatch.undo()
        svgpath._weasyprint.cache_clear()
    with svgpath.drawing_paths_fast() as fast:
        assert fast and weasyprint.svg.TAGS["path"] is svgpath.fast_path
    assert weasyprint.svg.TAGS["path"] is own


# --- computed styles kept between certificates ----------------------------------------------


def test_certificates_in_turn_with_kept_styles_give_the_same_pdf_bytes(
    htmls: list[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    kept = pdf._shared().styles
    kept.clear()
    for html in [*htmls, *reversed(htmls), *htmls]:  # each meets the styles the others left
        with_kept = pdf.render_pdf(html)
        with monkeypatch.context() as patch:
            patch.setattr(stylecache, "sharing_styles", _not_used)
            own = pdf.render_pdf(html)
        assert with_kept == own
    size = len(kept)
    assert size > 0
    for html in htmls:  # nothing new to keep the second time round
        pdf.render_pdf(html)
    assert len(kept) == size


def test_kept_styles_are_emptied_whole_past_their_bound(htmls: list[str], monkeypatch: pytest.MonkeyPatch) -> None:
    kept = pdf._shared().styles
    kept.clear()
    pdf.render_pdf(htmls[0])
    pdf.render_pdf(htmls[1])
    both = len(kept)
    monkeypatch.setattr(stylecache, "MAX_STYLES", 1)
    reference = pdf.render_pdf(htmls[1])  # found more than one kept: emptied them, kept its own
    alone = len(kept)
    assert 1 < alone < both
    assert pdf.render_pdf(htmls[1]) == reference and len(kept) == alone


def test_documents_with_their_own_font_configuration_keep_nothing(htmls: list[str]) -> None:
    kept = pdf._shared().styles
    pdf.render_pdf(htmls[0])
    size = len(kept)
    other = weasyprint.HTML(string=htmls[1], base_url=pdf.BASE_URL).render()  # nothing shared
    with stylecache.sharing_styles(pdf._shared().font_config, kept) as sharing:
        assert sharing
        weasyprint.HTML(string=htmls[2], base_url=pdf.BASE_URL).render()  # its own font configuration
    assert len(kept) == size and len(other.pages) >= 1
    assert weasyprint.css.StyleFor.__init__ is stylecache._weasyprint()["original"]  # type: ignore[index]


def test_another_weasyprint_works_out_every_style_itself(monkeypatch: pytest.MonkeyPatch) -> None:
    import weasyprint.css

    own = weasyprint.css.StyleFor.__init__
    monkeypatch.setattr(weasyprint, "__version__", "999.0")
    stylecache._weasyprint.cache_clear()
    try:
        with stylecache.sharing_styles(object(), {}) as sharing:
            assert not sharing and weasyprint.css.StyleFor.__init__ is own
    finally:
        monkeypatch.undo()
        stylecache._weasyprint.cache_clear()
    assert weasyprint.css.StyleFor.__init__ is own


def test_the_certificate_stylesheet_asks_nothing_of_what_lies_below_an_element() -> None:
    """Kept rules stand for an element's place, which leaves out its descendants: only
    ``:has()`` looks at them, and the certificate's stylesheet must not use it."""
    css = (pdf.TEMPLATES_DIR / "certificate.css").read_text(encoding="utf-8")
    assert ":has(" not in css


def test_a_document_with_a_select_gets_no_places() -> None:
    """WeasyPrint's own stylesheet matches a select by what it holds (``:has(option[...])``)."""
    from xml.etree import ElementTree

    plain = ElementTree.fromstring("<html><body><p>x</p></body></html>")
    select = ElementTree.fromstring("<html><body><select><option>x</option></select></body></html>")
    assert stylecache._Places({}, plain).usable
    assert not stylecache._Places({}, select).usable


def test_kept_rules_stand_for_the_same_place_only(htmls: list[str]) -> None:
    """The same place in two certificates is one number; another place is another."""
    from xml.etree import ElementTree

    import cssselect2

    kept: dict[object, object] = {}

    def places(html: str) -> list[int | None]:
        root = ElementTree.fromstring(html)
        found = stylecache._Places(kept, root)
        return [found.of(e) for e in cssselect2.ElementWrapper.from_html_root(root).iter_subtree()]

    first, again, other = places(htmls[0]), places(htmls[0]), places(htmls[1])
    assert first == again
    numbered = [p for p in first if p is not None]
    assert len(set(numbered)) == len(numbered)  # every element of a document in a place of its own
    assert set(numbered) != {p for p in other if p is not None}


# --- text drawn from the layouts that broke its lines ---------------------------------------


def test_text_drawn_from_kept_layouts_gives_the_same_pdf_bytes(
    htmls: list[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    from pipeline.report import keptlayouts

    for html in htmls:
        kept = pdf.render_pdf(html)
        with monkeypatch.context() as patch:
            patch.setattr(keptlayouts, "keeping_layouts", _not_used)
            patch.setattr(keptlayouts, "drawing_kept_layouts", _not_used)
            own = pdf.render_pdf(html)
        assert kept == own


def test_a_kept_layout_is_made_again_unless_it_is_what_a_new_one_would_be(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    from weasyprint.text.line_break import Layout

    from pipeline.report import keptlayouts

    pieces = keptlayouts._weasyprint()
    assert pieces is not None  # the pinned WeasyPrint
    made = []
    monkeypatch.setitem(pieces, "reactivate", lambda layout, style: made.append(layout))
    document = pdf.lay_out(pdf._WARM_UP)
    box = next(b for b in document.pages[0]._page_box.descendants() if getattr(b, "pango_layout", None))
    layout, style = box.pango_layout, box.style
    keptlayouts._reactivate(layout, style)
    assert made == []  # kept: the same style, no spacing to add, one line
    keptlayouts._reactivate(layout, style.copy())
    layout.justification_spacing = 1.5
    keptlayouts._reactivate(layout, style)
    layout.justification_spacing = 0
    two_lines = Layout(style)
    two_lines.set_text("two\nlines")
    keptlayouts._reactivate(two_lines, style)
    assert made == [layout, layout, two_lines]


def test_another_weasyprint_shapes_text_again_to_draw_it(monkeypatch: pytest.MonkeyPatch) -> None:
    from weasyprint.text.line_break import Layout

    from pipeline.report import keptlayouts

    own = Layout.deactivate, Layout.reactivate
    monkeypatch.setattr(weasyprint, "__version__", "999.0")
    keptlayouts._weasyprint.cache_clear()
    try:
        with keptlayouts.keeping_layouts() as keeping, keptlayouts.drawing_kept_layouts() as drawing:
            assert not keeping and not drawing and (Layout.deactivate, Layout.reactivate) == own
    finally:
        monkeypatch.undo()
        keptlayouts._weasyprint.cache_clear()
    assert (Layout.deactivate, Layout.reactivate) == own


# --- streams deflated at zlib's default level -----------------------------------------------


def test_streams_are_deflated_at_the_default_level_and_read_back(
    htmls: list[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    import io
    import zlib

    import pydyf
    from pypdf import PdfReader

    with pdf._deflating_at_default_level() as faster:
        assert faster and pydyf.zlib is pdf._Deflate
        data = b"0 0 m 1 1 l S\n" * 500
        packer = pydyf.zlib.compressobj(level=9)
        assert zlib.decompress(packer.compress(data) + packer.flush()) == data
    assert pydyf.zlib is zlib
    reader = PdfReader(io.BytesIO(pdf.render_pdf(htmls[1])))
    assert "FAIL" in reader.pages[0].extract_text()
    monkeypatch.setattr(pydyf, "__version__", "999.0")
    with pdf._deflating_at_default_level() as faster:
        assert not faster and pydyf.zlib is zlib


# --- plot labels written from where they start ----------------------------------------------


def test_a_label_is_as_wide_as_the_renderer_sets_it(htmls: list[str], monkeypatch: pytest.MonkeyPatch) -> None:
    """Every plot label of the certificates, measured by the renderer as it draws it, is exactly
    as wide as svgplot.label_width says: a label written from its start lands where the renderer
    would have moved a middle- or end-anchored one."""
    from pipeline.report import svgplot, svgtext

    pieces = svgtext._weasyprint()
    assert pieces is not None  # the pinned WeasyPrint
    measure = pieces["split_first_line"]
    measured: list[tuple[str, float, float]] = []

    def measuring(text: str, style: object, *args: object) -> object:
        found = measure(text, style, *args)
        measured.append((text, style["font_size"], found[3]))  # type: ignore[index]
        return found

    monkeypatch.setitem(pieces, "split_first_line", measuring)
    extra = svgplot.open_svg(120, 20, "every character") + "".join(
        svgplot.text(10, 5 + k, chunk, "start")
        for k, chunk in enumerate(["0123456789 \N{MINUS SIGN}+.,:;%()/", "°CAhVWmsVI PQTdNa", "cycle window light dark"])
    ) + "</svg>"
    for html in [*htmls, htmls[0].replace("</body>", extra + "</body>")]:
        pdf.render_pdf(html)
    labels = [(text, width) for text, size, width in measured if size == svgplot.FONT_MM]
    assert len(labels) > 60
    for text, width in labels:
        assert svgplot.label_width(text) == width, text


def test_a_label_the_font_cannot_set_keeps_its_anchor() -> None:
    from pipeline.report import svgplot

    assert svgplot.label_width("\u6f22") is None
    assert 'text-anchor="middle"' in svgplot.text(10, 5, "\u6f22")
    assert 'text-anchor="end"' in svgplot.text(10, 5, "2.5", "end", extra=' font-size="1.8"')
    written = svgplot.text(10, 5, "2.5", "end")
    assert "text-anchor" not in written
    width = svgplot.label_width("2.5")
    assert width is not None and f'x="{10 - width:.6f}"' in written
