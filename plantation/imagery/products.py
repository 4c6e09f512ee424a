"""Satellite products as they are delivered: Landsat Collection 2 Level-2 and Sentinel-2 Level-2A scene folders.

A tile of ``format: products`` is a folder holding scene folders, found by
their published names:

* Landsat 8/9 OLI and Landsat 7 ETM+ Collection 2 Level-2 scenes
  (``LC08_L2SP_PPPRRR_YYYYMMDD_yyyymmdd_02_T1`` and the same with LC09,
  LE07): one GeoTIFF per band, ``<scene>_SR_B<n>.TIF``, and the
  ``<scene>_QA_PIXEL.TIF`` bit flags;
* Sentinel-2 Level-2A products (``S2A_MSIL2A_YYYYMMDDTHHMMSS_Nxxyy_Rooo_Txxxxx_...``,
  with or without ``.SAFE``): one file per band and resolution,
  ``..._B02_10m.jp2`` (or ``.tif``), the scene classification ``..._SCL_20m``,
  anywhere below the product folder.

Each scene becomes one STAC Item (:func:`scene_item`) whose assets are keyed
by band role (``blue``, ``nir``, ...) and ``qa``, each with its projection
(``proj:``) and the product's published scale and offset (``raster:bands``),
so that product folders and STAC catalogues are loaded onto a tile's grid by
one path (:mod:`plantation.imagery.stac`).

Published values used here:

* Landsat Collection 2 Level-2 surface reflectance: reflectance = DN ×
  0.0000275 − 0.2, fill DN 0; QA_PIXEL bits 0 fill, 1 dilated cloud,
  2 cirrus, 3 cloud, 4 cloud shadow, 5 snow (USGS Landsat 8-9 and Landsat 7
  Collection 2 Level-2 Science Product Guides).
* Sentinel-2 Level-2A: reflectance = (DN + BOA_ADD_OFFSET) / 10000, with
  BOA_ADD_OFFSET −1000 from processing baseline 04.00 (products from
  25 January 2022, and reprocessed older ones) and 0 before; the value is
  read from the product's ``MTD_MSIL2A.xml`` when present, else from the
  baseline in the product name. Scene classification classes 0 no data,
  1 saturated or defective, 3 cloud shadow, 8 and 9 cloud medium and high
  probability, 10 thin cirrus, 11 snow are invalid (ESA Sentinel-2 L2A
  product specification).
* Sentinel-2's near infrared is band 8A (narrow, 865 nm, 20 m), the band
  matching OLI's band 5, as the Harmonized Landsat Sentinel-2 products use
  it (Claverie et al. 2018).
"""

from __future__ import annotations

import datetime as dt
import re
import xml.etree.ElementTree as ET
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pystac
import rasterio
from rasterio.warp import transform_geom

from plantation.errors import RegionError


@dataclass(frozen=True)
class Sensor:
    """One sensor's band names, QA rule and fill values in its product."""

    #: Recorded with each date (``landsat_oli``, ``landsat_etm``, ``sentinel2_msi``).
    name: str
    #: Band role → the product's band id.
    bands: dict[str, str]
    #: The QA band's id.
    qa: str
    #: QA bits that make a pixel invalid (bit flags), or none.
    qa_bits: tuple[int, ...] = ()
    #: QA values that make a pixel invalid (classes), or none.
    qa_values: tuple[int, ...] = ()
    #: QA value outside a scene's footprint (a value the rule marks invalid).
    qa_fill: int = 1
    #: Stored reflectance value meaning no data.
    fill: int = 0


#: Landsat Collection 2 Level-2 QA_PIXEL bits masked: fill, dilated cloud, cloud, cloud shadow, snow (USGS product guides).
LANDSAT_QA_BITS: tuple[int, ...] = (0, 1, 3, 4, 5)
#: Landsat Collection 2 Level-2 surface reflectance scale and offset (USGS product guides).
LANDSAT_SCALE, LANDSAT_OFFSET = 0.0000275, -0.2
#: Sentinel-2 L2A scene classification classes masked (ESA L2A product specification).
SCL_INVALID: tuple[int, ...] = (0, 1, 3, 8, 9, 10, 11)
#: Sentinel-2 L2A quantification value: reflectance = (DN + offset) / 10000.
S2_QUANTIFICATION = 10000.0
#: BOA_ADD_OFFSET from processing baseline 04.00 on, when the product's metadata does not say.
S2_BASELINE4_OFFSET = -1000.0

