"""The mapping job: every tile of a region, one after another or as tasks on dask.distributed.

Tiles are tasks on dask.distributed (a LocalCluster, or a running scheduler)
or run one after another in this process; both go through
:func:`plantation.mapping.tiles.map_tile_task`, so they give the same files.
Only this process writes ``manifest.json``, after a tile's files are in place,
and after each manifest the region's STAC Collection (:mod:`plantation.mapping.catalog`).
"""

from __future__ import annotations

import json
import logging
import os
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from plantation.errors import ConfigError, PlantationError
from plantation.imagery.config import RegionConfig
from plantation.imagery.region import open_region, open_tile
from plantation.mapping.catalog import Catalogue
from plantation.mapping.folder import NOTICE, RECALIBRATION, Manifest, TileResult, file_digest, open_map
from plantation.mapping.tiles import Settings, TileJob, input_signature, map_tile_task, tile_key
from plantation.model.artefact import Artefact, load
from plantation.model.card import resolve_model
from plantation.model.inference import check_compatible

log = logging.getLogger(__name__)


@dataclass
class EngineConfig:
    """Where tiles run."""

    workers: int = 0
    threads: int = 0
    scheduler: str | None = None
    gdal_cache_mb: int | None = 256


@dataclass
class MapConfig:
    """Schema of ``configs/map.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    model: str = "outputs/train/run"
    out_dir: str = "outputs/maps"
    tiles: list[str] | None = None
    window: int = 128
    pixel_batch: int = 1024
    distilled: bool = True
    min_clear: int = 4
    cutoff_year: int | None = None
    interval_level: float | None = None
    #: A map folder corrected by ``plantation recalibrate`` whose correction every tile takes as it is mapped (None: none).
    recalibration: str | None = None
    resume: bool = True
    quicklook: bool = True
    progress: bool = True
    engine: EngineConfig = field(default_factory=EngineConfig)


def check_config(cfg: MapConfig) -> None:
    """Reject values no mapping could use, naming the key."""
    if cfg.window < 16 or cfg.window % 16:
        raise ConfigError(f"window: {cfg.window!r} must be a multiple of 16 (GeoTIFF blocks), at least 16")
    for key, val in (("pixel_batch", cfg.pixel_batch), ("min_clear", cfg.min_clear)):
        if val < 1:
            raise ConfigError(f"{key}: {val!r} must be at least 1")
    if cfg.interval_level is not None and not 0 < cfg.interval_level < 1:
        raise ConfigError(f"interval_level: {cfg.interval_level!r} must be in (0, 1) or null")
    if cfg.engine.workers < 0 or cfg.engine.threads < 0:
        raise ConfigError("engine.workers and engine.threads must be 0 or more")


@dataclass
class MapSummary:
    """A run's account: tiles mapped now and skipped, pixels, areas in hectares."""

    out_dir: str
    tiles_mapped: list[str]
    tiles_skipped: list[str]
    pixels: int
    mapped_pixels: int
    converted_ha: dict[int, float]
    after_cutoff_ha: float
    cutoff_year: int
    seconds: float
    workers: int
    mapped_now_pixels: int = 0

    def lines(self) -> list[str]:
        out = [
            f"tiles: {len(self.tiles_mapped)} mapped, {len(self.tiles_skipped)} already finished (skipped)",
            f"pixels: {self.pixels:,} ({self.mapped_pixels:,} mapped, {self.pixels - self.mapped_pixels:,} no data: too few clear dates)",
            f"time: {self.seconds:.1f} s" + (f" ({self.mapped_now_pixels / self.seconds:,.0f} px/s)" if self.seconds > 0 and self.mapped_now_pixels else ""),
            "converted area by onset year (ha):",
        ]
        for y, a in sorted(self.converted_ha.items()):
            mark = "  after cutoff" if y > self.cutoff_year else ""
            out.append(f"  {y}  {a:12,.2f}{mark}")
        out.append(f"  total {sum(self.converted_ha.values()):12,.2f}; after {self.cutoff_year}: {self.after_cutoff_ha:,.2f}")
        out.append("These areas are pixel counts from the map; estimate areas with their confidence intervals from a reference sample.")
        return out


