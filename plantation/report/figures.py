"""The report's figures: map mosaics, area bars, reliability and interval coverage, as PNG bytes."""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from rasterio.enums import Resampling

from plantation.errors import PlantationError
from plantation.mapping.folder import LAYERS, NODATA
from plantation.mapping.styles import YEAR_RAMP

# --------------------------------------------------------------------------- report figures
#
# The figures below feed ``plantation.report.page``. Each returns PNG bytes so the
# report can embed them as data URIs; they draw on a bare matplotlib Figure
# (no pyplot), so they leave the process's backend and global state alone.

#: Legend label and colour of the pale backgrounds drawn under the onset-year colours.
_BACKGROUND: dict[int, tuple[str, str]] = {
    1: ("stable natural forest", "#cfe3d4"),
    3: ("plantation before the series", "#f3e6bd"),
    4: ("other land or disturbance", "#e3e5e8"),
}
_NODATA_COLOUR = "#ffffff"
_NONE_COLOUR = "#e9e9e9"


@dataclass
class Mosaic:
    """Decimated layers of several mapped tiles pasted onto one grid in a common CRS.

    ``layers`` maps a band name of :data:`plantation.mapping.folder.LAYERS` (bands 1–7)
    to a masked float32 array (masked: no data or outside every tile), with
    GDAL scales already applied. ``pixel_size`` is the mosaic's pixel size in
    CRS units; ``factor`` is roughly how many map pixels one mosaic pixel
    stands for along a side.
    """

    layers: dict[str, np.ma.MaskedArray]
    extent: tuple[float, float, float, float]
    crs: str
    pixel_size: float
    factor: float
    tiles: list[str]
    cutoff_years: list[int] = field(default_factory=list)
    interval_levels: list[float] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)
    geographic: bool = False

    @property
    def converted(self) -> np.ndarray:
        """Boolean array: pixels mapped as converted (class 2 with an onset year)."""
        cls = self.layers["class"]
        onset = self.layers["onset_year"]
        return (~np.ma.getmaskarray(cls)) & (cls.filled(0) == 2) & (onset.filled(0) > 0)


def read_mosaic(cogs: Sequence[Path], *, max_side: int = 1024) -> Mosaic:
    """Read mapped tiles decimated (through their overviews) and mosaic them by their bounds.

    The first readable tile's CRS is the common one; tiles in another CRS are
    warped into it (nearest neighbour, like the overviews, so no class or year
    is invented). The mosaic's longer side is at most ``max_side`` pixels, so
    memory stays small whatever the region's size. Tiles that cannot be read
    are listed in ``skipped`` with the reason.

    Raises:
        PlantationError: no tile could be read.
    """
    from affine import Affine
    from rasterio.errors import RasterioIOError
    from rasterio.warp import reproject, transform_bounds

    names = [n for n, _, _ in LAYERS[:7]]
    heads: list[dict[str, Any]] = []
    skipped: list[str] = []
    dst_crs = None
    for p in cogs:
        try:
            with rasterio.open(p) as src:
                if src.count < 7 or src.crs is None:
                    skipped.append(f"{Path(p).name}: {'no CRS' if src.crs is None else f'{src.count} bands, expected 8'}")
                    continue
                dst_crs = dst_crs or src.crs
                b = src.bounds if src.crs == dst_crs else transform_bounds(src.crs, dst_crs, *src.bounds, densify_pts=21)
                res = min(abs(src.res[0]), abs(src.res[1]))
                if src.crs != dst_crs:
                    # Pixel size in the common CRS, roughly: the warped bounds over the pixel count.
                    res = min((b[2] - b[0]) / src.width, (b[3] - b[1]) / src.height)
                tags = src.tags()
                heads.append({"path": Path(p), "bounds": b, "res": res, "cutoff": tags.get("cutoff_year"), "level": tags.get("interval_level")})
        except RasterioIOError as exc:
            skipped.append(f"{Path(p).name}: unreadable ({str(exc).splitlines()[0][:120]})")
    if not heads:
        raise PlantationError("no mapped tile could be read: " + ("; ".join(skipped) or "none given"))
    left = min(h["bounds"][0] for h in heads)
    bottom = min(h["bounds"][1] for h in heads)
    right = max(h["bounds"][2] for h in heads)
    top = max(h["bounds"][3] for h in heads)
    native = min(h["res"] for h in heads)
    size = max(native, max(right - left, top - bottom) / max_side)
    width = max(1, int(np.ceil((right - left) / size - 1e-9)))
    height = max(1, int(np.ceil((top - bottom) / size - 1e-9)))
    dst_transform = Affine(size, 0.0, left, 0.0, -size, top)
    stack = np.full((len(names), height, width), NODATA, np.int16)
    scales = np.ones(len(names))
    for h in heads:
        with rasterio.open(h["path"]) as src:
            # Reading at the mosaic's resolution lets GDAL serve the request from an overview.
            f = size / h["res"]
            shape = (max(1, int(round(src.height / f))), max(1, int(round(src.width / f))))
            data = src.read(list(range(1, 8)), out_shape=(7, *shape), resampling=Resampling.nearest)
            src_transform = src.transform * Affine.scale(src.width / shape[1], src.height / shape[0])
            for i in range(len(names)):
                reproject(
                    data[i],
                    stack[i],
                    src_transform=src_transform,
                    src_crs=src.crs,
                    src_nodata=NODATA,
                    dst_transform=dst_transform,
                    dst_crs=dst_crs,
                    dst_nodata=NODATA,
                    resampling=Resampling.nearest,
                    init_dest_nodata=False,  # keep what earlier tiles wrote
                )
            scales = np.asarray(src.scales[:7], float)
    layers = {}
    for i, n in enumerate(names):
        band = stack[i]
        layers[n] = np.ma.masked_array(band.astype(np.float32) * np.float32(scales[i]), mask=band == NODATA)
    cutoffs = sorted({int(h["cutoff"]) for h in heads if h["cutoff"] not in (None, "")})
    levels = sorted({float(h["level"]) for h in heads if h["level"] not in (None, "")})
    return Mosaic(
        layers=layers,
        extent=(left, right, bottom, top),
        crs=dst_crs.to_string() if dst_crs is not None else "no CRS",
        pixel_size=size,
        factor=size / native,
        tiles=[h["path"].stem for h in heads],
        cutoff_years=cutoffs,
        interval_levels=levels,
        skipped=skipped,
        geographic=bool(dst_crs is not None and dst_crs.is_geographic),
    )


