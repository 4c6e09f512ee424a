"""How fast evidence pages are drawn for many flagged plots (``plantation benchmark-evidence``).

The region is the demo region's imagery (``region``, default ``toy``: two
192 × 192 tiles, 48 dates). The map is written here in the map format
(:mod:`plantation.mapping.folder`) from the simulator's truth rasters rather
than by a trained model, so that the benchmark times the pages alone and
runs in minutes: class and onset year as the truth has them, the onset
interval the onset year and the year before it, p_conversion 0.95 on
conversions and 0.03 elsewhere, p_after_cutoff 0.97 on conversions after the
cutoff year, 0.05 on earlier ones and 0.01 elsewhere, clear dates counted
from the imagery's own mask (``map=<folder>`` uses a map of the region made
by ``plantation map`` instead).

The plots: ``plots`` rectangles, each ``min_side``–``max_side`` pixels a side
(drawn uniformly and independently for height and width, seeded by
``seed``), centred on pixels mapped as converted after the cutoff year
(drawn without replacement over every tile), clipped to their tile, written
as a GeoPackage in the tiles' CRS. They overlap where the centres are close:
the check measures each on its own. The plot check
(:func:`plantation.farmplots.cutoff.run`, pages off) gives their verdicts
and ``plots.json``; the first ``pages`` plots with a verdict in ``verdicts``
(in the tables' order, most attention first) get a page.

Timed: :func:`plantation.farmplots.evidence.write_pages` for those plots with
``workers`` processes, ``repeats`` times (median kept), as the plot check
calls it (the folder swapped in whole, ``evidence.json`` written). Memory: a
thread samples the resident set of this process and of its children every
0.1 s while the pages are drawn; ``peak_rss_mb`` is the largest sum seen,
``parent_peak_rss_mb`` and ``worker_peak_rss_mb`` the largest single
figures. The machine's load average is recorded before each repeat, and the
CPU seconds of this process and its workers (``cores_used``: CPU seconds
over wall seconds), since a shared machine's reading must be judged by
them. The result goes to
``bench/results/evidence.json`` (configs/benchmark_evidence.yaml).
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import threading
import time
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import shapely

from plantation.errors import ConfigError
from plantation.farmplots import cutoff as plot_check
from plantation.farmplots.evidence import VERDICT_NAMES, EvidenceConfig, PagePlot, write_pages
from plantation.imagery.config import RegionConfig
from plantation.imagery.region import open_tile
from plantation.mapping.folder import FORMAT, LAYERS, MANIFEST, NODATA, SCALE, describe_layers, open_map
from plantation.records import write_object
from plantation.reference.labels import LABEL_CODES

#: Seconds a thousand pages may take on two cores (issue 17's target).
TARGET_SECONDS_PER_1000 = 120.0
_CONVERSION = LABEL_CODES["conversion"]
#: Changes when truth_map_layers changes, so a kept map is rebuilt.
_LAYERS_VERSION = 2


@dataclass
class EvidenceBenchConfig:
    """Schema of ``configs/benchmark_evidence.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    #: Where the map, the plots and the pages are kept between runs.
    work_dir: str = "bench/cache/evidence"
    #: A map of the region (a folder `plantation map` wrote); None: written here from the truth rasters.
    map: str | None = None
    #: Conversions after 31 December of this year count as after the cutoff (the truth-made map's cutoff_year).
    cutoff_year: int = 2020
    #: Rectangles laid over the map.
    plots: int = 1100
    #: Pages drawn (the first flagged plots, in the tables' order).
    pages: int = 1000
    #: Smallest and largest side of a plot, pixels.
    min_side: int = 3
    max_side: int = 8
    #: Seed of the plots' centres and sides.
    seed: int = 0
    #: Verdicts that get a page.
    verdicts: list[str] = field(default_factory=lambda: ["strong_evidence", "review"])
    #: Processes drawing the pages.
    workers: int = 2
    #: Timed runs; the median is kept.
    repeats: int = 1
    #: Where the JSON result goes.
    result: str = "bench/results/evidence.json"


