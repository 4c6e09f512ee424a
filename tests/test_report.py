"""report.html: self-contained, complete, escaped, honest about what is missing, and it renders in a real browser."""

from __future__ import annotations

import base64
import hashlib
import json
import os
import re
import shutil
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import rasterio
from affine import Affine
from rasterio.enums import Resampling

from plantation.errors import FileFormatError, PlantationError
from plantation.farmplots.evidence import page_name
from plantation.mapping.folder import LAYERS, NODATA, NOTICE, SCALE, read_manifest
from plantation.report.figures import read_mosaic
from plantation.report.page import build_report

CRS = "EPSG:32650"
SIDE = 64
YEARS = list(range(2016, 2024))
CUTOFF = 2020
EVIL = "<script>alert(1)</script>"


# --------------------------------------------------------------------------- fixtures


def write_tile(path: Path, x0: float, *, seed: int, overviews: bool) -> Path:
    """One 64 × 64 mapped tile laid out as plantation.mapping.tiles writes it: 8 int16 bands, scales on 5–7, nodata on 1–7."""
    rng = np.random.default_rng(seed)
    cls = np.ones((SIDE, SIDE), np.int16)
    cls[40:, :20] = 4
    cls[:16, 48:] = 3
    onset = np.zeros_like(cls)
    # Conversion blocks cleared year after year, like an estate.
    for k, y in enumerate(YEARS):
        r, c = 8 + (k // 4) * 16, 4 + (k % 4) * 11
        cls[r : r + 10, c : c + 9] = 2
        onset[r : r + 10, c : c + 9] = y
    conv = cls == 2
    lo = np.where(conv, onset - rng.integers(0, 2, cls.shape), 0).astype(np.int16)
    hi = np.where(conv, onset + rng.integers(0, 3, cls.shape), 0).astype(np.int16)
    p_conv = np.where(conv, rng.uniform(0.6, 1.0, cls.shape), rng.uniform(0.0, 0.3, cls.shape))
    p_after = np.where(conv & (onset > CUTOFF), p_conv * 0.9, p_conv * 0.1)
    epi = rng.gamma(1.5, 0.01, cls.shape)
    clear = rng.integers(6, 40, cls.shape).astype(np.int16)
    bands = np.stack([cls, onset, lo, hi, np.rint(p_conv / SCALE), np.rint(p_after / SCALE), np.rint(epi / SCALE), clear]).astype(np.int16)
    # A cloud-bound corner: too few clear dates, so nodata on bands 1-7.
    bands[:7, -6:, -6:] = NODATA
    bands[7, -6:, -6:] = 2
    prof = {
        "driver": "GTiff",
        "width": SIDE,
        "height": SIDE,
        "count": len(LAYERS),
        "dtype": "int16",
        "crs": CRS,
        "transform": Affine(30.0, 0.0, x0, 0.0, -30.0, 200010.0),
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 32,
        "blockysize": 32,
    }
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(bands)
        for i, (name, _, units) in enumerate(LAYERS, start=1):
            dst.set_band_description(i, name)
            dst.update_tags(i, units=units)
        dst.scales = [s for _, s, _ in LAYERS]
        dst.update_tags(cutoff_year=str(CUTOFF), interval_level="0.8", model_region="tinyland", notice=NOTICE)
        if overviews:
            dst.build_overviews([2, 4], Resampling.nearest)
    return path


def make_maps(folder: Path) -> Path:
    """Two adjacent tiles (one with overviews) and their manifest."""
    folder.mkdir(parents=True, exist_ok=True)
    tiles = {}
    for k, (name, ov) in enumerate((("t01", True), ("t02", False))):
        f = write_tile(folder / f"{name}.tif", 600000.0 + k * SIDE * 30.0, seed=k, overviews=ov)
        tiles[name] = {
            "tile": name,
            "file": f.name,
            "finished": f"2026-03-0{k + 1}T10:00:00+0000",
            "sha256": hashlib.sha256(f.read_bytes()).hexdigest(),
            "converted_ha": {str(y): 8.1 for y in YEARS},
        }
    (folder / "manifest.json").write_text(json.dumps({"format": "plantation-map/1", "tiles": tiles}))
    return folder


def est(e: float, se: float, lo: float, hi: float, **extra: Any) -> dict[str, Any]:
    return {"estimate": e, "se": se, "lo": lo, "hi": hi, **extra}


def assessment(map_dir: str, manifest_sha: str, **over: Any) -> dict[str, Any]:
    classes = ["stable_forest", "conversion", "old_plantation", "other"]
    counts = [[180, 6, 1, 5], [9, 141, 2, 4], [1, 3, 96, 2], [7, 5, 3, 85]]
    weights = [0.62, 0.12, 0.08, 0.18]
    props = [[w * n / sum(row) for n in row] for w, row in zip(weights, counts, strict=True)]
    a = {
        "kind": "plantation-assessment/1",
        "region": "tinyland",
        "map_dir": map_dir,
        "generated": "2026-03-04T12:30:00+00:00",
        "confidence": 0.95,
        "estimator": "stratified estimator, strata = map classes (Olofsson et al. 2014)",
        "simulated_reference": False,
        "classes": classes,
        "map_classes": classes,
        "error_matrix": {"proportions": props, "counts": counts},
        "overall": est(0.9112, 0.0131, 0.8856, 0.9369),
        "users": {
            "stable_forest": est(0.9375, 0.0175, 0.9032, 0.9718),
            "conversion": est(0.9038, 0.0236, 0.8576, 0.9501),
            "old_plantation": est(0.9412, 0.0233, 0.8955, 0.9869),
            "other": None,
        },
        "producers": {
            "stable_forest": est(0.9611, 0.0102, 0.9411, 0.9811),
            "conversion": est(0.8123, 0.0412, 0.7316, 0.8931),
            "old_plantation": None,
            "other": est(0.7722, 0.0501, 0.6740, 0.8704),
        },
        "area_ha": {
            "stable_forest": est(470.2, 11.3, 448.1, 492.3, mapped_ha=457.1),
            "conversion": est(98.6, 8.4, 82.1, 115.1, mapped_ha=88.5),
            "old_plantation": est(60.3, 4.1, 52.3, 68.3, mapped_ha=59.0),
            "other": est(108.2, 9.0, 90.6, 125.8, mapped_ha=132.7),
        },
        "conversion_by_year": [est(11.0 + i, 2.5, 6.1 + i, 15.9 + i, year=y, mapped_ha=9.2 + i * 0.5) for i, y in enumerate(YEARS)],
        "after_cutoff": est(52.4, 6.2, 40.3, 64.5, cutoff_year=CUTOFF, mapped_ha=45.9),
        "timing": {"n": 141, "exact": est(0.7801, 0.0349, 0.7117, 0.8486), "within1": est(0.9433, 0.0196, 0.9051, 0.9816)},
        "strata": [{"name": c, "pixels": int(w * 8192), "area_ha": w * 737.28, "n_planned": sum(r), "n_used": sum(r)} for c, w, r in zip(classes, weights, counts, strict=True)],
        "sample": {"path": "/home/analyst/secret/samples.csv", "sha256": "ab" * 32, "n": 550},
        "provenance": {
            "model": {"path": "/home/analyst/runs/tinyland_seed0/model", "sha256": "cd" * 32, "region": "tinyland", "labels_fingerprint": "fp-1234abcd", "package_version": "0.1.0"},
            "map_manifest_sha256": manifest_sha,
            "config": "confidence: 0.95\nsamples: samples.csv  # <not a tag>\n",
        },
        "validation": {
            "split": "test",
            "n": 361,
            "reliability": [{"p_mean": (i + 0.5) / 10, "observed": min(1.0, (i + 0.5) / 10 + 0.02 * (-1) ** i), "n": 20 + 5 * i} for i in range(10)],
            "ece": 0.0291,
            "interval_coverage": [{"level": 0.5, "coverage": 0.47, "n": 120}, {"level": 0.8, "coverage": 0.724, "n": 120}, {"level": 0.95, "coverage": 0.91, "n": 120}],
        },
    }
    a.update(over)
    return a


def plots_doc(map_dir: str, plot_id: str = "P-003") -> dict[str, Any]:
    def plot(pid: str, verdict: str | None, after: float, **over: Any) -> dict[str, Any]:
        row = {
            "id": pid,
            "status": "ok",
            "area_ha": 4.5,
            "mapped_ha": 4.41,
            "mapped_share": 0.98,
            "expected_after_ha": after,
            "after_lo_ha": max(0.0, after - 0.8),
            "after_hi_ha": after + 0.9,
            "share_after": after / 4.41,
            "years": {"2021": 2.61, "2019": 0.4},
            "straddle_ha": 0.0,
            "mean_clear": 17.25,
            "verdict": verdict,
            "reasons": [f"expected area after cutoff {after:.2f} ha"],
        }
        row.update(over)
        return row

    return {
        "kind": "plantation-plots/1",
        "plots_file": "/home/analyst/plots/farms.gpkg",
        "plots_sha256": "ef" * 32,
        "map_dir": map_dir,
        "cutoff": {"date": "2020-12-31", "year": CUTOFF, "straddle_year": None},
        "interval_level": 0.8,
        "thresholds": {"review_ha": 0.5, "strong_ha": 2.0},
        "plots": [
            plot("P-001", "strong_evidence", 3.21),
            plot("P-002", "low_evidence", 0.04, years={}, reasons=["little mapped conversion"]),
            plot(plot_id, "review", 0.77, reasons=["interval reaches the review threshold & more"]),
            {
                "id": "P-004",
                "status": "outside_map",
                "area_ha": None,
                "mapped_ha": None,
                "mapped_share": None,
                "expected_after_ha": None,
                "after_lo_ha": None,
                "after_hi_ha": None,
                "share_after": None,
                "years": {},
                "straddle_ha": None,
                "mean_clear": None,
                "verdict": None,
                "reasons": [],
            },
        ],
        "problems": [
            {"index": 3, "id": "P-004", "problem": "outside_map", "detail": "plot lies outside every mapped tile"},
            {"index": 5, "id": None, "problem": "empty_geometry", "detail": "feature 5 has no geometry"},
        ],
        "counts": {"strong_evidence": 1, "review": 1, "low_evidence": 1, "problems": 2},
        "notice": NOTICE,
    }


def write_evidence(out: Path, ids: list[str]) -> list[str]:
    """evidence/ beside plots.json as the plot check writes it: a small PNG per plot (each its own colour) and evidence.json naming them."""
    from PIL import Image

    folder = out / "evidence"
    folder.mkdir(exist_ok=True)
    taken: set[str] = set()
    pages = []
    for k, pid in enumerate(ids):
        name = page_name(pid, taken)
        Image.new("RGB", (60 + 10 * k, 40), (40 * k, 120, 200)).save(folder / name)
        pages.append({"id": pid, "file": name, "verdict": "strong_evidence" if k == 0 else "review", "onset_year": 2021, "onset_interval": [2020, 2021], "clear_views": 30 + k})
    imagery = {
        "region": "tinyland",
        "tiles": ["t01", "t02"],
        "bands": ["blue", "green", "red", "nir", "swir1", "swir2"],
        "dates": 8,
        "first": "2016-02-14",
        "last": "2017-08-15",
        "dates_by_year": {"2016": 4, "2017": 4},
        "sensors": {"landsat_oli": 6, "sentinel2_msi": 2},
        "clear_share_by_year_month": {"2016": {"2": 0.25, "5": 0.5, "8": 0.75, "11": 0.125}, "2017": {"2": 0.3, "5": 0.6, "8": 0.9, "11": 0.2}},
        "clear_share_by_year": {"2016": 0.40625, "2017": 0.5},
        "clear_share_by_month": {"2": 0.275, "5": 0.55, "8": 0.825, "11": 0.1625},
        "clear_source": "survey.json (share of each tile's pixels valid on each date, averaged over tiles)",
    }
    doc = {
        "kind": "plantation-evidence/1",
        "plots_json_sha256": hashlib.sha256((out / "plots.json").read_bytes()).hexdigest(),
        "imagery": imagery,
        "pages": pages,
        "skipped": [],
    }
    (folder / "evidence.json").write_text(json.dumps(doc))
    return [p["file"] for p in pages]


@pytest.fixture
def run_dir(tmp_path: Path) -> Path:
    """A folder with both JSON files, evidence pages of the two flagged plots, and a mapped folder beside them (map_dir relative to it)."""
    maps = make_maps(tmp_path / "maps")
    out = tmp_path / "assess"
    out.mkdir()
    sha = hashlib.sha256((maps / "manifest.json").read_bytes()).hexdigest()
    (out / "assessment.json").write_text(json.dumps(assessment("../maps", sha)))
    (out / "plots.json").write_text(json.dumps(plots_doc("../maps", EVIL)))
    write_evidence(out, ["P-001", EVIL])
    return out


@pytest.fixture
def bare_dir(tmp_path: Path) -> Path:
    """Both JSON files and no map folder: the quicklooks are skipped, which keeps tests about text quick."""
    out = tmp_path / "bare"
    out.mkdir()
    (out / "assessment.json").write_text(json.dumps(assessment("../no_maps_here", "00" * 32)))
    (out / "plots.json").write_text(json.dumps(plots_doc("../no_maps_here", EVIL)))
    return out


def _text(html: str) -> str:
    """The page's text with tags dropped and whitespace collapsed (entities left as they are)."""
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))


