"""The region config's schema: where a region's imagery and labels are and how to read them.

Hydra validates every file in ``configs/region/`` (and a user's own region
files) against :class:`RegionConfig`, so a misspelt key is an error rather
than a silent default.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

from omegaconf import MISSING

from plantation.errors import ConfigError

#: The four label groups a region's area is shared among (the labels' names, in code order).
LABEL_GROUPS: tuple[str, ...] = ("stable_forest", "conversion", "old_plantation", "other")


@dataclass
class ScalingRule:
    """Reflectance = stored value × scale + offset, for dates from ``start`` on.

    ``start`` is an ISO date (YYYY-MM-DD) or None for "from the first date".
    Several rules describe processing changes, e.g. a fixed −0.1 offset added
    by a new processing baseline from a given day.
    """

    start: str | None = None
    scale: float = 1.0
    offset: float = 0.0


@dataclass
class MaskConfig:
    """Where the quality (QA) information of each date lives.

    For a GeoTIFF folder, ``band`` is the 1-based band number of the QA band
    inside every file (after the reflectance bands). For a cube, ``variable``
    names a (time, y, x) integer variable. A pixel is invalid when any bit in
    ``invalid_bits`` (0 = least significant) is set, or when its QA value is
    one of ``invalid_values``: the second is for QA layers whose values are
    classes rather than bit flags (a scene classification, where cloud is
    the value 9, not bit 9).
    """

    band: int | None = None
    variable: str | None = None
    #: For ``format: stac``: the asset key of the QA layer (None: an asset
    #: called qa, qa_pixel, scl, fmask or cloud_mask, if any). Product
    #: folders use their product's own QA layer and published rule instead.
    asset: str | None = None
    invalid_bits: list[int] = field(default_factory=lambda: [0, 1, 2])
    invalid_values: list[int] = field(default_factory=list)

    def content_key(self) -> dict[str, Any]:
        """The rules as they decide which pixels are read (for a map's content key): ``invalid_values`` and ``asset`` only when given, so maps made before they existed keep their key."""
        out = asdict(self)
        for key in ("invalid_values", "asset"):
            if not out[key]:
                del out[key]
        return out


@dataclass
class GridConfig:
    """A tile's grid, for imagery that is reprojected onto it (product folders, STAC).

    All None: the grid of the first scene's first band role.
    """

    #: CRS of the grid (``EPSG:32650``, a WKT or PROJ string).
    crs: str | None = None
    #: [left, bottom, right, top] in the grid's CRS units.
    bounds: list[float] | None = None
    #: Pixel size in the grid's CRS units (square pixels).
    resolution: float | None = None


@dataclass
class TileConfig:
    """One tile of a region: a folder of dated GeoTIFFs, one NetCDF/Zarr cube, a folder of product scene folders, or a STAC file."""

    name: str = MISSING
    path: str = MISSING
    #: Optional truth rasters (simulated regions only), used by benchmarks.
    truth: str | None = None
    #: The grid scenes are reprojected onto (``format: products`` or ``stac``).
    grid: GridConfig = field(default_factory=GridConfig)


@dataclass
class SensorRule:
    """The sensor of a GeoTIFF folder's files (or a cube's dates) whose file name matches ``pattern``.

    Product folders and STAC items name each scene's sensor themselves and
    take no rule.
    """

    #: A glob on the file name (``LE07_*``, ``*_S2*``); ``*``: every file.
    pattern: str = "*"
    #: The sensor's name: ``landsat_oli`` (Landsat 8 and 9), ``landsat_etm``
    #: (Landsat 7), ``sentinel2_msi`` (Sentinel-2A/B/C), the short names
    #: ``oli``, ``etm``, ``msi``, or any other name (not harmonised).
    sensor: str = MISSING


@dataclass
class HarmoniseConfig:
    """Whether each date's reflectance is adjusted to a reference sensor with published coefficients (:mod:`plantation.imagery.harmonise`)."""

    #: False: every date as stored (the default, and the reading before this existed).
    enabled: bool = False
    #: The sensor every date is brought to; only ``oli`` has published tables towards it.
    reference: str = "oli"


@dataclass
class PopulationShares:
    """Share of the region's area in each label group, where known from elsewhere (a published statistic, an earlier assessment).

    All four None (the default) = unknown; otherwise all four are given and
    sum to 1. A typed node rather than a free mapping, so a misspelt group is
    an unknown-key error and ``population_shares.conversion=0.1`` works on
    the command line.
    """

    stable_forest: float | None = None
    conversion: float | None = None
    old_plantation: float | None = None
    other: float | None = None


@dataclass
class LabelsConfig:
    """Reference points labelled by interpreters, and how they were drawn where the user knows."""

    path: str | None = None
    #: CRS of the ``x``/``y`` columns of a CSV file (vector files carry their own).
    crs: str | None = "EPSG:4326"
    #: Share of the region's area per label group; used by ``calibration.prior=shares``.
    population_shares: PopulationShares = field(default_factory=PopulationShares)
    #: Column (attribute) of the labels file holding each point's inclusion
    #: probability π in (0, 1] under the sampling design; None = not recorded.
    #: Used by ``calibration.prior=inclusion``.
    inclusion_column: str | None = None


def population_shares(cfg: LabelsConfig) -> dict[str, float] | None:
    """The labels config's shares as group → share, or None when unknown (not given, or every group None).

    Raises:
        ConfigError: an unknown or missing group, a negative or non-finite
            share, or shares not summing to 1 (within 1e-6).
    """
    raw: Any = cfg.population_shares
    if raw is None:
        return None
    # A plain mapping group → share (from a library caller) is read like the typed node.
    given = {str(k): v for k, v in (asdict(raw) if isinstance(raw, PopulationShares) else dict(raw)).items() if v is not None}
    if not given:
        return None
    unknown = sorted(set(given) - set(LABEL_GROUPS))
    missing = [g for g in LABEL_GROUPS if g not in given]
    if unknown or missing:
        what = "; ".join(t for t in (f"unknown group(s) {unknown!r}" if unknown else "", f"missing {missing!r}" if missing else "") if t)
        raise ConfigError(f"region.labels.population_shares: {what}; give a share for each of {list(LABEL_GROUPS)}, or none")
    try:
        shares = {g: float(given[g]) for g in LABEL_GROUPS}
    except (TypeError, ValueError):
        raise ConfigError(f"region.labels.population_shares: {given!r} must be numbers") from None
    bad = {g: v for g, v in shares.items() if not (math.isfinite(v) and 0.0 <= v <= 1.0)}
    if bad:
        raise ConfigError(f"region.labels.population_shares: {bad!r} must be shares in [0, 1]")
    total = sum(shares.values())
    if abs(total - 1.0) > 1e-6:
        raise ConfigError(f"region.labels.population_shares: {shares!r} sum to {total:.6g}, not 1; give each group's share of the region's area")
    return shares


def check_labels_config(cfg: LabelsConfig) -> None:
    """Refuse bad population shares (see :func:`population_shares`) or an empty inclusion column name, naming the key."""
    if cfg.inclusion_column is not None and not str(cfg.inclusion_column).strip():
        raise ConfigError("region.labels.inclusion_column: an empty name; give the labels file's column of inclusion probabilities, or null")
    population_shares(cfg)


@dataclass
class RegionConfig:
    """Everything the tool needs to know about one region's imagery."""

    name: str = MISSING
    #: ``geotiff_folder`` (one GeoTIFF per date, date in the file name),
    #: ``cube``, ``products`` (Landsat C2 L2 / Sentinel-2 L2A scene folders)
    #: or ``stac`` (an ItemCollection or static catalogue).
    format: str = "geotiff_folder"
    tiles: list[TileConfig] = field(default_factory=list)
    #: Band roles in file order; indices need blue, red, nir, swir1, swir2.
    bands: list[str] = field(default_factory=lambda: ["blue", "green", "red", "nir", "swir1", "swir2"])
    #: Stored value meaning "no data"; None = take it from each file.
    nodata: float | None = None
    mask: MaskConfig = field(default_factory=MaskConfig)
    scaling: list[ScalingRule] = field(default_factory=lambda: [ScalingRule()])
    #: Name of the reflectance variable in a cube.
    cube_variable: str = "reflectance"
    labels: LabelsConfig = field(default_factory=LabelsConfig)
    #: Spatial chunk (pixels) for lazy reading: bounds memory per task.
    chunk: int = 512
    #: Last acquisition date read (ISO ``YYYY-MM-DD``); later dates are left
    #: out as if not delivered yet. None: every date.
    end_date: str | None = None
    #: The sensor of each date of a GeoTIFF folder or cube: rules tried in
    #: order on each file's name, the first match wins (a cube's ``sensor``
    #: coordinate along time, when it has one, wins over them). Empty: one
    #: unnamed sensor. Product folders and STAC name their scenes' sensors.
    sensors: list[SensorRule] = field(default_factory=list)
    #: Adjust each date to a reference sensor (``{enabled: true, reference: oli}``).
    harmonise: HarmoniseConfig = field(default_factory=HarmoniseConfig)
