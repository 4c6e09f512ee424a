"""A simulated region's scenario: its settings (:class:`SimulationConfig`), band roles, event codes and dates.

The landscape, trajectories, spectra and observation are built by
:mod:`plantation.simulation.landscape`; :mod:`plantation.simulation.writer`
writes the region to disk.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import date, timedelta

from plantation.errors import ConfigError
from plantation.reference.labels import LABEL_NAMES

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
    "escaped_fire": 11,
}

#: Codes of the truth raster's ``fire`` band (:meth:`plantation.simulation.landscape.Simulator.fire_truth`).
FIRE_TRUTH: dict[str, int] = {
    "none": 0,
    # A conversion clearing done by fire (charred ground first).
    "clearing_burnt": 1,
    # A conversion clearing done by machines (bare soil, no char).
    "clearing_not_burnt": 2,
    # Forest next to a burnt clearing that burnt in the same season and regrew (not converted).
    "escaped_fire": 3,
    # Forest fire with regrowth not started by a clearing.
    "forest_fire": 4,
    # Forest cleared for crops or pasture by fire (not a conversion).
    "other_clearing_burnt": 5,
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
    "escaped_fire": "stable_forest",
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
    # Escaped fire, drawn from its own random stream: 0 leaves every other draw and the imagery as they were.
    escaped_fire_share: float = 0.0
    escaped_fire_ha: list[float] = field(default_factory=lambda: [1.0, 6.0])
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
    if not 0 <= cfg.escaped_fire_share <= 1:
        raise ConfigError(f"sim.escaped_fire_share must be in [0, 1], got {cfg.escaped_fire_share}")
    if len(cfg.escaped_fire_ha) != 2 or not 0 < cfg.escaped_fire_ha[0] <= cfg.escaped_fire_ha[1]:
        raise ConfigError(f"sim.escaped_fire_ha needs [min, max] hectares with 0 < min <= max, got {list(cfg.escaped_fire_ha)}")
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