# --------------------------------------------------------------------------- content


def test_report_is_self_contained_and_complete(run_dir: Path) -> None:
    out = build_report(run_dir)
    assert out == run_dir / "report.html"
    assert not (run_dir / "report.html.partial").exists()
    page = out.read_text()

    # Nothing may be fetched from anywhere: no URL in any src or href, no script, no external CSS.
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", page, re.I)
    assert "<script" not in page.lower()
    assert "<link" not in page.lower()
    assert "@import" not in page
    srcs = re.findall(r'<img[^>]*\ssrc="([^"]+)"', page)
    assert len(srcs) == 7  # onset, uncertainty, area by year, reliability, coverage, two evidence pages
    for s in srcs:
        assert s.startswith("data:image/png;base64,")
        assert base64.b64decode(s.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"

    # Sections in the order a reader needs them, the notice above them all.
    pos = [page.index(f'<section id="{i}">') for i in ("summary", "maps", "areas", "accuracy", "calibration", "plots", "imagery", "provenance", "cautions")]
    assert pos == sorted(pos)
    assert page.index('class="notice"') < pos[1]

    text = _text(page)
    # Title, dates of the inputs, notice.
    assert "tinyland" in text
    assert "2026-03-04 12:30:00" in text
    assert "2026-03-01 to 2026-03-02" in text
    assert NOTICE in text
    assert "Demonstration only" not in text
    # Areas by year: estimate and map counts with the labels the brief asks for.
    assert "map (pixel count)" in text and "sample-based estimate" in text
    assert "11.0" in text and "6.1–15.9" in text
    assert "52.4" in text and "40.3–64.5" in text and "45.9" in text
    # Error matrix proportions (map rows × reference columns) with counts.
    assert "0.1085" in text  # 0.12 × 141 / 156
    assert "n = 141" in text and "n = 550" in text
    # Accuracy: overall, user's and producer's with SE and interval; nulls say why.
    assert "0.911 (SE 0.013, 95% confidence interval 0.886–0.937)" in text
    assert "0.904 0.024 0.858–0.950" in text  # user's accuracy of conversion
    assert "0.812 0.041 0.732–0.893" in text  # producer's accuracy of conversion
    assert "not estimable (no sample mapped in this class)" in text
    assert "not estimable (no reference sample of this class)" in text
    assert "stratified estimator, strata = map classes (Olofsson et al. 2014)" in text
    # Class areas and timing.
    assert "88.5 98.6 8.4 82.1–115.1" in text
    assert "0.780 0.035 0.712–0.849" in text and "0.943 0.020 0.905–0.982" in text
    # Calibration on held-out data.
    assert "0.029" in text and "361 points" in text and "72.4%" in text
    # Plots: verdicts as badges, intervals, problems beneath.
    table = page[page.index('<table class="plots">') : page.index("</table>", page.index('<table class="plots">'))]
    assert table.count('class="badge v-strong"') == 1 and table.count('class="badge v-review"') == 1 and table.count('class="badge v-low"') == 1
    assert "3.21" in text and "80% range 2.41–4.11" in text
    # Thresholds and counts in words, not as keys.
    assert "review ha: 0.5" in text and "review_ha" not in text
    assert "Plots by verdict: strong evidence: 1, review: 1, low evidence: 1, not measured: 2." in text
    assert "2019: 0.40 ha 2021: 2.61 ha" in text  # one line per onset year
    assert "17.2" in text or "17.3" in text
    assert "plot lies outside every mapped tile" in text and "feature 5 has no geometry" in text
    assert "interval reaches the review threshold &amp; more" in page
    # Provenance: hashes, fingerprint, config, and the manifest check against the map folder.
    for h in ("ab" * 32, "cd" * 32, "ef" * 32, "fp-1234abcd"):
        assert h in text
    assert "matches the file at hand" in text
    assert "<details>" in page and "samples: samples.csv  # &lt;not a tag&gt;" in page
    # No machine paths: absolute paths lose their prefix.
    assert "/home/analyst" not in page
    assert str(run_dir) not in page
    # Cautions.
    for phrase in ("never show cleared", "logging", "resolved to the year", "Cloud-limited", "sample-based estimates", "not a finding", "Local law and licensed practice"):
        assert phrase in text


def test_json_text_is_escaped(bare_dir: Path) -> None:
    a = json.loads((bare_dir / "assessment.json").read_text())
    a["region"] = 'Selva "<b>bold</b>"'
    a["estimator"] = "<img src=x onerror=alert(2)>"
    (bare_dir / "assessment.json").write_text(json.dumps(a))
    page = build_report(bare_dir).read_text()
    assert EVIL not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "<b>bold</b>" not in page and "&lt;b&gt;bold&lt;/b&gt;" in page
    assert "<img src=x" not in page and "&lt;img src=x onerror=alert(2)&gt;" in page
    assert "<script" not in page.lower()


def test_simulated_banner_only_when_flagged(bare_dir: Path) -> None:
    page = build_report(bare_dir).read_text()
    assert 'id="simulated-banner"' not in page and "simulated truth" not in page
    a = json.loads((bare_dir / "assessment.json").read_text())
    a["simulated_reference"] = True
    (bare_dir / "assessment.json").write_text(json.dumps(a))
    page = build_report(bare_dir).read_text()
    assert page.count('id="simulated-banner"') == 1
    assert "filled from simulated truth" in _text(page)
    # The banner sits above the first section, where nobody can miss it.
    assert page.index('id="simulated-banner"') < page.index('<section id="maps">')


def test_missing_plots_says_not_run(bare_dir: Path) -> None:
    (bare_dir / "plots.json").unlink()
    text = _text(build_report(bare_dir).read_text())
    assert "Plot check not run: no plots.json in this folder." in text
    assert "0.904" in text  # the assessment part is all there


def test_missing_assessment_says_not_run(run_dir: Path) -> None:
    (run_dir / "assessment.json").unlink()
    page = build_report(run_dir).read_text()
    text = _text(page)
    assert "Accuracy assessment not run" in text
    assert "strong evidence" in text
    # The map folder is found through plots.json; region comes from the tiles' tags.
    assert "Mapped onset year" not in text  # (that is figure text, inside the PNG)
    assert len(re.findall(r"<img ", page)) == 4  # the two quicklooks and the two evidence pages
    assert "tinyland" in text


def test_validation_absent(bare_dir: Path) -> None:
    a = json.loads((bare_dir / "assessment.json").read_text())
    a["validation"] = None
    (bare_dir / "assessment.json").write_text(json.dumps(a))
    text = _text(build_report(bare_dir).read_text())
    assert "The model carries no validation record" in text


def test_map_dir_argument_and_missing_maps(run_dir: Path, tmp_path: Path) -> None:
    empty = tmp_path / "empty_maps"
    empty.mkdir()
    text = _text(build_report(run_dir, map_dir=empty).read_text())
    assert "Map quicklooks not drawn: the map folder holds no mapped tiles" in text
    a = json.loads((run_dir / "assessment.json").read_text())
    a["map_dir"] = str(tmp_path / "nowhere")
    (run_dir / "assessment.json").write_text(json.dumps(a))
    (run_dir / "plots.json").unlink()
    text = _text(build_report(run_dir).read_text())
    assert "Map quicklooks not drawn: no map folder was given or found." in text
    # The tiles still there, when named explicitly.
    page = build_report(run_dir, map_dir=tmp_path / "maps").read_text()
    assert len(re.findall(r"<img ", page)) == 5  # no plots.json: no evidence pages either


def test_changed_manifest_is_flagged(run_dir: Path, tmp_path: Path) -> None:
    mf = tmp_path / "maps" / "manifest.json"
    mf.write_text(mf.read_text().replace("2026-03-01", "2026-03-09"))
    text = _text(build_report(run_dir).read_text())
    assert "differs from the file at hand" in text


def test_neither_file_raises(tmp_path: Path) -> None:
    with pytest.raises(PlantationError, match=re.escape(str(tmp_path))):
        build_report(tmp_path)
    assert not (tmp_path / "report.html").exists()


def test_wrong_kind_or_bad_json_raises(bare_dir: Path) -> None:
    (bare_dir / "plots.json").write_text(json.dumps({"kind": "something-else/1"}))
    with pytest.raises(PlantationError, match="plots.json: kind 'something-else/1'"):
        build_report(bare_dir)
    (bare_dir / "plots.json").write_text("{not json")
    with pytest.raises(PlantationError, match="plots.json: not valid JSON"):
        build_report(bare_dir)


@pytest.mark.parametrize(
    ("name", "text", "error", "message"),
    [
        ("assessment.json", "{not json", FileFormatError, r"assessment.json: not valid JSON \(Expecting"),
        ("assessment.json", json.dumps({"kind": "plantation-plots/1"}), FileFormatError, r"assessment.json: kind 'plantation-plots/1', expected 'plantation-assessment/1'"),
        ("assessment.json", json.dumps({"kind": "plantation-assessment/1", "area_ha": [1, 2]}), FileFormatError, r"assessment.json: 'area_ha' is a JSON list, expected an object"),
        ("plots.json", json.dumps({"kind": "plantation-plots/1", "plots": [None]}), FileFormatError, r"plots.json: plots entry 1 is a JSON NoneType, expected an object"),
    ],
)
def test_malformed_input_is_one_line_naming_the_file(bare_dir: Path, name: str, text: str, error: type, message: str) -> None:
    """The report reads its inputs through their modules' readers, and stops with their one-line error."""
    (bare_dir / name).write_text(text)
    with pytest.raises(error, match=message) as err:
        build_report(bare_dir)
    assert "\n" not in str(err.value) and str(err.value).startswith(str(bare_dir / name))
    assert not (bare_dir / "report.html").exists()


def test_manifest_read_through_the_map_folder_module(run_dir: Path, tmp_path: Path) -> None:
    maps = tmp_path / "maps"
    raw = read_manifest(maps)
    assert raw is not None and sorted(raw["tiles"]) == ["t01", "t02"] and read_manifest(maps / "manifest.json") == raw
    assert read_manifest(tmp_path / "nowhere") is None
    text = _text(build_report(run_dir).read_text())
    assert "map tiles finished 2026-03-01 to 2026-03-02" in text and text.count("assessment generated") == 2  # header and provenance
    # A malformed manifest is refused by its reader in one line; the report is built without it and says why.
    (maps / "manifest.json").write_text(json.dumps({"format": "plantation-map/1", "tiles": {"t01": {"sha256": "00"}}}))
    with pytest.raises(FileFormatError, match=r"manifest.json: tile 't01' has no 'file' entry; delete it and map the region again") as err:
        read_manifest(maps)
    assert "\n" not in str(err.value)
    text = _text(build_report(run_dir).read_text())
    assert "map tiles finished" not in text and "unreadable, left out:" in text and "tile &#x27;t01&#x27; has no &#x27;file&#x27; entry" in text
    assert text.count("assessment generated") == 2
    (maps / "manifest.json").write_text("{not json")
    with pytest.raises(FileFormatError, match=r"manifest.json: not valid JSON"):
        read_manifest(maps)


def test_rewrite_replaces_the_old_report(bare_dir: Path) -> None:
    (bare_dir / "report.html").write_text("old")
    page = build_report(bare_dir).read_text()
    assert page.startswith("<!DOCTYPE html>")
    assert not list(bare_dir.glob("*.partial"))


def test_mosaic_by_bounds(tmp_path: Path) -> None:
    maps = make_maps(tmp_path / "maps")
    m = read_mosaic(sorted(maps.glob("*.tif")))
    assert m.layers["class"].shape == (SIDE, 2 * SIDE)
    assert m.extent == (600000.0, 600000.0 + 2 * SIDE * 30.0, 200010.0 - SIDE * 30.0, 200010.0)
    assert m.cutoff_years == [CUTOFF] and m.interval_levels == [0.8]
    p = m.layers["p_conversion"]
    assert 0.0 <= float(p.min()) and float(p.max()) <= 1.0
    # The cloud-bound corner of each tile is masked, in both tiles.
    assert bool(np.ma.getmaskarray(m.layers["class"])[-1, SIDE - 1]) and bool(np.ma.getmaskarray(m.layers["class"])[-1, -1])
    assert not np.ma.getmaskarray(m.layers["class"])[0, 0]
    assert int(m.converted.sum()) == 2 * len(YEARS) * 90
    # Decimated: the longer side obeys max_side, and the years are still years that exist.
    small = read_mosaic(sorted(maps.glob("*.tif")), max_side=32)
    assert small.layers["class"].shape == (16, 32)
    assert set(np.unique(small.layers["onset_year"].compressed())) <= {0, *YEARS}


def test_mosaic_warps_a_tile_in_another_crs(tmp_path: Path) -> None:
    from rasterio.warp import calculate_default_transform, reproject

    a = write_tile(tmp_path / "a.tif", 600000.0, seed=0, overviews=False)
    b = write_tile(tmp_path / "b_utm.tif", 600000.0 + SIDE * 30.0, seed=1, overviews=False)
    with rasterio.open(b) as src:
        tr, w, h = calculate_default_transform(src.crs, "EPSG:4326", src.width, src.height, *src.bounds)
        with rasterio.open(tmp_path / "b.tif", "w", **(src.profile | {"crs": "EPSG:4326", "transform": tr, "width": w, "height": h})) as dst:
            for i in range(1, src.count + 1):
                reproject(rasterio.band(src, i), rasterio.band(dst, i), resampling=Resampling.nearest)
            dst.scales = src.scales
            dst.update_tags(**src.tags())
    m = read_mosaic([a, tmp_path / "b.tif"])
    assert m.crs == CRS and not m.geographic
    # Both tiles land side by side; nearest-neighbour warping keeps about every converted pixel.
    assert m.layers["class"].shape[1] in (2 * SIDE, 2 * SIDE + 1)
    assert abs(int(m.converted.sum()) - 2 * len(YEARS) * 90) < 60
    assert set(np.unique(m.layers["onset_year"].compressed())) <= {0, *YEARS}


# --------------------------------------------------------------------------- browser


CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync", "--no-first-run"]


def _browser_or_skip() -> tuple[Any, str]:
    """Playwright's sync API and a Chromium binary, or skip (fail when CI requires the browser)."""
    required = os.environ.get("PLANTATION_REQUIRE_BROWSER") == "1"
    try:
        from playwright.sync_api import sync_playwright
    except ImportError as exc:
        reason = f"Python playwright is not installed ({exc}); pip install playwright"
        if required:
            pytest.fail(reason + " (PLANTATION_REQUIRE_BROWSER=1)")
        pytest.skip(reason)
    exe = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
    if exe is None:
        reason = "no chromium executable on PATH or at /usr/bin/chromium; apt-get install chromium"
        if required:
            pytest.fail(reason + " (PLANTATION_REQUIRE_BROWSER=1)")
        pytest.skip(reason)
    return sync_playwright, exe


def test_report_renders_in_headless_chromium(run_dir: Path, tmp_path: Path) -> None:
    sync_playwright, exe = _browser_or_skip()
    a = json.loads((run_dir / "assessment.json").read_text())
    a["simulated_reference"] = True
    (run_dir / "assessment.json").write_text(json.dumps(a))
    report = build_report(run_dir)
    shot = tmp_path / "report.png"
    errors: list[str] = []
    failed: list[str] = []
    outside: list[str] = []
    t0 = time.perf_counter()
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=exe, args=CHROMIUM_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 900})
            page.on("pageerror", lambda exc: errors.append(f"pageerror: {exc}"))
            page.on("console", lambda msg: errors.append(f"console {msg.type}: {msg.text}") if msg.type == "error" else None)
            page.on("requestfailed", lambda req: failed.append(f"{req.url[:80]}: {req.failure}"))
            page.on("request", lambda req: outside.append(req.url[:80]) if not req.url.startswith(("file:", "data:")) else None)
            page.goto(report.as_uri(), wait_until="load")
            images = page.evaluate("Array.from(document.images).map(i => ({ok: i.complete, w: i.naturalWidth, h: i.naturalHeight}))")
            first = page.evaluate(
                "({headline: document.querySelector('.headline').getBoundingClientRect().bottom,"
                " flagged: document.querySelector('ul.flagged').getBoundingClientRect().bottom,"
                " text: document.getElementById('summary').innerText})"
            )
            title = page.title()
            banner = page.evaluate("document.getElementById('simulated-banner') !== null")
            page.screenshot(path=str(shot), full_page=True)
        finally:
            browser.close()
    elapsed = time.perf_counter() - t0

    assert errors == []
    assert failed == []
    assert outside == []
    assert len(images) == 7  # five figures and the two evidence pages, each loaded
    assert all(i["ok"] and i["w"] > 0 and i["h"] > 0 for i in images), images
    assert sorted((i["w"], i["h"]) for i in images[-2:]) == [(60, 40), (70, 40)]
    # The first screen answers "how much after the cutoff, and which plots to look at".
    assert first["headline"] < 900 and first["flagged"] < 900, first
    assert "52.4 ha" in first["text"] and "P-001" in first["text"]
    assert "tinyland" in title and banner

    if os.environ.get("PLANTATION_ARTIFACTS"):
        dest = Path(os.environ["PLANTATION_ARTIFACTS"])
        dest.mkdir(parents=True, exist_ok=True)
        shutil.copy(shot, dest / "report_screenshot.png")
        shutil.copy(report, dest / "report.html")

    # The screenshot is a real page: large, tall (full page), and far from one flat colour.
    from PIL import Image

    assert shot.stat().st_size > 50_000
    with Image.open(shot) as im:
        rgb = np.asarray(im.convert("RGB"))
    assert rgb.shape[1] >= 1280 and rgb.shape[0] > 3000
    assert float(rgb.std()) > 20
    assert len(np.unique(rgb.reshape(-1, 3)[::97], axis=0)) > 200
    assert elapsed < 60


