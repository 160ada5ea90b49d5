"""Turns certificate HTML into PDF bytes with WeasyPrint, and writes a PDF file atomically.

The renderer may load only files inside templates/ (the stylesheet and the font):
anything else a page asks for (file:, http:, data: URLs, paths outside the
folder) is refused and simply not loaded, so a hostile value in a data file can
never make the renderer read a file or reach the network. Building the HTML is
certificate.py's job.
"""

from __future__ import annotations

import contextlib
import functools
import logging
import mimetypes
import os
import pathlib
import threading
import urllib.parse
import urllib.request
import zlib
from collections.abc import Iterator
from dataclasses import dataclass, field
from xml.etree import ElementTree

import cssselect2
from weasyprint import CSS, HTML, URLFetcher
from weasyprint.document import Document
from weasyprint.text.fonts import FontConfiguration
from weasyprint.urls import URLFetcherResponse

from pipeline.report import keptlayouts, stylecache, svgpath, svgplot, svgtext
from pipeline.report.certificate import TEMPLATES_DIR
from pipeline.writing import write_atomic

log = logging.getLogger(__name__)

# fontTools, which WeasyPrint falls back to for font subsetting when HarfBuzz's
# subsetter is missing, stamps the subset font with the current time unless
# SOURCE_DATE_EPOCH is set (reproducible-builds.org convention). Rendering holds
# this lock while it sets the variable, so two renders never race on it.
_RENDER_LOCK = threading.Lock()
_FONT_EPOCH = "0"

_TYPES = {".css": "text/css", ".ttf": "font/ttf", ".otf": "font/otf", ".woff2": "font/woff2"}


class TemplateFetcher(URLFetcher):  # type: ignore[misc]  # WeasyPrint ships no type hints
    """Serves files inside ``root`` and refuses every other URL.

    A refusal raises inside WeasyPrint, which logs it and renders on without that
    resource. ``requested`` lists every URL asked for, in order (tests read it).
    """

    def __init__(self, root: pathlib.Path = TEMPLATES_DIR) -> None:
        super().__init__(allowed_protocols=("file",), allow_redirects=False)
        self.root = root.resolve()
        self.requested: list[str] = []

    def resolve(self, url: str) -> pathlib.Path | None:
        """The file inside ``root`` that ``url`` names, or None if it names anything else."""
        parts = urllib.parse.urlsplit(url)
        if parts.scheme != "file" or parts.netloc not in ("", "localhost"):
            return None
        path = pathlib.Path(urllib.request.url2pathname(parts.path)).resolve()
        if not path.is_relative_to(self.root) or not path.is_file():
            return None
        return path

    def fetch(self, url: str, headers: object = None) -> URLFetcherResponse:
        self.requested.append(url)
        path = self.resolve(url)
        if path is None:
            log.warning("certificate asked for %r, outside the templates folder: refused", url)
            raise ValueError(f"refused: {url!r} is not a file inside the templates folder")
        content_type = _TYPES.get(path.suffix.lower()) or (
            mimetypes.guess_type(path.name)[0] or "application/octet-stream"
        )
        return URLFetcherResponse(
            path.as_uri(), body=path.read_bytes(), headers={"Content-Type": content_type}
        )


STYLESHEET_LINK = '<link rel="stylesheet" href="certificate.css"/>'
BASE_URL = TEMPLATES_DIR.as_uri() + "/"  # relative URLs in certificates resolve in templates/


@dataclass(frozen=True)
class _Shared:
    """What every certificate a process renders shares: the parsed stylesheet and its font, and
    the computed styles worked out with them (stylecache.py).

    Parsing the stylesheet and loading the font once per process (not per document)
    saves their cost on every certificate and keeps a worker's memory flat: a new
    font configuration per document grows the process by about 0.2 MiB each time.
    """

    font_config: FontConfiguration
    stylesheet: CSS
    styles: dict[object, object] = field(default_factory=dict)


@functools.lru_cache(maxsize=1)
def _shared() -> _Shared:
    font_config = FontConfiguration()
    css = CSS(
        filename=str(TEMPLATES_DIR / "certificate.css"),
        base_url=BASE_URL,
        url_fetcher=TemplateFetcher(),
        font_config=font_config,
    )
    return _Shared(font_config, css)


