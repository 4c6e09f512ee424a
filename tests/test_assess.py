"""Sample design and assessment: strata, the draw, interval coverage on a simulated map, and bad inputs.

The coverage check is a simulation of the design-based property itself
(common practice: a 95% interval from a probability sample covers the true
area in about 95% of repeated samples); the population is invented here.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine

from plantation.assessment.assess import AssessConfig, check_sample, read_assessment, read_sample_table
from plantation.assessment.assess import run as assess_run
from plantation.assessment.design import BOOKKEEPING, SHEET_COLUMNS, DesignConfig, read_design, stratify, stratum_list, year_groups
from plantation.assessment.design import run as design_run
from plantation.assessment.estimators import Strata, allocate, stratified_mean
from plantation.errors import FileFormatError, InputNotFoundError, LabelError, PlantationError
from plantation.imagery.config import RegionConfig, TileConfig
from plantation.mapping.folder import LAYERS

CRS = "EPSG:32650"
YEARS = list(range(2013, 2025))


def test_year_groups_end_at_the_cutoff() -> None:
    assert year_groups(YEARS, 2020, 4) == [(2013, 2016), (2017, 2020), (2021, 2024)]
    assert year_groups(YEARS, 2020, 3) == [(2013, 2014), (2015, 2017), (2018, 2020), (2021, 2023), (2024, 2024)]
    assert year_groups(YEARS, 2024, 5) == [(2013, 2014), (2015, 2019), (2020, 2024)]


def test_stratify_buffer_and_groups() -> None:
    cls = np.ones((7, 7), np.int16)
    onset = np.zeros((7, 7), np.int16)
    cls[3, 3], onset[3, 3] = 2, 2022
    cls[0, 6], onset[0, 6] = 2, 2015
    cls[6, 0] = -32768
    cls[6, 6] = 3
    codes = stratify(cls, onset, [(2013, 2020), (2021, 2024)], buffer_px=1)
    names = [n for n, _ in stratum_list([(2013, 2020), (2021, 2024)], 1)]
    got = np.array(names, dtype=object)[codes - 1]
    assert got[3, 3] == "conversion_2021_2024" and got[0, 6] == "conversion_2013_2020"
    # The 8 neighbours of each conversion pixel are buffer; two steps away is not.
    assert (got[2:5, 2:5] == "forest_buffer").sum() == 8
    assert got[1, 3] == "stable_forest" and got[1, 5] == "forest_buffer"
    assert got[6, 0] == "no_data" and got[6, 6] == "old_plantation"


def _population(rng: np.random.Generator, size: int = 240) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A map with conversion blocks, and a truth that omits conversion mainly at the blocks' edges."""
    truth = np.zeros((size, size), bool)
    for _ in range(60):
        r, c = rng.integers(0, size - 12, 2)
        h, w = rng.integers(4, 12, 2)
        truth[r : r + h, c : c + w] = True
    mapped = truth.copy()
    # Omission: truth conversion cells next to forest are missed 40% of the time.
    from scipy.ndimage import binary_erosion

    edge = truth & ~binary_erosion(truth)
    mapped[edge & (rng.uniform(size=truth.shape) < 0.4)] = False
    # Commission: scattered false conversions.
    mapped[~truth & (rng.uniform(size=truth.shape) < 0.004)] = True
    cls = np.where(mapped, 2, 1).astype(np.int16)
    onset = np.where(mapped, 2022, 0).astype(np.int16)
    return cls, onset, truth


def test_buffer_design_intervals_cover_the_true_area() -> None:
    """Stehman-type estimation with a buffer stratum: 95% intervals cover the true area about 95% of the time."""
    rng = np.random.default_rng(42)
    cls, onset, truth = _population(rng)
    groups = [(2013, 2024)]
    codes = stratify(cls, onset, groups, buffer_px=1).ravel()
    names = stratum_list(groups, 1)
    sizes = np.bincount(codes, minlength=len(names) + 1)[1:]
    weights = sizes / sizes.sum()
    alloc = allocate(400, sizes, floor=60)
    t = truth.ravel()
    true_share = t.mean()
    # The map's own share is off (omission at edges), the estimator must not be.
    assert abs((cls == 2).mean() - true_share) > 0.005
    covered, est = 0, []
    reps = 300
    by_stratum = [np.flatnonzero(codes == k + 1) for k in range(len(names))]
    for _ in range(reps):
        idx = np.concatenate([rng.choice(p, n, replace=False) for p, n in zip(by_stratum, alloc, strict=True) if n])
        code = np.concatenate([np.full(n, k) for k, n in enumerate(alloc) if n])
        e = stratified_mean(t[idx], Strata(code=code, weight=weights), 0.95)
        covered += e.lo <= true_share <= e.hi
        est.append(e.estimate)
    assert 0.91 <= covered / reps <= 0.985
    # Unbiased: the mean of the estimates is within 3 standard errors of the truth.
    assert abs(np.mean(est) - true_share) < 3 * np.std(est) / np.sqrt(reps)


