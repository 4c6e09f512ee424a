"""Delivered product folders and STAC catalogues read onto a tile's grid, against the products' published encodings.

Sources of the values checked (as in ../shared/reference/check_values.md):

* Landsat Collection 2 Level-2 surface reflectance = DN × 0.0000275 − 0.2,
  fill DN 0; QA_PIXEL bits 0 fill, 1 dilated cloud, 2 cirrus, 3 cloud,
  4 cloud shadow, 5 snow, 6 clear (USGS Landsat 8-9 Collection 2 Level-2
  Science Product Guide).
* Sentinel-2 Level-2A reflectance = (DN + BOA_ADD_OFFSET) / 10000, with
  BOA_ADD_OFFSET −1000 from processing baseline 04.00 and 0 before; scene
  classification classes 3 cloud shadow, 8/9 cloud medium/high probability,
  10 thin cirrus masked, 4 vegetation kept (ESA Sentinel-2 L2A product
  specification).
* The file naming of both follows the products' published conventions
  (scene identifiers and per-band suffixes); the fixtures are tiny invented
  scenes, not real data.
"""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pystac
import pytest
import rasterio
from affine import Affine
from rasterio.warp import Resampling, reproject

from plantation.errors import ConfigError, InputNotFoundError, RegionError
from plantation.imagery.config import GridConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.products import find_scenes, scene_item
from plantation.imagery.region import AssetWindowReader, open_tile

BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]
CRS = "EPSG:32650"
TOP_LEFT = (600000.0, 200010.0)
OLI_BANDS = {"blue": "SR_B2", "green": "SR_B3", "red": "SR_B4", "nir": "SR_B5", "swir1": "SR_B6", "swir2": "SR_B7"}
#: A clear-land QA_PIXEL value: bits 6 (clear), 8, 10, 12, 14 (low confidences) set (USGS product guide's example).
QA_CLEAR = 21824


def _write(path: Path, arr: np.ndarray, *, res: float = 30.0, crs: str = CRS, top_left: tuple[float, float] = TOP_LEFT, nodata: float | None = None, driver: str = "GTiff") -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    prof = {"driver": driver, "width": arr.shape[1], "height": arr.shape[0], "count": 1, "dtype": arr.dtype.name, "crs": crs, "transform": Affine(res, 0, top_left[0], 0, -res, top_left[1])}
    if nodata is not None:
        prof["nodata"] = nodata
    if driver == "JP2OpenJPEG":
        prof.update(QUALITY="100", REVERSIBLE="YES")  # lossless, as ESA's products are
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(arr, 1)


def landsat_scene(root: Path, day: str, dn: np.ndarray, qa: np.ndarray, *, path_row: str = "118060", sensor: str = "LC08", top_left: tuple[float, float] = TOP_LEFT, crs: str = CRS) -> Path:
    """A Collection 2 Level-2 scene folder: ``<id>_SR_B<n>.TIF`` per band (``dn`` + 100 × band index) and ``<id>_QA_PIXEL.TIF``."""
    sid = f"{sensor}_L2SP_{path_row}_{day}_20200830_02_T1"
    folder = root / sid
    bands = OLI_BANDS if sensor != "LE07" else {"blue": "SR_B1", "green": "SR_B2", "red": "SR_B3", "nir": "SR_B4", "swir1": "SR_B5", "swir2": "SR_B7"}
    for i, bid in enumerate(bands.values()):
        _write(folder / f"{sid}_{bid}.TIF", np.where(dn == 0, 0, dn + 100 * i).astype(np.uint16), nodata=0, top_left=top_left, crs=crs)
    _write(folder / f"{sid}_QA_PIXEL.TIF", qa.astype(np.uint16), nodata=1, top_left=top_left, crs=crs)
    return folder


def _region(path: Path, fmt: str = "products", grid: GridConfig | None = None, **kw: object) -> RegionConfig:
    tile = TileConfig(name="t1", path=str(path), grid=grid or GridConfig())
    return RegionConfig(name="p", format=fmt, tiles=[tile], bands=BANDS, nodata=None, mask=kw.pop("mask", MaskConfig()), scaling=[ScalingRule()], chunk=4, **kw)  # type: ignore[arg-type]


