"""The map folder's format: its layers, ``manifest.json`` and the checked reading of a mapped region.

A mapped region folder holds one Cloud-Optimized GeoTIFF per tile with the
bands of :data:`LAYERS` (all int16, nodata :data:`NODATA`, probabilities
scaled by :data:`SCALE`), a QGIS style and quicklook per tile, and
``manifest.json``, which records each finished tile's file, sha256, key and
areas. This module is the one place that knows that format: the mapping job
writes it through :class:`Manifest`; sampling, assessment and the farm-plot
check read it through :func:`open_map`, so they agree on which tiles exist
and refuse a map changed after it was made; the report, which must build
without a map folder, through :func:`read_manifest` (the one parser of the
file, which the other two use too). It never imports torch.

Output layers:

=====  ==============  =====================================================
band   description     content
=====  ==============  =====================================================
1      class           1 stable natural forest, 2 converted to plantation
                       during the series, 3 plantation before the series,
                       4 other land or disturbance (codes of
                       :data:`plantation.reference.labels.LABEL_CODES`)
2      onset_year      modal conversion year; 0 where no conversion is mapped
3, 4   onset_lo/hi     the interval of conversion years (level from the
                       model card or config); 0 where no conversion
5      p_conversion    probability of conversion in any year (× 1e-4)
6      p_after_cutoff  probability of conversion after the cutoff year (× 1e-4)
7      epistemic       ensemble disagreement, mutual information in nats (× 1e-4; the distilled network's estimate of it, by default)
8      clear_dates     dates on which the pixel was observed (never nodata)
9      fire            fire in the clearing (:data:`FIRE_LAYERS`): 0 not
                       converted and no escaped fire, 1 converted and
                       cleared with fire, 2 converted and cleared without
                       fire, 3 converted and fire unknown (no clear view
                       close enough after the clearing), 4 forest burnt by
                       fire escaped from a clearing
10     fire_year       year of the fire (the onset year of a burnt clearing,
                       the year of an escaped fire); 0 where none
11     dnbr            the clearing's dNBR (Key & Benson 2006; × 1e-4),
                       last clear view before minus first after; nodata
                       where no clearing was seen
=====  ==============  =====================================================

Bands 1–7 and 9–11 hold :data:`NODATA` where a pixel has fewer than
``min_clear`` clear dates. Bands 9–11 (:data:`FIRE_LAYERS`) come after the
eight of :data:`LAYERS`, so readers by band index keep working; maps made
before them have the eight only (:attr:`MapTile.has_fire`).

A tile whose probabilities were corrected after mapping (`plantation
recalibrate`, :mod:`plantation.assessment.recalibrate`) carries the
correction as JSON in its :data:`CORRECTION_TAG` tag and in its manifest
entry; a tile without it holds the probabilities as the model gave them
(:func:`describe_correction`).
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.shutil

from plantation import __version__
from plantation.errors import FileFormatError, InputNotFoundError, PlantationError, RegionError
from plantation.imagery.region import Grid
from plantation.mapping.fire import FIRE_CODES, FIRE_MEANING
from plantation.model.calibration import apply_recalibration
from plantation.records import load_object

FORMAT = "plantation-map/1"
#: The manifest's file name in a mapped region folder.
MANIFEST = "manifest.json"
NODATA = -32768
#: Scaled layers store round(value / SCALE).
SCALE = 1e-4

#: (description, GDAL scale, units) per band, in band order.
LAYERS: tuple[tuple[str, float, str], ...] = (
    ("class", 1.0, "code"),
    ("onset_year", 1.0, "year"),
    ("onset_lo", 1.0, "year"),
    ("onset_hi", 1.0, "year"),
    ("p_conversion", SCALE, "probability"),
    ("p_after_cutoff", SCALE, "probability"),
    ("epistemic", SCALE, "nats"),
    ("clear_dates", 1.0, "dates"),
)
#: The fire layers after :data:`LAYERS` (:mod:`plantation.mapping.fire`).
FIRE_LAYERS: tuple[tuple[str, float, str], ...] = (
    ("fire", 1.0, "code"),
    ("fire_year", 1.0, "year"),
    ("dnbr", SCALE, "dNBR"),
)
#: Every layer the mapping job writes, in band order.
MAP_LAYERS: tuple[tuple[str, float, str], ...] = LAYERS + FIRE_LAYERS


def describe_layers(dst: Any, layers: tuple[tuple[str, float, str], ...] = MAP_LAYERS) -> None:
    """Name, unit, scale and offset of each band of a map tile open for writing (``layers`` in band order)."""
    for i, (name, _, units) in enumerate(layers, start=1):
        dst.set_band_description(i, name)
        dst.update_tags(i, units=units)
    dst.scales = [s for _, s, _ in layers]
    dst.offsets = [0.0] * len(layers)


BAND = {name: i + 1 for i, (name, _, _) in enumerate(MAP_LAYERS)}
#: What each layer holds, in words (the layer table above, for catalogues and band descriptions).
LAYER_MEANING: dict[str, str] = {
    "class": "1 stable natural forest, 2 converted to plantation during the series, 3 plantation before the series, 4 other land or disturbance",
    "onset_year": "modal conversion year; 0 where no conversion is mapped",
    "onset_lo": "first year of the interval of conversion years (level in the interval_level tag); 0 where no conversion",
    "onset_hi": "last year of the interval of conversion years (level in the interval_level tag); 0 where no conversion",
    "p_conversion": "probability of conversion in any year of the series",
    "p_after_cutoff": "probability of conversion after the cutoff year (cutoff_year tag)",
    "epistemic": "ensemble disagreement: mutual information of the members, in nats (the distilled network's estimate of it, by default)",
    "clear_dates": "dates on which the pixel was observed clear (never nodata)",
    "fire": FIRE_MEANING,
    "fire_year": "year of the fire: the onset year of a clearing cleared with fire, the year of the first clear view after an escaped fire; 0 where none",
    "dnbr": "the clearing's dNBR (Key & Benson 2006): NBR at the last clear view before it minus NBR at the first after; nodata where no clearing was seen",
}
#: Fire codes by name (:data:`plantation.mapping.fire.FIRE_CODES`), for the map's readers.
FIRE = FIRE_CODES

#: GeoTIFF tag (dataset level) and manifest entry key of a probability correction applied after mapping.
CORRECTION_TAG = "probability_correction"
#: Key of the recalibration inside :data:`CORRECTION_TAG`, beside the model's own ``prior`` (its source) and ``target_prior_groups``.
RECALIBRATION = "recalibration"
#: What a map without a correction carries.
NO_CORRECTION = "none: probabilities refer to the reference sample's class mix"

NOTICE = (
    "Probabilistic evidence of conversion from satellite imagery, not a finding about any plot or person. "
    "Verify with high-resolution imagery and field checks, under local law and licensed practice, before acting on it."
)


@dataclass
class TileResult:
    """What mapping one tile produced.

    ``converted_ha`` maps onset year → hectares mapped as converted in that
    year (pixel areas from the grid's CRS).
    """

    tile: str
    file: str
    key: str
    sha256: str
    pixels: int
    mapped_pixels: int
    converted_ha: dict[int, float]
    after_cutoff_ha: float
    seconds: float
    finished: str = ""
    #: The model folder and the sha256 over its two files (provenance for the assessment).
    model: str = ""
    model_sha256: str = ""
    #: The probability correction the tile carries (:data:`CORRECTION_TAG`); None for maps made before it was recorded.
    probability_correction: dict[str, Any] | None = None
    #: Hectares of each fire code but ``none`` (names of :data:`FIRE`); empty for maps made before the fire layers.
    fire_ha: dict[str, float] = field(default_factory=dict)
    #: Hectares mapped as converted with fire whose fire year is after the cutoff year.
    fire_after_cutoff_ha: float = 0.0


def file_digest(paths: Sequence[Path]) -> str:
    """sha256 over the bytes of files, in order."""
    h = hashlib.sha256()
    for p in paths:
        with open(p, "rb") as f:
            for block in iter(lambda f=f: f.read(1 << 20), b""):
                h.update(block)
    return h.hexdigest()


def write_cog(src: Path, dest: Path) -> None:
    """Convert a finished tiled GeoTIFF into a COG at ``dest`` (through a temporary name), with the mapping job's options.

    256-px blocks, DEFLATE with the horizontal predictor, overviews by
    nearest-neighbour resampling for every band: averaging would invent
    classes and years that never existed, and a nearest probability is still
    one some pixel has. Used by the mapping job and by recalibration.
    """
    tmp = dest.with_name(f".{dest.name}.partial")
    try:
        rasterio.shutil.copy(src, tmp, driver="COG", COMPRESS="DEFLATE", PREDICTOR="2", BLOCKSIZE="256", OVERVIEW_RESAMPLING="NEAREST", BIGTIFF="IF_SAFER", NUM_THREADS="2")
        os.replace(tmp, dest)
    finally:
        tmp.unlink(missing_ok=True)


def describe_correction(correction: dict[str, Any] | None) -> str:
    """One line saying which probability correction a map carries (None: the model's probabilities, for the sample's class mix).

    ``correction`` holds the model's prior (``prior``: sample, shares,
    inclusion or bbse, with ``target_prior_groups``), written at mapping
    time, and a :data:`RECALIBRATION` added by ``plantation recalibrate``.
    """
    if not correction:
        return NO_CORRECTION
    prior = correction.get("prior")
    recal = correction.get(RECALIBRATION)
    if prior in (None, "sample"):
        parts = [NO_CORRECTION if not recal else "model probabilities for the reference sample's class mix"]
    else:
        share = (correction.get("target_prior_groups") or {}).get("conversion")
        parts = [f"prior shifted to the region's class mix ({prior}" + (f"; conversion share {float(share):.3f})" if share is not None else ")")]
    if recal:
        n = recal.get("n", "?")
        date = str(recal.get("date", "?"))[:10]
        parts.append(f"then {recal.get('method', 'recalibrated')} from a probability sample of {n} points ({date}); class, onset year and its interval are as the model gave them")
    return "; ".join(parts)


def encode_probability(p: np.ndarray, scale: float, offset: float) -> np.ndarray:
    """Probabilities as stored int16 values (p = stored × scale + offset), clipped to the codes of [0, 1]."""
    lo, hi = round((0.0 - offset) / scale), round((1.0 - offset) / scale)
    return np.clip(np.rint((np.asarray(p, dtype=np.float64) - offset) / scale), lo, hi).astype(np.int16)


def recalibrate_stored(
    conv: np.ndarray, after: np.ndarray, scales: tuple[float, float], offsets: tuple[float, float], recalibration: dict[str, Any], *, noted: float = 0.01
) -> tuple[np.ndarray, np.ndarray, int]:
    """Stored p_conversion and p_after_cutoff values (int16, valid pixels only) with a :data:`RECALIBRATION` applied.

    The correction acts on the probabilities as stored (decoded, corrected,
    encoded again), so a map recalibrated after it was written and one
    mapped with the correction from the start hold the same values.
    p_after_cutoff is capped at p_conversion where the two fits cross (a
    conversion after the cutoff is a conversion).

    Args:
        conv, after: stored values of bands p_conversion and p_after_cutoff.
        scales, offsets: the two bands' scale and offset.
        recalibration: a record with ``coef_conversion`` and
            ``coef_after_cutoff``, each [a, b] of p' = sigmoid(a + b·logit p).
        noted: a cap lowering p_after_cutoff by more than this is counted.

    Returns:
        (p_conversion, p_after_cutoff) stored, and the pixels capped by more than ``noted``.
    """
    pc = apply_recalibration(conv * scales[0] + offsets[0], tuple(recalibration["coef_conversion"]))
    pa = apply_recalibration(after * scales[1] + offsets[1], tuple(recalibration["coef_after_cutoff"]))
    capped = int((pa - pc > noted).sum())
    return encode_probability(pc, scales[0], offsets[0]), encode_probability(np.minimum(pa, pc), scales[1], offsets[1]), capped


def read_correction(tags: dict[str, str], where: str | Path) -> dict[str, Any] | None:
    """The :data:`CORRECTION_TAG` of a tile's tags as an object, or None when absent.

    Raises:
        FileFormatError: the tag is not a JSON object.
    """
    text = tags.get(CORRECTION_TAG)
    if not text:
        return None
    try:
        value = json.loads(text)
    except json.JSONDecodeError:
        value = None
    if not isinstance(value, dict):
        raise FileFormatError(f"{where}: its {CORRECTION_TAG} tag is not a JSON object; restore the tile or map the region again with `plantation map`")
    return value


def read_manifest(path: str | Path) -> dict[str, Any] | None:
    """``manifest.json`` of a mapped region as written, or None when there is none.

    Tolerant of absence (a region not mapped yet; a report built without its
    map folder), strict about content. The one reader of the file: the
    mapping job (:class:`Manifest`), :func:`open_map` and the report use it.

    Args:
        path: the mapped region folder, or the manifest file itself (a path ending in ``.json``).

    Returns:
        ``{"format": ..., "producer": ..., "tiles": {name: entry}}``, each
        entry an object with at least ``file``; None if the file does not exist.

    Raises:
        FileFormatError: it is not valid JSON, not a map manifest (its
            ``format``), or a tile entry is malformed; one line naming the file.
    """
    p = Path(path)
    if p.suffix.lower() != ".json":
        p = p / MANIFEST
    if not p.is_file():
        return None
    again = "delete it and map the region again with `plantation map`"
    raw = load_object(p, what="a map manifest", again=again)
    if raw.get("format") != FORMAT:
        got = raw.get("format")
        raise FileFormatError(f"{p}: format {got!r}, expected {FORMAT!r} (a manifest written by `plantation map`); is this a mapped region folder?")
    tiles = raw.setdefault("tiles", {})
    if not isinstance(tiles, dict):
        raise FileFormatError(f"{p}: 'tiles' is a JSON {type(tiles).__name__}, expected an object; {again}")
    for name, e in tiles.items():
        if not isinstance(e, dict) or not isinstance(e.get("file"), str) or not e["file"]:
            raise FileFormatError(f"{p}: tile {name!r} has no 'file' entry; {again}")
        conv = e.get("converted_ha", {})
        if not isinstance(conv, dict) or not all(str(y).strip().lstrip("-").isdigit() and isinstance(a, int | float) and not isinstance(a, bool) for y, a in conv.items()):
            raise FileFormatError(f"{p}: tile {name!r} has a 'converted_ha' that is not {{year: hectares}}; {again}")
    return raw


class Manifest:
    """``manifest.json`` in the output folder: what made each finished tile.

    Only the process driving the run writes it, atomically, after a tile's
    files are all in place, so an entry always describes complete files.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        raw = read_manifest(path)
        self.tiles: dict[str, dict[str, Any]] = raw["tiles"] if raw is not None else {}

    def finished(self, name: str, key: str, folder: Path) -> TileResult | None:
        """The recorded result if tile ``name`` was finished with ``key`` and its file is intact."""
        e = self.tiles.get(name)
        if not e or e.get("key") != key:
            return None
        f = folder / e["file"]
        if not f.is_file() or file_digest([f]) != e.get("sha256"):
            return None
        r = TileResult(**e)
        r.converted_ha = {int(k): v for k, v in r.converted_ha.items()}
        return r

    def record(self, result: TileResult) -> None:
        self.tiles[result.tile] = asdict(result)
        tmp = self.path.with_name(self.path.name + ".partial")
        tmp.write_text(json.dumps({"format": FORMAT, "producer": f"plantation {__version__}", "tiles": self.tiles}, indent=1, sort_keys=True))
        os.replace(tmp, self.path)


