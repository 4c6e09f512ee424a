"""Bad data the tool used to accept without a word: years with no clear view, labels never seen clear, a cube corrupt mid-run.

Known answers are built into tiny regions (tests/conftest.py): cloud is the
QA bit 0 the fixture region masks.
"""

from __future__ import annotations

import json
import logging

import numpy as np
import pandas as pd
import pytest

from plantation.errors import LabelError
from plantation.imagery.config import TileConfig
from plantation.imagery.region import open_region
from plantation.model.patches import build_patches
from plantation.reference.labels import read_labels
from plantation.reference.survey import SurveyConfig
from plantation.reference.survey import run as survey
from tests.conftest import BANDS, DATES, TRANSFORM, pixel_centre, write_stack

CLOUD = 1  # QA bit 0, in the fixture region's invalid_bits


def _labels(tmp_path, pts):
    rows = [dict(zip(("x", "y"), pixel_centre(r, c), strict=True)) | {"label": lab, "onset_year": y} for r, c, lab, y in pts]
    path = tmp_path / "labels.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def test_survey_records_and_warns_of_a_year_with_no_clear_view(make_region, tiny_values, tmp_path, caplog):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[2:4] = CLOUD  # both 2016 dates cloudy over the whole tile
    qa[4, 7, 7] = CLOUD  # one pixel cloudy on 2017's only date: not a year without view
    qa[:, 0, 0] = CLOUD  # one pixel never seen clear
    labels = _labels(tmp_path, [(1, 1, "stable_forest", ""), (5, 5, "conversion", 2016)])
    region = make_region(qa=qa, labels=labels)
    # A second tile, east of the first, cloudy on every date.
    east = TRANSFORM * TRANSFORM.translation(8, 0)
    write_stack(tmp_path / "t2", DATES, tiny_values, np.full((5, 8, 8), CLOUD, np.int16), transform=east)
    region.tiles.append(TileConfig(name="t2", path=str(tmp_path / "t2")))
    with caplog.at_level(logging.WARNING, logger="plantation.reference.survey"):
        out = survey(SurveyConfig(region=region, out_dir=str(tmp_path / "survey")))
    cover = json.loads((out / "survey.json").read_text())["coverage"]
    assert cover["years_without_clear_view"] == {"t1": [2016], "t2": [2015, 2016, 2017]}
    assert cover["years_without_clear_view_anywhere"] == [2016]
    assert cover["tiles_without_valid_pixel"] == ["t2"]
    assert cover["pixels_never_clear"] == {"t1": 1, "t2": 64}
    lines = [r.getMessage() for r in caplog.records if "no clear view anywhere" in r.getMessage()]
    assert len(lines) == 1 and "in 2016 " in lines[0] and "\n" not in lines[0]
    assert any("t2" in r.getMessage() and "no valid pixel" in r.getMessage() for r in caplog.records)


def test_survey_counts_a_year_seen_through_a_single_clear_pixel(make_region, tmp_path, caplog):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[2:4] = CLOUD
    qa[3, 4, 4] = 0  # one clear pixel on one 2016 date is a view
    region = make_region(qa=qa, labels=_labels(tmp_path, [(1, 1, "stable_forest", "")]))
    with caplog.at_level(logging.WARNING, logger="plantation.reference.survey"):
        out = survey(SurveyConfig(region=region, out_dir=str(tmp_path / "survey")))
    cover = json.loads((out / "survey.json").read_text())["coverage"]
    assert cover["years_without_clear_view"] == {"t1": []}
    assert cover["years_without_clear_view_anywhere"] == []
    assert cover["tiles_without_valid_pixel"] == []
    assert not [r for r in caplog.records if "no clear view" in r.getMessage()]


def _patches(region, labels, k=3):
    stacks = open_region(region)
    ls = read_labels(labels, grids={s.name: s.grid for s in stacks}, years=[2015, 2016, 2017], csv_crs=region.labels.crs)
    return build_patches(stacks, ls, bands=BANDS, index_names=["NDVI"], k=k, block=4, shares=[1.0, 0.0, 0.0], seed=0)