# A page with a table, a heading and a plot label in the certificate's font: rendered once by
# prepare(), so that the font is opened, shaped and subset before the first certificate.
_WARM_UP = (
    '<html lang="en"><head><title>warm-up</title></head>'
    '<body><h2>Checks</h2><table class="grid"><tbody><tr><td>3.218 V</td><td>\u2264 45.0 \u00b0C</td>'
    '</tr></tbody></table><svg xmlns="http://www.w3.org/2000/svg" width="20mm" height="5mm" '
    'viewBox="0 0 20 5" font-family="Certificate Sans" font-size="2.5"><text x="10" y="3" '
    'text-anchor="middle">\u22122.0</text></svg></body></html>'
)


def prepare() -> None:
    """Parse the stylesheet, load its font, read its advances for the plot labels and render a
    small page now rather than at the first certificate (the first render of a process opens
    the font and is about 30 ms slower)."""
    _shared()
    _xml_parse_fits()
    svgplot.label_width("0")  # the font's advances, read once for every plot label
    render_pdf(_WARM_UP)


# pydyf deflates every stream of the PDF at zlib's slowest level, 9; at zlib's own default, 6,
# a certificate's streams come out about 1 % larger in a third of the time (some 2.5 ms of a
# passed cell's certificate). PYDYF_FITS is the pydyf (constraints.txt) whose streams take
# their deflater from its module's ``zlib`` at the moment they are written.
PDF_DEFLATE_LEVEL = 6
PYDYF_FITS = "0.13.0"


class _Deflate:
    """What pydyf takes from zlib, deflating at PDF_DEFLATE_LEVEL whatever level it asks for."""

    compress = staticmethod(zlib.compress)

    @staticmethod
    def compressobj(level: int = -1) -> zlib._Compress:
        return zlib.compressobj(level=PDF_DEFLATE_LEVEL)


@contextlib.contextmanager
def _deflating_at_default_level() -> Iterator[bool]:
    """Within the block, pydyf deflates at PDF_DEFLATE_LEVEL; yields whether it does (the
    caller holds the render lock: the switch is process-wide while it lasts)."""
    import pydyf

    if pydyf.__version__ != PYDYF_FITS or getattr(pydyf, "zlib", None) is not zlib:
        yield False
        return
    pydyf.zlib = _Deflate
    try:
        yield True
    finally:
        pydyf.zlib = zlib


def _write(document: HTML | Document, *, fast_plots: bool = True) -> bytes:
    """The PDF bytes of ``document``; unless told not to, its plot labels drawn whole
    (svgtext.py), its plot paths read once (svgpath.py), its text drawn from the layouts
    that broke its lines (keptlayouts.py) and its streams deflated at zlib's default level."""
    with _RENDER_LOCK:
        before = os.environ.get("SOURCE_DATE_EPOCH")
        os.environ["SOURCE_DATE_EPOCH"] = before or _FONT_EPOCH
        try:
            with contextlib.ExitStack() as fast:
                if fast_plots:
                    fast.enter_context(svgtext.drawing_labels_whole())
                    fast.enter_context(svgpath.drawing_paths_fast())
                    fast.enter_context(keptlayouts.keeping_layouts())  # a label's, till it is drawn
                    fast.enter_context(keptlayouts.drawing_kept_layouts())
                    fast.enter_context(_deflating_at_default_level())
                pdf: bytes = document.write_pdf(pdf_identifier=False)
        finally:
            if before is None:
                del os.environ["SOURCE_DATE_EPOCH"]
            else:
                os.environ["SOURCE_DATE_EPOCH"] = before
    return pdf


def render_pdf(html: str) -> bytes:
    """The PDF of a certificate's HTML. Same HTML, same bytes (no clock, no random ID).

    Relative URLs resolve against templates/; the PDF's dates come from the HTML's
    ``dcterms.created`` / ``dcterms.modified`` meta elements, and no /ID is written.
    The template's stylesheet is applied from the per-process parsed copy (the link
    to it is taken out of the HTML), so its font is loaded once per process.
    """
    return _write(lay_out(html))


def lay_out(html: str) -> Document:
    """The laid-out pages of a certificate: ``render_pdf`` before it writes the PDF.

    The benchmark times this alone: what a certificate costs before its PDF is written, with the
    stylesheet, the font and the computed styles shared with the process's other certificates.
    """
    shared = _shared()
    html = html.replace(STYLESHEET_LINK, "", 1)
    document = parse_xhtml(html, BASE_URL, TemplateFetcher()) or _html5(html)
    with stylecache.sharing_styles(shared.font_config, shared.styles), keptlayouts.keeping_layouts():
        pages: Document = document.render(stylesheets=[shared.stylesheet], font_config=shared.font_config)
    return pages


def _html5(html: str) -> HTML:
    """``html`` parsed by WeasyPrint's own HTML5 parser, relative URLs in templates/."""
    return HTML(string=html, base_url=BASE_URL, url_fetcher=TemplateFetcher())


