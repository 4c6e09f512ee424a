"""The simulator: spectra against PROSAIL itself, rules of thumb, and the region's statistics against its config.

Sources: PROSAIL through the ``prosail`` package (PROSPECT-5 + 4SAIL);
canopy and soil NDVI thresholds are common practice (closed canopy ≥ 0.8,
bare soil ≤ 0.2).
"""

from __future__ import annotations

import json
from dataclasses import replace
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio

from plantation.imagery.config import LabelsConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import open_region
from plantation.reference.labels import LABEL_CODES, read_labels
from plantation.simulation import spectra
from plantation.simulation.landscape import Simulator
from plantation.simulation.scenario import EVENTS, FIRE_TRUTH, QA_CLOUD, SimulationConfig
from plantation.simulation.writer import tile_names, write_region


@pytest.fixture(scope="module")
def table() -> spectra.SpectralTable:
    return spectra.default_table()


def test_table_matches_prosail_itself(table):
    rng = np.random.default_rng(11)
    errs = []
    for _ in range(40):
        c = int(rng.integers(len(spectra.CANOPY_TYPES)))
        lai, vig, soil = rng.uniform(0, 8), rng.uniform(0, 1), rng.uniform(0.2, 1.2)
        direct = spectra.prosail_bands(spectra.CANOPY_TYPES[c], lai, vig, soil)
        looked = table.lookup(c, np.array(lai), np.array(vig), np.array(soil))
        errs.append(np.abs(direct - looked).max())
    # Sensor noise in the simulator is 0.003–0.004 reflectance; the table must stay near it.
    assert np.median(errs) < 0.004
    assert max(errs) < 0.015


def test_band_average_is_a_boxcar_over_the_published_range():
    spec = np.zeros(2101)
    wl = np.arange(400, 2501)
    spec[(wl >= 636) & (wl <= 673)] = 1.0  # OLI red, USGS band table
    out = spectra.band_average(spec)
    assert out.tolist() == [0.0, 0.0, 1.0, 0.0, 0.0, 0.0]


@pytest.mark.parametrize("canopy", range(len(spectra.CANOPY_TYPES)))
def test_closed_canopy_green_bare_soil_not(table, canopy):
    lai = np.array([4.0, 5.0, 6.5, 8.0])
    for vig in (0.6, 0.8, 1.0):
        r = table.lookup(canopy, lai, np.full(4, vig), np.full(4, 0.8))
        ndvi = (r[:, 3] - r[:, 2]) / (r[:, 3] + r[:, 2])
        assert (ndvi >= 0.8).all(), (spectra.CANOPY_TYPES[canopy].name, vig, ndvi)
    soil = np.linspace(0.2, 1.2, 6)
    r = table.lookup(canopy, np.zeros(6), np.full(6, 0.5), soil)
    ndvi = (r[:, 3] - r[:, 2]) / (r[:, 3] + r[:, 2])
    assert (ndvi <= 0.2).all()


def test_char_darkens_nir_and_raises_swir2_relative_to_forest(table):
    forest = table.lookup(0, np.array(5.0), np.array(0.8), np.array(0.8))
    char = table.lookup(2, np.array(0.2), np.array(0.1), np.array(0.22))
    assert char[3] < 0.5 * forest[3]
    assert char[5] > forest[5]
    nbr = lambda r: (r[3] - r[5]) / (r[3] + r[5])  # noqa: E731
    assert nbr(char) < 0.1 < 0.5 < nbr(forest)


# ------------------------------------------------------------ a small region

SMALL = SimulationConfig(tiles_x=2, tiles_y=2, tile_size=128, block=64, n_labels=1500, label_error=0.1, seed=5)


@pytest.fixture(scope="module")
def small_region(tmp_path_factory, table) -> Path:
    return write_region(SMALL, tmp_path_factory.mktemp("sim") / "region", progress=False, table=table)


