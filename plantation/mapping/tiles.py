"""Map one tile: windows read with the network's halo, inferred fully convolutionally, written as a COG.

Per tile, windows are read (with the network's halo), inferred fully
convolutionally and written in a pipeline: one thread reads the next window
while the network runs on this one, another summarises and writes the last
one. Peak memory depends on the window, not on the tile. The finished
tiled GeoTIFF is converted to a COG only once the tile is complete (GDAL
builds overviews from the whole raster). :func:`map_tile_task` is one tile
as a task, the same in this process or on a dask worker.
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
from plantation.imagery.config import RegionConfig, TileConfig
from plantation.imagery.region import TileStack, open_tile
from plantation.mapping.fire import FIRE_CODES, FireRule, FireWindow, attribute, decimal_years, resolve_escaped
from plantation.mapping.folder import BAND, FORMAT, LAYERS, MAP_LAYERS, NODATA, NOTICE, RECALIBRATION, SCALE, TileResult, describe_layers, file_digest, recalibrate_stored, write_cog
from plantation.mapping.quicklook import quicklook
from plantation.mapping.styles import class_style, dnbr_style, fire_style, onset_style, p_after_cutoff_style, write_style
from plantation.model.artefact import Artefact, load
from plantation.model.inference import check_compatible, read_window, window_probabilities, windows
from plantation.model.outcomes import summarise
from plantation.model.patches import features
from plantation.reference.labels import LABEL_CODES

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class Settings:
    """What decides a tile's content (and so its manifest key), plus how to compute it."""

    min_clear: int
    cutoff_year: int
    interval_level: float
    #: Year-interval mass asked for so that intervals hold ``interval_level`` of true years (the model's held-out measurement).
    interval_mass: float
    window: int
    pixel_batch: int
    threads: int
    quicklook: bool
    #: A recalibration record (JSON text, see :func:`plantation.mapping.folder.recalibrate_stored`) applied to the probability bands as they are written; empty: none.
    recalibration: str = ""
    #: Map with the model's distilled network when it has one (False: every ensemble member).
    distilled: bool = True
    #: Thresholds of the fire layers (:class:`plantation.mapping.fire.FireRule`).
    fire: FireRule = field(default_factory=FireRule)

    def content_key(self) -> dict[str, Any]:
        # Window, batch and threads change float rounding at most, not what the map says.
        key = {"min_clear": self.min_clear, "cutoff_year": self.cutoff_year, "interval_level": self.interval_level, "interval_mass": self.interval_mass, "format": FORMAT}
        key["fire"] = asdict(self.fire)
        rec = self.recalibration_record()
        if rec is not None:
            key["recalibration"] = [rec["coef_conversion"], rec["coef_after_cutoff"]]
        if not self.distilled:
            key["ensemble"] = True
        return key

    def recalibration_record(self) -> dict[str, Any] | None:
        """The recalibration record as an object (None: none)."""
        return json.loads(self.recalibration) if self.recalibration else None

    def correction(self, art: Artefact) -> dict[str, Any]:
        """The probability correction tiles mapped with these settings carry: the model's prior, and the recalibration if any."""
        out: dict[str, Any] = dict(art.card.calibration.correction())
        rec = self.recalibration_record()
        if rec is not None:
            out[RECALIBRATION] = rec
        return out


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


def input_signature(stack: TileStack, tile: TileConfig) -> list[list[Any]]:
    """Name, size and modification time of every input file of a tile."""
    names = stack.reader.files if stack.reader is not None else stack.sources or [tile.path]
    out: list[list[Any]] = []
    for name in names:
        if "://" in name:  # a remote asset: its address is all there is to go by
            out.append([name])
            continue
        f = Path(name)
        st = f.stat()
        out.append([f.name, st.st_size, st.st_mtime_ns])
    return out


def tile_key(model_digest: str, settings: Settings, region: RegionConfig, signature: list[list[Any]], sensors: Sequence[str] = ()) -> str:
    """Digest of everything that decides a tile's content.

    ``sensors`` (the stack's per-date sensors) and the region's harmonisation
    count only when named or enabled, so maps made before they existed keep
    their key.
    """
    content: dict[str, Any] = {
        "model": model_digest,
        "settings": settings.content_key(),
        "scaling": [asdict(r) for r in region.scaling],
        "mask": region.mask.content_key(),
        "nodata": region.nodata,
        "inputs": signature,
    }
    if any(sensors):
        content["sensors"] = list(sensors)
    if region.harmonise.enabled:
        content["harmonise"] = asdict(region.harmonise)
    return hashlib.sha256(json.dumps(content, sort_keys=True).encode()).hexdigest()


# --------------------------------------------------------------------------- per-window math


