"""STAC in: Items from an ItemCollection or a static catalogue, loaded lazily onto a tile's grid with odc-stac.

Band roles are matched to each item's assets by key (an asset called
``nir``, or ``qa``), else by the ``eo:bands`` common name (``nir08`` and
``nir`` → ``nir``, ``swir16`` → ``swir1``, ``swir22`` → ``swir2``; STAC 1.1's
``bands`` with ``eo:common_name`` alike). Items are grouped by solar day
(same-day scenes of one orbit are one date, mosaicked where they overlap) and
reprojected onto the tile's grid by odc-stac: reflectance by averaging
(bilinear where the source is coarser), the QA layer by nearest neighbour,
so classes and bit flags are never blended. Scale and offset come from each
asset's ``raster:bands`` (the STAC raster extension), nodata likewise.
"""

from __future__ import annotations

import datetime as dt
import json
import logging
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pystac
import xarray as xr
from affine import Affine
from rasterio.crs import CRS

from plantation.errors import InputNotFoundError, RegionError
from plantation.imagery.harmonise import canonical_sensor

log = logging.getLogger(__name__)

#: STAC ``eo:bands`` common names → band roles; earlier names win when an item has both (``nir08``, OLI's band 5 and MSI's 8A, before the broad ``nir``).
COMMON_NAMES: dict[str, str] = {"coastal": "coastal", "blue": "blue", "green": "green", "red": "red", "nir08": "nir", "nir": "nir", "swir16": "swir1", "swir22": "swir2"}
#: Asset keys taken as the QA layer when none is configured (case-insensitive).
QA_KEYS: tuple[str, ...] = ("qa", "qa_pixel", "scl", "fmask", "cloud_mask")


def read_items(path: Path) -> list[pystac.Item]:
    """Items of a STAC ItemCollection file or of a static catalogue or collection (recursively), hrefs resolved.

    Raises:
        InputNotFoundError: no such file.
        RegionError: the file is not STAC, or holds no item.
    """
    if not path.is_file():
        raise InputNotFoundError(f"{path.absolute()}: STAC file does not exist")
    try:
        kind = json.loads(path.read_text(encoding="utf-8")).get("type")
        # An ItemCollection is a GeoJSON FeatureCollection, which pystac.read_file does not take.
        obj = pystac.ItemCollection.from_file(str(path)) if kind == "FeatureCollection" else pystac.read_file(str(path))
    except Exception as exc:  # pystac raises many kinds (JSON, STACTypeError, KeyError) for a file that is not STAC
        raise RegionError(f"{path}: cannot read as STAC ({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else 'no detail'})") from None
    if isinstance(obj, pystac.ItemCollection):
        items = list(obj.items)
    elif isinstance(obj, pystac.Catalog):
        obj.make_all_asset_hrefs_absolute()
        items = list(obj.get_items(recursive=True))
    elif isinstance(obj, pystac.Item):
        items = [obj]
    else:
        raise RegionError(f"{path}: a STAC {type(obj).__name__}, not an ItemCollection, Catalog or Collection")
    if not items:
        raise RegionError(f"{path}: the STAC file holds no item")
    base = path.resolve().parent
    for it in items:
        for a in it.assets.values():
            if "://" not in a.href and not Path(a.href).is_absolute():
                a.href = str((base / a.href).resolve())
    return items


def _common_names(asset: pystac.Asset) -> list[str]:
    ef = asset.extra_fields
    names = [b.get("common_name") for b in ef.get("eo:bands", []) or []]
    names += [b.get("eo:common_name") for b in ef.get("bands", []) or []]
    names.append(ef.get("eo:common_name"))
    return [n for n in names if n]


def role_assets(item: pystac.Item, roles: Sequence[str], qa_asset: str | None) -> dict[str, str]:
    """Asset key for each band role and for ``qa`` (absent when the item has no QA layer).

    Raises:
        RegionError: a role matches no asset.
    """
    keys = {k.lower(): k for k in item.assets}
    out: dict[str, str] = {}
    for role in roles:
        if role.lower() in keys:
            out[role] = keys[role.lower()]
            continue
        for name, mapped in COMMON_NAMES.items():
            if mapped != role:
                continue
            hit = next((k for k, a in item.assets.items() if name in _common_names(a)), None)
            if hit is not None:
                out[role] = hit
                break
        if role not in out:
            raise RegionError(f"STAC item {item.id!r}: no asset for band role {role!r} (by key or eo:bands common name); its assets are {sorted(item.assets)}")
    if qa_asset is not None:
        if qa_asset not in item.assets:
            raise RegionError(f"STAC item {item.id!r}: no QA asset {qa_asset!r} (region.mask.asset); its assets are {sorted(item.assets)}")
        out["qa"] = qa_asset
    else:
        hit = next((keys[k] for k in QA_KEYS if k in keys), None)
        if hit is not None:
            out["qa"] = hit
    return out