def test_landsat_scene_folders_give_published_reflectance_and_mask_qa_pixel_flags(tmp_path):
    dn = np.full((6, 6), 10000, np.uint16)
    dn[5, 5] = 0  # fill
    qa = np.full((6, 6), QA_CLEAR, np.uint16)
    qa[0, 0] = QA_CLEAR | 1 << 3  # cloud
    qa[0, 1] = QA_CLEAR | 1 << 4  # cloud shadow
    qa[0, 2] = QA_CLEAR | 1 << 1  # dilated cloud
    qa[0, 3] = QA_CLEAR | 1 << 5  # snow
    qa[0, 4] = QA_CLEAR | 1 << 2  # cirrus alone: kept (not among the masked flags)
    landsat_scene(tmp_path, "20190105", dn, qa)
    landsat_scene(tmp_path, "20190121", dn, np.full((6, 6), QA_CLEAR, np.uint16))
    region = _region(tmp_path)
    st = open_tile(region.tiles[0], region)
    assert [str(d) for d in st.dates] == ["2019-01-05", "2019-01-21"]
    assert st.grid.crs.to_string() == CRS and st.grid.transform == Affine(30, 0, TOP_LEFT[0], 0, -30, TOP_LEFT[1]) and (st.grid.height, st.grid.width) == (6, 6)
    assert st.sensors == ["landsat_oli", "landsat_oli"]
    refl, valid = st.reflectance.values, st.valid.values
    # DN 10000 → 10000 × 0.0000275 − 0.2 = 0.075 (blue); each later band is 100 DN higher: + 0.00275.
    np.testing.assert_allclose(refl[1, :, 2, 2], 0.075 + 0.00275 * np.arange(6), rtol=1e-5)
    want = np.ones((6, 6), bool)
    want[0, :4] = False
    want[5, 5] = False
    np.testing.assert_array_equal(valid[0], want)
    assert np.isnan(refl[0, :, 0, 0]).all() and not np.isnan(refl[0, :, 0, 4]).any()
    # A window read for mapping agrees with the lazy arrays; one scene a date on the tile's grid is read straight from its files.
    assert isinstance(st.reader, AssetWindowReader) and len(st.reader.files) == 2 * 7
    wr, wv = st.read(1, 1, 4, 4)
    np.testing.assert_array_equal(wv, valid[:, 1:5, 1:5])
    np.testing.assert_allclose(wr, refl[:, :, 1:5, 1:5], equal_nan=True)
    # As a dask worker gets it: pickled without its open files, which it opens again.
    again = pickle.loads(pickle.dumps(st.reader))
    np.testing.assert_allclose(again(1, 1, 4, 4)[0], wr, equal_nan=True)


def test_same_day_scenes_are_one_date_mosaicked_and_another_crs_is_reprojected(tmp_path):
    # Two scenes of one pass: rows 060 and 061, one above the other; they meet on the tile's grid.
    top, bottom = np.full((4, 6), 9000, np.uint16), np.full((4, 6), 11000, np.uint16)
    landsat_scene(tmp_path, "20190105", top, np.full((4, 6), QA_CLEAR), path_row="118060")
    landsat_scene(tmp_path, "20190105", bottom, np.full((4, 6), QA_CLEAR), path_row="118061", top_left=(TOP_LEFT[0], TOP_LEFT[1] - 120))
    grid = GridConfig(crs=CRS, bounds=[TOP_LEFT[0], TOP_LEFT[1] - 240, TOP_LEFT[0] + 180, TOP_LEFT[1]], resolution=30.0)
    st = open_tile((r := _region(tmp_path, grid=grid)).tiles[0], r)
    assert len(st.dates) == 1
    assert st.reader is None  # a mosaic goes through the lazy arrays
    blue = st.reflectance.values[0, 0]
    np.testing.assert_allclose(blue[:4], 9000 * 0.0000275 - 0.2, rtol=1e-5)
    np.testing.assert_allclose(blue[4:], 11000 * 0.0000275 - 0.2, rtol=1e-5)
    assert st.valid.values.all()

    # A scene delivered in the neighbouring UTM zone, read onto a 60 m grid of zone 50: against rasterio's own warp (average) of the same file.
    other = tmp_path / "zone49"
    yy, xx = np.mgrid[0:40, 0:40]
    ramp = (8000 + 40 * xx + 25 * yy).astype(np.uint16)
    # The grid's corners lie near (1269487, 201454) and (1270093, 200851) in zone 49 (pyproj): the scene's 1.2 km square covers them.
    folder = landsat_scene(other, "20190301", ramp, np.full((40, 40), QA_CLEAR), crs="EPSG:32649", top_left=(1269200.0, 201700.0))
    grid = GridConfig(crs=CRS, bounds=[600300.0, 200010.0 - 600, 600900.0, 200010.0], resolution=60.0)
    st = open_tile((r := _region(other, grid=grid)).tiles[0], r)
    got = st.reflectance.values[0, 0]
    ref = np.zeros((10, 10), np.float32)
    with rasterio.open(next(folder.glob("*_SR_B2.TIF"))) as src:
        reproject(rasterio.band(src, 1), ref, dst_transform=Affine(60, 0, 600300, 0, -60, 200010), dst_crs=CRS, resampling=Resampling.average, src_nodata=0, dst_nodata=0)
    inside = ref > 0
    assert inside.sum() > 50, "the fixture scene must cover most of the grid"
    np.testing.assert_allclose(got[inside], ref[inside] * 0.0000275 - 0.2, atol=2 * 40 * 0.0000275)