OLI = Sensor("landsat_oli", {"coastal": "SR_B1", "blue": "SR_B2", "green": "SR_B3", "red": "SR_B4", "nir": "SR_B5", "swir1": "SR_B6", "swir2": "SR_B7"}, "QA_PIXEL", qa_bits=LANDSAT_QA_BITS, qa_fill=1)
ETM = Sensor("landsat_etm", {"blue": "SR_B1", "green": "SR_B2", "red": "SR_B3", "nir": "SR_B4", "swir1": "SR_B5", "swir2": "SR_B7"}, "QA_PIXEL", qa_bits=LANDSAT_QA_BITS, qa_fill=1)
MSI = Sensor(
    "sentinel2_msi",
    {"coastal": "B01", "blue": "B02", "green": "B03", "red": "B04", "rededge1": "B05", "rededge2": "B06", "rededge3": "B07", "nir": "B8A", "nir_broad": "B08", "swir1": "B11", "swir2": "B12"},
    "SCL",
    qa_values=SCL_INVALID,
    qa_fill=0,
)
SENSORS: dict[str, Sensor] = {s.name: s for s in (OLI, ETM, MSI)}

_LANDSAT = re.compile(r"^(L[CE]0[789])_L2SP_(\d{6})_(\d{8})_(\d{8})_02_(T1|T2|RT)$")
_S2 = re.compile(r"^(S2[ABCD])_MSIL2A_(\d{8}T\d{6})_N(\d{4})_R\d{3}_T(\w{5})_\d{8}T\d{6}(\.SAFE)?$")
_S2_BAND = re.compile(r"_(B\d[\dA]|SCL)_(10|20|60)m\.(jp2|tif|tiff)$", re.IGNORECASE)


@dataclass
class Scene:
    """One delivered scene: its sensor, acquisition time, and a file per band id."""

    id: str
    sensor: Sensor
    #: Acquisition time (UTC; Landsat names carry only the day: noon UTC).
    acquired: dt.datetime
    folder: Path
    files: dict[str, Path] = field(default_factory=dict)
    #: Reflectance = DN × scale + offset, per band id.
    scale: dict[str, float] = field(default_factory=dict)
    offset: dict[str, float] = field(default_factory=dict)


def is_scene_folder(path: Path) -> bool:
    """Whether ``path`` is named like a Landsat C2 L2 or Sentinel-2 L2A scene folder."""
    return path.is_dir() and bool(_LANDSAT.match(path.name) or _S2.match(path.name))


def _landsat_scene(folder: Path, m: re.Match[str]) -> Scene:
    sensor = ETM if m[1] == "LE07" else OLI
    day = dt.datetime.strptime(m[3], "%Y%m%d").replace(hour=12, tzinfo=dt.UTC)
    scene = Scene(folder.name, sensor, day, folder)
    for bid in [*sensor.bands.values(), sensor.qa]:
        hits = [p for p in folder.iterdir() if p.name.upper() == f"{folder.name}_{bid}.TIF".upper()]
        if hits:
            scene.files[bid] = hits[0]
    for bid in sensor.bands.values():
        scene.scale[bid], scene.offset[bid] = LANDSAT_SCALE, LANDSAT_OFFSET
    return scene


def _s2_offsets(folder: Path) -> dict[str, float] | None:
    """BOA_ADD_OFFSET per band id from ``MTD_MSIL2A.xml`` (None when the file or the values are absent).

    The layout read (from memory of the L2A user product metadata): each
    ``Spectral_Information`` element maps a ``bandId`` (0, 1, ...) to a
    ``physicalBand`` (``B1`` ... ``B8A`` ... ``B12``); each ``BOA_ADD_OFFSET``
    element carries a ``band_id`` and the offset in DN.
    """
    mtd = next(iter(sorted(folder.rglob("MTD_MSIL2A.xml"))), None)
    if mtd is None:
        return None
    try:
        root = ET.parse(mtd).getroot()
    except ET.ParseError as exc:
        raise RegionError(f"{mtd}: cannot parse the product metadata ({exc})") from None
    ids = {}
    for el in root.iter():
        if el.tag.endswith("Spectral_Information") and el.get("physicalBand") is not None:
            ids[el.get("bandId")] = el.get("physicalBand")
    out: dict[str, float] = {}
    for el in root.iter():
        if el.tag.endswith("BOA_ADD_OFFSET") and el.text is not None:
            name = ids.get(el.get("band_id") or "", "")
            bid = name if name.startswith("B") and len(name) == 3 else f"B{name[1:].zfill(2)}" if name else ""
            if bid:
                out[bid] = float(el.text)
    return out or None


def _s2_scene(folder: Path, m: re.Match[str]) -> Scene:
    acquired = dt.datetime.strptime(m[2], "%Y%m%dT%H%M%S").replace(tzinfo=dt.UTC)
    scene = Scene(folder.name.removesuffix(".SAFE"), MSI, acquired, folder)
    # The finest file of each band (B02 comes at 10, 20 and 60 m in one product).
    found: dict[str, tuple[int, Path]] = {}
    for p in sorted(folder.rglob("*")):
        hit = _S2_BAND.search(p.name)
        if hit and p.is_file():
            bid, res = hit[1].upper(), int(hit[2])
            if bid not in found or res < found[bid][0]:
                found[bid] = (res, p)
    scene.files = {bid: p for bid, (_, p) in found.items()}
    baseline = int(m[3])
    from_metadata = _s2_offsets(folder)
    for bid in MSI.bands.values():
        default = S2_BASELINE4_OFFSET if baseline >= 400 else 0.0
        off = from_metadata.get(bid, default) if from_metadata else default
        scene.scale[bid] = 1.0 / S2_QUANTIFICATION
        scene.offset[bid] = off / S2_QUANTIFICATION
    return scene