def check_assets(items: Sequence[pystac.Item], roles: Sequence[str], qa_asset: str | None, where: str) -> None:
    """Refuse, before any pixel is read, an item without an asset for a band role (or the QA asset named) or whose local asset file is missing.

    Raises:
        RegionError: an item has no asset for a role; the message names ``where`` (the STAC file or folder) and the item.
        InputNotFoundError: a local asset's file does not exist.
    """
    for it in items:
        try:
            keys = role_assets(it, roles, qa_asset)
        except RegionError as exc:
            raise RegionError(f"{where}: {exc}") from None
        for role, key in keys.items():
            href = it.assets[key].href
            if "://" not in href and not Path(href).is_file():
                raise InputNotFoundError(f"{where}: STAC item {it.id!r}: the file of asset {key!r} (band role {role!r}) does not exist: {href}; download it, or leave the item out")


def _raster_band(asset: pystac.Asset) -> dict[str, Any]:
    bands = asset.extra_fields.get("raster:bands") or asset.extra_fields.get("bands") or [{}]
    return dict(bands[0])


def solar_day(item: pystac.Item) -> dt.date:
    """The item's local solar date: acquisition time (UTC) shifted by the footprint's centre longitude (15° an hour)."""
    when = item.datetime or item.common_metadata.start_datetime
    if when is None:
        raise RegionError(f"STAC item {item.id!r}: no datetime")
    lon = 0.0
    if item.bbox:
        lon = (item.bbox[0] + item.bbox[2]) / 2
    return (when.astimezone(dt.UTC) + dt.timedelta(hours=lon / 15.0)).date()


def sensor_of(item: pystac.Item) -> str:
    """The item's sensor: the ``plantation:sensor`` property of product folders, else instruments or platform.

    Named as :func:`~plantation.imagery.harmonise.canonical_sensor` names it
    (instruments ``oli`` and ``tirs`` → ``landsat_oli``).
    """
    p = item.properties
    if p.get("plantation:sensor"):
        return canonical_sensor(str(p["plantation:sensor"]))
    inst = p.get("instruments")
    if inst:
        return canonical_sensor("+".join(sorted(str(i).lower() for i in inst)))
    return canonical_sensor(str(p.get("platform") or p.get("constellation") or "unknown"))


@dataclass
class LoadedTile:
    """Stored values of a tile's dates on its grid, lazily: what the region reader scales and masks."""

    #: Stored values, dims (time, band, y, x), the assets' dtype; nodata where no scene covers a pixel.
    raw: xr.DataArray
    #: QA values, dims (time, y, x), or None.
    qa: xr.DataArray | None
    #: True where a band is nodata (its asset's ``raster:bands`` nodata, or outside every scene).
    nodata: xr.DataArray
    dates: list[dt.date]
    #: Reflectance = raw × scale + offset, arrays (time, band).
    scale: np.ndarray
    offset: np.ndarray
    #: The sensor of each date.
    sensors: list[str]
    #: Every file read (for a map's content key).
    files: list[str]
    #: Items left out because another sensor's scenes make their solar day's date.
    left_out: list[str] = field(default_factory=list)


def default_grid(item: pystac.Item, asset_key: str) -> tuple[CRS, Affine, int, int]:
    """The grid of one asset from its ``proj:`` fields: (CRS, transform, height, width)."""
    ef = item.assets[asset_key].extra_fields
    code = ef.get("proj:code") or (f"EPSG:{ef['proj:epsg']}" if ef.get("proj:epsg") else None) or ef.get("proj:wkt2")
    if code is None or "proj:transform" not in ef or "proj:shape" not in ef:
        raise RegionError(f"STAC item {item.id!r}: asset {asset_key!r} has no proj:code/proj:epsg, proj:transform and proj:shape; give the tile's grid (tiles[].grid)")
    t = ef["proj:transform"]
    h, w = ef["proj:shape"]
    return CRS.from_user_input(code), Affine(*t[:6]), int(h), int(w)


