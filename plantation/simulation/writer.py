"""Writing a simulated region: per-tile imagery and truth rasters, reference labels, demo farm plots and a manifest."""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import asdict
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio
import shapely
from affine import Affine
from rasterio.windows import Window

from plantation.reference.labels import LABEL_CODES, LABEL_NAMES
from plantation.simulation.landscape import Simulator
from plantation.simulation.scenario import BANDS, EVENTS, SimulationConfig
from plantation.simulation.spectra import SpectralTable


def _profile(cfg: SimulationConfig, ti: int, tj: int, count: int, dtype: str, nodata: float | None) -> dict:
    transform = Affine(cfg.pixel_size, 0, cfg.origin_x + tj * cfg.tile_size * cfg.pixel_size, 0, -cfg.pixel_size, cfg.origin_y - ti * cfg.tile_size * cfg.pixel_size)
    block = min(cfg.block, 256)
    tiled = cfg.tile_size >= block
    prof = {
        "driver": "GTiff",
        "width": cfg.tile_size,
        "height": cfg.tile_size,
        "count": count,
        "dtype": dtype,
        "crs": cfg.crs,
        "transform": transform,
        "nodata": nodata,
        "compress": "deflate",
        "predictor": 2,
        "zlevel": cfg.zlevel,
        "interleave": "pixel",
    }
    if tiled:
        prof.update(tiled=True, blockxsize=block, blockysize=block)
    else:
        prof.update(tiled=False, blockysize=16)
    return prof


#: Bands of a simulated tile's ``truth.tif``, in order (``fire``: codes of :data:`plantation.simulation.scenario.FIRE_TRUTH`).
TRUTH_BANDS: tuple[str, ...] = ("class", "onset_year", "event", "event_year", "parcel", "fire")


def tile_names(cfg: SimulationConfig) -> list[tuple[str, int, int]]:
    """(name, tile row, tile col) for every tile, row-major."""
    return [(f"t{ti * cfg.tiles_x + tj + 1:02d}", ti, tj) for ti in range(cfg.tiles_y) for tj in range(cfg.tiles_x)]


def write_region(cfg: SimulationConfig, out: str | Path, *, progress: bool = True, table: SpectralTable | None = None) -> Path:
    """Simulate a region and write it under ``out`` (see the module docstring).

    The region is written into a temporary sibling folder and renamed into
    place when complete, so an interrupted run leaves no half region behind.
    Existing contents of ``out`` are replaced.

    Returns:
        The output folder.
    """
    out = Path(out)
    sim = Simulator(cfg, table)
    tmp = out.with_name(out.name + ".partial")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir(parents=True)
    from tqdm import tqdm

    tiles = tile_names(cfg)
    n_blocks = int(np.ceil(cfg.tile_size / cfg.block)) ** 2
    bar = tqdm(total=len(tiles) * n_blocks, desc="simulating windows", unit="win", disable=not progress)
    halo = sim.halo()
    for ti_name, ti, tj in tiles:
        tdir = tmp / ti_name / "imagery"
        tdir.mkdir(parents=True)
        prof = _profile(cfg, ti, tj, len(BANDS) + 1, "int16", cfg.nodata)
        dsts = [rasterio.open(tdir / f"{d.isoformat()}.tif", "w", **prof) for d in sim.dates]
        try:
            for dst in dsts:
                for b, name in enumerate(BANDS, 1):
                    dst.set_band_description(b, name)
                dst.set_band_description(len(BANDS) + 1, "qa")
            with rasterio.open(tmp / ti_name / "truth.tif", "w", **{**_profile(cfg, ti, tj, len(TRUTH_BANDS), "int32", None), "nodata": None}) as tdst:
                for b, name in enumerate(TRUTH_BANDS, 1):
                    tdst.set_band_description(b, name)
                for wr in range(0, cfg.tile_size, cfg.block):
                    for wc in range(0, cfg.tile_size, cfg.block):
                        h = min(cfg.block, cfg.tile_size - wr)
                        w = min(cfg.block, cfg.tile_size - wc)
                        r0, c0 = ti * cfg.tile_size + wr, tj * cfg.tile_size + wc
                        win = Window(wc, wr, w, h)
                        tdst.write(np.concatenate([sim.truth(r0, c0, h, w), sim.fire_truth(r0, c0, h, w)[None]]), window=win)
                        st = sim.static(r0 - halo, c0 - halo, h + 2 * halo, w + 2 * halo)
                        for k, dst in enumerate(dsts):
                            rng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 3, r0, c0, k]))
                            dn, qa = sim.window(r0, c0, h, w, k, rng, st)
                            dst.write(dn, indexes=list(range(1, len(BANDS) + 1)), window=win)
                            dst.write(qa.astype(np.int16), indexes=len(BANDS) + 1, window=win)
                        bar.update(1)
        finally:
            for dst in dsts:
                dst.close()
    bar.close()
    _write_labels(cfg, sim, tmp)
    _write_plots(cfg, tmp)
    (tmp / "simulation.json").write_text(json.dumps(asdict(cfg), indent=2, sort_keys=True) + "\n")
    _write_manifest(tmp)
    if out.exists():
        shutil.rmtree(out)
    tmp.rename(out)
    return out


