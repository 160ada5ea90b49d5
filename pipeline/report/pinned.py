"""The WeasyPrint whose internals the certificate's fast paths reproduce, and the check they share.

svgtext.py (plot labels drawn whole), svgpath.py (plot paths read once), stylecache.py (styles
kept between certificates) and keptlayouts.py (text drawn from the layout that broke it) each
reproduce a piece of this WeasyPrint (the pin in constraints.txt). With any other version each
steps aside, says so once in the log, and WeasyPrint does the work itself: slower, same page.
"""

from __future__ import annotations

import logging

log = logging.getLogger(__name__)

FITS = "70.0"  # the WeasyPrint the fast paths reproduce pieces of


def weasyprint_fits(otherwise: str) -> bool:
    """Whether the installed WeasyPrint is FITS; if not, log once per caller what happens instead."""
    import weasyprint

    if weasyprint.__version__ == FITS:
        return True
    log.warning("WeasyPrint %s is not %s: %s (slower, same page)", weasyprint.__version__, FITS, otherwise)
    return False
