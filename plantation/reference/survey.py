"""Survey a region before training: what imagery and labels there are, and how clear.

``run`` reads every tile lazily, checks the labels against it, and writes
into one output folder (atomically: built under a temporary name, then
renamed):

* ``survey.json`` — tiles (grid, CRS, dates), clear-view share by date and by
  calendar month, label counts and fingerprint, median index series per label,
  and ``coverage``: per tile the years without one clear pixel on any date and
  the pixels never seen clear, region-wide the years with no clear view on
  any tile, and the tiles without one valid pixel (a year without a clear
  view cannot show a conversion: the map's year there is a guess, and the
  survey warns in one line naming those years);
* ``clear_count_<tile>.tif`` — number of valid observations per pixel
  (int16 GeoTIFF on the tile's grid, opens in QGIS in the tile's CRS);
* ``labels.gpkg`` — the checked reference points in the imagery CRS, with
  their tile, row and column;
* ``index_series.png`` — median NDVI and NBR through time for each label;
* ``clear_views.png`` — clear-view share by month, and a quicklook per tile.
"""

from __future__ import annotations

import json
import logging
import shutil
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio
import xarray as xr

from plantation.errors import ConfigError
from plantation.imagery import indices
from plantation.imagery.config import RegionConfig
from plantation.imagery.region import TileStack, open_region
from plantation.reference.labels import LABEL_NAMES, LabelSet, read_labels

log = logging.getLogger(__name__)