def _threads_per_worker(cfg: MapConfig, workers: int) -> int:
    if cfg.engine.threads:
        return cfg.engine.threads
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    # Workers × torch threads must not exceed the cores, or they fight.
    return max(1, cores // max(workers, 1))


def recalibration_of(folder: str, model_digest: str, cutoff_year: int) -> str:
    """The recalibration record (JSON text) of a map corrected by ``plantation recalibrate``, checked to fit this model and cutoff.

    A recalibration is fitted to one model's probabilities and one cutoff
    year: applied to another's it would be a correction of something else.

    Raises:
        PlantationError: the folder is not a map, carries no recalibration,
            or was made by another model or with another cutoff year.
    """
    mapped = open_map(folder)
    tile = next((t for t in mapped.tiles if t.correction and RECALIBRATION in t.correction), None)
    if tile is None:
        raise PlantationError(f"recalibration: {mapped.folder} carries no recalibration; give a map corrected by `plantation recalibrate`")
    if mapped.model_sha256 and mapped.model_sha256 != model_digest:
        raise PlantationError(f"recalibration: {mapped.folder} was mapped by another model (sha256 {mapped.model_sha256[:12]}…); its correction fits that model's probabilities only")
    if mapped.cutoff_year != cutoff_year:
        raise PlantationError(f"recalibration: {mapped.folder} has cutoff year {mapped.cutoff_year}, this map {cutoff_year}; p_after_cutoff was recalibrated for that cutoff")
    return json.dumps(tile.correction[RECALIBRATION], sort_keys=True)


def plan(cfg: MapConfig) -> tuple[list[TileJob], list[TileResult], Artefact, Settings]:
    """Check the model against every tile and split the tiles into jobs to run and finished results."""
    check_config(cfg)
    model_dir = resolve_model(cfg.model)
    art = load(model_dir)
    digest = file_digest([model_dir / "model.json", model_dir / "model.safetensors"])
    workers = cfg.engine.workers
    level = cfg.interval_level if cfg.interval_level is not None else art.card.interval_level
    settings = Settings(
        min_clear=cfg.min_clear,
        cutoff_year=cfg.cutoff_year if cfg.cutoff_year is not None else art.card.cutoff_year,
        interval_level=level,
        interval_mass=art.card.calibration.interval_mass(level),
        window=cfg.window,
        pixel_batch=cfg.pixel_batch,
        distilled=cfg.distilled,
        threads=_threads_per_worker(cfg, workers) if (workers or cfg.engine.threads) else 0,
        quicklook=cfg.quicklook,
        recalibration=recalibration_of(cfg.recalibration, digest, cfg.cutoff_year if cfg.cutoff_year is not None else art.card.cutoff_year) if cfg.recalibration else "",
    )
    region = cfg.region
    tiles = region.tiles
    if cfg.tiles is not None:
        names = {t.name for t in tiles}
        unknown = [n for n in cfg.tiles if n not in names]
        if unknown:
            raise ConfigError(f"tiles: {unknown} not in region {region.name!r} (it has {sorted(names)})")
        tiles = [t for t in tiles if t.name in cfg.tiles]
    stacks = open_region(region)  # headers only; fails early on a bad tile
    by_name = {s.name: s for s in stacks}
    keys = {}
    for t in tiles:
        stack = by_name[t.name]
        check_compatible(art, stack, region.scaling)
        keys[t.name] = tile_key(digest, settings, region, input_signature(stack, t), stack.sensors)
        if stack.reader is not None:
            stack.reader.close()
    out = Path(cfg.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    manifest = Manifest(out / "manifest.json")
    jobs, done = [], []
    for t in tiles:
        prev = manifest.finished(t.name, keys[t.name], out) if cfg.resume else None
        if prev is not None:
            done.append(prev)
        else:
            jobs.append(TileJob(t, region, str(model_dir), digest, settings, str(out), keys[t.name]))
    return jobs, done, art, settings


def _progress(total: int, unit: str, desc: str, enabled: bool, position: int = 0) -> Any:
    from tqdm import tqdm

    return tqdm(total=total, unit=unit, desc=desc, disable=not enabled, unit_scale=unit == "px", position=position, leave=position == 0, dynamic_ncols=True)


def _record(manifest: Manifest, catalogue: Catalogue, result: TileResult) -> None:
    """Record a finished tile in the manifest, then bring the map folder's STAC Collection in step with it."""
    manifest.record(result)
    catalogue.update(manifest.tiles)


def _run_here(jobs: list[TileJob], manifest: Manifest, catalogue: Catalogue, cfg: MapConfig, pixels_of: dict[str, int]) -> list[TileResult]:
    results = []
    tiles_bar = _progress(len(jobs), "tile", "tiles", cfg.progress)
    for job in jobs:
        with _progress(pixels_of[job.tile.name], "px", f"tile {job.tile.name}", cfg.progress, position=1) as bar:
            res = map_tile_task(job, on_window=bar.update)
        _record(manifest, catalogue, res)
        results.append(res)
        tiles_bar.update(1)
    tiles_bar.close()
    return results


def _run_dask(jobs: list[TileJob], manifest: Manifest, catalogue: Catalogue, cfg: MapConfig, pixels_of: dict[str, int]) -> list[TileResult]:
    from distributed import Client, LocalCluster, as_completed

    cluster = None
    if cfg.engine.scheduler:
        client = Client(cfg.engine.scheduler)
    else:
        cluster = LocalCluster(n_workers=cfg.engine.workers, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=logging.ERROR)
        client = Client(cluster)
    results = []
    try:
        futures = [client.submit(map_tile_task, job, pure=False, key=f"map-{job.tile.name}-{job.key[:12]}") for job in jobs]
        total_px = sum(pixels_of[j.tile.name] for j in jobs)
        with _progress(len(jobs), "tile", "tiles", cfg.progress) as bar:
            t0, done_px = time.perf_counter(), 0
            for fut in as_completed(futures):
                res = fut.result()
                _record(manifest, catalogue, res)
                results.append(res)
                done_px += res.pixels
                bar.set_postfix_str(f"{done_px / max(time.perf_counter() - t0, 1e-9):,.0f} px/s, {done_px:,}/{total_px:,} px")
                bar.update(1)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    return results


def run(cfg: MapConfig) -> MapSummary:
    """Map the region's tiles (skipping those already finished) and return the run's summary.

    Raises:
        PlantationError: the model, a tile or the config is unusable; nothing
            is written for a tile that fails.
    """
    t0 = time.perf_counter()
    if cfg.engine.gdal_cache_mb:
        # Before GDAL's first read in this process; LocalCluster workers inherit it.
        os.environ.setdefault("GDAL_CACHEMAX", str(int(cfg.engine.gdal_cache_mb)))
    jobs, done, _art, settings = plan(cfg)
    out = Path(cfg.out_dir)
    manifest = Manifest(out / "manifest.json")
    catalogue = Catalogue(out, name=cfg.region.name)
    pixels_of = {}
    for j in jobs:
        g = open_tile(j.tile, j.region).grid
        pixels_of[j.tile.name] = g.height * g.width
    if not jobs:
        results: list[TileResult] = []
    elif cfg.engine.workers or cfg.engine.scheduler:
        results = _run_dask(jobs, manifest, catalogue, cfg, pixels_of)
    else:
        results = _run_here(jobs, manifest, catalogue, cfg, pixels_of)
    if not results and manifest.tiles:
        # Nothing mapped now: the Collection still covers the finished tiles (a folder mapped before it was written).
        catalogue.update(manifest.tiles)
    every = results + done
    years = sorted({y for r in every for y in r.converted_ha})
    summary = MapSummary(
        out_dir=str(out),
        tiles_mapped=sorted(r.tile for r in results),
        tiles_skipped=sorted(r.tile for r in done),
        pixels=sum(r.pixels for r in every),
        mapped_pixels=sum(r.mapped_pixels for r in every),
        converted_ha={y: sum(r.converted_ha.get(y, 0.0) for r in every) for y in years},
        after_cutoff_ha=sum(r.after_cutoff_ha for r in every),
        cutoff_year=settings.cutoff_year,
        seconds=time.perf_counter() - t0,
        workers=cfg.engine.workers,
        mapped_now_pixels=sum(r.pixels for r in results),
    )
    tmp = out / "summary.json.partial"
    tmp.write_text(json.dumps(asdict(summary) | {"notice": NOTICE}, indent=1))
    os.replace(tmp, out / "summary.json")
    return summary