# --------------------------------------------------------------------------- summary, intervals, evidence and imagery


def test_summary_first_with_the_after_cutoff_area_and_the_flagged_plots_linked(run_dir: Path) -> None:
    page = build_report(run_dir).read_text()
    summary = page[page.index('<section id="summary">') : page.index("</section>", page.index('<section id="summary">'))]
    text = _text(summary)
    assert "Converted to tree-crop plantation after 2020-12-31: 52.4 ha (95% confidence interval, stratified estimator: 40.3–64.5 ha)" in text
    assert "reference sample of 550 points" in text and "pixel count is 45.9 ha" in text
    # Verdict counts, and the flagged plots most attention first, each linking to its evidence page.
    assert "4 farm plots checked" in text
    assert summary.index("P-001") < summary.index("&lt;script&gt;")
    assert '<a href="#ev-P-001"><code>P-001</code></a>' in summary
    assert "P-002" not in summary  # low evidence: not listed
    assert "finds about 81% of the converted area" in text and "exact for about 78%" in text
    # Every kind of interval named with its level, and why the levels differ.
    for kind in ("95% confidence intervals of the stratified estimator", "80% credible intervals of the onset year", "80% ranges of a plot", "nominal levels of 50% to 95%"):
        assert kind in text
    assert "Why the levels differ" in text
    # The evidence pages sit in the plots section, in collapsible blocks the table links to.
    assert page.count('<details class="evidence"') == 2
    assert page.index('id="ev-P-001"') > page.index('<section id="plots">')
    assert page.count('href="#ev-P-001"') == 2  # summary and table


