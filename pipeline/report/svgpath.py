"""A plot's SVG path drawn from its numbers read once, instead of re-read point by point.

WeasyPrint reads a path's ``d`` text command by command, and after each command it cuts the
rest of the text off and reads it again (``weasyprint.svg.utils.point``): a curve of n points
costs about n²/2 characters copied, plus a regular expression and two unit lookups per point.
A failed cell's plots hold some 3,000 such points, a sixth of its certificate's PDF writing.
The certificate's plots (svgplot.py, plots.py, evidence.py) write paths of absolute and
relative moves, lines, horizontal and vertical lines and closes, with plain decimal numbers
and no units. :func:`fast_path` reads such a ``d`` once, into its commands, and then makes
exactly the calls WeasyPrint's ``path`` makes for them, in the same order and with the same
numbers (moves, lines, closes on the page's stream; the vertices that markers use): the same
PDF bytes (tests/test_pdf.py compares them). Any other ``d`` (curves, arcs, exponents, units,
a command short of numbers) is drawn by WeasyPrint's own ``path``.

It reproduces those commands of ``weasyprint.svg.path.path`` of the WeasyPrint pinned in
constraints.txt (pinned.py's FITS); with any other version WeasyPrint draws
every path itself (said once in the log), which is slower but the same page.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import logging
import re
from collections.abc import Iterator
from math import atan2, pi
from typing import Any

from pipeline.report.pinned import weasyprint_fits

log = logging.getLogger(__name__)

# A d of the commands fast_path draws and plain numbers (no exponent, no unit, no "+", no
# second point in one number as in "1.5.5"), separated by spaces or nothing.
_SIMPLE = re.compile(r"\s*(?:(?:[MLHVZmlhvz]|-?[0-9]+(?:\.[0-9]+)?)\s*)*")
_TOKEN = re.compile(r"[MLHVZmlhvz]|-?[0-9]+(?:\.[0-9]+)?")
_ARITY = {"M": 2, "m": 2, "L": 2, "l": 2, "H": 1, "h": 1, "V": 1, "v": 1, "Z": 0, "z": 0}
_NEXT = {"M": "L", "m": "l"}  # numbers after a move are lines (SVG 1.1, 8.3.2)


@functools.lru_cache(maxsize=1)
def _weasyprint() -> dict[str, Any] | None:
    """WeasyPrint's path drawing, or None if this WeasyPrint is not the one fast_path fits."""

    if not weasyprint_fits("plot paths are drawn by WeasyPrint"):
        return None
    svg = importlib.import_module("weasyprint.svg")
    path_module = importlib.import_module("weasyprint.svg.path")
    if svg.TAGS.get("path") is not path_module.path:
        log.warning("WeasyPrint's SVG path drawing is not its own: plot paths are drawn by it")
        return None
    return {"svg": svg, "original": path_module.path}


def commands(d: str) -> list[tuple[str, tuple[float, ...]]] | None:
    """The commands of path data ``d``, each with its numbers, as WeasyPrint takes them
    (numbers beyond a command's own repeat it; after a move, as lines); None if ``d`` is
    not one fast_path draws.

    >>> commands("M1 2 3 4h-1z")
    [('M', (1.0, 2.0)), ('L', (3.0, 4.0)), ('h', (-1.0,)), ('z', ())]
    >>> commands("M1 2c1 1 2 2 3 3") is None
    True
    """
    if not _SIMPLE.fullmatch(d):
        return None
    found: list[tuple[str, tuple[float, ...]]] = []
    letter: str | None = None
    numbers: list[float] = []

    def flush() -> bool:
        nonlocal letter
        if letter is None:
            return not numbers  # numbers before any command
        arity = _ARITY[letter]
        if arity == 0:
            if numbers:
                return False
            found.append((letter, ()))
            return True
        if not numbers or len(numbers) % arity:
            return False
        for k in range(0, len(numbers), arity):
            found.append((letter if k == 0 else _NEXT.get(letter, letter), tuple(numbers[k : k + arity])))
        return True

    for token in _TOKEN.findall(d):
        if token in _ARITY:
            if not flush():
                return None
            letter, numbers = token, []
        else:
            numbers.append(float(token))
    if not flush():
        return None
    return found


def fast_path(svg: Any, node: Any, font_size: float) -> None:
    """Draw an SVG path node as WeasyPrint's path() does, reading its d once."""
    w = _weasyprint()
    assert w is not None, "drawing_paths_fast() installs this only for the WeasyPrint it fits"
    found = commands(node.get("d", ""))
    if found is None:
        w["original"](svg, node, font_size)
        return
    stream, vertices = svg.stream, node.vertices
    current: tuple[float, float] = (0, 0)
    stream.move_to(*current)  # as WeasyPrint starts every path
    first: tuple[float, float] | None = None  # where a close goes back to
    last: str | None = None
    for letter, numbers in found:
        if last in (None, "z", "Z") and letter not in "mM":
            vertices.append(current)
            first = current
        if last in (None, "m", "M", "z", "Z"):
            first = None
        if letter not in "mMzZ" and first is None:
            first = current
        old_x, old_y = current
        if letter in "hH":
            x = numbers[0]
            if letter == "h":
                x += old_x
            angle = 0 if x > old_x else pi
            vertices.append((pi - angle, angle))
            stream.line_to(x, old_y)
            current = x, old_y
        elif letter in "vV":
            y = numbers[0]
            if letter == "v":
                y += old_y
            angle = pi / 2 if y > old_y else -pi / 2
            vertices.append((pi - angle, angle))
            stream.line_to(old_x, y)
            current = old_x, y
        elif letter in "lL":
            x, y = numbers
            if letter == "l":
                x += old_x
                y += old_y
            angle = atan2(y - old_y, x - old_x)
            vertices.append((pi - angle, angle))
            stream.line_to(x, y)
            current = x, y
        elif letter in "mM":
            x, y = numbers
            if last and last not in "zZ":
                vertices.append(None)
            if letter == "m":
                x += old_x
                y += old_y
            stream.move_to(x, y)
            current = x, y
        elif first:  # z or Z after a drawn segment
            vertices.append(None)
            stream.close()
            current = first
        if letter not in "zZ":
            vertices.append(current)
        last = letter


@contextlib.contextmanager
def drawing_paths_fast() -> Iterator[bool]:
    """Within the block, WeasyPrint draws SVG paths with :func:`fast_path`; yields whether it does.

    The caller holds a lock that keeps other renders in this process out of the block
    (pdf.py's render lock): the switch is process-wide while it lasts.
    """
    w = _weasyprint()
    if w is None:
        yield False
        return
    svg, original = w["svg"], w["original"]
    svg.TAGS["path"] = fast_path
    try:
        yield True
    finally:
        svg.TAGS["path"] = original
