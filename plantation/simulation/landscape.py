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
   drivers of :mod:`plantation.simulation.spectra` (LAI, vigour, soil brightness,
   tree-crop cover fraction) with seasonality and year-to-year anomalies.
3. **Spectra**: PROSAIL band reflectance, mixed at class edges by the sensor's
   point-spread function.
4. **Observation**: spatially coherent clouds (wet-season frequency from the
   config), shadows, thin unflagged cloud edges, haze, sensor noise, one
   sensor change (band-wise gain and offset) and one processing change (a
   fixed offset in the stored integers, to be removed by the region's
   scaling rules).

Outputs (:func:`plantation.simulation.writer.write_region`): per tile, ``imagery/YYYY-MM-DD.tif`` (int16,
bands blue…swir2 as reflectance × 10000, then a QA band: bit 0 cloud, bit 1
shadow, bit 2 fill), ``truth.tif`` (int32 bands: class, onset_year, event,
event_year, parcel, fire — see
:data:`plantation.simulation.scenario.FIRE_TRUTH`), plus region-wide ``labels.csv`` (a stratified reference
sample with interpreter errors) and ``labels_truth.csv``.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
import shapely
from affine import Affine
from rasterio.features import rasterize
from scipy.ndimage import gaussian_filter

from plantation.reference.labels import LABEL_CODES
from plantation.simulation.scenario import _CLASS_OF_EVENT, EVENTS, FIRE_TRUTH, QA_CLOUD, QA_FILL, QA_SHADOW, SimulationConfig, check_config, dates_of, decimal_year
from plantation.simulation.spectra import CLOUD, HAZE, WATER, SpectralTable, default_table


def _fill_margin(share: float) -> float:
    """Field excess over the cloud threshold beyond which a cloud is a data gap."""
    return float(np.interp(share, [0.0, 0.3, 1.0], [3.0, 0.6, 0.0]))


# --------------------------------------------------------------------------- #
# Writing
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
    #: Parcels 1..n_main are drawn over each other in order; later ones (escaped fires) only over forest background.
    n_main: int = -1
    tree: shapely.STRtree = field(init=False)

    def __post_init__(self) -> None:
        self.tree = shapely.STRtree(self.geoms)
        if self.n_main < 0:
            self.n_main = len(self.geoms)

    def parcel_ids(self, r0: int, c0: int, h: int, w: int) -> np.ndarray:
        """Parcel id (1-based, 0 = forest background) of each pixel of a window."""
        box = shapely.box(c0, r0, c0 + w, r0 + h)
        hits = np.sort(self.tree.query(box, predicate="intersects"))
        if hits.size == 0:
            return np.zeros((h, w), dtype=np.int32)
        transform = Affine.translation(c0, r0)
        main, over_forest = hits[hits < self.n_main], hits[hits >= self.n_main]
        pid = np.zeros((h, w), dtype=np.int32)
        if main.size:
            pid = rasterize(((self.geoms[i], int(i) + 1) for i in main), out_shape=(h, w), transform=transform, fill=0, dtype="int32")
        if over_forest.size:
            # An escaped fire burns forest only: roads, rivers and other parcels stop it.
            fire = rasterize(((self.geoms[i], int(i) + 1) for i in over_forest), out_shape=(h, w), transform=transform, fill=0, dtype="int32")
            pid = np.where(pid == 0, fire, pid)
        return pid


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

    n_main = len(geoms)
    # Fire escaping a burnt clearing into the forest beside it, drawn from its
    # own stream so that every draw above (and so the imagery of a region
    # without escaped fires) stays as it was.
    erng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 6]))
    conversion = (EVENTS["estate_conversion"], EVENTS["holding_conversion"])
    for i in range(n_main) if cfg.escaped_fire_share > 0 else ():
        if kind[i] not in conversion or params[i][0] >= cfg.burn_share or erng.uniform() >= cfg.escaped_fire_share:
            continue
        g = geoms[i]
        at = g.boundary.interpolate(erng.uniform(0, 1), normalized=True)
        r = np.sqrt(erng.uniform(*cfg.escaped_fire_ha) / px_ha / np.pi)
        blob = _irregular(erng, at.x, at.y, r, 9).difference(g)
        # The same dry season as the clearing fire.
        t = min(t_ev[i] + erng.uniform(0.0, 0.1), cfg.last_year + 0.999)
        if blob.is_empty:
            continue
        geoms.append(blob)
        kind.append(EVENTS["escaped_fire"])
        year.append(int(np.floor(t)))
        t_ev.append(float(t))
        params.append(erng.uniform(0.0, 1.0, 6))

    return Landscape(
        height=H,
        width=W,
        geoms=geoms,
        kind=np.array([0, *kind], dtype=np.int32),
        year=np.array([0, *year], dtype=np.int32),
        t_event=np.array([0.0, *t_ev]),
        params=np.vstack([np.full(6, 0.5), *params]) if params else np.full((1, 6), 0.5),
        n_main=n_main,
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
        m = np.isin(kind, (E["fire_regrowth"], E["escaped_fire"])) & after
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

    def fire_truth(self, r0: int, c0: int, h: int, w: int) -> np.ndarray:
        """The ``fire`` truth band of a window: (h, w) int32 codes of :data:`plantation.simulation.scenario.FIRE_TRUTH`.

        Whether a conversion clearing burnt is the parcel's first trajectory
        parameter below ``burn_share``, exactly as :meth:`surface` chars its
        ground; forest cleared for crops burns below 0.5, as there. The fire's
        year is the truth's ``event_year`` band.
        """
        L = self.landscape
        pid = L.parcel_ids(r0, c0, h, w)
        kind = L.kind[pid]
        p0 = L.params[pid, 0]
        E, F = EVENTS, FIRE_TRUTH
        out = np.zeros((h, w), np.int32)
        conv = np.isin(kind, (E["estate_conversion"], E["holding_conversion"]))
        out[conv] = np.where(p0[conv] < self.cfg.burn_share, F["clearing_burnt"], F["clearing_not_burnt"])
        out[kind == E["escaped_fire"]] = F["escaped_fire"]
        out[kind == E["fire_regrowth"]] = F["forest_fire"]
        out[(kind == E["cleared_for_crops"]) & (p0 < 0.5)] = F["other_clearing_burnt"]
        return out
