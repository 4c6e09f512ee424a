"""The map folder's STAC Collection: one Item per tile, read back by pystac and checked against the COGs themselves.

Sources of the checks: the STAC specification v1.0/1.1 (Item, Collection, links, self-contained
catalogues), the projection extension v2.0 (``proj:code``, ``proj:shape``, ``proj:transform``,
``proj:bbox``), the raster extension v1.1 (``raster:bands``), the classification extension v2.0
(``classification:classes``), the file extension v2.1 (``file:checksum`` as a sha2-256 multihash).
pystac validates against the JSON schemas only with ``jsonschema`` and the schemas fetched over the
network, which tests do not do; the structure is checked by reading the files back with pystac
instead, and the values against the rasters read with rasterio.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pystac
import pytest
import rasterio
from pystac.extensions.classification import ClassificationExtension
from pystac.extensions.projection import ProjectionExtension
from pystac.extensions.raster import RasterExtension
from rasterio.warp import transform_bounds

from plantation.errors import FileFormatError
from plantation.mapping.catalog import COLLECTION, DENSIFY, ITEMS, layer_notes, write_collection
from plantation.mapping.fire import FIRE_CODES
from plantation.mapping.folder import BAND, MANIFEST, MAP_LAYERS
from plantation.mapping.job import run
from plantation.mapping.styles import CLASS_STYLE, FIRE_STYLE
from plantation.reference.labels import LABEL_CODES
from tests.test_mapping import YEARS, _cfg, model_dir, region  # noqa: F401 (fixtures)


@pytest.fixture
def mapped(region, model_dir, tmp_path) -> Path:  # noqa: F811
    out = tmp_path / "out"
    run(_cfg(region, model_dir, out, quicklook=True))
    return out


def _texts(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): p.read_text() for p in [folder / COLLECTION, *sorted((folder / ITEMS).glob("*"))]}


def test_collection_reads_back_with_one_item_per_tile_and_relative_hrefs(mapped):
    col = pystac.read_file(str(mapped / COLLECTION))
    assert isinstance(col, pystac.Collection) and col.id == "tinymap"
    items = sorted(col.get_items(), key=lambda it: it.id)
    # STAC spec: one Item per finished tile, each linked back to its Collection.
    assert [it.id for it in items] == sorted(json.loads((mapped / MANIFEST).read_text())["tiles"]) == ["t0", "t1"]
    assert all(it.collection_id == col.id for it in items)
    assert sorted(p.name for p in (mapped / ITEMS).iterdir()) == ["t0.json", "t1.json"]
    # STAC best practices: a self-contained catalogue has no self links and only relative hrefs, so it can be moved.
    assert pystac.CatalogType.determine_type(json.loads((mapped / COLLECTION).read_text())) == pystac.CatalogType.SELF_CONTAINED
    for name, text in _texts(mapped).items():
        doc = json.loads(text)
        assert str(mapped) not in text, name
        assert all(link["rel"] != "self" and not link["href"].startswith("/") for link in doc["links"]), name
    for it in items:
        # STAC spec: a period instead of a datetime; the series' years, first to last.
        assert it.datetime is None
        assert (it.common_metadata.start_datetime.isoformat(), it.common_metadata.end_datetime.isoformat()) == (f"{YEARS[0]}-01-01T00:00:00+00:00", f"{YEARS[-1]}-12-31T23:59:59+00:00")
        assert ProjectionExtension.has_extension(it) and RasterExtension.has_extension(it) and ClassificationExtension.has_extension(it)
        assert "https://stac-extensions.github.io/projection/v2.0.0/schema.json" in it.stac_extensions
        assert not any("/eo/" in uri for uri in it.stac_extensions)  # map layers, not reflectance


def test_item_projection_bbox_and_assets_are_the_files_own(mapped):
    col = pystac.Collection.from_file(str(mapped / COLLECTION))
    for it in col.get_items():
        data = it.assets["data"]
        assert data.roles == ["data"] and data.media_type == pystac.MediaType.COG
        with rasterio.open(data.get_absolute_href()) as src:
            proj = ProjectionExtension.ext(it)
            # Projection extension v2: code, shape (rows, columns), the six affine coefficients, bounds in the CRS.
            assert proj.code == f"EPSG:{src.crs.to_epsg()}"
            # Kept beside proj:code for readers of the extension's v1 (pystac drops it when reading, so read the JSON).
            assert json.loads((mapped / ITEMS / f"{it.id}.json").read_text())["properties"]["proj:epsg"] == src.crs.to_epsg()
            assert proj.shape == [src.height, src.width]
            assert proj.transform == list(src.transform)[:6]
            assert proj.bbox == list(src.bounds)
            # STAC spec: bbox and geometry in WGS84, enclosing the tile's bounds reprojected with as many edge points.
            want = transform_bounds(src.crs, "EPSG:4326", *src.bounds, densify_pts=DENSIFY)
            np.testing.assert_allclose(it.bbox, want, atol=1e-9)
            ring = np.array(it.geometry["coordinates"][0])
            assert ring[:, 0].min() == pytest.approx(it.bbox[0]) and ring[:, 1].max() == pytest.approx(it.bbox[3])
            digest = hashlib.sha256(Path(src.name).read_bytes()).hexdigest()
        # File extension: the sha2-256 multihash of the bytes, and the size.
        assert data.extra_fields["file:checksum"] == "1220" + digest and data.extra_fields["file:size"] == Path(data.get_absolute_href()).stat().st_size
        # Every asset opens: the styles are QGIS documents, the quicklook a PNG.
        roles = {key: a.roles for key, a in it.assets.items()}
        styles = ("style", "style_onset_year", "style_p_after_cutoff", "style_fire", "style_dnbr")
        assert roles == {"data": ["data"], **dict.fromkeys(styles, ["metadata"]), "quicklook": ["overview"]}
        for key in styles:
            assert ET.parse(it.assets[key].get_absolute_href()).getroot().tag == "qgis"
        assert Path(it.assets["quicklook"].get_absolute_href()).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        assert ET.parse(it.assets["style"].get_absolute_href()).find(".//rasterrenderer").get("band") == str(BAND["class"])


def test_bands_describe_the_layers_and_the_class_band_carries_the_map_codes(mapped):
    col = pystac.Collection.from_file(str(mapped / COLLECTION))
    notes = layer_notes()
    assert set(notes) == {name for name, _, _ in MAP_LAYERS}  # the layer table describes every band
    for it in col.get_items():
        data = it.assets["data"]
        bands = RasterExtension.ext(data).bands
        with rasterio.open(data.get_absolute_href()) as src:
            # STAC 1.1 bands: the layer names the COG itself carries, in band order, each with its meaning.
            assert [b["name"] for b in data.extra_fields["bands"]] == list(src.descriptions)
            assert all(b["description"] == notes[b["name"]] for b in data.extra_fields["bands"])
            # Raster extension: data type, nodata, scale and offset of each band as the file has them.
            assert [str(b.data_type) for b in bands] == list(src.dtypes)
            assert [b.nodata for b in bands] == list(src.nodatavals)
            for i, b in enumerate(bands):
                if src.scales[i] != 1.0:
                    assert (b.scale, b.offset) == (src.scales[i], src.offsets[i])
                else:
                    assert b.scale is None and b.offset is None
            assert [b.unit for b in bands] == [u for _, _, u in MAP_LAYERS]
            classes = src.read(BAND["class"], masked=True)
            fire = src.read(BAND["fire"], masked=True)
        # Classification extension: the class band's values are the codes the map writes, named and coloured as its QGIS style.
        cls = ClassificationExtension.ext(bands[BAND["class"] - 1]).classes
        assert [c.value for c in cls] == sorted(LABEL_CODES.values()) == sorted(CLASS_STYLE)
        assert {c.name: c.value for c in cls} == LABEL_CODES
        assert [f"#{c.color_hint}".lower() for c in cls] == [CLASS_STYLE[c.value][1] for c in cls]
        assert set(np.unique(classes.compressed())) <= {c.value for c in cls} and classes.count() > 0
        # The fire band's classes: the fire codes the map writes, coloured as its QGIS style (code 0 is not drawn, so has no colour).
        fcls = ClassificationExtension.ext(bands[BAND["fire"] - 1]).classes
        assert {c.name: c.value for c in fcls} == FIRE_CODES
        assert all((f"#{c.color_hint}".lower() if c.color_hint else None) == (FIRE_STYLE[c.value][1].lower() if c.value in FIRE_STYLE else None) for c in fcls)
        assert set(np.unique(fire.compressed())) <= set(FIRE_CODES.values()) and fire.count() > 0
        assert all(ClassificationExtension.ext(b).classes is None for i, b in enumerate(bands) if i not in (BAND["class"] - 1, BAND["fire"] - 1))
        assert "conversion year" in notes["onset_year"]


def test_collection_extent_covers_every_item_and_records_what_made_the_map(mapped):
    col = pystac.Collection.from_file(str(mapped / COLLECTION))
    (box,) = col.extent.spatial.bboxes
    ((start, end),) = col.extent.temporal.intervals
    manifest = json.loads((mapped / MANIFEST).read_text())["tiles"]
    for it in col.get_items():
        # STAC spec (Collection extent): every Item's bbox and period lie inside the Collection's.
        assert box[0] <= it.bbox[0] and box[1] <= it.bbox[1] and it.bbox[2] <= box[2] and it.bbox[3] <= box[3]
        assert start <= it.common_metadata.start_datetime and it.common_metadata.end_datetime <= end
        with rasterio.open(it.assets["data"].get_absolute_href()) as src:
            tags = src.tags()
        assert it.properties["plantation:cutoff_year"] == int(tags["cutoff_year"]) == 2015
        assert it.properties["plantation:interval_level"] == float(tags["interval_level"]) == 0.8
        assert it.properties["plantation:probability_correction"] == json.loads(tags["probability_correction"])
        assert it.properties["plantation:model_sha256"] == manifest[it.id]["model_sha256"]
    # What every tile shares is said once for the region.
    assert col.extra_fields["plantation:model_sha256"] == manifest["t0"]["model_sha256"]
    assert col.extra_fields["plantation:cutoff_year"] == 2015 and col.extra_fields["plantation:interval_level"] == 0.8
    assert col.assets["manifest"].get_absolute_href() == str(mapped / MANIFEST)


def test_a_resumed_run_ends_with_the_clean_runs_collection_and_the_folder_moves(region, model_dir, tmp_path, mapped):  # noqa: F811
    out = tmp_path / "resumed"
    run(_cfg(region, model_dir, out, quicklook=True, tiles=["t1"]))
    # The Collection covers exactly the tiles done.
    assert [it.id for it in pystac.Collection.from_file(str(out / COLLECTION)).get_items()] == ["t1"]
    run(_cfg(region, model_dir, out, quicklook=True))
    assert _texts(out) == _texts(mapped)
    # Run again with nothing to do: the same files.
    run(_cfg(region, model_dir, out, quicklook=True))
    assert _texts(out) == _texts(mapped)
    # Moved elsewhere, every asset still opens.
    moved = shutil.copytree(out, tmp_path / "elsewhere" / "map")
    shutil.rmtree(out)
    for it in pystac.Collection.from_file(str(moved / COLLECTION)).get_items():
        with rasterio.open(it.assets["data"].get_absolute_href()) as src:
            assert src.count == len(MAP_LAYERS)


def test_items_follow_the_tiles_bytes(region, model_dir, tmp_path, mapped):  # noqa: F811
    # Tiles mapped again with other settings: their Items say so (the old Items are not kept).
    run(_cfg(region, model_dir, mapped, quicklook=True, min_clear=6))
    manifest = json.loads((mapped / MANIFEST).read_text())["tiles"]
    for it in pystac.Collection.from_file(str(mapped / COLLECTION)).get_items():
        assert it.assets["data"].extra_fields["file:checksum"] == "1220" + manifest[it.id]["sha256"]
        assert it.properties["plantation:min_clear_dates"] == 6
    # Unchanged tiles: their Items are read, not written again.
    stamps = {p.name: p.stat().st_mtime_ns for p in (mapped / ITEMS).iterdir()}
    write_collection(mapped, name="tinymap")
    assert {p.name: p.stat().st_mtime_ns for p in (mapped / ITEMS).iterdir()} == stamps
    # A damaged Item is written again; an Item of a tile the manifest no longer lists is removed.
    (mapped / ITEMS / "t0.json").write_text("{")
    (mapped / ITEMS / "t9.json").write_text("{}")
    write_collection(mapped, name="tinymap")
    assert pystac.Item.from_file(str(mapped / ITEMS / "t0.json")).id == "t0"
    assert sorted(p.name for p in (mapped / ITEMS).iterdir()) == ["t0.json", "t1.json"]


def test_a_folder_without_finished_tiles_is_refused_and_a_tile_that_does_not_open_is_left_out(tmp_path, mapped):
    with pytest.raises(FileFormatError, match="no finished tile"):
        write_collection(tmp_path)
    # A damaged tile without an Item (a folder mapped before the Collection existed): the others are still described.
    shutil.rmtree(mapped / ITEMS)
    (mapped / "t1.tif").write_bytes(b"not a tiff")
    write_collection(mapped, name="tinymap")
    assert [it.id for it in pystac.Collection.from_file(str(mapped / COLLECTION)).get_items()] == ["t0"]
    (mapped / "t0.tif").unlink()
    shutil.rmtree(mapped / ITEMS)
    with pytest.raises(FileFormatError, match="no tile listed in its manifest opens"):
        write_collection(mapped, name="tinymap")


def test_the_catalogue_module_does_not_import_torch():
    res = subprocess.run([sys.executable, "-c", "import sys, plantation.mapping.catalog; print('torch' in sys.modules)"], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "False"