def region_config(folder: Path, cfg: SimulationConfig) -> RegionConfig:
    return RegionConfig(
        name="small",
        tiles=[TileConfig(name=n, path=str(folder / n / "imagery")) for n, _, _ in tile_names(cfg)],
        nodata=cfg.nodata,
        mask=MaskConfig(band=7, invalid_bits=[0, 1, 2]),
        scaling=[ScalingRule(None, 1e-4, 0.0), ScalingRule(cfg.processing_change, 1e-4, -cfg.processing_offset_dn * 1e-4)],
        labels=LabelsConfig(path=str(folder / "labels.csv"), crs="EPSG:4326"),
        chunk=64,
    )


def test_cloud_share_by_month_follows_config(small_region):
    shares: dict[int, list[float]] = {}
    for f in sorted((small_region / "t01" / "imagery").glob("*.tif")):
        month = int(f.stem[5:7])
        fracs = []
        for name, _, _ in tile_names(SMALL):
            with rasterio.open(small_region / name / "imagery" / f.name) as src:
                fracs.append(np.mean(src.read(7) & QA_CLOUD > 0))
        shares.setdefault(month, []).append(float(np.mean(fracs)))
    for month, vals in shares.items():
        want = SMALL.cloud_share_by_month[month - 1]
        # 12 dates per month; each date's share scatters by cloud_share_jitter
        # plus the field's own sampling spread over a 7.7 km region.
        assert abs(np.mean(vals) - want) < 0.1, (month, np.mean(vals), want)
    wet = [np.mean(shares[m]) for m in shares if SMALL.cloud_share_by_month[m - 1] >= 0.6]
    assert wet and max(wet) > 0.6  # clear views below 40% in wet months


def test_label_errors_and_truth_agree(small_region):
    truth = pd.read_csv(small_region / "labels_truth.csv")
    n = len(truth)
    rate = truth["is_error"].mean()
    assert abs(rate - SMALL.label_error) < 4 * np.sqrt(SMALL.label_error * (1 - SMALL.label_error) / n)
    # The labels file, read by the project's own reader, lands on the pixels
    # the truth table names, and differs from the truth rasters exactly on the error rows.
    region = region_config(small_region, SMALL)
    stacks = open_region(region)
    ls = read_labels(region.labels.path, grids={s.name: s.grid for s in stacks}, years=stacks[0].years.tolist())
    assert ls.points[["tile", "row", "col"]].values.tolist() == truth[["tile", "row", "col"]].values.tolist()
    cls = []
    for tile, r, c in truth[["tile", "row", "col"]].itertuples(index=False):
        with rasterio.open(small_region / tile / "truth.tif") as src:
            cls.append(int(src.read(1, window=((r, r + 1), (c, c + 1)))[0, 0]))
    cls = np.array(cls)
    assert (cls == truth["true_label"].map(LABEL_CODES).to_numpy()).all()
    differs = (ls.points["label"].to_numpy() != truth["true_label"].to_numpy()) | (ls.points["onset_year"].to_numpy() != np.where(truth["true_label"] == "conversion", truth["true_onset_year"], 0))
    assert (differs == truth["is_error"].to_numpy()).all()


def test_conversions_per_area_and_years(small_region):
    parcels, onsets = {}, []
    for name, _, _ in tile_names(SMALL):
        with rasterio.open(small_region / name / "truth.tif") as src:
            cls, onset, event, _, pid = src.read([1, 2, 3, 4, 5])
        conv = cls == LABEL_CODES["conversion"]
        assert np.isin(event[conv], [EVENTS["estate_conversion"], EVENTS["holding_conversion"]]).all()
        assert (onset[conv] >= SMALL.first_year).all() and (onset[conv] <= SMALL.last_year).all()
        assert (onset[~conv] == 0).all()
        parcels.setdefault("holding_conversion", set()).update(np.unique(pid[event == EVENTS["holding_conversion"]]).tolist())
        onsets.append(onset[conv])
    area_km2 = (SMALL.tiles_x * SMALL.tiles_y * SMALL.tile_size**2) * SMALL.pixel_size**2 / 1e6
    expected = SMALL.holdings_per_100km2 * area_km2 / 100
    seen = len(parcels["holding_conversion"])
    # Poisson count; holdings can be drawn over by later parcels or fall
    # outside the region, so fewer are seen than placed, never more.
    assert 0.6 * expected < seen < expected + 4 * np.sqrt(expected)
    years = np.unique(np.concatenate(onsets))
    assert len(years) >= 6, "conversions must spread over the years"