def _write_labels(cfg: SimulationConfig, sim: Simulator, folder: Path) -> None:
    """Stratified reference sample from the truth, with interpreter errors."""
    from pyproj import Transformer

    rng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 4]))
    frames = []
    for name, _, _ in tile_names(cfg):
        with rasterio.open(folder / name / "truth.tif") as src:
            cls, onset = src.read(1), src.read(2)
            transform = src.transform
        rr, cc = np.nonzero(cls > 0)
        frames.append(pd.DataFrame({"tile": name, "row": rr, "col": cc, "cls": cls[rr, cc], "onset": onset[rr, cc], "a": transform.a, "c": transform.c, "e": transform.e, "f": transform.f}))
    pool = pd.concat(frames, ignore_index=True)
    total = cfg.n_labels
    shares = {k: v / sum(cfg.label_shares.values()) for k, v in cfg.label_shares.items()}
    picks = []
    for lab, share in shares.items():
        idx = np.flatnonzero(pool["cls"].to_numpy() == LABEL_CODES[lab])
        n = min(int(round(total * share)), idx.size)
        picks.append(rng.choice(idx, n, replace=False))
    s = pool.iloc[np.sort(np.concatenate(picks))].reset_index(drop=True)
    # A point anywhere inside its pixel, away from the edges.
    jx, jy = rng.uniform(0.2, 0.8, len(s)), rng.uniform(0.2, 0.8, len(s))
    x = s["c"] + (s["col"] + jx) * s["a"]
    y = s["f"] + (s["row"] + jy) * s["e"]
    lon, lat = Transformer.from_crs(cfg.crs, "EPSG:4326", always_xy=True).transform(x.to_numpy(), y.to_numpy())
    true_label = np.array(LABEL_NAMES)[s["cls"].to_numpy() - 1]
    true_onset = s["onset"].to_numpy()
    label = true_label.copy()
    onset = true_onset.copy()
    wrong = rng.uniform(size=len(s)) < cfg.label_error
    for i in np.flatnonzero(wrong):
        if label[i] == "conversion" and rng.uniform() < 0.5:
            # A timing error: the interpreter saw the clearing a year off.
            shift = rng.choice([-1, 1])
            if not cfg.first_year <= onset[i] + shift <= cfg.last_year:
                shift = -shift
            onset[i] = onset[i] + shift
        else:
            label[i] = rng.choice([n for n in LABEL_NAMES if n != label[i]])
            onset[i] = int(rng.integers(cfg.first_year, cfg.last_year + 1)) if label[i] == "conversion" else 0
    onset_text = np.where(label == "conversion", onset.astype(str), "")
    pd.DataFrame({"x": np.round(lon, 7), "y": np.round(lat, 7), "label": label, "onset_year": onset_text}).to_csv(folder / "labels.csv", index=False, lineterminator="\n")
    pd.DataFrame(
        {
            "tile": s["tile"],
            "row": s["row"],
            "col": s["col"],
            "label": label,
            "onset_year": np.where(label == "conversion", onset, 0),
            "true_label": true_label,
            "true_onset_year": true_onset,
            "is_error": wrong,
        }
    ).to_csv(folder / "labels_truth.csv", index=False, lineterminator="\n")


