"""Evidence pages of farm plots, on a tiny region built in code whose every date can be told apart by its pixels.

The imagery: 16 × 16 pixels, four dates a year 2019–2022, forest everywhere
until a block of pixels under plot P-conv is cleared (bare soil) from May
2021 on. Each date's blue band carries its own value (300 + 10 × date
number, stored), so a chip's pixels say which date it was drawn from. The
map: the same grid, the block mapped as converted in 2021 (interval
2020–2021). Clouds: the last date of 2020 and the first of 2021 are cloudy
over most of the plot, so the last clear view before the onset year is
2020-08-15 and the first ones from it on are 2021-05-16, 2021-08-15 and
2021-11-14. Reference values: NDVI and NBR by their published formulas
(Rouse et al. 1974; Key & Benson 2006), worked out here by hand.
"""

from __future__ import annotations

import hashlib
import json
from datetime import date
from pathlib import Path

import numpy as np
import pytest
import rasterio
import shapely
from PIL import Image

from plantation.errors import ConfigError, FileFormatError, RegionError
from plantation.farmplots.cutoff import PlotsConfig, run
from plantation.farmplots.evidence import (
    EVIDENCE_JSON,
    FALSE_COLOUR,
    TRUE_COLOUR,
    EvidenceConfig,
    PageCanvas,
    choose_dates,
    draw_page,
    gather,
    page_name,
    page_text,
    read_evidence,
    stretch,
)
from plantation.imagery.config import LabelsConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import open_tile
from plantation.mapping.folder import FORMAT
from plantation.mapping.styles import year_colours
from tests.conftest import BANDS, CRS, TRANSFORM, write_map_tile, write_stack

SIDE = 16
DATES = [f"{y}-{md}" for y in (2019, 2020, 2021, 2022) for md in ("02-14", "05-16", "08-15", "11-14")]
FOREST = np.array([300, 500, 250, 3500, 1800, 700], np.int16)
SOIL = np.array([900, 1200, 1500, 2200, 3000, 2500], np.int16)
#: The converted block, rows and columns 5..10, cleared from this date on.
BLOCK = (slice(5, 11), slice(5, 11))
CLEARED_FROM = DATES.index("2021-05-16")
CLOUDY = (DATES.index("2020-11-14"), DATES.index("2021-02-14"))


def imagery() -> tuple[np.ndarray, np.ndarray]:
    v = np.broadcast_to(FOREST[None, :, None, None], (len(DATES), 6, SIDE, SIDE)).copy()
    for k in range(CLEARED_FROM, len(DATES)):
        v[k][(slice(None), *BLOCK)] = SOIL[:, None, None]
    v[:, 0] += (10 * np.arange(len(DATES)))[:, None, None].astype(np.int16)  # each date its own blue
    qa = np.zeros((len(DATES), SIDE, SIDE), np.int16)
    for k in CLOUDY:
        qa[k, 4:12, 4:12] = 1  # cloud bit over most of the plot
    return v, qa


def write_map(folder: Path, name: str = "t1") -> Path:
    """A map tile on the imagery's grid: the block mapped as converted in 2021 (interval 2020–2021), p_after_cutoff 0.98 there."""
    folder.mkdir(parents=True, exist_ok=True)
    bands = np.zeros((8, SIDE, SIDE), np.int16)
    bands[0] = 1
    bands[7] = 12
    bands[(0, *BLOCK)] = 2
    bands[(1, *BLOCK)] = 2021
    bands[(2, *BLOCK)] = 2020
    bands[(3, *BLOCK)] = 2021
    bands[(4, *BLOCK)] = 9500
    bands[(5, *BLOCK)] = 9800
    bands[5][0:3, 0:3] = 300
    path = folder / f"{name}.tif"
    write_map_tile(path, bands, crs=CRS, transform=TRANSFORM, tags={"cutoff_year": "2020", "interval_level": "0.8"})
    doc = {"format": FORMAT, "producer": "test", "tiles": {name: {"file": path.name, "sha256": hashlib.sha256(path.read_bytes()).hexdigest(), "tile": name, "converted_ha": {"2021": 3.24}}}}
    (folder / "manifest.json").write_text(json.dumps(doc))
    return folder


def box(r0: float, c0: float, r1: float, c1: float) -> shapely.Polygon:
    (xa, ya), (xb, yb) = TRANSFORM * (c0, r0), TRANSFORM * (c1, r1)
    return shapely.box(min(xa, xb), min(ya, yb), max(xa, xb), max(ya, yb))


