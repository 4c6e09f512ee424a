"""The farm-plot benchmark on tiny truth rasters built in code, with answers counted by hand.

Sources: pixel-centre rasterisation (a pixel belongs to a polygon when its
centre lies inside it, GDAL's and rasterio's default, ``all_touched=False``);
pixel area 30 m × 30 m = 900 m² = 0.09 ha (common practice).
"""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path

import numpy as np
import pytest
import rasterio
import shapely
from affine import Affine
from pyproj import CRS as ProjCRS
from pyproj import Transformer

from plantation import records
from plantation.benchmarks.plotcheck import PlotCheckConfig, categorise, compare, pixel_area_m2, plot_truths, run, truth_of
from plantation.cli import main
from plantation.errors import InputNotFoundError, PlantationError
from plantation.farmplots.cutoff import KIND, PlotRow, VerdictConfig, _record, read_plots, read_plots_json, write_outputs
from plantation.imagery.config import RegionConfig, TileConfig
from plantation.mapping.folder import file_digest

CRS = "EPSG:32650"
#: 30 m pixels in UTM zone 50N (a fictional place); t02 lies right east of t01.
T01 = Affine(30.0, 0.0, 600000.0, 0.0, -30.0, 200010.0)
T02 = Affine(30.0, 0.0, 600000.0 + 12 * 30.0, 0.0, -30.0, 200010.0)
SIZE = 12
CUTOFF = 2020
PIXEL_HA = 0.09

#: Plots as pixel rectangles (r0, c0, r1, c1) on t01's grid (columns ≥ 12 lie on t02).
BOXES = {
    "A": (0, 0, 3, 3),  # untouched forest
    "B": (0, 4, 3, 7),  # 4 px converted 2022, 2 px converted 2018
    "C": (0, 8, 3, 11),  # 1 px converted 2021: below review_min_ha
    "D": (4, 0, 7, 3),  # 3 px converted 2019
    "E": (4, 4, 7, 7),  # 5 px logged in 2017, still forest
    "F": (4, 8, 7, 11),  # untouched forest (the verdict will say review)
    "G": (8, 0, 11, 3),  # 9 px converted 2021 (the verdict will say low_evidence)
    "H": (8.6, 4.6, 11.4, 7.4),  # touches 4 × 4 px, holds 2 × 2 pixel centres
    "I": (9, 10, 11, 14),  # across the seam: 4 px on t01 (forest), 4 on t02 (converted 2021)
}
VERDICT = {"A": "low_evidence", "B": "review", "C": "low_evidence", "D": "low_evidence", "E": "review", "F": "review", "G": "low_evidence", "H": "strong_evidence", "I": "strong_evidence"}
CATEGORY = {
    "A": "untouched",
    "B": "converted_after",
    "C": "minor_after",
    "D": "converted_before_only",
    "E": "other_disturbance",
    "F": "untouched",
    "G": "converted_after",
    "H": "converted_after",
    "I": "converted_after",
}
#: After-cutoff converted pixels inside each plot, counted by hand.
AFTER_PX = {"A": 0, "B": 4, "C": 1, "D": 0, "E": 0, "F": 0, "G": 9, "H": 4, "I": 4}
AREA_PX = {"A": 9, "B": 9, "C": 9, "D": 9, "E": 9, "F": 9, "G": 9, "H": 4, "I": 8}


def truth_bands() -> tuple[np.ndarray, np.ndarray]:
    """(5, 12, 12) int32 truth of t01 and t02: class, onset year, event, event year, parcel."""
    t1 = np.zeros((5, SIZE, SIZE), np.int32)
    t1[0] = 1  # stable forest
    t2 = t1.copy()

    def convert(t: np.ndarray, rows: slice, cols: slice, year: int, event: int = 2) -> None:
        t[0, rows, cols], t[1, rows, cols], t[2, rows, cols], t[3, rows, cols] = 2, year, event, year

    convert(t1, slice(0, 2), slice(4, 6), 2022)  # B: 4 px after
    convert(t1, slice(2, 3), slice(4, 6), 2018)  # B: 2 px before
    convert(t1, slice(1, 2), slice(9, 10), 2021)  # C: 1 px after
    convert(t1, slice(4, 5), slice(0, 3), 2019)  # D: 3 px before
    t1[2, 5, 4:7], t1[3, 5, 4:7] = 3, 2017  # E: logging, class stays forest
    t1[2, 6, 4:6], t1[3, 6, 4:6] = 3, 2017
    convert(t1, slice(8, 11), slice(0, 3), 2021, event=1)  # G: 9 px after
    convert(t1, slice(8, 12), slice(4, 8), 2023)  # H: all 16 touched px after; 4 centres inside
    convert(t2, slice(9, 11), slice(0, 2), 2021)  # I: the t02 half
    return t1, t2