def test_degenerate_wald_intervals_are_marked_with_a_wilson_interval(bare_dir: Path) -> None:
    from scipy.stats import binomtest

    a = json.loads((bare_dir / "assessment.json").read_text())
    # User's accuracy of old plantation: all 96 + 6 points agree -> SE 0, a zero-width Wald interval.
    a["users"]["old_plantation"] = est(1.0, 0.0, 1.0, 1.0)
    # Producer's accuracy of "other" pushed over 1 by the Wald interval; its SE is that of 38 successes in 40 simple random points.
    se = (0.95 * 0.05 / 40) ** 0.5
    a["producers"]["other"] = est(0.95, se, 0.95 - 1.959964 * se, 0.95 + 1.959964 * se)
    # Timing within one year fine; area of a rare class below zero.
    a["area_ha"]["old_plantation"] = est(3.0, 2.0, -0.92, 6.92, mapped_ha=59.0)
    a["total_area_ha"] = 737.28
    (bare_dir / "assessment.json").write_text(json.dumps(a))
    page = build_report(bare_dir).read_text()
    text = _text(page)
    # Zero width: Wilson from the 102 points mapped as old plantation (n of the error-matrix row), checked against scipy.
    ci = binomtest(102, 102).proportion_ci(confidence_level=0.95, method="wilson")
    assert f"1.000 0.000 1.000–1.000 † Wilson {ci.low:.3f}–1.000" in text
    # Above one: Wilson from the effective sample size p(1-p)/SE^2 = 40, which is scipy's Wilson interval of 38 in 40.
    want = binomtest(38, 40).proportion_ci(confidence_level=0.95, method="wilson")
    assert f"0.882–1.018 † Wilson {want.low:.3f}–{want.high:.3f}" in text
    # An area below zero: Wilson on its share of the region, back in hectares, never below zero.
    m = re.search(r"-0\.9–6\.9 † Wilson (\d+\.\d)–(\d+\.\d)", text)
    assert m is not None and 0.0 <= float(m[1]) < 3.0 < float(m[2])
    # The footnote says why, names the alternative and the sources.
    for phrase in ("zero width", "upper bound is above 1", "lower bound is below zero", "Wilson 1927", "Agresti &amp; Coull 1998", "effective sample size"):
        assert phrase in page
    # Sound intervals are not marked.
    assert "0.904 0.024 0.858–0.950 " in text and "0.858–0.950 †" not in text