@pytest.fixture
def region(tmp_path: Path) -> RegionConfig:
    v, qa = imagery()
    folder = write_stack(tmp_path / "img", DATES, v, qa)
    return RegionConfig(
        name="tiny",
        tiles=[TileConfig(name="t1", path=str(folder))],
        bands=BANDS,
        nodata=-9999,
        mask=MaskConfig(band=7, invalid_bits=[0, 1, 2]),
        scaling=[ScalingRule(start=None, scale=1e-4, offset=0.0)],
        labels=LabelsConfig(path=None, crs=CRS),
        chunk=8,
    )


def write_plots(path: Path, geoms: list, ids: list) -> Path:
    import pyogrio

    wkb = np.array([shapely.to_wkb(g) for g in geoms], dtype=object)
    pyogrio.raw.write(path, wkb, [np.array(ids, dtype=object)], ["id"], geometry_type="Polygon", crs=CRS, driver="GPKG")
    return path


# --------------------------------------------------------------------------- one page's content


def test_known_converted_plot_shows_its_onset_and_chips_of_the_right_dates(region: RegionConfig, tmp_path: Path) -> None:
    maps = write_map(tmp_path / "maps")
    stack = open_tile(region.tiles[0], region)
    cfg = EvidenceConfig(views_after=3, margin=2, min_window=12)
    ev = gather(box(5, 5, 11, 11), maps / "t1.tif", stack, region.bands, date(2020, 12, 31), cfg)

    assert (ev.onset_year, ev.onset_lo, ev.onset_hi) == (2021, 2020, 2021)
    assert ev.converted_share == 1.0
    assert ev.p_max == pytest.approx(0.98)
    # The window: the plot (rows/cols 5..10) and 2 pixels around, grown to 12 a side.
    assert ev.window == (2, 2, 12, 12)
    assert int(ev.inside.sum()) == 36
    # Clear views: every date but the two cloudy ones.
    assert [str(d) for d in ev.dates[~ev.clear]] == ["2020-11-14", "2021-02-14"]
    # The chips' dates: the last clear view before 2021, then the first three from 2021 on.
    assert [str(ev.dates[t]) for t in ev.chip_dates] == ["2020-08-15", "2021-05-16", "2021-08-15", "2021-11-14"]

    # Each chip is the imagery of its date, stretched: read the files independently and compare pixel by pixel.
    for k, t in enumerate(ev.chip_dates):
        with rasterio.open(Path(region.tiles[0].path) / f"scene_{DATES[t]}.tif") as src:
            raw = src.read(list(range(1, 7)), window=rasterio.windows.Window(2, 2, 12, 12)).astype(np.float64) * 1e-4
        for ch, (role, lo, hi) in enumerate(TRUE_COLOUR):
            want = np.clip((raw[BANDS.index(role)] - lo) / (hi - lo), 0, 1)
            np.testing.assert_allclose(ev.true_colour[k][..., ch], want, atol=1e-6)
        for ch, (role, lo, hi) in enumerate(FALSE_COLOUR):
            want = np.clip((raw[BANDS.index(role)] - lo) / (hi - lo), 0, 1)
            np.testing.assert_allclose(ev.false_colour[k][..., ch], want, atol=1e-6)
        # The blue channel names the date: (300 + 10 t) / 10000 / 0.15.
        assert ev.true_colour[k][0, 0, 2] == pytest.approx((300 + 10 * t) * 1e-4 / 0.15, abs=1e-6)
    # Forest before (dark red channel), bare soil after (red saturated) inside the plot.
    assert ev.true_colour[0][5, 5, 0] == pytest.approx(0.025 / 0.15, abs=1e-6)
    assert ev.true_colour[1][5, 5, 0] == pytest.approx(1.0, abs=1e-6)

    # The plot's medians: forest NDVI (3500 − 250) / (3500 + 250), soil (2200 − 1500) / (2200 + 1500); NBR likewise with SWIR2.
    assert ev.ndvi[0] == pytest.approx(3250 / 3750, abs=1e-6)
    assert ev.ndvi[CLEARED_FROM] == pytest.approx(700 / 3700, abs=1e-6)
    assert ev.nbr[0] == pytest.approx(2800 / 4200, abs=1e-6)
    assert ev.nbr[CLEARED_FROM] == pytest.approx(-300 / 4700, abs=1e-6)
    assert np.isnan(ev.ndvi[list(CLOUDY)]).all()

    text = " ".join(
        page_text(
            ev,
            {"verdict": "strong_evidence", "expected_after_ha": 2.92, "after_lo_ha": 3.24, "after_hi_ha": 3.24, "mapped_ha": 3.24, "share_after": 0.9, "reasons": ["at least 3.24 ha converted"]},
            date(2020, 12, 31),
            0.9,
            0.8,
        )
    )
    assert "Mapped onset year: 2021 (80% credible interval of the year: 2020–2021)" in text
    assert "Verdict: strong evidence." in text and "at least 3.24 ha converted" in text
    assert "14 of 16 dates" in text


