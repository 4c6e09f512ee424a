"""Start a region file from the files themselves: the logic behind ``plantation new-region``.

:func:`inspect` reads the headers of a region's imagery (GeoTIFF folders or
NetCDF/Zarr cubes) and, if given, its labels, infers a
:class:`~plantation.imagery.config.RegionConfig`, then opens the result with
the reader's own functions (:func:`~plantation.imagery.region.open_region`
and :func:`~plantation.reference.labels.read_labels`), so a file that the
survey, train or map jobs would refuse is refused here, with the same
message. :func:`render` turns what was found into a commented YAML region
file; :func:`write` does both and writes the file atomically.

Layouts understood for the imagery folder:

* one tile: dated GeoTIFFs directly in the folder (or in its ``imagery/``
  sub-folder); the tile is named after the folder;
* a region: one sub-folder per tile, each holding dated GeoTIFFs directly or
  in an ``imagery/`` sub-folder (a ``truth.tif`` beside ``imagery/`` is kept
  as the tile's truth raster, as in simulated regions);
* cubes: NetCDF (``.nc``) files or Zarr (``.zarr``) stores, one per tile,
  named after the file stem; the folder may also be one cube itself;
* delivered products: Landsat Collection 2 Level-2 scene folders and
  Sentinel-2 Level-2A product folders, recognised by their published names
  (:func:`plantation.imagery.products.is_scene_folder`), directly in the
  folder (one tile named after it) or in one sub-folder per tile; the region
  file reads them with ``format: products``, each product's own scaling and
  QA rule, and harmonises the dates when the scenes come from several sensors.

Nothing but headers (and, for float GeoTIFFs, one decimated read of the
first file to sanity-check the value range) is read.
"""

from __future__ import annotations

import json
import os
import re
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from affine import Affine
from omegaconf import OmegaConf
from rasterio.crs import CRS

from plantation.errors import ConfigError, InputNotFoundError, LabelError, PlantationError, RegionError
from plantation.imagery import products
from plantation.imagery.config import HarmoniseConfig, LabelsConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import RASTER_SUFFIXES, open_region, parse_date_from_name
from plantation.reference.labels import read_labels, read_table

#: The common six-band reflectance layout (Landsat 4–9 and Sentinel-2 subsets alike), in file order.
DEFAULT_BANDS: tuple[str, ...] = ("blue", "green", "red", "nir", "swir1", "swir2")
#: Roles the spectral indices need (see :mod:`plantation.imagery.indices`).
REQUIRED_ROLES: tuple[str, ...] = ("blue", "red", "nir", "swir1", "swir2")
#: Marks a comment line the user must act on before training.
CHECK = "CHECK:"

_CUBE_SUFFIXES = (".nc", ".zarr")
_IMAGERY_SUBFOLDER = "imagery"
_TRUTH_FILE = "truth.tif"
#: Band descriptions (lower case, spaces and dashes as underscores) that name a role under another spelling.
_ROLE_ALIASES = {
    "nir08": "nir",
    "nir_08": "nir",
    "narrow_nir": "nir",
    "nir_narrow": "nir",
    "near_infrared": "nir",
    "swir_1": "swir1",
    "swir16": "swir1",
    "swir_16": "swir1",
    "swir_2": "swir2",
    "swir22": "swir2",
    "swir_22": "swir2",
}
_QA_NAMES = {"qa", "qa_pixel", "pixel_qa", "fmask", "cfmask", "cloud_mask", "quality", "mask", "state_qa"}
_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]*")
#: Strings safe as plain YAML scalars in block context (a colon inside is fine there, not in a flow mapping).
_PLAIN = re.compile(r"[A-Za-z_./][A-Za-z0-9_./:-]*")
_YAML_WORDS = {"null", "true", "false", "yes", "no", "on", "off", "y", "n", ".nan", ".inf", "~"}
_WIDTH = 100
#: Keys of :attr:`Starter.notes` in the order :func:`render` writes them.
_KEY_ORDER = ("tiles", "cube_variable", "bands", "nodata", "mask.band", "mask.variable", "scaling", "harmonise", "labels.path", "labels.crs")


class RegionFileExistsError(PlantationError, FileExistsError):
    """The region file to write exists already and overwriting was not asked for."""


@dataclass
class TileFacts:
    """What the headers of one tile say.

    Attributes:
        name: tile name (sub-folder name, or the cube's file stem).
        path: absolute path of the tile's GeoTIFF folder, cube, or folder of scene folders.
        format: ``geotiff_folder``, ``cube`` or ``products``.
        files: the GeoTIFFs in date order, or the scene folders in acquisition order (empty for a cube).
        dates: acquisition dates, ascending (from the file names, or the cube's time axis; for
            product folders, the reader's dates: one per solar day).
        count: bands per file (reflectance + QA) or the cube's band-axis length.
        dtype: stored data type of the reflectance (a cube's encoded type, before CF decoding).
        nodata: the files' nodata tag (a cube's ``_FillValue``), None when absent.
        crs: the tile's CRS.
        transform: affine transform, pixel corner → CRS units.
        height: rows.
        width: columns.
        descriptions: band descriptions (GeoTIFF) or band coordinate labels (cube); None where absent.
        truth: absolute path of a ``truth.tif`` beside the ``imagery/`` folder, if any.
        cube_variable: the cube's (time, band, y, x) variable.
        qa_variable: the cube's integer (time, y, x) QA variable, if any.
        decoded_scale: True when the cube carries CF ``scale_factor``/``add_offset`` (applied on reading).
        candidates: other (time, band, y, x) variables of the cube, for messages.
        sensors: product folders: scenes per sensor (``landsat_oli``, ``landsat_etm``, ``sentinel2_msi``).
        grids: product folders: how many distinct grids the scenes' first bands come on.
    """

    name: str
    path: Path
    format: str
    files: list[Path]
    dates: list[date]
    count: int
    dtype: str
    nodata: float | None
    crs: CRS
    transform: Affine
    height: int
    width: int
    descriptions: list[str | None]
    truth: Path | None = None
    cube_variable: str | None = None
    qa_variable: str | None = None
    decoded_scale: bool = False
    candidates: list[str] = field(default_factory=list)
    sensors: dict[str, int] = field(default_factory=dict)
    grids: int = 1

    def pixel_size(self) -> str:
        """Pixel width x height with the CRS's unit, e.g. ``30 x 30 m``."""
        unit = "°" if self.crs.is_geographic else _unit(self.crs)
        return f"{abs(self.transform.a):g} x {abs(self.transform.e):g} {unit}".rstrip()


