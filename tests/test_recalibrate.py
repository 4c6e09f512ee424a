"""Recalibrating a written map from its probability sample, on tiny maps built in code with a known truth.

The map's p_conversion is miscalibrated in a known way (its odds are the
truth's × 5, a prior shift of the kind a stratified training sample leaves),
so the right correction is logit p' = logit p − log 5 (Saerens et al. 2002:
a prior shift multiplies the odds). The truth is drawn pixel by pixel, the
sample with `plantation sample`'s own stratified design and its reference
copied from that truth.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from affine import Affine
from rio_cogeo.cogeo import cog_validate

from plantation.assessment.design import DesignConfig
from plantation.assessment.design import run as draw_sample
from plantation.assessment.recalibrate import METHOD, NOT_CORRECTED, RecalibrateConfig, run
from plantation.errors import PlantationError
from plantation.farmplots.cutoff import PlotsConfig
from plantation.farmplots.cutoff import run as check_plots
from plantation.mapping.folder import CORRECTION_TAG, FORMAT, LAYERS, NO_CORRECTION, NODATA, RECALIBRATION, SCALE, open_map, sha256_of, write_cog
from plantation.model.calibration import expected_calibration_error
from plantation.report.page import build_report
from tests.conftest import write_map_tile

ROOT = Path(__file__).resolve().parents[1]
COMMAND = str(Path(sys.executable).parent / "plantation")
CRS = "EPSG:32650"
CUTOFF = 2020
SHAPE = (128, 128)
ODDS = 5.0


def _odds_times(q: np.ndarray, k: float) -> np.ndarray:
    o = q / (1 - q) * k
    return o / (1 + o)


def write_map(folder: Path, seed: int, tiles: tuple[str, ...] = ("t01", "t02")) -> dict[str, dict[str, np.ndarray]]:
    """A mapped region of COG tiles whose p_conversion has the truth's odds × 5; returns each tile's truth.

    Per pixel: q = P(conversion) (mostly low, a fifth high), r = P(after the
    cutoff | conversion) ∈ {0.2, 0.8}; truth drawn from them. p_after_cutoff
    is miscalibrated the same way against q·r. Row 0, columns 0–3 are no data.
    """
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    h, w = SHAPE
    manifest: dict[str, Any] = {"format": FORMAT, "producer": "test", "tiles": {}}
    truth: dict[str, dict[str, np.ndarray]] = {}
    for k, name in enumerate(tiles):
        high = rng.random(SHAPE) < 0.2
        q = np.where(high, rng.beta(4, 2, SHAPE), rng.beta(0.5, 20, SHAPE)).clip(1e-4, 1 - 1e-4)
        r = np.where(rng.random(SHAPE) < 0.5, 0.2, 0.8)
        conv = rng.random(SHAPE) < q
        after = conv & (rng.random(SHAPE) < r)
        pc, pa = _odds_times(q, ODDS), _odds_times(q * r, ODDS)
        bands = np.zeros((8, h, w), np.int16)
        cls = np.where(pc >= 0.5, 2, 1)
        onset = np.where(cls == 2, np.where(r > 0.5, 2022, 2019), 0)
        bands[0], bands[1], bands[2], bands[3] = cls, onset, np.where(onset > 0, onset - 1, 0), np.where(onset > 0, onset + 1, 0)
        bands[4], bands[5] = np.rint(pc / SCALE), np.rint(pa / SCALE)
        bands[6] = rng.integers(0, 3000, SHAPE)
        bands[7] = 20
        bands[:7, 0, :4] = NODATA
        bands[7, 0, :4] = 2
        raw = folder / f".{name}.raw.tif"
        transform = Affine(30.0, 0.0, 600000.0 + k * w * 30.0, 0.0, -30.0, 200010.0)
        tags = {"cutoff_year": str(CUTOFF), "interval_level": "0.8", "model_region": "tinyland"}
        write_map_tile(raw, bands, crs=CRS, transform=transform, tags=tags, tiled=True, blockxsize=256, blockysize=256)
        path = folder / f"{name}.tif"
        write_cog(raw, path)
        raw.unlink()
        years = {str(y): float(((cls == 2) & (onset == y)).sum()) * 0.09 for y in range(2018, 2024)}
        manifest["tiles"][name] = {"file": path.name, "sha256": hashlib.sha256(path.read_bytes()).hexdigest(), "tile": name, "converted_ha": years}
        (folder / f"{name}.qml").write_text("<qgis/>")
        truth[name] = {"conv": conv, "after": after, "year": np.where(after, 2022, np.where(conv, 2019, 0))}
    (folder / "manifest.json").write_text(json.dumps(manifest))
    return truth


def label_sample(map_dir: Path, out: Path, truth: dict[str, dict[str, np.ndarray]], seed: int, total: int = 900) -> Path:
    """Draw `plantation sample`'s stratified sample of the map and fill its sheet from the truth."""
    draw_sample(DesignConfig(map=str(map_dir), out_dir=str(out), total=total, min_per_stratum=50, seed=seed), echo=lambda *_: None)
    sheet = out / "samples.csv"
    t = pd.read_csv(sheet, dtype=str, keep_default_na=False)
    labels, years = [], []
    for tile, row, col in zip(t["tile"], t["row"].astype(int), t["col"].astype(int), strict=True):
        tr = truth[tile]
        c = bool(tr["conv"][row, col])
        labels.append("conversion" if c else "stable_forest")
        years.append(str(int(tr["year"][row, col])) if c else "")
    t["label"], t["onset_year"] = labels, years
    t.to_csv(sheet, index=False)
    return sheet


def snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture
def labelled(tmp_path: Path) -> tuple[Path, Path, dict[str, dict[str, np.ndarray]]]:
    truth = write_map(tmp_path / "map", seed=0)
    sheet = label_sample(tmp_path / "map", tmp_path / "assess", truth, seed=0)
    return tmp_path / "map", sheet, truth


def _read(path: Path) -> tuple[np.ndarray, dict[str, Any]]:
    with rasterio.open(path) as src:
        return src.read(), {"scales": src.scales, "offsets": src.offsets, "nodata": src.nodata, "descriptions": src.descriptions, "tags": src.tags(), "dtype": src.dtypes}


# ------------------------------------------------------------------ (a) the correction works


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_recalibration_fixes_a_known_prior_shift_on_the_unsampled_pixels(tmp_path: Path, seed: int) -> None:
    truth = write_map(tmp_path / "map", seed=seed)
    sheet = label_sample(tmp_path / "map", tmp_path / "assess", truth, seed=seed)
    before = {n: _read(tmp_path / "map" / f"{n}.tif")[0] for n in truth}
    res = run(RecalibrateConfig(map=str(tmp_path / "map"), samples=str(sheet), out_dir=str(tmp_path / "fixed")), echo=lambda *_: None)
    design = json.loads((tmp_path / "assess" / "design.json").read_text())
    sampled = {(q["tile"], q["row"], q["col"]) for q in design["points"]}
    got: dict[str, list[np.ndarray]] = {k: [] for k in ("pc0", "pc1", "pa0", "pa1", "conv", "after")}
    for name, tr in truth.items():
        after_bands = _read(tmp_path / "fixed" / f"{name}.tif")[0]
        keep = before[name][4] != NODATA
        for r, c, _ in [(r, c, t) for (t, r, c) in sampled if t == name]:
            keep[r, c] = False
        got["pc0"].append(before[name][4][keep] * SCALE)
        got["pc1"].append(after_bands[4][keep] * SCALE)
        got["pa0"].append(before[name][5][keep] * SCALE)
        got["pa1"].append(after_bands[5][keep] * SCALE)
        got["conv"].append(tr["conv"][keep])
        got["after"].append(tr["after"][keep])
    g = {k: np.concatenate(v) for k, v in got.items()}
    ece = {k: expected_calibration_error(g[p], g[y]) for k, p, y in (("c0", "pc0", "conv"), ("c1", "pc1", "conv"), ("a0", "pa0", "after"), ("a1", "pa1", "after"))}
    assert ece["c0"] > 0.05 and ece["c1"] < 0.02, ece
    assert ece["a0"] > 0.05 and ece["a1"] < 0.02, ece
    # The known answer: intercept near −log 5, slope near 1.
    a, b = res.correction["coef_conversion"]
    assert a == pytest.approx(-np.log(ODDS), abs=0.5) and b == pytest.approx(1.0, abs=0.25)
    fc, fa = res.fits
    assert fc.ece_after < fc.ece_before and fa.ece_after < fa.ece_before


