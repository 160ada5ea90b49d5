"""PDF certificates: real WeasyPrint output read back with pypdf; fetching fenced to templates/."""

from __future__ import annotations

import io
import itertools
import os
import re
import shutil
import subprocess
import types
from collections.abc import Iterator
from pathlib import Path
from xml.etree import ElementTree

import pytest
from pypdf import PdfReader
from pypdf.generic import DictionaryObject

from pipeline.acceptance.results import CellResult
from pipeline.report import pdf
from pipeline.report.certificate import TEMPLATES_DIR, render_html
from tests.golden import cases

HOSTILE = "<img src=file:///etc/passwd>"


class Rendered:
    """One certificate rendered to PDF, with the URLs its renderer asked for."""

    def __init__(self, result: CellResult, asked: list[str], data: bytes) -> None:
        self.result = result
        self.asked = asked
        self.data = data
        self.reader = PdfReader(io.BytesIO(data))
        self.pages = [p.extract_text() for p in self.reader.pages]
        self.text = "\n".join(self.pages)
        # Table cells may wrap: compare against the text with line breaks folded too.
        self.flat = re.sub(r"\s+", " ", self.text)

    def has(self, phrase: str) -> bool:
        phrase = re.sub(r"\s+", " ", phrase)
        return phrase in self.flat or phrase.replace(" ", "") in self.flat.replace(" ", "")


def render_recording(html: str) -> tuple[bytes, list[str]]:
    """Render ``html`` while recording every URL the fetcher is asked for."""
    asked: list[str] = []

    class Recording(pdf.TemplateFetcher):
        def fetch(self, url: str, headers: object = None):  # type: ignore[no-untyped-def]
            asked.append(url)
            return super().fetch(url, headers)

    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(pdf, "TemplateFetcher", Recording)
        data = pdf.render_pdf(html)
    return data, asked


def render(result: CellResult) -> Rendered:
    """Render ``result`` while recording every URL the fetcher is asked for."""
    data, asked = render_recording(render_html(result))
    return Rendered(result, asked, data)


@pytest.fixture(scope="module")
def hazards() -> Iterator[types.ModuleType]:
    """pipeline.report.hazards when it exists, else the test stand-in with the same API."""
    module = cases.real_hazards() or cases.stand_in_hazards()
    with cases.hazards_in_use(module):
        yield module


@pytest.fixture(scope="module")
def passed(hazards: types.ModuleType) -> Rendered:
    return render(cases.pass_result())


@pytest.fixture(scope="module")
def failed(hazards: types.ModuleType) -> Rendered:
    return render(cases.fail_result())


@pytest.fixture(scope="module")
def held(hazards: types.ModuleType) -> Rendered:
    return render(cases.hold_result())


@pytest.fixture(params=["passed", "failed", "held"])
def any_cert(request: pytest.FixtureRequest) -> Rendered:
    return request.getfixturevalue(request.param)


# --- what the certificate says --------------------------------------------------------------


def test_verdict_word_is_on_the_first_page(passed: Rendered, failed: Rendered,
                                           held: Rendered) -> None:
    assert "PASS" in passed.pages[0] and "FAIL" not in passed.text
    assert "FAIL" in failed.pages[0]
    assert "HOLD" in held.pages[0]


def test_every_check_row_shows_its_id_metric_and_outcome(any_cert: Rendered) -> None:
    outcomes = {"in_window": "in window", "out_of_window": "OUT OF WINDOW",
                "not_judged": "not judged", "skipped": "skipped"}
    for check in any_cert.result.verdict.checks:
        assert any_cert.has(check.rule_id), check.rule_id
        assert any_cert.has(check.metric), check.metric
    shown = [outcomes[c.outcome.value] for c in any_cert.result.verdict.checks]
    for word in set(shown):
        assert any_cert.flat.count(word) >= shown.count(word), word


def test_traceability_hashes_and_versions_are_printed_whole(any_cert: Rendered) -> None:
    assert cases.INPUT_SHA256 in any_cert.text
    assert cases.RULES_SHA256 in any_cert.text
    assert cases.SOURCE_NAME in any_cert.text
    assert "demo-lfp, revision 3" in any_cert.text
    assert "formgate 0.1.0" in any_cert.text
    assert "2026-03-02T10:15:00Z" in any_cert.text


