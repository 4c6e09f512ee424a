"""The map folder as one static STAC Collection, so QGIS and any STAC client open a mapped region as one.

``collection.json`` sits in the map folder beside ``manifest.json``; one
Item per finished tile sits in ``stac/<tile>.json``. The catalogue is
self-contained (pystac's ``SELF_CONTAINED``: no self links, every href
relative), so the folder can be moved or copied whole. The mapping job
updates it (:meth:`Catalogue.update`) every time it writes the manifest,
over exactly the tiles the manifest lists, each file under a temporary name
and then renamed.

Each Item describes one tile's COG, read from the file itself:

- geometry and bbox in WGS84 (``rio_stac.create_stac_item``: the tile's
  bounds, densified and reprojected), ``start_datetime``/``end_datetime`` the
  series' years (the manifest's onset years; a map is about a period, not a
  date);
- the projection extension v2 (``proj:code``, ``proj:shape``,
  ``proj:transform``, ``proj:bbox``), with ``proj:epsg`` kept beside
  ``proj:code`` for readers that know only the extension's v1;
- on the ``data`` asset (role ``data``), STAC 1.1 ``bands`` (each layer's
  name from :data:`plantation.mapping.folder.LAYERS` and its meaning from
  :data:`plantation.mapping.folder.LAYER_MEANING`) and the raster extension's ``raster:bands``
  (data type, nodata, scale and offset where a layer is scaled, unit), with
  the classification extension's ``classification:classes`` on the class
  band (codes of :data:`plantation.reference.labels.LABEL_CODES`, names and
  colour hints of the QGIS style, :data:`plantation.mapping.styles.CLASS_STYLE`)
  and on the fire band (codes of :data:`plantation.mapping.fire.FIRE_CODES`,
  colours of :data:`plantation.mapping.styles.FIRE_STYLE`), where the tile has
  the fire layers (maps made before them have the first eight only);
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

An Item is written only when its tile's bytes changed (its ``file:checksum``
against the manifest's sha256): a :class:`Catalogue` remembers what it wrote,
so after each tile the job writes that tile's Item and ``collection.json``
only, whatever the number of tiles; a new process reads the Items already
there once. Built from the same tiles, a resumed run and a clean one give the
same files. The files are written as JSON by this module (pystac builds the
objects and their extension fields); links and hrefs are relative, set here.
Never imports torch.
"""

from __future__ import annotations

import json
import logging
import os
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pystac
import rasterio
import rasterio.errors
import rio_stac
from pystac.extensions.classification import Classification, ClassificationExtension
from pystac.extensions.file import FileExtension
from pystac.extensions.projection import ProjectionExtension
from pystac.extensions.raster import RasterBand, RasterExtension
from pystac.utils import datetime_to_str, make_relative_href

from plantation.errors import FileFormatError
from plantation.mapping import folder as map_folder
from plantation.mapping.fire import FIRE_CODES
from plantation.mapping.folder import BAND, LAYER_MEANING, LAYERS, MANIFEST, MAP_LAYERS, NOTICE, read_manifest
from plantation.mapping.styles import CLASS_STYLE, FIRE_STYLE
from plantation.reference.labels import LABEL_CODES

log = logging.getLogger(__name__)

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
    """Each layer's meaning, by layer name (:data:`plantation.mapping.folder.LAYER_MEANING`, the map format's own words)."""
    return dict(LAYER_MEANING)


def _classes() -> list[Classification]:
    """The class band's classes: codes and names of the label codes, description and colour of the QGIS style."""
    name_of = {code: name for name, code in LABEL_CODES.items()}
    return [Classification.create(value=code, name=name_of[code], description=label, color_hint=colour.lstrip("#").upper()) for code, (label, colour) in sorted(CLASS_STYLE.items())]


