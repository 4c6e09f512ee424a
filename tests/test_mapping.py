"""Mapping tiles to COGs: fully convolutional equals patchwise, layers, COG layout, resume, atomic output, dask."""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import rasterio
import torch
from affine import Affine

from plantation.errors import ConfigError, InputNotFoundError, RegionError
from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import open_region
from plantation.mapping.fire import FIRE_CODES, attribute, decimal_years, resolve_escaped
from plantation.mapping.folder import BAND, LAYERS, MAP_LAYERS, NODATA, SCALE
from plantation.mapping.job import EngineConfig, MapConfig, run
from plantation.mapping.tiles import Settings, encode_layers, window_probabilities
from plantation.model import artefact
from plantation.model.card import Calibration, ModelCard
from plantation.model.inference import predict_tile, read_window
from plantation.model.network import ConvRecurrentNet
from plantation.model.patches import features, read_patches
from tests.conftest import BANDS, CRS, write_stack

DATES = ["2015-03-01", "2015-06-01", "2015-09-01", "2015-12-01", "2016-03-01", "2016-06-01", "2016-09-01", "2016-12-01"]
YEARS = [2015, 2016]
INDICES = ["NDVI", "EVI", "NBR", "NDMI"]
SPEC = {
    "n_channels": 10,
    "date_year": [0, 0, 0, 0, 1, 1, 1, 1],
    "day_of_year": [0.16, 0.41, 0.66, 0.91] * 2,
    "neighbourhood": 5,
    "conv_width": 6,
    "hidden": 8,
    "dropout": 0.0,
}