def write_truth(path: Path, bands: np.ndarray, transform: Affine, crs: str = CRS) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    prof = {"driver": "GTiff", "width": SIZE, "height": SIZE, "count": 5, "dtype": "int32", "crs": crs, "transform": transform}
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(bands)
    return path


def pixel_box(r0: float, c0: float, r1: float, c1: float) -> shapely.Polygon:
    (xa, ya), (xb, yb) = T01 * (c0, r0), T01 * (c1, r1)
    return shapely.box(min(xa, xb), min(ya, yb), max(xa, xb), max(ya, yb))


def write_plots(path: Path, boxes: dict[str, tuple[float, ...]]) -> Path:
    """A GeoJSON of the boxes in EPSG:4326 (x = longitude), as the demo plots are stored."""
    to84 = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    feats = []
    for pid, box in boxes.items():
        g = shapely.transform(pixel_box(*box), to84.transform, interleaved=False)
        feats.append({"type": "Feature", "properties": {"id": pid}, "geometry": shapely.geometry.mapping(g)})
    path.write_text(json.dumps({"type": "FeatureCollection", "features": feats}))
    return path


def write_plots_json(out_dir: Path, plots_file: Path, verdicts: dict[str, str | None], **extra: object) -> Path:
    """plots.json through the farm-plot check's own writer; expected_after_ha = 0.1 × the plot's number in the file."""
    rows = [PlotRow(feature=k, id=pid, status="ok" if v else "outside_map", expected_after_ha=0.1 * k if v else None, verdict=v) for k, (pid, v) in enumerate(verdicts.items(), start=1)]
    doc = {
        "kind": KIND,
        "plots_file": str(plots_file),
        "plots_sha256": file_digest([plots_file]),
        "cutoff": {"date": f"{CUTOFF}-12-31", "year": CUTOFF, "straddle_year": None},
        "interval_level": 0.9,
        "thresholds": asdict(VerdictConfig()),
        "plots": [_record(r) for r in rows],
        "problems": [],
        "counts": {},
        **extra,
    }
    return write_outputs(rows, doc, out_dir)["json"]


@pytest.fixture
def bench(tmp_path: Path) -> PlotCheckConfig:
    t1, t2 = truth_bands()
    tiles = [
        TileConfig(name="t01", path=str(tmp_path / "t01" / "imagery"), truth=str(write_truth(tmp_path / "t01" / "truth.tif", t1, T01))),
        TileConfig(name="t02", path=str(tmp_path / "t02" / "imagery"), truth=str(write_truth(tmp_path / "t02" / "truth.tif", t2, T02))),
    ]
    plots = write_plots(tmp_path / "plots.geojson", BOXES)
    pj = write_plots_json(tmp_path / "assess", plots, VERDICT)
    return PlotCheckConfig(region=RegionConfig(name="tiny", tiles=tiles), plots=str(plots), plots_json=str(pj), result=str(tmp_path / "results" / "farmplots.json"))


# --------------------------------------------------------------------------- pure parts


def test_pixel_area_from_the_transform_in_a_projected_crs_only():
    assert pixel_area_m2(T01, ProjCRS.from_user_input(CRS)) == pytest.approx(900.0)
    assert pixel_area_m2(Affine(10.0, 0.0, 0.0, 0.0, -20.0, 0.0), ProjCRS.from_user_input(CRS)) == pytest.approx(200.0)
    # US survey feet: 0.3048006 m each.
    assert pixel_area_m2(Affine(100.0, 0.0, 0.0, 0.0, -100.0, 0.0), ProjCRS.from_epsg(2227)) == pytest.approx((100 * 1200 / 3937) ** 2)
    with pytest.raises(PlantationError, match="truth.tif: CRS EPSG:4326 is not projected"):
        pixel_area_m2(Affine(0.0003, 0.0, 118.0, 0.0, -0.0003, 1.5), ProjCRS.from_epsg(4326), "truth.tif")