def s2_product(root: Path, stamp: str, baseline: str, dn10: int, dn20: int, scl: np.ndarray, *, mtd_offset: int | None = None, driver: str = "JP2OpenJPEG") -> Path:
    """A Sentinel-2 L2A product folder (.SAFE) with the published layout: GRANULE/*/IMG_DATA/R10m and R20m, per-band files."""
    safe = root / f"S2B_MSIL2A_{stamp}_N{baseline}_R046_T50NKK_{stamp[:8]}T050000.SAFE"
    img = safe / "GRANULE" / f"L2A_T50NKK_A034000_{stamp}" / "IMG_DATA"
    ext = "jp2" if driver == "JP2OpenJPEG" else "tif"
    for bid in ("B02", "B03", "B04"):
        _write(img / "R10m" / f"T50NKK_{stamp}_{bid}_10m.{ext}", np.full((8, 8), dn10, np.uint16), res=10.0, driver=driver)
    # B02 also comes at 20 m: the reader must take the 10 m file.
    _write(img / "R20m" / f"T50NKK_{stamp}_B02_20m.{ext}", np.full((4, 4), 1, np.uint16), res=20.0, driver=driver)
    for bid in ("B8A", "B11", "B12"):
        _write(img / "R20m" / f"T50NKK_{stamp}_{bid}_20m.{ext}", np.full((4, 4), dn20, np.uint16), res=20.0, driver=driver)
    _write(img / "R20m" / f"T50NKK_{stamp}_SCL_20m.{ext}", scl.astype(np.uint8), res=20.0, driver=driver)
    if mtd_offset is not None:
        bands = "".join(f'<Spectral_Information bandId="{i}" physicalBand="{b}"/>' for i, b in enumerate(["B1", "B2", "B3", "B4", "B5", "B6", "B7", "B8", "B8A", "B9", "B10", "B11", "B12"]))
        offsets = "".join(f'<BOA_ADD_OFFSET band_id="{i}">{mtd_offset}</BOA_ADD_OFFSET>' for i in range(13))
        body = f"<Spectral_Information_List>{bands}</Spectral_Information_List><BOA_ADD_OFFSET_VALUES_LIST>{offsets}</BOA_ADD_OFFSET_VALUES_LIST>"
        (safe / "MTD_MSIL2A.xml").write_text(f"<Level-2A_User_Product>{body}</Level-2A_User_Product>")
    return safe


