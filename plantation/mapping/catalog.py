"""The map folder as one static STAC Collection, so QGIS and any STAC client open a mapped region as one.

``collection.json`` sits in the map folder beside ``manifest.json``; one
Item per finished tile sits in ``stac/<tile>.json``. The catalogue is
self-contained (pystac's ``SELF_CONTAINED``: no self links, every href
relative), so the folder can be moved or copied whole. The mapping job
rewrites it (:func:`write_collection`) every time it writes the manifest,
over exactly the tiles the manifest lists, each file under a temporary name
and then renamed.

Each Item describes one tile's COG, read from the file itself:

- geometry and bbox in WGS84 (``rio_stac.create_stac_item``: the tile's
  bounds, densified and reprojected), ``start_datetime``/``end_datetime`` the
  series' years (the manifest's onset years; a map is about a period, not a
  date);
- the projection extension v2 (``proj:code``, ``proj:shape``,
  ``proj:transform``, ``proj:bbox``), with ``proj:epsg`` kept beside
  ``proj:code`` for readers of the extension's v1 (odc-stac among them);
- on the ``data`` asset (role ``data``), STAC 1.1 ``bands`` (each layer's
  name from :data:`plantation.mapping.folder.LAYERS` and its meaning from
  that module's layer table) and the raster extension's ``raster:bands``
  (data type, nodata, scale and offset where a layer is scaled, unit), with
  the classification extension's ``classification:classes`` on the class
  band (codes of :data:`plantation.reference.labels.LABEL_CODES`, names and
  colour hints of the QGIS style, :data:`plantation.mapping.styles.CLASS_STYLE`);
- the file extension's ``file:checksum`` (sha256 multihash) and
  ``file:size`` of the COG;
- the QGIS styles (role ``metadata``) and the quicklook PNG (role
  ``overview``) beside the tile, where they exist;
- what made the tile, under the ``plantation:`` prefix: the model's sha256
  (from the manifest), the cutoff year, interval level and mass, the
  minimum clear dates, the networks and the probability correction (from
  the tile's own tags). The Collection repeats those all its tiles share.

No ``eo`` extension: the layers are map products, not reflectance.
Statistics are left out: for class and year bands they say nothing, and for
scaled bands readers disagree whether they are of stored or scaled values.

An Item is rebuilt only when its tile's bytes changed (its ``file:checksum``
against the manifest's sha256), so rewriting the Collection after each tile
reads the headers of new tiles only. Built from the same tiles, a resumed run
and a clean one give the same files. Never imports torch.
"""

from __future__ import annotations

import json
import os
import re
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pystac
import rasterio
import rio_stac
from pystac.extensions.classification import Classification, ClassificationExtension
from pystac.extensions.file import FileExtension
from pystac.extensions.projection import ProjectionExtension
from pystac.extensions.raster import RasterBand, RasterExtension
from pystac.layout import TemplateLayoutStrategy
from pystac.stac_io import DefaultStacIO
from pystac.utils import datetime_to_str

from plantation.errors import FileFormatError
from plantation.mapping import folder as map_folder
from plantation.mapping.folder import BAND, LAYERS, MANIFEST, NOTICE, read_manifest
from plantation.mapping.styles import CLASS_STYLE
from plantation.reference.labels import LABEL_CODES

#: The Collection's file name in a map folder.
COLLECTION = "collection.json"
#: The folder (inside the map folder) of the Items, one ``<tile>.json`` per tile.
ITEMS = "stac"
#: Prefix of the fields this project adds (cutoff year, model digest, ...).
PREFIX = "plantation:"
#: Points added along each edge of a tile's bounds before reprojecting them to WGS84 (GDAL's own default).
DENSIFY = 21
#: Tile tags carried as Item properties: tag → (property, type).
TAG_PROPERTIES: dict[str, tuple[str, type]] = {
    "cutoff_year": ("cutoff_year", int),
    "interval_level": ("interval_level", float),
    "interval_mass": ("interval_mass", float),
    "min_clear_dates": ("min_clear_dates", int),
    "model_networks": ("model_networks", str),
    "model_region": ("model_region", str),
    "producer": ("producer", str),
}
#: Properties the Collection repeats when every tile has the same value.
SHARED = ("model_sha256", "cutoff_year", "interval_level", "interval_mass", "min_clear_dates", "model_networks", "probability_correction")


