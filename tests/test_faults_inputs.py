"""The faults benchmark's bad-input cases: how they judge an outcome, and a few run on a small region of their own."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from pyproj import Transformer

from plantation.benchmarks.faults import Ran, Workspace, all_cases
from plantation.benchmarks.faults import inputs as cases
from tests.conftest import CRS, ROOT, TRANSFORM, pixel_centre

DATES = ["2016-02-14", "2016-08-15", "2017-02-14", "2017-08-15"]


def test_cases_are_named_once_and_each_says_what_must_happen():
    names = [c.name for c in cases.CASES]
    assert len(names) >= 15 and len(set(names)) == len(names)
    assert all(c.kind == "bad_input" and c.name.startswith("input_") and len(c.what) > 20 for c in cases.CASES)
    assert set(names) <= {c.name for c in all_cases()}


def test_a_refusal_holds_only_in_one_line_naming_the_culprit_with_nothing_finished_left(tmp_path):
    line = "error: /x/labels.csv: line 2: byte 0xea is not UTF-8 text; save the file as UTF-8"
    assert cases._refusal(Ran(1, "", line + "\n", 1.0), tmp_path / "out", ["labels.csv", "line 2"]).held
    assert not cases._refusal(Ran(1, "", line, 1.0), tmp_path / "out", ["labels.csv", "line 3"]).held  # the wrong line named
    tb = cases._refusal(Ran(1, "", "Traceback (most recent call last):\n  ...\n" + line, 1.0), tmp_path / "out", ["labels.csv"])
    assert not tb.held and tb.traceback
    assert not cases._refusal(Ran(0, "", "", 1.0), tmp_path / "out", []).held  # accepted, not refused
    (tmp_path / "out").mkdir()
    (tmp_path / "out" / "survey.json").write_text("{}")
    left = cases._refusal(Ran(1, "", line, 1.0), tmp_path / "out", ["labels.csv"])
    assert not left.held and left.corrupt_outputs == 1 and left.detail["left"] == ["survey.json"]


def test_the_reference_clear_mask_reads_qa_bits_and_nodata_directly(tmp_path):
    vals = np.full((6, 2, 3), 500, np.int16)
    vals[2, 0, 1] = cases.TOY_NODATA
    qa = np.array([[0, 0, 1], [2, 4, 8]], np.int16)  # bits 0, 1, 2 set: not clear; bit 3: clear
    f = tmp_path / "d.tif"
    with rasterio.open(f, "w", driver="GTiff", width=3, height=2, count=7, dtype="int16", transform=TRANSFORM, crs=CRS, nodata=cases.TOY_NODATA) as dst:
        dst.write(np.concatenate([vals, qa[None]]))
    assert cases._clear(f).tolist() == [[True, False, False], [False, False, True]]


# ------------------------------------------------------------- on a small region


@pytest.fixture
def small(tmp_path) -> Workspace:
    """A workspace over one 96 × 160 tile of four dates, with labels, laid out like the demo region's (the cases' block fits inside)."""
    rng = np.random.default_rng(7)
    tiles = tmp_path / "ws" / "tiles"
    folder = tiles / "t01" / "imagery"
    folder.mkdir(parents=True)
    for k, d in enumerate(DATES):
        refl = rng.integers(200, 4000, (6, 96, 160)).astype(np.int16)
        qa = np.zeros((1, 96, 160), np.int16)
        qa[0, :, : 10 * (k + 1)] = 1  # some cloud on every date, never over the cases' block
        with rasterio.open(folder / f"{d}.tif", "w", driver="GTiff", width=160, height=96, count=7, dtype="int16", transform=TRANSFORM, crs=CRS, nodata=-9999, compress="deflate") as dst:
            dst.write(np.concatenate([refl, qa]))
    to_ll = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    rows = ["x,y,label,onset_year"]
    for (r, c), lab in zip([(5, 5), (20, 30), (60, 120), (90, 150)], ["stable_forest", "conversion", "other", "old_plantation"], strict=True):
        lon, lat = to_ll.transform(*pixel_centre(r, c))
        rows.append(f"{lon},{lat},{lab},{2017 if lab == 'conversion' else ''}")
    (tiles / "labels.csv").write_text("\n".join(rows) + "\n")
    region = tmp_path / "ws" / "region.yaml"
    toy = (ROOT / "configs" / "region" / "toy.yaml").read_text()
    keep = [ln for ln in toy.splitlines() if not ln.strip().startswith("- {name: t02") and not ln.strip().startswith('- {start: "2021')]
    text = "\n".join(keep).replace("../../toy_tiles/t01/imagery", str(folder)).replace(", truth: ../../toy_tiles/t01/truth.tif", "").replace("../../toy_tiles", str(tiles))
    region.write_text(text + "\n")
    return Workspace(root=tmp_path / "ws", region=region, tiles=tiles, model=tmp_path / "none", clean_map=tmp_path / "none")


@pytest.mark.slow
def test_masked_and_refused_cases_hold_on_a_small_region_and_a_wrong_count_is_caught(small, tmp_path):
    for name in ("input_saturated_values", "input_labels_not_utf8", "input_config_typo_key"):
        case = next(c for c in cases.CASES if c.name == name)
        scratch = tmp_path / name
        scratch.mkdir()
        out = case.run(small, scratch)
        assert out.held, (name, out)
    # A survey that kept the spoilt values would give a higher count than the one expected: claimed spoilt, not damaged.
    scratch = tmp_path / "claims"
    scratch.mkdir()

    def claim(files):
        spoilt = np.zeros((len(files), 96, 160), bool)
        spoilt[0, cases.BLOCK[0], cases.BLOCK[1]] = True
        return spoilt

    out = cases._masked(small, scratch, claim)
    assert not out.held and out.detail["pixels_wrong"] == 32 * 40