def test_plot_without_a_mapped_conversion_shows_the_views_around_the_cutoff(region: RegionConfig, tmp_path: Path) -> None:
    maps = write_map(tmp_path / "maps")
    stack = open_tile(region.tiles[0], region)
    ev = gather(box(0, 0, 3, 3), maps / "t1.tif", stack, region.bands, date(2020, 12, 31), EvidenceConfig(views_after=2))
    assert ev.onset_year is None and ev.boundary == date(2021, 1, 1)
    # The plot lies outside the clouds: every date is clear.
    assert [str(ev.dates[t]) for t in ev.chip_dates] == ["2020-11-14", "2021-02-14", "2021-05-16"]
    assert ev.p_max == pytest.approx(0.03)
    assert "No pixel of the plot is mapped as converted" in " ".join(page_text(ev, {"verdict": "review"}, date(2020, 12, 31), 0.9, 0.8))


def test_choose_dates_and_stretch_by_hand() -> None:
    d = np.array(["2020-01-01", "2020-06-01", "2021-01-01", "2021-03-01", "2021-06-01"], dtype="datetime64[D]")
    clear = np.array([True, True, False, True, True])
    assert choose_dates(d, clear, date(2021, 1, 1), 1) == (1, [3])
    assert choose_dates(d, clear, date(2020, 1, 1), 5) == (None, [0, 1, 3, 4])
    assert choose_dates(d, np.zeros(5, bool), date(2021, 1, 1), 2) == (None, [])
    refl = np.full((6, 1, 2), 0.075, np.float32)
    refl[3, 0, 1] = np.nan
    rgb = stretch(refl, BANDS, TRUE_COLOUR)
    assert rgb[0, 0].tolist() == pytest.approx([0.5, 0.5, 0.5])
    rgb = stretch(refl, BANDS, FALSE_COLOUR)
    assert rgb[0, 0].tolist() == pytest.approx([0.075 / 0.4, 0.075 / 0.5, 0.5])
    assert rgb[0, 1].tolist() == pytest.approx([0.55, 0.55, 0.55])  # NIR invalid: the masked grey
    with pytest.raises(ConfigError, match=r"region.bands: .* lack \['swir1'\]"):
        stretch(refl[:4], BANDS[:4], FALSE_COLOUR)


def test_page_names_are_plain_and_distinct() -> None:
    taken: set[str] = set()
    assert page_name("SLV-P0001", taken) == "SLV-P0001.png"
    evil = page_name("../<script>", taken)
    assert "/" not in evil and "<" not in evil and evil.endswith(".png") and not evil.startswith(".")
    # Two ids that clean to the same text still get two files.
    a, b = page_name("a b", taken), page_name("a:b", taken)
    assert a != b


# --------------------------------------------------------------------------- the drawn page

ROW = {
    "id": "P-conv",
    "verdict": "strong_evidence",
    "expected_after_ha": 2.92,
    "after_lo_ha": 3.24,
    "after_hi_ha": 3.24,
    "mapped_ha": 3.24,
    "share_after": 0.9,
    "reasons": ["at least 3.24 ha converted"],
}


def _pixels(png: bytes) -> np.ndarray:
    import io

    with Image.open(io.BytesIO(png)) as im:
        return np.asarray(im.convert("RGB"))


def _count(px: np.ndarray, rgb01: np.ndarray) -> int:
    """Pixels of the page of this colour (a chip or map colour in 0–1), to within one 8-bit step (rounding or truncation)."""
    want = np.asarray(rgb01, np.float64) * 255
    return int((np.abs(px.astype(np.float64) - want) <= 1.0).all(-1).sum())