def find_scenes(folder: Path, roles: Sequence[str]) -> list[Scene]:
    """Every scene folder directly inside ``folder``, ordered by acquisition, checked to hold the files of ``roles`` and the QA band.

    Raises:
        RegionError: no scene folder, a band role the sensor lacks, or a
            scene without a band's file.
    """
    scenes = []
    for p in sorted(folder.iterdir()):
        if not p.is_dir():
            continue
        if m := _LANDSAT.match(p.name):
            scenes.append(_landsat_scene(p, m))
        elif m := _S2.match(p.name):
            scenes.append(_s2_scene(p, m))
    if not scenes:
        raise RegionError(f"{folder}: no Landsat Collection 2 Level-2 (LC08_L2SP_..., LC09_..., LE07_...) or Sentinel-2 Level-2A (S2A_MSIL2A_...) scene folder in the tile folder")
    for s in scenes:
        missing_roles = [r for r in roles if r not in s.sensor.bands]
        if missing_roles:
            raise RegionError(f"{s.folder}: {s.sensor.name} has no band for role(s) {missing_roles}; its roles are {sorted(s.sensor.bands)}")
        need = [s.sensor.bands[r] for r in roles] + [s.sensor.qa]
        missing = [b for b in need if b not in s.files]
        if missing:
            raise RegionError(f"{s.folder}: no file for band(s) {missing} in the scene folder (expected names like {s.id}_{missing[0]}...)")
    return sorted(scenes, key=lambda s: (s.acquired, s.id))


def _asset(path: Path, roles: list[str], *, scale: float = 1.0, offset: float = 0.0, nodata: float) -> pystac.Asset:
    with rasterio.open(path) as src:
        if src.crs is None:
            raise RegionError(f"{path}: the file has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:XXXX)")
        epsg = src.crs.to_epsg()
        proj: dict[str, Any] = {
            "proj:code": f"EPSG:{epsg}" if epsg else None,
            "proj:wkt2": None if epsg else src.crs.to_wkt(),
            "proj:shape": [src.height, src.width],
            "proj:transform": list(src.transform)[:6],
        }
        dtype = src.dtypes[0]
    # odc-stac reads ``proj:epsg`` as well as ``proj:code``: both are written (projection extension v1 and v2).
    if epsg:
        proj["proj:epsg"] = epsg
    extra = {k: v for k, v in proj.items() if v is not None}
    extra["raster:bands"] = [{"data_type": dtype, "nodata": nodata, "scale": scale, "offset": offset}]
    return pystac.Asset(href=str(path.resolve()), media_type=pystac.MediaType.GEOTIFF if path.suffix.lower().startswith(".tif") else pystac.MediaType.JPEG2000, roles=roles, extra_fields=extra)


def scene_item(scene: Scene, roles: Sequence[str]) -> pystac.Item:
    """The scene as a STAC Item: one asset per band role and ``qa``, with projection, published scale/offset and nodata.

    The item's geometry is the first role's footprint in EPSG:4326; the
    sensor's name is in the ``plantation:sensor`` property, so that a loader
    can tell sensors apart.
    """
    s = scene.sensor
    assets = {r: _asset(scene.files[s.bands[r]], ["data", "reflectance"], scale=scene.scale[s.bands[r]], offset=scene.offset[s.bands[r]], nodata=s.fill) for r in roles}
    assets["qa"] = _asset(scene.files[s.qa], ["cloud", "data-mask"], nodata=s.qa_fill)
    first = assets[roles[0]].extra_fields
    h, w = first["proj:shape"]
    t = first["proj:transform"]
    left, top = t[2], t[5]
    right, bottom = left + t[0] * w, top + t[4] * h
    ring = [[left, bottom], [right, bottom], [right, top], [left, top], [left, bottom]]
    with rasterio.open(scene.files[s.bands[roles[0]]]) as src:
        geom = transform_geom(src.crs, "EPSG:4326", {"type": "Polygon", "coordinates": [ring]})
    xs = [c[0] for c in geom["coordinates"][0]]
    ys = [c[1] for c in geom["coordinates"][0]]
    item = pystac.Item(
        id=scene.id,
        geometry=geom,
        bbox=[min(xs), min(ys), max(xs), max(ys)],
        datetime=scene.acquired,
        properties={"plantation:sensor": s.name},
    )
    for key, asset in assets.items():
        item.add_asset(key, asset)
    return item
