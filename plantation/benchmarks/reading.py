"""Peak memory and speed of reading a large simulated stack window by window (``plantation benchmark-read``).

Simulates the region once (reused afterwards), then reads it in a fresh
subprocess so that the figure is the reader's alone, and writes JSON
(configs/benchmark_read.yaml). This module does not import torch, so the
reading process holds only what reading needs.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.indices import ndvi
from plantation.imagery.region import open_tile
from plantation.simulation.scenario import BANDS, SimulationConfig
from plantation.simulation.writer import write_region


@dataclass
class ReadConfig:
    """Schema of ``configs/benchmark_read.yaml``."""

    sim: SimulationConfig = field(default_factory=SimulationConfig)
    work_dir: str = "bench/cache/r4096"
    window: int = 512
    result: str = "bench/results/read_memory.json"
    gdal_cache_mb: int = 128


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
    """Read every window of tile t01 once; return timings and peak RSS (MB)."""
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


def run(cfg: ReadConfig) -> dict[str, Any]:
    """Simulate (or reuse) the region, read it in a fresh process, write and return the result."""
    sim = cfg.sim
    work = Path(cfg.work_dir)
    meta = work / "simulation.json"
    sim_seconds = None
    if not (meta.exists() and json.loads(meta.read_text()) == json.loads(json.dumps(asdict(sim)))):
        t0 = time.perf_counter()
        write_region(sim, work)
        sim_seconds = round(time.perf_counter() - t0, 1)
        sim_peak = peak_rss_mb()
    else:
        sim_peak = None
    # A fresh process: its peak RSS is the reader's alone.
    code = "import json, sys; from plantation.benchmarks.reading import read_windows; print(json.dumps(read_windows(**json.loads(sys.argv[1]))))"
    kwargs = {
        "folder": str(work),
        "bands": len(BANDS),
        "window": int(cfg.window),
        "nodata": sim.nodata,
        "proc_change": sim.processing_change,
        "proc_offset": -sim.processing_offset_dn * 1e-4,
    }
    # GDAL keeps decoded blocks in a process-wide cache (5% of RAM by default);
    # reading 60 files window by window fills it, so it is bounded here.
    env = {**os.environ, "GDAL_CACHEMAX": str(int(cfg.gdal_cache_mb))}
    res = subprocess.run([sys.executable, "-c", code, json.dumps(kwargs)], capture_output=True, text=True, env=env)
    if res.returncode:
        raise RuntimeError(f"reader subprocess failed:\n{res.stderr}")
    result = json.loads(res.stdout.strip().splitlines()[-1])
    result.update(
        {
            "region": sim.name,
            "simulate_seconds": sim_seconds,
            "simulate_peak_rss_mb": None if sim_peak is None else round(sim_peak, 1),
            "cpu_count": os.cpu_count(),
            "gdal_cache_mb": int(cfg.gdal_cache_mb),
            "target_peak_rss_mb": 2048,
            "meets_target": result["peak_rss_mb"] < 2048,
            "peak_over_window_ratio": round(result["peak_rss_mb"] / result["window_float32_mb"], 2),
            "peak_over_full_tile_ratio": round(result["peak_rss_mb"] / result["full_tile_float32_mb"], 4),
        }
    )
    out = Path(cfg.result)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_suffix(".json.partial")
    tmp.write_text(json.dumps(result, indent=1) + "\n")
    tmp.rename(out)
    return result