def check_config(cfg: EvidenceBenchConfig) -> None:
    """Reject values the benchmark cannot use, naming the key."""
    if cfg.pages < 1 or cfg.plots < cfg.pages:
        raise ConfigError(f"pages / plots: {cfg.pages!r} / {cfg.plots!r}; need 1 <= pages <= plots")
    if not 1 <= cfg.min_side <= cfg.max_side:
        raise ConfigError(f"min_side / max_side: {cfg.min_side!r} / {cfg.max_side!r}; need 1 <= min_side <= max_side")
    if cfg.workers < 1 or cfg.repeats < 1:
        raise ConfigError(f"workers / repeats: {cfg.workers!r} / {cfg.repeats!r}; both must be 1 or more")
    bad = [v for v in cfg.verdicts if v not in VERDICT_NAMES]
    if bad or not cfg.verdicts:
        raise ConfigError(f"verdicts: {cfg.verdicts!r}; use one or more of {list(VERDICT_NAMES)}")


# --------------------------------------------------------------------------- the map, from the truth


def _p(x: float) -> int:
    return int(round(x / SCALE))


def truth_map_layers(truth_class: np.ndarray, truth_onset: np.ndarray, clear_dates: np.ndarray, *, cutoff_year: int, first_year: int) -> np.ndarray:
    """The map's eight int16 layers (:data:`plantation.mapping.folder.LAYERS`, (8, h, w)) from a truth raster's class and onset-year bands (see the module docstring)."""
    conv = (truth_class == _CONVERSION) & (truth_onset > 0)
    after = conv & (truth_onset > cutoff_year)
    out = np.zeros((len(LAYERS),) + truth_class.shape, np.int16)
    out[0] = truth_class
    out[1] = np.where(conv, truth_onset, 0)
    out[2] = np.where(conv, np.maximum(truth_onset - 1, first_year), 0)
    out[3] = np.where(conv, truth_onset, 0)
    out[4] = np.where(conv, _p(0.95), _p(0.03))
    out[5] = np.where(after, _p(0.97), np.where(conv, _p(0.05), _p(0.01)))
    out[6] = _p(0.05)
    out[7] = clear_dates
    return out


def build_truth_map(region: RegionConfig, folder: Path, cutoff_year: int) -> Path:
    """A map folder of the region (tiles and ``manifest.json``) written from each tile's truth raster; kept when its record matches."""
    stamp = {"layers": _LAYERS_VERSION, "region": region.name, "cutoff_year": cutoff_year, "tiles": [(t.name, t.path, t.truth) for t in region.tiles]}
    key = hashlib.sha256(json.dumps(stamp, sort_keys=True, default=str).encode()).hexdigest()
    if (folder / MANIFEST).is_file() and (folder / "built.json").is_file() and json.loads((folder / "built.json").read_text()).get("key") == key:
        return folder
    missing = [t.name for t in region.tiles if not t.truth]
    if missing:
        raise ConfigError(f"region {region.name!r}: tiles {missing} have no truth raster; name a simulated region, or a map of this region with map=<folder>")
    folder.mkdir(parents=True, exist_ok=True)
    entries: dict[str, Any] = {}
    for t in region.tiles:
        stack = open_tile(t, region)
        years = np.asarray(stack.dates, dtype="datetime64[Y]").astype(int) + 1970
        _, valid = stack.read(0, 0, stack.grid.height, stack.grid.width)
        with rasterio.open(t.truth) as src:
            cls, onset = src.read([1, 2])
            profile = {"crs": src.crs, "transform": src.transform}
        if not stack.grid.same_as(type(stack.grid)(profile["crs"], profile["transform"], cls.shape[0], cls.shape[1])):
            raise ConfigError(f"{t.truth}: the truth raster is not on tile {t.name!r}'s grid; use the simulator's own truth")
        bands = truth_map_layers(cls, onset, valid.sum(axis=0), cutoff_year=cutoff_year, first_year=int(years.min()))
        path = folder / f"{t.name}.tif"
        tmp = path.with_name(path.name + ".partial")
        prof = {"driver": "GTiff", "width": cls.shape[1], "height": cls.shape[0], "count": len(LAYERS), "dtype": "int16", "nodata": NODATA, "tiled": True, "compress": "deflate", **profile}
        with rasterio.open(tmp, "w", **prof) as dst:
            dst.write(bands)
            describe_layers(dst, LAYERS)
            dst.update_tags(cutoff_year=str(cutoff_year), interval_level="0.8", producer="benchmark-evidence: from the truth raster")
        os.replace(tmp, path)
        px_ha = abs(profile["transform"].a * profile["transform"].e) / 1e4
        conv_years, counts = np.unique(bands[1][bands[1] > 0], return_counts=True)
        converted = {str(int(y)): 0.0 for y in np.unique(years)} | {str(int(y)): round(float(c) * px_ha, 4) for y, c in zip(conv_years, counts, strict=True)}
        entries[t.name] = {"file": path.name, "tile": t.name, "sha256": hashlib.sha256(path.read_bytes()).hexdigest(), "converted_ha": converted}
    write_object({"format": FORMAT, "producer": "plantation benchmark-evidence (from the truth rasters)", "tiles": entries}, folder / MANIFEST)
    write_object({"key": key, **stamp}, folder / "built.json")
    return folder


