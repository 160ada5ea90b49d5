"""Make templates/fonts/CertificateSans.ttf: DejaVu Sans cut down to the characters a certificate uses.

Every certificate embeds its font; subsetting a 6,000-glyph font for every document
costs a fifth of a render. This cut keeps Latin (Basic, Latin-1, Extended-A and B),
Greek, general punctuation, the arrows and the mathematical operators - about a
thousand glyphs - so the per-document work is small. A character outside this set
(in a cell id, say) is drawn from a system font by the renderer's fallback.

Run from the repository: python templates/fonts/make_font.py  (needs fontTools, which
WeasyPrint installs). The source is the DejaVu Sans the licence file beside this one covers.
"""

from __future__ import annotations

import sys
from pathlib import Path

from fontTools import subset

HERE = Path(__file__).resolve().parent
RANGES = (
    (0x0020, 0x007E),  # Basic Latin
    (0x00A0, 0x024F),  # Latin-1 Supplement, Latin Extended-A and -B
    (0x0370, 0x03FF),  # Greek (Ω, Δ, µ-like letters in units and names)
    (0x2010, 0x205E),  # General Punctuation (dashes, quotes, bullets, ‰)
    (0x20AC, 0x20AC),  # euro sign
    (0x2100, 0x214F),  # Letterlike Symbols (Ω ohm sign, ℃)
    (0x2190, 0x21FF),  # Arrows
    (0x2200, 0x22FF),  # Mathematical Operators (≤ ≥ − ± ×)
    (0x25A0, 0x25FF),  # Geometric Shapes (plot markers)
)


def main(source: Path, target: Path) -> None:
    options = subset.Options()
    options.name_IDs = ["*"]  # keep the names, copyright and licence notice
    options.name_languages = ["*"]
    options.notdef_outline = True
    # no OpenType layout tables (kerning, ligatures, mark positioning) and no MATH table:
    # the renderer re-reads them for every document, and for tables of figures and
    # identifiers plain advance widths read as well
    options.layout_features = []
    options.drop_tables += ["GSUB", "GPOS", "GDEF", "MATH"]
    options.hinting = False  # a PDF on screen or paper does not use TrueType hinting
    font = subset.load_font(str(source), options)
    subsetter = subset.Subsetter(options)
    subsetter.populate(unicodes=[u for lo, hi in RANGES for u in range(lo, hi + 1)])
    subsetter.subset(font)
    font.save(str(target))
    font.close()


if __name__ == "__main__":
    # Debian's fonts-dejavu-core ships the source font here
    src = Path(sys.argv[1] if len(sys.argv) > 1 else "/usr/share/fonts/truetype/dejavu/DejaVuSans.ttf")
    main(src, HERE / "CertificateSans.ttf")