@dataclass
class Starter:
    """A region config inferred from the files, with what was found and what needs checking.

    Attributes:
        region: the inferred config; every path in it is absolute (:func:`render`
            writes them relative to the region file's folder).
        imagery: the imagery folder or cube inspected (absolute).
        labels: the labels file inspected (absolute), or None.
        tiles: what each tile's headers say.
        notes: config key (``bands``, ``nodata``, ``mask.band``, ``scaling``,
            ``labels.crs``, ...) → comment lines on what was found there. Lines
            starting with ``CHECK:`` need the user before training.
        label_counts: points per label after the reader's checks, or None.
        inspected_at: when the files were read (UTC).
    """

    region: RegionConfig
    imagery: Path
    labels: Path | None
    tiles: list[TileFacts]
    notes: dict[str, list[str]]
    label_counts: dict[str, int] | None
    inspected_at: datetime

    @property
    def checks(self) -> list[str]:
        """Every ``CHECK:`` line, in the order of the keys in the written file."""
        keys = sorted(self.notes, key=lambda k: _KEY_ORDER.index(k) if k in _KEY_ORDER else len(_KEY_ORDER))
        return [line for k in keys for line in self.notes[k] if line.startswith(CHECK)]


# --------------------------------------------------------------------------- inspection


def inspect(name: str, imagery: str | Path, labels: str | Path | None = None) -> Starter:
    """Infer a region config from a region's files and check it with the reader.

    Args:
        name: the region's name (letters, digits, ``_``, ``.``, ``-``).
        imagery: a tile folder of dated GeoTIFFs, a region folder of tile
            folders, a folder of NetCDF/Zarr cubes, or one cube (see the
            module docstring).
        labels: a CSV (x, y, label, onset_year), GeoPackage or GeoJSON of
            labelled points, or None.

    Returns:
        A :class:`Starter` whose ``region`` the reader opens as it is.

    Raises:
        ConfigError: ``name`` is empty or holds characters other than the above.
        InputNotFoundError: the imagery or labels path does not exist (the
            message holds the absolute path tried).
        RegionError: no GeoTIFF or cube found; a file name without a date;
            files or tiles that disagree on bands, data type, nodata, CRS,
            grid or dates; a file the reader refuses.
        LabelError: the labels miss a column, lie outside every tile, or fail
            any other check of the labels reader.
    """
    if not _NAME.fullmatch(name or ""):
        raise ConfigError(f"{name!r}: not a usable region name; use letters, digits, '_', '.' or '-' (it names output folders)")
    root = Path(imagery).expanduser().absolute()
    if not root.exists():
        raise InputNotFoundError(f"{root}: imagery folder does not exist; check the --imagery path")
    labels_path = None if labels is None else Path(labels).expanduser().absolute()
    if labels_path is not None and not labels_path.is_file():
        raise InputNotFoundError(f"{labels_path}: labels file does not exist; check the --labels path")

    notes: dict[str, list[str]] = {}
    found, skipped = _discover(root)
    if skipped:
        notes["tiles"] = [f"Skipped sub-folder(s) without GeoTIFFs or cubes: {', '.join(skipped)}."]
    tiles = [_inspect_cube(n, p) if kind == "cube" else _inspect_products_tile(n, p) if kind == "products" else _inspect_geotiff_tile(n, p, truth) for n, p, kind, truth in found]
    _check_tiles_agree(tiles)

    first = tiles[0]
    harmonise = HarmoniseConfig()
    if first.format == "products":
        bands, mask, nodata, scaling = list(DEFAULT_BANDS), MaskConfig(), None, [ScalingRule()]
        notes["bands"], harmonise, notes["harmonise"] = _product_bands_and_sensors(tiles)
        notes["tiles"] = notes.get("tiles", []) + _product_notes(tiles)
    elif first.format == "cube":
        bands, notes["bands"] = _cube_bands(first)
        mask = MaskConfig(band=None, variable=first.qa_variable)
        notes["mask.variable"] = [
            f"Found the integer (time, y, x) variable {first.qa_variable!r}." if first.qa_variable else "No integer (time, y, x) QA variable in the cube: only nodata and NaN mark invalid pixels."
        ]
    else:
        bands, qa_band, notes["bands"], notes["mask.band"] = _infer_bands(first.count, first.dtype, first.descriptions)
        mask = MaskConfig(band=qa_band)
    if first.format != "products":
        nodata, notes["nodata"] = _infer_nodata(tiles)
        scaling, notes["scaling"] = _infer_scaling(first, len(bands))

    region = RegionConfig(
        name=name,
        format=first.format,
        tiles=[TileConfig(name=t.name, path=str(t.path), truth=str(t.truth) if t.truth else None) for t in tiles],
        bands=list(bands),
        nodata=nodata,
        mask=mask,
        scaling=scaling,
        cube_variable=first.cube_variable or "reflectance",
        labels=LabelsConfig(path=None, crs=None),
        harmonise=harmonise,
    )
    if first.format == "cube" and first.candidates:
        notes["cube_variable"] = [f"{CHECK} the cube also holds (time, band, y, x) variable(s) {first.candidates}; {first.cube_variable!r} was picked."]
    # The reader's own checks (grids within a tile, CRS and dates across tiles, band counts): what it refuses, we refuse.
    stacks = open_region(region)
    for st, t in zip(stacks, tiles, strict=True):
        if st.reader is not None:
            st.reader.close()
        if t.format == "products":
            # The reader's dates: one per solar day, same-day scenes mosaicked.
            t.dates = [date.fromisoformat(str(d)) for d in st.dates]

    counts = None
    if labels_path is None:
        region.labels = LabelsConfig(path=None, crs="EPSG:4326")
        notes["labels.path"] = [f"{CHECK} no labels were given; the survey and training need labelled points (CSV x, y, label, onset_year, or GeoPackage/GeoJSON points)."]
    else:
        grids = {s.name: s.grid for s in stacks}
        crs, notes["labels.crs"], kind, columns = _infer_label_crs(labels_path, grids)
        region.labels = LabelsConfig(path=str(labels_path), crs=crs)
        if crs is None:
            notes["labels.path"] = [f"{kind} with columns {', '.join(columns)}; not placed on the imagery (its CRS is unknown)."]
        else:
            label_set = read_labels(labels_path, grids=grids, years=[int(y) for y in stacks[0].years], csv_crs=crs)
            counts = label_set.counts()
            per_tile = label_set.points["tile"].value_counts()
            where = ", ".join(f"{t} {int(per_tile.get(t, 0))}" for t in grids)
            by_label = ", ".join(f"{n} {c}" for n, c in counts.items())
            what = "attributes" if kind.endswith("points") else "columns"
            notes["labels.path"] = [f"{kind} with {what} {', '.join(columns)}: {len(label_set.points)} point(s) on distinct pixels ({by_label}); per tile: {where}."]
    return Starter(region=region, imagery=root, labels=labels_path, tiles=tiles, notes=notes, label_counts=counts, inspected_at=datetime.now(UTC))


