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
from plantation.mapping.fire import FIRE_CODES, FireRule
from plantation.mapping.folder import NOTICE, RECALIBRATION, Manifest, TileResult, file_digest, open_map
from plantation.mapping.guard import FolderLock, OutputSpaceError, check_room, ensure_writable, is_disk_full, output_bytes, remove_partials
from plantation.mapping.tiles import Settings, TileJob, input_signature, map_tile_task, tile_key
from plantation.mapping.workers import TorchThreads, limit_torch_threads
from plantation.model.artefact import Artefact, load
from plantation.model.card import resolve_model
from plantation.model.inference import check_compatible
from plantation.model.memory import F32, recurrent_bytes, sample_bytes, series_bytes

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
    #: Peak memory of the whole run (this process and its dask workers), MB; window and pixel_batch are lowered to fit it (None: no budget).
    memory_budget_mb: int | None = None
    #: Thresholds of the fire layers (bands 9-11: fire, fire_year, dnbr), see :class:`plantation.mapping.fire.FireRule`.
    fire: FireRule = field(default_factory=FireRule)
    engine: EngineConfig = field(default_factory=EngineConfig)


def _cores() -> int:
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


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
    if cfg.memory_budget_mb is not None and cfg.memory_budget_mb < 1:
        raise ConfigError(f"memory_budget_mb: {cfg.memory_budget_mb!r} must be at least 1, or null for no budget")
    if not cfg.engine.scheduler:
        # Processes × torch threads beyond the cores of this machine fight for them (a running scheduler's workers are its own business).
        cores = _cores()
        procs = max(cfg.engine.workers, 1)
        threads = _threads_per_worker(cfg, cfg.engine.workers)
        if procs * threads > cores:
            what = f"engine.workers={cfg.engine.workers} × engine.threads={threads}" if cfg.engine.workers else f"engine.threads={threads}"
            raise ConfigError(f"{what}: {procs * threads} torch threads on {cores} cores would fight for them; keep workers × threads at most {cores} (threads=0 divides the cores)")


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
    #: Output pixels per window side and pixels per recurrent pass used (lowered to fit memory_budget_mb when set).
    window: int = 0
    pixel_batch: int = 0
    #: Torch threads of each process that mapped tiles now, as read inside it after its tiles ("here": this process).
    torch_threads: dict[str, int] = field(default_factory=dict)
    #: Hectares of each fire code but ``none`` (converted_burnt, converted_not_burnt, converted_unknown, escaped_fire), pixel counts like converted_ha.
    fire_ha: dict[str, float] = field(default_factory=dict)
    #: Hectares mapped as converted with fire whose fire year is after the cutoff year.
    fire_after_cutoff_ha: float = 0.0

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
        if self.fire_ha:
            fire = ", ".join(f"{name} {self.fire_ha.get(name, 0.0):,.2f}" for name in FIRE_NAMES)
            out.append(f"fire (ha): {fire}; cleared with fire after {self.cutoff_year}: {self.fire_after_cutoff_ha:,.2f}")
        out.append("These areas are pixel counts from the map; estimate areas with their confidence intervals from a reference sample.")
        return out


#: The fire codes a summary counts (every code of :data:`plantation.mapping.fire.FIRE_CODES` but ``none``), in code order.
FIRE_NAMES: tuple[str, ...] = tuple(name for name, code in sorted(FIRE_CODES.items(), key=lambda kv: kv[1]) if name != "none")


