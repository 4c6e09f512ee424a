"""Map every pixel of a region's tiles: one Cloud-Optimized GeoTIFF per tile, with its style, quicklook and a manifest.

Per tile, windows are read (with the network's halo), inferred fully
convolutionally and written in a pipeline: one thread reads the next window
while the network runs on this one, another summarises and writes the last
one. Peak memory depends on the window, not on the tile. The finished
tiled GeoTIFF is converted to a COG only once the tile is complete (GDAL
builds overviews from the whole raster).

Tiles are tasks on dask.distributed (a LocalCluster, or a running scheduler)
or run one after another in this process; both go through
:func:`map_tile_task`, so they give the same files.

Output layers (all int16 in one file, since a GeoTIFF has one data type;
scaled layers carry a GDAL scale, which rasterio, GDAL and QGIS apply):

=====  ==============  =====================================================
band   description     content
=====  ==============  =====================================================
1      class           1 stable natural forest, 2 converted to plantation
                       during the series, 3 plantation before the series,
                       4 other land or disturbance (codes of
                       :data:`plantation.labels.LABEL_CODES`)
2      onset_year      modal conversion year; 0 where no conversion is mapped
3, 4   onset_lo/hi     the interval of conversion years (level from the
                       model card or config); 0 where no conversion
5      p_conversion    probability of conversion in any year (× 1e-4)
6      p_after_cutoff  probability of conversion after the cutoff year (× 1e-4)
7      epistemic       ensemble disagreement, mutual information in nats (× 1e-4)
8      clear_dates     dates on which the pixel was observed (never nodata)
=====  ==============  =====================================================

Bands 1–7 hold :data:`NODATA` where a pixel has fewer than ``min_clear``
clear dates.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import time
from collections import deque
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.shutil
import torch

from plantation import __version__
from plantation.artefact import Artefact, load
from plantation.calibration import mutual_information
from plantation.config import RegionConfig, TileConfig
from plantation.errors import ConfigError, InputNotFoundError, PlantationError
from plantation.inference import check_compatible, read_window, windows
from plantation.labels import LABEL_CODES
from plantation.outcomes import summarise
from plantation.region import TileStack, open_region, open_tile
from plantation.samples import features

FORMAT = "plantation-map/1"
NODATA = -32768
#: Scaled layers store round(value / SCALE).
SCALE = 1e-4

#: (description, GDAL scale, units) per band, in band order.
LAYERS: tuple[tuple[str, float, str], ...] = (
    ("class", 1.0, "code"),
    ("onset_year", 1.0, "year"),
    ("onset_lo", 1.0, "year"),
    ("onset_hi", 1.0, "year"),
    ("p_conversion", SCALE, "probability"),
    ("p_after_cutoff", SCALE, "probability"),
    ("epistemic", SCALE, "nats"),
    ("clear_dates", 1.0, "dates"),
)
BAND = {name: i + 1 for i, (name, _, _) in enumerate(LAYERS)}

NOTICE = (
    "Probabilistic evidence of conversion from satellite imagery, not a finding about any plot or person. "
    "Verify with high-resolution imagery and field checks, under local law and licensed practice, before acting on it."
)

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
    min_clear: int = 4
    cutoff_year: int | None = None
    interval_level: float | None = None
    resume: bool = True
    quicklook: bool = True
    progress: bool = True
    engine: EngineConfig = field(default_factory=EngineConfig)


@dataclass(frozen=True)
class Settings:
    """What decides a tile's content (and so its manifest key), plus how to compute it."""

    min_clear: int
    cutoff_year: int
    interval_level: float
    window: int
    pixel_batch: int
    threads: int
    quicklook: bool

    def content_key(self) -> dict[str, Any]:
        # Window, batch and threads change float rounding at most, not what the map says.
        return {"min_clear": self.min_clear, "cutoff_year": self.cutoff_year, "interval_level": self.interval_level, "format": FORMAT}


