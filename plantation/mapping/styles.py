"""QGIS layer styles (``.qml``) for the mapped tiles.

QGIS loads ``<name>.qml`` beside a raster as its default style, so a tile
opens with the class legend. Two alternative styles (Layer Properties →
Style → Load Style) sit beside it: ``<name>.onset_year.qml`` colours the
conversion year, years up to the cutoff on a cool ramp and years after it on
a warm one, and ``<name>.p_after_cutoff.qml`` shades the probability of
conversion after the cutoff. Two more sit beside them for the fire layers:
``<name>.fire.qml`` (whether a clearing was burnt, and escaped fire) and
``<name>.dnbr.qml`` (the clearing's dNBR in the severity classes of Key &
Benson 2006). The palettes are the project's own; the XML is written with
ElementTree.

Probability bands are stored as int16 ``round(value × 10000)`` with a GDAL
scale of 0.0001. QGIS's GDAL provider applies a band's scale and offset to every block
it reads (``block->applyScaleOffset(bandScale, bandOffset)`` in ``QgsGdalProvider::block``
of the QGIS source, which also reports such a band with a floating-point
type), so renderers and their colour ramps see the real values 0..1: the
probability style is written in those, not in stored integers. QGIS 3's
interpolated ramp interpolates the alpha between items as well as the colour,
so the probability ramp fades in between its transparent and opaque items.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib.colors import Colormap, LinearSegmentedColormap, to_hex

#: Map class code → (legend label, colour). Code 0 never occurs (nodata is separate).
CLASS_STYLE: dict[int, tuple[str, str]] = {
    1: ("stable natural forest", "#1f5c3d"),
    2: ("converted to tree-crop plantation", "#d2452b"),
    3: ("plantation before the series", "#e0b84a"),
    4: ("other land or disturbance", "#9aa3ad"),
}

#: The single early-to-recent year ramp of the quicklook and the report's figures (dark violet to bright orange).
YEAR_RAMP = LinearSegmentedColormap.from_list("onset", ["#3b1d5a", "#8c2f6e", "#d8573a", "#f7b538"])

#: Onset years up to and including the cutoff: cool, from pale sage (earliest) through teal and blue to deep indigo (the cutoff year).
RAMP_UP_TO_CUTOFF = LinearSegmentedColormap.from_list("onset_to_cutoff", ["#e9f1e3", "#b4dbbd", "#6bb8b0", "#4590b6", "#3b60aa", "#342f82", "#1c1450"])
#: Onset years after the cutoff: warm, from bright yellow (the first year after it) through orange to raspberry and magenta (the latest).
RAMP_AFTER_CUTOFF = LinearSegmentedColormap.from_list("onset_after_cutoff", ["#ffdf3f", "#fbae3c", "#ef7a3a", "#d6435f", "#a92a7e"])

#: Probability of conversion after the cutoff: (value, colour, alpha, legend label), in real (scaled) values.
#: Up to :data:`P_TRANSPARENT_BELOW` nothing is drawn, so the forest around does not dominate; the ramp
#: then fades in from a light warm neutral through lilac to deep violet-magenta.
P_TRANSPARENT_BELOW = 0.05
P_AFTER_CUTOFF_RAMP: tuple[tuple[float, str, int, str], ...] = (
    (0.0, "#f1ece6", 0, "0.0 – no evidence of conversion after the cutoff"),
    (P_TRANSPARENT_BELOW, "#f1ece6", 0, f"{P_TRANSPARENT_BELOW:.2f} – below this: not drawn"),
    (0.25, "#dcc6dc", 255, "0.25 – weak evidence"),
    (0.5, "#b07fb8", 255, "0.5 – as likely as not"),
    (0.75, "#7d3f8f", 255, "0.75 – likely"),
    (1.0, "#4a1660", 255, "1.0 – strong evidence of conversion after the cutoff"),
)

#: Fire band code → (legend label, colour); code 0 (no fire, not converted) is not drawn. Dark char, sand-coloured bare soil,
#: a pale blue for "unknown" and a warm red for escaped fire: apart in lightness or on the blue-yellow axis, which red-green
#: colour-vision deficiencies keep.
FIRE_STYLE: dict[int, tuple[str, str]] = {
    1: ("converted, cleared with fire", "#2b1a24"),
    2: ("converted, cleared without fire", "#e6c88f"),
    3: ("converted, fire unknown (no clear view close enough after the clearing)", "#7ea6d6"),
    4: ("forest burnt by fire escaped from a clearing", "#d4452b"),
}

#: Key & Benson (2006) severity classes on dNBR (real values; QGIS applies the band's 0.0001 scale): (highest value, colour, label).
#: A discrete ramp gives an item the values up to and including its own, so each class ends one stored step (0.0001) below the
#: next class's published break. From "unburned" to "high" the colours darken step by step, so the order reads in grey as well.
DNBR_CLASSES: tuple[tuple[float, str, str], ...] = (
    (-0.1001, "#3f8f5f", "< -0.100 enhanced regrowth"),
    (0.0999, "#e9e7df", "-0.100 to 0.099 unburned"),
    (0.2699, "#fbe08a", "0.100 to 0.269 low severity"),
    (0.4399, "#f4a04a", "0.270 to 0.439 moderate-low severity"),
    (0.6599, "#d2493a", "0.440 to 0.659 moderate-high severity"),
    (float("inf"), "#5c1744", ">= 0.660 high severity"),
)

QGIS_VERSION = "3.34.0"


def _lab(rgb: np.ndarray) -> np.ndarray:
    """sRGB (0..1, IEC 61966-2-1) → CIELAB under D65, for spacing ramps evenly."""
    rgb = np.asarray(rgb, dtype=float)
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
    xyz = lin @ m.T / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > (6 / 29) ** 3, np.cbrt(xyz), xyz / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.stack([116 * f[..., 1] - 16, 500 * (f[..., 0] - f[..., 1]), 200 * (f[..., 1] - f[..., 2])], axis=-1)


def _even(cmap: Colormap, n: int, single: float) -> list[str]:
    """``n`` colours along ``cmap`` at equal CIELAB (CIE76) steps; one colour is the ramp's ``single`` end."""
    if n <= 0:
        return []
    if n == 1:
        return [to_hex(cmap(single))]
    t = np.linspace(0.0, 1.0, 1025)
    lab = _lab(cmap(t)[:, :3])
    arc = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(lab, axis=0), axis=1))])
    at = np.interp(np.linspace(0.0, arc[-1], n), arc, t)
    return [to_hex(cmap(x)) for x in at]