@dataclass
class MapTile:
    """One finished tile: its file, bytes' sha256, grid and the scale of its p_after_cutoff band."""

    name: str
    path: Path
    sha256: str
    grid: Grid
    cutoff_year: int
    #: p_after_cutoff = stored × scale + offset.
    scale: float
    offset: float
    #: The probability correction applied after mapping (its :data:`CORRECTION_TAG`); None: the probabilities as the model gave them.
    correction: dict[str, Any] | None = None
    #: The tile has the fire layers (:data:`FIRE_LAYERS`); maps made before them have not.
    has_fire: bool = False


@dataclass
class MappedRegion:
    """The tiles of a mapped region, sorted by name.

    ``converted_ha`` is the map's pixel-count area mapped as converted by
    onset year, summed over tiles (its keys are the years the map can hold);
    ``model`` and ``model_sha256`` what made it, where recorded.
    """

    folder: Path
    tiles: list[MapTile]
    cutoff_year: int
    converted_ha: dict[int, float]
    manifest_sha256: str
    model: str | None = None
    model_sha256: str | None = None

    @property
    def years(self) -> list[int]:
        return sorted(self.converted_ha)

    @property
    def correction(self) -> dict[str, Any] | None:
        """The probability correction the tiles carry (:attr:`MapTile.correction`); the first tile's if they differ."""
        return self.tiles[0].correction if self.tiles else None

    def correction_text(self) -> str:
        """One line on the probability correction the map carries, for the farm-plot outputs and the report."""
        texts = sorted({describe_correction(t.correction) for t in self.tiles})
        if len(texts) <= 1:
            return texts[0] if texts else NO_CORRECTION
        return "mixed across tiles: " + "; ".join(f"{t.name}: {describe_correction(t.correction)}" for t in self.tiles)