def _fire_classes() -> list[Classification]:
    """The fire band's classes: codes and names of :data:`FIRE_CODES`, description and colour of the QGIS style (code 0 has no colour: it is not drawn)."""
    out = []
    for name, code in FIRE_CODES.items():
        label, colour = FIRE_STYLE.get(code, ("not converted and no escaped fire", ""))
        out.append(Classification.create(value=code, name=name, description=label, color_hint=colour.lstrip("#").upper() or None))
    return out


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
        layers = MAP_LAYERS if src.count == len(MAP_LAYERS) else LAYERS
        names = tuple(n for n, _, _ in layers)
        if tuple(src.descriptions) != names:
            raise FileFormatError(f"{path}: bands {list(src.descriptions)}, expected {[n for n, _, _ in MAP_LAYERS]} (a map written by `plantation map`)")
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
        for i, (_, _, unit) in enumerate(layers):
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
            if i == BAND["fire"] - 1:
                ClassificationExtension.ext(band).classes = _fire_classes()
            bands.append(band)
    asset = item.assets["data"]
    asset.title = f"map layers of tile {name} (Cloud-Optimized GeoTIFF)"
    asset.extra_fields["bands"] = [{"name": layer, **({"description": notes[layer]} if layer in notes else {})} for layer, _, _ in layers]
    RasterExtension.ext(asset, add_if_missing=True).bands = bands
    ClassificationExtension.add_to(item)
    FileExtension.ext(asset, add_if_missing=True).apply(checksum="1220" + str(entry.get("sha256", "")), size=path.stat().st_size)
    for key, suffix, title, roles, media in (
        ("style", ".qml", "QGIS style: map class (the default style QGIS loads with the tile)", ["metadata"], pystac.MediaType.XML),
        ("style_onset_year", ".onset_year.qml", "QGIS style: onset year, split at the cutoff", ["metadata"], pystac.MediaType.XML),
        ("style_p_after_cutoff", ".p_after_cutoff.qml", "QGIS style: probability of conversion after the cutoff", ["metadata"], pystac.MediaType.XML),
        ("style_fire", ".fire.qml", "QGIS style: fire in the clearing, and fire escaped from it", ["metadata"], pystac.MediaType.XML),
        ("style_dnbr", ".dnbr.qml", "QGIS style: the clearing's dNBR in Key & Benson's severity classes", ["metadata"], pystac.MediaType.XML),
        ("quicklook", ".png", "quicklook: map class and onset year", ["overview"], pystac.MediaType.PNG),
    ):
        other = path.with_name(name + suffix)
        if other.is_file():
            item.add_asset(key, pystac.Asset(href=str(other), title=title, media_type=media, roles=roles))
    return item