def year_colours(years: Sequence[int], cutoff_year: int) -> list[str]:
    """One hex colour per year, in the order given, split at the cutoff.

    Years up to and including ``cutoff_year`` run along :data:`RAMP_UP_TO_CUTOFF`
    (earliest palest, the cutoff year darkest), later years along
    :data:`RAMP_AFTER_CUTOFF` (the first one after the cutoff brightest), so the
    cutoff year and the year after it sit at the far ends of two different ramps.
    Each side is spaced evenly in CIELAB; for a series of about 20 years on one
    side neighbouring years stay a few ΔE apart, much longer series come closer.
    """
    order = sorted(set(years))
    before = [y for y in order if y <= cutoff_year]
    after = [y for y in order if y > cutoff_year]
    colour = dict(zip(before, _even(RAMP_UP_TO_CUTOFF, len(before), single=1.0), strict=True))
    colour.update(zip(after, _even(RAMP_AFTER_CUTOFF, len(after), single=0.0), strict=True))
    return [colour[y] for y in years]


def _document(renderer: ET.Element) -> ET.ElementTree:
    root = ET.Element("qgis", version=QGIS_VERSION, styleCategories="AllStyleCategories")
    pipe = ET.SubElement(root, "pipe")
    pipe.append(renderer)
    ET.SubElement(pipe, "brightnesscontrast", brightness="0", contrast="0")
    ET.SubElement(pipe, "huesaturation", saturation="0", grayscaleMode="0", colorizeOn="0")
    ET.SubElement(root, "blendMode").text = "0"
    return ET.ElementTree(root)


def _fixed_range(renderer: ET.Element) -> None:
    """Keep the style's own min/max: no statistics-based stretch when QGIS loads it."""
    mmo = ET.SubElement(renderer, "minMaxOrigin")
    for tag, text in (("limits", "None"), ("extent", "WholeRaster"), ("statAccuracy", "Estimated"), ("cumulativeCutLower", "0.02"), ("cumulativeCutUpper", "0.98"), ("stdDevFactor", "2")):
        ET.SubElement(mmo, tag).text = text