@dataclass
class SurveyConfig:
    """Schema of ``configs/survey.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    out_dir: str = "outputs/survey"
    indices: list[str] = field(default_factory=lambda: ["NDVI", "EVI", "NBR", "NDMI"])


def _sample_points(stack: TileStack, rows: np.ndarray, cols: np.ndarray) -> xr.DataArray:
    """Reflectance at given pixels: DataArray (time, band, point), loaded."""
    r = xr.DataArray(rows, dims="point")
    c = xr.DataArray(cols, dims="point")
    return stack.reflectance.isel(y=r, x=c).compute()


def label_index_series(stacks: list[TileStack], labels: LabelSet, names: list[str]) -> pd.DataFrame:
    """Median of each index per label and date, over the labelled pixels.

    Returns:
        Long table with columns date, label, index, median, n_valid.
    """
    parts = []
    for st in stacks:
        pts = labels.points[labels.points["tile"] == st.name]
        if pts.empty:
            continue
        refl = _sample_points(st, pts["row"].to_numpy(), pts["col"].to_numpy())
        idx = indices.stack_indices(refl, list(refl["band"].values), names)
        parts.append((idx, pts["label"].to_numpy()))
    rows = []
    for lab in LABEL_NAMES:
        arrays = [a.isel(point=np.flatnonzero(lb == lab)) for a, lb in parts if (lb == lab).any()]
        if not arrays:
            continue
        a = xr.concat(arrays, dim="point").values  # (index, time, point)
        times = arrays[0]["time"].values.astype("datetime64[D]")
        for i, name in enumerate(arrays[0]["index"].values):
            n_valid = np.isfinite(a[i]).sum(axis=1)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN dates give NaN
                med = np.nanmedian(a[i], axis=1)
            for t, m, n in zip(times, med, n_valid, strict=True):
                rows.append({"date": str(t), "label": lab, "index": str(name), "median": None if not np.isfinite(m) else float(m), "n_valid": int(n)})
    return pd.DataFrame(rows)


def _write_count(stack: TileStack, path: Path) -> np.ndarray:
    count = stack.valid.sum("time").astype(np.int16).compute().values
    g = stack.grid
    profile = {
        "driver": "GTiff",
        "width": g.width,
        "height": g.height,
        "count": 1,
        "dtype": "int16",
        "crs": g.crs,
        "transform": g.transform,
        "nodata": -1,
        "compress": "deflate",
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(count, 1)
        dst.set_band_description(1, "valid_observations")
    return count


def coverage(stacks: list[TileStack], clear_share: dict[str, np.ndarray], counts: dict[str, np.ndarray]) -> dict:
    """Where and when the imagery never sees the ground.

    Args:
        stacks: the region's tiles (same dates on each).
        clear_share: tile name → float (time,) share of the tile's pixels
            valid on each date, unrounded (one clear pixel of millions counts).
        counts: tile name → int (y, x) valid dates per pixel.

    Returns:
        ``years_without_clear_view``: tile → calendar years whose dates have
        no valid pixel at all; ``years_without_clear_view_anywhere``: years
        with no valid pixel on any tile; ``tiles_without_valid_pixel``: tiles
        with no valid pixel on any date; ``pixels_never_clear``: tile →
        number of pixels invalid on every date.
    """
    per_tile: dict[str, list[int]] = {}
    for st in stacks:
        years = st.dates.astype("datetime64[Y]").astype(int) + 1970
        seen = np.asarray(clear_share[st.name]) > 0
        per_tile[st.name] = [int(y) for y in np.unique(years) if not seen[years == y].any()]
    anywhere = sorted(set.intersection(*(set(v) for v in per_tile.values()))) if per_tile else []
    return {
        "years_without_clear_view": per_tile,
        "years_without_clear_view_anywhere": anywhere,
        "tiles_without_valid_pixel": [st.name for st in stacks if int(counts[st.name].max(initial=0)) == 0],
        "pixels_never_clear": {st.name: int((counts[st.name] == 0).sum()) for st in stacks},
    }


def _write_points(labels: LabelSet, crs_wkt: str, path: Path) -> None:
    import pyogrio
    import shapely

    # pyogrio logs a line per layer written at INFO; the survey prints its own summary.
    logging.getLogger("pyogrio").setLevel(logging.WARNING)
    p = labels.points
    geom = shapely.to_wkb(shapely.points(p["x"].to_numpy(), p["y"].to_numpy()))
    fields = ["label", "onset_year", "tile", "row", "col", "source"]
    data = [
        p["label"].to_numpy(dtype=object),
        p["onset_year"].to_numpy(np.int32),
        p["tile"].to_numpy(dtype=object),
        p["row"].to_numpy(np.int32),
        p["col"].to_numpy(np.int32),
        p["source"].to_numpy(np.int32),
    ]
    pyogrio.raw.write(path, geom, data, fields, crs=crs_wkt, geometry_type="Point", driver="GPKG", layer="labels")


def _plots(series: pd.DataFrame, clear_by_month: dict[int, float], stacks: list[TileStack], counts: dict[str, np.ndarray], out: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    colours = {"stable_forest": "#1b7837", "conversion": "#d6604d", "old_plantation": "#8073ac", "other": "#bf812d"}
    fig, axes = plt.subplots(2, 1, figsize=(10, 6.5), sharex=True)
    for ax, name in zip(axes, ("NDVI", "NBR"), strict=True):
        for lab, col in colours.items():
            s = series[(series["label"] == lab) & (series["index"] == name)]
            if s.empty:
                continue
            ax.plot(pd.to_datetime(s["date"]), s["median"].astype(float), "-o", ms=2.5, color=col, label=lab.replace("_", " "))
        ax.set_ylabel(f"median {name}")
        ax.grid(alpha=0.3)
    axes[0].legend(ncol=4, fontsize=8, loc="lower left")
    axes[0].set_title("Index series of the labelled points (invalid observations left out)")
    fig.tight_layout()
    fig.savefig(out / "index_series.png", dpi=110)
    plt.close(fig)

    n = len(stacks)
    fig, axes = plt.subplots(1, n + 1, figsize=(4.2 * (n + 1), 3.8))
    months = np.arange(1, 13)
    axes[0].bar(months, [clear_by_month.get(int(m), np.nan) for m in months], color="#4393c3")
    axes[0].set_xticks(months)
    axes[0].set_ylim(0, 1)
    axes[0].set_xlabel("month")
    axes[0].set_ylabel("share of clear views")
    axes[0].set_title("Clear views by month")
    for ax, st in zip(axes[1:], stacks, strict=True):
        im = ax.imshow(counts[st.name], cmap="viridis", vmin=0, vmax=len(st.dates))
        ax.set_title(f"{st.name}: valid observations")
        ax.set_axis_off()
        fig.colorbar(im, ax=ax, shrink=0.8)
    fig.tight_layout()
    fig.savefig(out / "clear_views.png", dpi=110)
    plt.close(fig)


def run(cfg: SurveyConfig) -> Path:
    """Survey the region in ``cfg`` and write the outputs listed in the module docstring.

    Returns:
        The output folder.
    """
    region = cfg.region
    stacks = open_region(region)
    grids = {s.name: s.grid for s in stacks}
    if region.labels.path is None:
        raise ConfigError("region.labels.path is not set; the survey checks the labels against the imagery")
    labels = read_labels(region.labels.path, grids=grids, years=stacks[0].years.tolist(), csv_crs=region.labels.crs)

    out = Path(cfg.out_dir)
    tmp = out.with_name(out.name + ".partial")
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir(parents=True)
    counts: dict[str, np.ndarray] = {}
    clear_by_date: dict[str, list[float]] = {}
    clear_share: dict[str, np.ndarray] = {}
    for st in stacks:
        counts[st.name] = _write_count(st, tmp / f"clear_count_{st.name}.tif")
        clear_share[st.name] = st.valid.mean(("y", "x")).compute().values
        clear_by_date[st.name] = clear_share[st.name].round(4).tolist()
    cover = coverage(stacks, clear_share, counts)
    if cover["years_without_clear_view_anywhere"]:
        years = ", ".join(map(str, cover["years_without_clear_view_anywhere"]))
        log.warning("region %s: no clear view anywhere in %s (every date cloudy or masked on every tile); conversions in those years cannot be seen, a map's year there is a guess", region.name, years)
    if cover["tiles_without_valid_pixel"]:
        log.warning("region %s: tile(s) %s have no valid pixel on any date; check their nodata, mask and scaling settings", region.name, ", ".join(cover["tiles_without_valid_pixel"]))
    dates = stacks[0].dates
    months = dates.astype("datetime64[M]").astype(int) % 12 + 1
    share = np.mean([clear_by_date[s.name] for s in stacks], axis=0)
    clear_by_month = {int(m): round(float(share[months == m].mean()), 4) for m in np.unique(months)}
    series = label_index_series(stacks, labels, list(cfg.indices))
    _write_points(labels, stacks[0].grid.crs.to_wkt(), tmp / "labels.gpkg")
    _plots(series, clear_by_month, stacks, counts, tmp)
    summary = {
        "region": region.name,
        "tiles": [
            {
                "name": s.name,
                "grid": s.grid.describe(),
                "crs": s.grid.crs.to_string(),
                "pixel_area_m2": s.grid.pixel_area_m2 if s.grid.crs.is_projected else None,
                "dates": len(s.dates),
                "first": str(s.dates[0]),
                "last": str(s.dates[-1]),
            }
            for s in stacks
        ],
        "years": [int(stacks[0].years[0]), int(stacks[0].years[-1])],
        "clear_share_by_date": {name: dict(zip(map(str, dates), v, strict=True)) for name, v in clear_by_date.items()},
        "clear_share_by_month": clear_by_month,
        "coverage": cover,
        "labels": {"file": str(labels.path), "fingerprint": labels.fingerprint, "counts": labels.counts()},
        "label_index_series": series.to_dict(orient="records"),
    }
    (tmp / "survey.json").write_text(json.dumps(summary, indent=1) + "\n")
    if out.exists():
        shutil.rmtree(out)
    tmp.rename(out)
    return out
