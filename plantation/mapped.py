"""A mapped region folder as the assessment reads it: the finished tiles of ``manifest.json``, checked.

The folder is what :mod:`plantation.mapping` writes: one COG per tile with
the bands of :data:`plantation.mapping.LAYERS` and a ``manifest.json`` that
records each finished tile's file and sha256. Sampling, assessment and the
plot report all open it through :func:`open_map`, so they agree on which
tiles exist and refuse a map changed after it was made.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import rasterio

from plantation.errors import InputNotFoundError, PlantationError, RegionError
from plantation.region import Grid


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


def sha256_of(*paths: Path) -> str:
    """sha256 over the bytes of one or more files, in order: the mapping job's digest, so the two compare."""
    from plantation.mapping import file_digest

    return file_digest(list(paths))


def open_map(folder: str | Path, *, verify: bool = True) -> MappedRegion:
    """Read ``manifest.json`` of a mapped region and check each tile's file.

    Args:
        folder: the mapped region folder (``out_dir`` of scripts/map.py).
        verify: compare every tile's bytes with the sha256 in the manifest.

    Raises:
        InputNotFoundError: no folder, manifest or tile file.
        PlantationError: the manifest is not a map manifest; a file's bytes
            differ from it; a tile lacks the mapped layers or the
            ``cutoff_year`` tag; the tiles disagree on the cutoff year.
        RegionError: a tile's grid is rotated or not north-up.
    """
    from plantation.mapping import BAND, FORMAT, LAYERS

    folder = Path(folder)
    man = folder / "manifest.json"
    if not man.is_file():
        raise InputNotFoundError(f"{folder}: no mapped region here (no manifest.json); map the region with scripts/map.py")
    try:
        raw = json.loads(man.read_text())
    except json.JSONDecodeError as exc:
        raise PlantationError(f"{man}: not valid JSON ({exc.msg}, line {exc.lineno})") from None
    if raw.get("format") != FORMAT:
        raise PlantationError(f"{man}: format {raw.get('format')!r}, expected {FORMAT!r} (a manifest written by scripts/map.py)")
    if not raw.get("tiles"):
        raise PlantationError(f"{man}: lists no finished tile; map the region with scripts/map.py")
    names = tuple(name for name, _, _ in LAYERS)
    band = BAND["p_after_cutoff"] - 1
    tiles: list[MapTile] = []
    converted: dict[int, float] = {}
    models: set[tuple[str, str]] = set()
    for name in sorted(raw["tiles"]):
        e = raw["tiles"][name]
        path = folder / e["file"]
        if not path.is_file():
            raise InputNotFoundError(f"{path}: tile {name!r} of {man} is missing; map the region again with scripts/map.py")
        digest = sha256_of(path) if verify else str(e.get("sha256", ""))
        if verify and digest != e.get("sha256"):
            raise PlantationError(f"{path}: its bytes differ from the manifest (sha256); the map was changed after mapping, map it again")
        with rasterio.open(path) as src:
            if tuple(src.descriptions) != names:
                raise PlantationError(f"{path}: bands {list(src.descriptions)}, expected {list(names)} (a map written by scripts/map.py)")
            tag = str(src.tags().get("cutoff_year", "")).strip()
            if not tag.lstrip("-").isdigit():
                raise PlantationError(f"{path}: no cutoff_year tag; map the region again with scripts/map.py")
            grid = Grid(src.crs, src.transform, src.height, src.width)
            tile = MapTile(name, path, digest, grid, int(tag), float(src.scales[band]), float(src.offsets[band]))
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
