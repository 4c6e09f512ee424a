"""QGIS styles of the mapped tiles: the p_after_cutoff ramp, and onset-year colours split at the cutoff.

Colour differences are CIEDE2000 ΔE00 (CIE 142-2001 / CIE 15:2004; the
formula as implemented and tested by Sharma, Wu & Dalal 2005, "The CIEDE2000
color-difference formula: implementation notes, supplementary test data, and
mathematical observations", Color Res. Appl. 30(1)), computed with the
colour-science package (``colour.delta_E(..., method="CIE 2000")``) on CIELAB
from sRGB under D65: a reference implementation independent of the one the
styles module uses to space its ramps. Colour-vision deficiency is simulated
with Machado, Oliveira & Fernandes 2009 (``colour.matrix_cvd_Machado2009``).

Thresholds: ΔE00 ≈ 1–2.3 is about a just-noticeable difference (ΔE*ab 2.3,
Sharma 2003, quoted from memory); "> 3" for neighbouring years (legible
apart, a little over a JND), "> 20" for colours that must never be taken for
one another and "> 15" between any year before and any year after the cutoff
are common practice, not from a source.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from itertools import pairwise, product
from pathlib import Path

import colour
import numpy as np
import pytest
import rasterio
from matplotlib.colors import to_rgb

import tests.test_mapping as tm
from plantation.imagery.burn import SEVERITY_CLASSES
from plantation.mapping.fire import FIRE_CODES
from plantation.mapping.folder import BAND, LAYERS, SCALE
from plantation.mapping.job import run
from plantation.mapping.styles import CLASS_STYLE, DNBR_CLASSES, FIRE_STYLE, P_TRANSPARENT_BELOW, dnbr_style, fire_style, onset_style, p_after_cutoff_style, write_style, year_colours

# The mapping tests' toy region and model (fixtures), for the styles written beside a mapped tile.
region = tm.region
model_dir = tm.model_dir

#: (years, cutoff year): the mapping tests' two years, the toy region's 2013-2024, a long Landsat-like
#: series, a cutoff early in the series, and a cutoff at its first year.
SERIES = [
    ([2015, 2016], 2015),
    (list(range(2013, 2025)), 2020),
    (list(range(2000, 2025)), 2020),
    (list(range(2016, 2025)), 2017),
    (list(range(2020, 2025)), 2020),
]
IDS = [f"{ys[0]}-{ys[-1]}_cutoff{c}" for ys, c in SERIES]

JND = 3.0  # common practice: a little over the ~2.3 just-noticeable difference
APART = 20.0  # common practice: clearly different colours
ACROSS = 15.0  # common practice: any year before vs any year after the cutoff


def _lab(hex_colour: str) -> np.ndarray:
    return colour.XYZ_to_Lab(colour.sRGB_to_XYZ(np.array(to_rgb(hex_colour))))


def delta_e(a: str, b: str) -> float:
    """CIEDE2000 between two sRGB hex colours."""
    return float(colour.delta_E(_lab(a), _lab(b), method="CIE 2000"))


def _simulate(hex_colour: str, deficiency: str) -> str:
    """The colour as seen with a full (severity 1) deficiency, Machado et al. 2009, applied in linear sRGB."""
    linear = colour.cctf_decoding(np.array(to_rgb(hex_colour)), function="sRGB")
    seen = np.clip(colour.matrix_cvd_Machado2009(deficiency, 1.0) @ linear, 0.0, 1.0)
    r, g, b = (round(float(v) * 255) for v in colour.cctf_encoding(seen, function="sRGB"))
    return f"#{r:02x}{g:02x}{b:02x}"


def _written(tree: ET.ElementTree, path: Path) -> ET.Element:
    write_style(tree, path)
    assert path.read_text().startswith("<!DOCTYPE qgis")
    return ET.parse(path).getroot()


def _split(years: list[int], cutoff: int) -> tuple[list[str], list[str]]:
    colours = dict(zip(years, year_colours(years, cutoff), strict=True))
    return [colours[y] for y in years if y <= cutoff], [colours[y] for y in years if y > cutoff]


def test_p_after_cutoff_style_is_a_0_to_1_ramp_on_band_6(tmp_path):
    root = _written(p_after_cutoff_style(2020, BAND["p_after_cutoff"]), tmp_path / "t.p_after_cutoff.qml")
    r = root.find("pipe/rasterrenderer")
    assert r.get("type") == "singlebandpseudocolor" and r.get("band") == "6" == str(BAND["p_after_cutoff"])
    assert float(r.get("classificationMin")) == 0.0 and float(r.get("classificationMax")) == 1.0
    assert r.find("minMaxOrigin/limits").text == "None"  # QGIS keeps 0..1 rather than stretching to the data
    shader = r.find("rastershader/colorrampshader")
    assert shader.get("colorRampType") == "INTERPOLATED"
    assert float(shader.get("minimumValue")) == 0.0 and float(shader.get("maximumValue")) == 1.0
    items = shader.findall("item")
    values = [float(i.get("value")) for i in items]
    assert values == sorted(values) and values[0] == 0.0 and values[-1] == 1.0 and 0.5 in values
    # Real values: QGIS applies the band's GDAL scale, so 1.0 is the stored 10000.
    assert dict((name, scale) for name, scale, _ in LAYERS)["p_after_cutoff"] == SCALE and round(1.0 / SCALE) == 10000
    # Nothing drawn below the threshold, everything drawn above it.
    assert all(int(i.get("alpha")) == 0 for i, v in zip(items, values, strict=True) if v <= P_TRANSPARENT_BELOW)
    assert all(int(i.get("alpha")) == 255 for i, v in zip(items, values, strict=True) if v > P_TRANSPARENT_BELOW)
    labels = {float(i.get("value")): i.get("label") for i in items}
    assert labels[0.0].startswith("0.0 – no evidence of conversion after the cutoff (2020)")
    assert labels[1.0].startswith("1.0 – strong evidence of conversion after the cutoff (2020)")
    assert labels[0.5].startswith("0.5")
    # The ramp darkens steadily: each drawn step is visible, and 1.0 stands out from the lightest drawn colour.
    drawn = [i.get("color") for i, v in zip(items, values, strict=True) if v > P_TRANSPARENT_BELOW]
    assert [_lab(c)[0] for c in drawn] == sorted((_lab(c)[0] for c in drawn), reverse=True)
    assert min(delta_e(a, b) for a, b in pairwise(drawn)) > JND and delta_e(drawn[0], drawn[-1]) > APART


@pytest.mark.parametrize(("years", "cutoff"), SERIES, ids=IDS)
def test_onset_style_has_one_item_per_year_split_at_the_cutoff(tmp_path, years, cutoff):
    root = _written(onset_style(years, cutoff, BAND["onset_year"]), tmp_path / "t.onset_year.qml")
    r = root.find("pipe/rasterrenderer")
    assert r.get("band") == str(BAND["onset_year"])
    shader = r.find("rastershader/colorrampshader")
    assert shader.get("colorRampType") == "EXACT"
    items = shader.findall("item")
    assert [int(i.get("value")) for i in items] == years
    assert [i.get("color") for i in items] == year_colours(years, cutoff)
    assert len({i.get("color") for i in items}) == len(years)
    for i in items:
        y = int(i.get("value"))
        assert i.get("label") == (f"{y} (after cutoff)" if y > cutoff else f"{y} (cutoff year)" if y == cutoff else str(y))


@pytest.mark.filterwarnings("ignore:.*simulation of tritanomaly")  # colour-science notes the model is approximate for tritans
@pytest.mark.parametrize(("years", "cutoff"), SERIES, ids=IDS)
def test_cutoff_year_and_the_year_after_look_different(years, cutoff):
    before, after = _split(years, cutoff)
    if before and after:
        assert delta_e(before[-1], after[0]) > APART
        # ...also with a red-green or blue-yellow deficiency.
        for deficiency in ("Protanomaly", "Deuteranomaly", "Tritanomaly"):
            assert delta_e(_simulate(before[-1], deficiency), _simulate(after[0], deficiency)) > APART, deficiency
        # Years on the two sides never look alike, whatever their distance in time.
        assert min(delta_e(b, a) for b, a in product(before, after)) > ACROSS
        # Cool up to the cutoff, warm after it: CIELAB b* (blue < 0 < yellow) of the cutoff year vs the first year after.
        assert _lab(before[-1])[2] < 0 < _lab(after[0])[2]


@pytest.mark.parametrize(("years", "cutoff"), SERIES, ids=IDS)
def test_conversion_class_colour_is_far_from_the_years_around_the_cutoff(years, cutoff):
    conversion = CLASS_STYLE[2][1]
    near = [c for y, c in zip(years, year_colours(years, cutoff), strict=True) if abs(y - cutoff) <= 1]
    assert near and min(delta_e(conversion, c) for c in near) > APART


@pytest.mark.parametrize(("years", "cutoff"), SERIES, ids=IDS)
def test_neighbouring_years_on_one_side_stay_distinguishable(years, cutoff):
    for side in _split(years, cutoff):
        assert all(delta_e(a, b) > JND for a, b in pairwise(side))


def test_year_colours_follow_the_year_not_its_position():
    years = list(range(2013, 2025))
    shuffled = years[::-1]
    assert year_colours(shuffled, 2020) == year_colours(years, 2020)[::-1]
    # The cutoff year gets the same colour however many years precede it.
    assert year_colours([2020], 2020) == year_colours(years, 2020)[years.index(2020) : years.index(2020) + 1]


def test_mapped_tile_gets_the_p_after_cutoff_style_beside_it(region, model_dir, tmp_path):
    out = tmp_path / "out"
    run(tm._cfg(region, model_dir, out, tiles=["t1"]))
    root = ET.parse(out / "t1.p_after_cutoff.qml").getroot()
    r = root.find("pipe/rasterrenderer")
    assert r.get("band") == str(BAND["p_after_cutoff"])
    assert "after the cutoff (2015)" in r.find("rastershader/colorrampshader/item").get("label")
    with rasterio.open(out / "t1.tif") as src:
        band = int(r.get("band"))
        assert src.descriptions[band - 1] == "p_after_cutoff" and src.scales[band - 1] == pytest.approx(SCALE)
    onset = ET.parse(out / "t1.onset_year.qml").getroot().findall(".//item")
    assert [i.get("color") for i in onset] == year_colours(tm.YEARS, 2015)


# --------------------------------------------------------------------------- fire layers

CVD = ("Protanomaly", "Deuteranomaly", "Tritanomaly")


def test_fire_style_draws_every_fire_code_but_none(tmp_path):
    root = _written(fire_style(BAND["fire"]), tmp_path / "t.fire.qml")
    r = root.find("pipe/rasterrenderer")
    assert r.get("type") == "paletted" and r.get("band") == str(BAND["fire"]) == "9"
    values = sorted(int(e.get("value")) for e in r.findall("colorPalette/paletteEntry"))
    assert values == sorted(v for v in FIRE_CODES.values() if v != FIRE_CODES["none"])


@pytest.mark.parametrize("deficiency", (None, *CVD))
def test_fire_colours_stay_apart_with_colour_vision_deficiencies(deficiency):
    colours = [c for _, c in FIRE_STYLE.values()]
    seen = [_simulate(c, deficiency) if deficiency else c for c in colours]
    for a, b in product(range(len(seen)), repeat=2):
        if a < b:
            assert delta_e(seen[a], seen[b]) > APART, (deficiency, colours[a], colours[b])


def test_dnbr_style_follows_key_and_benson_breaks(tmp_path):
    """The discrete ramp's class ends: one stored step (0.0001) below each published break (Key & Benson 2006: -100, 100, 270, 440, 660 on dNBR x 1000)."""
    root = _written(dnbr_style(BAND["dnbr"]), tmp_path / "t.dnbr.qml")
    r = root.find("pipe/rasterrenderer")
    assert r.get("band") == str(BAND["dnbr"]) == "11"
    shader = r.find("rastershader/colorrampshader")
    assert shader.get("colorRampType") == "DISCRETE"
    values = [i.get("value") for i in shader.findall("item")]
    assert values[-1] == "inf"
    breaks = [-100, 100, 270, 440, 660]
    assert [round(float(v) * 1000 + 0.1) for v in values[:-1]] == breaks
    # Each class's highest value falls in that class and the next stored value in the next one.
    for (upper, _, _), (code, _, _) in zip(DNBR_CLASSES[:-1], SEVERITY_CLASSES[:-1], strict=True):
        assert burn_class(upper) == code and burn_class(round(upper + SCALE, 4)) == code + 1


def burn_class(d: float) -> int:
    from plantation.imagery.burn import severity_class

    return int(severity_class(np.array([d]))[0])


@pytest.mark.parametrize("deficiency", (None, *CVD))
def test_severity_colours_darken_in_order_and_stay_apart(deficiency):
    colours = [c for _, c, _ in DNBR_CLASSES[1:]]  # unburned .. high
    seen = [_simulate(c, deficiency) if deficiency else c for c in colours]
    lightness = [float(_lab(c)[0]) for c in seen]
    assert all(a > b for a, b in pairwise(lightness)), lightness
    assert all(delta_e(a, b) > 10 for a, b in pairwise(seen))