def _discover(root: Path) -> tuple[list[tuple[str, Path, str, Path | None]], list[str]]:
    """Tiles under ``root``: (name, path, format, truth) each, and the sub-folders skipped."""
    if _is_cube(root):
        return [(root.stem, root, "cube", None)], []
    if not root.is_dir():
        raise RegionError(f"{root}: neither a folder nor a NetCDF (.nc) / Zarr (.zarr) cube; point --imagery at a folder of dated GeoTIFFs or of tiles")
    if products.is_scene_folder(root):
        raise RegionError(f"{root}: one scene folder; point --imagery at the folder holding the scene folders ({root.parent})")
    if _has_scenes(root):
        return [(root.name, root, "products", None)], []
    here = _tile_in(root)
    if here is not None:
        # A folder named "imagery" belongs to the tile folder above it (the toy layout).
        images, truth = here
        name = root.parent.name if root.name == _IMAGERY_SUBFOLDER else root.name
        if truth is None and root.name == _IMAGERY_SUBFOLDER and (root.parent / _TRUTH_FILE).is_file():
            truth = root.parent / _TRUTH_FILE
        return [(name, images, "geotiff_folder", truth)], []
    entries = sorted(p for p in root.iterdir() if not p.name.startswith("."))
    cubes = [(p.stem, p, "cube", None) for p in entries if _is_cube(p)]
    folders: list[tuple[str, Path, str, Path | None]] = []
    skipped: list[str] = []
    for p in entries:
        if not p.is_dir() or _is_cube(p):
            continue
        if _has_scenes(p):
            folders.append((p.name, p, "products", None))
            continue
        tile = _tile_in(p)
        if tile is None:
            skipped.append(p.name)
        else:
            folders.append((p.name, tile[0], "geotiff_folder", tile[1]))
    if cubes and folders:
        raise RegionError(f"{root}: holds both cubes ({cubes[0][1].name}, ...) and GeoTIFF tile folders ({folders[0][1]}, ...); a region is one format, split them into two folders")
    kinds = {kind for _, _, kind, _ in folders}
    if len(kinds) > 1:
        scenes = next(p for _, p, k, _ in folders if k == "products")
        tifs = next(p for _, p, k, _ in folders if k != "products")
        raise RegionError(f"{root}: holds both folders of product scenes ({scenes.name}) and of GeoTIFFs ({tifs}); a region is one format, split them into two folders")
    found = cubes or folders
    if not found:
        raise RegionError(
            f"{root}: no GeoTIFF (*.tif) or NetCDF/Zarr cube here nor in tile sub-folders (or their imagery/ folders); "
            "point --imagery at a folder of dated GeoTIFFs, a folder of tile folders, or a folder of cubes"
        )
    stems = [n for n, *_ in found]
    for n in stems:
        if stems.count(n) > 1:
            clash = [p.name for m, p, *_ in found if m == n]
            raise RegionError(f"{root}: cubes {clash} would both be tile {n!r}; rename one")
    return found, skipped


def _has_scenes(folder: Path) -> bool:
    """Whether ``folder`` holds Landsat C2 L2 or Sentinel-2 L2A scene folders (the products reader's recogniser)."""
    return any(products.is_scene_folder(p) for p in folder.iterdir())


def _tile_in(folder: Path) -> tuple[Path, Path | None] | None:
    """(GeoTIFF folder, truth raster) of a tile folder, or None when it holds no GeoTIFF.

    An ``imagery/`` sub-folder with GeoTIFFs wins over GeoTIFFs beside it:
    those are then side files such as the truth raster.
    """
    sub = folder / _IMAGERY_SUBFOLDER
    if sub.is_dir() and _tifs(sub):
        truth = folder / _TRUTH_FILE
        return sub, truth if truth.is_file() else None
    if _tifs(folder):
        return folder, None
    return None


def _is_cube(path: Path) -> bool:
    return path.suffix.lower() in _CUBE_SUFFIXES and (path.is_file() or path.suffix.lower() == ".zarr")


def _tifs(folder: Path) -> list[Path]:
    """The GeoTIFFs a tile folder holds, by the reader's own suffix rule."""
    return sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in RASTER_SUFFIXES)


def _date_of(path: Path) -> date:
    """The reader's date rule, with the fix added to its message."""
    try:
        return parse_date_from_name(path)
    except RegionError as exc:
        raise RegionError(f"{exc}; every GeoTIFF of a tile needs its acquisition date YYYY-MM-DD in its name (e.g. scene_2020-08-15.tif), or must move out of the folder") from None


def _inspect_geotiff_tile(name: str, folder: Path, truth: Path | None) -> TileFacts:
    files = _tifs(folder)
    dated = sorted((_date_of(f), f) for f in files)
    ref: dict[str, Any] | None = None
    for _, f in dated:
        try:
            with rasterio.open(f) as src:
                head = {
                    "count": src.count,
                    "dtypes": src.dtypes,
                    "nodata": src.nodata,
                    "crs": src.crs,
                    "transform": src.transform,
                    "shape": (src.height, src.width),
                    "descriptions": list(src.descriptions),
                }
        except rasterio.errors.RasterioIOError as exc:
            raise RegionError(f"{f}: cannot read as a raster ({str(exc).splitlines()[0]}); remove or replace the file") from None
        if head["crs"] is None:
            raise RegionError(f"{f}: the file has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:XXXX)")
        if len(set(head["dtypes"][: max(head["count"] - 1, 1)])) > 1:
            raise RegionError(f"{f}: reflectance bands of different data types {head['dtypes']}; write them as one type")
        if ref is None:
            ref = head
            ref["file"] = f
            continue
        first = ref["file"].name
        if head["count"] != ref["count"]:
            raise RegionError(f"{f}: has {head['count']} bands, {first} has {ref['count']}; every file of a tile needs the same bands in the same order")
        if head["dtypes"][0] != ref["dtypes"][0]:
            raise RegionError(f"{f}: stores {head['dtypes'][0]}, {first} stores {ref['dtypes'][0]}; write every date with one data type")
        if not _same_nodata(head["nodata"], ref["nodata"]):
            raise RegionError(f"{f}: nodata {head['nodata']} differs from {first}'s {ref['nodata']}; give every file of a tile one nodata (e.g. gdal_edit.py -a_nodata {ref['nodata']})")
    if ref is None:  # unreachable: _discover only returns folders with GeoTIFFs
        raise RegionError(f"{folder}: no GeoTIFF files (*.tif) in the tile folder")
    height, width = ref["shape"]
    return TileFacts(
        name=name,
        path=folder,
        format="geotiff_folder",
        files=[f for _, f in dated],
        dates=[d for d, _ in dated],
        count=ref["count"],
        dtype=ref["dtypes"][0],
        nodata=ref["nodata"],
        crs=ref["crs"],
        transform=ref["transform"],
        height=height,
        width=width,
        descriptions=[d or None for d in ref["descriptions"]],
        truth=truth,
    )