def _png(fig: Any, dpi: int = 110) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def _map_layout(m: Mosaic, panels: int) -> tuple[bool, tuple[float, float]]:
    """Stack panels in a column for a wide mosaic, side by side otherwise; returns (stacked, figsize)."""
    left, right, bottom, top = m.extent
    aspect = (top - bottom) / max(right - left, 1e-9)
    if panels == 1:
        # Room under the map for the year colour bar and the class legend.
        w = 9.5
        return True, (w, min(0.8 * w * aspect + 2.6, 11.0))
    stacked = aspect < 0.7
    if stacked:
        w = 9.0
        return True, (w, panels * max(2.2, 0.75 * w * aspect + 1.0))
    w = 4.2 * panels
    return False, (w, max(3.0, 4.0 * aspect + 1.3))


def _axes_style(ax: Any) -> None:
    # No coordinate ticks: six-digit projected coordinates say nothing at a glance; a scale bar does.
    ax.set_xticks([])
    ax.set_yticks([])
    ax.set_aspect("equal")
    for s in ax.spines.values():
        s.set_color("#999999")


def _scale_bar(ax: Any, m: Mosaic) -> None:
    """A scale bar in map units (km when the CRS is in metres)."""
    left, right, bottom, top = m.extent
    span = right - left
    if m.geographic:  # degrees: no honest straight scale bar
        return
    target = span / 5
    nice = 10 ** np.floor(np.log10(target))
    for k in (5, 2, 1):
        if k * nice <= target:
            nice *= k
            break
    x0 = left + span * 0.03
    y0 = bottom + (top - bottom) * 0.05
    ax.plot([x0, x0 + nice], [y0, y0], color="black", linewidth=3, solid_capstyle="butt")
    ax.text(x0 + nice / 2, y0 + (top - bottom) * 0.02, f"{nice / 1000:g} km" if nice >= 1000 else f"{nice:g} m", ha="center", va="bottom", fontsize=7)


