"""Starting a region file from the files: what is inferred, that the reader takes the result as is, and every refusal."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
import rasterio
import rioxarray  # noqa: F401  (adds .rio)
import xarray as xr
from affine import Affine
from omegaconf import OmegaConf
from pyproj import Transformer

from plantation.benchmarks.reading import QA_PIXEL_CLEAR, write_landsat_scene, write_s2_product
from plantation.errors import InputNotFoundError, LabelError, RegionError
from plantation.imagery.config import RegionConfig
from plantation.imagery.products import MSI, OLI
from plantation.imagery.region import open_region
from plantation.reference.labels import read_labels
from plantation.reference.starter import CHECK, RegionFileExistsError, inspect, render, write
from tests.conftest import BANDS, CRS, DATES, TRANSFORM, pixel_centre, write_stack

ROOT = Path(__file__).resolve().parents[1]
#: Tile b sits 8 pixels (240 m) east of tile a: its own grid, the same CRS.
EAST = Affine(30.0, 0.0, 600240.0, 0.0, -30.0, 200010.0)
TO_LONLAT = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)


def load_region_file(path: Path) -> RegionConfig:
    """What the jobs do with a region file: drop ``defaults``, merge onto the schema, take relative paths from the file's folder."""
    raw = OmegaConf.load(path)
    raw.pop("defaults")
    cfg = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(RegionConfig), raw))
    assert isinstance(cfg, RegionConfig)
    for t in cfg.tiles:
        t.path = str((path.parent / t.path).resolve())
        t.truth = str((path.parent / t.truth).resolve()) if t.truth else None
    if cfg.labels.path:
        cfg.labels.path = str((path.parent / cfg.labels.path).resolve())
    return cfg


def keys_without_comment(text: str) -> list[str]:
    """Keys (outside ``defaults``) whose line is not directly under a comment line."""
    lines = text.splitlines()
    keys = [(i, m[1]) for i, line in enumerate(lines) if (m := re.match(r" *([A-Za-z_]\w*):", line))]
    return [k for i, k in keys if k != "defaults" and not lines[i - 1].lstrip().startswith("#")]


def lonlat_csv(path: Path, rows: list[tuple[int, int, str, int | None]], transform: Affine = TRANSFORM, header: str = "x,y,label,onset_year") -> Path:
    """Labels at pixel centres of a grid, written as lon/lat."""
    lines = [header]
    for r, c, lab, yr in rows:
        lon, lat = TO_LONLAT.transform(*pixel_centre(r, c, transform))
        lines.append(f"{lon:.8f},{lat:.8f},{lab},{'' if yr is None else yr}")
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.fixture
def qa(tiny_values: np.ndarray) -> np.ndarray:
    return np.zeros((tiny_values.shape[0], 8, 8), np.int16)


@pytest.fixture
def two_tiles(tmp_path: Path, tiny_values: np.ndarray, qa: np.ndarray) -> Path:
    """A region folder: tiles a and b, 5 dates, 6 int16 bands + an int16 QA band, nodata -9999, EPSG:32650."""
    region = tmp_path / "data" / "region"
    write_stack(region / "a", DATES, tiny_values, qa)
    write_stack(region / "b" / "imagery", DATES, tiny_values, qa, transform=EAST)
    return region


# ---------------------------------------------------------------- inferred and read back