def test_wilson_matches_scipy_on_whole_counts() -> None:
    from scipy.stats import binomtest

    from plantation.report.intervals import wald_problem, wilson, wilson_bounds

    for k, n in ((0, 20), (3, 20), (19, 20), (50, 100), (141, 156)):
        ref = binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
        lo, hi = wilson_bounds(k / n, n, 1.959963984540054)
        assert lo == pytest.approx(ref.low, abs=1e-9) and hi == pytest.approx(ref.high, abs=1e-9)
    # From an SE: n_eff = p(1-p)/se^2 recovers n for a simple random sample.
    w = wilson(0.15, (0.15 * 0.85 / 20) ** 0.5, 1.959963984540054, None)
    ref = binomtest(3, 20).proportion_ci(confidence_level=0.95, method="wilson")
    assert w is not None and w.basis == "effective" and w.n == pytest.approx(20) and w.lo == pytest.approx(ref.low) and w.hi == pytest.approx(ref.high)
    assert wald_problem(0.5, 0.4, 0.6, proportion=True) is None
    assert wald_problem(1.0, 1.0, 1.0, proportion=True) == "zero_width"
    assert wald_problem(0.02, -0.01, 0.05, proportion=True) == "below_zero"
    assert wald_problem(12.0, 5.0, 19.0, proportion=False) is None