def _write_plots(cfg: SimulationConfig, folder: Path) -> None:
    """Fictional farm plots over the region: ``plots.geojson`` (EPSG:4326, RFC 7946), for ``plantation farmplots``.

    Outlines are parcels of the truth ``parcel`` band, polygonised (whole
    across tile seams), simplified and shifted by a few metres so their edges
    cut across pixels. About 40 plots: holdings and estate blocks converted
    up to and after 2020 (the demo's cutoff year), old-plantation blocks,
    forest logged or burnt that regrew, forest cleared for crops, rotated
    squares of untouched forest, and one plot across the seam of the first
    two tiles. Attributes: ``id`` (``SLV-P0001``, ...) and ``holder``, an
    invented code. Same config, same bytes.
    """
    import logging

    import pyogrio
    import shapely.affinity
    from pyproj import Transformer
    from rasterio.features import shapes

    cutoff = 2020  # calibration.cutoff_year's default, the cutoff the toy map is made with
    rng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 5]))
    ts, px = cfg.tile_size, cfg.pixel_size
    height, width = cfg.tiles_y * ts, cfg.tiles_x * ts
    min_px, max_px = 8, 400  # 0.7-36 ha at 30 m: holding- to block-sized plots
    pieces: dict[int, list[shapely.Geometry]] = {}
    event_of: dict[int, int] = {}
    year_of: dict[int, int] = {}
    parcel_all = np.zeros((height, width), np.int32)
    for name, ti, tj in tile_names(cfg):
        with rasterio.open(folder / name / "truth.tif") as src:
            event, event_year, parcel = src.read([3, 4, 5])
            transform = src.transform
        parcel_all[ti * ts : (ti + 1) * ts, tj * ts : (tj + 1) * ts] = parcel
        # Every pixel of a parcel carries the parcel's event and year.
        ids, first = np.unique(parcel, return_index=True)
        for pid, k in zip(ids.tolist(), first.tolist(), strict=True):
            event_of[pid], year_of[pid] = int(event.flat[k]), int(event_year.flat[k])
        for geom, value in shapes(parcel, mask=parcel > 0, transform=transform, connectivity=4):
            pieces.setdefault(int(value), []).append(shapely.geometry.shape(geom))

    def outline(pid: int) -> shapely.Geometry:
        # A parcel drawn over by later ones can be in fragments or holed: the
        # plot is its largest piece, holes filled (a holder's boundary).
        parts = shapely.get_parts(shapely.union_all(pieces[pid]))
        return shapely.Polygon(max(parts, key=lambda p: p.area).exterior)

    shapes_of = {pid: outline(pid) for pid in sorted(pieces)}
    # Compact outlines only: what is left of a parcel drawn over by roads or
    # later parcels can be a strip or a cross, not a plot anyone holds.
    sized = [pid for pid, g in shapes_of.items() if min_px <= g.area / px**2 <= max_px and g.area >= 0.6 * g.convex_hull.area]
    E = EVENTS
    picks: list[shapely.Geometry] = []
    used: set[int] = set()
    if cfg.tiles_x > 1:
        # At least 3 pixels on each side of the t01/t02 seam, so it still crosses once shifted.
        x0, y0 = cfg.origin_x, cfg.origin_y
        sides = [shapely.box(x0 + j * ts * px, y0 - ts * px, x0 + (j + 1) * ts * px, y0) for j in (0, 1)]
        crossing = [p for p in sized if all(shapes_of[p].intersection(b).area >= 3 * px**2 for b in sides)]
        for kinds in ((E["holding_conversion"],), (E["estate_conversion"],), tuple(E.values())):
            cand = [p for p in crossing if event_of[p] in kinds]
            if cand:
                pid = int(rng.choice(cand))
                used.add(pid)
                picks.append(shapes_of[pid])
                break
    groups = (
        (lambda p: event_of[p] == E["holding_conversion"] and year_of[p] <= cutoff, 9),
        (lambda p: event_of[p] == E["holding_conversion"] and year_of[p] > cutoff, 9),
        (lambda p: event_of[p] == E["estate_conversion"] and year_of[p] <= cutoff, 3),
        (lambda p: event_of[p] == E["estate_conversion"] and year_of[p] > cutoff, 3),
        (lambda p: event_of[p] == E["old_plantation"], 5),
        (lambda p: event_of[p] in (E["logging"], E["fire_regrowth"]), 4),
        (lambda p: event_of[p] == E["cleared_for_crops"], 2),
    )
    for keep, n in groups:
        cand = [p for p in sized if p not in used and keep(p)]
        for pid in rng.choice(cand, min(n, len(cand)), replace=False).tolist() if cand else []:
            used.add(int(pid))
            picks.append(shapes_of[int(pid)])
    # Untouched forest: rotated squares over background pixels only.
    squares, tries = 0, 0
    while squares < 4 and tries < 500:
        tries += 1
        side = rng.uniform(6, 11)
        r, c = rng.uniform(side, height - side), rng.uniform(side, width - side)
        half = int(np.ceil(side * 0.75))
        if parcel_all[max(int(r) - half, 0) : int(r) + half + 1, max(int(c) - half, 0) : int(c) + half + 1].any():
            continue
        sq = shapely.affinity.rotate(shapely.box(c - side / 2, r - side / 2, c + side / 2, r + side / 2), rng.uniform(0, 90))
        picks.append(shapely.affinity.affine_transform(sq, [px, 0, 0, -px, cfg.origin_x, cfg.origin_y]))
        squares += 1
    plots = []
    for g in picks:
        # Edges off the pixel grid: a simplified outline, shifted a few metres.
        g = g.simplify(rng.uniform(0.3, 0.7) * px)
        g = shapely.affinity.translate(g, rng.uniform(-0.4, 0.4) * px, rng.uniform(-0.4, 0.4) * px)
        g = shapely.make_valid(g)
        parts = [p for p in shapely.get_parts(g) if p.geom_type == "Polygon"]
        if parts:
            plots.append(max(parts, key=lambda p: p.area))
    order = rng.permutation(len(plots))
    letters = np.array(list("ACEFHJKLMNPRTWXY"))
    holders: list[str] = []
    while len(holders) < 16:
        code = f"{''.join(rng.choice(letters, 3))}-{int(rng.integers(10, 100))}"
        if code not in holders:
            holders.append(code)
    to_wgs84 = Transformer.from_crs(cfg.crs, "EPSG:4326", always_xy=True)
    geoms = [shapely.transform(plots[i], to_wgs84.transform, interleaved=False) for i in order]
    ids = np.array([f"SLV-P{k + 1:04d}" for k in range(len(geoms))], dtype=object)
    holder = np.array([holders[int(rng.integers(len(holders)))] for _ in geoms], dtype=object)
    io_log = logging.getLogger("pyogrio._io")  # its INFO "Created N records" would reach a script's output
    level = io_log.level
    io_log.setLevel(max(level, logging.WARNING))
    try:
        pyogrio.raw.write(
            folder / "plots.geojson",
            np.array([shapely.to_wkb(g) for g in geoms], dtype=object),
            [ids, holder],
            ["id", "holder"],
            layer="plots",
            driver="GeoJSON",
            geometry_type="Polygon",
            crs="EPSG:4326",
            layer_options={"RFC7946": "YES", "COORDINATE_PRECISION": "7"},
        )
    finally:
        io_log.setLevel(level)


def _write_manifest(folder: Path) -> None:
    """SHA-256 of every file, so a regeneration can be checked byte for byte."""
    files = sorted(p for p in folder.rglob("*") if p.is_file() and p.name != "MANIFEST.json")
    digest = {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest() for p in files}
    (folder / "MANIFEST.json").write_text(json.dumps(digest, indent=1, sort_keys=True) + "\n")