def test_labels_on_pixels_never_seen_clear_are_dropped_with_one_warning(make_region, tmp_path, caplog):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[:, 2, 5] = CLOUD  # the conversion point's pixel: cloudy on every date
    qa[:, 6, 5] = CLOUD  # the neighbour of the "other" point: its own pixel stays clear
    qa[:4, 1, 1] = CLOUD  # the forest point: clear on the last date only, kept
    pts = [(1, 1, "stable_forest", ""), (2, 5, "conversion", 2016), (6, 6, "other", "")]
    labels = _labels(tmp_path, pts)
    region = make_region(qa=qa, labels=labels)
    with caplog.at_level(logging.WARNING, logger="plantation.model.patches"):
        s = _patches(region, labels)
    assert len(s) == 2 and s.dropped_unseen == 1
    assert sorted(zip(s.row.tolist(), s.col.tolist(), strict=True)) == [(1, 1), (6, 6)]
    assert 3 + 1 not in s.target.tolist()  # the 2016 conversion is gone from every split
    # Every kept sample sees its own pixel at least once.
    assert s.valid[:, :, 1, 1].any(axis=1).all()
    msgs = [r.getMessage() for r in caplog.records if "never seen clear" in r.getMessage()]
    assert len(msgs) == 1 and "1 labelled point(s)" in msgs[0] and "line 3" in msgs[0]  # CSV line 3: the header is line 1
    # The count is carried through the subsets training takes.
    assert s.part("train").dropped_unseen == 1 and s.concat(s).dropped_unseen == 2


def test_labels_all_unseen_are_refused(make_region, tmp_path):
    labels = _labels(tmp_path, [(2, 5, "conversion", 2016)])
    qa = np.zeros((5, 8, 8), np.int16)
    qa[:, 2, 5] = CLOUD
    region = make_region(qa=qa, labels=labels)
    with pytest.raises(LabelError, match=r"labels\.csv: none of the 1 labelled points' pixels is seen clear on any date \(line 2\)"):
        _patches(region, labels)


def _cube(tmp_path, tiny_values, suffix):
    import rioxarray  # noqa: F401  (adds .rio)
    import xarray as xr

    from tests.conftest import CRS

    ys = TRANSFORM.f + TRANSFORM.e * (np.arange(8) + 0.5)
    xs = TRANSFORM.c + TRANSFORM.a * (np.arange(8) + 0.5)
    da = xr.DataArray(tiny_values, dims=("time", "band", "y", "x"), coords={"time": np.array(DATES, dtype="datetime64[ns]"), "band": BANDS, "y": ys, "x": xs}, name="reflectance").rio.write_crs(CRS)
    path = tmp_path / f"cube{suffix}"
    # On the variable's own encoding: an encoding= argument would drop the CF grid mapping (the CRS).
    if suffix == ".nc":
        # Compressed chunks: damaged bytes fail to decompress instead of reading as numbers.
        da.encoding.update(zlib=True, chunksizes=(1, 6, 4, 4))
        da.to_dataset().to_netcdf(path)
    else:
        da.encoding["chunks"] = (1, 6, 4, 4)
        da.to_dataset().to_zarr(path)
    return path


def _cube_region(path):
    from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule

    return RegionConfig(name="c", format="cube", tiles=[TileConfig(name="t1", path=str(path))], bands=BANDS, nodata=-9999, mask=MaskConfig(band=None), scaling=[ScalingRule(None, 1e-4, 0.0)], chunk=4)


@pytest.mark.filterwarnings("ignore::UserWarning")
def test_zarr_chunk_corrupt_mid_run_is_a_region_error_naming_file_date_and_window(tiny_values, tmp_path):
    from plantation.errors import RegionError

    path = _cube(tmp_path, tiny_values, ".zarr")
    (st,) = open_region(_cube_region(path))
    np.testing.assert_allclose(st.reflectance.values, tiny_values * 1e-4, rtol=1e-6)  # intact: read as before
    # The chunk of the third date (2016-02-14), rows 4-7 and cols 0-3, overwritten after opening.
    chunk = path / "reflectance" / "c" / "2" / "0" / "1" / "0"
    assert chunk.is_file()
    chunk.write_bytes(b"\x00garbage" * 8)
    with pytest.raises(RegionError, match=r"cube\.zarr: date 2016-02-14: cannot read rows 4–7, cols 0–3 \(.+\); the file is truncated or corrupt"):
        st.reflectance.compute()
    with pytest.raises(RegionError, match="date 2016-02-14"):
        st.read(2, 0, 4, 4)  # the windowed read mapping uses goes through the same arrays for a cube
    st.read(0, 0, 4, 4)  # chunks left intact still read


def test_netcdf_corrupt_mid_run_is_a_region_error_naming_the_file(tiny_values, tmp_path):
    from plantation.errors import RegionError

    path = _cube(tmp_path, tiny_values, ".nc")
    (st,) = open_region(_cube_region(path))
    size = path.stat().st_size
    with open(path, "r+b") as f:  # the second half of the file (the data chunks) overwritten after opening
        f.seek(size // 2)
        f.write(np.random.default_rng(0).integers(0, 256, size - size // 2, dtype=np.uint8).tobytes())
    with pytest.raises(RegionError, match=r"cube\.nc: date 20\d\d-\d\d-\d\d: cannot read rows \d–\d, cols \d–\d \(NetCDF: HDF error\); the file is truncated or corrupt"):
        st.valid.compute()
