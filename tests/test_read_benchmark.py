"""The read benchmark's comparison on a tiny tile: product folders and pre-stacked GeoTIFFs of the same pixels read identically, and the result carries its figures.

The published values checked (as in tests/test_products.py): Landsat
Collection 2 Level-2 surface reflectance = DN × 0.0000275 − 0.2, fill DN 0;
QA_PIXEL bits 0 fill, 3 cloud, 4 cloud shadow, 6 clear (USGS Landsat 8-9
Collection 2 Level-2 Science Product Guide).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import rasterio

from plantation.benchmarks.reading import (
    QA_PIXEL_CLEAR,
    CompareConfig,
    ReadConfig,
    compare_region,
    deliver_as_products,
    halo_windows,
    landsat_dn,
    landsat_qa_pixel,
    run,
    same_window,
)
from plantation.imagery.products import LANDSAT_QA_BITS
from plantation.imagery.region import open_tile
from plantation.simulation.scenario import QA_CLOUD, QA_FILL, QA_SHADOW, SimulationConfig
from plantation.simulation.writer import write_region


def tiny_sim() -> SimulationConfig:
    """A 48 px tile, four dates over two years: two of them after the simulator's processing change."""
    return SimulationConfig(name="tiny_read", tiles_x=1, tiles_y=1, tile_size=48, first_year=2020, last_year=2021, composite_doys=[100, 300], n_labels=40, block=48)


@pytest.fixture(scope="module")
def work(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder holding the tiny simulated region where the comparison looks for it (``<work_dir>/simulated``)."""
    folder = tmp_path_factory.mktemp("read_compare")
    write_region(tiny_sim(), folder / "simulated", progress=False)
    return folder


def test_landsat_encoding_follows_the_published_scaling_and_qa_bits():
    np.testing.assert_array_equal(landsat_dn(np.array([0.075, -0.2, 0.0])), [10000, 1, 7273])  # DN 0 is fill: never written for data
    qa = landsat_qa_pixel(np.array([0, QA_CLOUD, QA_SHADOW, QA_FILL | QA_CLOUD]))
    assert qa[0] == QA_PIXEL_CLEAR and qa[0] & (1 << 6)
    masked = sum(1 << b for b in LANDSAT_QA_BITS)
    assert (qa[0] & masked) == 0 and qa[1] & (1 << 3) and qa[2] & (1 << 4) and qa[3] == 1
    assert not qa[1] & (1 << 6) and not qa[2] & (1 << 6)


def test_halo_windows_cover_the_tile_and_clip_at_its_edges():
    wins = list(halo_windows(10, 7, 4, 1))
    assert wins[0] == (0, 0, 5, 5) and wins[-1] == (7, 3, 3, 4)
    seen = np.zeros((10, 7), int)
    for r, c, h, w in wins:
        seen[r : r + h, c : c + w] += 1
    assert (seen >= 1).all()


def test_comparison_on_a_tiny_tile_reads_both_layouts_identically_and_writes_its_figures(work, tmp_path):
    cfg = ReadConfig(sim=tiny_sim(), memory=False, compare=CompareConfig(tile_size=48, work_dir=str(work), window=16, halo=2, chunk=24, repeats=2, result=str(tmp_path / "read.json")))
    res = run(cfg)
    assert res["memory"] is None
    doc = json.loads((tmp_path / "read.json").read_text())
    assert doc == json.loads(json.dumps(res["compare"]))
    for key in ("products_px_dates_per_s", "stacked_px_dates_per_s", "products_vs_stacked", "identical", "peak_rss_mb", "window", "tile_px", "dates", "repeats", "window_float32_mb"):
        assert key in doc, key
    assert doc["identical"] is True
    assert doc["simulate_seconds"] is None  # the simulated tile was reused
    assert doc["tile_px"] == [48, 48] and doc["dates"] == 4 and doc["window"] == 16 and doc["repeats"] == 2
    assert doc["order"] == [["stacked", "products"], ["products", "stacked"]]
    assert set(doc["peak_rss_mb"]) == {"products", "stacked"} and all(v > 0 for v in doc["peak_rss_mb"].values())
    assert doc["products_vs_stacked"] == pytest.approx(doc["products_px_dates_per_s"] / doc["stacked_px_dates_per_s"], abs=1e-3)
    assert 0 < doc["valid_share"] < 1  # clouds and fill are masked, most pixels are not


def test_a_changed_product_file_is_caught(work, tmp_path):
    products, stacked = deliver_as_products(tiny_sim(), work / "simulated", tmp_path / "delivered")
    assert same_window(str(products), str(stacked), row=4, col=4, size=20, chunk=24)["shape"] == [4, 6, 20, 20]
    # One clear pixel of one date, one DN more in that scene's red band.
    region = compare_region("stacked", str(stacked), 24)
    _, valid = open_tile(region.tiles[0], region).read(4, 4, 20, 20)
    t, r, c = np.argwhere(valid)[len(np.argwhere(valid)) // 2]
    red = next((sorted(p for p in products.iterdir())[t]).glob("*_SR_B4.TIF"))
    with rasterio.open(red, "r+") as dst:
        band = dst.read(1)
        band[4 + r, 4 + c] += 1
        dst.write(band, 1)
    with pytest.raises(RuntimeError, match=r"read differently on window \(4, 4, 20\)"):
        same_window(str(products), str(stacked), row=4, col=4, size=20, chunk=24)