def test_sensor_change_and_processing_offset(small_region):
    """Forest NIR drops by the configured gain at the sensor change; the stored
    processing offset is removed by the scaling rules (no jump on the ground)."""
    region = region_config(small_region, SMALL)
    st = open_region(region)[0]
    with rasterio.open(small_region / "t01" / "truth.tif") as src:
        forest = (src.read(3) == EVENTS["none"]) & (src.read(1) == LABEL_CODES["stable_forest"])
    nir = st.reflectance.sel(band="nir").values[:, forest]
    t = st.dates.astype("datetime64[D]")
    # Same season on both sides: August composites.
    aug = np.array([str(d)[5:7] == "08" for d in t])
    before = np.nanmedian(nir[aug & (t < np.datetime64(SMALL.sensor_change))])
    after_sensor = aug & (t >= np.datetime64(SMALL.sensor_change)) & (t < np.datetime64(SMALL.processing_change))
    after_proc = aug & (t >= np.datetime64(SMALL.processing_change))
    gain, off = SMALL.sensor_gain[3], SMALL.sensor_offset[3]
    assert np.nanmedian(nir[after_sensor]) == pytest.approx(before * gain + off, abs=0.008)
    assert np.nanmedian(nir[after_proc]) == pytest.approx(before * gain + off, abs=0.008)
    with rasterio.open(sorted((small_region / "t01" / "imagery").glob("*-08-*.tif"))[-1]) as src:
        raw = src.read(4)[forest & (src.read(7) == 0)]  # clear views only
    # On disk the stored integers still carry the processing offset.
    expected_dn = (before * gain + off) * 1e4 + SMALL.processing_offset_dn
    assert np.median(raw) == pytest.approx(expected_dn, abs=100)


def test_deterministic_and_window_independent(tmp_path, table):
    cfg = replace(SMALL, tiles_x=1, tiles_y=1, tile_size=96, first_year=2015, last_year=2016, n_labels=200, block=96)
    a = write_region(cfg, tmp_path / "a", progress=False, table=table)
    b = write_region(cfg, tmp_path / "b", progress=False, table=table)
    assert json.loads((a / "MANIFEST.json").read_text()) == json.loads((b / "MANIFEST.json").read_text())
    c = write_region(replace(cfg, seed=cfg.seed + 1), tmp_path / "c", progress=False, table=table)
    assert json.loads((a / "MANIFEST.json").read_text()) != json.loads((c / "MANIFEST.json").read_text())
    # The landscape and noise-free surface do not depend on how the region is cut into windows.
    sim = Simulator(cfg, table)
    whole = sim.surface(sim.static(0, 0, 96, 96), 3)
    part = sim.surface(sim.static(32, 48, 40, 30), 3)
    np.testing.assert_array_equal(whole[:, 32:72, 48:78], part)
    np.testing.assert_array_equal(sim.truth(0, 0, 96, 96)[:, 10:20, 5:50], sim.truth(10, 5, 10, 45))