def test_design_weighted_ece_is_the_plain_ece_with_equal_weights_and_follows_the_weights() -> None:
    rng = np.random.default_rng(3)
    p, y = rng.random(500), rng.random(500) < 0.3
    assert expected_calibration_error(p, y, weight=np.ones(500)) == pytest.approx(expected_calibration_error(p, y))
    # Weight 3 on a point = the point three times.
    w = np.where(np.arange(500) < 100, 3.0, 1.0)
    rep = np.concatenate([p, p[:100], p[:100]]), np.concatenate([y, y[:100], y[:100]])
    assert expected_calibration_error(p, y, weight=w) == pytest.approx(expected_calibration_error(*rep))


# ------------------------------------------------------------------ (b) the files


def test_other_bands_nodata_scales_kept_valid_cog_and_verified(labelled, tmp_path: Path) -> None:
    map_dir, sheet, truth = labelled
    original = snapshot(map_dir)
    run(RecalibrateConfig(map=str(map_dir), samples=str(sheet), out_dir=str(tmp_path / "fixed")), echo=lambda *_: None)
    assert snapshot(map_dir) == original  # out_dir given: the original is untouched
    out = tmp_path / "fixed"
    assert sorted(p.name for p in out.iterdir()) == ["collection.json", "manifest.json", "stac", "t01.qml", "t01.tif", "t02.qml", "t02.tif"]
    # The STAC items describe the corrected files (their checksums), not the original's.
    for name in truth:
        item = json.loads((out / "stac" / f"{name}.json").read_text())
        assert item["assets"]["data"]["file:checksum"].endswith(sha256_of(out / f"{name}.tif"))
        assert item["properties"]["plantation:probability_correction"] is not None
    for name in truth:
        old, meta0 = _read(map_dir / f"{name}.tif")
        new, meta1 = _read(out / f"{name}.tif")
        for i in (0, 1, 2, 3, 6, 7):
            assert np.array_equal(old[i], new[i]), LAYERS[i][0]
        for i in (4, 5):
            assert np.array_equal(old[i] == NODATA, new[i] == NODATA)
            assert not np.array_equal(old[i], new[i])
            assert new[i][new[i] != NODATA].min() >= 0 and new[i].max() <= 10000
        ok = new[4] != NODATA
        assert (new[5][ok] <= new[4][ok]).all()  # converted after the cutoff is converted
        # Monotone: the order of pixels by p_conversion is kept (ties may form after rounding, never reverse).
        o = np.argsort(old[4][ok], kind="stable")
        assert (np.diff(new[4][ok][o].astype(np.int32)) >= 0).all()
        for k in ("scales", "offsets", "nodata", "descriptions", "dtype"):
            assert meta0[k] == meta1[k], k
        assert {k: v for k, v in meta1["tags"].items() if k != CORRECTION_TAG} == meta0["tags"]
        valid, errors, _ = cog_validate(str(out / f"{name}.tif"))
        assert valid, errors
        with rasterio.open(out / f"{name}.tif") as src:
            assert src.block_shapes[0] == (256, 256) or src.height < 256
            assert src.profile.get("compress", "").lower() == "deflate"
    m = open_map(out)  # the manifest's sha256 matches the new bytes
    assert all(t.correction is not None for t in m.tiles)


def test_in_place_keeps_the_folder_and_verifies(labelled) -> None:
    map_dir, sheet, _ = labelled
    names = sorted(p.name for p in map_dir.iterdir())
    res = run(RecalibrateConfig(map=str(map_dir), samples=str(sheet)), echo=lambda *_: None)
    # The folder gains only the STAC collection of its corrected tiles.
    assert res.in_place and sorted(p.name for p in map_dir.iterdir()) == sorted([*names, "collection.json", "stac"])
    assert open_map(map_dir).correction[RECALIBRATION] == res.correction


# ------------------------------------------------------------------ (c) recorded and said