def layer_notes() -> dict[str, str]:
    """Each layer's meaning, from the layer table of :mod:`plantation.mapping.folder` (its docstring), by layer name.

    The table is the map format's own description of its bands; reading it
    here keeps one text for both. A row naming bands ``3, 4`` describes both.
    A layer the table does not describe is left out (the tests check none is).
    """
    lines = (map_folder.__doc__ or "").splitlines()
    rules = [i for i, line in enumerate(lines) if re.fullmatch(r"=+( +=+)+", line.strip())]
    if len(rules) < 3:
        return {}
    starts = [m.start() for m in re.finditer(r"=+", lines[rules[0]])]
    rows: list[list[str]] = []
    for line in lines[rules[1] + 1 : rules[2]]:
        cells = [line[a:b].strip() for a, b in zip(starts, [*starts[1:], None], strict=True)]
        if cells[0]:
            rows.append(cells)
        elif rows:
            rows[-1][-1] += " " + cells[-1]
    notes: dict[str, str] = {}
    for row in rows:
        text = re.sub(r":\w+:`~?([^`]+)`", r"\1", row[-1])
        for band in re.findall(r"\d+", row[0]):
            if 1 <= int(band) <= len(LAYERS):
                notes[LAYERS[int(band) - 1][0]] = text
    return notes


def _classes() -> list[Classification]:
    """The class band's classes: codes and names of the label codes, description and colour of the QGIS style."""
    name_of = {code: name for name, code in LABEL_CODES.items()}
    return [Classification.create(value=code, name=name_of[code], description=label, color_hint=colour.lstrip("#").upper()) for code, (label, colour) in sorted(CLASS_STYLE.items())]


def _period(years: list[int]) -> tuple[datetime, datetime]:
    return datetime(years[0], 1, 1, tzinfo=UTC), datetime(years[-1], 12, 31, 23, 59, 59, tzinfo=UTC)


def _tag_properties(tags: Mapping[str, str], where: Path) -> dict[str, Any]:
    props: dict[str, Any] = {}
    for tag, (key, kind) in TAG_PROPERTIES.items():
        if tag in tags:
            try:
                props[PREFIX + key] = kind(tags[tag])
            except ValueError as exc:
                raise FileFormatError(f"{where}: its {tag} tag {tags[tag]!r} is not a {kind.__name__}; map the region again with `plantation map`") from exc
    props[PREFIX + "probability_correction"] = map_folder.read_correction(dict(tags), where)
    return props