def encode_layers(
    probs: np.ndarray, epistemic: np.ndarray, clear: np.ndarray, years: Sequence[int], *, cutoff_year: int, level: float, min_clear: int, recalibration: dict[str, Any] | None = None
) -> np.ndarray:
    """The int16 layers (band, h, w) of :data:`LAYERS` for probabilities (h, w, outcomes).

    Pixels with fewer than ``min_clear`` clear dates get :data:`NODATA` in
    every band but ``clear_dates``. A ``recalibration`` record is applied to
    the stored p_conversion and p_after_cutoff exactly as ``plantation
    recalibrate`` applies it to a written map.
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
    if recalibration is not None:
        out[4], out[5], _ = recalibrate_stored(out[4], out[5], (SCALE, SCALE), (0.0, 0.0), recalibration)
    out[:7, clear < min_clear] = NODATA
    return out


def encode_fire(fw: FireWindow, unmapped: np.ndarray) -> np.ndarray:
    """The int16 fire layers (3, h, w) of :data:`plantation.mapping.folder.FIRE_LAYERS` from a window's attribution; :data:`NODATA` where ``unmapped``."""
    out = np.empty((3,) + fw.code.shape, np.int16)
    out[0] = fw.code
    out[1] = fw.year
    ok = np.isfinite(fw.dnbr)
    out[2] = np.where(ok, np.rint(np.clip(np.where(ok, fw.dnbr, 0.0), -3.0, 3.0) / SCALE), NODATA)
    out[:, unmapped] = NODATA
    return out


# --------------------------------------------------------------------------- one tile


def _profile(stack: TileStack, window: int) -> dict[str, Any]:
    g = stack.grid
    prof: dict[str, Any] = {
        "driver": "GTiff",
        "height": g.height,
        "width": g.width,
        "count": len(MAP_LAYERS),
        "dtype": "int16",
        "crs": g.crs,
        "transform": g.transform,
        "nodata": NODATA,
        "BIGTIFF": "IF_SAFER",
    }
    if g.height >= 16 and g.width >= 16:
        prof.update(tiled=True, blockxsize=min(window, 256), blockysize=min(window, 256))
    return prof


