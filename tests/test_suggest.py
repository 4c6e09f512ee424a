"""What to label next: scoring, the spread and spaced selection, the blind sheet, and the job on a tiny region with an untrained model."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import torch
from affine import Affine
from scipy.spatial.distance import cdist

from plantation.assessment.design import SHEET_COLUMNS, write_samples
from plantation.cli.compose import compose_job
from plantation.config import to_object
from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, RegionError
from plantation.imagery.config import LabelsConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import Grid, open_region
from plantation.model import artefact
from plantation.model.artefact import calibrated_mutual_information
from plantation.model.card import Calibration, ModelCard
from plantation.model.network import ConvRecurrentNet
from plantation.model.patches import features, read_patches
from plantation.retraining.suggest import (
    NOT_A_PROBABILITY_SAMPLE,
    SuggestConfig,
    check_config,
    draw_candidates,
    group_names,
    predictive_entropy,
    read_sheet_pixels,
    run,
    score_pixels,
    select,
    sheet,
)
from tests.conftest import BANDS, CRS, write_stack

# --- pure parts --------------------------------------------------------------------------------


def test_entropy_matches_hand_computed_values():
    k = 7
    assert predictive_entropy(np.full(k, 1 / k)) == pytest.approx(np.log(k))
    assert predictive_entropy(np.array([1.0, 0.0, 0.0])) == 0.0  # 0 ln 0 = 0, not NaN
    assert predictive_entropy(np.array([[0.5, 0.25, 0.25]])) == pytest.approx([1.5 * np.log(2)])


def _scattered(m: int, seed: int, size: float = 200.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    return rng.random(m), np.floor(rng.random(m) * size), np.floor(rng.random(m) * size)


def test_picks_keep_the_minimum_distance_from_each_other_and_from_labels():
    s, x, y = _scattered(3000, 0)
    lx, ly = np.array([50.0, 120.0, 10.0]), np.array([50.0, 30.0, 190.0])
    # The best candidates sit right next to the labels: they must not be taken.
    s[:3], x[:3], y[:3] = 10.0, lx + 1, ly
    sel = select(s, x, y, np.zeros(len(s)), 60, 12.0, labelled_x=lx, labelled_y=ly)
    assert len(sel.chosen) == 60 and sel.reason == ""
    px, py = x[sel.chosen], y[sel.chosen]
    d = cdist(np.c_[px, py], np.c_[px, py])
    assert d[np.triu_indices(60, 1)].min() >= 12.0
    assert cdist(np.c_[px, py], np.c_[lx, ly]).min() >= 12.0
    assert sel.spacing == pytest.approx(d[np.triu_indices(60, 1)].min()) and sel.label_distance >= 12.0
    assert not set(sel.chosen.tolist()) & {0, 1, 2}
    # Greedy: the first pick is the best candidate that is free.
    free = np.flatnonzero(cdist(np.c_[x, y], np.c_[lx, ly]).min(1) >= 12.0)
    assert sel.chosen[0] == free[np.argmax(s[free])]
    # A shorter distance from the labels than between picks (dense labels): the best ones, 1 px off a label, come in.
    near = select(s, x, y, np.zeros(len(s)), 60, 12.0, labelled_x=lx, labelled_y=ly, label_distance=1.0)
    assert near.chosen[0] == 0 and near.label_distance == 1.0
    px, py = x[near.chosen], y[near.chosen]
    assert cdist(np.c_[px, py], np.c_[px, py])[np.triu_indices(60, 1)].min() >= 12.0


def test_never_picks_a_labelled_or_unscored_pixel_even_without_spacing():
    s = np.array([9.0, np.nan, 5.0, 1.0, 0.5])  # index 1: nodata (not scored)
    x = np.array([0.0, 3.0, 6.0, 9.0, 12.0])
    y = np.zeros(5)
    sel = select(s, x, y, ["a"] * 5, 5, 0.0, labelled_x=np.array([0.0]), labelled_y=np.array([0.0]))
    assert sorted(sel.chosen.tolist()) == [2, 3, 4]
    assert "only 3 of 5" in sel.reason and "1 not scored" in sel.reason and "1 too near a labelled point" in sel.reason
    # Two candidates on one pixel: one point, even with min_distance 0.
    sel = select(np.array([2.0, 1.0]), np.array([4.0, 4.0]), np.array([4.0, 4.0]), ["a", "a"], 2, 0.0)
    assert sel.chosen.tolist() == [0]


def test_round_robin_gives_a_rare_group_picks_despite_lower_scores():
    rng = np.random.default_rng(1)
    common = 200
    s = np.concatenate([1.0 + rng.random(common), [0.1, 0.05, 0.02]])  # three rare candidates, scoring far lower
    x = np.concatenate([rng.integers(0, 400, common), [500.0, 520.0, 540.0]]).astype(float)
    y = np.concatenate([rng.integers(0, 400, common), [0.0, 0.0, 0.0]]).astype(float)
    groups = np.array(["stable_forest"] * common + ["conversion_2014"] * 3, dtype=object)
    sel = select(s, x, y, groups, 10, 5.0)
    assert sel.picked == {"conversion_2014": 3, "stable_forest": 7} and sel.available == {"conversion_2014": 3, "stable_forest": common}
    # The rare group's picks come in the first rounds, one each, not after the common group is served.
    rare_at = [k for k, i in enumerate(sel.chosen) if i >= common]
    assert rare_at == [1, 3, 5]
    # One group (spread none): by score alone, the rare candidates are never reached.
    flat = select(s, x, y, np.zeros(len(s)), 10, 5.0)
    assert (flat.chosen < common).all()


def test_groups_follow_the_maps_class_and_year():
    label = np.array([1, 2, 2, 3, 4, 0])
    year = np.array([0, 2014, 2016, 0, 0, 0])
    assert group_names(label, year, "year").tolist() == ["stable_forest", "conversion_2014", "conversion_2016", "old_plantation", "other", "no_data"]
    assert group_names(label, year, "class").tolist() == ["stable_forest", "conversion", "conversion", "old_plantation", "other", "no_data"]
    assert set(group_names(label, year, "none")[:5]) == {"all"}
    with pytest.raises(ConfigError, match="spread: 'years'"):
        group_names(label, year, "years")


def test_returns_fewer_than_n_with_a_reason_when_space_runs_out():
    gx, gy = np.meshgrid(np.arange(5.0), np.arange(5.0))
    s = np.arange(25.0)
    sel = select(s, gx.ravel(), gy.ravel(), np.zeros(25), 5, 4.5)
    # In a 5 x 5 block, points 4.5 px apart: after the best, (4, 4), the best 4.5 px away is (0, 1); nothing is 4.5 px from both.
    assert sel.chosen.tolist() == [24, 5]
    assert sel.reason.startswith("only 2 of 5 points fit at least 4.5 px apart")


def test_bad_arguments_are_refused_naming_the_key():
    with pytest.raises(ConfigError, match="^n: 0"):
        select(np.ones(3), np.zeros(3), np.arange(3.0), np.zeros(3), 0, 1.0)
    with pytest.raises(ConfigError, match="^min_distance_px: -1"):
        select(np.ones(3), np.zeros(3), np.arange(3.0), np.zeros(3), 2, -1.0)
    with pytest.raises(ValueError, match="lengths 3, 3, 2, 3"):
        select(np.ones(3), np.zeros(3), np.arange(2.0), np.zeros(3), 2, 1.0)
    refusals = [
        ({"n": 0}, "^n: 0"),
        ({"candidates": 50, "n": 100}, "^candidates: 50 is fewer than n"),
        ({"min_distance_px": -2.0}, "^min_distance_px"),
        ({"spread": "x"}, "^spread"),
        ({"epistemic_weight": -1.0}, "^epistemic_weight"),
        ({"min_clear": 0}, "^min_clear"),
        ({"label_distance_px": -1.0}, "^label_distance_px"),
    ]
    for kw, match in refusals:
        with pytest.raises(ConfigError, match=match):
            check_config(SuggestConfig(**kw))  # type: ignore[arg-type]


def _grids() -> dict[str, Grid]:
    from rasterio.crs import CRS as RCRS

    return {
        "a": Grid(RCRS.from_string(CRS), Affine(30.0, 0, 600000.0, 0, -30.0, 200010.0), 100, 100),
        "b": Grid(RCRS.from_string(CRS), Affine(30.0, 0, 603000.0, 0, -30.0, 200010.0), 10, 10),
    }


def test_candidates_are_distinct_seeded_and_spread_by_tile_size():
    grids = _grids()
    t, r, c = draw_candidates(grids, 2020, seed=4)
    t2, r2, c2 = draw_candidates(grids, 2020, seed=4)
    assert (t == t2).all() and (r == r2).all() and (c == c2).all()
    t3, r3, _ = draw_candidates(grids, 2020, seed=5)
    assert not ((t == t3).all() and (r == r3).all())
    keys = set(zip(t, r, c, strict=True))
    assert len(keys) == 2020  # without replacement
    assert ((r >= 0) & (c >= 0)).all() and (r[t == "b"] < 10).all() and (r[t == "a"] < 100).all()
    assert 5 <= (t == "b").sum() <= 40  # about 20 of 2020 (100 of 10,100 pixels)
    # More than the region holds: every pixel once.
    t, _, _ = draw_candidates(grids, 50_000, seed=0)
    assert len(t) == 10_100


def test_sheet_has_the_validation_samples_columns_only_in_random_order(tmp_path):
    grids = _grids()
    tiles = np.array(["a"] * 30 + ["b"] * 2, dtype=object)
    rows, cols = np.arange(32) % 10, np.arange(32) // 4
    table, perm = sheet(grids, tiles, rows, cols, seed=0)
    assert list(table.columns) == list(SHEET_COLUMNS)
    assert table["point_id"].tolist() == [f"S{i:05d}" for i in range(1, 33)]
    assert (table["row"].to_numpy() == rows[perm]).all() and (table["tile"].to_numpy() == tiles[perm]).all()
    assert not (perm == np.arange(32)).all()  # the pick order does not show
    assert (table[["label", "onset_year", "confidence", "interpreter", "note"]] == "").all().all()
    assert table["pixel_ha"].to_numpy() == pytest.approx(0.09)  # 30 m pixels
    x, y = grids["b"].transform * (cols[30] + 0.5, rows[30] + 0.5)
    at = int(np.flatnonzero(perm == 30)[0])
    assert (table["x"][at], table["y"][at]) == (x, y) and table["crs"][at] == CRS
    assert 100 < table["lon"][at] < 120 and 0 < table["lat"][at] < 3  # UTM 50N near the equator
    csv, gpkg = write_samples(table, tmp_path, stem="suggestions")
    assert (csv.name, gpkg.name) == ("suggestions.csv", "suggestions.gpkg")
    assert list(pd.read_csv(csv).columns) == list(SHEET_COLUMNS)
    import pyogrio

    assert [name for name, _ in pyogrio.list_layers(gpkg)] == ["suggestions"]
    assert not list(tmp_path.glob("*partial*"))


def test_config_composes_with_the_regions_run_and_folder():
    cfg = to_object(compose_job("suggest", ["n=30"], verb="suggest"), SuggestConfig)
    check_config(cfg)
    name = cfg.region.name
    assert cfg.n == 30 and cfg.model == f"outputs/train/{name}_seed0" and cfg.out_dir == f"outputs/suggest/{name}"
    assert cfg.labels is None and cfg.avoid == [] and cfg.min_clear == 4 and cfg.spread == "year"
    with pytest.raises(ConfigError, match="mindistance"):
        compose_job("suggest", ["mindistance=3"], verb="suggest")


# --- with a tiny artefact, untrained ----------------------------------------------------------

DATES = ["2015-03-01", "2015-06-01", "2015-09-01", "2015-12-01", "2016-03-01", "2016-06-01", "2016-09-01", "2016-12-01"]
INDICES = ["NDVI", "EVI", "NBR", "NDMI"]
SPEC = {"n_channels": 10, "date_year": [0, 0, 0, 0, 1, 1, 1, 1], "day_of_year": [0.16, 0.41, 0.66, 0.91] * 2, "neighbourhood": 5, "conv_width": 6, "hidden": 8, "dropout": 0.0}
SHAPES = [(37, 45), (29, 21)]
LABELLED = [("t0", 10, 10), ("t0", 20, 30), ("t1", 5, 5)]


def _values(h: int, w: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Forest-like stored values with a block cleared from the fifth date, random clouds, and a corner never clear enough."""
    rng = np.random.default_rng(seed)
    base = np.array([300, 500, 250, 3500, 1800, 700], np.int16)
    v = np.broadcast_to(base[None, :, None, None], (len(DATES), 6, h, w)).copy()
    v[4:, :, : h // 2, : w // 3] = np.array([900, 1100, 1300, 2000, 2800, 2100], np.int16)[:, None, None]
    v += rng.integers(-60, 60, v.shape).astype(np.int16)
    qa = (rng.random((len(DATES), h, w)) < 0.2).astype(np.int16)
    qa[:6, h - 8 :, w - 8 :] = 1  # an 8 x 8 corner seen on two dates only: nodata under min_clear=4
    return v, qa


@pytest.fixture
def region(tmp_path: Path) -> RegionConfig:
    tiles = []
    for i, (h, w) in enumerate(SHAPES):
        v, qa = _values(h, w, seed=i)
        tr = Affine(30.0, 0.0, 600000.0 + i * 45 * 30.0, 0.0, -30.0, 200010.0)
        write_stack(tmp_path / f"t{i}", DATES, v, qa, transform=tr)
        tiles.append(TileConfig(name=f"t{i}", path=str(tmp_path / f"t{i}")))
    rows = []
    for name, r, c in LABELLED:
        i = int(name[1])
        x, y = Affine(30.0, 0.0, 600000.0 + i * 45 * 30.0, 0.0, -30.0, 200010.0) * (c + 0.5, r + 0.5)
        rows.append({"x": x, "y": y, "label": "conversion" if r == 10 else "stable_forest", "onset_year": 2016 if r == 10 else ""})
    pd.DataFrame(rows).to_csv(tmp_path / "labels.csv", index=False)
    return RegionConfig(
        name="tinysuggest",
        tiles=tiles,
        bands=BANDS,
        nodata=-9999,
        mask=MaskConfig(band=7, invalid_bits=[0]),
        scaling=[ScalingRule(None, 1e-4, 0.0)],
        labels=LabelsConfig(path=str(tmp_path / "labels.csv"), crs=CRS),
        chunk=16,
    )


def _model(folder: Path, members: int = 2) -> Path:
    nets = []
    for i in range(members):
        torch.manual_seed(10 + i)
        nets.append(ConvRecurrentNet(**SPEC).eval())
    card = ModelCard(
        bands=BANDS,
        indices=INDICES,
        scaling=[{"start": None, "scale": 1e-4, "offset": 0.0}],
        dates=DATES,
        years=[2015, 2016],
        network=SPEC,
        members=members,
        calibration=Calibration(temperature=0.5, loss_weights=[1.0] * 5, train_prior=[0.4, 0.2, 0.2, 0.1, 0.1]),
        cutoff_year=2015,
        interval_level=0.8,
        region="tinysuggest",
        labels_fingerprint="x",
        package_version="0",
    )
    return artefact.save(folder, card, nets)


def _cfg(region: RegionConfig, model: Path, out: Path, **kw: object) -> SuggestConfig:
    base = {"region": region, "model": str(model), "out_dir": str(out), "n": 25, "candidates": 900, "min_distance_px": 4.0, "batch": 128, "progress": False}
    base.update(kw)
    return SuggestConfig(**base)  # type: ignore[arg-type]


def test_scores_are_the_calibrated_entropy_and_the_members_disagreement(region, tmp_path):
    art = artefact.load(_model(tmp_path / "m2"))
    stacks = open_region(region)
    tiles = np.array(["t0", "t0", "t1", "t1"], dtype=object)
    rows, cols = np.array([0, 20, 3, 28]), np.array([0, 44, 4, 20])
    ps = score_pixels(art, stacks, tiles, rows, cols, batch=3, min_clear=4)
    # The last pixel lies in tile t1's cloudy corner: not scored.
    assert ps.clear[3] < 4 and np.isnan(ps.entropy[3]) and ps.label[3] == 0
    assert ps.scored.tolist() == [True, True, True, False]
    for i in range(3):
        refl, valid = read_patches(stacks[int(tiles[i][1])], rows[i : i + 1], cols[i : i + 1], 5)
        x, v = torch.from_numpy(features(refl, BANDS, INDICES)), torch.from_numpy(valid)
        with torch.inference_mode():
            z = torch.stack([m(x, v) for m in art.members])
        p = art.calibrated_log_probs(z).exp().numpy()
        assert ps.entropy[i] == pytest.approx(float(-(p * np.log(p)).sum()), rel=1e-5)
        assert ps.epistemic[i] == pytest.approx(float(calibrated_mutual_information(z, art.card.calibration)[0]), rel=1e-5, abs=1e-9)
        assert ps.clear[i] == valid[0, :, 2, 2].sum()
    assert (ps.epistemic[:3] > 0).all()
    assert ps.score(2.0)[:3] == pytest.approx(ps.entropy[:3] + 2 * ps.epistemic[:3])
    # One member and no distilled network: no epistemic term.
    one = artefact.load(_model(tmp_path / "m1", members=1))
    assert (score_pixels(one, stacks, tiles[:3], rows[:3], cols[:3]).epistemic == 0).all()


def test_the_job_writes_a_blind_sheet_away_from_labels_and_nodata(region, tmp_path):
    model = _model(tmp_path / "model")
    out = tmp_path / "out"
    result = run(_cfg(region, model, out))
    assert {p.name for p in out.iterdir()} == {"suggestions.csv", "suggestions.gpkg", "suggestions.json"}
    table = pd.read_csv(out / "suggestions.csv")
    assert list(table.columns) == list(SHEET_COLUMNS) and len(table) == result.picked == 25
    assert table["point_id"].tolist() == [f"S{i:05d}" for i in range(1, 26)]
    assert table[["label", "onset_year", "confidence", "interpreter", "note"]].isna().all().all()
    # Region-wide pixel coordinates: never on or within 4 px of a label, nor of each other.
    pts = np.c_[table["x"] / 30.0, table["y"] / 30.0]
    lab = []
    for name, r, c in LABELLED:
        i = int(name[1])
        lab.append(np.array(Affine(30.0, 0.0, 600000.0 + i * 45 * 30.0, 0.0, -30.0, 200010.0) * (c + 0.5, r + 0.5)) / 30.0)
    assert cdist(pts, np.array(lab)).min() >= 4.0
    assert cdist(pts, pts)[np.triu_indices(len(pts), 1)].min() >= 4.0
    # Never a nodata pixel: none in the cloudy corners, and some were dropped there.
    for (h, w), name in zip(SHAPES, ("t0", "t1"), strict=True):
        on = table[table["tile"] == name]
        assert not ((on["row"] >= h - 8) & (on["col"] >= w - 8)).any()
    assert result.dropped_nodata > 0 and result.dropped_labelled > 0
    assert result.drawn == 900 and result.scored == 900 - result.dropped_nodata - result.dropped_labelled
    doc = json.loads((out / "suggestions.json").read_text())
    assert doc["kind"] == "plantation-suggestions/1" and "not a probability sample" in doc["not_a_probability_sample"]
    assert doc["model_dir"] == str(model) and len(doc["labels_fingerprint"]) == 64 and doc["settings"]["n"] == 25
    assert [q["point_id"] for q in doc["points"]] == table["point_id"].tolist()
    assert sorted(q["rank"] for q in doc["points"]) == list(range(1, 26))
    for q, row in zip(doc["points"], table.itertuples(), strict=True):
        assert (q["tile"], q["row"], q["col"]) == (row.tile, row.row, row.col)
        assert q["score"] == pytest.approx(q["entropy"] + q["epistemic"], abs=2e-6)
    assert sum(doc["counts"]["picked_by_group"].values()) == 25
    assert doc["counts"]["picked_by_group"] == result.selection.picked
    # Every group with candidates gets picks (the rounds reach all of them before n runs out).
    assert all(k >= 1 for k in result.selection.picked.values())
    text = "\n".join(result.lines())
    assert "picked 25 of 25" in text and NOT_A_PROBABILITY_SAMPLE in text and "suggestions.gpkg" in text
    # The same seed gives the same sheet; another seed another.
    again = tmp_path / "again"
    run(_cfg(region, model, again))
    assert (again / "suggestions.csv").read_bytes() == (out / "suggestions.csv").read_bytes()
    other = tmp_path / "other"
    run(_cfg(region, model, other, seed=1))
    assert (other / "suggestions.csv").read_bytes() != (out / "suggestions.csv").read_bytes()


def test_the_job_keeps_away_from_a_validation_sheet_and_says_when_space_runs_out(region, tmp_path):
    model = _model(tmp_path / "model")
    first = run(_cfg(region, model, tmp_path / "a", n=10))
    avoid = tmp_path / "a" / "suggestions.csv"
    second = run(_cfg(region, model, tmp_path / "b", n=10, avoid=[str(avoid)], min_distance_px=3.0))
    a, b = pd.read_csv(avoid), pd.read_csv(tmp_path / "b" / "suggestions.csv")
    assert first.picked == second.picked == 10
    assert cdist(np.c_[a["x"], a["y"]] / 30.0, np.c_[b["x"], b["y"]] / 30.0).min() >= 3.0
    # Far more points than fit 20 px apart in two small tiles: what fits, and why not more.
    tight = run(_cfg(region, model, tmp_path / "c", n=200, min_distance_px=20.0))
    assert 1 <= tight.picked < 200 and "raise candidates, or lower min_distance_px or label_distance_px" in "\n".join(tight.lines())
    assert len(pd.read_csv(tmp_path / "c" / "suggestions.csv")) == tight.picked


def test_the_job_refuses_a_missing_model_an_unfit_region_and_a_foreign_sheet(region, tmp_path):
    with pytest.raises(InputNotFoundError, match="nowhere: no model here"):
        run(_cfg(region, tmp_path / "nowhere", tmp_path / "out"))
    model = _model(tmp_path / "model")
    card = json.loads((model / "model.json").read_text())
    (model / "model.json").write_text(json.dumps(card | {"bands": ["red", "nir", "blue", "green", "swir1", "swir2"]}))
    with pytest.raises(RegionError, match="tile 't0': bands"):
        run(_cfg(region, model, tmp_path / "out"))
    model = _model(tmp_path / "model")
    bad = tmp_path / "sheet.csv"
    bad.write_text("point_id,tile,row,col\nP00001,t9,1,1\n")
    with pytest.raises(FileFormatError, match="sheet.csv: line 2: tile 't9'"):
        run(_cfg(region, model, tmp_path / "out", avoid=[str(bad)]))
    bad.write_text("x,y\n1,2\n")
    with pytest.raises(FileFormatError, match=r"no column\(s\) \['tile', 'row', 'col'\]"):
        read_sheet_pixels(bad, {})
    assert not (tmp_path / "out").exists()  # nothing written by a refused run


def test_patches_read_by_block_equal_the_training_patches_at_edges_and_corners(region):
    from plantation.model.patches import read_patches
    from plantation.retraining.suggest import read_patches_by_block

    stack = open_region(region)[0]  # 37 x 45
    rng = np.random.default_rng(2)
    rows = np.concatenate([[0, 0, 36, 36, 18], rng.integers(0, 37, 60)])
    cols = np.concatenate([[0, 44, 0, 44, 22], rng.integers(0, 45, 60)])
    ref_r, ref_v = read_patches(stack, rows, cols, 5)
    seen = np.zeros(len(rows), int)
    for pos, refl, valid in read_patches_by_block(stack, rows, cols, 5, block=8):
        seen[pos] += 1
        np.testing.assert_array_equal(valid, ref_v[pos])
        np.testing.assert_array_equal(refl, ref_r[pos])  # NaN in the same places, outside the tile too
    assert (seen == 1).all()