def tile_item(folder: Path, name: str, entry: Mapping[str, Any]) -> pystac.Item:
    """The STAC Item of one finished tile, read from its COG (asset hrefs absolute; :func:`write_collection` makes them relative).

    Args:
        folder: the map folder.
        name: the tile's name (the Item's id).
        entry: the tile's manifest entry (``file``, ``sha256``, ``model_sha256``, ``converted_ha``).

    Raises:
        FileFormatError: the entry has no onset years, the file's bands are
            not the map's layers, or a tag is malformed.
    """
    path = (folder / str(entry["file"])).absolute()
    years = sorted(int(y) for y in entry.get("converted_ha") or {})
    if not years:
        raise FileFormatError(f"{folder / MANIFEST}: tile {name!r} records no onset years (converted_ha); map the region again with `plantation map`")
    start, end = _period(years)
    notes = layer_notes()
    with rasterio.open(path) as src:
        names = tuple(n for n, _, _ in LAYERS)
        if tuple(src.descriptions) != names:
            raise FileFormatError(f"{path}: bands {list(src.descriptions)}, expected {list(names)} (a map written by `plantation map`)")
        props: dict[str, Any] = {
            "title": f"tile {name}",
            "start_datetime": datetime_to_str(start),
            "end_datetime": datetime_to_str(end),
            PREFIX + "model_sha256": str(entry.get("model_sha256", "")) or None,
            PREFIX + "years": years,
            **_tag_properties(src.tags(), path),
        }
        item = rio_stac.create_stac_item(
            src,
            id=name,
            properties={k: v for k, v in props.items() if v is not None},
            asset_name="data",
            asset_roles=["data"],
            asset_href=str(path),
            asset_media_type=pystac.MediaType.COG,
            geom_densify_pts=DENSIFY,
        )
        epsg = src.crs.to_epsg() if src.crs is not None else None
        proj = ProjectionExtension.ext(item, add_if_missing=True)
        if epsg is not None:
            proj.epsg = epsg  # written as proj:code "EPSG:<n>" (v2)
            item.properties["proj:epsg"] = epsg
        elif src.crs is not None:
            proj.wkt2 = src.crs.to_wkt()
        proj.shape = [src.height, src.width]
        proj.transform = list(src.transform)[:6]
        proj.bbox = list(src.bounds)
        bands = []
        for i, (_, _, unit) in enumerate(LAYERS):
            scaled = src.scales[i] != 1.0 or src.offsets[i] != 0.0
            band = RasterBand.create(
                data_type=src.dtypes[i],
                nodata=src.nodatavals[i],
                unit=unit,
                scale=float(src.scales[i]) if scaled else None,
                offset=float(src.offsets[i]) if scaled else None,
            )
            if i == BAND["class"] - 1:
                ClassificationExtension.ext(band).classes = _classes()
            bands.append(band)
    asset = item.assets["data"]
    asset.title = f"map layers of tile {name} (Cloud-Optimized GeoTIFF)"
    asset.extra_fields["bands"] = [{"name": layer, **({"description": notes[layer]} if layer in notes else {})} for layer, _, _ in LAYERS]
    RasterExtension.ext(asset, add_if_missing=True).bands = bands
    ClassificationExtension.add_to(item)
    FileExtension.ext(asset, add_if_missing=True).apply(checksum="1220" + str(entry.get("sha256", "")), size=path.stat().st_size)
    for key, suffix, title, roles, media in (
        ("style", ".qml", "QGIS style: map class (the default style QGIS loads with the tile)", ["metadata"], pystac.MediaType.XML),
        ("style_onset_year", ".onset_year.qml", "QGIS style: onset year, split at the cutoff", ["metadata"], pystac.MediaType.XML),
        ("style_p_after_cutoff", ".p_after_cutoff.qml", "QGIS style: probability of conversion after the cutoff", ["metadata"], pystac.MediaType.XML),
        ("quicklook", ".png", "quicklook: map class and onset year", ["overview"], pystac.MediaType.PNG),
    ):
        other = path.with_name(name + suffix)
        if other.is_file():
            item.add_asset(key, pystac.Asset(href=str(other), title=title, media_type=media, roles=roles))
    return item


def _checksum(item: pystac.Item) -> str | None:
    data = item.assets.get("data")
    return None if data is None else data.extra_fields.get("file:checksum")


def _kept_item(path: Path, entry: Mapping[str, Any]) -> pystac.Item | None:
    """The Item written before for a tile whose bytes have not changed since (None: build it again)."""
    if not path.is_file():
        return None
    try:
        # As written: pystac's migration would drop proj:epsg, kept here for readers of the projection extension's v1.
        item = pystac.Item.from_dict(json.loads(path.read_text()), href=str(path), migrate=False)
    except (OSError, ValueError, KeyError, TypeError, AttributeError, pystac.STACError):
        return None
    if _checksum(item) != "1220" + str(entry.get("sha256", "")):
        return None
    item.make_asset_hrefs_absolute()
    item.clear_links()
    return item


