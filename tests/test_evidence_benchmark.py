"""The evidence-page benchmark (``plantation benchmark-evidence``) on a handful of plots of the demo region.

The map it writes is checked against the simulator's truth rasters read here
independently, its plots against the truth's onset years, and its memory
sampler against a child process of known size.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyogrio
import pytest
import rasterio
import shapely

from plantation.benchmarks.evidence import EvidenceBenchConfig, TreeMemory, check_config, truth_map_layers
from plantation.cli import main
from plantation.errors import ConfigError
from plantation.farmplots.evidence import read_evidence

ROOT = Path(__file__).resolve().parents[1]


def test_map_layers_from_the_truth_by_hand() -> None:
    cls = np.array([[1, 2, 2], [4, 2, 3]], np.int32)
    onset = np.array([[0, 2019, 2022], [0, 2013, 0]], np.int32)
    clear = np.array([[40, 41, 42], [43, 44, 45]])
    m = truth_map_layers(cls, onset, clear, cutoff_year=2020, first_year=2013)
    assert m.dtype == np.int16 and m.shape == (8, 2, 3)
    assert m[0].tolist() == cls.tolist()
    assert m[1].tolist() == [[0, 2019, 2022], [0, 2013, 0]]
    assert m[2].tolist() == [[0, 2018, 2021], [0, 2013, 0]]  # the year before, not before the series
    assert m[3].tolist() == [[0, 2019, 2022], [0, 2013, 0]]
    assert m[4].tolist() == [[300, 9500, 9500], [300, 9500, 300]]  # p_conversion × 10^4
    assert m[5].tolist() == [[100, 500, 9700], [100, 500, 100]]  # p_after_cutoff: only 2022 is after 2020
    assert m[7].tolist() == clear.tolist()


def test_bad_keys_are_refused() -> None:
    for kw, msg in (({"pages": 10, "plots": 5}, "pages / plots"), ({"min_side": 4, "max_side": 3}, "min_side"), ({"workers": 0}, "workers"), ({"verdicts": ["maybe"]}, "verdicts")):
        with pytest.raises(ConfigError, match=msg):
            check_config(EvidenceBenchConfig(**kw))


def test_memory_sampler_sees_a_child_of_known_size() -> None:
    code = "import time; b = bytearray(300 * 2**20); b[::4096] = b'x' * len(b[::4096]); time.sleep(1.5)"
    with TreeMemory(every=0.05) as mem:
        subprocess.run([sys.executable, "-c", code], check=True)
    assert mem.peak_child > 280
    assert mem.peak_total >= mem.peak_child + mem.peak_parent * 0.5
    assert mem.peak_parent > 10


def test_the_command_draws_pages_over_the_truth_and_writes_the_result(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    work, result = tmp_path / "work", tmp_path / "evidence.json"
    assert main(["benchmark-evidence", f"work_dir={work}", "pages=4", "plots=6", "workers=1", "seed=3", f"result={result}"]) == 0
    out = capsys.readouterr().out
    assert "4 evidence pages in" in out and f"written to {result}" in out
    res = json.loads(result.read_text())
    assert res["pages"] == 4 and res["workers"] == 1
    assert res["pages_per_second"] == pytest.approx(4 / res["seconds"], rel=0.02)
    assert res["met"] == (res["seconds_per_1000"] < 120)
    assert len(res["loadavg_start"]) == 3 and all(x >= 0 for x in res["loadavg_start"])
    assert res["peak_rss_mb"] >= res["parent_peak_rss_mb"] > 50
    assert 0 < res["cores_used"] <= res["cpu_count"] + 0.5 and res["cpu_seconds_per_page"] == pytest.approx(res["cpu_seconds"] / 4, abs=0.002)
    assert res["built"]["flagged"] >= 4 and sum(v for k, v in res["built"]["verdicts"].items() if k != "problem") == 6

    # The pages and their record, as the plot check writes them.
    doc = read_evidence(work / "check")
    assert len(doc["pages"]) == 4
    assert all((work / "check" / "evidence" / p["file"]).stat().st_size > 20_000 for p in doc["pages"])

    # The map is the truth: class and onset year as the truth rasters have them.
    for tile in ("t01", "t02"):
        with rasterio.open(ROOT / "toy_tiles" / tile / "truth.tif") as t, rasterio.open(work / "map" / f"{tile}.tif") as m:
            cls, onset = t.read(1), t.read(2)
            assert (m.read(1) == cls).all()
            conv = cls == 2
            assert (m.read(2)[conv] == onset[conv]).all() and (m.read(2)[~conv] == 0).all()

    # Each plot is centred on a pixel converted after the cutoff (2020) in the truth.
    geoms = shapely.from_wkb(pyogrio.raw.read(work / "plots.gpkg")[2])
    assert len(geoms) == 6
    hits = 0
    for tile in ("t01", "t02"):
        with rasterio.open(ROOT / "toy_tiles" / tile / "truth.tif") as t:
            transform, onset, (h, w) = t.transform, t.read(2), t.shape
        for g in geoms:
            c0, r0 = ~transform * (g.bounds[0], g.bounds[3])
            c1, r1 = ~transform * (g.bounds[2], g.bounds[1])
            if not (0 <= c0 < w and 0 <= r0 < h) or c0 == 0 or r0 == 0 or c1 >= w or r1 >= h:
                continue  # outside this tile, or clipped at its edge (its centre moved)
            side_r, side_c = round(r1 - r0), round(c1 - c0)
            assert 3 <= side_r <= 8 and 3 <= side_c <= 8
            assert onset[int(round(r0)) + side_r // 2, int(round(c0)) + side_c // 2] > 2020
            hits += 1
    assert hits >= 3


@pytest.mark.slow
def test_two_workers_draw_the_same_pages_as_one_process(tmp_path: Path) -> None:
    from datetime import date

    from plantation.benchmarks.evidence import prepare
    from plantation.cli.compose import compose_job
    from plantation.config import to_object
    from plantation.farmplots.evidence import EvidenceConfig, write_pages
    from plantation.mapping.folder import open_map

    cfg = to_object(compose_job("benchmark_evidence", [f"work_dir={tmp_path / 'work'}", "pages=40", "plots=44"], verb="benchmark-evidence"), EvidenceBenchConfig)
    pages, crs, plots_json, built = prepare(cfg)
    mapped = open_map(built["map"], verify=False)
    drawn = {}
    for workers in (1, 2):
        out = tmp_path / f"w{workers}"
        res = write_pages(pages, crs, mapped, cfg.region, date(2020, 12, 31), out, EvidenceConfig(enabled=True, survey=None, workers=workers), plot_level=0.9, plots_json=plots_json)
        assert len(res.pages) == 40
        drawn[workers] = {p["file"]: (out / "evidence" / p["file"]).read_bytes() for p in res.pages}
    # Pages drawn by spawned workers, each on its own reused canvas, are byte for byte the pages of one process.
    assert drawn[1] == drawn[2]
    assert len(set(drawn[1].values())) == 40
