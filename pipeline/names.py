"""Names made from what others wrote: safe file names for identifiers, and input file names as text.

Two jobs of one kind, both about names a cycler or a data file chose:

**Identifiers as file names.** A cell id or lot comes from a file written by someone
else: it may hold path separators, dots, control characters or thousands of characters.
Only letters, digits, ``-``, ``_`` and inner dots survive; anything changed gets a short
hash of the original appended, so two different ids never share a file name.

**Input file names as the station stores and shows them.**
A cycler may write any bytes into a file name: bytes that are not UTF-8, control
characters, a line break, a right-to-left override, 250 characters. The ledger,
the mails and the logs need text; the archive needs a name that, with the ledger
id in front, still fits the filesystem's limit of 255 bytes per name.

``to_text`` turns a name as the operating system gives it (a ``str`` whose
undecodable bytes are lone surrogates, Python's ``surrogateescape``) into plain
text: a byte that is not UTF-8 becomes ``\\xNN``, a control or format character
``\\xNN`` (ASCII) or ``\\uNNNN``, and a backslash ``\\\\``. Nothing else changes,
and ``from_text`` gives the exact original back, so a name is never lost.
``fit`` shortens a name that is too long, keeping its extension and appending a
hash of the whole name, so two long names never end up the same.

>>> to_text("cell_\\udce9.csv"), from_text("cell_\\\\xe9.csv") == "cell_\\udce9.csv"
('cell_\\\\xe9.csv', True)
>>> len(fit("a" * 300 + ".csv").encode()), fit("a" * 300 + ".csv").endswith(".csv")
(255, True)
"""

from __future__ import annotations

import hashlib
import os
import re
import unicodedata

_UNSAFE = re.compile(r"[^A-Za-z0-9._-]+")
MAX_LEN = 80


def safe_name(identifier: str) -> str:
    """A file-name-safe form of ``identifier`` that differs for different identifiers.

    >>> safe_name("DEMO-LOT-01")
    'DEMO-LOT-01'
    >>> safe_name("../etc/passwd")
    'etc_passwd-7fef78f5'
    """
    cleaned = _UNSAFE.sub("_", identifier).strip("._")[:MAX_LEN]
    if cleaned == identifier and cleaned:
        return cleaned
    digest = hashlib.sha256(identifier.encode("utf-8", "surrogatepass")).hexdigest()[:8]
    return f"{cleaned or 'unnamed'}-{digest}"


# A cell's own certificate and JSON (its standing decision over every stage) are named
# ``<cell>~cell``: a record of stages is ``<cell>`` or ``<cell>~<stages>``, and no stage is
# called "cell", so the names never meet.
CELL_SUFFIX = "~cell"


def cell_file_stem(cell_id: str) -> str:
    """The name, without extension, of a cell's own certificate and JSON.

    >>> cell_file_stem("S04-024"), cell_file_stem("../x")
    ('S04-024~cell', 'x-d6b96a97~cell')
    """
    return safe_name(cell_id) + CELL_SUFFIX


NAME_MAX_BYTES = 255  # longest file name on Linux filesystems (ext4, xfs, tmpfs, NFS, CIFS)
# Categories shown escaped: controls, format characters (bidirectional overrides can make a
# name read backwards), spaces other than the plain one (they look like it), line and
# paragraph separators, private use, unassigned: exactly what str.isprintable() refuses.
_HIDDEN = frozenset(("Cc", "Cf", "Zs", "Zl", "Zp", "Co", "Cn", "Cs"))
_ESCAPE = re.compile(r"\\(?:\\|x([0-9a-f]{2})|u([0-9a-f]{4})|U([0-9a-f]{8}))")
_SUFFIX = re.compile(r"(?:\.[A-Za-z0-9]{1,8}){1,2}$")
HASH_CHARS = 12


def _escape(char: str) -> str:
    code = ord(char)
    if 0xDC80 <= code <= 0xDCFF:  # an undecodable byte, kept by surrogateescape
        return f"\\x{code - 0xDC00:02x}"
    if char == "\\":
        return "\\\\"
    if char != " " and unicodedata.category(char) in _HIDDEN:
        if code < 0x80:
            return f"\\x{code:02x}"
        return f"\\u{code:04x}" if code <= 0xFFFF else f"\\U{code:08x}"
    return char


def to_text(name: str) -> str:
    """A name from the operating system as plain, printable text; :func:`from_text` reverses it."""
    if name.isprintable() and "\\" not in name and name.isascii():
        return name  # the common case, at no cost
    return "".join(_escape(c) for c in name)


def from_text(text: str) -> str:
    """The operating system's name (``surrogateescape`` str) for a :func:`to_text` text."""
    if "\\" not in text:
        return text
    out = bytearray()
    pos = 0
    for match in _ESCAPE.finditer(text):
        out += text[pos : match.start()].encode("utf-8")
        byte, short, long = match.groups()
        if byte is not None:
            out.append(int(byte, 16))
        elif short is not None or long is not None:
            out += chr(int(short or long, 16)).encode("utf-8", "surrogatepass")
        else:
            out += b"\\"
        pos = match.end()
    out += text[pos:].encode("utf-8")
    return os.fsdecode(bytes(out))


def is_text(name: str) -> bool:
    """True if ``name`` is already plain text (no undecodable bytes, nothing hidden)."""
    return to_text(name) == name.replace("\\", "\\\\")


def fit(name: str, *, reserve_bytes: int = 0, limit_bytes: int = NAME_MAX_BYTES) -> str:
    """``name`` if it and ``reserve_bytes`` more fit in ``limit_bytes`` (UTF-8), else a shortened name.

    The shortened name keeps the extension (``.csv``, ``.csv.gz``) and ends the stem with
    ``-`` and the first 12 hex digits of the whole name's SHA-256, so that different long
    names stay different.
    """
    room = limit_bytes - reserve_bytes
    encoded = name.encode("utf-8", "surrogateescape")
    if len(encoded) <= room:
        return name
    match = _SUFFIX.search(name)
    suffix = match.group(0) if match else ""
    digest = hashlib.sha256(encoded).hexdigest()[:HASH_CHARS]
    stem_room = room - len(suffix.encode()) - 1 - HASH_CHARS
    if stem_room < 1:
        raise ValueError(f"no room for a file name in {room} bytes")
    stem = name[: len(name) - len(suffix)].encode("utf-8", "surrogateescape")[:stem_room]
    return stem.decode("utf-8", "ignore") + f"-{digest}{suffix}"
