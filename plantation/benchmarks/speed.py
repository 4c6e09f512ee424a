"""Mapping speed and memory, measured side by side in one run (``plantation benchmark-speed``).

* the machine's roofline: a large float32 GEMM on the same threads;
* the model's achieved GFLOP/s on a window, from FLOPs counted by
  ``torch.utils.flop_counter`` (convolutions, matrix products and the GRU's
  own matrix products, which run as ``addmm`` on packed sequences);
* one toy tile from GeoTIFF in to COG out (end to end) against the model
  alone on pre-read windows (the pipeline's overhead);
* the naive patch-by-patch path, the trees baseline and the tuned random
  forest of the accuracy benchmark on the same tile (reading and features
  included);
* peak resident memory of a fresh process mapping a 1024² and a 4096²
  simulated tile (a one-member network of the default size on four dates,
  random weights: memory depends on shapes, not on what was learnt).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import torch

from plantation.benchmarks.accuracy import ForestGrid, centre_series, tile_series
from plantation.benchmarks.baselines import AnnualForest, AnnualTrees, annual_features
from plantation.benchmarks.reading import peak_rss_mb
from plantation.config import to_object
from plantation.errors import ConfigError
from plantation.imagery.config import RegionConfig, TileConfig
from plantation.imagery.region import open_tile
from plantation.mapping.tiles import Settings, map_tile
from plantation.model.artefact import Artefact, load, save
from plantation.model.card import Calibration, ModelCard, resolve_model
from plantation.model.config import NetworkConfig
from plantation.model.distillation import start_from
from plantation.model.inference import predict_tile, read_window, window_probabilities, windows
from plantation.model.network import ConvRecurrentNet
from plantation.model.patches import day_of_year_fraction, features, read_patches, year_of
from plantation.model.training import TrainConfig, load_region_samples
from plantation.simulation.scenario import SimulationConfig
from plantation.simulation.writer import write_region


@dataclass
class SpeedConfig:
    """Schema of ``configs/benchmark_speed.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    model: str = "outputs/train/selvara_toy_seed0"
    tile: str = "t01"
    window: int = 128
    pixel_batch: int = 1024
    patch_pixels: int = 2048
    repeats: int = 3
    rss_sizes: list[int] = field(default_factory=lambda: [1024, 4096])
    cache_dir: str = "bench/cache/speed"
    gdal_cache_mb: int = 128
    rss_sim: SimulationConfig = field(default_factory=SimulationConfig)
    #: The random forest's tuning grid (the accuracy benchmark's); the tuned forest maps the tile.
    forest: ForestGrid = field(default_factory=ForestGrid)
    #: Days of year of the long series' composites: with the rss simulation's 12 years, 5 a year make 60 dates.
    long_doys: list[int] = field(default_factory=lambda: [15, 88, 161, 234, 307])
    out: str = "bench/results/speed.json"


def gemm_gflops(n: int = 2048, repeats: int = 5) -> float:
    """Median GFLOP/s of an n × n float32 matrix product on torch's threads."""
    a, b = torch.randn(n, n), torch.randn(n, n)
    for _ in range(2):
        a @ b
    ts = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        a @ b
        ts.append(time.perf_counter() - t0)
    return 2 * n**3 / float(np.median(ts)) / 1e9


def _median_seconds(fn: Any, repeats: int) -> float:
    ts = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t0)
    return float(np.median(ts))


def runners(art: Artefact) -> list[ConvRecurrentNet]:
    """The networks a map runs by default: the distilled one if the model has it, else every member."""
    return [art.distilled] if art.distilled is not None else art.members


def model_flops(art: Artefact, x: torch.Tensor, v: torch.Tensor, pixel_batch: int) -> int:
    from torch.utils.flop_counter import FlopCounterMode

    with torch.inference_mode(), FlopCounterMode(display=False) as fc:
        for m in runners(art):
            m.forward_window(x, v, pixel_batch)
    return int(fc.get_total_flops())


