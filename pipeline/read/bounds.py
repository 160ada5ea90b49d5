"""How long a name or value read from a file may be: the byte limit, and its located refusal.

A cell id, lot, cell type, channel or station, every other metadata key and value, and
every column name come from a file someone else wrote; each goes on into file names,
the ledger, mails, logs and certificates, where its cost grows with its length (a
certificate's layout lays out a long unbroken name again and again). So each is measured
in bytes (UTF-8, what it takes in every later store) the moment the reader has cut it
out of its line, and refused past :data:`MAX_TEXT_BYTES` with the file, the line and the
key or column named, before anything else is done with it. The number of metadata entries
is bounded for the same reason: each is a row of every certificate.

>>> byte_length("C-1"), byte_length("\\N{BATTERY}" * 3)
(3, 12)
>>> check_length("C-1", "metadata cell_id", SourceRef("c.csv", 1))
>>> try:
...     check_length("\\N{BATTERY}" * 100, "metadata cell_id", SourceRef("c.csv", 1))
... except InputError as exc:
...     print(exc.problem)
metadata cell_id is 400 bytes long (100 characters), more than the 256 bytes formgate reads
"""

from __future__ import annotations

from pipeline.errors import InputError
from pipeline.model import SourceRef

# Labels and barcodes (Code 128, Data Matrix) carry cell ids of up to about 64 characters
# (common practice), lots and cell types are shorter; 256 bytes leaves four times that,
# and room for a long program name or a short note. No cycler needs more in one value.
MAX_TEXT_BYTES = 256
# A cycle file's head holds a handful of entries (the v1 keys are eight); a cycler that
# writes its settings there may write a few dozen. Each becomes a row of the certificate.
MAX_METADATA_ENTRIES = 64
# The UTF-8 form of one character is at most this long: a text of at most
# MAX_TEXT_BYTES // UTF8_MAX characters always fits, one longer than MAX_TEXT_BYTES
# never does, and only those between are encoded to be measured.
UTF8_MAX = 4
_SHOWN = 24  # characters of a refused name shown in the message

TOO_LONG_HINT = (
    "An identifier needs far fewer (a label's barcode holds about 64 characters): check what "
    "the writer puts there, and shorten it to at most {limit} bytes (a character outside "
    "ASCII takes 2 to 4)."
)


def byte_length(text: str) -> int:
    """Bytes of ``text`` in UTF-8 (a lone surrogate, from a damaged name, counts as 3)."""
    if text.isascii():
        return len(text)
    return len(text.encode("utf-8", "surrogatepass"))


def fits(text: str, limit: int = MAX_TEXT_BYTES) -> bool:
    """True when ``text`` takes at most ``limit`` bytes; cheap for the short texts of every row."""
    if len(text) <= limit // UTF8_MAX:
        return True
    if len(text) > limit:
        return False
    return byte_length(text) <= limit


def shown_value(text: str) -> str:
    """A field's value as a message shows it: at most 40 characters, control characters escaped.

    >>> shown_value("x" * 50), shown_value("a\\tb")
    ('xxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxxx...', 'a\\\\tb')
    """
    text = text if len(text) <= 40 else text[:37] + "..."
    return text if text.isprintable() else text.encode("unicode_escape").decode("ascii")


def shown(text: str) -> str:
    """The start of a refused name, quoted, safe to print (control characters escaped)."""
    head = text[:_SHOWN]
    if not head.isprintable():
        head = head.encode("unicode_escape").decode("ascii")
    return f"'{head}...'" if len(text) > _SHOWN else f"'{head}'"


def too_long(what: str, text: str, where: SourceRef, hint: str = "") -> InputError:
    """The refusal of ``text`` (named by ``what``, e.g. "metadata cell_id") at ``where``."""
    size = byte_length(text)
    return InputError(
        f"{what} is {size:,} bytes long ({len(text):,} characters), more than the "
        f"{MAX_TEXT_BYTES} bytes formgate reads",
        where,
        hint or TOO_LONG_HINT.format(limit=MAX_TEXT_BYTES),
    )


def check_length(text: str, what: str, where: SourceRef, hint: str = "") -> None:
    """Raise :func:`too_long`'s InputError if ``text`` takes more than MAX_TEXT_BYTES bytes."""
    if not fits(text):
        raise too_long(what, text, where, hint)
