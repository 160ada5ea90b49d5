"""The verification code a certificate carries: the first 16 hex digits of the SHA-256 of the
result JSON published with it.

Pure and tiny, shared by everything that renders a certificate (the station's workers,
`formgate check`, the cell certificate) and by `formgate verify`, which takes a code back
to the published JSON and, through it, to the certificate. The code is a function of the
JSON text alone, so a certificate stays byte-for-byte reproducible from the same inputs.
Sixteen hex digits (64 bits) are short enough to type from paper and long enough that two
results of one station never share a code by chance.
"""

from __future__ import annotations

import hashlib
import re

CODE_DIGITS = 16
MIN_DIGITS = 8  # the shortest hash prefix `formgate verify` looks up
_GROUP = 4
_SEPARATORS = re.compile(r"[\s\-:]+")
_HEX = re.compile(r"[0-9a-f]+")


def verification_code(json_text: str) -> str:
    """The code of a result JSON: the first 16 hex digits of the SHA-256 of its UTF-8 bytes.

    >>> verification_code('{"verdict": "pass"}\\n')
    '7361566f9b320d9a'
    """
    return hashlib.sha256(json_text.encode("utf-8")).hexdigest()[:CODE_DIGITS]


def spaced(code: str) -> str:
    """The code in groups of four, as a certificate prints it.

    >>> spaced("1a2b3c4d5e6f7a8b")
    '1a2b 3c4d 5e6f 7a8b'
    """
    return " ".join(code[i : i + _GROUP] for i in range(0, len(code), _GROUP))


def parse_code(text: str) -> str | None:
    """A code or hash prefix as typed (groups, dashes, upper case allowed), or None if
    ``text`` is not one: 8 to 64 hex digits.

    >>> parse_code("1A2B 3C4D-5E6F 7A8B"), parse_code("results.json"), parse_code("1a2b")
    ('1a2b3c4d5e6f7a8b', None, None)
    """
    digits = _SEPARATORS.sub("", text.strip()).lower()
    if not MIN_DIGITS <= len(digits) <= 64 or _HEX.fullmatch(digits) is None:
        return None
    return digits