def _values(h: int, w: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Forest-like stored values with a cleared block from the fifth date, and random clouds."""
    rng = np.random.default_rng(seed)
    base = np.array([300, 500, 250, 3500, 1800, 700], np.int16)
    v = np.broadcast_to(base[None, :, None, None], (len(DATES), 6, h, w)).copy()
    v[4:, :, : h // 2, : w // 3] = np.array([900, 1100, 1300, 2000, 2800, 2100], np.int16)[:, None, None]
    v += rng.integers(-60, 60, v.shape).astype(np.int16)
    qa = (rng.random((len(DATES), h, w)) < 0.3).astype(np.int16)  # bit 0: cloud
    qa[:, 0, 0] = 1  # a pixel never seen: nodata
    qa[:6, 1, 1] = 1  # seen twice only: nodata under min_clear=4
    return v, qa


@pytest.fixture
def region(tmp_path: Path) -> RegionConfig:
    tiles = []
    for i, (h, w) in enumerate([(37, 45), (29, 21)]):
        v, qa = _values(h, w, seed=i)
        tr = Affine(30.0, 0.0, 600000.0 + i * 45 * 30.0, 0.0, -30.0, 200010.0)
        write_stack(tmp_path / f"t{i}", DATES, v, qa, transform=tr)
        tiles.append(TileConfig(name=f"t{i}", path=str(tmp_path / f"t{i}")))
    return RegionConfig(name="tinymap", tiles=tiles, bands=BANDS, nodata=-9999, mask=MaskConfig(band=7, invalid_bits=[0]), scaling=[ScalingRule(None, 1e-4, 0.0)], chunk=16)


@pytest.fixture
def model_dir(tmp_path: Path) -> Path:
    members = []
    for i in range(2):
        torch.manual_seed(10 + i)
        net = ConvRecurrentNet(**SPEC)
        with torch.no_grad():
            # Static outcomes less likely than conversions: the tiles map as converted.
            net.static_head[-1].bias.copy_(torch.tensor([0.0, -1.0, -1.0]))
        members.append(net.eval())
    card = ModelCard(
        bands=BANDS,
        indices=INDICES,
        scaling=[{"start": None, "scale": 1e-4, "offset": 0.0}],
        dates=DATES,
        years=YEARS,
        network=SPEC,
        members=2,
        calibration=Calibration(temperature=0.3, loss_weights=[1.0, 1.0, 1.0, 1.0, 1.0], train_prior=[0.4, 0.2, 0.2, 0.1, 0.1]),
        cutoff_year=2015,
        interval_level=0.8,
        region="tinymap",
        labels_fingerprint="x",
        package_version="0",
    )
    return artefact.save(tmp_path / "model", card, members)


def _cfg(region: RegionConfig, model_dir: Path, out: Path, **kw: object) -> MapConfig:
    base = {"region": region, "model": str(model_dir), "out_dir": str(out), "window": 16, "pixel_batch": 100, "progress": False, "quicklook": False, "engine": EngineConfig(threads=1)}
    base.update(kw)
    return MapConfig(**base)  # type: ignore[arg-type]


def _read(path: Path) -> np.ndarray:
    with rasterio.open(path) as src:
        return src.read()


def test_window_inference_equals_patchwise_at_tile_edges_and_corners(region, model_dir):
    art = artefact.load(model_dir)
    stack = open_region(region)[0]
    H, W = stack.grid.height, stack.grid.width
    halo = art.members[0].halo
    # One window holding the tile's corner, and one at the far edge that runs off the tile.
    for r0, c0, h, w in [(0, 0, 16, 16), (H - 5, W - 7, 5, 7)]:
        refl, valid = read_window(stack, r0, c0, h, w, halo)
        x = torch.from_numpy(features(refl, BANDS, INDICES))
        probs, _ = window_probabilities(art, x, torch.from_numpy(valid), pixel_batch=37)
        rows, cols = np.meshgrid(np.arange(r0, r0 + h), np.arange(c0, c0 + w), indexing="ij")
        pr, pv = read_patches(stack, rows.ravel(), cols.ravel(), 5)
        xp = torch.from_numpy(features(pr, BANDS, INDICES))
        with torch.inference_mode():
            z = torch.stack([m(xp, torch.from_numpy(pv)) for m in art.members])
            ref = art.calibrated_log_probs(z).exp().numpy().reshape(h, w, -1)
        np.testing.assert_allclose(probs, ref, atol=2e-5)


def test_tile_cog_has_the_input_grid_named_bands_and_decoded_layers(region, model_dir, tmp_path):
    summary = run(_cfg(region, model_dir, tmp_path / "out", window=32))
    assert summary.tiles_mapped == ["t0", "t1"]
    art = artefact.load(model_dir)
    stack = open_region(region)[0]
    with rasterio.open(tmp_path / "out" / "t0.tif") as src:
        assert src.crs == rasterio.crs.CRS.from_string(CRS) and src.transform == stack.grid.transform
        assert (src.height, src.width) == (37, 45)
        assert src.descriptions == tuple(name for name, _, _ in MAP_LAYERS)
        assert src.descriptions[: len(LAYERS)] == tuple(name for name, _, _ in LAYERS)  # fire layers come after: band indices keep their meaning
        assert src.nodatavals == (NODATA,) * len(MAP_LAYERS)
        assert src.scales[BAND["p_conversion"] - 1] == pytest.approx(1e-4)
        assert src.tags()["cutoff_year"] == "2015" and "verify" in src.tags()["notice"].lower()
        got = src.read()
        p_conv = src.read(BAND["p_conversion"], masked=True) * src.scales[BAND["p_conversion"] - 1]
    # The streaming pipeline gives what the plain whole-tile loop gives.
    tp = predict_tile(art, stack, window=64)
    want = encode_layers(tp.probs, tp.epistemic, tp.clear, YEARS, cutoff_year=2015, level=0.8, min_clear=4)
    np.testing.assert_array_equal(got[: len(LAYERS)], want)
    # The fire layers are the attribution of the whole tile's series at once, escaped fire resolved over the tile.
    refl, valid = read_window(stack, 0, 0, 37, 45, 0)
    fw = attribute(refl, valid, decimal_years(stack.dates), BANDS, want[0] == 2, want[1], forest=want[0] == 1)
    code, year = resolve_escaped(fw.code, fw.year, fw.candidate_year, want[1])
    unmapped = want[0] == NODATA
    np.testing.assert_array_equal(got[BAND["fire"] - 1], np.where(unmapped, NODATA, code))
    np.testing.assert_array_equal(got[BAND["fire_year"] - 1], np.where(unmapped, NODATA, year))
    dn = got[BAND["dnbr"] - 1]
    np.testing.assert_array_equal(dn == NODATA, unmapped | ~np.isfinite(fw.dnbr))
    np.testing.assert_allclose(dn[dn != NODATA] * SCALE, fw.dnbr[dn != NODATA], atol=6e-5)
    # Every pixel mapped as converted has a fire code of a clearing, and no other pixel has one.
    fire = got[BAND["fire"] - 1]
    is_clearing = np.isin(fire, [FIRE_CODES["converted_burnt"], FIRE_CODES["converted_not_burnt"], FIRE_CODES["converted_unknown"]])
    np.testing.assert_array_equal(is_clearing, got[0] == 2)
    seen = tp.clear >= 4
    assert seen.mean() > 0.5 and (p_conv.mask == ~seen).all()
    np.testing.assert_allclose(p_conv.data[seen], tp.probs[..., 3:].sum(-1)[seen], atol=6e-5)
    # Never-seen and twice-seen pixels are nodata except in clear_dates.
    assert (got[:7, 0, 0] == NODATA).all() and (got[:7, 1, 1] == NODATA).all()
    assert got[BAND["clear_dates"] - 1, 0, 0] == 0 and got[BAND["clear_dates"] - 1, 1, 1] == 2
    conv = got[0] == 2
    assert conv.any() and (got[1][conv] >= 2015).all() and (got[1][(got[0] != 2) & (got[0] != NODATA)] == 0).all()
    lo, mode, hi = got[2][conv], got[1][conv], got[3][conv]
    assert ((lo <= mode) & (mode <= hi)).all()
    # Summary areas are the converted pixels times 0.09 ha (30 m pixels; common practice).
    n_conv = sum(int((_read(tmp_path / "out" / f"t{i}.tif")[0] == 2).sum()) for i in range(2))
    assert sum(summary.converted_ha.values()) == pytest.approx(n_conv * 0.09)
    written = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert written["pixels"] == 37 * 45 + 29 * 21


def test_layers_decode_class_year_interval_and_nodata():
    """Hand-made distributions over (stable, old plantation, other, 2015, 2016, 2017)."""
    probs = np.array(
        [
            [[0.7, 0.1, 0.1, 0.05, 0.05, 0.0], [0.1, 0.0, 0.0, 0.1, 0.5, 0.3]],
            [[0.1, 0.6, 0.1, 0.1, 0.1, 0.0], [0.0, 0.0, 0.1, 0.9, 0.0, 0.0]],
        ]
    )
    epi = np.array([[0.0, 0.25], [1.5, 5.0]])
    clear = np.array([[9, 9], [3, 9]], np.int16)
    out = encode_layers(probs, epi, clear, [2015, 2016, 2017], cutoff_year=2015, level=0.8, min_clear=4)
    assert out.dtype == np.int16 and out.shape == (len(LAYERS), 2, 2)
    np.testing.assert_array_equal(out[0], [[1, 2], [NODATA, 2]])  # class codes; (1, 0) seen 3 times only
    np.testing.assert_array_equal(out[1], [[0, 2016], [NODATA, 2015]])
    np.testing.assert_array_equal(out[2:4, 0, 1], [2016, 2017])  # 0.5 + 0.3 of 0.9 in 2016-2017 reaches 80%
    np.testing.assert_array_equal(out[4], [[1000, 9000], [NODATA, 9000]])
    np.testing.assert_array_equal(out[5], [[500, 8000], [NODATA, 0]])  # after 2015 only
    np.testing.assert_array_equal(out[6], [[0, 2500], [NODATA, 32767]])  # clipped at the int16 ceiling
    np.testing.assert_array_equal(out[7], clear)


def test_output_is_a_valid_cog_with_nearest_overviews(tmp_path):
    """rio-cogeo's validator (a reference implementation of the COG layout rules) accepts the file."""
    from rio_cogeo.cogeo import cog_validate

    from plantation.mapping.folder import write_cog

    rng = np.random.default_rng(0)
    data = rng.integers(1, 5, (len(LAYERS), 600, 520)).astype(np.int16)
    data[1] = rng.choice([0, 2013, 2019, 2024], (600, 520))
    raw = tmp_path / "raw.tif"
    prof = {
        "driver": "GTiff",
        "height": 600,
        "width": 520,
        "count": len(LAYERS),
        "dtype": "int16",
        "crs": CRS,
        "transform": Affine(30, 0, 6e5, 0, -30, 2e5),
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 128,
        "blockysize": 128,
    }
    with rasterio.open(raw, "w", **prof) as dst:
        dst.write(data)
    write_cog(raw, tmp_path / "cog.tif")
    valid, errors, _ = cog_validate(str(tmp_path / "cog.tif"), quiet=True)
    assert valid, errors
    with rasterio.open(tmp_path / "cog.tif") as src:
        assert src.overviews(1)[0] == 2
        ov = src.read(2, out_shape=(300, 260))
    # Nearest: each overview pixel is one of the 2 x 2 pixels it stands for (averaging would invent years).
    blocks = data[1].reshape(300, 2, 260, 2).transpose(0, 2, 1, 3).reshape(300, 260, 4)
    assert (blocks == ov[..., None]).any(-1).all()


def test_rerun_skips_finished_tiles_and_redoes_changed_or_damaged_ones(region, model_dir, tmp_path):
    out = tmp_path / "out"
    run(_cfg(region, model_dir, out))
    stamp = {p.name: p.stat().st_mtime_ns for p in out.glob("*.tif")}
    again = run(_cfg(region, model_dir, out))
    assert again.tiles_skipped == ["t0", "t1"] and again.tiles_mapped == []
    assert {p.name: p.stat().st_mtime_ns for p in out.glob("*.tif")} == stamp
    assert again.pixels == 37 * 45 + 29 * 21
    # A damaged file is mapped again; the other tile is not.
    (out / "t1.tif").write_bytes(b"not a tiff")
    third = run(_cfg(region, model_dir, out))
    assert third.tiles_mapped == ["t1"] and third.tiles_skipped == ["t0"]
    # Other settings that change the content map everything again.
    fourth = run(_cfg(region, model_dir, out, min_clear=6))
    assert fourth.tiles_mapped == ["t0", "t1"]
    manifest = json.loads((out / "manifest.json").read_text())
    assert set(manifest["tiles"]) == {"t0", "t1"}


def test_an_interrupted_tile_leaves_nothing_that_looks_finished(region, model_dir, tmp_path, monkeypatch):
    import plantation.mapping.tiles as mapping

    calls = {"n": 0}
    real = mapping.window_probabilities

    def flaky(*a, **k):
        calls["n"] += 1
        if calls["n"] == 3:
            raise KeyboardInterrupt
        return real(*a, **k)

    monkeypatch.setattr(mapping, "window_probabilities", flaky)
    out = tmp_path / "out"
    with pytest.raises(KeyboardInterrupt):
        run(_cfg(region, model_dir, out))
    # No tile, no temporary file, no manifest entry: the folder this run created is left empty, and so removed.
    assert not out.exists()


def test_a_tile_is_written_under_a_raw_name_holding_its_process_id(region, model_dir, tmp_path, monkeypatch):
    # A dask worker given up on by its scheduler may still be writing when its tile runs again elsewhere: the two must not share a file.
    import os

    import plantation.mapping.tiles as mapping
    from plantation.mapping.guard import partial_files

    seen: list[list[str]] = []
    real = mapping.window_probabilities
    out = tmp_path / "out"

    def watch(*a, **k):
        seen.append(sorted(p.name for p in partial_files(out)))
        return real(*a, **k)

    monkeypatch.setattr(mapping, "window_probabilities", watch)
    run(_cfg(region, model_dir, out, tiles=["t0"]))
    assert seen and all(names == [f".t0.{os.getpid()}.raw.tif"] for names in seen), seen
    assert partial_files(out) == []

    # The raw file of a worker that died mid-tile (another process id), left while the run goes on, is gone when the run ends.
    def dying_worker(*a, **k):
        (out / ".t1.999999.raw.tif").write_bytes(b"a worker killed mid-tile")
        return real(*a, **k)

    monkeypatch.setattr(mapping, "window_probabilities", dying_worker)
    run(_cfg(region, model_dir, out))
    assert partial_files(out) == [] and (out / "t1.tif").exists()


def test_the_fire_thresholds_reach_the_tiles_and_the_summary_counts_their_areas(region, model_dir, tmp_path):
    from dataclasses import asdict

    from plantation.mapping.fire import FireRule

    out = tmp_path / "out"
    rule = FireRule(min_bai=30.0, escape_px=2, max_gap_years=0.75)
    summary = run(_cfg(region, model_dir, out, fire=rule))
    # Every pixel of these UTM tiles is 30 m x 30 m = 0.09 ha; areas counted here from the written bands.
    want = dict.fromkeys([n for n in FIRE_CODES if n != "none"], 0.0)
    burnt_after = 0.0
    for t in ("t0", "t1"):
        with rasterio.open(out / f"{t}.tif") as src:
            assert json.loads(src.tags()["fire_rule"]) == asdict(rule)
            fire, year = src.read(BAND["fire"]), src.read(BAND["fire_year"])
        for name in want:
            want[name] += float((fire == FIRE_CODES[name]).sum()) * 0.09
        burnt_after += float(((fire == FIRE_CODES["converted_burnt"]) & (year > 2015)).sum()) * 0.09
    assert set(summary.fire_ha) == set(want)
    for name in want:
        assert summary.fire_ha[name] == pytest.approx(want[name], abs=1e-6)
    assert summary.fire_after_cutoff_ha == pytest.approx(burnt_after, abs=1e-6)
    assert sum(want.values()) > 0  # the tiles map as converted (model_dir): the count is not empty
    line = next(x for x in summary.lines() if x.startswith("fire (ha):"))
    assert f"converted_burnt {want['converted_burnt']:,.2f}" in line and f"after 2015: {burnt_after:,.2f}" in line
    assert json.loads((out / "summary.json").read_text())["fire_ha"] == summary.fire_ha
    # The thresholds decide the content: other ones map the tiles again, the same ones skip them.
    assert run(_cfg(region, model_dir, out, fire=rule)).tiles_skipped == ["t0", "t1"]
    assert run(_cfg(region, model_dir, out, fire=FireRule(min_bai=60.0))).tiles_mapped == ["t0", "t1"]


@pytest.mark.slow
def test_two_dask_workers_give_the_single_process_files(region, model_dir, tmp_path):
    run(_cfg(region, model_dir, tmp_path / "one"))
    s = run(_cfg(region, model_dir, tmp_path / "two", engine=EngineConfig(workers=2, threads=1)))
    assert s.tiles_mapped == ["t0", "t1"]
    for t in ("t0", "t1"):
        np.testing.assert_array_equal(_read(tmp_path / "one" / f"{t}.tif"), _read(tmp_path / "two" / f"{t}.tif"))


def test_styles_and_quicklook_describe_the_layers(region, model_dir, tmp_path):
    from plantation.mapping.styles import CLASS_STYLE

    run(_cfg(region, model_dir, tmp_path / "out", quicklook=True, tiles=["t1"]))
    out = tmp_path / "out"
    assert not (out / "t0.tif").exists()
    cls = ET.parse(out / "t1.qml").getroot()
    entries = cls.findall(".//paletteEntry")
    assert cls.find(".//rasterrenderer").get("band") == str(BAND["class"])
    assert [int(e.get("value")) for e in entries] == sorted(CLASS_STYLE) == [1, 2, 3, 4]
    years = ET.parse(out / "t1.onset_year.qml").getroot()
    items = years.findall(".//item")
    assert [int(i.get("value")) for i in items] == YEARS and items[1].get("label") == "2016 (after cutoff)"
    assert len({i.get("color") for i in items}) == len(YEARS)
    assert (out / "t1.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_bad_requests_are_refused_with_the_culprit_named(region, model_dir, tmp_path):
    with pytest.raises(InputNotFoundError, match="no model here"):
        run(_cfg(region, tmp_path / "nowhere", tmp_path / "out"))
    with pytest.raises(ConfigError, match="window: 20 must be a multiple of 16"):
        run(_cfg(region, model_dir, tmp_path / "out", window=20))
    with pytest.raises(ConfigError, match=r"tiles: \['t9'\] not in region"):
        run(_cfg(region, model_dir, tmp_path / "out", tiles=["t9"]))
    other = replace(region, scaling=[ScalingRule(None, 1e-4, -0.1)])
    with pytest.raises(RegionError, match="scaling rules"):
        run(_cfg(other, model_dir, tmp_path / "out"))


def test_settings_key_ignores_how_but_not_what():
    a = Settings(min_clear=4, cutoff_year=2020, interval_level=0.8, interval_mass=0.8, window=128, pixel_batch=1024, threads=2, quicklook=True)
    assert a.content_key() == replace(a, window=64, threads=1).content_key()
    assert a.content_key() != replace(a, cutoff_year=2019).content_key()


def test_a_tiles_key_follows_named_sensors_and_harmonisation_and_keeps_old_maps_keys():
    from dataclasses import replace

    from plantation.imagery.config import HarmoniseConfig, RegionConfig
    from plantation.mapping.tiles import Settings, tile_key

    region, settings, sig = (
        RegionConfig(name="r"),
        Settings(min_clear=4, cutoff_year=2020, interval_level=0.8, interval_mass=0.8, window=128, pixel_batch=1024, threads=2, quicklook=True),
        [["a.tif", 10, 1]],
    )
    old = tile_key("m", settings, region, sig)
    # Unnamed sensors (every region read before sensors existed) leave the key as it was.
    assert tile_key("m", settings, region, sig, ("", "")) == old
    named = tile_key("m", settings, region, sig, ("landsat_oli", "landsat_etm"))
    assert named != old and named != tile_key("m", settings, region, sig, ("landsat_etm", "landsat_oli"))
    assert tile_key("m", settings, replace(region, harmonise=HarmoniseConfig(enabled=True)), sig, ("landsat_oli", "landsat_etm")) != named