def test_sentinel2_products_apply_the_baseline_offset_bring_20m_bands_onto_10m_and_mask_scene_classes(tmp_path):
    scl = np.full((4, 4), 4, np.uint8)  # vegetation
    scl[0, 0] = 9  # cloud high probability
    scl[1, 1] = 3  # cloud shadow
    scl[2, 2] = 10  # thin cirrus
    s2_product(tmp_path, "20211215T023031", "0301", 1500, 2500, scl)  # before baseline 04.00: offset 0
    s2_product(tmp_path, "20220130T023031", "0400", 2500, 3500, np.full((4, 4), 4))  # from 04.00: −1000
    s2_product(tmp_path, "20220301T023031", "0400", 2500, 3500, np.full((4, 4), 5), mtd_offset=-500, driver="GTiff")  # the metadata's offset wins
    region = _region(tmp_path)
    st = open_tile(region.tiles[0], region)
    assert (st.grid.height, st.grid.width) == (8, 8) and st.grid.transform.a == 10.0  # the 10 m grid of the first role (blue)
    assert st.sensors == ["sentinel2_msi"] * 3
    refl, valid = st.reflectance.values, st.valid.values
    np.testing.assert_allclose(refl[0, :, 7, 7], [0.15] * 3 + [0.25] * 3, rtol=1e-5)
    np.testing.assert_allclose(refl[1, :, 7, 7], [0.15] * 3 + [0.25] * 3, rtol=1e-5)  # (2500 − 1000) / 10000
    np.testing.assert_allclose(refl[2, :, 7, 7], [0.20] * 3 + [0.30] * 3, rtol=1e-5)  # (2500 − 500) / 10000
    # A 20 m class covers 2 × 2 pixels of 10 m (nearest neighbour: classes are never blended).
    want = np.ones((8, 8), bool)
    for r, c in ((0, 0), (1, 1), (2, 2)):
        want[2 * r : 2 * r + 2, 2 * c : 2 * c + 2] = False
    np.testing.assert_array_equal(valid[0], want)
    assert valid[1:].all()


def test_a_stac_item_collection_of_local_files_reads_like_the_folder_and_maps_roles_by_common_name(tmp_path):
    qa = np.full((6, 6), QA_CLEAR, np.uint16)
    qa[2, 3] = QA_CLEAR | 1 << 3
    landsat_scene(tmp_path / "scenes", "20190105", np.full((6, 6), 10000, np.uint16), qa)
    landsat_scene(tmp_path / "scenes", "20190121", np.full((6, 6), 12000, np.uint16), np.full((6, 6), QA_CLEAR))
    folder_region = _region(tmp_path / "scenes")
    ref = open_tile(folder_region.tiles[0], folder_region)
    # A catalogue written by pystac: assets keyed by the product's band names, roles only in eo:bands common names.
    items = []
    common = {"blue": "blue", "green": "green", "red": "red", "nir": "nir08", "swir1": "swir16", "swir2": "swir22"}
    for scene in find_scenes(tmp_path / "scenes", BANDS):
        it = scene_item(scene, BANDS)
        renamed = {}
        for role, asset in it.assets.items():
            key = OLI_BANDS.get(role, "QA_PIXEL")
            if role in common:
                asset.extra_fields["eo:bands"] = [{"name": key, "common_name": common[role]}]
            renamed[key] = asset
        it.assets = renamed
        items.append(it)
    path = tmp_path / "items.json"
    pystac.ItemCollection(items).save_object(dest_href=str(path))
    region = _region(path, fmt="stac", mask=MaskConfig(asset="QA_PIXEL", invalid_bits=[0, 1, 3, 4, 5]))
    st = open_tile(region.tiles[0], region)
    np.testing.assert_array_equal(st.valid.values, ref.valid.values)
    np.testing.assert_allclose(st.reflectance.values, ref.reflectance.values, equal_nan=True)
    assert not st.valid.values[0, 2, 3]


def test_bad_product_folders_and_grids_are_refused_naming_the_culprit(tmp_path):
    (tmp_path / "empty").mkdir()
    with pytest.raises(RegionError, match=r"empty: no Landsat Collection 2 Level-2 .* scene folder"):
        open_tile((r := _region(tmp_path / "empty")).tiles[0], r)
    folder = landsat_scene(tmp_path / "a", "20190105", np.full((4, 4), 10000), np.full((4, 4), QA_CLEAR))
    next(folder.glob("*_SR_B5.TIF")).unlink()
    with pytest.raises(RegionError, match=r"LC08_L2SP_118060_20190105_20200830_02_T1: no file for band\(s\) \['SR_B5'\]"):
        open_tile((r := _region(tmp_path / "a")).tiles[0], r)
    landsat_scene(tmp_path / "b", "20190105", np.full((4, 4), 10000), np.full((4, 4), QA_CLEAR))
    landsat_scene(tmp_path / "b", "20190113", np.full((4, 4), 10000), np.full((4, 4), QA_CLEAR), sensor="LE07")
    with pytest.raises(RegionError, match=r"several sensors \['landsat_etm', 'landsat_oli'\]"):
        open_tile((r := _region(tmp_path / "b")).tiles[0], r)
    landsat_scene(tmp_path / "c", "20190105", np.full((4, 4), 10000), np.full((4, 4), QA_CLEAR))
    with pytest.raises(ConfigError, match=r"tiles\[t1\]\.grid: give crs, bounds and resolution together"):
        open_tile((r := _region(tmp_path / "c", grid=GridConfig(crs=CRS))).tiles[0], r)
    (tmp_path / "bad.json").write_text('{"type": "nothing"}')
    with pytest.raises(RegionError, match=r"bad\.json: cannot read as STAC"):
        open_tile((r := _region(tmp_path / "bad.json", fmt="stac")).tiles[0], r)


