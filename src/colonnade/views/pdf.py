"""The report as a PDF for offline review, printed from the report's own HTML.

WeasyPrint (a maintained HTML/CSS-to-PDF engine that follows the CSS paged-media rules:
page sizes, running footers, page counters, repeated table headers) lays out the same
HTML that ``report.html`` holds, so the two cannot drift apart. It is imported here only,
and needs the Pango text libraries of the system (Debian: libpango-1.0-0,
libpangoft2-1.0-0), which ``make setup`` installs.
"""

from __future__ import annotations

import logging

from ..errors import ColonnadeError

__all__ = ["html_to_pdf", "PdfEngineMissingError"]

INSTALL_HINT = ("pip install weasyprint, and on Debian apt-get install libpango-1.0-0 "
                "libpangoft2-1.0-0")


class PdfEngineMissingError(ColonnadeError):
    """WeasyPrint or the system libraries it needs are missing."""


def html_to_pdf(page: str) -> bytes:
    """The PDF of a self-contained HTML page (every image inlined, nothing fetched)."""
    try:
        import weasyprint
    except (ImportError, OSError) as exc:  # OSError: the Pango libraries are missing
        raise PdfEngineMissingError(
            f"the PDF engine cannot start ({exc.__class__.__name__}); {INSTALL_HINT}, or "
            f"pass --no-pdf") from None
    # WeasyPrint logs every CSS property it does not support; the report's CSS is ours.
    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    # The page inlines every image as a data: URI and links nothing, so nothing is fetched.
    return weasyprint.HTML(string=page).write_pdf()