def test_two_tiles_with_qa_band_written_loaded_and_read(two_tiles, tmp_path):
    labels = lonlat_csv(tmp_path / "data" / "labels.csv", [(1, 1, "stable_forest", None), (2, 3, "conversion", 2016), (5, 6, "other", None)])
    with (labels.parent / "labels.csv").open("a") as fh:  # one point in tile b
        lon, lat = TO_LONLAT.transform(*pixel_centre(4, 4, EAST))
        fh.write(f"{lon:.8f},{lat:.8f},conversion,2017\n")
    out = write("tiny", two_tiles, labels, tmp_path / "configs" / "tiny.yaml")
    assert out == tmp_path / "configs" / "tiny.yaml"
    text = out.read_text()
    assert str(tmp_path) not in text, "paths must be relative to the region file's folder"
    assert "path: ../data/labels.csv" in text and "{name: a, path: ../data/region/a}" in text and "{name: b, path: ../data/region/b/imagery}" in text
    assert text.splitlines()[0].startswith("# Region 'tiny', started by `plantation new-region`")
    assert "defaults:\n  - region_schema\n  - _self_\n" in text
    assert keys_without_comment(text) == []
    assert not list(out.parent.glob("*.partial")), "no temporary file is left behind"

    cfg = load_region_file(out)
    assert cfg.name == "tiny" and cfg.format == "geotiff_folder"
    assert [t.name for t in cfg.tiles] == ["a", "b"]
    assert cfg.bands == BANDS
    assert cfg.nodata == -9999
    assert cfg.mask.band == 7 and cfg.mask.invalid_bits == [0, 1, 2]
    assert [(s.start, s.scale, s.offset) for s in cfg.scaling] == [(None, 1e-4, 0.0)]
    assert cfg.labels.crs == "EPSG:4326" and cfg.labels.path == str(labels)

    stacks = open_region(cfg)
    assert [str(d) for d in stacks[0].dates] == DATES
    assert all(s.grid.crs.to_epsg() == 32650 for s in stacks)
    assert stacks[1].grid.transform == EAST
    ls = read_labels(cfg.labels.path, grids={s.name: s.grid for s in stacks}, years=stacks[0].years.tolist(), csv_crs=cfg.labels.crs)
    assert ls.counts() == {"stable_forest": 1, "conversion": 2, "old_plantation": 0, "other": 1}
    assert ls.points["tile"].tolist() == ["a", "a", "a", "b"]


def test_written_file_loads_through_the_region_loader_if_present(two_tiles, tmp_path):
    compose = pytest.importorskip("plantation.cli.compose")
    if not hasattr(compose, "load_region_file"):
        pytest.skip("the command line's region loader is not there")
    out = write("tiny", two_tiles, None, tmp_path / "mine.yaml")
    cfg = OmegaConf.to_object(compose.load_region_file(out))
    assert [Path(t.path) for t in cfg.tiles] == [two_tiles / "a", two_tiles / "b" / "imagery"]
    open_region(cfg)


def test_single_tile_folder_without_qa_nodata_or_labels(tmp_path, tiny_values):
    folder = write_stack(tmp_path / "plot_12", DATES, tiny_values, None, nodata=None)
    starter = inspect("one", folder, None)
    r = starter.region
    assert [(t.name, t.path) for t in r.tiles] == [("plot_12", str(folder))]
    assert r.bands == BANDS and r.mask.band is None and r.nodata is None
    assert r.labels.path is None
    text = render(starter, tmp_path)
    assert "  band: null" in text and "nodata: null" in text and "path: null" in text
    assert f"{CHECK} the files carry no nodata tag" in text
    assert f"{CHECK} no labels were given" in text
    out = tmp_path / "one.yaml"
    out.write_text(text)
    st = open_region(load_region_file(out))[0]
    assert st.reflectance.shape == (5, 6, 8, 8)


def test_toy_region_matches_its_handwritten_config():
    """The demo region in the repository gives the tiles, bands, nodata, QA band and labels of configs/region/toy.yaml."""
    toy = load_region_file(ROOT / "configs" / "region" / "toy.yaml")
    starter = inspect("selvara_toy", ROOT / "toy_tiles", ROOT / "toy_tiles" / "labels.csv")
    got = starter.region
    assert [(t.name, t.path, t.truth) for t in got.tiles] == [(t.name, t.path, t.truth) for t in toy.tiles]
    assert got.format == toy.format == "geotiff_folder"
    assert got.bands == toy.bands
    assert got.nodata == toy.nodata == -9999
    assert got.mask.band == toy.mask.band == 7
    assert (got.labels.path, got.labels.crs) == (toy.labels.path, toy.labels.crs)
    assert sum(starter.label_counts.values()) > 0
    # Written beside toy.yaml, the paths read as toy.yaml's do.
    text = render(starter, ROOT / "configs" / "region")
    assert "{name: t01, path: ../../toy_tiles/t01/imagery, truth: ../../toy_tiles/t01/truth.tif}" in text
    assert "path: ../../toy_tiles/labels.csv" in text
    assert keys_without_comment(text) == []


def test_band_descriptions_name_the_roles_and_the_qa_band(tmp_path, tiny_values, qa):
    """Files that name their bands, in an unusual order, get those roles; 'QA_PIXEL' marks the QA band."""
    folder = write_stack(tmp_path / "t", DATES[:2], tiny_values[:2], qa[:2])
    order = ["nir", "red", "green", "blue", "SWIR 1", "swir22", "QA_PIXEL"]
    for f in sorted(folder.glob("*.tif")):
        with rasterio.open(f, "r+") as dst:
            dst.descriptions = tuple(order)
    r = inspect("named", folder, None).region
    assert r.bands == ["nir", "red", "green", "blue", "swir1", "swir2"]
    assert r.mask.band == 7