def test_manifest_tag_farm_plots_and_report_carry_the_correction(labelled, tmp_path: Path) -> None:
    map_dir, sheet, _ = labelled
    out = tmp_path / "fixed"
    res = run(RecalibrateConfig(map=str(map_dir), samples=str(sheet), out_dir=str(out)), echo=lambda *_: None)
    lines = "\n".join(res.lines())
    assert "p_conversion" in lines and "ECE before" in lines and NOT_CORRECTED in lines
    man = json.loads((out / "manifest.json").read_text())
    for e in man["tiles"].values():
        c = e[CORRECTION_TAG][RECALIBRATION]
        assert c["method"] == METHOD and c["from"]["path"] == str(sheet) and len(c["from"]["sha256"]) == 64
        assert len(c["coef_conversion"]) == 2 and len(c["coef_after_cutoff"]) == 2 and c["n"] > 500 and c["date"][:4].isdigit()
        assert c["not_corrected"] == NOT_CORRECTED
        with rasterio.open(out / e["file"]) as src:
            assert json.loads(src.tags()[CORRECTION_TAG]) == e[CORRECTION_TAG]
        assert e["sha256"] == hashlib.sha256((out / e["file"]).read_bytes()).hexdigest()

    plots = tmp_path / "plots.geojson"
    box = shapely.box(600000.0 + 30, 200010.0 - 30 * 20, 600000.0 + 30 * 20, 200010.0 - 30)
    feature = {"type": "Feature", "properties": {"id": "A"}, "geometry": shapely.geometry.mapping(box)}
    plots.write_text(json.dumps({"type": "FeatureCollection", "crs": {"type": "name", "properties": {"name": CRS}}, "features": [feature]}))
    for m, says in ((map_dir, NO_CORRECTION), (out, METHOD)):
        pout = tmp_path / f"plots_{m.name}"
        r = check_plots(PlotsConfig(plots=str(plots), map=str(m), out_dir=str(pout), progress=False))
        assert any(says in line for line in r.lines())
        doc = json.loads((pout / "plots.json").read_text())
        if m == out:
            assert doc["probability_correction"][RECALIBRATION]["n"] == res.n and METHOD in doc["probability_correction_text"]
        else:
            assert "probability_correction" not in doc  # absent: none
        page = build_report(pout, map_dir=m).read_text()
        assert "map probabilities" in page and says.replace("'", "&#x27;") in page


# ------------------------------------------------------------------ (d) refusals, all or nothing


def _refused(map_dir: Path, cfg: RecalibrateConfig, message: str) -> None:
    before = snapshot(map_dir)
    with pytest.raises(PlantationError, match=message) as info:
        run(cfg, echo=lambda *_: None)
    assert "\n" not in str(info.value)
    assert snapshot(map_dir) == before
    assert not [p for p in map_dir.iterdir() if p.name.startswith(".") or "partial" in p.name]


def test_refuses_a_sample_of_another_map(labelled, tmp_path: Path) -> None:
    map_dir, sheet, _ = labelled
    write_map(tmp_path / "other", seed=9)
    _refused(tmp_path / "other", RecalibrateConfig(map=str(tmp_path / "other"), samples=str(sheet)), "differ from those the sample was drawn from")


def test_refuses_one_outcome_and_too_few_points(labelled) -> None:
    map_dir, sheet, _ = labelled
    _refused(map_dir, RecalibrateConfig(map=str(map_dir), samples=str(sheet), min_points=100000), "fewer than min_points=100000")
    t = pd.read_csv(sheet, dtype=str, keep_default_na=False)
    t["label"], t["onset_year"] = "stable_forest", ""
    t.to_csv(sheet, index=False)
    _refused(map_dir, RecalibrateConfig(map=str(map_dir), samples=str(sheet)), f"{sheet}: cannot recalibrate p_conversion: .*both outcomes")


def test_refuses_an_already_recalibrated_map_and_an_occupied_out_dir(labelled, tmp_path: Path) -> None:
    map_dir, sheet, _ = labelled
    out = tmp_path / "fixed"
    run(RecalibrateConfig(map=str(map_dir), samples=str(sheet), out_dir=str(out)), echo=lambda *_: None)
    _refused(out, RecalibrateConfig(map=str(out), samples=str(sheet)), "already carries a correction .*recalibrate the original map")
    _refused(map_dir, RecalibrateConfig(map=str(map_dir), samples=str(sheet), out_dir=str(out)), "out_dir already holds a map")