def _threads_per_worker(cfg: MapConfig, workers: int) -> int:
    if cfg.engine.threads:
        return cfg.engine.threads
    # Workers × torch threads must not exceed the cores, or they fight.
    return max(1, _cores() // max(workers, 1))


#: Resident memory of a dask nanny process (it watches and restarts its worker), MB; measured, counted per worker in a budget.
NANNY_MB = 100
#: What a mapping process takes on after planning besides its windows (GDAL's drivers and the COG writer loaded, a tile's outputs,
#: the allocator's slack), MB; counted per mapping process. Measured on the demo region at 57-123 MB over windows of 16-128 px.
RUN_OVERHEAD_MB = 128


def window_bytes(window: int, pixel_batch: int, *, halo: int, dates: int, channels: int, years: int, network: dict[str, Any], networks: int = 1) -> int:
    """Estimated peak bytes one mapping process spends on windows (beyond the process itself and GDAL's cache).

    With ``side = window + 2·halo``: the reader keeps two windows ahead and
    the network holds one, each ``dates × side² × (4·channels + 1)`` bytes
    (float32 features, a validity byte), plus one read in progress (the
    same again); the network's work over ``side²`` pixels
    (:func:`plantation.model.memory.series_bytes`); the recurrent part over
    ``pixel_batch`` pixels per network (:func:`plantation.model.memory.recurrent_bytes`);
    the outputs ``window² × (years + 3) × 4 × (networks + 2)``. A rule of
    thumb checked by the resource case of the faults benchmark, not a count
    of every allocation.
    """
    side2 = (window + 2 * halo) ** 2
    inputs = 4 * sample_bytes(dates=dates, channels=channels, pixels=side2)
    network_work = series_bytes(pixels=side2, dates=dates, channels=channels, years=years, network=network)
    recurrent = recurrent_bytes(pixels=pixel_batch, years=years, network=network) * networks
    outputs = window**2 * (years + 3) * F32 * (networks + 2)
    return int(inputs + network_work + recurrent + outputs)


@dataclass(frozen=True)
class Budget:
    """How a memory budget was spent: per process, MB."""

    #: The budget's share of each mapping process (the whole budget in this process; with workers, what is left after this process, divided).
    share_mb: float
    #: A mapping process before its first window (measured on this process after loading the model).
    process_mb: float
    #: GDAL's block cache, counted in full in each process.
    gdal_cache_mb: float
    window: int
    pixel_batch: int
    window_mb: float


def fit_budget(cfg: MapConfig, *, process_mb: float, halo: int, dates: int, channels: int, years: int, network: dict[str, Any], networks: int) -> Budget:
    """The largest window (a multiple of 16, at most ``cfg.window``) and pixel batch (at most ``cfg.pixel_batch``) within ``cfg.memory_budget_mb``.

    The rule: with ``w`` worker processes the budget covers this process
    (``process_mb``) and ``w`` workers, each as large as this process plus
    its nanny (:data:`NANNY_MB`) plus GDAL's cache plus what mapping adds
    (:data:`RUN_OVERHEAD_MB`) plus :func:`window_bytes`; without workers this
    process maps and the budget covers it plus GDAL's cache, the overhead and
    the windows. The pixel batch shrinks first (down to 256),
    then the window.

    Raises:
        ConfigError: not even a 16-pixel window fits, naming what the budget leaves.
    """
    budget = float(cfg.memory_budget_mb or 0)
    workers = cfg.engine.workers if not cfg.engine.scheduler else 0
    gdal = float(cfg.engine.gdal_cache_mb or 0)
    share = (budget - process_mb) / workers if workers else budget
    room = share - process_mb - gdal - RUN_OVERHEAD_MB - (NANNY_MB if workers else 0)

    def mb(win: int, batch: int) -> float:
        return window_bytes(win, batch, halo=halo, dates=dates, channels=channels, years=years, network=network, networks=networks) / 2**20

    batches = sorted({cfg.pixel_batch, *(b for b in (4096, 2048, 1024, 512, 256) if b < cfg.pixel_batch)}, reverse=True)
    for win in range(cfg.window - cfg.window % 16, 15, -16):
        for batch in batches:
            if mb(win, batch) <= room:
                return Budget(share, process_mb, gdal, win, batch, mb(win, batch))
    need = process_mb + gdal + RUN_OVERHEAD_MB + (NANNY_MB if workers else 0) + mb(16, batches[-1])
    per = f"{share:,.0f} MB per worker" if workers else f"{share:,.0f} MB"
    raise ConfigError(
        f"memory_budget_mb: {cfg.memory_budget_mb} MB leaves {per}, less than a mapping process needs with a 16-px window "
        f"({need:,.0f} MB: {process_mb:,.0f} MB the process itself, {gdal:,.0f} MB GDAL's cache, {RUN_OVERHEAD_MB} MB mapping's own); "
        "raise the budget, use fewer engine.workers or a smaller engine.gdal_cache_mb"
    )


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
    window, pixel_batch = cfg.window, cfg.pixel_batch
    if cfg.memory_budget_mb is not None:
        import psutil

        net = art.members[0]
        budget = fit_budget(
            cfg,
            process_mb=psutil.Process().memory_info().rss / 2**20,
            halo=net.halo,
            dates=len(art.card.dates),
            channels=net.n_channels,
            years=len(art.card.years),
            network=art.card.network,
            networks=1 if cfg.distilled and art.distilled is not None else len(art.members),
        )
        window, pixel_batch = budget.window, budget.pixel_batch
        log.info("memory budget %s MB: window %d, pixel_batch %d (%.0f MB per process, %.0f MB of it windows)", cfg.memory_budget_mb, window, pixel_batch, budget.share_mb, budget.window_mb)
    settings = Settings(
        min_clear=cfg.min_clear,
        cutoff_year=cfg.cutoff_year if cfg.cutoff_year is not None else art.card.cutoff_year,
        interval_level=level,
        interval_mass=art.card.calibration.interval_mass(level),
        window=window,
        pixel_batch=pixel_batch,
        distilled=cfg.distilled,
        threads=_threads_per_worker(cfg, workers) if (workers or cfg.engine.threads) else 0,
        quicklook=cfg.quicklook,
        recalibration=recalibration_of(cfg.recalibration, digest, cfg.cutoff_year if cfg.cutoff_year is not None else art.card.cutoff_year) if cfg.recalibration else "",
        fire=cfg.fire,
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


def _run_here(jobs: list[TileJob], manifest: Manifest, catalogue: Catalogue, cfg: MapConfig, pixels_of: dict[str, int]) -> tuple[list[TileResult], dict[str, int]]:
    import torch

    results = []
    tiles_bar = _progress(len(jobs), "tile", "tiles", cfg.progress)
    for job in jobs:
        with _progress(pixels_of[job.tile.name], "px", f"tile {job.tile.name}", cfg.progress, position=1) as bar:
            res = map_tile_task(job, on_window=bar.update)
        _record(manifest, catalogue, res)
        results.append(res)
        tiles_bar.update(1)
    tiles_bar.close()
    return results, {"here": torch.get_num_threads()}


def _torch_threads() -> int:
    import torch

    return torch.get_num_threads()


def _run_dask(jobs: list[TileJob], manifest: Manifest, catalogue: Catalogue, cfg: MapConfig, pixels_of: dict[str, int]) -> tuple[list[TileResult], dict[str, int]]:
    """Tiles as tasks on dask.distributed.

    A worker that dies mid-tile (killed, out of memory) is restarted by its
    nanny and the scheduler gives its tile to a worker again (up to
    ``distributed.scheduler.allowed-failures`` times, 3 by default); the
    tile's temporary files are rewritten from the start by the new attempt.
    On a running scheduler each worker's torch threads are set by a worker
    plugin (:mod:`plantation.mapping.workers`) unless ``engine.threads`` is
    given.
    """
    from distributed import Client, LocalCluster, as_completed
    from distributed.scheduler import KilledWorker

    cluster = None
    if cfg.engine.scheduler:
        client = Client(cfg.engine.scheduler)
    else:
        cluster = LocalCluster(n_workers=cfg.engine.workers, threads_per_worker=1, processes=True, dashboard_address=None, silence_logs=logging.ERROR)
        client = Client(cluster)
    results = []
    limited = False
    try:
        if cfg.engine.scheduler and not cfg.engine.threads:
            # Its workers' machines are not this one: each worker takes its machine's cores ÷ the dask threads there.
            log.info("torch threads per task by host: %s", limit_torch_threads(client))
            limited = True
        futures = [client.submit(map_tile_task, job, pure=False, key=f"map-{job.tile.name}-{job.key[:12]}") for job in jobs]
        tile_of = {f.key: j.tile.name for f, j in zip(futures, jobs, strict=True)}
        total_px = sum(pixels_of[j.tile.name] for j in jobs)
        with _progress(len(jobs), "tile", "tiles", cfg.progress) as bar:
            t0, done_px = time.perf_counter(), 0
            for fut in as_completed(futures):
                try:
                    res = fut.result()
                except KilledWorker:
                    raise PlantationError(
                        f"tile {tile_of[fut.key]}: every dask worker that took it died (killed, or out of memory?); lower window or engine.workers, or set memory_budget_mb"
                    ) from None
                _record(manifest, catalogue, res)
                results.append(res)
                done_px += res.pixels
                bar.set_postfix_str(f"{done_px / max(time.perf_counter() - t0, 1e-9):,.0f} px/s, {done_px:,}/{total_px:,} px")
                bar.update(1)
        threads = {str(k): int(v) for k, v in client.run(_torch_threads).items()}
    finally:
        if limited:
            try:
                client.unregister_worker_plugin(TorchThreads.name)
            except Exception:  # a scheduler gone already: nothing left to tidy
                log.debug("could not unregister %s", TorchThreads.name)
        client.close()
        if cluster is not None:
            cluster.close()
    return results, threads


def run(cfg: MapConfig) -> MapSummary:
    """Map the region's tiles (skipping those already finished) and return the run's summary.

    The output folder is locked for the run (a second run on it is refused,
    see :mod:`plantation.mapping.guard`); temporary files a killed run left
    are removed; the folder must be writable and hold the outputs' estimated
    size before any tile is mapped. A run that fails removes its temporary
    files; a full disk is reported in one line.

    Raises:
        PlantationError: the model, a tile or the config is unusable, the
            folder is busy, read-only or full; nothing is written for a tile
            that fails.
    """
    t0 = time.perf_counter()
    check_config(cfg)
    if cfg.engine.gdal_cache_mb:
        # Before GDAL's first read in this process; LocalCluster workers inherit it.
        os.environ.setdefault("GDAL_CACHEMAX", str(int(cfg.engine.gdal_cache_mb)))
    out = Path(cfg.out_dir)
    created = not out.exists()
    ensure_writable(out)
    try:
        return _run_in(cfg, out, t0)
    except BaseException:
        # A run refused before writing anything (a bad model, region or tile) leaves no empty folder of its own behind.
        if created and out.is_dir() and not any(out.iterdir()):
            out.rmdir()
        raise


def _run_in(cfg: MapConfig, out: Path, t0: float) -> MapSummary:
    """:func:`run` in a writable ``out``: lock it, clear an earlier run's temporary files, map."""
    with FolderLock(out):
        stale = remove_partials(out)
        if stale:
            log.info("%s: removed %d temporary files of an earlier run that did not finish", out, len(stale))
        try:
            summary = _run_locked(cfg, out, t0)
            # A dask worker killed mid-tile left its raw file under its own process id; its tile was done again by another.
            left = remove_partials(out)
            if left:
                log.info("%s: removed %d temporary files of workers that died mid-tile: %s", out, len(left), ", ".join(p.name for p in left))
            return summary
        except BaseException as exc:
            remove_partials(out)
            if isinstance(exc, Exception) and not isinstance(exc, PlantationError) and is_disk_full(exc, out):
                first = str(exc).splitlines()[0] if str(exc) else ""
                raise OutputSpaceError(f"out_dir: {out}: the disk filled up while writing ({type(exc).__name__}: {first}); free space there and run again (finished tiles are kept)") from exc
            raise


def _run_locked(cfg: MapConfig, out: Path, t0: float) -> MapSummary:
    jobs, done, _art, settings = plan(cfg)
    manifest = Manifest(out / "manifest.json")
    catalogue = Catalogue(out, name=cfg.region.name)
    pixels_of = {}
    for j in jobs:
        g = open_tile(j.tile, j.region).grid
        pixels_of[j.tile.name] = g.height * g.width
    concurrent = cfg.engine.workers if cfg.engine.workers and not cfg.engine.scheduler else 1
    check_room(out, output_bytes(pixels_of.values(), concurrent, cfg.quicklook))
    threads: dict[str, int] = {}
    if not jobs:
        results: list[TileResult] = []
    elif cfg.engine.workers or cfg.engine.scheduler:
        results, threads = _run_dask(jobs, manifest, catalogue, cfg, pixels_of)
    else:
        results, threads = _run_here(jobs, manifest, catalogue, cfg, pixels_of)
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
        window=settings.window,
        pixel_batch=settings.pixel_batch,
        torch_threads=threads,
        # Tiles mapped before the fire layers carry no fire areas: the totals cover those that do.
        fire_ha={name: sum(r.fire_ha.get(name, 0.0) for r in every) for name in FIRE_NAMES} if any(r.fire_ha for r in every) else {},
        fire_after_cutoff_ha=sum(r.fire_after_cutoff_ha for r in every),
    )
    tmp = out / "summary.json.partial"
    tmp.write_text(json.dumps(asdict(summary) | {"notice": NOTICE}, indent=1))
    os.replace(tmp, out / "summary.json")
    return summary