def load_tile(
    items: Sequence[pystac.Item],
    roles: Sequence[str],
    *,
    crs: CRS,
    transform: Affine,
    height: int,
    width: int,
    chunk: int,
    qa_asset: str | None = None,
    where: str = "",
    mixed: bool = False,
    prefer: str | None = None,
) -> LoadedTile:
    """Load ``items`` onto a grid, one date per solar day, lazily (dask, ``chunk`` pixels a side).

    ``mixed``: items of several sensors are allowed (the caller harmonises
    them). One date per solar day holds: a day with scenes of several
    sensors keeps the scenes of one, ``prefer`` when it is among them, else
    the first by name; the others are listed in ``left_out``.

    Raises:
        RegionError: items of several sensors without ``mixed``, scenes of
            one day with different scaling, or an asset odc-stac cannot use.
    """
    import odc.stac
    from odc.geo.geobox import GeoBox

    sensors = sorted({sensor_of(it) for it in items})
    if len(sensors) > 1 and not mixed:
        raise RegionError(f"{where}: scenes of several sensors {sensors}; their reflectance differs by sensor: set region.harmonise.enabled: true to adjust each date to OLI")
    by_day: dict[dt.date, list[pystac.Item]] = {}
    for it in items:
        by_day.setdefault(solar_day(it), []).append(it)
    kept: list[pystac.Item] = []
    left_out: list[str] = []
    for day in sorted(by_day):
        names = sorted({sensor_of(it) for it in by_day[day]})
        keep = prefer if prefer in names else names[0]
        kept += [it for it in by_day[day] if sensor_of(it) == keep]
        left_out += [it.id for it in by_day[day] if sensor_of(it) != keep]
    if left_out:
        log.warning("%s: %d scene(s) left out, another sensor's scenes make their day's date: %s", where, len(left_out), ", ".join(left_out))
    items = kept
    renamed: dict[dt.date, list[pystac.Item]] = {}
    scales: dict[dt.date, tuple[list[float], list[float]]] = {}
    files: list[str] = []
    has_qa = True
    for it in items:
        keys = role_assets(it, roles, qa_asset)
        has_qa = has_qa and "qa" in keys
        clone = it.clone()
        clone.assets = {new: it.assets[old].clone() for new, old in keys.items()}
        files += [a.href for a in clone.assets.values()]
        day = solar_day(it)
        rb = [_raster_band(clone.assets[r]) for r in roles]
        so = ([float(b.get("scale", 1.0)) for b in rb], [float(b.get("offset", 0.0)) for b in rb])
        if day in scales and scales[day] != so:
            raise RegionError(f"{where}: scenes of {day} carry different scale/offset ({scales[day]} and {so}, item {it.id!r}); they cannot be mosaicked into one date")
        scales[day] = so
        renamed.setdefault(day, []).append(clone)
    bands = [*roles, "qa"] if has_qa else list(roles)
    geobox = GeoBox((height, width), transform, crs)
    resampling = {"qa": "nearest", "*": "average"}
    # One load for every day: items grouped by this module's solar day (the keys sort as the days do).
    every = [it for day in sorted(renamed) for it in renamed[day]]
    try:
        ds = odc.stac.load(every, bands=bands, geobox=geobox, groupby=lambda item, parsed, idx: solar_day(item).isoformat(), chunks={"x": chunk, "y": chunk}, resampling=resampling)
    except Exception as exc:  # odc-stac reports missing metadata in several exception kinds
        raise RegionError(f"{where}: cannot load the scenes ({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else 'no detail'})") from None
    if ds.sizes["time"] != len(renamed):
        raise RegionError(f"{where}: odc-stac made {ds.sizes['time']} dates of {len(renamed)} solar days")
    ds = ds.assign_coords(time=[np.datetime64(d, "ns") for d in sorted(renamed)])
    raw = xr.concat([ds[r] for r in roles], dim="band").transpose("time", "band", "y", "x")
    nodata = xr.zeros_like(raw.isel(band=0), dtype=bool)
    for i, r in enumerate(roles):
        nd = _raster_band(renamed[sorted(renamed)[0]][0].assets[r]).get("nodata")
        if nd is not None:
            nodata = nodata | (raw.isel(band=i) == nd)
    qa = ds["qa"] if has_qa else None
    days = sorted(renamed)
    scale = np.array([scales[d][0] for d in days], np.float32)
    offset = np.array([scales[d][1] for d in days], np.float32)
    keep = ["time", "y", "x"]
    raw = raw.drop_vars([c for c in raw.coords if c not in keep])
    nodata = nodata.drop_vars([c for c in nodata.coords if c not in keep])
    if qa is not None:
        qa = qa.drop_vars([c for c in qa.coords if c not in keep])
    day_sensor = [sensor_of(renamed[d][0]) for d in days]
    return LoadedTile(raw, qa, nodata, days, scale, offset, day_sensor, files, left_out)