def _inspect_products_tile(name: str, folder: Path) -> TileFacts:
    """A folder of scene folders, found and checked by the products reader's own :func:`~plantation.imagery.products.find_scenes`; the grid is the first scene's blue band's, as the reader takes it."""
    scenes = products.find_scenes(folder, [])
    others = sorted(p.name for p in folder.iterdir() if not p.name.startswith(".") and not products.is_scene_folder(p))
    if others:
        raise RegionError(f"{folder}: holds {others[:3]} beside the scene folders; the products reader reads only scene folders named as delivered (LC08_L2SP_..., S2A_MSIL2A_...): move the rest out")
    heads = []
    for sc in scenes:
        bid = sc.sensor.bands[DEFAULT_BANDS[0]]
        path = sc.files.get(bid)
        if path is None:
            raise RegionError(f"{sc.folder}: no file for band {bid} ({DEFAULT_BANDS[0]}) in the scene folder (expected names like {sc.id}_{bid}...)")
        try:
            with rasterio.open(path) as src:
                heads.append((src.crs, src.transform, src.height, src.width, src.dtypes[0], path))
        except rasterio.errors.RasterioIOError as exc:
            raise RegionError(f"{path}: cannot read as a raster ({str(exc).splitlines()[0]}); remove or replace the scene") from None
    crs, transform, height, width, dtype, first = heads[0]
    if crs is None:
        raise RegionError(f"{first}: the file has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:XXXX)")
    sensors: dict[str, int] = {}
    for sc in scenes:
        sensors[sc.sensor.name] = sensors.get(sc.sensor.name, 0) + 1
    return TileFacts(
        name=name,
        path=folder,
        format="products",
        files=[sc.folder for sc in scenes],
        dates=sorted({sc.acquired.date() for sc in scenes}),
        count=len(DEFAULT_BANDS),
        dtype=dtype,
        nodata=None,
        crs=crs,
        transform=transform,
        height=height,
        width=width,
        descriptions=[None] * len(DEFAULT_BANDS),
        sensors=sensors,
        grids=len({(str(c), tuple(t), h, w) for c, t, h, w, *_ in heads}),
    )


def _product_bands_and_sensors(tiles: Sequence[TileFacts]) -> tuple[list[str], HarmoniseConfig, list[str]]:
    """Comment lines on the band roles of product folders, the harmonisation they need (several sensors) and its comment lines."""
    sensors = sorted({s for t in tiles for s in t.sensors})
    per = "; ".join(f"{s}: " + ", ".join(f"{r} {products.SENSORS[s].bands[r]}" for r in DEFAULT_BANDS) for s in sensors)
    band_notes = [f"The roles the products reader finds by each product's band names ({per})."]
    if len(sensors) > 1:
        return band_notes, HarmoniseConfig(enabled=True), [f"The scenes come from {len(sensors)} sensors ({', '.join(sensors)}): every date is adjusted to OLI with the published coefficients."]
    return band_notes, HarmoniseConfig(), [f"One sensor ({sensors[0]}): every date as delivered."]


def _product_notes(tiles: Sequence[TileFacts]) -> list[str]:
    """What the scene folders are: per tile, scenes per sensor and the date range; a CHECK where a tile's scenes come on several grids."""
    out = []
    for t in tiles:
        what = ", ".join(f"{n} {s}" for s, n in sorted(t.sensors.items()))
        scenes = len(t.files)
        out.append(f"{t.name}: {scenes} scene folder(s) ({what}) acquired {t.dates[0]} to {t.dates[-1]}.")
        if t.grids > 1:
            out.append(
                f"{CHECK} {t.name}'s scenes come on {t.grids} grids (several path/rows, MGRS tiles or resolutions); "
                "they are read onto the first scene's grid: add tiles[].grid (crs, bounds, resolution) covering the area to map."
            )
    return out


def _inspect_cube(name: str, path: Path) -> TileFacts:
    import rioxarray  # noqa: F401  (adds .rio to xarray objects)
    import xarray as xr

    try:
        # Opened as the reader opens it, so the CRS and dtype seen here are the reader's.
        ds = xr.open_zarr(path, decode_coords="all") if path.suffix.lower() == ".zarr" or path.is_dir() else xr.open_dataset(path, decode_coords="all")
    except (OSError, ValueError) as exc:
        raise RegionError(f"{path}: cannot open as NetCDF or Zarr ({str(exc).splitlines()[0]}); remove or replace the file") from None
    with ds:
        four = sorted(str(v) for v in ds.data_vars if set(ds[v].dims) == {"time", "band", "y", "x"})
        if not four:
            dims = {str(v): tuple(map(str, ds[v].dims)) for v in ds.data_vars}
            raise RegionError(f"{path}: no variable with dims (time, band, y, x); it has {dims}; write the reflectance as one (time, band, y, x) variable")
        var = "reflectance" if "reflectance" in four else four[0]
        da = ds[var]
        crs = da.rio.crs or ds.rio.crs
        if crs is None:
            raise RegionError(f"{path}: the cube has no CRS; write one (rioxarray's .rio.write_crs) before saving it")
        qa_vars = sorted(str(v) for v in ds.data_vars if tuple(ds[v].dims) == ("time", "y", "x") and np.issubdtype(np.dtype(ds[v].encoding.get("dtype", ds[v].dtype)), np.integer))
        qa = next((v for v in qa_vars if _is_qa_name(_norm(v) or "")), qa_vars[0] if qa_vars else None)
        band = da["band"].values if "band" in da.coords else np.arange(da.sizes["band"])
        labels = [str(b) for b in band] if np.asarray(band).dtype.kind in "USO" else [None] * da.sizes["band"]
        times = np.sort(np.asarray(da["time"].values).astype("datetime64[D]"))
        fill = da.encoding.get("_FillValue", da.attrs.get("_FillValue"))
        return TileFacts(
            name=name,
            path=path,
            format="cube",
            files=[],
            dates=[date.fromisoformat(str(t)) for t in times],
            count=int(da.sizes["band"]),
            dtype=str(np.dtype(da.encoding.get("dtype", da.dtype))),
            nodata=None if fill is None else float(fill),
            crs=CRS.from_user_input(crs),
            transform=da.rio.transform(recalc=True),
            height=int(da.sizes["y"]),
            width=int(da.sizes["x"]),
            descriptions=list(labels),
            cube_variable=var,
            qa_variable=qa,
            decoded_scale="scale_factor" in da.encoding or "add_offset" in da.encoding,
            candidates=[v for v in four if v != var],
        )