def onset_overview(m: Mosaic, *, years: Sequence[int], cutoff_year: int | None) -> bytes:
    """Onset-year map of the whole mosaic as PNG bytes.

    Converted pixels are coloured by onset year along :data:`YEAR_RAMP`
    (colorbar with the cutoff marked); other classes are drawn in pale tones
    so the conversions stand out, no data in white.
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch

    years = list(years)
    _, size = _map_layout(m, 1)
    fig = Figure(figsize=size, layout="constrained")
    ax = fig.add_subplot()
    cls = m.layers["class"]
    bg_codes = sorted(_BACKGROUND)
    bg = np.ma.masked_array(cls.filled(0), mask=~np.isin(cls.filled(0), bg_codes))
    bg_cmap = ListedColormap([_BACKGROUND[c][1] for c in bg_codes])
    ax.set_facecolor(_NODATA_COLOUR)
    # Codes 1, 3, 4 → the three pale colours, in order.
    ax.imshow(bg, cmap=bg_cmap, norm=BoundaryNorm([0.5, 1.5, 3.5, 4.5], bg_cmap.N), extent=m.extent, interpolation="nearest")
    onset = np.ma.masked_array(m.layers["onset_year"].filled(0), mask=~m.converted)
    ycmap = YEAR_RAMP.resampled(max(len(years), 1))
    norm = BoundaryNorm(np.arange(years[0] - 0.5, years[-1] + 1), ycmap.N)
    im = ax.imshow(onset, cmap=ycmap, norm=norm, extent=m.extent, interpolation="nearest")
    _axes_style(ax)
    _scale_bar(ax, m)
    ax.set_title("Mapped onset year of conversion to tree-crop plantation", fontsize=10)
    # A label for every year up to 15 years; a long series gets every second, third, ... year.
    step = max(1, int(np.ceil(len(years) / 15)))
    cb = fig.colorbar(im, ax=ax, ticks=years[::step], orientation="horizontal", shrink=0.9, aspect=45, pad=0.02)
    cb.ax.tick_params(labelsize=7)
    label = "onset year (most probable year of conversion)"
    if cutoff_year is not None and years[0] <= cutoff_year + 0.5 <= years[-1] + 0.5:
        cb.ax.axvline(cutoff_year + 0.5, color="black", linewidth=2.5)
        cb.ax.text(cutoff_year + 0.6, 1.15, "after cutoff →", transform=cb.ax.get_xaxis_transform(), fontsize=7, ha="left", va="bottom")
        label += f"; black line: cutoff, conversions after {cutoff_year} lie to its right"
    cb.set_label(label, fontsize=8)
    handles = [Patch(facecolor=_BACKGROUND[c][1], edgecolor="#999999", label=_BACKGROUND[c][0]) for c in bg_codes]
    handles.append(Patch(facecolor=_NODATA_COLOUR, edgecolor="#999999", label="no data (too few clear dates)"))
    # An "outside" figure legend is the one constrained layout makes room for, so it is never clipped.
    fig.legend(handles=handles, loc="outside lower center", ncols=len(handles), fontsize=7, frameon=False, title="not converted", title_fontsize=7)
    return _png(fig)


def uncertainty_overview(m: Mosaic, *, interval_level: float | None) -> bytes:
    """Three uncertainty maps of the mosaic as PNG bytes.

    1. How many years the onset interval spans (converted pixels only): a
       one-year interval means the year is well determined.
    2. p_conversion everywhere: how strongly the imagery points to a
       conversion in any year.
    3. Epistemic uncertainty (ensemble disagreement): high where the model
       has seen little like the pixel, whatever its probability says.
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap
    from matplotlib.figure import Figure

    stacked, size = _map_layout(m, 3)
    fig = Figure(figsize=size, layout="constrained")
    axes = fig.subplots(3, 1) if stacked else fig.subplots(1, 3)
    orient = "vertical" if stacked else "horizontal"
    kw = {"shrink": 0.9, "pad": 0.02, "aspect": 18 if stacked else 25}
    lvl = f"{interval_level:.0%}" if interval_level else "credible"

    # 1. Span of the interval, in years, as discrete classes.
    conv = m.converted
    span = (m.layers["onset_hi"].filled(0) - m.layers["onset_lo"].filled(0) + 1).clip(1, 5)
    span = np.ma.masked_array(span, mask=~conv)
    # One year (well determined) in a calm green, then warmer colours as the interval widens.
    scmap = ListedColormap(["#4daf7c", "#f2c14e", "#e07a3f", "#b8322a", "#5e1a1d"])
    scmap.set_bad(_NONE_COLOUR)
    ax = axes[0]
    ax.set_facecolor(_NODATA_COLOUR)
    nodata = np.ma.getmaskarray(m.layers["class"])
    ax.imshow(np.ma.masked_array(np.zeros(span.shape), mask=nodata | conv), cmap=ListedColormap([_NONE_COLOUR]), extent=m.extent, interpolation="nearest")
    im = ax.imshow(span, cmap=scmap, norm=BoundaryNorm(np.arange(0.5, 6), scmap.N), extent=m.extent, interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, ticks=[1, 2, 3, 4, 5], orientation=orient, **kw)
    ticklabels = ["1 year", "2", "3", "4", "5+"]
    (cb.ax.set_yticklabels if stacked else cb.ax.set_xticklabels)(ticklabels, fontsize=7)
    cb.set_label(f"years in the {lvl} interval", fontsize=8)
    ax.set_title(f"Years spanned by the {lvl} onset interval\n(grey: not converted; white: no data)", fontsize=9)

    # 2. Probability of conversion in any year.
    ax = axes[1]
    ax.set_facecolor(_NODATA_COLOUR)
    im = ax.imshow(m.layers["p_conversion"], cmap="magma_r", vmin=0, vmax=1, extent=m.extent, interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, orientation=orient, **kw)
    cb.set_label("probability (0–1)", fontsize=8)
    cb.ax.tick_params(labelsize=7)
    ax.set_title("p_conversion\n(probability of conversion in any year)", fontsize=9)

    # 3. Epistemic uncertainty; the scale stops at the 99th percentile so a few extreme pixels do not wash out the rest.
    ax = axes[2]
    ax.set_facecolor(_NODATA_COLOUR)
    epi = m.layers["epistemic"]
    vals = epi.compressed()
    vmax = float(np.percentile(vals, 99)) if vals.size else 1.0
    vmax = max(vmax, 0.01)
    im = ax.imshow(epi, cmap="cividis", vmin=0, vmax=vmax, extent=m.extent, interpolation="nearest")
    cb = fig.colorbar(im, ax=ax, orientation=orient, extend="max", **kw)
    cb.set_label("mutual information (nats)", fontsize=8)
    cb.ax.tick_params(labelsize=7)
    ax.set_title("Epistemic uncertainty\n(disagreement of the ensemble members)", fontsize=9)
    for a in axes:
        _axes_style(a)
    # On the light first panel the black bar stays legible.
    _scale_bar(axes[0], m)
    return _png(fig)


