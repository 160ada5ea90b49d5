"""Where tables and keys sit in raw TOML text, and TOML syntax errors with their line and column.

tomllib returns plain dicts without positions; an error found in a valid file
(a misspelt key, a window upside down) still has to name its line. ``Locator``
scans the text once for table headers and keys, handling dotted and quoted keys,
multi-line arrays and multi-line strings. Deciding what is wrong is the caller's
job; this module only answers "which line".
"""

from __future__ import annotations

import re
import tomllib

from pipeline.model import SourceRef

KeyPath = tuple[str, ...]

_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")
_POSITION = re.compile(
    r"^(?P<what>.*) \(at (?:line (?P<line>\d+), column (?P<col>\d+)|end of document)\)$", re.S
)


def show_table(path: KeyPath) -> str:
    """A table path as a TOML header, quoting parts that are not bare keys.

    >>> show_table(("check", "grading capacity"))
    '[check."grading capacity"]'
    """
    return "[" + ".".join(p if _BARE_KEY.fullmatch(p) else f'"{p}"' for p in path) + "]"


def _string_end(s: str, i: int) -> int:
    """Index just after the one-line string that opens at ``s[i]`` (or len(s) if unclosed)."""
    end = i + 1
    while end < len(s) and s[end] != s[i]:
        end += 2 if s[i] == '"' and s[end] == "\\" else 1
    return end + 1


def read_key(s: str, i: int) -> tuple[KeyPath, int] | None:
    """Read a dotted, possibly quoted key at ``s[i:]``: its parts and the index after it.

    >>> read_key('a."b.c" .d = 1', 0)
    (('a', 'b.c', 'd'), 11)
    """
    parts: list[str] = []
    while True:
        while i < len(s) and s[i] in " \t":
            i += 1
        if i < len(s) and s[i] in "\"'":
            end = _string_end(s, i)
            if end > len(s):
                return None
            raw = s[i + 1 : end - 1]
            parts.append(raw.replace('\\"', '"').replace("\\\\", "\\") if s[i] == '"' else raw)
            i = end
        else:
            match = _BARE_KEY.match(s, i)
            if match is None:
                return None
            parts.append(match.group())
            i = match.end()
        while i < len(s) and s[i] in " \t":
            i += 1
        if i >= len(s) or s[i] != ".":
            return tuple(parts), i
        i += 1


class Locator:
    """Line numbers (1-based) of the table headers and keys of one TOML text."""

    def __init__(self, text: str) -> None:
        self.lines = text.splitlines()
        self._found: dict[KeyPath, int] = {}
        self._depth = 0  # brackets still open in a value that spans lines
        self._string = ""  # the quotes of a multi-line string still open
        table: KeyPath = ()
        for number, line in enumerate(self.lines, 1):
            if self._depth > 0 or self._string:
                self._scan(line, 0)
                continue
            stripped = line.lstrip(" \t")
            if stripped.startswith("["):
                header = read_key(stripped, 2 if stripped.startswith("[[") else 1)
                if header is not None:
                    table = header[0]
                    self._found.setdefault(table, number)
                continue
            key = read_key(stripped, 0)
            if key is None or not stripped[key[1] :].startswith("="):
                continue
            for k in range(1, len(key[0]) + 1):  # a dotted key also opens its tables
                self._found.setdefault(table + key[0][:k], number)
            self._scan(stripped, key[1] + 1)

    def _scan(self, s: str, i: int) -> None:
        """Follow a value to the end of its line, tracking brackets and multi-line strings."""
        while i < len(s):
            if self._string:
                end = s.find(self._string, i)
                if end < 0:
                    return
                self._string, i = "", end + 3
            elif s.startswith(('"""', "'''"), i):
                self._string, i = s[i : i + 3], i + 3
            elif s[i] in "\"'":
                i = _string_end(s, i)
            elif s[i] == "#":
                return
            else:
                self._depth += (s[i] in "[{") - (s[i] in "]}")
                i += 1

    def line(self, path: KeyPath, key: str | None = None) -> int | None:
        """The line of ``key`` in table ``path``, else of that table, else of its nearest parent.

        >>> Locator('[check.a]\\nlow = 1\\n').line(("check", "a"), "high")
        1
        """
        if key is not None and (*path, key) in self._found:
            return self._found[(*path, key)]
        while path:
            if path in self._found:
                return self._found[path]
            below = [n for p, n in self._found.items() if p[: len(path)] == path]
            if below:  # only subtables were written, e.g. [checks.x] for path ("checks",)
                return min(below)
            path = path[:-1]
        return None

    def raw_value(self, path: KeyPath, key: str) -> str | None:
        """The value of ``key`` as written, when it is a plain value on the key's own line."""
        number = self._found.get((*path, key))
        if number is None:
            return None
        text = self.lines[number - 1]
        found = read_key(text.lstrip(" \t"), 0)
        if found is None or found[0][-1] != key:
            return None
        rest = text.lstrip(" \t")[found[1] :]
        return rest[1:].split("#", 1)[0].strip() if rest.startswith("=") else None


def syntax_position(
    exc: tomllib.TOMLDecodeError, name: str, lines: list[str]
) -> tuple[str, SourceRef]:
    """Split tomllib's message into its text and a SourceRef with line and column.

    "at end of document" points at the last line that holds anything.
    """
    match = _POSITION.match(str(exc))
    if match is None:  # pragma: no cover - tomllib always adds a position
        return str(exc), SourceRef(name)
    if match.group("line"):
        return match.group("what"), SourceRef(
            name, int(match.group("line")), int(match.group("col"))
        )
    last = max((i for i, line in enumerate(lines, 1) if line.strip()), default=None)
    return match.group("what"), SourceRef(name, last)