@dataclass
class TileJob:
    """Everything a worker needs to map one tile (picklable)."""

    tile: TileConfig
    region: RegionConfig
    model_dir: str
    model_digest: str
    settings: Settings
    out_dir: str
    key: str


@dataclass
class TileResult:
    """What mapping one tile produced.

    ``converted_ha`` maps onset year → hectares mapped as converted in that
    year (pixel areas from the grid's CRS).
    """

    tile: str
    file: str
    key: str
    sha256: str
    pixels: int
    mapped_pixels: int
    converted_ha: dict[int, float]
    after_cutoff_ha: float
    seconds: float
    finished: str = ""
    #: The model folder and the sha256 over its two files (provenance for the assessment).
    model: str = ""
    model_sha256: str = ""


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


def resolve_model(path: str | Path) -> Path:
    """The artefact folder of a training run folder (``<run>/model``) or of an artefact folder itself.

    Raises:
        InputNotFoundError: neither holds a ``model.json``.
    """
    p = Path(path)
    for cand in (p, p / "model"):
        if (cand / "model.json").is_file():
            return cand
    raise InputNotFoundError(f"{p}: no model here (expected a training run folder with model/model.json, or a folder with model.json); train one with scripts/train.py")


def file_digest(paths: Sequence[Path]) -> str:
    """sha256 over the bytes of files, in order."""
    h = hashlib.sha256()
    for p in paths:
        with open(p, "rb") as f:
            for block in iter(lambda f=f: f.read(1 << 20), b""):
                h.update(block)
    return h.hexdigest()


def input_signature(stack: TileStack, tile: TileConfig) -> list[list[Any]]:
    """Name, size and modification time of every input file of a tile."""
    files = [Path(f) for f in stack.reader.files] if stack.reader is not None else [Path(tile.path)]
    out = []
    for f in files:
        st = f.stat()
        out.append([f.name, st.st_size, st.st_mtime_ns])
    return out


def tile_key(model_digest: str, settings: Settings, region: RegionConfig, signature: list[list[Any]]) -> str:
    """Digest of everything that decides a tile's content."""
    blob = json.dumps(
        {"model": model_digest, "settings": settings.content_key(), "scaling": [asdict(r) for r in region.scaling], "mask": asdict(region.mask), "nodata": region.nodata, "inputs": signature},
        sort_keys=True,
    )
    return hashlib.sha256(blob.encode()).hexdigest()


# --------------------------------------------------------------------------- per-window math