def _value(row: Mapping[str, Any], key: str) -> float:
    v = row.get(key)
    return float("nan") if v is None else float(v)


def area_by_year_bars(rows: Sequence[Mapping[str, Any]], *, cutoff_year: int | None, confidence: float = 0.95) -> bytes:
    """Converted area by onset year: sample-based estimates with their intervals beside the map's pixel counts.

    ``rows`` are the ``conversion_by_year`` entries of an assessment
    (``year``, ``estimate``, ``lo``, ``hi``, ``mapped_ha``, in hectares).
    """
    from matplotlib.figure import Figure

    years = [int(r["year"]) for r in rows]
    est = np.array([_value(r, "estimate") for r in rows])
    lo = np.array([_value(r, "lo") for r in rows])
    hi = np.array([_value(r, "hi") for r in rows])
    mapped = np.array([_value(r, "mapped_ha") for r in rows])
    x = np.arange(len(years))
    fig = Figure(figsize=(9.5, 4.2), layout="constrained")
    ax = fig.add_subplot()
    if cutoff_year is not None:
        after = [i for i, y in enumerate(years) if y > cutoff_year]
        if after:
            ax.axvspan(after[0] - 0.5, after[-1] + 0.5, color="#fbeee0", zorder=0)
            ax.text(after[0] - 0.4, 0.98, f"after the {cutoff_year} cutoff", transform=ax.get_xaxis_transform(), fontsize=8, va="top", color="#8a4b12")
    w = 0.38
    ax.bar(x - w / 2, mapped, w, color="#c9ccd1", edgecolor="#6b7078", hatch="//", label="map (pixel count)", zorder=2)
    err = np.vstack([np.clip(est - lo, 0, None), np.clip(hi - est, 0, None)])
    ax.bar(x + w / 2, est, w, color="#d2452b", label=f"sample-based estimate, {confidence:.0%} interval", zorder=2)
    ax.errorbar(x + w / 2, est, yerr=np.nan_to_num(err), fmt="none", ecolor="black", elinewidth=1.2, capsize=3, zorder=3)
    ax.set_xticks(x, [str(y) for y in years], fontsize=8)
    ax.set_xlabel("onset year")
    ax.set_ylabel("converted area (ha)")
    bottom = np.nanmin(np.concatenate([lo, [0.0]])) if np.isfinite(lo).any() else 0.0
    ax.set_ylim(bottom=min(0.0, bottom * 1.1))
    ax.axhline(0, color="#444444", linewidth=0.8)
    ax.grid(axis="y", color="#e5e5e5", zorder=1)
    ax.legend(fontsize=8, loc="upper left", bbox_to_anchor=(0, 0.92), frameon=False)
    ax.set_title("Converted area by onset year", fontsize=10)
    return _png(fig)