def _check_tiles_agree(tiles: Sequence[TileFacts]) -> None:
    """Refuse tiles that one region config cannot describe; the culprit is the tile that differs from the first."""
    ref = tiles[0]
    for t in tiles[1:]:
        if t.format != ref.format:
            raise RegionError(f"{t.path}: a {t.format} tile beside {ref.format} tile {ref.name!r}; a region is one format, split them into two regions")
        if t.count != ref.count:
            raise RegionError(f"{t.path}: {t.count} bands per file, tile {ref.name!r} has {ref.count}; every tile of a region needs the same bands in the same order")
        if t.dtype != ref.dtype:
            raise RegionError(f"{t.path}: stores {t.dtype}, tile {ref.name!r} stores {ref.dtype}; write every tile with one data type (and one scaling)")
        if t.descriptions != ref.descriptions and all(d is not None for d in t.descriptions + ref.descriptions):
            raise RegionError(f"{t.path}: bands {t.descriptions}, tile {ref.name!r} has {ref.descriptions}; every tile needs the same bands in the same order")
        if t.crs != ref.crs:
            # The reader puts every tile of a region in one CRS (labels are placed once, areas summed across tiles).
            raise RegionError(
                f"{t.path}: CRS {_crs_text(t.crs)}, tile {ref.name!r} is in {_crs_text(ref.crs)}; "
                f"one region is one CRS: reproject it (gdalwarp -t_srs {_crs_text(ref.crs)}) or make it a region of its own"
            )


def _norm(text: str | None) -> str | None:
    if text is None or not str(text).strip():
        return None
    return re.sub(r"[\s\-]+", "_", str(text).strip().lower())


def _is_qa_name(name: str) -> bool:
    return name in _QA_NAMES or name.startswith("qa")


def _infer_bands(count: int, dtype: str, descriptions: Sequence[str | None]) -> tuple[list[str], int | None, list[str], list[str]]:
    """Band roles in file order, the 1-based QA band (or None), and comment lines for ``bands`` and ``mask.band``."""
    names = [_norm(d) for d in descriptions]
    integer = np.issubdtype(np.dtype(dtype), np.integer)
    last = names[-1] if names else None
    leading_roles = all(n is not None and not _is_qa_name(n) for n in names[:-1])
    qa: int | None = None
    qa_notes: list[str]
    if count >= 2 and integer and last is not None and _is_qa_name(last):
        qa = count
        qa_notes = [f"Band {count} is described as {descriptions[-1]!r} and stores {dtype}: taken as the QA band."]
    elif count >= 2 and integer and last is None and any(names[:-1]) and leading_roles:
        qa = count
        qa_notes = [f"Bands 1-{count - 1} are described as reflectance; band {count}, undescribed and {dtype}, is taken as the QA band."]
    elif count == len(DEFAULT_BANDS) + 1 and integer and not any(names):
        qa = count
        qa_notes = [f"The files hold {count} {dtype} bands, one more than the usual {len(DEFAULT_BANDS)} reflectance bands: band {count} is taken as the QA band."]
    else:
        why = "they are floats" if not integer else f"{count} band(s), none described as QA"
        qa_notes = [f"No QA band found ({why}): only nodata (and NaN) mark invalid pixels."]
    n_refl = count - (1 if qa else 0)
    refl = names[:n_refl]
    band_notes: list[str] = []
    if all(n is not None for n in refl):
        roles = [_ROLE_ALIASES.get(n, n) for n in refl if n is not None]
        band_notes.append("Read from the files' band descriptions: " + ", ".join(str(d) for d in descriptions[:n_refl]) + ".")
        unknown = [r for r in roles if r not in DEFAULT_BANDS]
        if unknown:
            band_notes.append(f"Kept as described (not one of {', '.join(DEFAULT_BANDS)}): {', '.join(unknown)}.")
    elif n_refl == len(DEFAULT_BANDS):
        roles = list(DEFAULT_BANDS)
        band_notes.append(f"The files do not name their bands: assumed the common order {', '.join(DEFAULT_BANDS)}; compare it with the product's band list.")
    else:
        roles = [f"band{i}" for i in range(1, n_refl + 1)]
        band_notes.append(f"{CHECK} the files hold {n_refl} reflectance band(s) and do not name them: replace band1..band{n_refl} with each band's role, in file order.")
    missing = [r for r in REQUIRED_ROLES if r not in roles]
    if missing and not band_notes[-1].startswith(CHECK):
        band_notes.append(f"{CHECK} no band is named {', '.join(missing)}; the spectral indices need them: rename the matching bands.")
    dup = sorted({r for r in roles if roles.count(r) > 1})
    if dup:
        band_notes.append(f"{CHECK} role(s) {', '.join(dup)} repeat; every band needs a role of its own.")
    return roles, qa, band_notes, qa_notes


def _cube_bands(tile: TileFacts) -> tuple[list[str], list[str]]:
    """Band names of a cube: the reader selects them by name, so they are kept exactly as stored."""
    labels = tile.descriptions
    if all(b is not None for b in labels):
        roles = [str(b) for b in labels]
        notes = [f"The cube's band labels, kept as stored (the reader selects bands by these names): {', '.join(roles)}."]
        missing = [r for r in REQUIRED_ROLES if r not in roles]
        if missing:
            notes.append(f"{CHECK} no band is named {', '.join(missing)}; the spectral indices need them: rename the cube's band labels.")
    elif tile.count == len(DEFAULT_BANDS):
        roles = list(DEFAULT_BANDS)
        notes = [f"The cube's band axis has no labels: assumed the common order {', '.join(DEFAULT_BANDS)}; compare it with the product's band list."]
    else:
        roles = [f"band{i}" for i in range(1, tile.count + 1)]
        notes = [f"{CHECK} the cube holds {tile.count} unlabelled band(s): replace band1..band{tile.count} with each band's role, in cube order."]
    return roles, notes


def _same_nodata(a: float | None, b: float | None) -> bool:
    if a is None or b is None:
        return a is b
    return a == b or (np.isnan(a) and np.isnan(b))


def _infer_nodata(tiles: Sequence[TileFacts]) -> tuple[float | None, list[str]]:
    first = tiles[0]
    integer = np.issubdtype(np.dtype(first.dtype), np.integer)
    if first.format == "cube":
        if first.nodata is not None:
            # CF decoding turns _FillValue into NaN, and NaN is always invalid.
            return None, [f"The cube's _FillValue ({_number(first.nodata)}) becomes NaN on reading, which already marks no data."]
        if integer:
            return None, [f"{CHECK} the cube has no _FillValue: if some stored value means no data (e.g. 0 or -9999), set it here."]
        return None, ["The cube has no _FillValue; NaN marks no data."]
    values = [t.nodata for t in tiles]
    if all(_same_nodata(v, values[0]) for v in values):
        v = values[0]
        if v is None:
            if integer:
                return None, [f"{CHECK} the files carry no nodata tag: if some stored value means no data (e.g. 0 or -9999), set it here."]
            return None, ["The files carry no nodata tag; NaN marks no data in float files."]
        if np.isnan(v):
            return None, ["The files' nodata tag is NaN, and NaN always marks no data."]
        return _tidy(v), [f"The nodata tag of every file: {_number(v)}."]
    per = ", ".join(f"{t.name} {_number(t.nodata) if t.nodata is not None else 'none'}" for t in tiles)
    return None, [f"The tiles' nodata tags differ ({per}): null takes each tile's own."]