def test_coverage_check_read_out_in_words(bare_dir: Path) -> None:
    a = json.loads((bare_dir / "assessment.json").read_text())
    a["validation"]["interval_coverage"] = [{"level": 0.5, "coverage": 0.9, "n": 120}, {"level": 0.8, "coverage": 0.95, "n": 120}, {"level": 0.95, "coverage": 0.99, "n": 120}]
    (bare_dir / "assessment.json").write_text(json.dumps(a))
    text = _text(build_report(bare_dir).read_text())
    assert "the 50% intervals held the true year for 90%" in text and "The intervals over-cover" in text
    a["validation"]["interval_coverage"] = [{"level": 0.5, "coverage": 0.47, "n": 120}, {"level": 0.8, "coverage": 0.724, "n": 120}]
    (bare_dir / "assessment.json").write_text(json.dumps(a))
    text = _text(build_report(bare_dir).read_text())
    assert "The intervals under-cover" in text


def test_imagery_section_and_stale_evidence(run_dir: Path) -> None:
    page = build_report(run_dir).read_text()
    imagery = _text(page[page.index('<section id="imagery">') : page.index("</section>", page.index('<section id="imagery">'))])
    assert "8, from 2016-02-14 to 2017-08-15" in imagery
    assert "landsat oli: 6 dates, sentinel2 msi: 2 dates" in imagery
    assert "2016 25% 50% 75% 12% 41%" in imagery or "2016 25% 50% 75% 13% 41%" in imagery
    assert "all years 28% 55% 82% 16%" in imagery
    # plots.json rewritten after the pages were drawn: the pages are left out, and the report says why.
    doc = json.loads((run_dir / "plots.json").read_text())
    doc["plots"][0]["expected_after_ha"] = 3.3
    (run_dir / "plots.json").write_text(json.dumps(doc))
    page = build_report(run_dir).read_text()
    assert '<details class="evidence"' not in page and 'href="#ev-' not in page
    assert "drawn for an earlier plot check" in _text(page)