def test_failed_cell_carries_each_hazard_caution_and_the_general_caution(
    failed: Rendered, hazards: types.ModuleType
) -> None:
    assert failed.result.verdict.hazards
    for hazard in failed.result.verdict.hazards:
        assert failed.has(hazards.CAUTIONS[hazard].title), hazard
        assert failed.has(hazards.CAUTIONS[hazard].text), hazard
    assert failed.has(hazards.GENERAL_CAUTION)


def test_failed_cell_says_how_to_handle_it_once_however_many_hazards(
    failed: Rendered, hazards: types.ModuleType
) -> None:
    assert len(failed.result.verdict.hazards) > 1
    handling = re.sub(r"\s+", " ", hazards.HANDLING).replace(" ", "")
    assert failed.flat.replace(" ", "").count(handling) == 1


@pytest.mark.parametrize("name", ["passed", "held"])
def test_cells_that_did_not_fail_carry_no_hazard_caution(
    name: str, request: pytest.FixtureRequest, hazards: types.ModuleType
) -> None:
    cert: Rendered = request.getfixturevalue(name)
    for caution in hazards.CAUTIONS.values():
        assert not cert.has(caution.title)
    assert not cert.has(hazards.GENERAL_CAUTION)
    assert not cert.has(hazards.HANDLING)


def test_every_page_carries_the_data_check_notice(
    any_cert: Rendered, hazards: types.ModuleType
) -> None:
    for page in any_cert.pages:
        assert re.sub(r"\s+", " ", hazards.DATA_CHECK_NOTICE) in re.sub(r"\s+", " ", page)


def test_held_cell_says_it_must_not_be_released(held: Rendered) -> None:
    assert held.has("must not be released until it has been reviewed")


def test_a_passed_cells_certificate_is_one_page_with_its_checks_and_verification(
    passed: Rendered,
) -> None:
    assert len(passed.reader.pages) == 1
    for check in passed.result.verdict.checks:
        assert passed.has(check.rule_id) and passed.has(check.metric)
    for kept in ("Cycles", "Data quality", passed.result.input_sha256, "Verification code"):
        assert passed.has(kept)
    assert not passed.has("Grading discharge") and not passed.has("Hazard (if out of window)")


def test_certificate_fits_three_a4_pages(any_cert: Rendered) -> None:
    # about a dozen checks, three cycles, three plateaus, (failed) three cautions and the
    # plots of what failed
    assert 1 <= len(any_cert.reader.pages) <= 3
    for page in any_cert.reader.pages:
        width, height = float(page.mediabox.width), float(page.mediabox.height)
        # A4 is 210 x 297 mm (ISO 216) = 595.28 x 841.89 pt
        assert (width, height) == pytest.approx((595.28, 841.89), abs=0.01)


# --- how the PDF is built -------------------------------------------------------------------


def test_same_result_gives_byte_identical_pdf(any_cert: Rendered) -> None:
    assert render(any_cert.result).data == any_cert.data


def test_metadata_is_set_and_holds_no_clock_time(failed: Rendered) -> None:
    info = failed.reader.metadata
    assert info["/Title"] == "Certificate for cell DEMO-C0042: FAIL"
    assert info["/Author"] == "formgate"
    assert info["/Creator"] == "formgate 0.1.0"
    assert info["/CreationDate"] == info["/ModDate"] == "D:20260302101500Z"
    assert "/ID" not in failed.reader.trailer


def _xobjects(resources: DictionaryObject) -> Iterator[DictionaryObject]:
    for ref in (resources.get("/XObject") or {}).values():
        obj = ref.get_object()
        yield obj
        if "/Resources" in obj:
            yield from _xobjects(obj["/Resources"])


def test_plots_stay_vector_graphics(failed: Rendered) -> None:
    drawn = b""
    for page in failed.reader.pages:
        assert not [x for x in _xobjects(page["/Resources"]) if x.get("/Subtype") == "/Image"]
        drawn += page.get_contents().get_data()
    line_segments = len(re.findall(rb"\sl\n", drawn))
    assert line_segments > 300  # the two decimated curves alone are several hundred points
    assert failed.has("Discharged capacity (%)") and failed.has("dQ/dV (Ah/V)")