def test_categories_at_the_review_area_boundary():
    cls, onset, event = np.array([2, 2, 1]), np.array([2021, 2022, 0]), np.array([2, 2, 0])
    area = np.full(3, 900.0)
    at = truth_of(cls, onset, event, area, cutoff_year=CUTOFF, review_min_ha=0.18)
    assert at.after_ha == pytest.approx(2 * PIXEL_HA) and at.category == "converted_after" and at.area_px == 3
    assert truth_of(cls, onset, event, area, cutoff_year=CUTOFF, review_min_ha=0.19).category == "minor_after"
    # Onset in the cutoff year itself is before the cutoff.
    assert truth_of(cls, np.array([2020, 2019, 0]), event, area, cutoff_year=CUTOFF, review_min_ha=0.1).category == "converted_before_only"
    kw = {"after_ha": 0.0, "review_min_ha": 0.1}
    assert categorise(area_px=0, any_conversion=False, any_event=False, **kw) == "no_truth"
    assert categorise(area_px=5, any_conversion=False, any_event=True, **kw) == "other_disturbance"
    assert categorise(area_px=5, any_conversion=False, any_event=False, **kw) == "untouched"
    # A review threshold of 0 still needs some after-cutoff conversion.
    assert categorise(area_px=5, any_conversion=True, any_event=True, after_ha=0.0, review_min_ha=0.0) == "converted_before_only"


def test_compare_counts_and_target_lists():
    cats = {"a": "untouched", "b": "untouched", "c": "converted_after", "d": "converted_after", "e": "minor_after"}
    cmp = compare(cats, {"a": "low_evidence", "b": "strong_evidence", "c": "low_evidence", "d": None})
    assert cmp.table == {
        "a": ("untouched", "low_evidence"),
        "b": ("untouched", "strong_evidence"),
        "c": ("converted_after", "low_evidence"),
        "d": ("converted_after", None),
        "e": ("minor_after", None),
    }
    assert cmp.counts["untouched"] == {"low_evidence": 1, "review": 0, "strong_evidence": 1, "not_measured": 0}
    assert cmp.counts["converted_after"] == {"low_evidence": 1, "review": 0, "strong_evidence": 0, "not_measured": 1}
    assert cmp.untouched_above_low_evidence == ["b"] and cmp.converted_after_at_low_evidence == ["c"]
    assert cmp.targets_met == {"no_untouched_above_low_evidence": False, "no_converted_after_at_low_evidence": False}
    ok = compare({"a": "untouched", "c": "converted_after"}, {"a": "low_evidence", "c": "review"})
    assert ok.targets_met == {"no_untouched_above_low_evidence": True, "no_converted_after_at_low_evidence": True}


# --------------------------------------------------------------------------- truth per plot


def test_truth_per_plot_by_pixel_centre_across_tiles(bench):
    truths = plot_truths(read_plots(bench.plots), bench.region.tiles, cutoff_year=CUTOFF, review_min_ha=0.1)
    assert list(truths) == list(BOXES)
    assert {pid: t.category for pid, t in truths.items()} == CATEGORY
    assert {pid: t.area_px for pid, t in truths.items()} == AREA_PX
    for pid, t in truths.items():
        assert t.after_ha == pytest.approx(AFTER_PX[pid] * PIXEL_HA, abs=1e-9), pid
    assert truths["B"].any_conversion and truths["D"].any_conversion and not truths["E"].any_conversion
    assert truths["E"].any_event and not truths["A"].any_event and not truths["F"].any_event


def test_a_tile_without_truth_is_refused(bench):
    tiles = [bench.region.tiles[0], TileConfig(name="t02", path="x")]
    with pytest.raises(PlantationError, match="region tile 't02': no truth raster"):
        plot_truths(read_plots(bench.plots), tiles, cutoff_year=CUTOFF, review_min_ha=0.1)


# --------------------------------------------------------------------------- the job


def test_run_writes_the_comparison(bench):
    res = run(bench)
    out = Path(bench.result)
    assert json.loads(out.read_text()) == res
    assert not list(out.parent.glob("*.partial"))
    assert res["cutoff_year"] == CUTOFF and res["thresholds"] == asdict(VerdictConfig())
    assert res["map_probability_correction"] is None
    by_id = {p["id"]: p for p in res["plots"]}
    assert {pid: p["category"] for pid, p in by_id.items()} == CATEGORY
    assert {pid: p["verdict"] for pid, p in by_id.items()} == VERDICT
    assert {pid: p["true_after_ha"] for pid, p in by_id.items()} == {pid: round(n * PIXEL_HA, 4) for pid, n in AFTER_PX.items()}
    assert by_id["C"]["expected_after_ha"] == pytest.approx(0.3)
    assert res["untouched_above_low_evidence"] == ["F"]
    assert res["converted_after_at_low_evidence"] == ["G"]
    assert res["targets_met"] == {"no_untouched_above_low_evidence": False, "no_converted_after_at_low_evidence": False}
    assert res["counts"]["converted_after"] == {"low_evidence": 1, "review": 1, "strong_evidence": 2, "not_measured": 0}
    assert res["counts"]["untouched"] == {"low_evidence": 1, "review": 1, "strong_evidence": 0, "not_measured": 0}
    assert sum(n for row in res["counts"].values() for n in row.values()) == len(BOXES)