def window_probabilities(art: Artefact, x: torch.Tensor, valid: torch.Tensor, pixel_batch: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Calibrated probabilities (h, w, outcomes) and epistemic MI (h, w) of a window's interior pixels."""
    with torch.inference_mode():
        z = torch.stack([m.forward_window(x, valid, pixel_batch) for m in art.members])  # (m, h, w, o)
        probs = art.calibrated_log_probs(z).exp()
        if len(art.members) > 1:
            # Disagreement between members, each calibrated like the mapped probabilities.
            each = torch.stack([art.calibrated_log_probs(zm.unsqueeze(0)) for zm in z]).exp()
            epi = mutual_information(each.numpy())
        else:
            epi = np.zeros(probs.shape[:-1], np.float32)
    return probs.numpy(), np.asarray(epi, np.float32)


def encode_layers(probs: np.ndarray, epistemic: np.ndarray, clear: np.ndarray, years: Sequence[int], *, cutoff_year: int, level: float, min_clear: int) -> np.ndarray:
    """The int16 layers (band, h, w) of :data:`LAYERS` for probabilities (h, w, outcomes).

    Pixels with fewer than ``min_clear`` clear dates get :data:`NODATA` in
    every band but ``clear_dates``.
    """
    s = summarise(probs, years, cutoff_year=cutoff_year, level=level)
    h, w = clear.shape
    out = np.empty((len(LAYERS), h, w), np.int16)
    out[0] = s.label
    out[1] = s.year
    out[2] = s.year_low
    out[3] = s.year_high
    out[4] = np.rint(s.p_conversion / SCALE)
    out[5] = np.rint(s.p_after_cutoff / SCALE)
    out[6] = np.rint(np.clip(epistemic, 0, 32767 * SCALE) / SCALE)
    out[7] = clear
    out[:7, clear < min_clear] = NODATA
    return out


# --------------------------------------------------------------------------- one tile


def _profile(stack: TileStack, window: int) -> dict[str, Any]:
    g = stack.grid
    prof: dict[str, Any] = {
        "driver": "GTiff",
        "height": g.height,
        "width": g.width,
        "count": len(LAYERS),
        "dtype": "int16",
        "crs": g.crs,
        "transform": g.transform,
        "nodata": NODATA,
        "BIGTIFF": "IF_SAFER",
    }
    if g.height >= 16 and g.width >= 16:
        prof.update(tiled=True, blockxsize=min(window, 256), blockysize=min(window, 256))
    return prof


def write_cog(src: Path, dest: Path) -> None:
    """Convert a finished tiled GeoTIFF into a COG at ``dest`` (through a temporary name).

    Overviews use nearest-neighbour resampling for every band: averaging
    would invent classes and years that never existed, and a nearest
    probability is still one some pixel has.
    """
    tmp = dest.with_name(f".{dest.name}.partial")
    try:
        rasterio.shutil.copy(src, tmp, driver="COG", COMPRESS="DEFLATE", PREDICTOR="2", BLOCKSIZE="256", OVERVIEW_RESAMPLING="NEAREST", BIGTIFF="IF_SAFER", NUM_THREADS="2")
        os.replace(tmp, dest)
    finally:
        tmp.unlink(missing_ok=True)


def map_tile(
    stack: TileStack,
    art: Artefact,
    settings: Settings,
    dest: Path,
    *,
    region: RegionConfig | None = None,
    on_window: Callable[[int], None] | None = None,
) -> tuple[int, dict[int, float], float]:
    """Map one tile to a COG at ``dest``; returns (mapped pixels, converted ha by year, ha converted after the cutoff).

    Reads ahead one window and writes behind one, so the network never
    waits on the disk when the disk is faster than the network.
    ``on_window(pixels)`` is called after each window is written.
    """
    check_compatible(art, stack, region.scaling if region is not None else None)
    g = stack.grid
    halo = art.members[0].halo
    years = art.card.years
    areas = g.row_areas_m2() / 1e4
    conv = LABEL_CODES["conversion"]
    wins = list(windows(g.height, g.width, settings.window))
    raw = dest.with_name(f".{dest.stem}.raw.tif")
    mapped = 0
    by_year = np.zeros(len(years))
    after = 0.0

    def read(win: tuple[int, int, int, int]) -> tuple[torch.Tensor, torch.Tensor]:
        r0, c0, h, w = win
        refl, valid = read_window(stack, r0, c0, h, w, halo)
        return torch.from_numpy(features(refl, art.card.bands, art.card.indices)), torch.from_numpy(valid)

    def write(dst: Any, win: tuple[int, int, int, int], probs: np.ndarray, epi: np.ndarray, clear: np.ndarray) -> int:
        nonlocal mapped, after
        r0, c0, h, w = win
        layers = encode_layers(probs, epi, clear, years, cutoff_year=settings.cutoff_year, level=settings.interval_level, min_clear=settings.min_clear)
        dst.write(layers, window=rasterio.windows.Window(c0, r0, w, h))
        ok = layers[0] != NODATA
        mapped += int(ok.sum())
        is_conv = ok & (layers[0] == conv)
        row_ha = areas[r0 : r0 + h, None]
        for i, y in enumerate(years):
            by_year[i] += float((row_ha * (is_conv & (layers[1] == y))).sum())
        after += float((row_ha * (is_conv & (layers[1] > settings.cutoff_year))).sum())
        return h * w

    try:
        with rasterio.open(raw, "w", **_profile(stack, settings.window)) as dst, ThreadPoolExecutor(1, "read") as reader, ThreadPoolExecutor(1, "write") as writer:
            for i, (name, _, units) in enumerate(LAYERS, start=1):
                dst.set_band_description(i, name)
                dst.update_tags(i, units=units)
            dst.scales = [s for _, s, _ in LAYERS]
            dst.offsets = [0.0] * len(LAYERS)
            dst.update_tags(
                notice=NOTICE,
                class_codes="1 stable natural forest; 2 converted to tree-crop plantation; 3 plantation before the series; 4 other land or disturbance",
                cutoff_year=str(settings.cutoff_year),
                interval_level=str(settings.interval_level),
                min_clear_dates=str(settings.min_clear),
                model_region=art.card.region,
                producer=f"plantation {__version__}",
            )
            ahead: deque[Future] = deque(reader.submit(read, w) for w in wins[:2])
            behind: deque[Future] = deque()
            for k, win in enumerate(wins):
                x, v = ahead.popleft().result()
                if k + 2 < len(wins):
                    ahead.append(reader.submit(read, wins[k + 2]))
                probs, epi = window_probabilities(art, x, v, settings.pixel_batch)
                clear = v[:, halo : v.shape[1] - halo, halo : v.shape[2] - halo].sum(0).numpy().astype(np.int16)
                behind.append(writer.submit(write, dst, win, probs, epi, clear))
                while len(behind) > 1:
                    n = behind.popleft().result()
                    if on_window:
                        on_window(n)
            while behind:
                n = behind.popleft().result()
                if on_window:
                    on_window(n)
        write_cog(raw, dest)
    finally:
        raw.unlink(missing_ok=True)
        if stack.reader is not None:
            stack.reader.close()
    return mapped, {int(y): float(a) for y, a in zip(years, by_year, strict=True)}, after


# --------------------------------------------------------------------------- tasks

_ARTEFACTS: dict[str, Artefact] = {}


def cached_artefact(folder: str, digest: str) -> Artefact:
    """Load an artefact once per process (a dask worker keeps it between tasks)."""
    art = _ARTEFACTS.get(digest)
    if art is None:
        art = load(folder)
        _ARTEFACTS.clear()
        _ARTEFACTS[digest] = art
    return art


def map_tile_task(job: TileJob, on_window: Callable[[int], None] | None = None) -> TileResult:
    """Map one tile and write its COG, styles and quicklook into ``job.out_dir``."""
    from plantation.plots import quicklook
    from plantation.styles import class_style, onset_style, write_style

    t0 = time.perf_counter()
    if job.settings.threads:
        torch.set_num_threads(job.settings.threads)
    art = cached_artefact(job.model_dir, job.model_digest)
    stack = open_tile(job.tile, job.region)
    out = Path(job.out_dir)
    dest = out / f"{job.tile.name}.tif"
    mapped, by_year, after = map_tile(stack, art, job.settings, dest, region=job.region, on_window=on_window)
    write_style(class_style(BAND["class"]), out / f"{job.tile.name}.qml")
    write_style(onset_style(art.card.years, job.settings.cutoff_year, BAND["onset_year"]), out / f"{job.tile.name}.onset_year.qml")
    if job.settings.quicklook:
        quicklook(dest, out / f"{job.tile.name}.png", years=art.card.years, cutoff_year=job.settings.cutoff_year)
    g = stack.grid
    return TileResult(
        tile=job.tile.name,
        file=dest.name,
        key=job.key,
        sha256=file_digest([dest]),
        pixels=g.height * g.width,
        mapped_pixels=mapped,
        converted_ha=by_year,
        after_cutoff_ha=after,
        seconds=time.perf_counter() - t0,
        finished=time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        model=job.model_dir,
        model_sha256=job.model_digest,
    )


# --------------------------------------------------------------------------- manifest


class Manifest:
    """``manifest.json`` in the output folder: what made each finished tile.

    Only the process driving the run writes it, atomically, after a tile's
    files are all in place, so an entry always describes complete files.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self.tiles: dict[str, dict[str, Any]] = {}
        if path.is_file():
            try:
                raw = json.loads(path.read_text())
            except json.JSONDecodeError as exc:
                raise PlantationError(f"{path}: not valid JSON ({exc.msg}, line {exc.lineno}); delete it to map every tile again") from None
            if raw.get("format") != FORMAT:
                raise PlantationError(f"{path}: format {raw.get('format')!r}, expected {FORMAT!r}")
            self.tiles = raw.get("tiles", {})

    def finished(self, name: str, key: str, folder: Path) -> TileResult | None:
        """The recorded result if tile ``name`` was finished with ``key`` and its file is intact."""
        e = self.tiles.get(name)
        if not e or e.get("key") != key:
            return None
        f = folder / e["file"]
        if not f.is_file() or file_digest([f]) != e.get("sha256"):
            return None
        r = TileResult(**e)
        r.converted_ha = {int(k): v for k, v in r.converted_ha.items()}
        return r

    def record(self, result: TileResult) -> None:
        self.tiles[result.tile] = asdict(result)
        tmp = self.path.with_name(self.path.name + ".partial")
        tmp.write_text(json.dumps({"format": FORMAT, "producer": f"plantation {__version__}", "tiles": self.tiles}, indent=1, sort_keys=True))
        os.replace(tmp, self.path)


# --------------------------------------------------------------------------- region


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


def plan(cfg: MapConfig) -> tuple[list[TileJob], list[TileResult], Artefact, Settings]:
    """Check the model against every tile and split the tiles into jobs to run and finished results."""
    check_config(cfg)
    model_dir = resolve_model(cfg.model)
    art = load(model_dir)
    digest = file_digest([model_dir / "model.json", model_dir / "model.safetensors"])
    workers = cfg.engine.workers
    settings = Settings(
        min_clear=cfg.min_clear,
        cutoff_year=cfg.cutoff_year if cfg.cutoff_year is not None else art.card.cutoff_year,
        interval_level=cfg.interval_level if cfg.interval_level is not None else art.card.interval_level,
        window=cfg.window,
        pixel_batch=cfg.pixel_batch,
        threads=_threads_per_worker(cfg, workers) if (workers or cfg.engine.threads) else 0,
        quicklook=cfg.quicklook,
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
        keys[t.name] = tile_key(digest, settings, region, input_signature(stack, t))
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


def _run_here(jobs: list[TileJob], manifest: Manifest, cfg: MapConfig, pixels_of: dict[str, int]) -> list[TileResult]:
    results = []
    tiles_bar = _progress(len(jobs), "tile", "tiles", cfg.progress)
    for job in jobs:
        with _progress(pixels_of[job.tile.name], "px", f"tile {job.tile.name}", cfg.progress, position=1) as bar:
            res = map_tile_task(job, on_window=bar.update)
        manifest.record(res)
        results.append(res)
        tiles_bar.update(1)
    tiles_bar.close()
    return results


def _run_dask(jobs: list[TileJob], manifest: Manifest, cfg: MapConfig, pixels_of: dict[str, int]) -> list[TileResult]:
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
                manifest.record(res)
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
    pixels_of = {}
    for j in jobs:
        g = open_tile(j.tile, j.region).grid
        pixels_of[j.tile.name] = g.height * g.width
    if not jobs:
        results: list[TileResult] = []
    elif cfg.engine.workers or cfg.engine.scheduler:
        results = _run_dask(jobs, manifest, cfg, pixels_of)
    else:
        results = _run_here(jobs, manifest, cfg, pixels_of)
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