def test_only_the_shipped_font_is_embedded(failed: Rendered) -> None:
    names = set()
    for page in failed.reader.pages:
        fonts = page["/Resources"]["/Font"]
        names |= {str(f.get_object()["/BaseFont"]).split("+")[-1] for f in fonts.values()}
    assert names == {"Certificate-Sans"}
    # the font is loaded once per process with the parsed stylesheet, from templates/
    stylesheet_fetcher = pdf.TemplateFetcher()
    assert stylesheet_fetcher.resolve((TEMPLATES_DIR / "fonts" / "CertificateSans.ttf").as_uri())


def test_renderer_only_asks_for_files_inside_templates(any_cert: Rendered) -> None:
    # the stylesheet and font come from the per-process parsed copy; anything else asked for
    # while rendering a certificate must come from templates/ too
    for url in any_cert.asked:
        assert url.startswith(TEMPLATES_DIR.as_uri() + "/"), url


def test_hostile_cell_id_prints_as_text_and_reads_no_file(hazards: types.ModuleType) -> None:
    cert = render(cases.fail_result(cell_id=HOSTILE, station="<link rel=stylesheet "
                                    "href=http://example.invalid/x.css>"))
    assert cert.has(HOSTILE)
    assert cert.has("<link rel=stylesheet href=http://example.invalid/x.css>")
    assert not [u for u in cert.asked if "passwd" in u or "example.invalid" in u]
    for url in cert.asked:
        assert url.startswith(TEMPLATES_DIR.as_uri() + "/"), url


def test_markup_that_asks_for_outside_files_renders_without_them(
    hazards: types.ModuleType, caplog: pytest.LogCaptureFixture
) -> None:
    html = render_html(cases.pass_result()).replace(
        "</body>",
        '<img src="file:///etc/passwd"><img src="http://example.invalid/a.png">'
        '<img src="data:image/png;base64,iVBORw0KGgo="><img src="../pyproject.toml">'
        '<link rel="stylesheet" href="/etc/ssl/openssl.cnf"></body>',
    )
    data, asked = render_recording(html)
    assert data.startswith(b"%PDF-")
    refused = [u for u in asked if not u.startswith(TEMPLATES_DIR.as_uri() + "/")]
    assert len(refused) >= 4
    assert "refused" in caplog.text


# --- the fetcher on its own -----------------------------------------------------------------


def test_fetcher_serves_template_files_with_their_type() -> None:
    fetcher = pdf.TemplateFetcher()
    response = fetcher.fetch((TEMPLATES_DIR / "certificate.css").as_uri())
    assert response.content_type == "text/css"
    assert b"@font-face" in response.read()
    font = fetcher.fetch((TEMPLATES_DIR / "fonts" / "CertificateSans.ttf").as_uri())
    assert font.content_type == "font/ttf"


@pytest.mark.parametrize(
    "url",
    [
        "file:///etc/passwd",
        "http://example.invalid/certificate.css",
        "https://example.invalid/certificate.css",
        "data:text/css,body{}",
        "ftp://example.invalid/x",
        (TEMPLATES_DIR / ".." / "pyproject.toml").as_uri(),
        (TEMPLATES_DIR / "no-such-file.css").as_uri(),
        (TEMPLATES_DIR / "fonts").as_uri(),
        "file://otherhost" + (TEMPLATES_DIR / "certificate.css").as_posix(),
    ],
)
def test_fetcher_refuses_everything_outside_templates(url: str) -> None:
    fetcher = pdf.TemplateFetcher()
    with pytest.raises(ValueError, match="refused"):
        fetcher.fetch(url)
    assert fetcher.requested == [url]


def test_fetcher_refuses_a_link_that_leads_out_of_its_folder(tmp_path: Path) -> None:
    root = tmp_path / "templates"
    root.mkdir()
    secret = tmp_path / "secret.css"
    secret.write_text("body { color: red }")
    (root / "inside.css").write_text("body { color: blue }")
    (root / "link.css").symlink_to(secret)
    fetcher = pdf.TemplateFetcher(root)
    assert fetcher.fetch((root / "inside.css").as_uri()).read() == b"body { color: blue }"
    with pytest.raises(ValueError, match="refused"):
        fetcher.fetch((root / "link.css").as_uri())


# --- writing --------------------------------------------------------------------------------