def random_model(folder: Path, dates: list[str], region: RegionConfig, members: int = 1, distilled: bool = False) -> Path:
    """A network of the default size for ``dates``, random weights, saved as an artefact (with a distilled network of random weights too, if asked)."""
    d = np.array(dates, dtype="datetime64[D]")
    yrs = year_of(d)
    spec = {
        "n_channels": len(region.bands) + 4,
        "date_year": (yrs - yrs.min()).tolist(),
        "day_of_year": day_of_year_fraction(d).tolist(),
        "neighbourhood": 5,
        "date_width": NetworkConfig.date_width,
        "amplitude": NetworkConfig.amplitude,
        "conv_width": NetworkConfig.conv_width,
        "hidden": NetworkConfig.hidden,
        "dropout": 0.0,
    }
    nets = []
    for i in range(members):
        torch.manual_seed(i)
        nets.append(ConvRecurrentNet(**spec).eval())
    n_out = 3 + len(np.unique(yrs))
    card = ModelCard(
        bands=list(region.bands),
        indices=["NDVI", "EVI", "NBR", "NDMI"],
        scaling=[asdict(r) for r in region.scaling],
        dates=[str(x) for x in d],
        years=[int(y) for y in np.unique(yrs)],
        network=spec,
        members=members,
        calibration=Calibration(temperature=1.0, loss_weights=[1.0] * n_out, train_prior=[1.0 / n_out] * n_out),
        cutoff_year=int(yrs.max()) - 1,
        interval_level=0.8,
        region=region.name,
        labels_fingerprint="none",
        package_version="bench",
        distilled={"note": "random weights, for timing"} if distilled else {},
    )
    return save(folder, card, nets, start_from(nets[0], spec).eval() if distilled else None)


def make_rss_tiles(cfg: SpeedConfig, folder: Path) -> dict[int, Path]:
    """Simulated tiles of each size in ``cfg.rss_sizes`` on four dates: the smallest simulated, larger ones as mosaics of it."""
    import rasterio

    base = min(cfg.rss_sizes)
    out: dict[int, Path] = {}
    src_dir = folder / f"tile{base}"
    if not (src_dir / "t01" / "imagery").is_dir():
        sim = replace(cfg.rss_sim, name=f"selvara_rss{base}", tiles_x=1, tiles_y=1, tile_size=base, first_year=2023, last_year=2024, composite_doys=[100, 280])
        write_region(sim, src_dir, progress=False)
    out[base] = src_dir / "t01" / "imagery"
    for size in cfg.rss_sizes:
        if size == base:
            continue
        k = size // base
        dst_dir = folder / f"tile{size}" / "imagery"
        files = sorted(out[base].glob("*.tif"))
        if dst_dir.is_dir() and len(list(dst_dir.glob("*.tif"))) == len(files):
            out[size] = dst_dir
            continue
        dst_dir.mkdir(parents=True, exist_ok=True)
        for f in files:
            with rasterio.open(f) as src:
                prof = src.profile | {"width": size, "height": size, "tiled": True, "blockxsize": 256, "blockysize": 256, "BIGTIFF": "IF_SAFER"}
                block = src.read()
            tmp = dst_dir / f".{f.name}.partial"
            with rasterio.open(tmp, "w", **prof) as dst:
                for i in range(k):
                    for j in range(k):
                        dst.write(block, window=rasterio.windows.Window(j * base, i * base, base, base))
            tmp.replace(dst_dir / f.name)
        out[size] = dst_dir
    return out


def long_series_tile(cfg: SpeedConfig, folder: Path) -> Path:
    """One simulated tile of the toy's size and years with ``cfg.long_doys`` composites a year (cached in ``folder``)."""
    sim = replace(cfg.rss_sim, name="selvara_long", tiles_x=1, tiles_y=1, composite_doys=list(cfg.long_doys))
    tile = folder / "long" / "t01" / "imagery"
    n_dates = (sim.last_year - sim.first_year + 1) * len(cfg.long_doys)
    if not tile.is_dir() or len(list(tile.glob("*.tif"))) < n_dates:
        write_region(sim, folder / "long", progress=False)
    return tile