def map_tile(
    stack: TileStack,
    art: Artefact,
    settings: Settings,
    dest: Path,
    *,
    region: RegionConfig | None = None,
    on_window: Callable[[int], None] | None = None,
) -> tuple[int, dict[int, float], float, tuple[dict[str, float], float]]:
    """Map one tile to a COG at ``dest``; returns (mapped pixels, converted ha by year, ha converted after the cutoff, fire areas).

    Reads ahead one window and writes behind one, so the network never
    waits on the disk when the disk is faster than the network.
    ``on_window(pixels)`` is called after each window is written.
    The fire layers are attributed window by window from the same reads
    (:func:`plantation.mapping.fire.attribute`); escaped fire, which looks
    beyond a window, is resolved once the tile's windows are written, from
    the tile's fire codes, onsets and canopy-loss years held as int16 (6
    bytes a pixel). Fire areas: (hectares by fire code name but ``none``,
    hectares cleared with fire after the cutoff year).
    """
    check_compatible(art, stack, region.scaling if region is not None else None)
    g = stack.grid
    halo = art.members[0].halo
    years = art.card.years
    areas = g.row_areas_m2() / 1e4
    conv = LABEL_CODES["conversion"]
    wins = list(windows(g.height, g.width, settings.window))
    # The process id in the name: a worker the scheduler gave up on but still running must not write into the file of its tile's rerun
    # (guard.partial_files matches any ".<...>.raw.tif").
    raw = dest.with_name(f".{dest.stem}.{os.getpid()}.raw.tif")
    mapped = 0
    by_year = np.zeros(len(years))
    after = 0.0
    t_years = decimal_years(stack.dates)
    bands = list(art.card.bands)
    # What the tile-wide escaped-fire pass needs, filled window by window.
    fire_code = np.full((g.height, g.width), NODATA, np.int16)
    fire_year = np.zeros((g.height, g.width), np.int16)
    onsets = np.zeros((g.height, g.width), np.int16)
    candidates = np.zeros((g.height, g.width), np.int16)

    recal = settings.recalibration_record()

    def read(win: tuple[int, int, int, int]) -> tuple[torch.Tensor, torch.Tensor, np.ndarray, np.ndarray]:
        r0, c0, h, w = win
        refl, valid = read_window(stack, r0, c0, h, w, halo)
        inner = (slice(None), slice(halo, halo + h), slice(halo, halo + w))
        return torch.from_numpy(features(refl, art.card.bands, art.card.indices)), torch.from_numpy(valid), refl[:, :, inner[1], inner[2]], valid[inner]

    def write(dst: Any, win: tuple[int, int, int, int], probs: np.ndarray, epi: np.ndarray, clear: np.ndarray, refl: np.ndarray, valid: np.ndarray) -> int:
        nonlocal mapped, after
        r0, c0, h, w = win
        layers = encode_layers(probs, epi, clear, years, cutoff_year=settings.cutoff_year, level=settings.interval_mass, min_clear=settings.min_clear, recalibration=recal)
        fw = attribute(refl, valid, t_years, bands, layers[0] == conv, layers[1], settings.fire, forest=layers[0] == LABEL_CODES["stable_forest"])
        fire = encode_fire(fw, layers[0] == NODATA)
        dst.write(np.concatenate([layers, fire]), window=rasterio.windows.Window(c0, r0, w, h))
        rows, cols = slice(r0, r0 + h), slice(c0, c0 + w)
        fire_code[rows, cols], fire_year[rows, cols], onsets[rows, cols] = fire[0], fire[1], layers[1]
        candidates[rows, cols] = fw.candidate_year
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
            describe_layers(dst, MAP_LAYERS)
            dst.update_tags(
                notice=NOTICE,
                class_codes="1 stable natural forest; 2 converted to tree-crop plantation; 3 plantation before the series; 4 other land or disturbance",
                fire_codes="; ".join(f"{v} {k}" for k, v in FIRE_CODES.items()),
                # The thresholds the fire layers were attributed with (plantation.mapping.fire.FireRule).
                fire_rule=json.dumps(asdict(settings.fire), sort_keys=True),
                cutoff_year=str(settings.cutoff_year),
                interval_level=str(settings.interval_level),
                # The mass the intervals hold in the model's distribution, recalibrated so their coverage on held-out data is interval_level.
                interval_mass=str(settings.interval_mass),
                min_clear_dates=str(settings.min_clear),
                model_region=art.card.region,
                # Which network made the probabilities: the distilled one or every ensemble member.
                model_networks="distilled" if settings.distilled and art.distilled is not None else f"ensemble of {len(art.members)}",
                producer=f"plantation {__version__}",
                # Which class mix the probabilities are for ("sample": the reference sample's, not the region's).
                probability_correction=json.dumps(settings.correction(art), sort_keys=True),
            )
            ahead: deque[Future] = deque(reader.submit(read, w) for w in wins[:2])
            behind: deque[Future] = deque()
            for k, win in enumerate(wins):
                x, v, refl, valid = ahead.popleft().result()
                if k + 2 < len(wins):
                    ahead.append(reader.submit(read, wins[k + 2]))
                probs, epi = window_probabilities(art, x, v, settings.pixel_batch, distilled=settings.distilled)
                clear = v[:, halo : v.shape[1] - halo, halo : v.shape[2] - halo].sum(0).numpy().astype(np.int16)
                behind.append(writer.submit(write, dst, win, probs, epi, clear, refl, valid))
                while len(behind) > 1:
                    n = behind.popleft().result()
                    if on_window:
                        on_window(n)
            while behind:
                n = behind.popleft().result()
                if on_window:
                    on_window(n)
            # Escaped fire reaches beyond a window: resolved on the whole tile once every window is in.
            code, fyear = resolve_escaped(fire_code, fire_year, candidates, onsets, settings.fire)
            dst.write(code, indexes=BAND["fire"])
            dst.write(fyear, indexes=BAND["fire_year"])
        write_cog(raw, dest)
        fire_ha = {name: float((areas[:, None] * (code == c)).sum()) for name, c in FIRE_CODES.items() if c != FIRE_CODES["none"]}
        fire_after = float((areas[:, None] * ((code == FIRE_CODES["converted_burnt"]) & (fyear > settings.cutoff_year))).sum())
    finally:
        raw.unlink(missing_ok=True)
        if stack.reader is not None:
            stack.reader.close()
    return mapped, {int(y): float(a) for y, a in zip(years, by_year, strict=True)}, after, (fire_ha, fire_after)


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
    t0 = time.perf_counter()
    if job.settings.threads:
        torch.set_num_threads(job.settings.threads)
    art = cached_artefact(job.model_dir, job.model_digest)
    stack = open_tile(job.tile, job.region)
    out = Path(job.out_dir)
    dest = out / f"{job.tile.name}.tif"
    mapped, by_year, after, (fire_ha, fire_after) = map_tile(stack, art, job.settings, dest, region=job.region, on_window=on_window)
    write_style(class_style(BAND["class"]), out / f"{job.tile.name}.qml")
    write_style(fire_style(BAND["fire"]), out / f"{job.tile.name}.fire.qml")
    write_style(dnbr_style(BAND["dnbr"]), out / f"{job.tile.name}.dnbr.qml")
    write_style(onset_style(art.card.years, job.settings.cutoff_year, BAND["onset_year"]), out / f"{job.tile.name}.onset_year.qml")
    write_style(p_after_cutoff_style(job.settings.cutoff_year, BAND["p_after_cutoff"]), out / f"{job.tile.name}.p_after_cutoff.qml")
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
        probability_correction=job.settings.correction(art),
        fire_ha=fire_ha,
        fire_after_cutoff_ha=fire_after,
    )