def _write_text(dest: Path, text: str) -> None:
    """Write ``text`` to ``dest`` under a temporary name, then rename it."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(f".{dest.name}.partial")
    try:
        tmp.write_text(text)
        os.replace(tmp, dest)
    finally:
        tmp.unlink(missing_ok=True)


def _dumps(doc: dict[str, Any]) -> str:
    return json.dumps(doc, indent=1, ensure_ascii=False) + "\n"


@dataclass
class _Summary:
    """What the Collection needs of one written Item."""

    checksum: str
    bbox: list[float]
    years: list[int]
    properties: dict[str, Any]


class Catalogue:
    """The STAC Collection of one map folder, kept in step with its manifest by :meth:`update`.

    It remembers the Items it has written or read, so that an update writes
    only the Items of tiles whose bytes changed, and the Collection: the
    mapping job keeps one for a run and updates it after every tile.
    """

    def __init__(self, folder: str | Path, *, name: str | None = None) -> None:
        self.folder = Path(folder).absolute()
        self.name = name or self.folder.name
        self._known: dict[str, _Summary] = {}

    @property
    def path(self) -> Path:
        """``collection.json`` of the folder."""
        return self.folder / COLLECTION

    def item_path(self, tile: str) -> Path:
        return self.folder / ITEMS / f"{tile}.json"

    def update(self, tiles: Mapping[str, Mapping[str, Any]] | None = None) -> Path:
        """Write the Items of new or changed tiles, then ``collection.json`` over exactly ``tiles``; returns its path.

        Each file is written under a temporary name and renamed, the Items
        before the Collection; Items of tiles not listed are removed after.

        Args:
            tiles: the manifest's tile entries (default: read ``manifest.json``).

        Raises:
            FileFormatError: no tile, or a tile's file or entry is not a map tile's.
        """
        if tiles is None:
            raw = read_manifest(self.folder)
            tiles = raw["tiles"] if raw is not None else {}
        if not tiles:
            raise FileFormatError(f"{self.folder}: no finished tile to catalogue; map the region with `plantation map`")
        for tile in sorted(tiles):
            want = "1220" + str(tiles[tile].get("sha256", ""))
            known = self._known.get(tile)
            if known is None or known.checksum != want:
                try:
                    self._known[tile] = self._read(tile, want) or self._write_item(tile, tiles[tile])
                except (rasterio.errors.RasterioIOError, FileNotFoundError) as exc:
                    # A tile being mapped again after damage: described once it is finished.
                    log.warning("%s: tile %r left out of the STAC Collection, its file does not open (%s)", self.folder, tile, exc)
                    self._known.pop(tile, None)
        self._known = {t: self._known[t] for t in sorted(tiles) if t in self._known}
        if not self._known:
            raise FileFormatError(f"{self.folder}: no tile listed in its manifest opens; map the region again with `plantation map`")
        _write_text(self.path, _dumps(self._collection()))
        for stale in (self.folder / ITEMS).glob("*.json"):
            if stale.stem not in self._known:
                stale.unlink(missing_ok=True)
        return self.path

    def _links(self, item: bool) -> list[dict[str, Any]]:
        root = f"../{COLLECTION}" if item else f"./{COLLECTION}"
        return [{"rel": rel, "href": root, "type": pystac.MediaType.JSON} for rel in (("root", "collection", "parent") if item else ("root",))]

    def _read(self, tile: str, checksum: str) -> _Summary | None:
        """The Item written before for a tile whose bytes have not changed since, and for this Collection (None: write it again)."""
        path = self.item_path(tile)
        try:
            doc = json.loads(path.read_text())
            if doc["assets"]["data"]["file:checksum"] != checksum or doc.get("collection") != self.name or doc["links"] != self._links(item=True):
                return None
            return _Summary(checksum, [float(v) for v in doc["bbox"]], [int(y) for y in doc["properties"][PREFIX + "years"]], dict(doc["properties"]))
        except (OSError, ValueError, KeyError, TypeError, AttributeError):
            return None

    def _write_item(self, tile: str, entry: Mapping[str, Any]) -> _Summary:
        path = self.item_path(tile)
        item = tile_item(self.folder, tile, entry)
        item.collection_id = self.name
        for asset in item.assets.values():
            asset.href = make_relative_href(asset.href, str(path))
        doc = item.to_dict(include_self_link=False, transform_hrefs=False)
        doc["links"] = self._links(item=True)
        _write_text(path, _dumps(doc))
        return _Summary(str(item.assets["data"].extra_fields["file:checksum"]), list(item.bbox or []), list(item.properties[PREFIX + "years"]), dict(item.properties))

    def _collection(self) -> dict[str, Any]:
        known = list(self._known.values())
        boxes = [k.bbox for k in known]
        spatial = pystac.SpatialExtent([[min(b[0] for b in boxes), min(b[1] for b in boxes), max(b[2] for b in boxes), max(b[3] for b in boxes)]])
        temporal = pystac.TemporalExtent([list(_period(sorted({y for k in known for y in k.years})))])
        shared: dict[str, Any] = {}
        for key in SHARED:
            values = {json.dumps(k.properties.get(PREFIX + key), sort_keys=True) for k in known}
            if len(values) == 1 and PREFIX + key in known[0].properties:
                shared[PREFIX + key] = known[0].properties[PREFIX + key]
        collection = pystac.Collection(
            id=self.name,
            title=f"{self.name}: year of conversion of natural forest to tree-crop plantation",
            description=(
                "Per-pixel map of natural forest converted to tree-crop plantation, one Cloud-Optimized GeoTIFF per tile "
                "(layers: " + ", ".join(n for n, _, _ in MAP_LAYERS) + "), written by `plantation map`. " + NOTICE
            ),
            extent=pystac.Extent(spatial, temporal),
            license="other",
            catalog_type=pystac.CatalogType.SELF_CONTAINED,
            extra_fields={PREFIX + "tiles": len(known), **shared},
        )
        collection.add_asset("manifest", pystac.Asset(href=f"./{MANIFEST}", title="what made each tile (manifest.json)", media_type=pystac.MediaType.JSON, roles=["metadata"]))
        doc = collection.to_dict(include_self_link=False, transform_hrefs=False)
        doc["links"] = self._links(item=False) + [{"rel": "item", "href": f"./{ITEMS}/{tile}.json", "type": pystac.MediaType.GEOJSON} for tile in self._known]
        return doc


def write_collection(folder: str | Path, tiles: Mapping[str, Mapping[str, Any]] | None = None, *, name: str | None = None) -> Path:
    """Write ``collection.json`` and ``stac/<tile>.json`` for a map folder's finished tiles (its manifest's, or ``tiles``); returns the Collection's path.

    A one-off :meth:`Catalogue.update`: Items already written for unchanged
    tiles are kept. ``name`` is the Collection's id (default: the folder's name).
    """
    return Catalogue(folder, name=name).update(tiles)