# --------------------------------------------------------------------------- a tiny mapped region on disk


def _write_map(folder: Path, cls: np.ndarray, onset: np.ndarray, truth_cls: np.ndarray, truth_onset: np.ndarray, cutoff: int = 2020) -> RegionConfig:
    """One 8-band mapped tile with manifest.json, and a truth raster, as the mapping and simulator write them."""
    folder.mkdir(parents=True, exist_ok=True)
    h, w = cls.shape
    tr = Affine(30.0, 0.0, 600000.0, 0.0, -30.0, 200010.0)
    layers = np.zeros((8, h, w), np.int16)
    layers[0], layers[1] = cls, onset
    layers[4] = np.where(cls == 2, 9000, 500)
    layers[5] = np.where((cls == 2) & (onset > cutoff), 8000, 300)
    layers[7] = 20
    tif = folder / "t1.tif"
    with rasterio.open(tif, "w", driver="GTiff", width=w, height=h, count=8, dtype="int16", crs=CRS, transform=tr, nodata=-32768) as dst:
        dst.write(layers)
        for i, (name, _, _) in enumerate(LAYERS, start=1):
            dst.set_band_description(i, name)
        dst.scales = [s for _, s, _ in LAYERS]
        dst.update_tags(cutoff_year=str(cutoff))
    conv_ha = {str(y): float(((cls == 2) & (onset == y)).sum() * 0.09) for y in YEARS}
    man = {"format": "plantation-map/1", "tiles": {"t1": {"file": "t1.tif", "sha256": hashlib.sha256(tif.read_bytes()).hexdigest(), "converted_ha": conv_ha, "tile": "t1"}}}
    (folder / "manifest.json").write_text(json.dumps(man))
    truth = folder.parent / "truth.tif"
    with rasterio.open(truth, "w", driver="GTiff", width=w, height=h, count=2, dtype="int32", crs=CRS, transform=tr) as dst:
        dst.write(np.stack([truth_cls, truth_onset]).astype(np.int32))
    return RegionConfig(name="tiny", tiles=[TileConfig(name="t1", path=str(folder), truth=str(truth))])


@pytest.fixture
def mapped(tmp_path: Path) -> tuple[RegionConfig, Path]:
    rng = np.random.default_rng(1)
    h = w = 60
    tcls = np.ones((h, w), np.int16)
    tonset = np.zeros((h, w), np.int16)
    tcls[5:25, 5:25], tonset[5:25, 5:25] = 2, 2018
    tcls[30:50, 30:55], tonset[30:50, 30:55] = 2, 2022
    tcls[:, 57:] = 4
    tcls[52:, :20] = 3
    cls, onset = tcls.copy(), tonset.copy()
    cls[30:50, 30:33] = 1  # omitted strip at an estate's edge
    onset[30:50, 30:33] = 0
    onset[5:10, 5:25] = 2019  # a year late
    cls[rng.uniform(size=(h, w)) < 0.01] = 4
    region = _write_map(tmp_path / "map", cls, onset, tcls, tonset)
    return region, tmp_path / "map"


