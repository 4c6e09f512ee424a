"""QGIS layer styles (``.qml``) for the mapped tiles.

QGIS loads ``<name>.qml`` beside a raster as its default style, so a tile
opens with the class legend; ``<name>.onset_year.qml`` is the alternative
style (Layer Properties → Style → Load Style) colouring the conversion year.
The palette is the project's own; the XML is written with ElementTree.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Sequence
from pathlib import Path

from matplotlib.colors import LinearSegmentedColormap, to_hex

#: Map class code → (legend label, colour). Code 0 never occurs (nodata is separate).
CLASS_STYLE: dict[int, tuple[str, str]] = {
    1: ("stable natural forest", "#1f5c3d"),
    2: ("converted to tree-crop plantation", "#d2452b"),
    3: ("plantation before the series", "#e0b84a"),
    4: ("other land or disturbance", "#9aa3ad"),
}

#: The year ramp runs from early conversions (dark violet) to recent ones (bright orange).
YEAR_RAMP = LinearSegmentedColormap.from_list("onset", ["#3b1d5a", "#8c2f6e", "#d8573a", "#f7b538"])

QGIS_VERSION = "3.34.0"


def year_colours(years: Sequence[int]) -> list[str]:
    """One hex colour per year along :data:`YEAR_RAMP`."""
    n = len(years)
    return [to_hex(YEAR_RAMP(i / max(n - 1, 1))) for i in range(n)]


def _document(renderer: ET.Element) -> ET.ElementTree:
    root = ET.Element("qgis", version=QGIS_VERSION, styleCategories="AllStyleCategories")
    pipe = ET.SubElement(root, "pipe")
    pipe.append(renderer)
    ET.SubElement(pipe, "brightnesscontrast", brightness="0", contrast="0")
    ET.SubElement(pipe, "huesaturation", saturation="0", grayscaleMode="0", colorizeOn="0")
    ET.SubElement(root, "blendMode").text = "0"
    return ET.ElementTree(root)


def class_style(band: int = 1) -> ET.ElementTree:
    """Paletted renderer for the class band, one legend entry per class."""
    r = ET.Element("rasterrenderer", type="paletted", band=str(band), opacity="1", alphaBand="-1", nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    pal = ET.SubElement(r, "colorPalette")
    for code, (label, colour) in CLASS_STYLE.items():
        ET.SubElement(pal, "paletteEntry", value=str(code), color=colour, label=label, alpha="255")
    return _document(r)


def onset_style(years: Sequence[int], cutoff_year: int, band: int = 2) -> ET.ElementTree:
    """Exact-value colour ramp for the onset-year band; years after the cutoff are marked in the legend."""
    lo, hi = min(years), max(years)
    r = ET.Element("rasterrenderer", type="singlebandpseudocolor", band=str(band), opacity="1", alphaBand="-1", classificationMin=str(lo), classificationMax=str(hi), nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    shader = ET.SubElement(ET.SubElement(r, "rastershader"), "colorrampshader", colorRampType="EXACT", classificationMode="1", clip="0", minimumValue=str(lo), maximumValue=str(hi))
    for y, colour in zip(years, year_colours(years), strict=True):
        label = f"{y} (after cutoff)" if y > cutoff_year else str(y)
        ET.SubElement(shader, "item", value=str(y), color=colour, label=label, alpha="255")
    return _document(r)


def write_style(tree: ET.ElementTree, path: Path) -> Path:
    """Write a style with the QGIS doctype, atomically."""
    ET.indent(tree)
    body = ET.tostring(tree.getroot(), encoding="unicode")
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text("<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n" + body + "\n")
    tmp.replace(path)
    return path