def test_a_stac_item_whose_asset_is_missing_is_refused_naming_the_file_and_item(tmp_path):
    landsat_scene(tmp_path / "scenes", "20190105", np.full((4, 4), 10000, np.uint16), np.full((4, 4), QA_CLEAR))
    items = [scene_item(s, BANDS) for s in find_scenes(tmp_path / "scenes", BANDS)]
    path = tmp_path / "items.json"
    pystac.ItemCollection(items).save_object(dest_href=str(path))
    region = _region(path, fmt="stac")
    nir = next((tmp_path / "scenes").glob("*/*_SR_B5.TIF"))
    nir.rename(nir.with_suffix(".bak"))  # listed in the catalogue, not downloaded
    with pytest.raises(InputNotFoundError, match=r"items\.json: STAC item 'LC08_L2SP_118060_20190105_20200830_02_T1': the file of asset 'nir' \(band role 'nir'\) does not exist: .*SR_B5\.TIF"):
        open_tile(region.tiles[0], region)
    nir.with_suffix(".bak").rename(nir)
    del items[0].assets["nir"]
    pystac.ItemCollection(items).save_object(dest_href=str(path))
    with pytest.raises(RegionError, match=r"items\.json: STAC item 'LC08_.*': no asset for band role 'nir'"):
        open_tile(region.tiles[0], region)


def test_a_product_band_file_corrupt_after_opening_names_the_file_and_date(tmp_path):
    rng = np.random.default_rng(2)
    dn = rng.integers(8000, 20000, (64, 64)).astype(np.uint16)
    folder = landsat_scene(tmp_path / "scenes", "20190105", dn, np.full((64, 64), QA_CLEAR))
    for f in folder.glob("*.TIF"):  # compressed in strips, as USGS delivers them
        with rasterio.open(f) as src:
            arr, prof = src.read(), src.profile
        prof.update(compress="deflate", blockysize=8)
        with rasterio.open(f, "w", **prof) as dst:
            dst.write(arr)
    region = _region(tmp_path / "scenes")
    st = open_tile(region.tiles[0], region)
    assert isinstance(st.reader, AssetWindowReader)
    red = next(folder.glob("*_SR_B4.TIF"))
    data = red.read_bytes()
    red.write_bytes(data[: len(data) // 2] + rng.bytes(len(data) - len(data) // 2))
    with pytest.raises(RegionError, match=r"SR_B4\.TIF: date 2019-01-05: cannot read rows 56–63"):
        st.read(56, 0, 8, 8)


def test_saturated_and_zero_filled_product_values_are_masked_in_both_read_paths(tmp_path):
    dn = np.full((6, 6), 12000, np.uint16)
    dn[1, 1] = 65535  # the blue band saturated (uint16's largest value; the fixture adds 100 a band, which wraps the others)
    folder = landsat_scene(tmp_path / "scenes", "20190105", dn, np.full((6, 6), QA_CLEAR))
    swir = next(folder.glob("*_SR_B7.TIF"))
    with rasterio.open(swir, "r+") as ds:
        arr = ds.read(1)
        arr[4, 2] = 65535  # one band saturated: the pixel goes
        ds.write(arr, 1)
    region = _region(tmp_path / "scenes")
    st = open_tile(region.tiles[0], region)
    refl, valid = st.read(0, 0, 6, 6)
    np.testing.assert_array_equal(valid, st.valid.values)
    np.testing.assert_array_equal(refl, st.reflectance.values)
    assert not valid[0, 1, 1] and not valid[0, 4, 2] and valid.sum() == 34
    assert np.nanmax(refl) <= 1.6