# --------------------------------------------------------------------------- the plots


def lay_plots(map_dir: Path, n: int, *, min_side: int, max_side: int, seed: int, cutoff_year: int) -> tuple[list[Any], list[str], str]:
    """``n`` rectangles centred on pixels mapped as converted after ``cutoff_year`` (see the module docstring): geometries in the tiles' CRS, ids, and that CRS as WKT.

    Raises:
        ConfigError: the map has fewer such pixels than ``n``, or its tiles are not in one CRS.
    """
    mapped = open_map(map_dir, verify=False)
    crs = {t.grid.crs.to_wkt() for t in mapped.tiles}
    if len(crs) != 1:
        raise ConfigError(f"{map_dir}: tiles in {len(crs)} CRSs; the benchmark lays its plots in one")
    centres: list[tuple[int, int, int]] = []
    for k, t in enumerate(mapped.tiles):
        with rasterio.open(t.path) as src:
            onset = src.read(2)
        rr, cc = np.nonzero(onset > cutoff_year)
        centres.extend(zip([k] * len(rr), rr.tolist(), cc.tolist(), strict=True))
    if len(centres) < n:
        raise ConfigError(f"{map_dir}: only {len(centres)} pixels are mapped as converted after {cutoff_year}; ask for plots <= {len(centres)}")
    rng = np.random.default_rng(seed)
    pick = rng.choice(len(centres), size=n, replace=False)
    sides = rng.integers(min_side, max_side + 1, size=(n, 2))
    geoms, ids = [], []
    for i, (p, (hh, ww)) in enumerate(zip(pick, sides, strict=True)):
        k, r, c = centres[int(p)]
        g = mapped.tiles[k].grid
        r0, c0 = max(r - int(hh) // 2, 0), max(c - int(ww) // 2, 0)
        r1, c1 = min(r0 + int(hh), g.height), min(c0 + int(ww), g.width)
        (xa, ya), (xb, yb) = g.transform * (c0, r0), g.transform * (c1, r1)
        geoms.append(shapely.box(min(xa, xb), min(ya, yb), max(xa, xb), max(ya, yb)))
        ids.append(f"EVB-{i + 1:05d}")
    return geoms, ids, crs.pop()


def write_plots_file(path: Path, geoms: list[Any], ids: list[str], crs_wkt: str) -> Path:
    """The plots as a GeoPackage (one ``id`` attribute), written under a temporary name."""
    import pyogrio

    tmp = path.with_name(path.stem + ".partial" + path.suffix)
    tmp.unlink(missing_ok=True)
    wkb = np.array([shapely.to_wkb(g) for g in geoms], dtype=object)
    pyogrio.raw.write(tmp, wkb, [np.array(ids, dtype=object)], ["id"], geometry_type="Polygon", crs=crs_wkt, driver="GPKG")
    os.replace(tmp, path)
    return path


# --------------------------------------------------------------------------- memory while drawing


class TreeMemory:
    """Samples the resident set of this process and its children (recursively) in a thread: the peak of their sum, and each one's own peak, MB."""

    def __init__(self, every: float = 0.1) -> None:
        import psutil

        self._proc = psutil.Process()
        self._every = every
        self._stop = threading.Event()
        self.peak_total = 0.0
        self.peak_parent = 0.0
        self.peak_child = 0.0
        self._thread = threading.Thread(target=self._loop, daemon=True)

    def _sample(self) -> None:
        import psutil

        total = 0.0
        try:
            own = self._proc.memory_info().rss / 2**20
        except psutil.Error:
            return
        total += own
        self.peak_parent = max(self.peak_parent, own)
        for ch in self._proc.children(recursive=True):
            try:
                rss = ch.memory_info().rss / 2**20
            except psutil.Error:
                continue
            total += rss
            self.peak_child = max(self.peak_child, rss)
        self.peak_total = max(self.peak_total, total)

    def _loop(self) -> None:
        while not self._stop.is_set():
            self._sample()
            self._stop.wait(self._every)

    def __enter__(self) -> TreeMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join()
        self._sample()


def _cpu_seconds() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


# --------------------------------------------------------------------------- the run


def prepare(cfg: EvidenceBenchConfig) -> tuple[list[PagePlot], Any, Path, dict[str, Any]]:
    """The map, the plots, their verdicts: (plots that get a page, their CRS, plots.json, what was built)."""
    from pyproj import CRS

    work = Path(cfg.work_dir)
    map_dir = Path(cfg.map) if cfg.map else build_truth_map(cfg.region, work / "map", cfg.cutoff_year)
    mapped = open_map(map_dir, verify=False)
    geoms, ids, crs_wkt = lay_plots(map_dir, cfg.plots, min_side=cfg.min_side, max_side=cfg.max_side, seed=cfg.seed, cutoff_year=mapped.cutoff_year)
    plots_file = write_plots_file(work / "plots.gpkg", geoms, ids, crs_wkt)
    out = work / "check"
    res = plot_check.run(plot_check.PlotsConfig(plots=str(plots_file), map=str(map_dir), out_dir=str(out), progress=False, region=cfg.region, evidence=EvidenceConfig(enabled=False)))
    doc = plot_check.read_plots_json(res.files["json"])
    records = {str(r["id"]): r for r in doc["plots"]}
    by_id = dict(zip(ids, geoms, strict=True))
    flagged = [str(r["id"]) for r in doc["plots"] if r.get("status") == "ok" and r.get("verdict") in cfg.verdicts]
    if len(flagged) < cfg.pages:
        raise ConfigError(f"plots: only {len(flagged)} of {cfg.plots} plots have a verdict in {cfg.verdicts}; ask for more plots (plots=...) or fewer pages")
    pages = [PagePlot(pid, by_id[pid], records[pid]) for pid in flagged[: cfg.pages]]
    built = {
        "map": str(map_dir),
        "map_source": "a map folder given (map=...)" if cfg.map else "written from the simulator's truth rasters",
        "tiles": [t.name for t in mapped.tiles],
        "plots": cfg.plots,
        "plot_sides_px": [cfg.min_side, cfg.max_side],
        "verdicts": doc["counts"],
        "flagged": len(flagged),
        "seed": cfg.seed,
    }
    return pages, CRS.from_wkt(crs_wkt), res.files["json"], built


def run(cfg: EvidenceBenchConfig) -> dict[str, Any]:
    """Build or reuse the region, time the pages ``repeats`` times and write the result (see the module docstring)."""
    import matplotlib

    check_config(cfg)
    pages, crs, plots_json, built = prepare(cfg)
    mapped = open_map(built["map"], verify=False)
    cutoff = date(mapped.cutoff_year, 12, 31)
    ev_cfg = EvidenceConfig(enabled=True, verdicts=list(cfg.verdicts), survey=None, workers=cfg.workers)
    out = Path(cfg.work_dir) / "check"
    runs: list[dict[str, Any]] = []
    for _ in range(cfg.repeats):
        load = os.getloadavg()
        cpu0 = _cpu_seconds()
        with TreeMemory() as mem:
            t0 = time.perf_counter()
            res = write_pages(pages, crs, mapped, cfg.region, cutoff, out, ev_cfg, plot_level=0.9, plots_json=plots_json)
            seconds = time.perf_counter() - t0
        sizes = [(res.folder / p["file"]).stat().st_size for p in res.pages]
        runs.append(
            {
                "seconds": round(seconds, 2),
                "pages": len(res.pages),
                "cpu_seconds": round(_cpu_seconds() - cpu0, 1),
                "loadavg_start": [round(x, 2) for x in load],
                "loadavg_end": [round(x, 2) for x in os.getloadavg()],
                "peak_rss_mb": round(mem.peak_total, 1),
                "parent_peak_rss_mb": round(mem.peak_parent, 1),
                "worker_peak_rss_mb": round(mem.peak_child, 1),
                "page_kb_mean": round(float(np.mean(sizes)) / 1024, 1) if sizes else None,
            }
        )
        print(f"{len(res.pages)} pages in {seconds:.1f} s ({len(res.pages) / seconds:.2f} pages/s), load average {load[0]:.2f} at the start", flush=True)
    med = sorted(runs, key=lambda r: r["seconds"])[len(runs) // 2]
    n = med["pages"]
    result = {
        "pages": n,
        "seconds": med["seconds"],
        "pages_per_second": round(n / med["seconds"], 2),
        "seconds_per_1000": round(1000 * med["seconds"] / n, 1),
        "target_seconds_per_1000": TARGET_SECONDS_PER_1000,
        "met": 1000 * med["seconds"] / n < TARGET_SECONDS_PER_1000,
        "workers": cfg.workers,
        "cpu_count": os.cpu_count(),
        "peak_rss_mb": max(r["peak_rss_mb"] for r in runs),
        "parent_peak_rss_mb": max(r["parent_peak_rss_mb"] for r in runs),
        "worker_peak_rss_mb": max(r["worker_peak_rss_mb"] for r in runs),
        "cpu_seconds": med["cpu_seconds"],
        "cpu_seconds_per_page": round(med["cpu_seconds"] / n, 3),
        # The share of the machine's cores the run got: well under workers / cores means other jobs were taking the rest.
        "cores_used": round(med["cpu_seconds"] / med["seconds"], 2),
        "loadavg_start": med["loadavg_start"],
        "page_kb_mean": med["page_kb_mean"],
        "repeats": runs,
        "region": cfg.region.name,
        "built": built,
        "matplotlib": matplotlib.__version__,
        "python": platform.python_version(),
    }
    write_object(result, cfg.result)
    return result


def summary_lines(result: dict[str, Any]) -> list[str]:
    """The result in a few lines for the terminal."""
    met = "met" if result["met"] else "NOT met"
    la = result["loadavg_start"]
    return [
        f"{result['pages']} evidence pages in {result['seconds']} s with {result['workers']} workers: {result['pages_per_second']} pages/s, "
        f"{result['seconds_per_1000']} s per 1,000 (target {result['target_seconds_per_1000']:.0f} s: {met})",
        f"peak RSS {result['peak_rss_mb']} MB in all (parent {result['parent_peak_rss_mb']} MB, largest worker {result['worker_peak_rss_mb']} MB); "
        f"{result['cpu_seconds_per_page']} CPU s a page, {result['cores_used']} cores used on average; load average at the start {la[0]}, {la[1]}, {la[2]} on {result['cpu_count']} cores",
    ]