def _float_median(tile: TileFacts, n_refl: int) -> float | None:
    """Median of a decimated read of the first file's reflectance bands (nodata and NaN left out)."""
    with rasterio.open(tile.files[0]) as src:
        shape = (n_refl, min(src.height, 64), min(src.width, 64))
        data = src.read(list(range(1, n_refl + 1)), out_shape=shape).astype(np.float64)
    if tile.nodata is not None:
        data[data == tile.nodata] = np.nan
    return None if np.isnan(data).all() else float(np.nanmedian(data))


def _infer_scaling(tile: TileFacts, n_refl: int) -> tuple[list[ScalingRule], list[str]]:
    if tile.decoded_scale:
        return [ScalingRule(None, 1.0, 0.0)], ["The cube carries CF scale_factor/add_offset, applied on reading: scale 1 here."]
    if np.issubdtype(np.dtype(tile.dtype), np.integer):
        return [ScalingRule(None, 1e-4, 0.0)], [
            f"The stored values are {tile.dtype} integers; 0.0001 is the usual scale of integer surface reflectance.",
            f"{CHECK} use the product's published scale and offset: e.g. Landsat Collection 2 level-2 is scale 0.0000275, offset -0.2; "
            "Sentinel-2 L2A from processing baseline 04.00 (2022-01-25) adds offset -0.1, a second rule with that start date.",
        ]
    notes = [f"The stored values are {tile.dtype}: taken as reflectance already (0-1), scale 1."]
    if tile.format == "geotiff_folder":
        med = _float_median(tile, n_refl)
        if med is not None and abs(med) > 2:
            notes.append(f"{CHECK} the first file's median value is {med:g}, not a 0-1 reflectance: set the scale that makes it one.")
    return [ScalingRule(None, 1.0, 0.0)], notes


def _infer_label_crs(path: Path, grids: dict[str, Any]) -> tuple[str | None, list[str], str, list[str]]:
    """CRS to write in ``labels.crs``, its comment lines, the file's kind and its columns (the labels reader's column checks)."""
    table, crs, unit = read_table(path, "EPSG:4326")
    columns = [c for c in table.columns if c != "source"]
    if unit == "feature":
        text = _crs_text(CRS.from_user_input(crs.to_wkt()))
        kind = "GeoPackage points" if path.suffix.lower() == ".gpkg" else "GeoJSON points"
        return text, [f"The file's own CRS ({text}); the reader takes it from the file, this key matters for CSV only."], kind, ["label", "onset_year"]
    if table.empty:
        raise LabelError(f"{path}: the labels file has no rows; add labelled points or leave --labels out")
    xs, ys = table["x"].to_numpy(float), table["y"].to_numpy(float)
    if (np.abs(xs) <= 180).all() and (np.abs(ys) <= 90).all():
        return "EPSG:4326", ["Guessed: every x is within ±180 and every y within ±90, so longitude/latitude.", f"{CHECK} if the x/y columns are in another CRS, name it here."], "CSV", columns
    img = next(iter(grids.values())).crs
    inside = np.zeros(len(xs), bool)
    for g in grids.values():
        west, south, east, north = g.bounds
        inside |= (xs >= west) & (xs <= east) & (ys >= south) & (ys <= north)
    if inside.all():
        text = _crs_text(img)
        return (
            text,
            [f"Guessed: the coordinates are not degrees and every point falls inside the tiles in the imagery's CRS ({text}).", f"{CHECK} confirm the x/y columns are in {text}."],
            "CSV",
            columns,
        )
    return None, [f"{CHECK} the x/y values are not longitude/latitude and do not fall inside the tiles in the imagery's CRS ({_crs_text(img)}): name their CRS here (e.g. EPSG:32650)."], "CSV", columns


# --------------------------------------------------------------------------- rendering


def _unit(crs: CRS) -> str:
    unit = (crs.linear_units or "").lower()
    return "m" if unit in ("metre", "meter", "m") else unit


def _crs_text(crs: CRS) -> str:
    """``EPSG:n`` where the CRS has a code, its WKT otherwise."""
    epsg = crs.to_epsg()
    return f"EPSG:{epsg}" if epsg else crs.to_wkt()


def _crs_name(crs: CRS) -> str:
    from pyproj import CRS as ProjCRS

    return ProjCRS.from_user_input(crs.to_wkt()).name


def _tidy(v: float) -> float | int:
    return int(v) if float(v).is_integer() else float(v)


def _number(v: float) -> str:
    return str(_tidy(v))


def _scalar(v: Any, *, flow: bool = False) -> str:
    """One YAML scalar, quoted only where a plain one would be read as something else (``flow``: inside ``{...}``)."""
    if v is None:
        return "null"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if v.is_integer() and abs(v) < 1e15:
            return f"{v:.1f}"
        return repr(v)
    text = str(v)
    if _PLAIN.fullmatch(text) and text.lower() not in _YAML_WORDS and not (flow and ":" in text):
        return text
    return json.dumps(text, ensure_ascii=False)


def _flow(items: dict[str, Any]) -> str:
    return "{" + ", ".join(f"{k}: {_scalar(v, flow=True)}" for k, v in items.items()) + "}"


def _comment(text: str | Sequence[str], indent: int = 0) -> list[str]:
    """Comment lines wrapped to the file's width; ``CHECK:`` lines keep their mark on every wrapped line."""
    lines: list[str] = []
    for para in [text] if isinstance(text, str) else text:
        prefix = " " * indent + "# "
        # Continuation lines are indented, not re-marked: one CHECK per thing to do.
        cont = prefix + " " * (len(CHECK) + 1 if para.startswith(CHECK) else 2)
        lines += textwrap.wrap(para, width=_WIDTH, initial_indent=prefix, subsequent_indent=cont, break_on_hyphens=False, break_long_words=False)
    return lines


def _rel(path: str | Path, base: Path) -> str:
    """``path`` relative to ``base`` (POSIX separators), or absolute where no relative path exists (another drive)."""
    try:
        return Path(os.path.relpath(Path(path).resolve(), base)).as_posix()
    except ValueError:
        return str(Path(path).resolve())