def test_committed_toy_region_regenerates_exactly(tmp_path, table):
    """toy_tiles/ is what `plantation simulate` writes from configs/sim/toy.yaml."""
    from plantation.cli.compose import compose_job
    from plantation.config import to_object

    root = Path(__file__).resolve().parents[1]
    cfg = compose_job("simulate", [], verb="simulate")
    sim_cfg = to_object(cfg.sim, SimulationConfig)
    out = write_region(sim_cfg, tmp_path / "toy", progress=False, table=table)
    assert json.loads((out / "MANIFEST.json").read_text()) == json.loads((root / "toy_tiles" / "MANIFEST.json").read_text())


# --------------------------------------------------------------------------- escaped fire


def test_escaped_fire_off_leaves_the_region_as_it_was(table):
    """Escaped fire draws from its own stream: off (the default), every parcel, draw and reflectance is what it was; on, the other parcels keep theirs."""
    cfg = SimulationConfig(tiles_x=1, tiles_y=1, tile_size=96, block=96, seed=11, estates_per_100km2=30.0)
    assert cfg.escaped_fire_share == 0.0
    off, on = Simulator(cfg, table), Simulator(replace(cfg, escaped_fire_share=1.0), table)
    n = off.landscape.n_main
    assert len(off.landscape.geoms) == n and on.landscape.n_main == n and len(on.landscape.geoms) > n
    np.testing.assert_array_equal(on.landscape.params[: n + 1], off.landscape.params)
    np.testing.assert_array_equal(on.landscape.t_event[: n + 1], off.landscape.t_event)
    # Only forest background burns, and the rest of the truth is unchanged.
    t_off, t_on = off.truth(0, 0, 96, 96), on.truth(0, 0, 96, 96)
    burnt = t_on[2] == EVENTS["escaped_fire"]
    assert burnt.sum() > 20
    assert (t_off[2][burnt] == EVENTS["none"]).all() and (t_on[0][burnt] == LABEL_CODES["stable_forest"]).all()
    np.testing.assert_array_equal(t_on[:, ~burnt], t_off[:, ~burnt])
    surf_off, surf_on = off.surface(off.static(0, 0, 96, 96), 20), on.surface(on.static(0, 0, 96, 96), 20)
    np.testing.assert_array_equal(surf_on[:, ~burnt], surf_off[:, ~burnt])


def test_escaped_fire_sits_beside_a_burnt_clearing_in_its_season(table):
    from scipy.ndimage import binary_dilation

    cfg = SimulationConfig(tiles_x=1, tiles_y=1, tile_size=96, block=96, seed=11, estates_per_100km2=30.0, escaped_fire_share=1.0, escaped_fire_ha=[2.0, 4.0])
    sim = Simulator(cfg, table)
    fire = sim.fire_truth(0, 0, 96, 96)
    truth = sim.truth(0, 0, 96, 96)
    escaped = fire == FIRE_TRUTH["escaped_fire"]
    clearing = fire == FIRE_TRUTH["clearing_burnt"]
    assert escaped.any() and clearing.any()
    # Within the fire's reach (at most about 8 pixels at 30 m for 6 ha) of a burnt clearing, and never of one cleared by machines only.
    assert (escaped & ~binary_dilation(clearing, iterations=10)).sum() == 0
    # Every converted pixel is a clearing, burnt or not; no other pixel is.
    conv = truth[0] == LABEL_CODES["conversion"]
    assert set(np.unique(fire[conv])) <= {FIRE_TRUTH["clearing_burnt"], FIRE_TRUTH["clearing_not_burnt"]}
    L = sim.landscape
    pid = truth[4]
    for p in np.unique(pid[escaped]):
        t_fire = L.t_event[p]
        # The clearing it escaped from burnt in the same season (within 0.1 year before it).
        near = binary_dilation(pid == p, iterations=10) & clearing
        assert near.any()
        assert np.any((t_fire - L.t_event[np.unique(pid[near])] >= 0) & (t_fire - L.t_event[np.unique(pid[near])] <= 0.1 + 1e-9))
        assert truth[3][pid == p].max() == int(np.floor(t_fire))