def class_style(band: int = 1) -> ET.ElementTree:
    """Paletted renderer for the class band, one legend entry per class."""
    r = ET.Element("rasterrenderer", type="paletted", band=str(band), opacity="1", alphaBand="-1", nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    pal = ET.SubElement(r, "colorPalette")
    for code, (label, colour) in CLASS_STYLE.items():
        ET.SubElement(pal, "paletteEntry", value=str(code), color=colour, label=label, alpha="255")
    return _document(r)


def onset_style(years: Sequence[int], cutoff_year: int, band: int = 2) -> ET.ElementTree:
    """Exact-value colours for the onset-year band, split at the cutoff (:func:`year_colours`); the legend marks the cutoff year and the years after it."""
    lo, hi = min(years), max(years)
    r = ET.Element("rasterrenderer", type="singlebandpseudocolor", band=str(band), opacity="1", alphaBand="-1", classificationMin=str(lo), classificationMax=str(hi), nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    _fixed_range(r)
    shader = ET.SubElement(ET.SubElement(r, "rastershader"), "colorrampshader", colorRampType="EXACT", classificationMode="1", clip="0", minimumValue=str(lo), maximumValue=str(hi))
    for y, colour in zip(years, year_colours(years, cutoff_year), strict=True):
        label = f"{y} (after cutoff)" if y > cutoff_year else f"{y} (cutoff year)" if y == cutoff_year else str(y)
        ET.SubElement(shader, "item", value=str(y), color=colour, label=label, alpha="255")
    return _document(r)


def p_after_cutoff_style(cutoff_year: int, band: int = 6) -> ET.ElementTree:
    """Interpolated ramp over 0..1 for the probability of conversion after the cutoff (:data:`P_AFTER_CUTOFF_RAMP`).

    The values are the band's real ones (QGIS applies the GDAL scale 0.0001,
    see the module notes); below :data:`P_TRANSPARENT_BELOW` nothing is drawn.
    The legend names the cutoff year.
    """
    r = ET.Element("rasterrenderer", type="singlebandpseudocolor", band=str(band), opacity="1", alphaBand="-1", classificationMin="0", classificationMax="1", nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    _fixed_range(r)
    shader = ET.SubElement(ET.SubElement(r, "rastershader"), "colorrampshader", colorRampType="INTERPOLATED", classificationMode="1", clip="0", minimumValue="0", maximumValue="1")
    for value, colour, alpha, label in P_AFTER_CUTOFF_RAMP:
        ET.SubElement(shader, "item", value=f"{value:g}", color=colour, label=label.replace("the cutoff", f"the cutoff ({cutoff_year})"), alpha=str(alpha))
    return _document(r)


def fire_style(band: int = 9) -> ET.ElementTree:
    """Paletted renderer for the fire band (:data:`FIRE_STYLE`); code 0 is left out, so only clearings and escaped fire are drawn."""
    r = ET.Element("rasterrenderer", type="paletted", band=str(band), opacity="1", alphaBand="-1", nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    pal = ET.SubElement(r, "colorPalette")
    for code, (label, colour) in FIRE_STYLE.items():
        ET.SubElement(pal, "paletteEntry", value=str(code), color=colour, label=label, alpha="255")
    return _document(r)


def dnbr_style(band: int = 11) -> ET.ElementTree:
    """Discrete colours for the dNBR band in Key & Benson's severity classes (:data:`DNBR_CLASSES`), in real dNBR values."""
    r = ET.Element("rasterrenderer", type="singlebandpseudocolor", band=str(band), opacity="1", alphaBand="-1", classificationMin="-0.5", classificationMax="1.3", nodataColor="")
    ET.SubElement(r, "rasterTransparency")
    _fixed_range(r)
    shader = ET.SubElement(ET.SubElement(r, "rastershader"), "colorrampshader", colorRampType="DISCRETE", classificationMode="1", clip="0", minimumValue="-0.5", maximumValue="1.3")
    for upper, colour, label in DNBR_CLASSES:
        ET.SubElement(shader, "item", value="inf" if upper == float("inf") else f"{upper:g}", color=colour, label=label, alpha="255")
    return _document(r)


def write_style(tree: ET.ElementTree, path: Path) -> Path:
    """Write a style with the QGIS doctype, atomically."""
    ET.indent(tree)
    body = ET.tostring(tree.getroot(), encoding="unicode")
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text("<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n" + body + "\n")
    tmp.replace(path)
    return path
