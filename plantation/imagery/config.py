"""The region config's schema: where a region's imagery and labels are and how to read them.

Hydra validates every file in ``configs/region/`` (and a user's own region
files) against :class:`RegionConfig`, so a misspelt key is an error rather
than a silent default.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from omegaconf import MISSING


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
    ``invalid_bits`` (0 = least significant) is set.
    """

    band: int | None = None
    variable: str | None = None
    invalid_bits: list[int] = field(default_factory=lambda: [0, 1, 2])


@dataclass
class TileConfig:
    """One tile of a region: a folder of dated GeoTIFFs or one NetCDF/Zarr cube."""

    name: str = MISSING
    path: str = MISSING
    #: Optional truth rasters (simulated regions only), used by benchmarks.
    truth: str | None = None


@dataclass
class LabelsConfig:
    """Reference points labelled by interpreters."""

    path: str | None = None
    #: CRS of the ``x``/``y`` columns of a CSV file (vector files carry their own).
    crs: str | None = "EPSG:4326"


@dataclass
class RegionConfig:
    """Everything the tool needs to know about one region's imagery."""

    name: str = MISSING
    #: ``geotiff_folder`` (one GeoTIFF per date, date in the file name) or ``cube``.
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