def test_unknown_band_count_gets_placeholders_and_a_check(tmp_path):
    """Four float bands, unnamed: placeholders to fill in, no QA band, scale 1; the reader still opens the file as written."""
    folder = tmp_path / "t"
    folder.mkdir()
    for d in DATES[:3]:
        prof = {"driver": "GTiff", "width": 8, "height": 8, "count": 4, "dtype": "float32", "crs": CRS, "transform": TRANSFORM}
        with rasterio.open(folder / f"{d}.tif", "w", **prof) as dst:
            dst.write(np.full((4, 8, 8), 0.2, np.float32))
    starter = inspect("four", folder, None)
    r = starter.region
    assert r.bands == ["band1", "band2", "band3", "band4"] and r.mask.band is None
    assert [s.scale for s in r.scaling] == [1.0]
    text = render(starter, tmp_path)
    assert "bands: [band1, band2, band3, band4]" in text
    assert any(c.startswith(f"{CHECK} the files hold 4 reflectance band(s)") for c in starter.checks)
    out = tmp_path / "four.yaml"
    out.write_text(text)
    open_region(load_region_file(out))


def test_netcdf_cubes_one_per_tile(tmp_path, tiny_values):
    ys = TRANSFORM.f + TRANSFORM.e * (np.arange(8) + 0.5)
    xs = TRANSFORM.c + TRANSFORM.a * (np.arange(8) + 0.5)
    (tmp_path / "cubes").mkdir()
    for name in ("north", "south"):
        da = xr.DataArray(
            tiny_values,
            dims=("time", "band", "y", "x"),
            coords={"time": np.array(DATES, dtype="datetime64[ns]"), "band": BANDS, "y": ys, "x": xs},
            name="reflectance",
        ).rio.write_crs(CRS)
        da.to_dataset().to_netcdf(tmp_path / "cubes" / f"{name}.nc")
    starter = inspect("cubes", tmp_path / "cubes", None)
    r = starter.region
    assert r.format == "cube" and r.cube_variable == "reflectance"
    assert [t.name for t in r.tiles] == ["north", "south"]
    assert r.bands == BANDS and r.mask.variable is None
    assert [s.scale for s in r.scaling] == [1e-4]
    out = tmp_path / "cubes.yaml"
    out.write_text(render(starter, tmp_path))
    assert [str(d) for d in open_region(load_region_file(out))[0].dates] == DATES


def test_csv_in_the_imagery_crs_is_recognised(two_tiles, tmp_path):
    path = tmp_path / "utm.csv"
    x, y = pixel_centre(2, 2)
    path.write_text(f"x,y,label,onset_year\n{x},{y},conversion,2015\n")
    starter = inspect("utm", two_tiles, path)
    assert starter.region.labels.crs == "EPSG:32650"
    assert starter.label_counts["conversion"] == 1


def test_overwrite_only_when_asked(two_tiles, tmp_path):
    out = tmp_path / "r.yaml"
    out.write_text("# mine\n")
    with pytest.raises(RegionFileExistsError, match=f"{out}: region file exists already"):
        write("r", two_tiles, None, out)
    assert out.read_text() == "# mine\n"
    write("r", two_tiles, None, out, overwrite=True)
    assert load_region_file(out).name == "r"


# ---------------------------------------------------------------- refusals: one line, the culprit path first


def _one_line(exc: pytest.ExceptionInfo, culprit: Path) -> str:
    text = str(exc.value)
    assert "\n" not in text
    assert text.startswith(str(culprit)), text
    return text


def test_tiles_with_different_band_counts(tmp_path, tiny_values, qa):
    write_stack(tmp_path / "r" / "a", DATES, tiny_values, qa)
    b = write_stack(tmp_path / "r" / "b", DATES, tiny_values, None)
    with pytest.raises(RegionError) as exc:
        inspect("r", tmp_path / "r", None)
    assert "6 bands per file, tile 'a' has 7" in _one_line(exc, b)


def test_tiles_in_different_crs(tmp_path, tiny_values, qa):
    write_stack(tmp_path / "r" / "a", DATES, tiny_values, qa)
    b = write_stack(tmp_path / "r" / "b", DATES, tiny_values, qa, crs="EPSG:32651")
    with pytest.raises(RegionError) as exc:
        inspect("r", tmp_path / "r", None)
    assert "CRS EPSG:32651, tile 'a' is in EPSG:32650; one region is one CRS: reproject it" in _one_line(exc, b)