def test_run_copies_the_correction_and_meets_targets_when_verdicts_agree(bench, tmp_path):
    good = VERDICT | {"F": "low_evidence", "G": "review"}
    corr = {"prior": "shares"}
    write_plots_json(tmp_path / "assess", Path(bench.plots), good, probability_correction=corr, probability_correction_text="prior: shares")
    assert read_plots_json(bench.plots_json)["probability_correction"] == corr
    res = run(bench)
    assert res["map_probability_correction"] == {"probability_correction": corr, "probability_correction_text": "prior: shares"}
    assert res["untouched_above_low_evidence"] == [] and res["converted_after_at_low_evidence"] == []
    assert res["targets_met"] == {"no_untouched_above_low_evidence": True, "no_converted_after_at_low_evidence": True}


def test_a_failed_write_leaves_the_previous_result_and_no_partial(bench, monkeypatch):
    out = Path(bench.result)
    out.parent.mkdir(parents=True)
    out.write_text('{"old": true}\n')

    def broken(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(records.os, "replace", broken)
    with pytest.raises(OSError, match="disk full"):
        run(bench)
    assert out.read_text() == '{"old": true}\n'
    assert not list(out.parent.glob("*.partial"))


def test_missing_plots_json_is_one_line_naming_it(bench, tmp_path):
    missing = tmp_path / "nowhere" / "plots.json"
    with pytest.raises(InputNotFoundError, match="run `plantation farmplots` first") as err:
        run(PlotCheckConfig(region=bench.region, plots=bench.plots, plots_json=str(missing), result=bench.result))
    assert str(err.value).startswith(str(missing.absolute())) and "\n" not in str(err.value)
    assert not Path(bench.result).exists()


def test_plots_json_of_another_plots_file_is_refused(bench, tmp_path):
    other = write_plots(tmp_path / "other.geojson", {"A": BOXES["A"]})
    with pytest.raises(PlantationError, match="written for another plots file"):
        run(PlotCheckConfig(region=bench.region, plots=str(other), plots_json=bench.plots_json, result=bench.result))
    assert not Path(bench.result).exists()


# --------------------------------------------------------------------------- the command


def write_region_file(path: Path, cfg: PlotCheckConfig) -> Path:
    tiles = "\n".join(f"  - {{name: {t.name}, path: {t.path}, truth: {t.truth}}}" for t in cfg.region.tiles)
    path.write_text(f"name: tiny\ntiles:\n{tiles}\n")
    return path


def test_the_command_writes_the_result_and_refuses_a_missing_plots_json_in_one_line(bench, tmp_path, capsys):
    region = write_region_file(tmp_path / "tiny.yaml", bench)
    args = ["benchmark-plots", f"region={region}", f"plots={bench.plots}", f"result={bench.result}"]
    assert main([*args, f"plots_json={tmp_path / 'assess'}"]) == 0
    out = capsys.readouterr().out
    assert f"written to {bench.result}" in out and "NOT met: F" in out and "NOT met: G" in out
    assert json.loads(Path(bench.result).read_text())["untouched_above_low_evidence"] == ["F"]
    with pytest.raises(SystemExit) as exit_:
        main([*args, f"plots_json={tmp_path / 'none' / 'plots.json'}"])
    assert exit_.value.code == 1
    lines = capsys.readouterr().err.strip().splitlines()
    assert lines == [f"error: {tmp_path / 'none' / 'plots.json'}: plots.json not found; run `plantation farmplots` first (or set plots_json= to the plots.json it wrote)"]


def test_the_default_config_composes_to_the_farmplots_output(capsys):
    from plantation.cli.compose import compose_job
    from plantation.config import to_object

    cfg = to_object(compose_job("benchmark_plots", [], verb="benchmark-plots"), PlotCheckConfig)
    assert cfg.plots_json == "outputs/assess/selvara_toy/plots.json" == PlotCheckConfig().plots_json
    assert [t.truth for t in cfg.region.tiles] and all(Path(t.truth).name == "truth.tif" for t in cfg.region.tiles)
    assert main(["benchmark-plots", "--help"]) == 0
    assert capsys.readouterr().out.startswith("plantation benchmark-plots: check the farm-plot verdicts")