def render(starter: Starter, dest_folder: str | Path) -> str:
    """The commented YAML text of a region file to be written in ``dest_folder``.

    Paths are written relative to ``dest_folder`` (the region loader takes
    them from the region file's folder). Every key carries a comment; what
    needs the user is marked ``CHECK:``.

    Raises:
        RuntimeError: the text does not load back into the same config (a bug, never the user's files).
    """
    base = Path(dest_folder).resolve()
    r = starter.region
    first = starter.tiles[0]
    n = starter.notes
    when = starter.inspected_at.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")
    years = sorted({d.year for d in first.dates})
    kind = {"cube": "NetCDF/Zarr cube(s)", "products": "folder(s) of delivered scene folders"}.get(r.format, "GeoTIFF folder(s)")
    if r.format == "products":
        sensors: dict[str, int] = {}
        for t in starter.tiles:
            for k, v in t.sensors.items():
                sensors[k] = sensors.get(k, 0) + v
        layers = f"{sum(len(t.files) for t in starter.tiles)} scene(s) ({', '.join(f'{n} {s}' for s, n in sorted(sensors.items()))}), {first.dtype} files"
    else:
        layers = f"{first.count} band(s) of {first.dtype}"
    out: list[str] = []
    out += _comment(f"Region {r.name!r}, started by `plantation new-region` on {when} from the headers of its files.")
    head = [
        f"Imagery: {_rel(starter.imagery, base)} - {len(starter.tiles)} tile(s) ({', '.join(t.name for t in starter.tiles)}) as {kind}; "
        f"{layers}; CRS {_crs_text(first.crs)} ({_crs_name(first.crs)}); "
        f"{len(first.dates)} dates from {first.dates[0]} to {first.dates[-1]} (years {years[0]}-{years[-1]}).",
        f"Labels: {_rel(starter.labels, base)}." if starter.labels else "Labels: none given.",
        "Every value below was read from those files or is a default said to be one. The reader opened the imagery (and placed the labels) with these values when the file was written.",
        "Relative paths are taken from the folder this file is in.",
    ]
    checks = starter.checks
    head.append(f"{len(checks)} line(s) marked CHECK need your attention before you train." if checks else "Nothing is marked CHECK: review the values, then run the survey.")
    out += _comment(head) + ["defaults:", "  - region_schema", "  - _self_", ""]

    out += _comment("Names the region in the outputs of the survey, train and map jobs.")
    out += [f"name: {_scalar(r.name)}"]
    formats = ["geotiff_folder: one GeoTIFF per date, date YYYY-MM-DD in the file name.", "cube: one NetCDF (.nc) or Zarr (.zarr) per tile, dims (time, band, y, x)."]
    if r.format == "products":
        formats.append("products: a folder of Landsat Collection 2 Level-2 and Sentinel-2 Level-2A scene folders per tile, as delivered.")
    out += _comment(formats)
    out += [f"format: {r.format}"]
    tile_text = [
        "One entry per tile: its name, its "
        + {"cube": "cube", "products": "folder of scene folders"}.get(r.format, "folder of dated GeoTIFFs")
        + (", and the truth raster (simulated regions only)" if any(t.truth for t in r.tiles) else "")
        + ".",
        "Every tile shares one CRS and the same dates; each may have its own grid.",
        *n.get("tiles", []),
    ]
    out += _comment(tile_text) + ["tiles:"]
    for tc, tf in zip(r.tiles, starter.tiles, strict=True):
        out += _comment(f"{tf.name}: {tf.width} x {tf.height} px of {tf.pixel_size()}, origin ({tf.transform.c:g}, {tf.transform.f:g}) in {_crs_text(tf.crs)}; {len(tf.dates)} dates.", 2)
        entry = {"name": tc.name, "path": _rel(tc.path, base)}
        if tc.truth:
            entry["truth"] = _rel(tc.truth, base)
        out += [f"  - {_flow(entry)}"]
    if r.format == "cube":
        out += _comment(["Name of the (time, band, y, x) reflectance variable in each cube.", *n.get("cube_variable", [])])
        out += [f"cube_variable: {_scalar(r.cube_variable)}"]
    if r.format == "products":
        out += _comment(["Band roles read from each scene; the indices need blue, red, nir, swir1, swir2.", *n["bands"]])
    else:
        out += _comment(["Band roles in the order they are stored" + (" in each file" if r.format != "cube" else "") + "; the indices need blue, red, nir, swir1, swir2.", *n["bands"]])
    out += ["bands: [" + ", ".join(_scalar(b) for b in r.bands) + "]"]
    if r.format == "products":
        out += _comment('Stored value for "no data": unused for product folders, which carry each product\'s published fill value.')
    else:
        out += _comment(['Stored value for "no data" (null: each file\'s own nodata tag).', *n["nodata"]])
    out += [f"nodata: {_scalar(r.nodata)}"]
    if r.format == "products":
        rule = "Unused for product folders: each scene's own QA layer with its published rule (Landsat QA_PIXEL bits 0, 1, 3, 4, 5; Sentinel-2 SCL classes 0, 1, 3, 8, 9, 10, 11)."
        out += _comment(["Where the quality (QA) information of each date lives.", rule]) + ["mask:"]
        out += _comment("1-based QA band of a GeoTIFF folder's files.", 2) + [f"  band: {_scalar(r.mask.band)}"]
        out += _comment("QA bits marking a pixel invalid (0 = least significant).", 2) + [f"  invalid_bits: [{', '.join(str(b) for b in r.mask.invalid_bits)}]"]
        out += _comment("QA values (classes) marking a pixel invalid.", 2) + [f"  invalid_values: [{', '.join(str(v) for v in r.mask.invalid_values)}]"]
    elif r.format == "cube":
        out += _comment("Where the quality (QA) information of each date lives.") + ["mask:"]
        out += _comment(["Integer (time, y, x) QA variable of each cube; null when there is none.", *n["mask.variable"]], 2)
        out += [f"  variable: {_scalar(r.mask.variable)}"]
        out += _mask_rule_lines(r, r.mask.variable is not None)
    else:
        out += _comment("Where the quality (QA) information of each date lives.") + ["mask:"]
        out += _comment(["1-based number of the QA band in each file, right after the reflectance bands; null when the files have none.", *n["mask.band"]], 2)
        out += [f"  band: {_scalar(r.mask.band)}"]
        out += _mask_rule_lines(r, r.mask.band is not None)
    if r.format == "products":
        scale = (
            "Unused for product folders: each scene's published scale and offset (Landsat C2 L2 0.0000275 and -0.2; "
            "Sentinel-2 L2A (DN + BOA_ADD_OFFSET) / 10000, the offset from the product's metadata or baseline)."
        )
        out += _comment(["reflectance = stored value x scale + offset for a GeoTIFF folder or cube.", scale])
    else:
        out += _comment(["reflectance = stored value x scale + offset; the rule with the latest start on or before a date applies (start: null = from the first date).", *n["scaling"]])
    out += ["scaling:"] + [f"  - {_flow({'start': s.start, 'scale': s.scale, 'offset': s.offset})}" for s in r.scaling]
    if r.format == "products":
        out += _comment("Cross-sensor adjustment of each date's reflectance to a reference sensor.") + ["harmonise:"]
        out += _comment(["Adjust every date to the reference sensor with published coefficients (needed when the scenes come from several sensors).", *n["harmonise"]], 2)
        out += [f"  enabled: {_scalar(r.harmonise.enabled)}"]
        out += _comment("The sensor every date is brought to: oli (the published tables run to it).", 2) + [f"  reference: {_scalar(r.harmonise.reference)}"]
    out += _label_lines(starter, base)
    out += _comment("Spatial chunk in pixels for lazy reading; bounds the memory of each task.")
    out += [f"chunk: {r.chunk}", ""]
    text = "\n".join(out)
    _check_round_trip(text, r, base)
    return text