def test_design_and_assessment_end_to_end(mapped: tuple[RegionConfig, Path], tmp_path: Path) -> None:
    region, folder = mapped
    out = tmp_path / "assess"
    lines: list[str] = []
    d = design_run(DesignConfig(region=region, map=str(folder), out_dir=str(out), min_per_stratum=20, buffer_px=2, fill_from_truth=True), echo=lines.append)
    assert any("forest_buffer" in s for s in lines) and "points" in lines[0]
    table = pd.read_csv(out / "samples.csv", dtype=str, keep_default_na=False)
    assert len(table) == d.n_total and table["point_id"].is_unique
    # The sheet is blind; the bookkeeping is in design.json, point by point in the sheet's order.
    assert list(table.columns) == list(SHEET_COLUMNS)
    points = pd.DataFrame(read_design(out / "design.json")["points"])
    assert points["point_id"].tolist() == table["point_id"].tolist()
    assert points["row"].tolist() == table["row"].astype(int).tolist() and points["col"].tolist() == table["col"].astype(int).tolist()
    for s in d.strata:
        assert (points["stratum"] == s.name).sum() == s.n
        if s.n:
            assert points.loc[points["stratum"] == s.name, "inclusion_probability"].iloc[0] == pytest.approx(s.n / s.pixels)
    # Each point's map class is the map's at its row and column.
    with rasterio.open(folder / "t1.tif") as src:
        band = src.read(1)
    r, c = points["row"].to_numpy(), points["col"].to_numpy()
    codes = {"stable_forest": 1, "conversion": 2, "old_plantation": 3, "other": 4}
    assert (band[r, c] == points["map_class"].map(codes).to_numpy()).all()
    assert set(table["interpreter"]) == {"simulated truth (demo only)"}
    doc = assess_run(AssessConfig(region=region, samples=str(out / "samples.csv"), map=str(folder), out_dir=str(out), report=False), echo=lambda s: None)
    assert doc["simulated_reference"] is True
    assert "Stehman" in doc["estimator"]
    # The truth's converted area (400 + 500 pixels) lies in the interval; the map's count is lower (omission).
    true_ha = 900 * 0.09
    conv = doc["area_ha"]["conversion"]
    assert conv["lo"] <= true_ha <= conv["hi"]
    assert conv["mapped_ha"] < true_ha
    by_year = {e["year"]: e for e in doc["conversion_by_year"]}
    assert by_year[2022]["lo"] <= 500 * 0.09 <= by_year[2022]["hi"]
    # Timing: the rows mapped a year late are never exact but always within one year.
    assert doc["timing"]["within1"]["estimate"] == pytest.approx(1.0)
    assert doc["timing"]["exact"]["estimate"] < 1.0
    assert np.isclose(np.sum(doc["error_matrix"]["proportions"]), 1.0)
    for f in ("assessment.json", "error_matrix.csv", "accuracy.csv"):
        assert (out / f).is_file()
    # The gpkg holds the same points, in EPSG:4326.
    import pyogrio

    info = pyogrio.read_info(out / "samples.gpkg")
    assert info["features"] == len(table) and "4326" in info["crs"]
    assert list(info["fields"]) == [c for c in SHEET_COLUMNS if c not in ("lon", "lat")]


@pytest.fixture
def filled(mapped: tuple[RegionConfig, Path], tmp_path: Path) -> tuple[RegionConfig, Path, Path]:
    region, folder = mapped
    out = tmp_path / "assess"
    design_run(DesignConfig(region=region, map=str(folder), out_dir=str(out), min_per_stratum=10, total=80, fill_from_truth=True), echo=lambda s: None)
    return region, folder, out / "samples.csv"


@pytest.mark.parametrize(
    ("edit", "message"),
    [
        (lambda t: t.assign(label=t["label"].where(t.index != 3, "")), r"line 5: label is blank \(1 points unlabelled\)"),
        (lambda t: t.assign(label=t["label"].where(t.index != 0, "palm")), r"line 2: label 'palm' is not one of"),
        (lambda t: t.assign(point_id=t["point_id"].where(t.index != 7, t["point_id"].iloc[2])), r"line 9: point_id 'P\d+' appears again \(first on line 4\)"),
        (lambda t: t.assign(point_id=t["point_id"].where(t.index != 1, "P99999")), r"samples.csv: line 3: point_id 'P99999' is not in the design .*design.json"),
        (lambda t: t.assign(row=t["row"].where(t.index != 4, "999")), r"line 6: point_id 'P00005' is at tile 't1' row '999' col '\d+' here but at tile 't1' row \d+ col \d+ in .*design.json"),
    ],
)
def test_bad_sample_rows_are_named(filled: tuple[RegionConfig, Path, Path], edit, message: str) -> None:
    region, folder, samples = filled
    t = pd.read_csv(samples, dtype=str, keep_default_na=False)
    edit(t).to_csv(samples, index=False)
    with pytest.raises(PlantationError, match=message):
        assess_run(AssessConfig(region=region, samples=str(samples), map=str(folder), out_dir=str(samples.parent), report=False), echo=lambda s: None)
    assert not (samples.parent / "assessment.json").exists()