def test_a_folder_another_run_holds_is_refused_in_one_line_and_left_as_it_was(labelled, tmp_path: Path) -> None:
    from plantation.mapping.guard import LOCK_NAME, FolderBusyError, FolderLock

    map_dir, sheet, _ = labelled
    before = snapshot(map_dir)
    # Held as a mapping run holds its out_dir: correcting that map in place is refused, nothing of it changes.
    with FolderLock(map_dir):
        with pytest.raises(FolderBusyError, match=rf"^out_dir: {map_dir} is in use: another run \(plantation map, pid \d+ on .*\) holds it; wait for that run to end, then recalibrate$") as info:
            run(RecalibrateConfig(map=str(map_dir), samples=str(sheet)), echo=lambda *_: None)
        assert "\n" not in str(info.value)
        assert {k: v for k, v in snapshot(map_dir).items() if k != LOCK_NAME} == before
        assert sorted(p.name for p in map_dir.iterdir() if p.name.startswith(".")) == [LOCK_NAME]
        # A held out_dir elsewhere too: nothing is written into it.
        out = tmp_path / "fixed"
        out.mkdir()
        with FolderLock(out), pytest.raises(FolderBusyError, match=str(out)):
            run(RecalibrateConfig(map=str(map_dir), samples=str(sheet), out_dir=str(out)), echo=lambda *_: None)
        assert [p.name for p in out.iterdir()] == []
    # Released, the same correction goes through and leaves no lock behind.
    res = run(RecalibrateConfig(map=str(map_dir), samples=str(sheet)), echo=lambda *_: None)
    assert res.in_place and not (map_dir / LOCK_NAME).exists()
    assert open_map(map_dir).correction[RECALIBRATION] == res.correction


def test_a_map_whose_manifest_changed_after_it_was_read_is_not_written(labelled) -> None:
    # A mapping run that finished between the fit's read and the lock: the fit's tiles are no longer the map's.
    from plantation.assessment.recalibrate import write_corrected
    from plantation.mapping.guard import LOCK_NAME

    map_dir, _, _ = labelled
    mapped = open_map(map_dir)
    man = json.loads((map_dir / "manifest.json").read_text())
    man["tiles"]["t01"]["sha256"] = "0" * 64
    (map_dir / "manifest.json").write_text(json.dumps(man))
    before = snapshot(map_dir)
    with pytest.raises(PlantationError, match=r"manifest.json: the map changed while recalibrating"):
        write_corrected(mapped, map_dir, {"method": METHOD, "coef_conversion": [0.0, 1.0], "coef_after_cutoff": [0.0, 1.0], "n": 2})
    assert snapshot(map_dir) == before and not (map_dir / LOCK_NAME).exists()


def test_a_failure_midway_leaves_the_map_as_it_was(labelled, tmp_path: Path, monkeypatch) -> None:
    import plantation.assessment.recalibrate as job

    map_dir, sheet, _ = labelled
    calls = []

    def failing(src: Path, dest: Path) -> None:
        calls.append(dest)
        if len(calls) == 2:
            raise OSError("disk full")
        write_cog(src, dest)

    monkeypatch.setattr(job, "write_cog", failing)
    for out_dir in (None, str(tmp_path / "new")):
        calls.clear()
        before = snapshot(map_dir)
        with pytest.raises(OSError, match="disk full"):
            run(RecalibrateConfig(map=str(map_dir), samples=str(sheet), out_dir=out_dir), echo=lambda *_: None)
        assert snapshot(map_dir) == before
        assert not (tmp_path / "new").exists()
    open_map(map_dir)

    # A failure while putting the files in place puts the originals back.
    monkeypatch.setattr(job, "write_cog", write_cog)
    real_replace = job.os.replace

    def replace(a: Any, b: Any) -> None:
        if Path(a).name == ".manifest.json.partial":  # the last step of the commit; the tiles are in place by then
            raise OSError("replace failed")
        real_replace(a, b)

    monkeypatch.setattr(job.os, "replace", replace)
    before = snapshot(map_dir)
    with pytest.raises(OSError, match="replace failed"):
        run(RecalibrateConfig(map=str(map_dir), samples=str(sheet)), echo=lambda *_: None)
    monkeypatch.undo()
    assert snapshot(map_dir) == before
    open_map(map_dir)


# ------------------------------------------------------------------ the command