def test_map_section_states_fire_areas_from_the_manifest(tmp_path):
    """The fire areas the mapping job records per tile, summed over tiles; unknown is said to be no evidence of no fire; a map made before the fire layers gets no line."""
    from plantation.mapping.folder import FORMAT
    from plantation.report.page import _fire_note

    tiles = {
        "t01": {"file": "t01.tif", "fire_ha": {"converted_burnt": 10.0, "converted_not_burnt": 2.5, "converted_unknown": 4.0, "escaped_fire": 1.25}, "fire_after_cutoff_ha": 3.0},
        "t02": {"file": "t02.tif", "fire_ha": {"converted_burnt": 5.0, "converted_not_burnt": 0.5, "converted_unknown": 1.0, "escaped_fire": 0.0}, "fire_after_cutoff_ha": 1.5},
    }
    (tmp_path / "manifest.json").write_text(json.dumps({"format": FORMAT, "producer": "test", "tiles": tiles}))
    text = _fire_note(tmp_path)
    assert "15.0 ha mapped as converted were cleared with fire (4.5 ha of it after the cutoff year)" in text
    assert "3.0 ha without fire" in text and "5.0 ha it is unknown" in text and "not evidence of no fire" in text and "1.2 ha of forest" in text
    del tiles["t02"]["fire_ha"]
    (tmp_path / "manifest.json").write_text(json.dumps({"format": FORMAT, "producer": "test", "tiles": tiles}))
    assert _fire_note(tmp_path) == ""
