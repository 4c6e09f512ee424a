"""Shared fixtures: tiny regions built in code with a known answer."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine

from plantation.imagery.config import LabelsConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig

ROOT = Path(__file__).resolve().parents[1]
BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]
#: A small grid in UTM zone 50N near the equator (a fictional place).
CRS = "EPSG:32650"
TRANSFORM = Affine(30.0, 0.0, 600000.0, 0.0, -30.0, 200010.0)
DATES = ["2015-02-14", "2015-08-15", "2016-02-14", "2016-08-15", "2017-08-15"]


def write_stack(folder: Path, dates: list[str], values: np.ndarray, qa: np.ndarray | None = None, *, crs: str | None = CRS, transform: Affine = TRANSFORM, nodata: float | None = -9999) -> Path:
    """Write one GeoTIFF per date: ``values`` (time, band, y, x) int16, QA (time, y, x) as the last band."""
    folder.mkdir(parents=True, exist_ok=True)
    t, b, h, w = values.shape
    for k, d in enumerate(dates):
        count = b + (1 if qa is not None else 0)
        prof = {"driver": "GTiff", "width": w, "height": h, "count": count, "dtype": "int16", "transform": transform, "nodata": nodata}
        if crs is not None:
            prof["crs"] = crs
        with rasterio.open(folder / f"scene_{d}.tif", "w", **prof) as dst:
            dst.write(values[k].astype(np.int16), indexes=list(range(1, b + 1)))
            if qa is not None:
                dst.write(qa[k].astype(np.int16), indexes=b + 1)
    return folder


@pytest.fixture
def tiny_values() -> np.ndarray:
    """(5 dates, 6 bands, 8, 8) stored integers: reflectance × 10000 with a known pattern."""
    rng = np.random.default_rng(3)
    base = np.array([300, 500, 250, 3500, 1800, 700], dtype=np.int16)  # forest-like
    v = np.broadcast_to(base[None, :, None, None], (5, 6, 8, 8)).copy()
    v += rng.integers(-20, 20, v.shape).astype(np.int16)
    return v


@pytest.fixture
def make_region(tmp_path: Path, tiny_values: np.ndarray) -> Callable[..., RegionConfig]:
    """Build a one-tile GeoTIFF-folder region; keyword overrides change the files or config."""

    def _make(values: np.ndarray | None = None, qa: np.ndarray | None = None, dates: list[str] | None = None, labels: Path | None = None, **cfg: object) -> RegionConfig:
        vals = tiny_values if values is None else values
        q = np.zeros((vals.shape[0], vals.shape[2], vals.shape[3]), np.int16) if qa is None else qa
        folder = write_stack(tmp_path / "t1", dates or DATES, vals, q)
        base = {
            "name": "tiny",
            "tiles": [TileConfig(name="t1", path=str(folder))],
            "bands": BANDS,
            "nodata": -9999,
            "mask": MaskConfig(band=7, invalid_bits=[0, 1, 2]),
            "scaling": [ScalingRule(start=None, scale=1e-4, offset=0.0)],
            "labels": LabelsConfig(path=str(labels) if labels else None, crs=CRS),
            "chunk": 4,
        }
        base.update(cfg)
        return RegionConfig(**base)  # type: ignore[arg-type]

    return _make


def pixel_centre(row: int, col: int, transform: Affine = TRANSFORM) -> tuple[float, float]:
    """CRS coordinates of a pixel's centre."""
    x, y = transform * (col + 0.5, row + 0.5)
    return float(x), float(y)


def write_map_tile(path: Path, bands: np.ndarray, *, crs: str, transform: Affine, tags: dict[str, str], **profile: object) -> Path:
    """A map tile as the mapping job writes it: int16 bands of ``LAYERS`` with their names, units, scales, nodata and dataset ``tags``."""
    from plantation.mapping.folder import LAYERS, NODATA, describe_layers

    h, w = bands.shape[1:]
    prof = {"driver": "GTiff", "width": w, "height": h, "count": len(LAYERS), "dtype": "int16", "crs": crs, "transform": transform, "nodata": NODATA, **profile}
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(bands)
        describe_layers(dst, LAYERS)
        dst.update_tags(**tags)
    return path
