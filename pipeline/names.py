"""Turn identifiers taken from data files into safe file names.

A cell id or lot comes from a file written by someone else: it may hold path
separators, dots, control characters or thousands of characters. Only letters,
digits, ``-``, ``_`` and inner dots survive; anything changed gets a short hash of
the original appended, so two different ids never share a file name.
"""

from __future__ import annotations

import hashlib
import re

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