class _AtomicIO(DefaultStacIO):
    """pystac's file writer, each file written under a temporary name and then renamed."""

    def write_text_to_href(self, href: str, txt: str) -> None:
        dest = Path(href)
        dest.parent.mkdir(parents=True, exist_ok=True)
        tmp = dest.with_name(f".{dest.name}.partial")
        try:
            tmp.write_text(txt)
            os.replace(tmp, dest)
        finally:
            tmp.unlink(missing_ok=True)


def build_collection(folder: str | Path, tiles: Mapping[str, Mapping[str, Any]] | None = None, *, name: str | None = None) -> pystac.Collection:
    """The Collection over the tiles of a map folder (its manifest's, or ``tiles``), hrefs set for saving in the folder."""
    folder = Path(folder).absolute()
    if tiles is None:
        raw = read_manifest(folder)
        tiles = raw["tiles"] if raw is not None else {}
    if not tiles:
        raise FileFormatError(f"{folder}: no finished tile to catalogue; map the region with `plantation map`")
    items = []
    for tile in sorted(tiles):
        entry = tiles[tile]
        items.append(_kept_item(folder / ITEMS / f"{tile}.json", entry) or tile_item(folder, tile, entry))
    bboxes = [it.bbox for it in items if it.bbox]
    spatial = pystac.SpatialExtent([[min(b[0] for b in bboxes), min(b[1] for b in bboxes), max(b[2] for b in bboxes), max(b[3] for b in bboxes)]])
    years = sorted({y for it in items for y in it.properties.get(PREFIX + "years", [])})
    temporal = pystac.TemporalExtent([list(_period(years))])
    cid = name or folder.name
    shared: dict[str, Any] = {}
    for key in SHARED:
        values = {json.dumps(it.properties.get(PREFIX + key), sort_keys=True) for it in items}
        if len(values) == 1 and PREFIX + key in items[0].properties:
            shared[PREFIX + key] = items[0].properties[PREFIX + key]
    collection = pystac.Collection(
        id=cid,
        title=f"{cid}: year of conversion of natural forest to tree-crop plantation",
        description=(
            "Per-pixel map of natural forest converted to tree-crop plantation, one Cloud-Optimized GeoTIFF per tile "
            "(layers: " + ", ".join(n for n, _, _ in LAYERS) + "), written by `plantation map`. " + NOTICE
        ),
        extent=pystac.Extent(spatial, temporal),
        license="other",
        catalog_type=pystac.CatalogType.SELF_CONTAINED,
        extra_fields={PREFIX + "tiles": len(items), **shared},
    )
    collection.add_asset("manifest", pystac.Asset(href=f"./{MANIFEST}", title="what made each tile (manifest.json)", media_type=pystac.MediaType.JSON, roles=["metadata"]))
    for item in items:
        collection.add_item(item)
    collection.normalize_hrefs(str(folder), strategy=TemplateLayoutStrategy(item_template=ITEMS))
    collection.make_all_asset_hrefs_relative()
    return collection


def write_collection(folder: str | Path, tiles: Mapping[str, Mapping[str, Any]] | None = None, *, name: str | None = None) -> Path:
    """Write ``collection.json`` and ``stac/<tile>.json`` for the map folder's finished tiles; returns the Collection's path.

    Each file is written under a temporary name and renamed, the Items
    before the Collection; Items of tiles no longer listed are removed after.

    Args:
        folder: the map folder.
        tiles: the manifest's tile entries (default: read ``manifest.json``).
        name: the Collection's id (default: the folder's name).

    Raises:
        FileFormatError: no tile, or a tile's file or entry is not a map tile's.
    """
    folder = Path(folder).absolute()
    collection = build_collection(folder, tiles, name=name)
    collection.save(pystac.CatalogType.SELF_CONTAINED, stac_io=_AtomicIO())
    keep = {f"{item.id}.json" for item in collection.get_items()}
    for stale in (folder / ITEMS).glob("*.json"):
        if stale.name not in keep:
            stale.unlink(missing_ok=True)
    return folder / COLLECTION