def test_command_recalibrates_and_refuses_in_one_line(labelled, tmp_path: Path) -> None:
    map_dir, sheet, _ = labelled
    out = tmp_path / "fixed"
    res = subprocess.run([COMMAND, "recalibrate", f"map={map_dir}", f"samples={sheet}", f"out_dir={out}"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert "p_conversion" in res.stdout and "ECE before" in res.stdout and "not corrected:" in res.stdout and str(out) in res.stdout
    open_map(out)
    again = subprocess.run([COMMAND, "recalibrate", f"map={out}", f"samples={sheet}"], cwd=ROOT, capture_output=True, text=True, timeout=300)
    lines = again.stderr.strip().splitlines()
    assert again.returncode == 1 and len(lines) == 1 and lines[0].startswith("error: ") and "already carries a correction" in lines[0], again.stderr


# ------------------------------------------------------------------ (e) in place equals from the start


def _mapped(model: Path, region: Any, out: Path, **kw: Any) -> Path:
    from plantation.mapping.job import MapConfig
    from plantation.mapping.job import run as map_region

    map_region(MapConfig(region=region, model=str(model), out_dir=str(out), window=16, min_clear=1, progress=False, quicklook=False, **kw))
    return out


def test_a_map_recalibrated_in_place_equals_one_mapped_with_the_correction_from_the_start(tmp_path: Path, make_region) -> None:
    """A logistic recalibration acts on p_conversion and p_after_cutoff alone, so a written map can take it without the network.

    The other bands are where the correction does not reach (NOT_CORRECTED):
    they must be byte-for-byte what the network wrote, in both maps.
    """
    from plantation.assessment.recalibrate import write_corrected
    from tests.test_priors import _cal, _save

    rng = np.random.default_rng(5)
    values = (np.array([300, 500, 250, 3500, 1800, 700], np.int16)[None, :, None, None] + rng.integers(-250, 250, (5, 6, 24, 24))).astype(np.int16)
    region = make_region(values=values)
    model = _save(tmp_path / "model", _cal())
    first = _mapped(model, region, tmp_path / "first")
    original = {t.name: _read(t.path)[0] for t in open_map(first).tiles}
    correction = {"method": METHOD, "coef_conversion": [-1.2, 0.8], "coef_after_cutoff": [-0.4, 1.3], "n": 321, "date": "2026-01-01T00:00:00+00:00", "not_corrected": NOT_CORRECTED}
    write_corrected(open_map(first), first, correction)

    fresh = _mapped(model, region, tmp_path / "fresh", recalibration=str(first))
    a, b = open_map(first), open_map(fresh)
    assert [t.name for t in a.tiles] == [t.name for t in b.tiles]
    for ta, tb in zip(a.tiles, b.tiles, strict=True):
        got_a, meta_a = _read(ta.path)
        got_b, meta_b = _read(tb.path)
        np.testing.assert_array_equal(got_a, got_b)
        assert json.loads(meta_a["tags"][CORRECTION_TAG]) == json.loads(meta_b["tags"][CORRECTION_TAG])
        assert ta.correction == tb.correction and tb.correction[RECALIBRATION]["coef_conversion"] == [-1.2, 0.8]
        before = original[ta.name]
        ok = before[4] != NODATA
        # The correction did something: p_conversion moved, every other band as the network wrote it.
        assert ok.any() and (got_b[4][ok] != before[4][ok]).mean() > 0.5
        np.testing.assert_array_equal(np.delete(got_b, [4, 5], axis=0), np.delete(before, [4, 5], axis=0))
    # Mapping again with the correction resumes nothing from a map without it.
    assert b.correction[RECALIBRATION] == correction


def test_mapping_with_a_recalibration_refuses_a_map_without_one_and_another_models(tmp_path: Path, make_region) -> None:
    from tests.test_priors import _cal, _save

    region = make_region()
    model = _save(tmp_path / "model", _cal())
    plain = _mapped(model, region, tmp_path / "plain")
    with pytest.raises(PlantationError, match="carries no recalibration"):
        _mapped(model, region, tmp_path / "x", recalibration=str(plain))
    from plantation.assessment.recalibrate import write_corrected

    write_corrected(open_map(plain), plain, {"method": METHOD, "coef_conversion": [0.0, 1.0], "coef_after_cutoff": [0.0, 1.0], "n": 2})
    other = _save(tmp_path / "other", _cal(temperature=2.0))
    with pytest.raises(PlantationError, match="mapped by another model"):
        _mapped(other, region, tmp_path / "y", recalibration=str(plain))
    with pytest.raises(PlantationError, match="has cutoff year 2015, this map 2016"):
        _mapped(model, region, tmp_path / "z", recalibration=str(plain), cutoff_year=2016)
