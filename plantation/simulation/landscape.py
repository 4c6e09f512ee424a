"""Simulated regions that behave like multi-year optical imagery over tropical
forest being converted to tree-crop plantations.

The simulation has four layers, each seeded and independent of how the
region is cut into windows, so a 4096 × 4096 region is produced window by
window with the same result as a small one would give for the same pixels:

1. **Landscape** (:class:`Landscape`): polygons in pixel coordinates —
   forest background, grassland and cropland patches, old plantation estates
   present before the first year, conversion estates cut into blocks that are
   cleared over several years, small irregular holdings clustered near them,
   and confounders that are *not* conversions: selective logging and fire
   followed by forest regrowth, forest cleared for crops or pasture, estate
   roads, rivers.
2. **Trajectories** (:func:`surface_state`): per pixel and date, the canopy
   drivers of :mod:`plantation.spectra` (LAI, vigour, soil brightness,
   tree-crop cover fraction) with seasonality and year-to-year anomalies.
3. **Spectra**: PROSAIL band reflectance, mixed at class edges by the sensor's
   point-spread function.
4. **Observation**: spatially coherent clouds (wet-season frequency from the
   config), shadows, thin unflagged cloud edges, haze, sensor noise, one
   sensor change (band-wise gain and offset) and one processing change (a
   fixed offset in the stored integers, to be removed by the region's
   scaling rules).

Outputs (:func:`write_region`): per tile, ``imagery/YYYY-MM-DD.tif`` (int16,
bands blue…swir2 as reflectance × 10000, then a QA band: bit 0 cloud, bit 1
shadow, bit 2 fill), ``truth.tif`` (int32 bands: class, onset_year, event,
event_year, parcel), plus region-wide ``labels.csv`` (a stratified reference
sample with interpreter errors) and ``labels_truth.csv``.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from datetime import date, timedelta
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio
import shapely
from affine import Affine
from rasterio.features import rasterize
from rasterio.windows import Window
from scipy.ndimage import gaussian_filter

from plantation.errors import ConfigError
from plantation.reference.labels import LABEL_CODES, LABEL_NAMES
from plantation.simulation.spectra import CLOUD, HAZE, WATER, SpectralTable, default_table

BANDS: tuple[str, ...] = ("blue", "green", "red", "nir", "swir1", "swir2")

#: Event codes of the truth raster's ``event`` band.
EVENTS: dict[str, int] = {
    "none": 0,
    "estate_conversion": 1,
    "holding_conversion": 2,
    "logging": 3,
    "fire_regrowth": 4,
    "cleared_for_crops": 5,
    "cropland": 6,
    "grassland": 7,
    "water": 8,
    "road": 9,
    "old_plantation": 10,
}

#: Class of each event kind in the truth raster (codes of LABEL_CODES).
_CLASS_OF_EVENT = {
    "none": "stable_forest",
    "estate_conversion": "conversion",
    "holding_conversion": "conversion",
    "logging": "stable_forest",
    "fire_regrowth": "stable_forest",
    "cleared_for_crops": "other",
    "cropland": "other",
    "grassland": "other",
    "water": "other",
    "road": "other",
    "old_plantation": "old_plantation",
}

QA_CLOUD, QA_SHADOW, QA_FILL = 1, 2, 4


@dataclass
class SimulationConfig:
    """Knobs of a simulated region (documented in ``configs/sim/*.yaml``)."""

    name: str = "selvara_lowlands"
    seed: int = 20130
    tiles_x: int = 2
    tiles_y: int = 1
    tile_size: int = 192
    pixel_size: float = 30.0
    crs: str = "EPSG:32650"
    origin_x: float = 604020.0
    origin_y: float = 171990.0
    first_year: int = 2013
    last_year: int = 2024
    composite_doys: list[int] = field(default_factory=lambda: [45, 136, 227, 318])
    # Landscape, expected counts per 100 km² (a 192-px tile at 30 m is 33 km²).
    estates_per_100km2: float = 9.0
    estate_ha: list[float] = field(default_factory=lambda: [150.0, 450.0])
    estate_spread_years: int = 3
    holdings_per_100km2: float = 150.0
    holding_ha: list[float] = field(default_factory=lambda: [1.0, 8.0])
    old_estates_per_100km2: float = 3.0
    logging_per_100km2: float = 40.0
    fires_per_100km2: float = 25.0
    cleared_for_crops_per_100km2: float = 40.0
    cropland_per_100km2: float = 12.0
    grassland_per_100km2: float = 12.0
    rivers_per_100km2: float = 1.5
    burn_share: float = 0.7
    # Observation
    cloud_share_by_month: list[float] = field(default_factory=lambda: [0.7, 0.68, 0.62, 0.5, 0.35, 0.25, 0.2, 0.22, 0.3, 0.45, 0.6, 0.7])
    cloud_share_jitter: float = 0.08
    fill_share_of_cloud: float = 0.3
    haze_max: float = 0.08
    noise_sigma: list[float] = field(default_factory=lambda: [0.003, 0.003, 0.003, 0.004, 0.004, 0.004])
    noise_relative: float = 0.015
    psf_sigma_px: float = 0.5
    sensor_change: str = "2019-01-01"
    sensor_gain: list[float] = field(default_factory=lambda: [1.02, 1.01, 1.03, 0.97, 1.015, 1.02])
    sensor_offset: list[float] = field(default_factory=lambda: [0.004, 0.003, 0.002, -0.006, 0.004, 0.003])
    processing_change: str = "2021-01-01"
    processing_offset_dn: int = 1000
    nodata: int = -9999
    # Reference labels
    n_labels: int = 3000
    label_shares: dict[str, float] = field(default_factory=lambda: {"stable_forest": 0.35, "conversion": 0.35, "old_plantation": 0.1, "other": 0.2})
    label_error: float = 0.05
    # Writing
    block: int = 256
    zlevel: int = 9


def check_config(cfg: SimulationConfig) -> None:
    """Raise :class:`ConfigError` for inconsistent simulation settings."""
    if cfg.last_year < cfg.first_year:
        raise ConfigError(f"sim.last_year {cfg.last_year} is before sim.first_year {cfg.first_year}")
    if len(cfg.cloud_share_by_month) != 12:
        raise ConfigError(f"sim.cloud_share_by_month needs 12 values, got {len(cfg.cloud_share_by_month)}")
    for key in ("noise_sigma", "sensor_gain", "sensor_offset"):
        if len(getattr(cfg, key)) != len(BANDS):
            raise ConfigError(f"sim.{key} needs {len(BANDS)} values (one per band), got {len(getattr(cfg, key))}")
    if set(cfg.label_shares) - set(LABEL_NAMES):
        raise ConfigError(f"sim.label_shares: unknown label(s) {sorted(set(cfg.label_shares) - set(LABEL_NAMES))}")
    if not 0 <= cfg.label_error < 1:
        raise ConfigError(f"sim.label_error must be in [0, 1), got {cfg.label_error}")
    if any(not 1 <= d <= 365 for d in cfg.composite_doys):
        raise ConfigError(f"sim.composite_doys must lie in 1..365, got {list(cfg.composite_doys)}")
    if cfg.block % 16:
        raise ConfigError(f"sim.block must be a multiple of 16 (GeoTIFF tiling), got {cfg.block}")


def dates_of(cfg: SimulationConfig) -> list[date]:
    """Composite dates: every ``composite_doys`` day of every year."""
    return [date(y, 1, 1) + timedelta(days=d - 1) for y in range(cfg.first_year, cfg.last_year + 1) for d in cfg.composite_doys]


def decimal_year(d: date) -> float:
    """Calendar year plus the fraction of it elapsed at noon of ``d``."""
    start = date(d.year, 1, 1)
    length = (date(d.year + 1, 1, 1) - start).days
    return d.year + ((d - start).days + 0.5) / length


# --------------------------------------------------------------------------- #
# Smooth random fields, window-independent
# --------------------------------------------------------------------------- #


class SmoothField:
    """A smooth random field over the whole region, sampled window by window.

    The field is a cubic B-spline surface whose coefficients are independent
    standard normals on a lattice with one knot every ``cell`` pixels. The
    lattice is small (H/cell × W/cell), so it is held whole, and a window is
    evaluated as ``B_rows @ C @ B_cols.T`` with SciPy's sparse B-spline design
    matrices: any window gets exactly the values it has in the full raster.
    Each pixel's value is standard normal (the spline is rescaled per pixel).
    """

    def __init__(self, rng: np.random.Generator, height: int, width: int, cell: float, layers: int = 1) -> None:
        self.cell = float(cell)
        # Margin of 3 knots on each side for windows that reach outside the
        # region (halos, shadow offsets).
        self._ny, self._nx = int(np.ceil(height / cell)) + 10, int(np.ceil(width / cell)) + 10
        self.grid = rng.standard_normal((layers, self._ny, self._nx)).astype(np.float32)

    def _design(self, start: int, size: int, n: int) -> Any:
        from scipy.interpolate import BSpline

        knots = (np.arange(n + 4) - 6.0) * self.cell
        x = np.arange(start, start + size) + 0.5
        return BSpline.design_matrix(x, knots, 3, extrapolate=True)

    def sample(self, r0: int, c0: int, h: int, w: int, layer: int = 0) -> np.ndarray:
        """Field values at the pixel centres of a window, (h, w) float32."""
        br = self._design(r0, h, self._ny)
        bc = self._design(c0, w, self._nx)
        val = np.asarray((bc @ (br @ self.grid[layer]).T).T)
        # Divide by the standard deviation at each pixel (it depends on the
        # position between knots) so every pixel is exactly N(0, 1).
        sr = np.sqrt(np.asarray(br.multiply(br).sum(axis=1))).ravel()
        sc = np.sqrt(np.asarray(bc.multiply(bc).sum(axis=1))).ravel()
        return (val / np.outer(sr, sc)).astype(np.float32)


# --------------------------------------------------------------------------- #
# Landscape
# --------------------------------------------------------------------------- #


@dataclass
class Landscape:
    """Polygons of the region in global pixel coordinates (x = col, y = row).

    Each parcel ``i`` (1-based) has a geometry and attributes in parallel
    arrays; parcels later in the list are drawn over earlier ones.
    """

    height: int
    width: int
    geoms: list[shapely.Geometry]
    kind: np.ndarray  # event code, int
    year: np.ndarray  # event or onset year (0 for none)
    t_event: np.ndarray  # decimal year of the event (clearing, logging, fire)
    params: np.ndarray  # (n, 6) float: per-parcel trajectory parameters
    tree: shapely.STRtree = field(init=False)

    def __post_init__(self) -> None:
        self.tree = shapely.STRtree(self.geoms)

    def parcel_ids(self, r0: int, c0: int, h: int, w: int) -> np.ndarray:
        """Parcel id (1-based, 0 = forest background) of each pixel of a window."""
        box = shapely.box(c0, r0, c0 + w, r0 + h)
        hits = np.sort(self.tree.query(box, predicate="intersects"))
        if hits.size == 0:
            return np.zeros((h, w), dtype=np.int32)
        transform = Affine.translation(c0, r0)
        return rasterize(((self.geoms[i], int(i) + 1) for i in hits), out_shape=(h, w), transform=transform, fill=0, dtype="int32")


def _irregular(rng: np.random.Generator, cx: float, cy: float, radius: float, n: int = 9) -> shapely.Geometry:
    """A star-shaped irregular polygon (a smallholding, a burn scar)."""
    ang = np.sort(rng.uniform(0, 2 * np.pi, n))
    rad = radius * rng.uniform(0.6, 1.35, n)
    poly = shapely.Polygon(np.c_[cx + rad * np.cos(ang), cy + rad * np.sin(ang)])
    return shapely.make_valid(poly).buffer(0)


def _count(rng: np.random.Generator, per_100km2: float, area_km2: float) -> int:
    return int(rng.poisson(per_100km2 * area_km2 / 100.0))


def build_landscape(cfg: SimulationConfig) -> Landscape:
    """Lay out every parcel of the region from ``cfg.seed``."""
    rng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 1]))
    H, W = cfg.tiles_y * cfg.tile_size, cfg.tiles_x * cfg.tile_size
    px_ha = cfg.pixel_size**2 / 1e4
    area_km2 = H * W * px_ha / 100.0
    years = np.arange(cfg.first_year, cfg.last_year + 1)
    geoms: list[shapely.Geometry] = []
    kind: list[int] = []
    year: list[int] = []
    t_ev: list[float] = []
    params: list[np.ndarray] = []

    def add(g: shapely.Geometry, k: str, y: int = 0, t: float = 0.0) -> None:
        if g.is_empty:
            return
        geoms.append(g)
        kind.append(EVENTS[k])
        year.append(int(y))
        t_ev.append(float(t))
        params.append(rng.uniform(0.0, 1.0, 6))

    def rand_xy(margin: float = 0.0) -> tuple[float, float]:
        return float(rng.uniform(-margin, W + margin)), float(rng.uniform(-margin, H + margin))

    # Background 'other' land present all along.
    for k, rate, ha in (("grassland", cfg.grassland_per_100km2, (5, 40)), ("cropland", cfg.cropland_per_100km2, (5, 30))):
        for _ in range(_count(rng, rate, area_km2)):
            x, y = rand_xy()
            r = np.sqrt(rng.uniform(*ha) / px_ha / np.pi)
            add(_irregular(rng, x, y, r, 11) if k == "grassland" else shapely.box(x, y, x + 2 * r, y + 1.5 * r), k)

    # Old plantation estates: grid of blocks, present before the first year.
    def estate_blocks(x: float, y: float, side_w: float, side_h: float) -> Iterator[tuple[shapely.Geometry, int, int]]:
        block = rng.uniform(9, 14)
        nbx, nby = max(1, int(side_w // block)), max(1, int(side_h // block))
        for i in range(nbx):
            for j in range(nby):
                # One pixel of road between blocks.
                yield shapely.box(x + i * block + 0.5, y + j * block + 0.5, x + (i + 1) * block - 0.5, y + (j + 1) * block - 0.5), i, j

    def estate_roads(x: float, y: float, side_w: float, side_h: float) -> shapely.Geometry:
        return shapely.box(x, y, x + side_w, y + side_h).boundary.buffer(0.6)

    for _ in range(_count(rng, cfg.old_estates_per_100km2, area_km2)):
        ha = rng.uniform(*cfg.estate_ha)
        side = np.sqrt(ha / px_ha)
        x, y = rand_xy(side / 2)
        asp = rng.uniform(0.7, 1.4)
        for g, _, _ in estate_blocks(x, y, side * asp, side / asp):
            add(g, "old_plantation")

    # Confounders inside forest: logging, fire with regrowth.
    for k, rate, ha in (("logging", cfg.logging_per_100km2, (3, 30)), ("fire_regrowth", cfg.fires_per_100km2, (2, 25))):
        for _ in range(_count(rng, rate, area_km2)):
            x, y = rand_xy()
            r = np.sqrt(rng.uniform(*ha) / px_ha / np.pi)
            yr = int(rng.choice(years))
            add(_irregular(rng, x, y, r, 10), k, yr, yr + rng.uniform(0, 1))

    # Conversion estates: blocks cleared over a few years, front moving across.
    estate_boxes: list[tuple[float, float, float, float, int]] = []
    for _ in range(_count(rng, cfg.estates_per_100km2, area_km2)):
        ha = rng.uniform(*cfg.estate_ha)
        side = np.sqrt(ha / px_ha)
        asp = rng.uniform(0.7, 1.4)
        sw, sh = side * asp, side / asp
        x, y = rand_xy(side / 3)
        y0 = int(rng.choice(years[: max(1, len(years) - 1)]))
        estate_boxes.append((x, y, sw, sh, y0))
        t0 = y0 + rng.uniform(0, 1)
        add(estate_roads(x, y, sw, sh), "road", y0, t0)
        direction = rng.integers(4)
        for g, i, j in estate_blocks(x, y, sw, sh):
            nbx = max(1, int(sw // 11))
            nby = max(1, int(sh // 11))
            frac = [i / nbx, j / nby, 1 - i / nbx, 1 - j / nby][direction]
            lag = frac * cfg.estate_spread_years + rng.uniform(0, 0.6)
            t = min(t0 + lag, cfg.last_year + 0.999)
            add(g, "estate_conversion", int(np.floor(t)), t)

    # Forest cleared for crops or pasture (not plantation).
    for _ in range(_count(rng, cfg.cleared_for_crops_per_100km2, area_km2)):
        x, y = rand_xy()
        r = np.sqrt(rng.uniform(2, 20) / px_ha / np.pi)
        yr = int(rng.choice(years))
        g = _irregular(rng, x, y, r, 8) if rng.uniform() < 0.5 else shapely.box(x, y, x + 1.6 * r, y + 1.2 * r)
        add(g, "cleared_for_crops", yr, yr + rng.uniform(0, 1))

    # Smallholdings: most near an estate or another holding, spreading over years.
    anchors: list[tuple[float, float, int]] = [(x + sw / 2, y + sh / 2, y0) for x, y, sw, sh, y0 in estate_boxes]
    for _ in range(_count(rng, cfg.holdings_per_100km2, area_km2)):
        r = np.sqrt(rng.uniform(*cfg.holding_ha) / px_ha / np.pi)
        if anchors and rng.uniform() < 0.7:
            ax, ay, ay0 = anchors[int(rng.integers(len(anchors)))]
            d = rng.uniform(10, 60)
            a = rng.uniform(0, 2 * np.pi)
            x, y = ax + d * np.cos(a), ay + d * np.sin(a)
            yr = int(np.clip(ay0 + rng.integers(0, 5), cfg.first_year, cfg.last_year))
        else:
            x, y = rand_xy()
            yr = int(rng.choice(years))
        anchors.append((x, y, yr))
        add(_irregular(rng, x, y, r, 7), "holding_conversion", yr, yr + rng.uniform(0, 1))

    # Rivers on top: meandering lines a few pixels wide.
    for _ in range(max(1, _count(rng, cfg.rivers_per_100km2, area_km2))):
        n = 12
        xs = np.linspace(-10, W + 10, n) + rng.normal(0, W / 25, n)
        ys = rng.uniform(0, H) + np.cumsum(rng.normal(0, H / 12, n))
        if rng.uniform() < 0.5:
            xs, ys = ys * W / H, xs * H / W
        add(shapely.LineString(np.c_[xs, ys]).buffer(rng.uniform(0.8, 2.0)), "water")

    return Landscape(
        height=H,
        width=W,
        geoms=geoms,
        kind=np.array([0, *kind], dtype=np.int32),
        year=np.array([0, *year], dtype=np.int32),
        t_event=np.array([0.0, *t_ev]),
        params=np.vstack([np.full(6, 0.5), *params]) if params else np.full((1, 6), 0.5),
    )


# --------------------------------------------------------------------------- #
# Trajectories → canopy drivers → reflectance
# --------------------------------------------------------------------------- #


@dataclass
class StaticFields:
    """Per-pixel fields of a window that do not change with the date."""

    parcel: np.ndarray  # (h, w) int32
    kind: np.ndarray  # (h, w) event code
    t_event: np.ndarray  # (h, w) decimal year
    p: np.ndarray  # (6, h, w) per-parcel parameters in [0, 1)
    forest_lai: np.ndarray  # (h, w) climax LAI
    forest_vig: np.ndarray  # (h, w) vigour offset
    soil: np.ndarray  # (h, w) bare-soil brightness


class Simulator:
    """Produces any window of a simulated region, on any date, reproducibly."""

    def __init__(self, cfg: SimulationConfig, table: SpectralTable | None = None) -> None:
        check_config(cfg)
        self.cfg = cfg
        self.table = table if table is not None else default_table()
        self.landscape = build_landscape(cfg)
        self.dates = dates_of(cfg)
        self.t = np.array([decimal_year(d) for d in self.dates])
        H, W = self.landscape.height, self.landscape.width
        ss = np.random.SeedSequence([cfg.seed, 2])
        rngs = [np.random.default_rng(s) for s in ss.spawn(8)]
        self._canopy = SmoothField(rngs[0], H, W, cell=6, layers=3)
        self._canopy_coarse = SmoothField(rngs[1], H, W, cell=40, layers=2)
        nd = len(self.dates)
        self._cloud_coarse = SmoothField(rngs[2], H, W, cell=24, layers=nd)
        self._cloud_fine = SmoothField(rngs[3], H, W, cell=6, layers=nd)
        self._haze = SmoothField(rngs[4], H, W, cell=60, layers=nd)
        yr = np.arange(cfg.first_year, cfg.last_year + 1)
        self._year_anomaly = dict(zip(yr.tolist(), rngs[5].normal(0, 0.04, yr.size).tolist(), strict=True))
        month = np.array([d.month for d in self.dates])
        share = np.asarray(cfg.cloud_share_by_month)[month - 1] + rngs[6].normal(0, cfg.cloud_share_jitter, nd)
        #: Cloud share aimed at on each date (wet season high).
        self.cloud_target = np.clip(share, 0.0, 0.98)
        # Cloud field threshold per date from the normal quantile of the mix of
        # two unit-variance octaves (weights 0.85, 0.53 → unit variance).
        from scipy.stats import norm

        self._cloud_thr = norm.ppf(1.0 - self.cloud_target)
        self._sensor_from = decimal_year(date.fromisoformat(cfg.sensor_change))
        self._proc_from = date.fromisoformat(cfg.processing_change)

    # -- static -------------------------------------------------------------
    def static(self, r0: int, c0: int, h: int, w: int) -> StaticFields:
        L = self.landscape
        pid = L.parcel_ids(r0, c0, h, w)
        n1 = self._canopy.sample(r0, c0, h, w, 0)
        n2 = self._canopy.sample(r0, c0, h, w, 1)
        n3 = self._canopy.sample(r0, c0, h, w, 2)
        m1 = self._canopy_coarse.sample(r0, c0, h, w, 0)
        m2 = self._canopy_coarse.sample(r0, c0, h, w, 1)
        return StaticFields(
            parcel=pid,
            kind=L.kind[pid],
            t_event=L.t_event[pid],
            p=np.moveaxis(L.params[pid], -1, 0).astype(np.float32),
            forest_lai=np.clip(5.2 + 0.5 * m1 + 0.35 * n1, 3.5, 7.5),
            forest_vig=0.04 * m2 + 0.03 * n2,
            soil=np.clip(0.75 + 0.12 * n3 + 0.08 * m2, 0.45, 1.1),
        )

    # -- one date -----------------------------------------------------------
    def surface(self, st: StaticFields, k: int) -> np.ndarray:
        """Noise-free surface reflectance on date ``k``: (6, h, w) float32."""
        t = float(self.t[k])
        frac = t - np.floor(t)
        # Greenness peaks after the wet season (about April); dry stress in Aug–Sep.
        season = np.cos(2 * np.pi * (frac - 0.30))
        anomaly = self._year_anomaly[int(np.floor(t))]
        h, w = st.kind.shape
        E = EVENTS
        kind, te, p = st.kind, st.t_event, st.p
        dt = t - te  # years since the parcel's event
        after = dt >= 0

        lai_f = st.forest_lai * (1 + 0.04 * season + anomaly)
        vig_f = np.clip(0.72 + 0.07 * season + st.forest_vig + 0.5 * anomaly, 0.3, 1.0)

        canopy = np.zeros((h, w), np.int64)  # 0 forest, 1 tree crop, 2 herbaceous
        lai = lai_f.copy()
        vig = vig_f.copy()
        soil = st.soil.copy()
        # Tree-crop cover fraction and the under-storey mixed with it.
        fc = np.zeros((h, w), np.float32)
        u_lai = np.zeros((h, w), np.float32)
        u_vig = np.zeros((h, w), np.float32)
        u_soil = st.soil.copy()

        def charred_soil(m: np.ndarray, since: np.ndarray, burnt: np.ndarray) -> np.ndarray:
            # Char darkens the ground; rain and weeds wash it back over ~half a year.
            recov = 1 - np.exp(-np.maximum(since, 0) / 0.35)
            dark = 0.22 + (st.soil[m] - 0.22) * recov
            return np.where(burnt, dark, np.minimum(st.soil[m] + 0.15, 1.2))

        # Selective logging: canopy thinned, recovering over a few years.
        m = (kind == E["logging"]) & after
        if m.any():
            dmg = 0.25 + 0.3 * p[0][m]
            tau = 1.5 + 1.5 * p[1][m]
            lai[m] = lai_f[m] * (1 - dmg * np.exp(-dt[m] / tau))
            soil[m] = 0.6

        # Fire then forest regrowth (pioneers, fast): NOT a conversion.
        m = (kind == E["fire_regrowth"]) & after
        if m.any():
            d = dt[m]
            tau = 1.0 + 1.5 * p[1][m]
            lag = 0.15 + 0.25 * p[2][m]
            grow = np.clip(1 - np.exp(-np.maximum(d - lag, 0) / tau), 0, 1)
            lai[m] = 0.3 + (lai_f[m] - 0.3) * grow
            vig[m] = np.where(d < lag, 0.1, np.clip(vig_f[m] + 0.05, 0, 1))
            soil[m] = charred_soil(m, d, np.ones(d.shape, bool))

        # Conversion (estate blocks and holdings): clearing → bare or charred
        # ground → planted tree crop whose cover closes over several years.
        m = np.isin(kind, (E["estate_conversion"], E["holding_conversion"])) & after
        if m.any():
            d = dt[m]
            burnt = p[0][m] < self.cfg.burn_share
            lag = 0.3 + 0.7 * p[1][m]  # planting delay, years
            half = 2.5 + 1.5 * p[2][m]  # time to half cover after planting
            width = 0.5 + 0.4 * p[3][m]
            fmax = 0.86 + 0.1 * p[4][m]
            tp = d - lag
            cover = fmax / (1 + np.exp(-(tp - half) / width))
            cover = np.where(tp > 0, cover, 0.0)
            canopy[m] = 1
            lai[m] = 3.4 + 1.2 * p[5][m] + 0.15 * season
            vig[m] = np.clip(0.78 + 0.05 * season, 0, 1)
            fc[m] = cover
            # Ground between young palms: weeds or a cover crop greening up.
            u_lai[m] = np.clip(1.6 * (1 - np.exp(-np.maximum(d, 0) / 0.5)) * (1 + 0.2 * season), 0, 3)
            u_vig[m] = np.clip(0.55 + 0.2 * season, 0, 1)
            u_soil[m] = charred_soil(m, d, burnt)

        # Old plantation: closed tree-crop cover all along.
        m = kind == E["old_plantation"]
        if m.any():
            canopy[m] = 1
            lai[m] = 3.6 + 1.0 * p[5][m] + 0.15 * season
            vig[m] = np.clip(0.78 + 0.05 * season, 0, 1)
            fc[m] = 0.88 + 0.08 * p[4][m]
            u_lai[m] = 1.5
            u_vig[m] = 0.6

        # Herbaceous land: seasonal crops, grassland, pasture, roads.
        herb = np.zeros((h, w), bool)
        m = (kind == E["cropland"]) | ((kind == E["cleared_for_crops"]) & after)
        if m.any():
            herb |= m
            d = np.where(kind[m] == E["cropland"], 99.0, dt[m])
            cycles = np.where(p[2][m] < 0.5, 1.0, 2.0)
            phase = (frac * cycles + p[3][m]) % 1.0
            crop_lai = (0.3 + 3.2 * np.sin(np.pi * phase) ** 2) * (p[4][m] < 0.6)
            pasture = p[4][m] >= 0.6
            past_lai = 1.6 + 0.8 * season
            lai[m] = np.where(pasture, past_lai, crop_lai)
            vig[m] = np.where(pasture, 0.45 + 0.3 * season, 0.35 + 0.55 * np.sin(np.pi * phase))
            ground = np.where(d < 0.4, charred_soil(m, d, p[0][m] < 0.5), st.soil[m] + 0.1)
            lai[m] = np.where(d < 0.4, 0.2, lai[m])
            soil[m] = ground
        m = kind == E["grassland"]
        if m.any():
            herb |= m
            lai[m] = 1.3 + 0.6 * p[0][m] + 0.7 * season
            vig[m] = np.clip(0.5 + 0.35 * season, 0, 1)
        m = (kind == E["road"]) & after
        if m.any():
            herb |= m
            lai[m] = 0.3
            vig[m] = 0.5
            soil[m] = 1.05
        canopy[herb] = 2

        refl = self.table.lookup(canopy, lai, vig, soil)  # (h, w, 6)
        mixed = fc > 0
        if mixed.any():
            under = self.table.lookup(2, u_lai[mixed], u_vig[mixed], u_soil[mixed])
            refl[mixed] = fc[mixed, None] * refl[mixed] + (1 - fc[mixed, None]) * under
        # Cleared parcels before the canopy lookup is meaningful (fc = 0):
        # the ground alone.
        cleared = np.isin(kind, (E["estate_conversion"], E["holding_conversion"])) & after & ~mixed
        if cleared.any():
            refl[cleared] = self.table.lookup(2, u_lai[cleared], u_vig[cleared], u_soil[cleared])
        refl[kind == E["water"]] = WATER
        return np.moveaxis(refl, -1, 0).astype(np.float32)

    # -- observation ----------------------------------------------------------
    def observe(self, surface: np.ndarray, r0: int, c0: int, k: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """Turn surface reflectance of a window into stored integers and QA.

        Returns:
            (dn, qa): int16 (6, h, w) stored values and uint8 (h, w) QA bits.
        """
        cfg = self.cfg
        _, h, w = surface.shape
        # Shadows fall a fixed offset from their clouds (sun to the south-east).
        sh_dr, sh_dc = 5, -7
        cfield = self._cloud_field(r0, c0, h, w, k)
        cshift = self._cloud_field(r0 - sh_dr, c0 - sh_dc, h, w, k)
        thr = self._cloud_thr[k]
        cloud = cfield > thr
        shadow = (cshift > thr) & ~cloud
        # Thin cloud edges the QA misses: a rim just below the threshold.
        thin = np.clip((cfield - (thr - 0.35)) / 0.35, 0, 1) * ~cloud
        haze = cfg.haze_max * (0.5 + 0.5 * np.cos(2 * np.pi * (self.t[k] % 1.0 - 0.05))) * np.clip(0.5 + 0.4 * self._haze.sample(r0, c0, h, w, k), 0, 1)
        a = np.clip(haze + 0.45 * thin, 0, 1)[None]
        obs = surface * (1 - a) + a * HAZE[:, None, None]
        obs = np.where(shadow[None], 0.35 * obs + 0.01, obs)
        opacity = np.clip(0.7 + (cfield - thr) / 1.0, 0.7, 1.0)[None]
        obs = np.where(cloud[None], opacity * CLOUD[:, None, None] + (1 - opacity) * obs, obs)
        if self.t[k] >= self._sensor_from:
            obs = obs * np.asarray(cfg.sensor_gain, np.float32)[:, None, None] + np.asarray(cfg.sensor_offset, np.float32)[:, None, None]
        sigma = np.asarray(cfg.noise_sigma, np.float32)[:, None, None] + cfg.noise_relative * np.abs(obs)
        obs = obs + sigma * rng.standard_normal(obs.shape, dtype=np.float32)
        dn = np.rint(obs * 10000.0)
        if self.dates[k] >= self._proc_from:
            dn = dn + cfg.processing_offset_dn
        dn = np.clip(dn, -2000, 32000).astype(np.int16)
        fill = cloud & (cfield > thr + _fill_margin(cfg.fill_share_of_cloud))
        qa = (cloud * QA_CLOUD | shadow * QA_SHADOW | fill * QA_FILL).astype(np.uint8)
        dn[:, fill] = cfg.nodata
        return dn, qa

    def _cloud_field(self, r0: int, c0: int, h: int, w: int, k: int) -> np.ndarray:
        return 0.85 * self._cloud_coarse.sample(r0, c0, h, w, k) + 0.53 * self._cloud_fine.sample(r0, c0, h, w, k)

    # -- windows --------------------------------------------------------------
    def window(self, r0: int, c0: int, h: int, w: int, k: int, rng: np.random.Generator, st: StaticFields | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Stored values and QA for one window and date (see :meth:`observe`).

        The point-spread function needs a halo; the static fields are built
        for the window plus halo when not given.
        """
        halo = self.halo()
        if st is None:
            st = self.static(r0 - halo, c0 - halo, h + 2 * halo, w + 2 * halo)
        surf = self.surface(st, k)
        if halo:
            surf = gaussian_filter(surf, sigma=(0, self.cfg.psf_sigma_px, self.cfg.psf_sigma_px), mode="nearest")
            surf = surf[:, halo:-halo, halo:-halo]
        return self.observe(surf, r0, c0, k, rng)

    def halo(self) -> int:
        """Pixels of context the point-spread function needs around a window."""
        return int(np.ceil(3 * self.cfg.psf_sigma_px)) if self.cfg.psf_sigma_px > 0 else 0

    def truth(self, r0: int, c0: int, h: int, w: int) -> np.ndarray:
        """Truth bands of a window: (5, h, w) int32 — class, onset_year, event, event_year, parcel."""
        L = self.landscape
        pid = L.parcel_ids(r0, c0, h, w)
        kind = L.kind[pid]
        yr = L.year[pid]
        class_of_code = np.zeros(max(EVENTS.values()) + 1, np.int32)
        for k, code in EVENTS.items():
            class_of_code[code] = LABEL_CODES[_CLASS_OF_EVENT[k]]
        cls = class_of_code[kind]
        onset = np.where(cls == LABEL_CODES["conversion"], yr, 0)
        return np.stack([cls, onset, kind, yr, pid]).astype(np.int32)


def _fill_margin(share: float) -> float:
    """Field excess over the cloud threshold beyond which a cloud is a data gap."""
    return float(np.interp(share, [0.0, 0.3, 1.0], [3.0, 0.6, 0.0]))


# --------------------------------------------------------------------------- #
# Writing
# --------------------------------------------------------------------------- #


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
            with rasterio.open(tmp / ti_name / "truth.tif", "w", **{**_profile(cfg, ti, tj, 5, "int32", None), "nodata": None}) as tdst:
                for b, name in enumerate(("class", "onset_year", "event", "event_year", "parcel"), 1):
                    tdst.set_band_description(b, name)
                for wr in range(0, cfg.tile_size, cfg.block):
                    for wc in range(0, cfg.tile_size, cfg.block):
                        h = min(cfg.block, cfg.tile_size - wr)
                        w = min(cfg.block, cfg.tile_size - wc)
                        r0, c0 = ti * cfg.tile_size + wr, tj * cfg.tile_size + wc
                        win = Window(wc, wr, w, h)
                        tdst.write(sim.truth(r0, c0, h, w), window=win)
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
            _, _, event, event_year, parcel = src.read()
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