def _mask_rule_lines(r: RegionConfig, has_qa: bool) -> list[str]:
    """The QA bits and values of a GeoTIFF folder's or cube's mask, with comments."""
    out: list[str] = []
    bits = ["A pixel is invalid when any of these bits (0 = least significant) is set in the QA values."]
    if has_qa:
        bits.append(
            "0, 1, 2 is the simulator's convention (cloud, shadow, fill). Check your product's QA bit layout, e.g. Landsat Collection 2 QA_PIXEL: 0 fill, 1 dilated cloud, 3 cloud, 4 cloud shadow."
        )
    else:
        bits.append("Unused without a QA band.")
    out += _comment(bits, 2) + [f"  invalid_bits: [{', '.join(str(b) for b in r.mask.invalid_bits)}]"]
    values = [
        "A pixel is also invalid when its QA value is one of these: for a QA layer whose values are classes, not bit flags",
        "(e.g. Sentinel-2 L2A SCL: 0, 1, 3, 8, 9, 10, 11; then set invalid_bits: []). Empty: bits only.",
    ]
    out += _comment(values, 2) + [f"  invalid_values: [{', '.join(str(v) for v in r.mask.invalid_values)}]"]
    return out


def _label_lines(starter: Starter, base: Path) -> list[str]:
    """The ``labels:`` block, with comments."""
    r, n = starter.region, starter.notes
    out = _comment("Reference points labelled by interpreters: what the model learns from and is checked against.") + ["labels:"]
    label_path_notes = n.get("labels.path", [])
    out += _comment(["CSV (x, y, label, onset_year) or GeoPackage/GeoJSON points (label, onset_year).", *label_path_notes], 2)
    out += [f"  path: {_scalar(_rel(r.labels.path, base) if r.labels.path else None)}"]
    out += _comment(["CRS of a CSV's x/y columns (x = longitude, y = latitude for EPSG:4326).", *n.get("labels.crs", [])], 2)
    out += [f"  crs: {_scalar(r.labels.crs)}"]
    out += _comment(
        [
            "Share of the region's area in each label group, where known from elsewhere (a published statistic, an earlier assessment): all four summing to 1, or all null.",
            "CHECK: reference samples over-sample change; without these (or inclusion_column, or calibration.prior=bbse at training) "
            "the probabilities refer to the sample's class mix, not the region's.",
        ],
        2,
    )
    out += ["  population_shares:"]
    groups = (
        ("stable_forest", "Natural forest standing through the whole series."),
        ("conversion", "Forest converted to tree-crop plantation within the series."),
        ("old_plantation", "Plantation already before the series."),
        ("other", "Other land or disturbance."),
    )
    for group, what in groups:
        out += _comment(what, 4) + [f"    {group}: null"]
    out += _comment("Column of the labels file with each point's inclusion probability in (0, 1] under the sampling design; null: not recorded.", 2)
    out += ["  inclusion_column: null"]
    return out


def load_text(text: str, base: str | Path) -> RegionConfig:
    """A region file's text as a typed config, relative paths taken from ``base`` (the file's folder).

    Mirrors what the jobs do with a region file: drop ``defaults``, merge onto
    the :class:`RegionConfig` schema, make relative paths absolute.
    """
    raw = OmegaConf.create(text)
    raw.pop("defaults", None)
    cfg = OmegaConf.to_object(OmegaConf.merge(OmegaConf.structured(RegionConfig), raw))
    if not isinstance(cfg, RegionConfig):  # the schema's own type comes back; anything else is a bug
        raise RuntimeError(f"region text loaded as {type(cfg).__name__}")
    folder = Path(base)
    for t in cfg.tiles:
        t.path = str((folder / t.path).resolve())
        t.truth = str((folder / t.truth).resolve()) if t.truth else None
    if cfg.labels.path:
        cfg.labels.path = str((folder / cfg.labels.path).resolve())
    return cfg


def _check_round_trip(text: str, region: RegionConfig, base: Path) -> None:
    back = load_text(text, base)
    want = OmegaConf.to_container(OmegaConf.structured(_resolved(region)))
    got = OmegaConf.to_container(OmegaConf.structured(back))
    if want != got:
        raise RuntimeError(f"the rendered region file does not load back into the inspected config: {got} != {want}")


def _resolved(region: RegionConfig) -> RegionConfig:
    r = OmegaConf.to_object(OmegaConf.structured(region))
    if not isinstance(r, RegionConfig):
        raise RuntimeError(f"region copied as {type(r).__name__}")
    for t in r.tiles:
        t.path = str(Path(t.path).resolve())
        t.truth = str(Path(t.truth).resolve()) if t.truth else None
    if r.labels.path:
        r.labels.path = str(Path(r.labels.path).resolve())
    return r


# --------------------------------------------------------------------------- writing


def write(name: str, imagery: str | Path, labels: str | Path | None, out: str | Path, *, overwrite: bool = False) -> Path:
    """Inspect a region's files and write its commented region file to ``out``.

    The file is written under a temporary name in the same folder, then
    renamed, so a failed run never leaves half a file. Missing parent folders
    are created.

    Returns:
        The absolute path written.

    Raises:
        RegionFileExistsError: ``out`` exists and ``overwrite`` is False.
        InputNotFoundError, RegionError, LabelError: see :func:`inspect`.
    """
    dest = Path(out).expanduser().absolute()
    if dest.exists() and not overwrite:
        raise RegionFileExistsError(f"{dest}: region file exists already; choose another name or ask to overwrite it (--force)")
    starter = inspect(name, imagery, labels)
    dest.parent.mkdir(parents=True, exist_ok=True)
    text = render(starter, dest.parent)
    # A hidden name in the same folder: the rename is then atomic, and the file gets the usual permissions.
    tmp = dest.with_name(f".{dest.name}.{os.getpid()}.partial")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, dest)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return dest