def test_the_page_shows_the_map_colours_and_the_chips_pixels(region: RegionConfig, tmp_path: Path) -> None:
    from matplotlib.colors import to_rgb

    maps = write_map(tmp_path / "maps")
    stack = open_tile(region.tiles[0], region)
    cutoff = date(2020, 12, 31)
    ev = gather(box(5, 5, 11, 11), maps / "t1.tif", stack, region.bands, cutoff, EvidenceConfig(views_after=3, margin=2, min_window=12))
    px = _pixels(draw_page(ev, ROW, cutoff, plot_level=0.9, map_level=0.8, years=[2019, 2020, 2021, 2022]))
    # The map window and the key's swatch in the colour of 2021 among the map's years, split at the cutoff (the QGIS style's colours).
    onset_colour = to_rgb(year_colours([2019, 2020, 2021, 2022], 2020)[2])
    assert _count(px, onset_colour) > 300
    # The chips are the imagery's pixels: bare soil after the clearing (chip b), forest before it (chip a), drawn block by block.
    soil, forest = ev.true_colour[1][5, 5], ev.true_colour[0][5, 5]
    assert not np.allclose(soil, forest)
    assert _count(px, soil) > 300 and _count(px, forest) > 300
    assert _count(px, ev.false_colour[1][5, 5]) > 300


def test_a_reused_canvas_draws_each_page_as_a_fresh_one(region: RegionConfig, tmp_path: Path) -> None:
    import dataclasses

    maps = write_map(tmp_path / "maps")
    stack = open_tile(region.tiles[0], region)
    cutoff = date(2020, 12, 31)
    cfg = EvidenceConfig(views_after=3, margin=2, min_window=12)
    conv = gather(box(5, 5, 11, 11), maps / "t1.tif", stack, region.bands, cutoff, cfg)
    forest = gather(box(0, 0, 3, 3), maps / "t1.tif", stack, region.bands, cutoff, cfg)
    no_chips = dataclasses.replace(conv, before=None, after=[])
    years = [2019, 2020, 2021, 2022]
    first = draw_page(conv, ROW, cutoff, plot_level=0.9, map_level=0.8, years=years)
    other = draw_page(forest, {"id": "P-forest", "verdict": "review"}, cutoff, plot_level=0.9, map_level=0.8, years=years)
    bare = draw_page(no_chips, ROW, cutoff, plot_level=0.9, map_level=0.8, years=years)
    again = draw_page(conv, ROW, cutoff, plot_level=0.9, map_level=0.8, years=years)
    # Nothing of the pages between lingers: the same plot gives the same bytes, and the same as on a canvas of its own.
    assert again == first
    assert PageCanvas(4, conv.dates, years, cutoff).draw(conv, ROW, plot_level=0.9, map_level=0.8) == first
    assert other != first
    # A page without chips shows none, not the chips of the page before.
    px = _pixels(bare)
    assert _count(px, conv.true_colour[1][5, 5]) == 0 and _count(px, conv.true_colour[0][5, 5]) == 0
    assert _count(_pixels(first), conv.true_colour[1][5, 5]) > 300


# --------------------------------------------------------------------------- through the plot check


def test_plot_check_draws_pages_for_flagged_and_asked_plots(region: RegionConfig, tmp_path: Path) -> None:
    maps = write_map(tmp_path / "maps")
    plots = write_plots(tmp_path / "plots.gpkg", [box(5, 5, 11, 11), box(0, 12, 3, 15), box(12, 0, 15, 3)], ["P-conv", "P-forest", "P/asked"])
    out = tmp_path / "out"
    cfg = PlotsConfig(plots=str(plots), map=str(maps), out_dir=str(out), progress=False, region=region, evidence=EvidenceConfig(enabled=True, plots=["P/asked", "nobody"], survey=None))
    res = run(cfg)
    verdicts = {r.id: r.verdict for r in res.rows}
    assert verdicts == {"P-conv": "strong_evidence", "P-forest": "low_evidence", "P/asked": "low_evidence"}
    assert res.evidence is not None
    doc = read_evidence(out)
    assert [p["id"] for p in doc["pages"]] == ["P-conv", "P/asked"]  # the tables' order, most attention first
    assert doc["skipped"] == [{"id": "nobody", "reason": "no plot with this id in the plots file"}]
    conv = doc["pages"][0]
    assert conv["onset_year"] == 2021 and conv["onset_interval"] == [2020, 2021]
    assert conv["before"] == "2020-08-15" and conv["after"] == ["2021-05-16", "2021-08-15", "2021-11-14"]
    assert doc["plots_json_sha256"] == hashlib.sha256((out / "plots.json").read_bytes()).hexdigest()
    assert doc["imagery"]["dates"] == 16 and doc["imagery"]["dates_by_year"] == {"2019": 4, "2020": 4, "2021": 4, "2022": 4}
    for p in doc["pages"]:
        png = out / "evidence" / p["file"]
        with Image.open(png) as im:
            assert im.format == "PNG" and im.size[0] > 600 and im.size[1] > 600
            rgb = np.asarray(im.convert("RGB"))
        assert float(rgb.std()) > 20
    assert not list(out.glob("*.partial")) and not (out / "evidence.partial").exists()

    # A second run without the asked plot: its old page is gone, nothing half-written is left.
    cfg.evidence.plots = []
    run(cfg)
    doc = read_evidence(out / "evidence")
    assert [p["id"] for p in doc["pages"]] == ["P-conv"]
    assert sorted(f.name for f in (out / "evidence").iterdir()) == sorted([EVIDENCE_JSON, doc["pages"][0]["file"]])