def test_tiles_with_different_dates_refused_by_the_reader(tmp_path, tiny_values, qa):
    write_stack(tmp_path / "r" / "a", DATES, tiny_values, qa)
    b = write_stack(tmp_path / "r" / "b", ["2015-02-15", *DATES[1:]], tiny_values, qa)
    with pytest.raises(RegionError) as exc:
        inspect("r", tmp_path / "r", None)
    assert "dates differ from tile" in _one_line(exc, b)


def test_tiles_with_different_data_types(tmp_path, tiny_values):
    write_stack(tmp_path / "r" / "a", DATES, tiny_values, None)
    b = tmp_path / "r" / "b"
    b.mkdir()
    for d in DATES:
        prof = {"driver": "GTiff", "width": 8, "height": 8, "count": 6, "dtype": "float32", "crs": CRS, "transform": EAST, "nodata": -9999}
        with rasterio.open(b / f"scene_{d}.tif", "w", **prof) as dst:
            dst.write(tiny_values[0].astype(np.float32) * 1e-4)
    with pytest.raises(RegionError) as exc:
        inspect("r", tmp_path / "r", None)
    assert "stores float32, tile 'a' stores int16" in _one_line(exc, b)


def test_file_without_a_date(two_tiles, tiny_values, qa):
    bad = two_tiles / "a" / "scene_latest.tif"
    write_stack(two_tiles / "a", ["2018-08-15"], tiny_values[:1], qa[:1])
    (two_tiles / "a" / "scene_2018-08-15.tif").rename(bad)
    with pytest.raises(RegionError) as exc:
        inspect("r", two_tiles, None)
    assert "no date YYYY-MM-DD in the file name; every GeoTIFF" in _one_line(exc, bad)


def test_labels_without_label_column(two_tiles, tmp_path):
    path = lonlat_csv(tmp_path / "l.csv", [(1, 1, "stable_forest", None)], header="x,y,class,onset_year")
    with pytest.raises(LabelError) as exc:
        inspect("r", two_tiles, path)
    assert "missing column(s) ['label']" in _one_line(exc, path)


def test_labels_outside_every_tile(two_tiles, tmp_path):
    path = tmp_path / "far.csv"
    path.write_text("x,y,label,onset_year\n10.0,50.0,stable_forest,\n")
    with pytest.raises(LabelError) as exc:
        inspect("r", two_tiles, path)
    assert "is outside the imagery" in _one_line(exc, path)


def test_empty_folder(tmp_path):
    empty = tmp_path / "empty"
    (empty / "notes").mkdir(parents=True)
    with pytest.raises(RegionError) as exc:
        inspect("r", empty, None)
    assert "no GeoTIFF (*.tif) or NetCDF/Zarr cube" in _one_line(exc, empty)


