"""Reading large simulated stacks window by window (``plantation benchmark-read``): peak memory, and delivered product folders against pre-stacked GeoTIFFs.

Two parts, each read in fresh subprocesses so that a figure is the reader's
alone (configs/benchmark_read.yaml):

* ``memory`` (``read_memory.json``): the peak RSS of reading a large
  simulated stack (4096², 60 dates) window by window through the lazy arrays.
* ``compare`` (``read.json``): the same pixels delivered two ways — Landsat
  Collection 2 Level-2 scene folders (one file per band and date, as USGS
  delivers them) and pre-stacked GeoTIFFs (one multi-band file per date) —
  read window by window as the mapping job reads them (``TileStack.read`` of
  a window plus the network's halo), timed alternately, medians over repeats.
  Both layouts hold the same stored integers, so the two readers must return
  identical arrays; that is checked on a window and on whole-tile totals.

The product folders are written here by :func:`write_landsat_scene` and
:func:`write_s2_product`, following the products' published file naming, DN
scaling and QA encodings; the tests build their tiny product folders with
the same functions. This module does not import torch, so a reading process
holds only what reading needs.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import resource
import subprocess
import sys
import time
from collections.abc import Iterator, Mapping
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from affine import Affine

from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.indices import ndvi
from plantation.imagery.products import LANDSAT_OFFSET, LANDSAT_QA_BITS, LANDSAT_SCALE, OLI
from plantation.imagery.region import open_tile, scaling_for_dates
from plantation.simulation.scenario import BANDS, QA_CLOUD, QA_FILL, QA_SHADOW, SimulationConfig
from plantation.simulation.writer import write_region

# --------------------------------------------------------------------------- product folders as delivered

#: QA_PIXEL of a clear land pixel: bit 6 (clear) and the low-confidence pairs of bits 8-9, 10-11, 12-13, 14-15 (USGS Landsat 8-9 C2 L2 Science Product Guide).
QA_PIXEL_CLEAR = 21824
#: QA_PIXEL of a cloud: bit 3 (cloud), high cloud confidence (bits 8-9 = 3), low confidences otherwise.
QA_PIXEL_CLOUD = (1 << 3) | (3 << 8) | (1 << 10) | (1 << 12) | (1 << 14)
#: QA_PIXEL of a cloud shadow: bit 4, high shadow confidence (bits 10-11 = 3).
QA_PIXEL_SHADOW = (1 << 4) | (1 << 8) | (3 << 10) | (1 << 12) | (1 << 14)
#: QA_PIXEL of fill (outside the scene): bit 0 alone.
QA_PIXEL_FILL = 1
#: Product files as tiled, DEFLATE-compressed GeoTIFFs (Landsat C2 bands are delivered as COGs).
PRODUCT_PROFILE: dict[str, Any] = {"driver": "GTiff", "tiled": True, "blockxsize": 256, "blockysize": 256, "compress": "deflate", "predictor": 2}


def landsat_scene_id(day: str | dt.date, *, sensor: str = "LC08", path_row: str = "118060", processed: str = "20200830", tier: str = "T1") -> str:
    """A Collection 2 Level-2 scene identifier, ``LC08_L2SP_PPPRRR_YYYYMMDD_yyyymmdd_02_T1``."""
    day = day.strftime("%Y%m%d") if isinstance(day, dt.date) else str(day).replace("-", "")
    return f"{sensor}_L2SP_{path_row}_{day}_{processed}_02_{tier}"


def _write_band(path: Path, arr: np.ndarray, *, crs: str, transform: Affine, nodata: float | None, driver: str = "GTiff", zlevel: int = 6) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    prof: dict[str, Any] = {"driver": driver, "width": arr.shape[1], "height": arr.shape[0], "count": 1, "dtype": arr.dtype.name, "crs": crs, "transform": transform, "nodata": nodata}
    if driver == "GTiff":
        tiled = min(arr.shape) >= PRODUCT_PROFILE["blockxsize"]
        prof.update({**PRODUCT_PROFILE, "zlevel": zlevel} if tiled else {"compress": "deflate"})
    elif driver == "JP2OpenJPEG":
        prof.update(QUALITY="100", REVERSIBLE="YES")  # lossless, as ESA's products are
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(arr, 1)


def write_landsat_scene(
    root: Path, day: str | dt.date, bands: Mapping[str, np.ndarray], qa: np.ndarray, *, crs: str, transform: Affine, sensor: str = "LC08", path_row: str = "118060", zlevel: int = 6
) -> Path:
    """A Collection 2 Level-2 scene folder under ``root``: ``<id>_SR_B<n>.TIF`` per band and ``<id>_QA_PIXEL.TIF``.

    Args:
        bands: the product's band id (``SR_B2``, ...) → stored DN (h, w), uint16; 0 is fill.
        qa: QA_PIXEL bit flags (h, w), uint16.
    """
    sid = landsat_scene_id(day, sensor=sensor, path_row=path_row)
    folder = Path(root) / sid
    for bid, dn in bands.items():
        _write_band(folder / f"{sid}_{bid}.TIF", np.asarray(dn).astype(np.uint16), crs=crs, transform=transform, nodata=0, zlevel=zlevel)
    _write_band(folder / f"{sid}_QA_PIXEL.TIF", np.asarray(qa).astype(np.uint16), crs=crs, transform=transform, nodata=QA_PIXEL_FILL, zlevel=zlevel)
    return folder


def write_s2_product(
    root: Path,
    stamp: str,
    bands: Mapping[str, np.ndarray],
    scl: np.ndarray,
    *,
    crs: str,
    top_left: tuple[float, float],
    baseline: str = "0400",
    tile: str = "50NKK",
    driver: str = "GTiff",
    mtd_offset: int | None = None,
) -> Path:
    """A Sentinel-2 L2A product folder (``.SAFE``) with the published layout: ``GRANULE/*/IMG_DATA/R10m`` and ``R20m``, one file per band.

    Args:
        stamp: acquisition time ``YYYYMMDDTHHMMSS``.
        bands: band id (``B02``, ``B8A``, ...) → stored DN, uint16; B02, B03,
            B04 and B08 are written at 10 m, the others at 20 m (their arrays
            must be of that resolution's shape).
        scl: scene classification (20 m), uint8.
        mtd_offset: when given, a ``MTD_MSIL2A.xml`` carrying it as every band's BOA_ADD_OFFSET.
    """
    safe = Path(root) / f"S2B_MSIL2A_{stamp}_N{baseline}_R046_T{tile}_{stamp[:8]}T050000.SAFE"
    img = safe / "GRANULE" / f"L2A_T{tile}_A034000_{stamp}" / "IMG_DATA"
    ext = "jp2" if driver == "JP2OpenJPEG" else "tif"
    for bid, dn in [*bands.items(), ("SCL", scl)]:
        res = 10 if bid in ("B02", "B03", "B04", "B08") else 20
        name = img / f"R{res}m" / f"T{tile}_{stamp}_{bid}_{res}m.{ext}"
        arr = np.asarray(dn).astype(np.uint8 if bid == "SCL" else np.uint16)
        _write_band(name, arr, crs=crs, transform=Affine(res, 0, top_left[0], 0, -res, top_left[1]), nodata=0, driver=driver)
    if mtd_offset is not None:
        names = ["B1", "B2", "B3", "B4", "B5", "B6", "B7", "B8", "B8A", "B9", "B10", "B11", "B12"]
        spectral = "".join(f'<Spectral_Information bandId="{i}" physicalBand="{b}"/>' for i, b in enumerate(names))
        offsets = "".join(f'<BOA_ADD_OFFSET band_id="{i}">{mtd_offset}</BOA_ADD_OFFSET>' for i in range(len(names)))
        body = f"<Spectral_Information_List>{spectral}</Spectral_Information_List><BOA_ADD_OFFSET_VALUES_LIST>{offsets}</BOA_ADD_OFFSET_VALUES_LIST>"
        (safe / "MTD_MSIL2A.xml").write_text(f"<Level-2A_User_Product>{body}</Level-2A_User_Product>")
    return safe


def landsat_dn(reflectance: np.ndarray) -> np.ndarray:
    """Collection 2 Level-2 stored DN of surface reflectance: (ρ + 0.2) / 0.0000275, rounded, within the valid range 1..65535 (0 is fill)."""
    return np.clip(np.rint((reflectance - LANDSAT_OFFSET) / LANDSAT_SCALE), 1, 65535).astype(np.uint16)


def landsat_qa_pixel(sim_qa: np.ndarray) -> np.ndarray:
    """The simulator's QA bits (cloud, shadow, fill) as Landsat QA_PIXEL values."""
    q = np.asarray(sim_qa).astype(np.int64)
    out = np.full(q.shape, QA_PIXEL_CLEAR, np.uint16)
    out[(q & QA_SHADOW) != 0] = QA_PIXEL_SHADOW
    out[(q & QA_CLOUD) != 0] = QA_PIXEL_CLOUD
    out[(q & QA_FILL) != 0] = QA_PIXEL_FILL
    return out


def deliver_as_products(sim: SimulationConfig, simulated: Path, out: Path, *, tile: str = "t01") -> tuple[Path, Path]:
    """One simulated tile delivered two ways, with the same stored integers: Landsat 8 C2 L2 scene folders and pre-stacked GeoTIFFs.

    Each date's reflectance (the simulator's integers through its scaling) is
    stored as Landsat Collection 2 DN; fill pixels become DN 0 and QA_PIXEL
    fill. The pre-stacked files hold the same DN as bands 1-6 and QA_PIXEL as
    band 7, one file per date, as a user who stacked the scenes would have
    them. Written window by window.

    Returns:
        (product folder, stacked folder).
    """
    src_dir = Path(simulated) / tile / "imagery"
    files = sorted(src_dir.glob("*.tif"))
    dates = [dt.date.fromisoformat(f.stem) for f in files]
    scale, offset = scaling_for_dates(dates, sim_scaling(sim))
    products, stacked = Path(out) / "products" / tile, Path(out) / "stacked" / tile
    stacked.mkdir(parents=True, exist_ok=True)
    band_ids = [OLI.bands[b] for b in BANDS]
    for k, f in enumerate(files):
        with rasterio.open(f) as src:
            data = src.read()
            crs, transform = src.crs.to_string(), src.transform
        dn = data[: len(BANDS)]
        fill = (dn == sim.nodata).any(0)
        refl = dn.astype(np.float64) * scale[k] + offset[k]
        ldn = landsat_dn(refl)
        ldn[:, fill] = 0
        qa = landsat_qa_pixel(data[len(BANDS)])
        qa[fill] = QA_PIXEL_FILL
        write_landsat_scene(products, dates[k], dict(zip(band_ids, ldn, strict=True)), qa, crs=crs, transform=transform, zlevel=sim.zlevel)
        h, w = qa.shape
        prof = {**PRODUCT_PROFILE, "zlevel": sim.zlevel, "width": w, "height": h, "count": len(BANDS) + 1, "dtype": "uint16", "crs": crs, "transform": transform, "nodata": 0, "interleave": "pixel"}
        if min(h, w) < PRODUCT_PROFILE["blockxsize"]:
            prof.update(tiled=False, blockxsize=None, blockysize=None)
            prof = {k2: v for k2, v in prof.items() if v is not None}
        with rasterio.open(stacked / f"{dates[k].isoformat()}.tif", "w", **prof) as dst:
            dst.write(ldn, indexes=list(range(1, len(BANDS) + 1)))
            dst.write(qa, indexes=len(BANDS) + 1)
    return products, stacked


def sim_scaling(sim: SimulationConfig) -> list[ScalingRule]:
    """The simulator's stored integers → reflectance: 0.0001, and the processing offset from its change date."""
    return [ScalingRule(None, 1e-4, 0.0), ScalingRule(sim.processing_change, 1e-4, -sim.processing_offset_dn * 1e-4)]


def compare_region(kind: str, folder: str, chunk: int) -> RegionConfig:
    """The region config that reads one delivered layout: ``products`` (scene folders) or ``stacked`` (one 7-band GeoTIFF per date)."""
    tile = TileConfig(name="t01", path=str(folder))
    if kind == "products":
        return RegionConfig(name="bench", format="products", tiles=[tile], bands=list(BANDS), chunk=chunk)
    if kind == "stacked":
        return RegionConfig(
            name="bench",
            tiles=[tile],
            bands=list(BANDS),
            nodata=0,
            mask=MaskConfig(band=len(BANDS) + 1, invalid_bits=list(LANDSAT_QA_BITS)),
            scaling=[ScalingRule(None, LANDSAT_SCALE, LANDSAT_OFFSET)],
            chunk=chunk,
        )
    raise ValueError(f"kind: {kind!r} is not 'products' or 'stacked'")


# --------------------------------------------------------------------------- measuring


@dataclass
class CompareConfig:
    """Schema of the ``compare`` group of ``configs/benchmark_read.yaml``."""

    #: Run the comparison of product folders with pre-stacked GeoTIFFs.
    enabled: bool = True
    #: Pixels per side of the simulated tile (the memory part's sim, smaller).
    tile_size: int = 512
    work_dir: str = "bench/cache/read_compare"
    #: Output window side and halo, pixels: the mapping job's window and the network's context.
    window: int = 128
    halo: int = 2
    #: The region's lazy-reading chunk (``region.chunk``).
    chunk: int = 512
    repeats: int = 3
    result: str = "bench/results/read.json"


@dataclass
class ReadConfig:
    """Schema of ``configs/benchmark_read.yaml``."""

    sim: SimulationConfig = field(default_factory=SimulationConfig)
    #: Run the peak-memory part (simulates ``sim`` at full size).
    memory: bool = True
    work_dir: str = "bench/cache/r4096"
    window: int = 512
    result: str = "bench/results/read_memory.json"
    gdal_cache_mb: int = 128
    compare: CompareConfig = field(default_factory=CompareConfig)


def peak_rss_mb() -> float:
    """This process's peak resident memory in MB.

    On Linux, VmHWM belongs to the address space made at exec, so a child does
    not inherit its parent's peak (``ru_maxrss`` does survive exec there).
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def read_windows(folder: str, bands: int, window: int, nodata: int, proc_change: str, proc_offset: float) -> dict:
    """Read every window of tile t01 once through the lazy arrays; return timings and peak RSS (MB)."""
    base = peak_rss_mb()
    region = RegionConfig(
        name="bench",
        tiles=[TileConfig(name="t01", path=str(Path(folder) / "t01" / "imagery"))],
        nodata=nodata,
        mask=MaskConfig(band=bands + 1, invalid_bits=[0, 1, 2]),
        scaling=[ScalingRule(None, 1e-4, 0.0), ScalingRule(proc_change, 1e-4, proc_offset)],
        chunk=window,
    )
    t0 = time.perf_counter()
    st = open_tile(region.tiles[0], region)
    h, w = st.grid.height, st.grid.width
    n_valid = 0
    ndvi_sum = 0.0
    for r in range(0, h, window):
        for c in range(0, w, window):
            win = st.reflectance.isel(y=slice(r, r + window), x=slice(c, c + window))
            vals = win.values  # (time, band, y, x) float32: one window in memory
            nd = ndvi(vals[:, 3], vals[:, 2])
            ok = np.isfinite(nd)
            n_valid += int(ok.sum())
            ndvi_sum += float(nd[ok].sum())
    seconds = time.perf_counter() - t0
    peak = peak_rss_mb()
    t = len(st.dates)
    return {
        "tile_px": [h, w],
        "dates": t,
        "bands": bands,
        "window": window,
        "baseline_rss_mb": round(base, 1),
        "peak_rss_mb": round(peak, 1),
        "window_float32_mb": round(t * bands * window * window * 4 / 2**20, 1),
        "full_tile_float32_mb": round(t * bands * h * w * 4 / 2**20, 1),
        "read_seconds": round(seconds, 2),
        "px_dates_per_s": round(h * w * t / seconds),
        "mean_valid_ndvi": round(ndvi_sum / max(n_valid, 1), 4),
        "valid_share": round(n_valid / (h * w * t), 4),
    }


def halo_windows(height: int, width: int, size: int, halo: int) -> Iterator[tuple[int, int, int, int]]:
    """(row, col, h, w) of each output window grown by ``halo`` and clipped to the tile, row-major: what the mapping job reads."""
    for r in range(0, height, size):
        for c in range(0, width, size):
            r0, c0 = max(r - halo, 0), max(c - halo, 0)
            r1, c1 = min(r + size + halo, height), min(c + size + halo, width)
            yield r0, c0, r1 - r0, c1 - c0


def read_tile(kind: str, folder: str, window: int, halo: int, chunk: int) -> dict[str, Any]:
    """Open one layout's tile and read it window by window (``TileStack.read``, as the mapping job does); timings, totals and peak RSS (MB)."""
    base = peak_rss_mb()
    region = compare_region(kind, folder, chunk)
    t0 = time.perf_counter()
    st = open_tile(region.tiles[0], region)
    t1 = time.perf_counter()
    n_valid, red_sum = 0, 0.0
    for r, c, h, w in halo_windows(st.grid.height, st.grid.width, window, halo):
        refl, valid = st.read(r, c, h, w)
        n_valid += int(valid.sum())
        red_sum += float(np.nansum(refl[:, 2], dtype=np.float64))
    t2 = time.perf_counter()
    if st.reader is not None:
        st.reader.close()
    return {
        "open_seconds": t1 - t0,
        "read_seconds": t2 - t1,
        "seconds": t2 - t0,
        "px_dates": st.grid.height * st.grid.width * len(st.dates),
        "tile_px": [st.grid.height, st.grid.width],
        "dates": len(st.dates),
        "baseline_rss_mb": round(base, 1),
        "peak_rss_mb": round(peak_rss_mb(), 1),
        "n_valid": n_valid,
        "red_sum": red_sum,
    }


def same_window(products: str, stacked: str, *, row: int, col: int, size: int, chunk: int) -> dict[str, Any]:
    """Read one window from both layouts; raise unless reflectance (NaN where invalid) and validity are identical."""
    got = {}
    for kind, folder in (("products", products), ("stacked", stacked)):
        region = compare_region(kind, folder, chunk)
        st = open_tile(region.tiles[0], region)
        size_r, size_c = min(size, st.grid.height - row), min(size, st.grid.width - col)
        got[kind] = (st.read(row, col, size_r, size_c), [str(d) for d in st.dates], st.grid)
        if st.reader is not None:
            st.reader.close()
    (pr, pv), pdates, pgrid = got["products"]
    (sr, sv), sdates, sgrid = got["stacked"]
    if pdates != sdates or not pgrid.same_as(sgrid):
        raise RuntimeError(f"the layouts differ in dates or grid: {pdates[:2]}... on {pgrid.describe()} against {sdates[:2]}... on {sgrid.describe()}")
    if pr.dtype != sr.dtype or pr.shape != sr.shape or not np.array_equal(pv, sv) or not np.array_equal(pr, sr, equal_nan=True):
        diff = np.nanmax(np.abs(pr.astype(np.float64) - sr)) if pr.shape == sr.shape else float("nan")
        raise RuntimeError(
            f"product folders and pre-stacked GeoTIFFs read differently on window ({row}, {col}, {size}): dtypes {pr.dtype}/{sr.dtype}, shapes {pr.shape}/{sr.shape}, largest difference {diff}"
        )
    return {"row": row, "col": col, "shape": list(pr.shape), "valid_share": round(float(pv.mean()), 4)}


def _subprocess(function: str, kwargs: dict[str, Any], env: dict[str, str]) -> dict[str, Any]:
    """Run a function of this module in a fresh Python process (its peak RSS is then its own) and return its JSON result."""
    code = f"import json, sys; from plantation.benchmarks.reading import {function}; print(json.dumps({function}(**json.loads(sys.argv[1]))))"
    res = subprocess.run([sys.executable, "-c", code, json.dumps(kwargs)], capture_output=True, text=True, env=env)
    if res.returncode:
        raise RuntimeError(f"{function} subprocess failed:\n{res.stderr}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def _gdal_env(cache_mb: int) -> dict[str, str]:
    # GDAL keeps decoded blocks in a process-wide cache (5% of RAM by default);
    # reading many files window by window fills it, so it is bounded here.
    return {**os.environ, "GDAL_CACHEMAX": str(int(cache_mb))}


def _simulate(sim: SimulationConfig, work: Path) -> tuple[float | None, float | None]:
    """Simulate ``sim`` into ``work`` unless it holds that simulation already; (seconds, peak RSS MB) when simulated."""
    meta = work / "simulation.json"
    if meta.exists() and json.loads(meta.read_text()) == json.loads(json.dumps(asdict(sim))):
        return None, None
    t0 = time.perf_counter()
    write_region(sim, work)
    return round(time.perf_counter() - t0, 1), round(peak_rss_mb(), 1)


def run_memory(cfg: ReadConfig) -> dict[str, Any]:
    """Simulate (or reuse) the large region, read it in a fresh process; the ``read_memory.json`` result."""
    sim = cfg.sim
    work = Path(cfg.work_dir)
    sim_seconds, sim_peak = _simulate(sim, work)
    kwargs = {
        "folder": str(work),
        "bands": len(BANDS),
        "window": int(cfg.window),
        "nodata": sim.nodata,
        "proc_change": sim.processing_change,
        "proc_offset": -sim.processing_offset_dn * 1e-4,
    }
    result = _subprocess("read_windows", kwargs, _gdal_env(cfg.gdal_cache_mb))
    result.update(
        {
            "region": sim.name,
            "simulate_seconds": sim_seconds,
            "simulate_peak_rss_mb": sim_peak,
            "cpu_count": os.cpu_count(),
            "gdal_cache_mb": int(cfg.gdal_cache_mb),
            "target_peak_rss_mb": 2048,
            "meets_target": result["peak_rss_mb"] < 2048,
            "peak_over_window_ratio": round(result["peak_rss_mb"] / result["window_float32_mb"], 2),
            "peak_over_full_tile_ratio": round(result["peak_rss_mb"] / result["full_tile_float32_mb"], 4),
        }
    )
    return result


#: The ratio of product-folder to pre-stacked reading speed aimed at.
TARGET_RATIO = 0.8


def run_compare(cfg: ReadConfig) -> dict[str, Any]:
    """Deliver a simulated tile as Landsat scene folders and as pre-stacked GeoTIFFs, check they read identically, time both alternately; the ``read.json`` result."""
    cc = cfg.compare
    if cc.repeats < 1:
        raise ValueError(f"compare.repeats: {cc.repeats!r} must be at least 1 (3 or more for a median)")
    sim = SimulationConfig(**{**asdict(cfg.sim), "tile_size": int(cc.tile_size), "tiles_x": 1, "tiles_y": 1, "block": min(cfg.sim.block, int(cc.tile_size))})
    work = Path(cc.work_dir)
    sim_seconds, _ = _simulate(sim, work / "simulated")
    delivered = work / "delivered"
    stamp = delivered / "simulation.json"
    t0 = time.perf_counter()
    if not (stamp.exists() and json.loads(stamp.read_text()) == json.loads(json.dumps(asdict(sim)))):
        stamp.unlink(missing_ok=True)
        products, stacked = deliver_as_products(sim, work / "simulated", delivered)
        stamp.write_text(json.dumps(asdict(sim), indent=2, sort_keys=True) + "\n")
    else:
        products, stacked = delivered / "products" / "t01", delivered / "stacked" / "t01"
    deliver_seconds = round(time.perf_counter() - t0, 1)
    env = _gdal_env(cfg.gdal_cache_mb)
    # One window inside the tile, away from its corner, with the halo: the two readers must agree exactly.
    side = int(cc.window) + 2 * int(cc.halo)
    centre = max(int(cc.tile_size) // 2 - side // 2, 0)
    check = _subprocess("same_window", {"products": str(products), "stacked": str(stacked), "row": centre, "col": centre, "size": side, "chunk": int(cc.chunk)}, env)
    runs: dict[str, list[dict[str, Any]]] = {"products": [], "stacked": []}
    order = []
    for i in range(int(cc.repeats)):
        pair = ("stacked", "products") if i % 2 == 0 else ("products", "stacked")
        order.append(list(pair))
        for kind in pair:
            folder = products if kind == "products" else stacked
            runs[kind].append(_subprocess("read_tile", {"kind": kind, "folder": str(folder), "window": int(cc.window), "halo": int(cc.halo), "chunk": int(cc.chunk)}, env))
    first = runs["stacked"][0]
    for kind in runs:
        for r in runs[kind]:
            if (r["n_valid"], r["red_sum"]) != (first["n_valid"], first["red_sum"]):
                raise RuntimeError(f"{kind}: whole-tile totals {r['n_valid']} valid, red sum {r['red_sum']!r} differ from the pre-stacked reader's {first['n_valid']}, {first['red_sum']!r}")
    t = first["dates"]
    h, w = first["tile_px"]
    out: dict[str, Any] = {
        "region": sim.name,
        "tile_px": [h, w],
        "dates": t,
        "bands": len(BANDS),
        "window": int(cc.window),
        "halo": int(cc.halo),
        "chunk": int(cc.chunk),
        "repeats": int(cc.repeats),
        "order": order,
        "products": "Landsat 8 Collection 2 Level-2 scene folders: one uint16 GeoTIFF per band and date plus QA_PIXEL (tiled 256, DEFLATE)",
        "stacked": "one 7-band uint16 GeoTIFF per date, the same DN and QA_PIXEL (tiled 256, DEFLATE, pixel-interleaved)",
    }
    for kind, rs in runs.items():
        out[f"{kind}_px_dates_per_s"] = round(float(np.median([r["px_dates"] / r["seconds"] for r in rs])))
        out[f"{kind}_seconds"] = [round(r["seconds"], 2) for r in rs]
        out[f"{kind}_open_seconds"] = [round(r["open_seconds"], 2) for r in rs]
    # products px·dates/s over stacked px·dates/s, repeat by repeat: the stacked reader's seconds over the products'.
    ratios = [s["seconds"] / p["seconds"] for p, s in zip(runs["products"], runs["stacked"], strict=True)]
    out["products_vs_stacked"] = round(out["products_px_dates_per_s"] / out["stacked_px_dates_per_s"], 3)
    out["products_vs_stacked_per_repeat"] = [round(r, 3) for r in ratios]
    out["target_products_vs_stacked"] = TARGET_RATIO
    out["meets_target"] = out["products_vs_stacked"] >= TARGET_RATIO
    out["identical"] = True
    out["identical_window"] = check
    out["valid_share"] = round(first["n_valid"] / (h * w * t), 4)
    out["peak_rss_mb"] = {kind: round(float(np.median([r["peak_rss_mb"] for r in rs])), 1) for kind, rs in runs.items()}
    out["baseline_rss_mb"] = {kind: round(float(np.median([r["baseline_rss_mb"] for r in rs])), 1) for kind, rs in runs.items()}
    out["window_float32_mb"] = round(t * len(BANDS) * side * side * 4 / 2**20, 1)
    out["chunk_float32_mb"] = round(t * len(BANDS) * int(cc.chunk) ** 2 * 4 / 2**20, 1)
    out["full_tile_float32_mb"] = round(t * len(BANDS) * h * w * 4 / 2**20, 1)
    out.update({"simulate_seconds": sim_seconds, "deliver_seconds": deliver_seconds, "cpu_count": os.cpu_count(), "gdal_cache_mb": int(cfg.gdal_cache_mb)})
    return out


def _write(result: dict[str, Any], dest: str) -> None:
    out = Path(dest)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".json.partial")
    tmp.write_text(json.dumps(result, indent=1) + "\n")
    tmp.rename(out)


def run(cfg: ReadConfig) -> dict[str, Any]:
    """Run the enabled parts, write each one's JSON as it completes; ``{"memory": ..., "compare": ...}`` (None for a part not run)."""
    out: dict[str, Any] = {"memory": None, "compare": None}
    if cfg.memory:
        out["memory"] = run_memory(cfg)
        _write(out["memory"], cfg.result)
    if cfg.compare.enabled:
        out["compare"] = run_compare(cfg)
        _write(out["compare"], cfg.compare.result)
    return out