def sha256_of(*paths: Path) -> str:
    """sha256 over the bytes of one or more files, in order: the mapping job's digest, so the two compare."""
    return file_digest(list(paths))


def open_map(folder: str | Path, *, verify: bool = True) -> MappedRegion:
    """Read ``manifest.json`` of a mapped region and check each tile's file.

    Args:
        folder: the mapped region folder (``out_dir`` of `plantation map`).
        verify: compare every tile's bytes with the sha256 in the manifest.

    Raises:
        InputNotFoundError: no folder, manifest or tile file.
        PlantationError: a file's bytes differ from the manifest; a tile
            lacks the mapped layers or the ``cutoff_year`` tag; the tiles
            disagree on the cutoff year.
        FileFormatError: the manifest is malformed or not a map manifest
            (:func:`read_manifest`); a tile's grid is rotated or not north-up.
    """
    folder = Path(folder)
    man = folder / MANIFEST
    raw = read_manifest(man)
    if raw is None:
        raise InputNotFoundError(f"{folder.absolute()}: no mapped region here (no manifest.json); map the region with `plantation map`")
    if not raw["tiles"]:
        raise PlantationError(f"{man}: lists no finished tile; map the region with `plantation map`")
    names = tuple(name for name, _, _ in LAYERS)
    with_fire = tuple(name for name, _, _ in MAP_LAYERS)
    band = BAND["p_after_cutoff"] - 1
    tiles: list[MapTile] = []
    converted: dict[int, float] = {}
    models: set[tuple[str, str]] = set()
    for name in sorted(raw["tiles"]):
        e = raw["tiles"][name]
        path = folder / e["file"]
        if not path.is_file():
            raise InputNotFoundError(f"{path.absolute()}: tile {name!r} of {man} is missing; map the region again with `plantation map`")
        digest = sha256_of(path) if verify else str(e.get("sha256", ""))
        if verify and digest != e.get("sha256"):
            raise PlantationError(f"{path}: its bytes differ from the manifest (sha256); the map was changed after mapping, map it again")
        with rasterio.open(path) as src:
            if tuple(src.descriptions) not in (names, with_fire):
                raise PlantationError(f"{path}: bands {list(src.descriptions)}, expected {list(with_fire)} (a map written by `plantation map`)")
            tag = str(src.tags().get("cutoff_year", "")).strip()
            if not tag.lstrip("-").isdigit():
                raise PlantationError(f"{path}: no cutoff_year tag; map the region again with `plantation map`")
            grid = Grid(src.crs, src.transform, src.height, src.width)
            tile = MapTile(name, path, digest, grid, int(tag), float(src.scales[band]), float(src.offsets[band]), read_correction(src.tags(), path), src.count == len(with_fire))
        t = grid.transform
        if t.b != 0 or t.d != 0 or t.a <= 0 or t.e >= 0:
            raise RegionError(f"{path}: the grid is rotated or not north-up; reproject the map to a north-up grid first")
        tiles.append(tile)
        for y, a in e.get("converted_ha", {}).items():
            converted[int(y)] = converted.get(int(y), 0.0) + float(a)
        if e.get("model"):
            models.add((str(e["model"]), str(e.get("model_sha256", ""))))
    cutoffs = sorted({t.cutoff_year for t in tiles})
    if len(cutoffs) != 1:
        raise PlantationError(f"{folder}: tiles were mapped with different cutoff years {cutoffs}; map them again with one cutoff_year")
    model, model_sha = models.pop() if len(models) == 1 else (None, None)
    return MappedRegion(folder, tiles, cutoffs[0], dict(sorted(converted.items())), sha256_of(man), model, model_sha)