def test_survey_shares_by_year_and_month(region: RegionConfig, tmp_path: Path) -> None:
    maps = write_map(tmp_path / "maps")
    plots = write_plots(tmp_path / "plots.gpkg", [box(5, 5, 11, 11)], ["P-conv"])
    survey = tmp_path / "survey.json"
    shares = {d: 0.5 for d in DATES} | {"2020-02-14": 0.1}
    survey.write_text(json.dumps({"region": "tiny", "clear_share_by_date": {"t1": shares}, "clear_share_by_month": {"2": 0.4, "5": 0.5, "8": 0.5, "11": 0.5}}))
    cfg = PlotsConfig(plots=str(plots), map=str(maps), out_dir=str(tmp_path / "out"), progress=False, region=region, evidence=EvidenceConfig(enabled=True, survey=str(survey)))
    run(cfg)
    im = read_evidence(tmp_path / "out")["imagery"]
    assert im["clear_share_by_year"]["2020"] == pytest.approx((0.1 + 0.5 * 3) / 4)
    assert im["clear_share_by_year_month"]["2020"]["2"] == pytest.approx(0.1)
    assert im["clear_share_by_month"]["2"] == 0.4
    # A survey of another region is not used, and says why.
    survey.write_text(json.dumps({"region": "elsewhere", "clear_share_by_date": {}}))
    run(cfg)
    im = read_evidence(tmp_path / "out")["imagery"]
    assert "clear_share_by_year" not in im and "elsewhere" in im["clear_note"]


def test_map_of_another_region_is_one_line_before_anything_is_written(region: RegionConfig, tmp_path: Path) -> None:
    maps = write_map(tmp_path / "maps", name="t9")
    plots = write_plots(tmp_path / "plots.gpkg", [box(5, 5, 11, 11)], ["P-conv"])
    cfg = PlotsConfig(plots=str(plots), map=str(maps), out_dir=str(tmp_path / "out"), progress=False, region=region, evidence=EvidenceConfig(enabled=True))
    with pytest.raises(RegionError, match=r"t9.tif: map tile 't9' has no imagery tile of that name in region 'tiny'; .*evidence.enabled=false") as err:
        run(cfg)
    assert "\n" not in str(err.value)
    assert not (tmp_path / "out").exists()
    cfg.evidence.enabled = False
    assert run(cfg).evidence is None


def test_bad_evidence_keys_are_refused(region: RegionConfig, tmp_path: Path) -> None:
    maps = write_map(tmp_path / "maps")
    plots = write_plots(tmp_path / "plots.gpkg", [box(5, 5, 11, 11)], ["P-conv"])
    for ev, msg in (
        (EvidenceConfig(enabled=True, verdicts=["strong"]), "evidence.verdicts: \\['strong'\\] are not verdicts"),
        (EvidenceConfig(enabled=True, min_clear_share=0), "evidence.min_clear_share"),
    ):
        with pytest.raises(ConfigError, match=msg):
            run(PlotsConfig(plots=str(plots), map=str(maps), out_dir=str(tmp_path / "out"), progress=False, region=region, evidence=ev))


def test_read_evidence_refuses_damaged_records(tmp_path: Path) -> None:
    folder = tmp_path / "evidence"
    folder.mkdir()
    (folder / EVIDENCE_JSON).write_text(json.dumps({"kind": "plantation-evidence/1", "pages": [{"file": "../../etc/passwd"}]}))
    with pytest.raises(FileFormatError, match="pages entry 1 has no plain file name"):
        read_evidence(tmp_path)
    (folder / EVIDENCE_JSON).write_text(json.dumps({"kind": "other/1"}))
    with pytest.raises(FileFormatError, match="kind 'other/1'"):
        read_evidence(folder)
