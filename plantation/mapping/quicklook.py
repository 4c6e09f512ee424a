"""The quicklook of a mapped tile: class map and conversion-year map side by side, as a PNG."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import rasterio
from rasterio.enums import Resampling

from plantation.mapping.styles import CLASS_STYLE, YEAR_RAMP

CAVEAT = "Probabilistic evidence, not a finding: verify with high-resolution imagery and field checks."


def quicklook(cog: Path, png: Path, *, years: list[int], cutoff_year: int, max_side: int = 1024) -> Path:
    """Class map and conversion-year map of one mapped tile, side by side, as a PNG.

    Reads a decimated view (the COG's overviews serve it), so memory stays
    small whatever the tile size. Written atomically.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.patches import Patch

    with rasterio.open(cog) as src:
        f = max(1, int(np.ceil(max(src.height, src.width) / max_side)))
        shape = (max(1, src.height // f), max(1, src.width // f))
        cls = src.read(1, out_shape=shape, resampling=Resampling.nearest, masked=True)
        onset = src.read(2, out_shape=shape, resampling=Resampling.nearest, masked=True)
        left, bottom, right, top = src.bounds
        crs = src.crs.to_string() if src.crs else "no CRS"
        name = Path(src.name).stem
    extent = (left, right, bottom, top)
    codes = sorted(CLASS_STYLE)
    cmap = ListedColormap([CLASS_STYLE[c][1] for c in codes])
    cmap.set_bad("#ffffff")
    fig, axes = plt.subplots(1, 2, figsize=(12, 6.2), constrained_layout=True)
    axes[0].imshow(cls, cmap=cmap, norm=BoundaryNorm(np.arange(codes[0] - 0.5, codes[-1] + 1), cmap.N), extent=extent, interpolation="nearest")
    axes[0].set_title(f"{name}: map class")
    axes[0].legend(
        handles=[Patch(color=CLASS_STYLE[c][1], label=CLASS_STYLE[c][0]) for c in codes] + [Patch(facecolor="#ffffff", edgecolor="#777777", label="no data (too few clear dates)")],
        loc="lower left",
        fontsize=7,
        framealpha=0.9,
    )
    yr = np.ma.masked_where(np.ma.getmaskarray(onset) | (onset.filled(0) == 0), onset)
    ycmap = YEAR_RAMP.resampled(len(years))
    ycmap.set_bad("#f2f2f2")
    im = axes[1].imshow(yr, cmap=ycmap, norm=BoundaryNorm(np.arange(years[0] - 0.5, years[-1] + 1), ycmap.N), extent=extent, interpolation="nearest")
    axes[1].set_title(f"{name}: conversion year (grey: none mapped)")
    cb = fig.colorbar(im, ax=axes[1], ticks=years, shrink=0.8)
    cb.ax.axhline(cutoff_year + 0.5, color="black", linewidth=2)
    cb.set_label(f"onset year (line: cutoff {cutoff_year})")
    for ax in axes:
        ax.set_xlabel(f"x ({crs})")
        ax.set_ylabel("y")
        ax.ticklabel_format(style="plain", useOffset=False)
        ax.tick_params(labelsize=7)
    fig.suptitle(CAVEAT, fontsize=9)
    tmp = png.with_name(png.name + ".partial")
    fig.savefig(tmp, dpi=110, format="png")
    plt.close(fig)
    tmp.replace(png)
    return png