def _status_mb(field: str) -> float | None:
    """A memory figure of this process from /proc (VmRSS: now, VmHWM: peak), MB; None off Linux."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return None


def rss_child(region_json: str, model_dir: str, window: int, pixel_batch: int, dest: str) -> dict[str, Any]:
    """Map one tile in this (fresh) process; return its peak RSS and time, and where the peak was reached.

    The trace: peak RSS before mapping (libraries and model loaded), after
    the first window, after the last window (the raw GeoTIFF written, before
    the COG conversion), and at the end (COG written).
    """
    region = to_object(json.loads(region_json), RegionConfig)
    art = load(model_dir)
    stack = open_tile(region.tiles[0], region)
    trace: dict[str, float | None] = {"loaded": _status_mb("VmHWM")}
    seen = [0]

    def on_window(_: int) -> None:
        seen[0] += 1
        if seen[0] == 1:
            trace["first_window"] = _status_mb("VmHWM")
        trace["last_window"] = _status_mb("VmHWM")

    t0 = time.perf_counter()
    map_tile(stack, art, Settings(4, art.card.cutoff_year, 0.8, art.card.calibration.interval_mass(0.8), window, pixel_batch, 0, False), Path(dest), region=region, on_window=on_window)
    trace["cog_written"] = _status_mb("VmHWM")
    seconds = round(time.perf_counter() - t0, 2)
    peaks = {k: round(v, 1) if v else v for k, v in trace.items()}
    return {"peak_rss_mb": round(peak_rss_mb(), 1), "seconds": seconds, "pixels": stack.grid.height * stack.grid.width, "peak_trace_mb": peaks}


def run(cfg: SpeedConfig) -> dict[str, Any]:
    """Every figure of ``speed.json``."""
    threads = torch.get_num_threads()
    res: dict[str, Any] = {"threads": threads, "torch": torch.__version__}
    model_dir = resolve_model(cfg.model)
    art = load(model_dir)
    tile_cfg = next((t for t in cfg.region.tiles if t.name == cfg.tile), None)
    if tile_cfg is None:
        raise ConfigError(f"tile: {cfg.tile!r} is not a tile of region {cfg.region.name!r}")
    stack = open_tile(tile_cfg, cfg.region)
    g = stack.grid
    n_px = g.height * g.width
    halo = art.members[0].halo
    res.update(dates=len(art.card.dates), bands=len(art.card.bands), members=len(art.members), tile_px=[g.height, g.width], window=cfg.window, pixel_batch=cfg.pixel_batch)

    res["gemm_gflops"] = round(gemm_gflops(), 2)

    # The model on one full window of real data, FLOPs counted.
    r0 = c0 = 0
    w = min(cfg.window, g.height, g.width)
    refl, valid = read_window(stack, r0, c0, w, w, halo)
    x, v = torch.from_numpy(features(refl, art.card.bands, art.card.indices)), torch.from_numpy(valid)
    flops = model_flops(art, x, v, cfg.pixel_batch)

    def networks_only() -> None:
        with torch.inference_mode():
            for m in runners(art):
                m.forward_window(x, v, cfg.pixel_batch)

    sec = _median_seconds(networks_only, cfg.repeats)
    res["networks"] = "distilled" if art.distilled is not None else "ensemble"
    res["model_flops_per_px_date"] = round(flops / (w * w * len(art.card.dates) * len(runners(art))))
    res["model_gflops"] = round(flops / sec / 1e9, 2)
    res["roofline_ratio"] = round(res["model_gflops"] / res["gemm_gflops"], 3)

    # Model only: every window of the tile, inputs already in memory.
    wins = list(windows(g.height, g.width, cfg.window))
    inputs = []
    for r, c, h, ww in wins:
        a, b = read_window(stack, r, c, h, ww, halo)
        inputs.append((torch.from_numpy(features(a, art.card.bands, art.card.indices)), torch.from_numpy(b)))
    sec = _median_seconds(lambda: [window_probabilities(art, xi, vi, cfg.pixel_batch) for xi, vi in inputs], cfg.repeats)
    res["model_only_px_per_s"] = round(n_px / sec, 1)
    inputs.clear()

    # End to end: GeoTIFF in, COG out, through the mapping pipeline.
    settings = Settings(4, art.card.cutoff_year, art.card.interval_level, art.card.calibration.interval_mass(art.card.interval_level), cfg.window, cfg.pixel_batch, 0, False)
    with tempfile.TemporaryDirectory(prefix="plantation-speed-") as tmp:

        def end_to_end() -> None:
            map_tile(open_tile(tile_cfg, cfg.region), art, settings, Path(tmp) / "tile.tif", region=cfg.region)

        sec = _median_seconds(end_to_end, cfg.repeats)
        res["end_to_end_px_per_s"] = round(n_px / sec, 1)
        if art.distilled is not None:
            # Every member instead, for what the distilled network saves.
            every = replace(settings, distilled=False)
            sec = _median_seconds(lambda: map_tile(open_tile(tile_cfg, cfg.region), art, every, Path(tmp) / "tile.tif", region=cfg.region), cfg.repeats)
            res["ensemble_end_to_end_px_per_s"] = round(n_px / sec, 1)
    res["pipeline_ratio"] = round(res["end_to_end_px_per_s"] / res["model_only_px_per_s"], 3)

    # A longer series (60 dates with the defaults): a model of the default size, random weights, with and without a distilled network.
    long_dir = long_series_tile(cfg, Path(cfg.cache_dir))
    long_region = replace(cfg.region, name="long", tiles=[TileConfig(name="t01", path=str(long_dir))])
    long_stack = open_tile(long_region.tiles[0], long_region)
    long_dates = [str(d) for d in long_stack.dates]
    long_art = load(random_model(Path(cfg.cache_dir) / "long_model", long_dates, long_region, members=len(art.members), distilled=True))
    long_settings = replace(settings, cutoff_year=long_art.card.cutoff_year)
    n_long = long_stack.grid.height * long_stack.grid.width
    with tempfile.TemporaryDirectory(prefix="plantation-speed-") as tmp:
        for key, st in (("end_to_end_px_per_s_long", long_settings), ("ensemble_end_to_end_px_per_s_long", replace(long_settings, distilled=False))):
            sec = _median_seconds(lambda st=st: map_tile(open_tile(long_region.tiles[0], long_region), long_art, st, Path(tmp) / "tile.tif", region=long_region), cfg.repeats)
            res[key] = round(n_long / sec, 1)
    res["long_dates"] = len(long_dates)

    # Naive patch by patch: each pixel's k x k patch through forward(), batched.
    rng = np.random.default_rng(0)
    idx = rng.choice(n_px, size=min(cfg.patch_pixels, n_px), replace=False)
    pr, pv = read_patches(stack, idx // g.width, idx % g.width, art.members[0].neighbourhood)
    xp = torch.from_numpy(features(pr, art.card.bands, art.card.indices))
    vp = torch.from_numpy(pv)

    def patchwise() -> None:
        with torch.inference_mode():
            for i in range(0, len(idx), 256):
                z = torch.stack([m(xp[i : i + 256], vp[i : i + 256])[:, : m.n_outcomes] for m in runners(art)])
                art.calibrated_log_probs(z).exp()

    sec = _median_seconds(patchwise, cfg.repeats)
    res["patchwise_px_per_s"] = round(len(idx) / sec, 1)
    res["fullconv_speedup"] = round(res["model_only_px_per_s"] / res["patchwise_px_per_s"], 2)

    # The trees baseline mapping the same tile (reading, annual features, prediction).
    tc = TrainConfig(region=cfg.region)
    _, _, samples = load_region_samples(tc)
    train = samples.part("train")
    date_year = year_of(samples.dates) - year_of(samples.dates).min()
    ny = len(samples.outcomes.years)
    xs, vs = centre_series(train)
    trees = AnnualTrees().fit(annual_features(xs, vs, date_year, ny, samples.channels), train.target, samples.outcomes.size)

    def trees_map() -> None:
        xt, vt = tile_series(open_tile(tile_cfg, cfg.region), list(cfg.region.bands), list(art.card.indices))
        trees.predict_proba(annual_features(xt, vt, date_year, ny, samples.channels))

    sec = _median_seconds(trees_map, cfg.repeats)
    res["trees_px_per_s"] = round(n_px / sec, 1)
    res["model_vs_trees"] = round(res["end_to_end_px_per_s"] / res["trees_px_per_s"], 3)

    # The tuned random forest of the accuracy benchmark mapping the same tile (reading, yearly medians and minima, prediction), on the same threads.
    val = samples.part("val")
    xv, vv = centre_series(val)
    forest = cfg.forest.forest(n_jobs=torch.get_num_threads())
    forest.fit(AnnualForest.features(xs, vs, date_year, ny, samples.channels), train.target, samples.outcomes.size, val=(AnnualForest.features(xv, vv, date_year, ny, samples.channels), val.target))

    def forest_map() -> None:
        xt, vt = tile_series(open_tile(tile_cfg, cfg.region), list(cfg.region.bands), list(art.card.indices))
        forest.predict_proba(AnnualForest.features(xt, vt, date_year, ny, samples.channels))

    sec = _median_seconds(forest_map, cfg.repeats)
    res["forest_px_per_s"] = round(n_px / sec, 1)
    # Like for like: the model's probabilities of the same tile from its files (read, features, network, calibration), nothing written, as the forest's.
    sec = _median_seconds(lambda: predict_tile(art, open_tile(tile_cfg, cfg.region), window=cfg.window, pixel_batch=cfg.pixel_batch), cfg.repeats)
    res["predict_px_per_s"] = round(n_px / sec, 1)
    res["model_vs_forest"] = round(res["predict_px_per_s"] / res["forest_px_per_s"], 3)
    # The map written as well (COG, styles of the layers): what a user waits for.
    res["end_to_end_vs_forest"] = round(res["end_to_end_px_per_s"] / res["forest_px_per_s"], 3)
    res["forest_params"] = {k: str(v) for k, v in (forest.params_ or {}).items()}

    # Peak memory of fresh processes mapping large simulated tiles.
    cache = Path(cfg.cache_dir)
    tiles = make_rss_tiles(cfg, cache)
    base_folder = tiles[min(cfg.rss_sizes)]
    first = open_tile(TileConfig(name="t01", path=str(base_folder)), cfg.region)
    rss_model = random_model(cache / "rss_model", [str(d) for d in first.dates], cfg.region)
    rss: dict[str, Any] = {"dates": len(first.dates), "members": 1, "window": cfg.window, "gdal_cache_mb": cfg.gdal_cache_mb}
    for size, folder in sorted(tiles.items()):
        region = replace(cfg.region, name=f"rss{size}", tiles=[TileConfig(name="t01", path=str(folder))])
        region_json = json.dumps(asdict(region))
        with tempfile.TemporaryDirectory(prefix="plantation-rss-") as tmp:
            code = "import json, sys; from plantation.benchmarks.speed import rss_child; print(json.dumps(rss_child(*sys.argv[1:3], int(sys.argv[3]), int(sys.argv[4]), sys.argv[5])))"
            env = {**os.environ, "GDAL_CACHEMAX": str(cfg.gdal_cache_mb)}
            proc = subprocess.run(
                [sys.executable, "-c", code, region_json, str(rss_model), str(cfg.window), str(cfg.pixel_batch), str(Path(tmp) / "tile.tif")], capture_output=True, text=True, check=False, env=env
            )
            if proc.returncode != 0:
                raise RuntimeError(f"memory run for {size}² failed: {proc.stderr.strip().splitlines()[-1] if proc.stderr.strip() else proc.returncode}")
            child = json.loads(proc.stdout.strip().splitlines()[-1])
        res[f"peak_rss_mb_{size}"] = child["peak_rss_mb"]
        rss[f"peak_trace_mb_{size}"] = child["peak_trace_mb"]
        rss[f"seconds_{size}"] = child["seconds"]
        rss[f"px_per_s_{size}"] = round(child["pixels"] / child["seconds"], 1)
    sizes = sorted(cfg.rss_sizes)
    if len(sizes) > 1:
        res["rss_ratio"] = round(res[f"peak_rss_mb_{sizes[-1]}"] / res[f"peak_rss_mb_{sizes[0]}"], 3)
    res["rss_run"] = rss
    res["date"] = time.strftime("%Y-%m-%d")
    return res