def reliability_diagram(bins: Sequence[Mapping[str, Any]], *, ece: float | None = None, split: str | None = None) -> bytes:
    """Reliability diagram of p_conversion on held-out points as PNG bytes.

    ``bins`` are ``{"p_mean", "observed", "n"}`` records; ``split`` names the
    held-out set in words (``"test split"``) for the title.

    Each bin's mean predicted probability against the observed share of
    conversions in it, with a 95% binomial interval (normal approximation)
    and the bin's count beneath: on the diagonal, a probability of 0.7 means
    about 7 conversions in 10 such points.
    """
    from matplotlib.figure import Figure

    p = np.array([_value(b, "p_mean") for b in bins])
    o = np.array([_value(b, "observed") for b in bins])
    n = np.array([max(int(b.get("n") or 0), 0) for b in bins])
    se = np.sqrt(np.clip(o * (1 - o), 0, None) / np.maximum(n, 1))
    fig = Figure(figsize=(4.8, 5.0), layout="constrained")
    ax, axn = fig.subplots(2, 1, sharex=True, height_ratios=[3, 1])
    ax.plot([0, 1], [0, 1], color="#888888", linestyle="--", linewidth=1, label="perfect calibration")
    ax.errorbar(p, o, yerr=1.96 * se, fmt="o-", color="#d2452b", ecolor="#d2452b", markersize=4, capsize=2, linewidth=1.2, label="held-out points (95% interval)")
    ax.set_xlim(0, 1)
    ax.set_ylim(-0.02, 1.02)
    ax.set_ylabel("observed share converted")
    title = "Reliability of p_conversion"
    if ece is not None:
        title += f" (ECE {ece:.3f})"
    ax.set_title(title + (f"\nheld-out points of the {split}" if split else ""), fontsize=9)
    ax.legend(fontsize=7, loc="upper left", frameon=False)
    ax.grid(color="#eeeeee")
    axn.bar(p, n, width=0.04, color="#9aa3ad")
    axn.set_ylabel("points", fontsize=8)
    axn.set_xlabel("predicted probability of conversion (bin mean)")
    axn.tick_params(labelsize=7)
    return _png(fig)


def interval_coverage_plot(levels: Sequence[Mapping[str, Any]]) -> bytes:
    """Nominal against observed coverage of the onset-year intervals on held-out conversions, as PNG bytes."""
    from matplotlib.figure import Figure

    lv = np.array([_value(r, "level") for r in levels])
    cov = np.array([_value(r, "coverage") for r in levels])
    n = np.array([max(int(r.get("n") or 0), 0) for r in levels])
    se = np.sqrt(np.clip(cov * (1 - cov), 0, None) / np.maximum(n, 1))
    fig = Figure(figsize=(4.8, 5.0), layout="constrained")
    ax = fig.add_subplot()
    ax.plot([0, 1], [0, 1], color="#888888", linestyle="--", linewidth=1, label="observed = nominal")
    ax.errorbar(lv, cov, yerr=1.96 * se, fmt="s-", color="#1d6d96", ecolor="#1d6d96", markersize=5, capsize=3, linewidth=1.2, label="held-out conversions (95% interval)")
    for x, y, k in zip(lv, cov, n, strict=True):
        if np.isfinite(x) and np.isfinite(y):
            ax.annotate(f"n={k}", (x, y), textcoords="offset points", xytext=(6, -10), fontsize=7)
    lo = float(np.nanmin(np.concatenate([lv, cov, [0.5]]))) - 0.05
    ax.set_xlim(max(0.0, lo), 1.0)
    ax.set_ylim(max(0.0, lo), 1.02)
    ax.set_xlabel("nominal level of the onset-year interval")
    ax.set_ylabel("observed share of true years inside it")
    ax.set_title("Coverage of the onset-year intervals", fontsize=9)
    ax.legend(fontsize=7, loc="upper left", frameon=False)
    ax.grid(color="#eeeeee")
    return _png(fig)