def parse_xhtml(html: str, base_url: str, url_fetcher: URLFetcher) -> HTML | None:
    """``html`` as a WeasyPrint document, parsed as XML; None if it is not well-formed XML.

    The certificate template writes well-formed XHTML (void elements closed, every
    table with its tbody, inline SVG with its namespace), which the C XML parser of
    the standard library reads in a tenth of the time WeasyPrint's pure-Python HTML5
    parser takes, into the same element tree. Tests check that both parses give
    byte-identical PDFs. Anything that is not well-formed (a control character from a
    data file, say) returns None, and the caller parses it as HTML5 as usual.
    The attributes set here are the ones ``weasyprint.HTML.__init__`` sets in the
    WeasyPrint pinned in constraints.txt; with a WeasyPrint that sets others, this
    returns None (and says so once in the log) rather than render from half an object.
    """
    if not _xml_parse_fits():
        return None
    try:
        root = ElementTree.fromstring(html)
    except ElementTree.ParseError:
        return None
    return _document_of(drop_layout_whitespace(root), base_url, url_fetcher)


# Elements that are block-level (or table parts, or never displayed) in every stylesheet the
# templates use: whitespace next to one of them is collapsed away by CSS in any case.
_BLOCK_TAGS = frozenset((
    "html", "head", "body", "title", "meta", "link", "style", "section", "header", "footer",
    "main", "article", "aside", "nav", "div", "p", "h1", "h2", "h3", "h4", "h5", "h6", "ul", "ol",
    "li", "table", "caption", "colgroup", "col", "thead", "tbody", "tfoot", "tr", "td", "th",
    "figure", "figcaption", "blockquote", "dl", "dt", "dd", "hr", "address",
))


def drop_layout_whitespace(root: ElementTree.Element) -> ElementTree.Element:
    """``root`` without the whitespace-only text beside block-level elements; returns ``root``.

    The template's indentation puts a run of whitespace between every two rows, cells and
    sections. CSS collapses such a run away whenever a block-level element (or a table part)
    stands on either side of it, so it never reaches the page; yet the renderer builds a box
    for each run before it drops it (about 2 % of a certificate's layout). Whitespace between
    two inline elements, or inside a cell's text, is kept: it is a space on the page. This
    holds while no stylesheet sets ``white-space: pre`` (or pre-wrap, break-spaces) on a
    container of block-level elements; the tests compare the bytes of every certificate so
    parsed with those of WeasyPrint's own HTML5 parse, which keeps every run.
    """
    for element in root.iter():
        children = list(element)
        if not children:
            continue
        text = element.text
        if text is not None and not text.strip() and children[0].tag in _BLOCK_TAGS:
            element.text = None
        for i, child in enumerate(children):
            tail = child.tail
            if tail is None or tail.strip():
                continue
            if child.tag in _BLOCK_TAGS or (i + 1 < len(children) and children[i + 1].tag in _BLOCK_TAGS):
                child.tail = None
    return root


def _document_of(root: ElementTree.Element, base_url: str, url_fetcher: URLFetcher | None) -> HTML:
    document: HTML = HTML.__new__(HTML)
    document.base_url = base_url
    document.url_fetcher = url_fetcher
    document.media_type = "print"
    document.wrapper_element = cssselect2.ElementWrapper.from_html_root(root, content_language=None)
    document.etree_element = document.wrapper_element.etree_element
    return document


@functools.lru_cache(maxsize=1)
def _xml_parse_fits() -> bool:
    """Whether this WeasyPrint's HTML objects hold exactly the attributes ``_document_of`` sets."""
    reference = set(vars(HTML(string="<p>x</p>", base_url="file:///")))
    ours = set(vars(_document_of(ElementTree.fromstring("<p>x</p>"), "file:///", None)))
    if reference != ours:
        log.warning(
            "this WeasyPrint builds its documents differently (%s): certificates are parsed "
            "as HTML5, which is slower but gives the same pages",
            ", ".join(sorted(reference ^ ours)),
        )
    return reference == ours


def render_pdf_plain(html: str) -> bytes:
    """The same certificate rendered with nothing shared, every plot label drawn by WeasyPrint
    letter by letter and every plot path read by it: the reference the fast path must match."""
    return _write(_html5(html), fast_plots=False)


def write_pdf(pdf: bytes, path: pathlib.Path) -> None:
    """Write ``pdf`` to ``path`` so nobody ever sees half a file (see writing.write_atomic)."""
    write_atomic(pdf, path)
