"""PNG images of the lot report's charts: the few SVG shapes our own plots use, drawn with Pillow.

Pure: SVG text in, PNG bytes out. It is not an SVG renderer: it draws exactly what
:mod:`pipeline.report.svgplot` and :mod:`pipeline.report.lotcharts` write (paths of M, L, H, V
and their relative forms, and implicit line-tos after M; rects; circles; texts with an anchor
and a rotation) in the shipped font, and ignores anything else. Dashes are drawn solid. A
chart's PNG is for a slide or a message; the SVG beside it and the report are the record.
"""

from __future__ import annotations

import functools
import io
import math
import re
import xml.etree.ElementTree as ET
from typing import Final

from PIL import Image, ImageDraw, ImageFont

from pipeline.report.certificate import TEMPLATES_DIR

SVG_NS: Final = "{http://www.w3.org/2000/svg}"
DPI: Final = 200
FONT_FILE: Final = TEMPLATES_DIR / "fonts" / "CertificateSans.ttf"
_TOKEN = re.compile(r"[MLHVZmlhvz]|-?\d+(?:\.\d+)?")
_ROTATE = re.compile(r"rotate\((-?[\d.]+)\s+(-?[\d.]+)\s+(-?[\d.]+)\)")


@functools.lru_cache(maxsize=8)
def _font(px: int) -> ImageFont.FreeTypeFont:
    return ImageFont.truetype(str(FONT_FILE), max(px, 6))


def _path_lines(d: str) -> list[list[tuple[float, float]]]:
    """The polylines a path's data draws (M starts one; L, H, V and their relative forms go on)."""
    lines: list[list[tuple[float, float]]] = []
    x = y = 0.0
    command = "M"
    tokens = _TOKEN.findall(d)
    i = 0
    while i < len(tokens):
        token = tokens[i]
        if token.isalpha():
            command = token
            i += 1
            if command in "Zz" and lines:
                lines[-1].append(lines[-1][0])
            continue
        if command in "Mm":
            dx, dy = float(tokens[i]), float(tokens[i + 1])
            x, y = (x + dx, y + dy) if command == "m" else (dx, dy)
            lines.append([(x, y)])
            i += 2
            command = "l" if command == "m" else "L"  # further pairs are line-tos
        elif command in "Ll":
            dx, dy = float(tokens[i]), float(tokens[i + 1])
            x, y = (x + dx, y + dy) if command == "l" else (dx, dy)
            lines[-1].append((x, y))
            i += 2
        elif command in "Hh":
            x = x + float(tokens[i]) if command == "h" else float(tokens[i])
            lines[-1].append((x, y))
            i += 1
        elif command in "Vv":
            y = y + float(tokens[i]) if command == "v" else float(tokens[i])
            lines[-1].append((x, y))
            i += 1
        else:
            i += 1
    return lines


def svg_to_png(svg: str, dpi: int = DPI) -> bytes:
    """A PNG of one of our plots' SVG (its size in mm from its viewBox), on white."""
    root = ET.fromstring(svg)
    _, _, width_mm, height_mm = (float(v) for v in root.get("viewBox", "0 0 100 60").split())
    scale = dpi / 25.4
    image = Image.new("RGB", (round(width_mm * scale), round(height_mm * scale)), "white")
    draw = ImageDraw.Draw(image)
    default_size = float(root.get("font-size", "2.5"))

    def walk(node: ET.Element, inherited: dict[str, str]) -> None:
        own = {k: v for k, v in node.attrib.items() if k in ("fill", "stroke", "font-size")}
        style = {**inherited, **own}
        tag = node.tag.removeprefix(SVG_NS)
        if tag == "path":
            colour = node.get("stroke") or style.get("stroke")
            fill = node.get("fill")
            width = max(1, round(float(node.get("stroke-width", "0.3")) * scale))
            for line in _path_lines(node.get("d", "")):
                points = [(px * scale, py * scale) for px, py in line]
                if fill and fill != "none" and len(points) > 2:
                    draw.polygon(points, fill=fill)
                elif colour and colour != "none" and len(points) > 1:
                    draw.line(points, fill=colour, width=width)
        elif tag == "rect":
            x, y = float(node.get("x", "0")) * scale, float(node.get("y", "0")) * scale
            w, h = float(node.get("width", "0")) * scale, float(node.get("height", "0")) * scale
            fill = node.get("fill")
            outline = node.get("stroke")
            draw.rectangle((x, y, x + w, y + h), fill=None if fill in (None, "none") else fill,
                           outline=None if outline in (None, "none") else outline)
        elif tag == "circle":
            cx, cy = float(node.get("cx", "0")) * scale, float(node.get("cy", "0")) * scale
            r = float(node.get("r", "0")) * scale
            fill = node.get("fill")
            outline = node.get("stroke")
            draw.ellipse((cx - r, cy - r, cx + r, cy + r), fill=None if fill in (None, "none") else fill,
                         outline=None if outline in (None, "none") else outline,
                         width=max(1, round(float(node.get("stroke-width", "0.3")) * scale)))
        elif tag == "text" and node.text:
            _text(image, node, style, scale, default_size)
        for child in node:
            walk(child, style)

    walk(root, {})
    out = io.BytesIO()
    image.save(out, format="PNG", optimize=True)
    return out.getvalue()


def _text(
    image: Image.Image, node: ET.Element, style: dict[str, str], scale: float, size_mm: float
) -> None:
    body = node.text or ""
    colour = node.get("fill") or style.get("fill") or "#2b2b2b"
    if colour == "#ffffff":
        return  # the white outline under a label: the PNG draws the label on white anyway
    font = _font(round(float(style.get("font-size", size_mm)) * scale))
    left, top, right, bottom = font.getbbox(body)
    label = Image.new("RGBA", (int(right - left) + 2, int(bottom - top) + 2), (255, 255, 255, 0))
    ImageDraw.Draw(label).text((-left + 1, -top + 1), body, font=font, fill=colour)
    anchor = node.get("text-anchor", "start")
    x, y = float(node.get("x", "0")) * scale, float(node.get("y", "0")) * scale
    shift = {"start": 0.0, "middle": label.width / 2, "end": float(label.width)}.get(anchor, 0.0)
    rotation = _ROTATE.search(node.get("transform", ""))
    angle = -float(rotation.group(1)) if rotation else 0.0
    # the baseline point (x, y) stays put; the text turns around it
    ox, oy = shift, label.height - 1  # from the label's left edge, at its baseline
    turned = label.rotate(angle, expand=True, resample=Image.Resampling.BICUBIC)
    a = math.radians(angle)
    # where the baseline point lands in the turned image
    cx, cy = label.width / 2, label.height / 2
    px, py = ox - cx, oy - cy
    rx, ry = px * math.cos(a) + py * math.sin(a), -px * math.sin(a) + py * math.cos(a)
    tx, ty = rx + turned.width / 2, ry + turned.height / 2
    image.paste(turned, (round(x - tx), round(y - ty)), turned)


__all__ = ["svg_to_png"]