def test_not_found_names_the_absolute_path(two_tiles, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    with pytest.raises(InputNotFoundError) as exc:
        inspect("r", Path("nowhere"), None)
    assert "imagery folder does not exist" in _one_line(exc, tmp_path / "nowhere")
    with pytest.raises(InputNotFoundError) as exc:
        inspect("r", two_tiles, Path("labels.csv"))
    assert "labels file does not exist" in _one_line(exc, tmp_path / "labels.csv")


# ---------------------------------------------------------------- delivered product folders

#: QA_PIXEL with the cloud bit (3) set: invalid by Landsat's published rule.
CLOUD = QA_PIXEL_CLEAR | 1 << 3


def oli_scene(root: Path, day: str, dn: int, qa: np.ndarray | None = None, transform: Affine = TRANSFORM) -> Path:
    """An 8 x 8 Landsat 8 C2 L2 scene folder: every band ``dn`` (+100 a band), clear QA_PIXEL unless given."""
    bands = {OLI.bands[b]: np.full((8, 8), dn + 100 * i, np.uint16) for i, b in enumerate(BANDS)}
    return write_landsat_scene(root, day, bands, np.full((8, 8), QA_PIXEL_CLEAR) if qa is None else qa, crs=CRS, transform=transform)


def s2_product(root: Path, stamp: str, dn: int) -> Path:
    """A Sentinel-2 L2A product over the same 240 m square as the Landsat scenes: 10 m bands 24 x 24, 20 m bands 12 x 12, SCL vegetation."""
    bands = {MSI.bands[b]: np.full((24, 24) if MSI.bands[b] in ("B02", "B03", "B04") else (12, 12), dn, np.uint16) for b in BANDS}
    return write_s2_product(root, stamp, bands, np.full((12, 12), 4, np.uint8), crs=CRS, top_left=(TRANSFORM.c, TRANSFORM.f))


def test_a_folder_of_landsat_scene_folders_becomes_a_products_region_read_with_the_published_rules(tmp_path):
    qa = np.full((8, 8), QA_PIXEL_CLEAR)
    qa[2, 3] = CLOUD
    scenes = tmp_path / "delivered" / "p118r060"
    oli_scene(scenes, "2019-01-05", 10000, qa)
    oli_scene(scenes, "2019-06-14", 10000)
    oli_scene(scenes, "2020-03-02", 12000)
    out = write("landsat", scenes, None, tmp_path / "landsat.yaml")
    text = out.read_text()
    assert keys_without_comment(text) == []
    assert "format: products" in text
    said = " ".join(line.strip().lstrip("#").strip() for line in text.splitlines() if line.strip().startswith("#"))
    assert "3 scene(s) (3 landsat_oli)" in said and "3 dates from 2019-01-05 to 2020-03-02" in said
    assert "p118r060: 3 scene folder(s) (3 landsat_oli) acquired 2019-01-05 to 2020-03-02." in said
    cfg = load_region_file(out)
    assert cfg.format == "products" and [(t.name, t.path) for t in cfg.tiles] == [("p118r060", str(scenes))]
    assert cfg.bands == BANDS and not cfg.harmonise.enabled
    st = open_region(cfg)[0]
    assert [str(d) for d in st.dates] == ["2019-01-05", "2019-06-14", "2020-03-02"] and st.sensors == ["landsat_oli"] * 3
    # The products' own scaling (DN 10000 → 0.075) and QA_PIXEL rule, not the GeoTIFF defaults written beside them.
    np.testing.assert_allclose(st.reflectance.values[0, 0, 0, 0], 10000 * 0.0000275 - 0.2, rtol=1e-5)
    assert not st.valid.values[0, 2, 3] and st.valid.values[0].sum() == 63


def test_landsat_and_sentinel2_tiles_name_their_sensors_and_harmonise(tmp_path):
    region = tmp_path / "region"
    oli_scene(region / "west", "2021-05-02", 10000)
    oli_scene(region / "west", "2022-07-21", 10000)
    s2_product(region / "west", "20220301T023031", 2500)
    starter = inspect("mixed", region, None)
    assert starter.region.format == "products" and starter.region.harmonise.enabled
    assert [t.sensors for t in starter.tiles] == [{"landsat_oli": 2, "sentinel2_msi": 1}]
    assert [str(d) for d in starter.tiles[0].dates] == ["2021-05-02", "2022-03-01", "2022-07-21"]
    notes = " ".join(starter.notes["tiles"] + starter.notes["harmonise"])
    assert "west: 3 scene folder(s) (2 landsat_oli, 1 sentinel2_msi) acquired 2021-05-02 to 2022-07-21." in notes
    assert "2 sensors (landsat_oli, sentinel2_msi)" in notes
    assert any(c.startswith(f"{CHECK} west's scenes come on 2 grids") for c in starter.checks)  # 30 m Landsat, 10 m Sentinel-2
    text = render(starter, tmp_path)
    assert keys_without_comment(text) == [] and "harmonise:\n" in text and "  enabled: true" in text
    (tmp_path / "mixed.yaml").write_text(text)
    st = open_region(load_region_file(tmp_path / "mixed.yaml"))[0]
    assert st.sensors == ["landsat_oli", "sentinel2_msi", "landsat_oli"]


def test_product_folders_beside_geotiff_folders_or_one_scene_folder_are_refused(tmp_path, tiny_values, qa):
    region = tmp_path / "region"
    oli_scene(region / "a", "2019-01-05", 10000)
    write_stack(region / "b", DATES, tiny_values, qa)
    with pytest.raises(RegionError) as exc:
        inspect("r", region, None)
    assert "holds both folders of product scenes (a) and of GeoTIFFs" in _one_line(exc, region)
    scene = next((region / "a").iterdir())
    with pytest.raises(RegionError) as exc:
        inspect("r", scene, None)
    assert "one scene folder; point --imagery at the folder holding the scene folders" in _one_line(exc, scene)
    (region / "a" / "readme.txt").write_text("delivered 2019")
    with pytest.raises(RegionError) as exc:
        inspect("r", region / "a", None)
    assert "holds ['readme.txt'] beside the scene folders" in _one_line(exc, region / "a")