def test_write_pdf_creates_folders_replaces_whole_files_and_leaves_no_temp(
    tmp_path: Path, passed: Rendered, failed: Rendered
) -> None:
    target = tmp_path / "certificates" / "DEMO-LOT-01" / "DEMO-C0042.pdf"
    pdf.write_pdf(passed.data, target)
    assert target.read_bytes() == passed.data
    pdf.write_pdf(failed.data, target)
    assert target.read_bytes() == failed.data
    assert [p.name for p in target.parent.iterdir()] == ["DEMO-C0042.pdf"]
    assert os.stat(target).st_mode & 0o777 == 0o644


def test_write_pdf_that_fails_keeps_the_old_file_and_cleans_up(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    target = tmp_path / "cert.pdf"
    target.write_bytes(b"old")

    def broken_replace(src: str, dst: str) -> None:
        raise OSError("disk full")

    monkeypatch.setattr(pdf.os, "replace", broken_replace)
    with pytest.raises(OSError, match="disk full"):
        pdf.write_pdf(b"%PDF-new", target)
    assert target.read_bytes() == b"old"
    assert [p.name for p in tmp_path.iterdir()] == ["cert.pdf"]


def test_fast_path_gives_the_same_pages_and_text_as_a_plain_render(hazards: types.ModuleType) -> None:
    """The shared stylesheet and font change the speed, not the certificate."""
    for result in (cases.pass_result(), cases.fail_result(), cases.hold_result()):
        html = render_html(result)
        fast_data = pdf.render_pdf(html)
        fast = PdfReader(io.BytesIO(fast_data))
        plain = PdfReader(io.BytesIO(pdf.render_pdf_plain(html)))
        assert len(fast.pages) == len(plain.pages)
        for a, b in zip(fast.pages, plain.pages, strict=True):
            assert a.extract_text() == b.extract_text()
        assert pdf.render_pdf(html) == fast_data  # still byte-identical run to run


# --- the XML parse of the template's XHTML --------------------------------------------------


def _html5_only(html: str) -> bytes:
    """Render with WeasyPrint's own HTML5 parser (the XML parse switched off)."""
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(pdf, "parse_xhtml", lambda *args: None)
        return pdf.render_pdf(html)


@pytest.mark.parametrize(
    "make",
    [
        cases.pass_result,
        cases.fail_result,
        cases.hold_result,
        lambda: cases.fail_result(cell_id=HOSTILE, station='"quoted" & <b>bold</b> \u2264 \u03a9 \u00e9'),
    ],
    ids=["pass", "fail", "hold", "markup-and-non-ascii"],
)
def test_xml_parse_gives_the_same_pdf_bytes_as_the_html5_parser(
    hazards: types.ModuleType, make: types.FunctionType
) -> None:
    html = render_html(make())
    assert pdf.parse_xhtml(html, TEMPLATES_DIR.as_uri() + "/", pdf.TemplateFetcher()) is not None
    assert pdf.render_pdf(html) == _html5_only(html)


def test_html_that_is_not_well_formed_xml_is_parsed_as_html5(hazards: types.ModuleType) -> None:
    html = render_html(cases.pass_result()).replace("</body>", "<p>unclosed<br></body>")
    assert pdf.parse_xhtml(html, TEMPLATES_DIR.as_uri() + "/", pdf.TemplateFetcher()) is None
    assert "unclosed" in PdfReader(io.BytesIO(pdf.render_pdf(html))).pages[-1].extract_text()


@pytest.mark.parametrize("subsetter", ["harfbuzz", "fonttools"])
def test_embedded_font_holds_no_clock_time_with_either_subsetter(
    hazards: types.ModuleType, subsetter: str
) -> None:
    """WeasyPrint subsets with HarfBuzz when libharfbuzz-subset is installed, else with fontTools,
    which stamps the font with the current time unless SOURCE_DATE_EPOCH is set."""
    fonts = pytest.importorskip("weasyprint.pdf.fonts")
    if subsetter == "harfbuzz" and not fonts.harfbuzz_subset:
        pytest.skip("libharfbuzz-subset is not installed here")
    html = render_html(cases.pass_result())
    with pytest.MonkeyPatch.context() as patch:
        if subsetter == "fonttools":
            patch.setattr(fonts, "harfbuzz_subset", None)
        data = pdf.render_pdf(html)
    from fontTools.ttLib import TTFont

    reader = PdfReader(io.BytesIO(data))
    font = reader.pages[0]["/Resources"]["/Font"]
    descriptor = next(iter(font.values())).get_object()["/DescendantFonts"][0].get_object()
    program = descriptor["/FontDescriptor"].get_object()["/FontFile2"].get_object().get_data()
    head = TTFont(io.BytesIO(program))["head"]
    # 1970-01-01 counted in seconds from 1904-01-01, the epoch of TrueType's 'head' table
    # (OpenType specification, 'head' table: created and modified, LONGDATETIME)
    epoch_1970 = 2_082_844_800
    shipped = TTFont(TEMPLATES_DIR / "fonts" / "CertificateSans.ttf")["head"]
    assert head.modified in (epoch_1970, shipped.modified)


def test_xml_parse_steps_aside_for_a_weasyprint_that_builds_documents_differently(
    hazards: types.ModuleType, monkeypatch: pytest.MonkeyPatch
) -> None:
    html = render_html(cases.pass_result())
    assert pdf._xml_parse_fits()  # the pinned WeasyPrint
    fast = pdf.render_pdf(html)

    class Newer(pdf.HTML):  # type: ignore[misc]
        def __init__(self, *args: object, **kwargs: object) -> None:
            super().__init__(*args, **kwargs)
            self.something_new = True

    monkeypatch.setattr(pdf, "HTML", Newer)
    pdf._xml_parse_fits.cache_clear()
    try:
        assert not pdf._xml_parse_fits()
        assert pdf.parse_xhtml(html, TEMPLATES_DIR.as_uri() + "/", pdf.TemplateFetcher()) is None
        assert pdf.render_pdf(html) == fast  # parsed as HTML5: the same pages
    finally:
        monkeypatch.undo()
        pdf._xml_parse_fits.cache_clear()


def test_whitespace_beside_blocks_is_dropped_and_between_inline_elements_kept() -> None:
    root = ElementTree.fromstring(
        "<body>\n <section>\n  <h2>Checks</h2>\n  <table><tbody>\n   <tr><td>a <span>b</span> "
        "<span>c</span></td></tr>\n  </tbody></table>\n </section>\n <p>x <b>y</b> z</p>\n</body>"
    )
    pdf.drop_layout_whitespace(root)
    assert ElementTree.tostring(root, encoding="unicode") == (
        "<body><section><h2>Checks</h2><table><tbody><tr><td>a <span>b</span> <span>c</span>"
        "</td></tr></tbody></table></section><p>x <b>y</b> z</p></body>"
    )


@pytest.mark.skipif(shutil.which("pdftotext") is None, reason="needs pdftotext (poppler-utils)")
def test_a_passed_cells_outcomes_start_under_their_heading(passed: Rendered, tmp_path: Path) -> None:
    """The outcome a tab stop places (one cell with the severity) starts where its heading does."""
    (tmp_path / "passed.pdf").write_bytes(passed.data)
    words = subprocess.run(
        ["pdftotext", "-bbox", str(tmp_path / "passed.pdf"), "-"], check=True, capture_output=True,
        text=True,
    ).stdout
    found = re.findall(r'<word xMin="([\d.]+)" yMin="([\d.]+)"[^>]*>([^<]*)</word>', words)
    heading = next(float(x) for x, _, word in found if word == "Outcome")
    outcomes = [  # where each "in window" begins
        float(x) for (x, y, word), (_, y_next, following) in itertools.pairwise(found)
        if word == "in" and following == "window" and y == y_next
    ]
    assert len(outcomes) == len(passed.result.verdict.checks)
    assert all(abs(x - heading) < 0.2 for x in outcomes), (heading, outcomes)


# --- plot labels drawn whole (svgtext.py) ---------------------------------------------------


def _page_images(data: bytes, folder: Path, name: str) -> list[Path]:
    (folder / f"{name}.pdf").write_bytes(data)
    subprocess.run(
        ["pdftoppm", "-png", "-r", "100", str(folder / f"{name}.pdf"), str(folder / name)], check=True
    )
    return sorted(folder.glob(f"{name}-*.png"))


@pytest.mark.skipif(shutil.which("pdftoppm") is None, reason="needs pdftoppm (poppler-utils) to draw pages")
def test_plot_labels_drawn_whole_look_as_drawn_letter_by_letter(
    hazards: types.ModuleType, tmp_path: Path
) -> None:
    """The same glyphs at the same places: at most a few anti-aliased pixels differ per page."""
    image = pytest.importorskip("PIL.Image")
    chops = pytest.importorskip("PIL.ImageChops")
    html = render_html(cases.fail_result())
    whole = _page_images(pdf.render_pdf(html), tmp_path, "whole")
    letters = _page_images(pdf.render_pdf_plain(html), tmp_path, "letters")
    assert len(whole) == len(letters) == 3
    for a, b in zip(whole, letters, strict=True):
        diff = chops.difference(image.open(a).convert("L"), image.open(b).convert("L"))
        histogram = diff.histogram()
        differing = sum(histogram[64:])  # pixels a quarter of the scale apart or more
        assert differing < 0.0005 * diff.width * diff.height, (a.name, differing)


def test_plot_labels_drawn_whole_are_fewer_runs_with_the_same_text(failed: Rendered) -> None:
    html = render_html(failed.result)
    letters = PdfReader(io.BytesIO(pdf.render_pdf_plain(html)))

    def runs(reader: PdfReader) -> int:
        """Runs of text drawn: one per label drawn whole, one per letter drawn letter by letter."""
        count = 0
        for page in reader.pages:
            count += len(re.findall(rb"\bTJ\b", page.get_contents().get_data()))
            for xobject in _xobjects(page["/Resources"]):
                if xobject.get("/Subtype") == "/Form":
                    count += len(re.findall(rb"\bTJ\b", xobject.get_data()))
        return count

    assert runs(failed.reader) < runs(letters) / 2
    assert [p.extract_text() for p in failed.reader.pages] == [p.extract_text() for p in letters.pages]


class _Node:
    """Just enough of a WeasyPrint SVG node for svgtext.whole to choose who draws it."""

    def __init__(self, tag: str, text: str, **attrib: str) -> None:
        self.tag, self.text, self.attrib = tag, text, attrib

    def get(self, key: str, default: object = None) -> object:
        return self.attrib.get(key, default)

    def __iter__(self) -> Iterator[object]:
        return iter(())


@pytest.mark.parametrize(
    "node",
    [
        _Node("text", "3.0", x="1 2 3", y="4"),
        _Node("text", "3.0", x="1", y="4", dx="0.5"),
        _Node("text", "3.0", x="1", y="4", rotate="10"),
        _Node("text", "3.0", x="1", y="4", textLength="9"),
        _Node("text", "3.0", x="1", y="4", **{"letter-spacing": "1"}),
        _Node("tspan", "3.0", x="1", y="4"),
        _Node("text", "", x="1", y="4"),
    ],
    ids=["x-list", "dx", "rotate", "textLength", "letter-spacing", "tspan", "empty"],
)
def test_labels_that_place_their_letters_are_drawn_by_weasyprint(
    node: _Node, monkeypatch: pytest.MonkeyPatch
) -> None:
    from pipeline.report import svgtext

    pieces = svgtext._weasyprint()
    assert pieces is not None  # the pinned WeasyPrint
    drawn = []
    monkeypatch.setitem(pieces, "original", lambda svg, n, size: drawn.append(n))
    svgtext.whole(object(), node, 10.0)
    assert drawn == [node]


def test_another_weasyprint_draws_every_label_itself(monkeypatch: pytest.MonkeyPatch) -> None:
    import weasyprint
    import weasyprint.svg

    from pipeline.report import svgtext

    own = weasyprint.svg.TAGS["text"]
    monkeypatch.setattr(weasyprint, "__version__", "999.0")
    svgtext._weasyprint.cache_clear()
    try:
        with svgtext.drawing_labels_whole() as whole:
            assert not whole and weasyprint.svg.TAGS["text"] is own
    finally:
        monkeypatch.undo()
        svgtext._weasyprint.cache_clear()
    with svgtext.drawing_labels_whole() as whole:
        assert whole and weasyprint.svg.TAGS["text"] is svgtext.whole
    assert weasyprint.svg.TAGS["text"] is own and weasyprint.svg.text is own


def test_prepare_renders_a_page_in_the_certificate_font_and_its_plot_labels() -> None:
    """The warm-up page prepare() renders is well-formed, set in the shipped font, with a label."""
    assert pdf.parse_xhtml(pdf._WARM_UP, pdf.BASE_URL, pdf.TemplateFetcher()) is not None
    reader = PdfReader(io.BytesIO(pdf.render_pdf(pdf._WARM_UP)))
    text = reader.pages[0].extract_text()
    assert "3.218 V" in text and "\N{MINUS SIGN}2.0" in text
    fonts = reader.pages[0]["/Resources"]["/Font"]
    assert {str(f.get_object()["/BaseFont"]).split("+")[-1] for f in fonts.values()} == {"Certificate-Sans"}
    pdf.prepare()  # and it runs again without harm


@pytest.mark.parametrize("make", [cases.pass_result, cases.fail_result, cases.hold_result], ids=["pass", "fail", "hold"])
def test_nothing_on_a_page_reaches_past_its_margins(hazards: types.ModuleType, make: types.FunctionType) -> None:
    """Every box of the certificate's body lies within the page's content area (A4 less margins)."""
    document = pdf.lay_out(render_html(make()))
    for number, page in enumerate(document.pages, start=1):
        page_box = page._page_box
        left = page_box.content_box_x()
        right = left + page_box.width
        body = page_box.children[0]  # the html element; the other children are margin boxes
        for box in body.descendants():
            if box.width is None or not box.element_tag:
                continue
            far = box.position_x + box.margin_width()
            assert left - 0.01 <= box.position_x and far <= right + 0.01, (
                f"page {number}: <{box.element_tag} class={box.element.get('class')}> "
                f"runs {far - right:.1f} px past the right margin"
            )


@pytest.mark.slow
def test_every_passed_demo_cell_certified_as_a_station_does_is_one_page() -> None:
    """Read through the demo's channel (its zero offset taken out, which the data-quality
    section says), with the scope line that names the cell's own certificate: still one page."""
    import datetime

    from pipeline.acceptance.results import VerdictKind
    from pipeline.demo.lots import ALL_DEMO_CELLS, demo_file_bytes
    from pipeline.names import cell_file_stem
    from pipeline.report.result import to_json
    from pipeline.report.verification import verification_code
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge
    from pipeline.shipped import RULES_DIR

    rulebook = load_rules_dir(RULES_DIR)
    at = datetime.datetime(2026, 3, 2, 12, 0, tzinfo=datetime.UTC)
    checked = corrected = 0
    for cell in ALL_DEMO_CELLS:
        result = judge(demo_file_bytes(cell), f"{cell.cell_id}.csv", rulebook, analysed_at=at)
        if result.verdict.kind is not VerdictKind.PASS:
            continue
        html = render_html(result, verification_code(to_json(result)),
                           cell_certificate=f"{cell_file_stem(result.cell_id)}.pdf")
        pages = len(PdfReader(io.BytesIO(pdf.render_pdf(html))).pages)
        assert pages == 1, f"{cell.cell_id}: {pages} pages"
        checked += 1
        corrected += bool(result.current_band and result.current_band.corrected)
    assert checked >= 10 and corrected == checked


@pytest.mark.slow
def test_a_passed_stage_record_certified_as_a_station_does_is_one_page() -> None:
    import dataclasses
    import datetime
    import hashlib

    from pipeline.acceptance.results import VerdictKind
    from pipeline.demo.lots import DEMO_STAGED_CELLS, demo_stage_files, stage_file_name
    from pipeline.names import cell_file_stem
    from pipeline.report.result import to_json
    from pipeline.report.verification import verification_code
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge
    from pipeline.shipped import RULES_DIR

    rulebook = load_rules_dir(RULES_DIR)
    at = datetime.datetime(2026, 3, 5, 12, 0, tzinfo=datetime.UTC)
    cell = DEMO_STAGED_CELLS[0]
    formation = demo_stage_files(cell)["formation"]
    for stage, data in demo_stage_files(cell).items():
        result = judge(data, stage_file_name(cell, stage), rulebook, analysed_at=at)
        if stage == "grading":  # as a station shows it: with the formation record beside it
            from pipeline.acceptance.results import OtherRecord
            other = OtherRecord(("formation",), stage_file_name(cell, "formation"),
                                hashlib.sha256(formation).hexdigest(), "pass")
            result = dataclasses.replace(result, other_records=(other,))
        assert result.verdict.kind is VerdictKind.PASS, stage
        html = render_html(result, verification_code(to_json(result)),
                           cell_certificate=f"{cell_file_stem(result.cell_id)}.pdf")
        rendered = PdfReader(io.BytesIO(pdf.render_pdf(html)))
        assert len(rendered.pages) == 1, stage
        text = re.sub(r"\s+", " ", rendered.pages[0].extract_text())
        # a stage's pass is not the cell's release, and the page says so
        assert "The cell may be released only once every stage it needs" in text