def test_conversion_rows_need_a_valid_year(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    t = pd.read_csv(samples, dtype=str, keep_default_na=False)
    i = int(np.flatnonzero(t["label"] == "conversion")[0])
    design = read_design(samples.parent)
    for value, msg in (("", "conversion needs an onset_year"), ("1999", "onset_year 1999 is outside the map's years 2013-2024")):
        t2 = t.copy()
        t2.loc[i, "onset_year"] = value
        t2.to_csv(samples, index=False)
        table, unit = read_sample_table(samples)
        with pytest.raises(PlantationError, match=f"line {i + 2}: {msg}"):
            check_sample(table, unit, samples, design, YEARS)
    j = int(np.flatnonzero(t["label"] == "stable_forest")[0])
    t3 = t.copy()
    t3.loc[j, "onset_year"] = "2017"
    t3.to_csv(samples, index=False)
    table, unit = read_sample_table(samples)
    with pytest.raises(PlantationError, match=f"line {j + 2}: onset_year '2017' given for label 'stable_forest'"):
        check_sample(table, unit, samples, design, YEARS)


def test_unlabelled_points_dropped_only_when_allowed(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    t = pd.read_csv(samples, dtype=str, keep_default_na=False)
    stratum = pd.DataFrame(read_design(samples.parent)["points"])["stratum"]
    big = stratum.value_counts().idxmax()
    i = int(np.flatnonzero(stratum == big)[0])
    t.loc[i, "label"] = ""
    t.to_csv(samples, index=False)
    said: list[str] = []
    doc = assess_run(AssessConfig(region=region, samples=str(samples), map=str(folder), out_dir=str(samples.parent), report=False, allow_unlabelled=True), echo=said.append)
    assert doc["sample"]["dropped_unlabelled"] == [t.loc[i, "point_id"]]
    assert doc["sample"]["n"] == len(t) - 1
    assert any("1 unlabelled point(s) dropped" in s for s in said)


def test_changed_map_is_refused(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    man = json.loads((folder / "manifest.json").read_text())
    with rasterio.open(folder / "t1.tif", "r+") as dst:
        dst.update_tags(note="edited")
    man["tiles"]["t1"]["sha256"] = hashlib.sha256((folder / "t1.tif").read_bytes()).hexdigest()
    (folder / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(PlantationError, match="differ from those the sample was drawn from"):
        assess_run(AssessConfig(region=region, samples=str(samples), map=str(folder), out_dir=str(samples.parent), report=False), echo=lambda s: None)


def test_damaged_map_and_missing_design(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    (samples.parent / "design.json").unlink()
    with pytest.raises(PlantationError, match="design.json not found"):
        assess_run(AssessConfig(region=region, samples=str(samples), map=str(folder), out_dir=str(samples.parent), report=False), echo=lambda s: None)
    with open(folder / "t1.tif", "ab") as f:
        f.write(b"x")
    with pytest.raises(PlantationError, match="bytes differ from the manifest"):
        design_run(DesignConfig(region=region, map=str(folder), out_dir=str(samples.parent)), echo=lambda s: None)


def test_same_seed_same_points(mapped: tuple[RegionConfig, Path], tmp_path: Path) -> None:
    region, folder = mapped
    for k in (1, 2):
        design_run(DesignConfig(region=region, map=str(folder), out_dir=str(tmp_path / f"s{k}"), min_per_stratum=10, seed=3), echo=lambda s: None)
    assert (tmp_path / "s1" / "samples.csv").read_bytes() == (tmp_path / "s2" / "samples.csv").read_bytes()


def test_dry_run_writes_nothing(mapped: tuple[RegionConfig, Path], tmp_path: Path) -> None:
    region, folder = mapped
    said: list[str] = []
    design_run(DesignConfig(region=region, map=str(folder), out_dir=str(tmp_path / "dry"), dry_run=True), echo=said.append)
    assert said[-1] == "dry run: nothing written" and not (tmp_path / "dry").exists()


# --------------------------------------------------------------------------- the blind sheet and its design


def test_sheet_is_blind(mapped: tuple[RegionConfig, Path], tmp_path: Path) -> None:
    """The interpreters' sheet says where each point is and nothing of the map's answer; design.json keeps that."""
    region, folder = mapped
    out = tmp_path / "blank"
    d = design_run(DesignConfig(region=region, map=str(folder), out_dir=str(out), min_per_stratum=10), echo=lambda s: None)
    table = pd.read_csv(out / "samples.csv", dtype=str, keep_default_na=False)
    assert list(table.columns) == list(SHEET_COLUMNS)
    assert not {"stratum", "map_class", "map_onset_year", "inclusion_probability"} & set(table.columns)
    assert (table[["label", "onset_year", "confidence", "interpreter", "note"]] == "").all().all()
    # Not even a stratum's name (conversion_2017_2020, forest_buffer) anywhere on the sheet.
    text = (out / "samples.csv").read_text()
    assert not [s.name for s in d.strata if s.name in text] and "conversion" not in text
    import pyogrio

    assert not set(BOOKKEEPING) & set(pyogrio.read_info(out / "samples.gpkg")["fields"])
    points = read_design(out)["points"]
    assert [q["point_id"] for q in points] == table["point_id"].tolist()
    assert all(set(BOOKKEEPING) <= set(q) for q in points)


#: The assessment of the ``filled`` sample (80 points from truth) as the sheet with map columns gave it, before the sheet went blind.
BEFORE = {
    "overall": {"estimate": 0.983519, "se": 0.011112, "lo": 0.96174, "hi": 1.005297},
    "conversion_ha": {"estimate": 80.31, "se": 3.6, "lo": 73.254, "hi": 87.366, "mapped_ha": 74.97},
    "after_cutoff_ha": (44.76, 3.6),
    "producers_conversion": {"estimate": 0.933508, "se": 0.041848, "lo": 0.851486, "hi": 1.015529},
    "timing_exact": {"estimate": 0.920968, "se": 0.053283, "lo": 0.816535, "hi": 1.025401},
    "counts": [[31, 2, 0, 0], [0, 25, 0, 0], [0, 0, 11, 0], [0, 0, 0, 11]],
    "n_used": [0, 12, 13, 21, 12, 11, 11, 0],
}


def _assess(region: RegionConfig, folder: Path, samples: Path, said: list[str] | None = None, **kw) -> dict:
    return assess_run(AssessConfig(region=region, samples=str(samples), map=str(folder), out_dir=str(samples.parent), report=False, **kw), echo=(said.append if said is not None else lambda s: None))


def test_assess_joins_the_design_and_gives_the_numbers_of_before(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    doc = _assess(region, folder, samples)
    assert doc["overall"] == pytest.approx(BEFORE["overall"], abs=1e-9)
    assert doc["area_ha"]["conversion"] == pytest.approx(BEFORE["conversion_ha"], abs=1e-9)
    assert (doc["after_cutoff"]["estimate"], doc["after_cutoff"]["se"]) == pytest.approx(BEFORE["after_cutoff_ha"], abs=1e-9)
    assert doc["producers"]["conversion"] == pytest.approx(BEFORE["producers_conversion"], abs=1e-9)
    assert doc["timing"]["exact"] == pytest.approx(BEFORE["timing_exact"], abs=1e-9)
    assert doc["error_matrix"]["counts"] == BEFORE["counts"]
    assert [s["n_used"] for s in doc["strata"]] == BEFORE["n_used"]
    assert doc["simulated_reference"] is True and doc["sample"]["missing_from_sheet"] == []
    # A sheet that still carries map columns (an older version's), even wrong ones: ignored, with a note; the design is the record.
    t = pd.read_csv(samples, dtype=str, keep_default_na=False)
    t.assign(stratum="swamp", map_class="other", map_onset_year="1999", inclusion_probability="1").to_csv(samples, index=False)
    said: list[str] = []
    again = _assess(region, folder, samples, said)
    assert {k: again[k] for k in ("overall", "users", "producers", "area_ha", "conversion_by_year", "after_cutoff", "timing", "error_matrix")} == {
        k: doc[k] for k in ("overall", "users", "producers", "area_ha", "conversion_by_year", "after_cutoff", "timing", "error_matrix")
    }
    assert any(s.startswith("note: ") and "['stratum', 'map_class', 'map_onset_year', 'inclusion_probability']" in s and "ignored" in s for s in said)


def test_points_missing_from_the_sheet(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    t = pd.read_csv(samples, dtype=str, keep_default_na=False)
    gone = t.loc[5, "point_id"]
    t.drop(index=5).to_csv(samples, index=False)
    with pytest.raises(LabelError, match=rf"samples.csv: point_id '{gone}' of the design .*design.json is not on the sheet \(1 point\(s\) missing\); .*allow_unlabelled=true") as err:
        _assess(region, folder, samples)
    assert "\n" not in str(err.value)
    said: list[str] = []
    doc = _assess(region, folder, samples, said, allow_unlabelled=True)
    assert doc["sample"]["missing_from_sheet"] == [gone] and doc["sample"]["dropped_unlabelled"] == [gone] and doc["sample"]["n"] == len(t) - 1
    assert any("1 unlabelled point(s) dropped" in s and "1 of them missing from the sheet" in s for s in said)


def _edit_design(doc: dict, how: str) -> object:
    if how == "list":
        return [doc]
    if how == "old":
        return doc | {"kind": "plantation-sample-design/1"}
    if how == "no_points":
        return {k: v for k, v in doc.items() if k != "points"}
    if how == "swamp":
        return doc | {"points": [doc["points"][0] | {"stratum": "swamp"}, *doc["points"][1:]]}
    if how == "twice":
        return doc | {"points": [doc["points"][0], *doc["points"]]}
    if how == "stratum":
        return doc | {"strata": [{"name": "x"}]}
    raise AssertionError(how)


@pytest.mark.parametrize(
    ("how", "message"),
    [
        ("json", r"design.json: not valid JSON \(Expecting"),
        ("list", r"design.json: holds a JSON list, not a sample design"),
        ("old", r"design.json: a design of an older version \('plantation-sample-design/1'\) .*draw the sample again with `plantation sample`"),
        ("no_points", r"design.json: no list of points; the file was edited or damaged"),
        ("swamp", r"design.json: point 'P00001': stratum 'swamp' is not one of the design's strata"),
        ("twice", r"design.json: point_id 'P00001' appears twice"),
        ("stratum", r"design.json: stratum 1 is not a \{name, kind"),
    ],
)
def test_malformed_design_is_one_line_naming_the_file(filled: tuple[RegionConfig, Path, Path], how: str, message: str) -> None:
    region, folder, samples = filled
    path = samples.parent / "design.json"
    if how == "json":
        path.write_text("{not json")
    else:
        path.write_text(json.dumps(_edit_design(json.loads(path.read_text()), how)))
    with pytest.raises(FileFormatError, match=message) as err:
        read_design(path)
    assert "\n" not in str(err.value) and str(err.value).startswith(str(path))
    with pytest.raises(FileFormatError, match=message):
        _assess(region, folder, samples)
    assert not (samples.parent / "assessment.json").exists()


def test_read_assessment_and_its_one_line_errors(filled: tuple[RegionConfig, Path, Path]) -> None:
    region, folder, samples = filled
    out = samples.parent
    with pytest.raises(InputNotFoundError, match="assessment.json not found; run `plantation assess`"):
        read_assessment(out)
    doc = _assess(region, folder, samples)
    assert read_assessment(out) == json.loads(json.dumps(doc)) == read_assessment(out / "assessment.json")
    path = out / "assessment.json"
    for text, message in (
        ("{not json", r"assessment.json: not valid JSON \(Expecting"),
        ("[1, 2]", r"assessment.json: holds a JSON list, not an assessment"),
        (json.dumps(doc | {"kind": "plantation-plots/1"}), r"assessment.json: kind 'plantation-plots/1', expected 'plantation-assessment/1'"),
        (json.dumps(doc | {"users": [1]}), r"assessment.json: 'users' is a JSON list, expected an object; the file was edited or damaged"),
        (json.dumps(doc | {"conversion_by_year": [2020]}), r"assessment.json: conversion_by_year entry 1 is a JSON int, expected an object"),
    ):
        path.write_text(text)
        with pytest.raises(FileFormatError, match=message) as err:
            read_assessment(out)
        assert "\n" not in str(err.value) and str(err.value).startswith(str(path))
