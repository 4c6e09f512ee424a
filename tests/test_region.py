"""The region reader on tiny stacks with known values, and every bad imagery input."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import rasterio
import rioxarray  # noqa: F401
import xarray as xr
from affine import Affine

from plantation.errors import ConfigError, InputNotFoundError, RegionError
from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import open_region, open_tile, scaling_for_dates
from tests.conftest import BANDS, CRS, DATES, TRANSFORM, write_stack


def test_reads_dims_scaling_and_grid(make_region, tiny_values):
    region = make_region()
    st = open_tile(region.tiles[0], region)
    assert st.reflectance.dims == ("time", "band", "y", "x")
    assert st.reflectance.shape == (5, 6, 8, 8)
    assert st.reflectance.dtype == np.float32
    assert st.reflectance.chunks is not None, "reading must be lazy (dask)"
    assert list(st.reflectance["band"].values) == BANDS
    np.testing.assert_allclose(st.reflectance.values, tiny_values * 1e-4, rtol=1e-6)
    assert st.grid.crs.to_epsg() == 32650
    assert st.grid.transform == TRANSFORM
    assert st.grid.pixel_area_m2 == pytest.approx(900.0)  # 30 m pixel = 0.09 ha (common practice)
    assert [str(d) for d in st.dates] == DATES
    assert st.years.tolist() == [2015, 2016, 2017]


def test_valid_mask_from_qa_bits_and_nodata(make_region, tiny_values):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[1, 2, 3] = 1  # cloud
    qa[2, 4, 4] = 2  # shadow
    qa[3, 0, 0] = 8  # bit 3: not among invalid bits -> still valid
    vals = tiny_values.copy()
    vals[4, 3, 5, 6] = -9999  # one band at nodata invalidates the pixel
    st = open_tile((r := make_region(values=vals, qa=qa)).tiles[0], r)
    valid = st.valid.values
    assert valid.sum() == 5 * 64 - 3
    assert not valid[1, 2, 3] and not valid[2, 4, 4] and not valid[4, 5, 6]
    assert valid[3, 0, 0]
    assert np.isnan(st.reflectance.values[1, :, 2, 3]).all()
    assert np.isfinite(st.reflectance.values[3, :, 0, 0]).all()


def test_scaling_rules_remove_a_processing_offset(make_region, tiny_values):
    vals = tiny_values.copy()
    vals[2:] += 1000  # a new processing baseline from 2016-02-14 adds 1000
    rules = [ScalingRule(start=None, scale=1e-4, offset=0.0), ScalingRule(start="2016-01-01", scale=1e-4, offset=-0.1)]
    region = make_region(values=vals, scaling=rules)
    st = open_tile(region.tiles[0], region)
    np.testing.assert_allclose(st.reflectance.values, tiny_values * 1e-4, atol=1e-6)


def test_scaling_for_dates_latest_rule_wins():
    rules = [ScalingRule("2020-01-01", 2.0, 0.5), ScalingRule(None, 1.0, 0.0), ScalingRule("2018-06-01", 3.0, 0.1)]
    scale, offset = scaling_for_dates(np.array(["2017-01-01", "2018-06-01", "2019-12-31", "2020-01-01"], dtype="datetime64[D]"), rules)
    assert scale.tolist() == [1.0, 3.0, 3.0, 2.0]
    assert offset.tolist() == [0.0, 0.1, 0.1, 0.5]
    with pytest.raises(ConfigError, match="no rule covers 2017-01-01"):
        scaling_for_dates(np.array(["2017-01-01"], dtype="datetime64[D]"), [ScalingRule("2018-01-01", 1.0, 0.0)])
    with pytest.raises(ConfigError, match="not a date"):
        scaling_for_dates(np.array(["2017-01-01"], dtype="datetime64[D]"), [ScalingRule("2018-13-01", 1.0, 0.0)])


def test_cube_netcdf_and_zarr_match_geotiff_folder(make_region, tiny_values, tmp_path):
    region = make_region()
    ref = open_tile(region.tiles[0], region)
    ys = TRANSFORM.f + TRANSFORM.e * (np.arange(8) + 0.5)
    xs = TRANSFORM.c + TRANSFORM.a * (np.arange(8) + 0.5)
    da = xr.DataArray(
        tiny_values[:, ::-1].copy(),  # bands stored in reverse: the reader must reorder by name
        dims=("time", "band", "y", "x"),
        coords={"time": np.array(DATES, dtype="datetime64[ns]"), "band": BANDS[::-1], "y": ys, "x": xs},
        name="reflectance",
    ).rio.write_crs(CRS)
    ds = da.to_dataset()
    nc, zr = tmp_path / "cube.nc", tmp_path / "cube.zarr"
    ds.to_netcdf(nc)
    ds.to_zarr(zr)
    for path in (nc, zr):
        cube = RegionConfig(name="c", format="cube", tiles=[TileConfig(name="t1", path=str(path))], bands=BANDS, nodata=-9999, mask=MaskConfig(band=None), scaling=[ScalingRule(None, 1e-4, 0.0)])
        st = open_tile(cube.tiles[0], cube)
        assert st.grid.same_as(ref.grid), path
        np.testing.assert_allclose(st.reflectance.values, ref.reflectance.values, rtol=1e-6)
        assert [str(d) for d in st.dates] == DATES


# Sentinel-2 Level-2A scene classification (SCL) classes, ESA's published table
# (values as in ../shared/reference/check_values.md): 0 no data, 1 saturated or
# defective, 3 cloud shadow, 4 vegetation, 5 not vegetated, 8 cloud medium
# probability, 9 cloud high probability, 10 thin cirrus, 11 snow or ice.
SCL_INVALID = [0, 1, 3, 8, 9, 10, 11]


def test_categorical_qa_masks_scene_classification_classes_not_bits(make_region, tiny_values, tmp_path):
    qa = np.full((5, 8, 8), 4, np.int16)  # vegetation everywhere
    qa[0, 1, 1] = 9  # cloud high probability: bit 0 and bit 3 set, but it is the class that matters
    qa[1, 2, 2] = 3  # cloud shadow
    qa[2, 3, 3] = 10  # thin cirrus
    qa[3, 4, 4] = 5  # not vegetated: valid, though bits 0 and 2 are set
    qa[4, 5, 5] = 6  # water: valid (left to the model), bits 1 and 2 set
    region = make_region(qa=qa, mask=MaskConfig(band=7, invalid_bits=[], invalid_values=SCL_INVALID))
    st = open_tile(region.tiles[0], region)
    want = np.ones((5, 8, 8), bool)
    want[0, 1, 1] = want[1, 2, 2] = want[2, 3, 3] = False
    lazy = st.valid.values
    np.testing.assert_array_equal(lazy, want)
    refl, valid = st.read(0, 0, 8, 8)  # the windowed reader mapping uses
    np.testing.assert_array_equal(valid, want)
    assert np.isnan(refl[0, :, 1, 1]).all() and not np.isnan(refl[3, :, 4, 4]).any()
    # Read as bit flags, vegetation (4 = bit 2) would be masked: classes must be compared as values.
    bits = make_region(qa=qa, mask=MaskConfig(band=7, invalid_bits=[2]))
    assert not open_tile(bits.tiles[0], bits).valid.values[0, 0, 0]
    # A cube's QA variable follows the same rule.
    ys = TRANSFORM.f + TRANSFORM.e * (np.arange(8) + 0.5)
    xs = TRANSFORM.c + TRANSFORM.a * (np.arange(8) + 0.5)
    times = np.array(DATES, dtype="datetime64[ns]")
    ds = xr.Dataset(
        {
            "reflectance": (("time", "band", "y", "x"), tiny_values),
            "scl": (("time", "y", "x"), qa),
        },
        coords={"time": times, "band": BANDS, "y": ys, "x": xs},
    ).rio.write_crs(CRS)
    path = tmp_path / "scl.nc"
    ds.to_netcdf(path)
    cube = RegionConfig(
        name="c",
        format="cube",
        tiles=[TileConfig(name="t1", path=str(path))],
        bands=BANDS,
        nodata=-9999,
        mask=MaskConfig(variable="scl", invalid_bits=[], invalid_values=SCL_INVALID),
        scaling=[ScalingRule(None, 1e-4, 0.0)],
    )
    np.testing.assert_array_equal(open_tile(cube.tiles[0], cube).valid.values, want)


def test_categorical_qa_values_must_be_whole_numbers(make_region):
    region = make_region(mask=MaskConfig(band=7, invalid_bits=[], invalid_values=[9.5]))  # type: ignore[list-item]
    with pytest.raises(ConfigError, match=r"region\.mask\.invalid_values: 9\.5 is not a whole number"):
        open_tile(region.tiles[0], region)


# ---------------------------------------------------------------- bad input


def test_missing_folder(make_region, tmp_path):
    region = make_region()
    region.tiles[0].path = str(tmp_path / "nope")
    with pytest.raises(InputNotFoundError, match="nope: tile 't1' folder does not exist"):
        open_tile(region.tiles[0], region)


def test_grid_mismatch_names_the_file(make_region, tmp_path, tiny_values):
    region = make_region()
    write_stack(tmp_path / "t1", ["2018-08-15"], tiny_values[:1], np.zeros((1, 8, 8)), transform=Affine(30.0, 0.0, 600030.0, 0.0, -30.0, 200010.0))
    with pytest.raises(RegionError, match=r"scene_2018-08-15\.tif: grid .* differs from scene_2015-02-14\.tif"):
        open_tile(region.tiles[0], region)


def test_file_without_crs(make_region, tmp_path, tiny_values):
    region = make_region()
    write_stack(tmp_path / "t1", ["2018-08-15"], tiny_values[:1], np.zeros((1, 8, 8)), crs=None)
    with pytest.raises(RegionError, match=r"scene_2018-08-15\.tif: the file has no CRS"):
        open_tile(region.tiles[0], region)


@pytest.mark.parametrize(("name", "message"), [("scene_2018-13-40.tif", "cannot parse date '2018-13-40'"), ("scene_latest.tif", "no date YYYY-MM-DD")])
def test_bad_date_in_name(make_region, tmp_path, name, message):
    region = make_region()
    (tmp_path / "t1" / "scene_2015-02-14.tif").rename(tmp_path / "t1" / name)
    with pytest.raises(RegionError, match=message):
        open_tile(region.tiles[0], region)


def test_repeated_date(make_region, tmp_path):
    region = make_region()
    src = tmp_path / "t1" / "scene_2015-02-14.tif"
    (tmp_path / "t1" / "other_2015-02-14.tif").write_bytes(src.read_bytes())
    with pytest.raises(RegionError, match="date 2015-02-14 repeats"):
        open_tile(region.tiles[0], region)


def test_band_count_differs_from_config(make_region):
    region = make_region(bands=BANDS[:5], mask=MaskConfig(band=None))
    with pytest.raises(RegionError, match=r"scene_2015-02-14\.tif: has 7 bands, the region config expects 5"):
        open_tile(region.tiles[0], region)


def test_tiles_with_different_dates(make_region, tmp_path, tiny_values):
    region = make_region()
    other = write_stack(tmp_path / "t2", DATES[:4], tiny_values[:4], np.zeros((4, 8, 8)))
    region.tiles.append(TileConfig(name="t2", path=str(other)))
    with pytest.raises(RegionError, match="dates differ from tile 't1'"):
        open_region(region)


def test_unknown_format(make_region):
    region = make_region(format="jp2_pile")
    with pytest.raises(ConfigError, match="'jp2_pile' is not one of"):
        open_tile(region.tiles[0], region)


def test_cube_with_wrong_dims(tmp_path):
    da = xr.DataArray(np.zeros((6, 2, 4, 4), np.int16), dims=("band", "time", "y", "x"), name="reflectance").rio.write_crs(CRS)
    path = tmp_path / "bad.nc"
    da.to_dataset().to_netcdf(path)
    cube = RegionConfig(name="c", format="cube", tiles=[TileConfig(name="t", path=str(path))], bands=BANDS)
    with pytest.raises(RegionError, match=r"bad\.nc: variable 'reflectance' has dims \('band', 'time', 'y', 'x'\)"):
        open_tile(cube.tiles[0], cube)


def test_geotiff_reader_reads_only_headers_at_open(make_region, monkeypatch):
    """Opening must not read pixel data: a tile larger than memory stays on disk."""
    region = make_region()
    calls = []
    real = rasterio.io.DatasetReader.read

    def spy(self, *a, **k):
        calls.append(self.name)
        return real(self, *a, **k)

    monkeypatch.setattr(rasterio.io.DatasetReader, "read", spy)
    st = open_tile(region.tiles[0], region)
    assert calls == []
    _ = st.reflectance.isel(time=0, x=slice(0, 4), y=slice(0, 4)).values  # now it reads
    assert calls


def test_reading_many_windows_on_disk_is_equal_to_whole(make_region, tiny_values, tmp_path: Path):
    region = make_region()
    st = open_tile(region.tiles[0], region)
    parts = [st.reflectance.isel(y=slice(r, r + 4), x=slice(c, c + 4)).values for r in (0, 4) for c in (0, 4)]
    whole = np.block([[parts[0], parts[1]], [parts[2], parts[3]]])
    np.testing.assert_array_equal(whole, st.reflectance.values)


def test_window_reads_from_the_files_equal_the_lazy_arrays(make_region, tiny_values):
    """The direct windowed reader applies the same scaling rules, nodata and QA bits as the lazy path."""
    vals = tiny_values.copy()
    vals[2:] += 1000
    vals[4, 3, 5, 6] = -9999
    qa = np.zeros((5, 8, 8), np.int16)
    qa[1, 2, 3] = 1
    qa[3, 0, 0] = 8  # not an invalid bit
    rules = [ScalingRule(start=None, scale=1e-4, offset=0.0), ScalingRule(start="2016-01-01", scale=1e-4, offset=-0.1)]
    region = make_region(values=vals, qa=qa, scaling=rules)
    st = open_tile(region.tiles[0], region)
    assert st.reader is not None
    for r, c, h, w in [(0, 0, 8, 8), (1, 2, 5, 3), (7, 7, 1, 1)]:
        refl, valid = st.read(r, c, h, w)
        assert refl.dtype == np.float32 and valid.dtype == bool
        np.testing.assert_array_equal(refl, st.reflectance.values[:, :, r : r + h, c : c + w])
        np.testing.assert_array_equal(valid, st.valid.values[:, r : r + h, c : c + w])
    _, valid = st.read(0, 0, 8, 8)
    assert not valid[1, 2, 3] and not valid[4, 5, 6] and valid[3, 0, 0]


def test_pixel_areas_projected_and_geodesic():
    from plantation.imagery.region import Grid

    utm = Grid(rasterio.crs.CRS.from_epsg(32650), Affine(30, 0, 6e5, 0, -30, 2e5), 3, 4)
    # 30 m pixel = 0.09 ha (common practice, shared check values).
    np.testing.assert_allclose(utm.row_areas_m2(), 900.0)
    geo = Grid(rasterio.crs.CRS.from_epsg(4326), Affine(1.0, 0, 100.0, 0, -1.0, 2.0), 2, 1)
    # Area of an ellipsoidal quadrangle, Snyder (1987) Map Projections: A Working
    # Manual, eq. 3-12 with q(phi) of eq. 3-12: A = b^2 dlambda / 2 * (q2 - q1).
    a, f = 6378137.0, 1 / 298.257223563
    e = np.sqrt(f * (2 - f))
    b = a * (1 - f)

    def q(phi):
        s = np.sin(np.radians(phi))
        return s / (1 - e**2 * s**2) + np.log((1 + e * s) / (1 - e * s)) / (2 * e)

    want = [b**2 * np.radians(1.0) / 2 * (q(hi) - q(lo)) for lo, hi in [(1, 2), (0, 1)]]
    np.testing.assert_allclose(geo.row_areas_m2(), want, rtol=1e-6)
    assert 1.2e10 < want[1] < 1.25e10  # about 12,300 km² (from memory, a 1° cell at the equator)


# ------------------------------------------------- bad data inside valid files


def _float_stack(folder: Path, values: np.ndarray) -> Path:
    """One float32 GeoTIFF per date of ``DATES`` (reflectance stored as is), no QA band, no nodata tag."""
    folder.mkdir(parents=True, exist_ok=True)
    t, b, h, w = values.shape
    for k, d in enumerate(DATES[:t]):
        with rasterio.open(folder / f"scene_{d}.tif", "w", driver="GTiff", width=w, height=h, count=b, dtype="float32", transform=TRANSFORM, crs=CRS) as dst:
            dst.write(values[k].astype(np.float32))
    return folder


def _both_paths(st):
    """Reflectance and validity through the lazy arrays and the windowed reader, checked equal."""
    refl, valid = st.read(0, 0, st.grid.height, st.grid.width)
    np.testing.assert_array_equal(valid, st.valid.values)
    np.testing.assert_array_equal(refl, st.reflectance.values)
    return refl, valid


def test_nan_inf_and_implausible_reflectance_are_masked_not_passed_on(tmp_path, tiny_values):
    from plantation.imagery.region import PLAUSIBLE_REFLECTANCE

    vals = tiny_values.astype(np.float32) * 1e-4
    vals[0, 0, 1, 1] = np.nan
    vals[1, 3, 2, 2] = np.inf
    vals[2, 5, 3, 3] = -np.inf
    vals[3, 1, 4, 4] = 12.0  # a wrong scale factor's value, far outside 0-1
    vals[4, 2, 5, 5] = -0.6
    vals[4, 2, 6, 6] = 1.2  # bright, but a surface can be: kept
    vals[4, 2, 7, 7] = -0.05  # atmospheric correction's small negative: kept
    folder = _float_stack(tmp_path / "f", vals)
    region = RegionConfig(name="f", tiles=[TileConfig(name="t1", path=str(folder))], bands=BANDS, nodata=None, mask=MaskConfig(band=None), scaling=[ScalingRule(None, 1.0, 0.0)], chunk=4)
    st = open_tile(region.tiles[0], region)
    refl, valid = _both_paths(st)
    bad = [(0, 1, 1), (1, 2, 2), (2, 3, 3), (3, 4, 4), (4, 5, 5)]
    for t, r, c in bad:
        assert not valid[t, r, c] and np.isnan(refl[t, :, r, c]).all(), (t, r, c)
    assert valid.sum() == 5 * 64 - len(bad)
    assert valid[4, 6, 6] and valid[4, 7, 7]
    low, high = PLAUSIBLE_REFLECTANCE
    kept = refl.transpose(1, 0, 2, 3)[:, valid]
    assert np.isfinite(kept).all() and kept.min() >= low and kept.max() <= high


def test_saturated_and_all_zero_dates_are_masked(make_region, tiny_values):
    vals = tiny_values.copy()
    vals[1, 4, 2, 3] = 32767  # int16's largest value: saturated (3.28 after scaling, out of range too)
    vals[3] = 0  # a date delivered as zeros: fill, whatever the nodata tag says
    vals[2, :, 6, 6] = 0  # one pixel of zeros
    vals[2, 0, 5, 5] = 0  # one band at 0 is a (dark) value: kept
    region = make_region(values=vals, scaling=[ScalingRule(None, 1e-4, 0.0), ScalingRule("2016-06-01", 1e-4, -0.1)])
    refl, valid = _both_paths(open_tile(region.tiles[0], region))
    assert not valid[3].any() and np.isnan(refl[3]).all()
    assert not valid[1, 2, 3] and not valid[2, 6, 6]
    assert valid[2, 5, 5] and refl[2, 0, 5, 5] == 0.0
    assert valid.sum() == 4 * 64 - 2


def test_unusable_flags_saturation_of_the_stored_type_even_in_range():
    from plantation.imagery.region import saturated_value, unusable

    raw = np.array([[[100]], [[65535]]], np.uint16)  # (band, y, x)
    refl = raw.astype(np.float32) * 1e-5  # 0.655: in range, but the sensor saturated
    assert saturated_value(np.uint16) == 65535 and saturated_value(np.float32) is None
    assert unusable(raw, refl, axis=0).tolist() == [[True]]
    assert unusable(raw[:1], refl[:1], axis=0).tolist() == [[False]]


def test_cloud_on_every_date_or_everywhere_reads_without_error(make_region):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[:, 2, 2] = 1  # one pixel cloudy on every date
    qa[1] = 1  # one date cloudy everywhere
    refl, valid = _both_paths(open_tile((r := make_region(qa=qa)).tiles[0], r))
    assert not valid[:, 2, 2].any() and not valid[1].any() and valid.sum() == 4 * 63
    # A tile without one valid pixel opens and reads: every value masked.
    refl, valid = _both_paths(open_tile((r := make_region(qa=np.ones((5, 8, 8), np.int16))).tiles[0], r))
    assert not valid.any() and np.isnan(refl).all()


# ------------------------------------------------------- files broken mid-run


def _break_after_open(path: Path, keep: float = 0.5) -> None:
    """Overwrite the later part of a file with garbage, as a copy cut short or a bad disk leaves it."""
    data = path.read_bytes()
    cut = int(len(data) * keep)
    path.write_bytes(data[:cut] + np.random.default_rng(0).bytes(len(data) - cut))


def test_a_file_corrupt_after_opening_names_the_file_and_date_in_both_read_paths(tmp_path):
    rng = np.random.default_rng(1)
    vals = rng.integers(100, 4000, (5, 6, 64, 64)).astype(np.int16)
    folder = tmp_path / "t1"
    folder.mkdir()
    for k, d in enumerate(DATES):  # compressed in strips, as delivered products are: garbage fails to decode
        prof = {"driver": "GTiff", "width": 64, "height": 64, "count": 7, "dtype": "int16", "transform": TRANSFORM, "crs": CRS, "nodata": -9999, "compress": "deflate", "blockysize": 8}
        with rasterio.open(folder / f"scene_{d}.tif", "w", **prof) as dst:
            dst.write(np.concatenate([vals[k], np.zeros((1, 64, 64), np.int16)]))
    region = RegionConfig(name="c", tiles=[TileConfig(name="t1", path=str(folder))], bands=BANDS, nodata=-9999, mask=MaskConfig(band=7), scaling=[ScalingRule(None, 1e-4, 0.0)], chunk=16)
    st = open_tile(region.tiles[0], region)
    _break_after_open(folder / "scene_2016-02-14.tif")
    refl, _ = st.read(0, 0, 4, 4)  # the file's first strips are intact
    np.testing.assert_allclose(refl[2], vals[2, :, :4, :4] * 1e-4, rtol=1e-6)
    with pytest.raises(RegionError, match=r"scene_2016-02-14\.tif: date 2016-02-14: cannot read rows 48–63, cols 0–15 .*truncated or corrupt"):
        st.read(48, 0, 16, 16)
    with pytest.raises(RegionError, match=r"scene_2016-02-14\.tif: date 2016-02-14: cannot read rows 48–63"):
        _ = st.reflectance.isel(y=slice(48, 64), x=slice(0, 16)).values
    # Cut short rather than overwritten: the same.
    st = open_tile(region.tiles[0], region)
    data = (folder / "scene_2017-08-15.tif").read_bytes()
    (folder / "scene_2017-08-15.tif").write_bytes(data[: len(data) // 3])
    with pytest.raises(RegionError, match=r"scene_2017-08-15\.tif: date 2017-08-15"):
        _ = st.valid.values


def test_a_truncated_file_at_open_is_refused_naming_it(make_region, tmp_path):
    region = make_region()
    f = tmp_path / "t1" / "scene_2016-08-15.tif"
    f.write_bytes(f.read_bytes()[:200])
    with pytest.raises(RegionError, match=r"scene_2016-08-15\.tif: cannot read as a raster"):
        open_tile(region.tiles[0], region)


def test_a_float_cube_with_inf_and_implausible_values_is_masked(tmp_path, tiny_values):
    vals = tiny_values.astype(np.float32) * 1e-4
    vals[0, 2, 1, 1] = np.inf
    vals[3, 4, 6, 2] = 7.5
    ys = TRANSFORM.f + TRANSFORM.e * (np.arange(8) + 0.5)
    xs = TRANSFORM.c + TRANSFORM.a * (np.arange(8) + 0.5)
    da = xr.DataArray(vals, dims=("time", "band", "y", "x"), coords={"time": np.array(DATES, dtype="datetime64[ns]"), "band": BANDS, "y": ys, "x": xs}, name="reflectance")
    path = tmp_path / "f.nc"
    da.rio.write_crs(CRS).to_dataset().to_netcdf(path)
    cube = RegionConfig(name="c", format="cube", tiles=[TileConfig(name="t1", path=str(path))], bands=BANDS, nodata=None, mask=MaskConfig(band=None), scaling=[ScalingRule(None, 1.0, 0.0)])
    st = open_tile(cube.tiles[0], cube)
    refl, valid = st.read(0, 0, 8, 8)
    assert not valid[0, 1, 1] and not valid[3, 6, 2] and valid.sum() == 5 * 64 - 2
    assert np.isnan(refl[0, :, 1, 1]).all() and np.nanmax(refl) < 1.0
