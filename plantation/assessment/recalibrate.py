"""Recalibrate a written map's probabilities from its interpreted probability sample.

The network's probabilities are calibrated to the class mix of the
reference sample it learnt from (conversions over-represented), not to the
region's. Once an assessment sample exists — a probability sample with known
inclusion probabilities π — a design-weighted logistic recalibration
(:func:`plantation.model.calibration.fit_recalibration`, weights 1/π, so the
fit holds for the region's pixels rather than the sample's mix) corrects them:

* ``p_conversion`` against y = the reference label is conversion;
* ``p_after_cutoff`` against y = conversion with an onset year after the map's
  cutoff year.

The corrected values are written into bands 5 and 6 of every tile, window by
window, without running the network again; the other bands are copied as
they are. Where the correction does not reach (:data:`NOT_CORRECTED`): the
class, onset year and interval bands come from the full outcome
distribution, which the map does not store, and stay as the network gave
them; epistemic uncertainty is unchanged. Each fit is monotone (its slope
must be positive), so the ranking of pixels by either probability is kept;
only where the two separate fits cross is p_after_cutoff capped at
p_conversion, as a conversion after the cutoff is a conversion.

Nothing of the map changes until every new tile is complete: the tiles and
the manifest are written under temporary names and then put in place (in
place, the originals are kept aside until the manifest is replaced and put
back on any failure). The manifest entry and a GeoTIFF tag of each tile
(:data:`plantation.mapping.folder.CORRECTION_TAG`) record the correction.
The folder written is locked meanwhile with the lock of `plantation map`
(:class:`plantation.mapping.guard.FolderLock`): a mapping run or a second
recalibration on it is refused in one line, and it refuses them.
"""

from __future__ import annotations

import json
import os
import shutil
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.windows

from plantation.assessment.assess import check_sample, read_sample_table
from plantation.assessment.design import DESIGN_NAME, read_design
from plantation.errors import ConfigError, PlantationError
from plantation.imagery.config import RegionConfig
from plantation.mapping.catalog import COLLECTION, write_collection
from plantation.mapping.folder import BAND, CORRECTION_TAG, MANIFEST, NODATA, RECALIBRATION, MappedRegion, describe_correction, open_map, read_manifest, recalibrate_stored, sha256_of, write_cog
from plantation.mapping.guard import FolderBusyError, FolderLock
from plantation.model.calibration import apply_recalibration, expected_calibration_error, fit_recalibration

METHOD = "design-weighted logistic recalibration"
#: A cap of p_after_cutoff at p_conversion larger than this is counted and printed.
CAP_NOTED = 0.01
#: What the correction leaves as the network gave it; printed, recorded in the manifest entry, and in the README.
NOT_CORRECTED = (
    "class, onset_year, onset_lo and onset_hi are as the network gave them (they come from the full outcome distribution, which the map does not store; "
    "the class can disagree with the corrected p_conversion); epistemic is unchanged; the correction is monotone, so the ranking of pixels by either probability is kept "
    "(p_after_cutoff is capped at p_conversion where the two fits cross)"
)


@dataclass
class RecalibrateConfig:
    """What ``plantation recalibrate`` needs (see ``configs/recalibrate.yaml``)."""

    region: RegionConfig = field(default_factory=RegionConfig)
    #: The mapped region folder the sample was drawn from.
    map: str = "outputs/maps/selvara_toy"
    #: The interpreted sample: samples.csv or samples.gpkg with the reference columns filled.
    samples: str = "outputs/assess/selvara_toy/samples.csv"
    #: The sample's design.json (null: the one beside the samples file).
    design: str | None = None
    #: A new folder for the corrected map (null: correct the map in place).
    out_dir: str | None = None
    #: Fewest labelled, mapped sample points to fit from.
    min_points: int = 30
    #: Drop points with a blank label (and say how many) instead of stopping.
    allow_unlabelled: bool = False
    #: Rows and columns per window read and written at a time (memory ∝ window²).
    window: int = 1024
    #: Equal-width bins of the expected calibration error printed.
    ece_bins: int = 10


@dataclass
class Fit:
    """One recalibrated band: its coefficients (a, b) and the design-weighted ECE on the sample before and after."""

    band: str
    coef: tuple[float, float]
    ece_before: float
    ece_after: float
    #: Estimated share of the mapped pixels with the outcome (Hájek, weights 1/π).
    prevalence: float


@dataclass
class RecalibrationResult:
    """What :func:`run` fitted and wrote."""

    out_dir: Path
    in_place: bool
    correction: dict[str, Any]
    fits: list[Fit]
    n: int
    excluded_no_data: int
    capped_pixels: int

    def lines(self) -> list[str]:
        out = [f"{METHOD} from {self.n} labelled, mapped sample points" + (f" ({self.excluded_no_data} no-data points left out)" if self.excluded_no_data else "")]
        out.append(f"{'band':<16}{'a':>9}{'b':>9}{'prevalence':>12}{'ECE before':>12}{'ECE after':>11}")
        for f in self.fits:
            out.append(f"{f.band:<16}{f.coef[0]:>9.4f}{f.coef[1]:>9.4f}{f.prevalence:>12.4f}{f.ece_before:>12.4f}{f.ece_after:>11.4f}")
        out.append("ECE: design-weighted, on the sample the fit was made on (in-sample: optimistic); p' = sigmoid(a + b·logit p)")
        if self.capped_pixels:
            out.append(f"p_after_cutoff capped at p_conversion, lowering it by more than {CAP_NOTED}, on {self.capped_pixels} pixel(s) where the two fits cross")
        out.append(f"not corrected: {NOT_CORRECTED}")
        where = "in place" if self.in_place else "as a new map"
        out.append(f"corrected map written {where} to {self.out_dir} (manifest.json and each tile's {CORRECTION_TAG} tag record the correction)")
        return out


def check_config(cfg: RecalibrateConfig) -> None:
    if cfg.min_points < 2:
        raise ConfigError(f"min_points: {cfg.min_points!r} must be at least 2")
    if cfg.window < 16:
        raise ConfigError(f"window: {cfg.window!r} must be at least 16")
    if cfg.ece_bins < 1:
        raise ConfigError(f"ece_bins: {cfg.ece_bins!r} must be at least 1")


def sample_probabilities(mapped: MappedRegion, tiles: list[str], rows: list[int], cols: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Stored p_conversion and p_after_cutoff (as probabilities; NaN where no data) at each (tile, row, col)."""
    by_name = {t.name: t for t in mapped.tiles}
    pc = np.full(len(tiles), np.nan)
    pa = np.full(len(tiles), np.nan)
    order = np.argsort(np.array(tiles, dtype=object), kind="stable")
    k = 0
    while k < len(order):
        name = tiles[order[k]]
        idx = [int(i) for i in order[k:] if tiles[i] == name]
        k += len(idx)
        with rasterio.open(by_name[name].path) as src:
            bands = (BAND["p_conversion"], BAND["p_after_cutoff"])
            scale = [float(src.scales[b - 1]) for b in bands]
            offset = [float(src.offsets[b - 1]) for b in bands]
            for i in idx:
                v = src.read(bands, window=rasterio.windows.Window(cols[i], rows[i], 1, 1))[:, 0, 0]
                if v[0] != NODATA and v[1] != NODATA:
                    pc[i] = v[0] * scale[0] + offset[0]
                    pa[i] = v[1] * scale[1] + offset[1]
    return pc, pa


def _fit(band: str, p: np.ndarray, y: np.ndarray, w: np.ndarray, samples: Path, bins: int) -> Fit:
    try:
        a, b = fit_recalibration(p, y, weight=w)
    except ConfigError as exc:
        raise ConfigError(f"{samples}: cannot recalibrate {band}: {exc}") from None
    if b <= 0:
        raise PlantationError(f"{samples}: the fitted slope for {band} is {b:.3g} (≤ 0): on this sample the map ranks pixels the wrong way round; check the sample and the map")
    after = apply_recalibration(p, (a, b))
    return Fit(band, (a, b), expected_calibration_error(p, y, bins, weight=w), expected_calibration_error(after, y, bins, weight=w), float((w * y).sum() / w.sum()))


def rewrite_tile(src_path: Path, dest: Path, recalibration: dict[str, Any], tag: str, *, window: int) -> int:
    """Write a copy of tile ``src_path`` as a COG at ``dest`` with bands 5 and 6 recalibrated, window by window.

    Returns the number of pixels where p_after_cutoff was capped at p_conversion by more than :data:`CAP_NOTED`.
    """
    raw = dest.with_name(f"{dest.name}.raw.tif")
    ic, ia = BAND["p_conversion"] - 1, BAND["p_after_cutoff"] - 1
    capped = 0
    try:
        with rasterio.open(src_path) as src:
            prof: dict[str, Any] = {
                "driver": "GTiff",
                "height": src.height,
                "width": src.width,
                "count": src.count,
                "dtype": src.dtypes[0],
                "crs": src.crs,
                "transform": src.transform,
                "nodata": src.nodata if src.nodata is not None else NODATA,
                "BIGTIFF": "IF_SAFER",
            }
            if src.height >= 16 and src.width >= 16:
                prof.update(tiled=True, blockxsize=256, blockysize=256)
            sc, off = src.scales, src.offsets
            with rasterio.open(raw, "w", **prof) as dst:
                for i in range(1, src.count + 1):
                    dst.set_band_description(i, src.descriptions[i - 1] or "")
                    dst.update_tags(i, **src.tags(i))
                dst.scales, dst.offsets = sc, off
                dst.update_tags(**{**src.tags(), CORRECTION_TAG: tag})
                for r0 in range(0, src.height, window):
                    for c0 in range(0, src.width, window):
                        win = rasterio.windows.Window(c0, r0, min(window, src.width - c0), min(window, src.height - r0))
                        data = src.read(window=win)
                        ok = (data[ic] != NODATA) & (data[ia] != NODATA)
                        # Counted where the cap lowers p_after_cutoff by more than CAP_NOTED (tiny probabilities cross often, harmlessly).
                        data[ic][ok], data[ia][ok], n = recalibrate_stored(data[ic][ok], data[ia][ok], (sc[ic], sc[ia]), (off[ic], off[ia]), recalibration, noted=CAP_NOTED)
                        capped += n
                        dst.write(data, window=win)
        write_cog(raw, dest)
    finally:
        raw.unlink(missing_ok=True)
    return capped


def run(cfg: RecalibrateConfig, echo: Any = print) -> RecalibrationResult:
    """Fit the recalibration on the interpreted sample and write the corrected map.

    Raises:
        PlantationError: a missing or malformed input; a map already
            recalibrated; a sample drawn from another map; too few points, or
            a sample with one outcome only; a fit that would reverse the
            ranking. Nothing of the map is changed then.
    """
    check_config(cfg)
    samples = Path(cfg.samples)
    table, unit = read_sample_table(samples)
    design_path = Path(cfg.design) if cfg.design else samples.with_name(DESIGN_NAME)
    design = read_design(design_path)
    mapped = open_map(cfg.map)
    # The model's own prior correction (made at mapping time) is the starting point; a second recalibration is not.
    done = [t for t in mapped.tiles if t.correction and RECALIBRATION in t.correction]
    if done:
        what = describe_correction(done[0].correction).split(";")[0]
        raise PlantationError(f"{done[0].path}: already carries a correction ({what}); recalibrate the original map (probabilities as the model gave them), not a corrected one")
    if {t.name: t.sha256 for t in mapped.tiles} != design.get("tiles"):
        raise PlantationError(f"{cfg.map}: the map's tiles differ from those the sample was drawn from ({design_path}); recalibrate that map, or draw a new sample for this one")
    years = list(range(min(mapped.years), max(mapped.years) + 1)) if mapped.years else []
    checked = check_sample(table, unit, samples, design, years, allow_unlabelled=cfg.allow_unlabelled, design_path=design_path)
    if checked.dropped:
        echo(f"warning: {len(checked.dropped)} unlabelled point(s) dropped; the fit assumes they are missing at random")
    t = checked.table
    pc, pa = sample_probabilities(mapped, [str(x) for x in t["tile"]], [int(x) for x in t["row"]], [int(x) for x in t["col"]])
    ok = ~np.isnan(pc)
    n = int(ok.sum())
    if n < cfg.min_points:
        raise ConfigError(f"{samples}: {n} labelled sample point(s) on mapped pixels, fewer than min_points={cfg.min_points}; label more points (or lower min_points)")
    w = 1.0 / t["inclusion_probability"].to_numpy(np.float64)[ok]
    conv = (t["label"] == "conversion").to_numpy()[ok]
    after = conv & (t["ref_year"].to_numpy()[ok] > mapped.cutoff_year)
    fits = [_fit("p_conversion", pc[ok], conv, w, samples, cfg.ece_bins), _fit("p_after_cutoff", pa[ok], after, w, samples, cfg.ece_bins)]

    correction = {
        "method": METHOD,
        "from": {"path": str(samples), "sha256": sha256_of(samples), "design": str(design_path), "design_sha256": sha256_of(design_path)},
        "coef_conversion": [round(v, 8) for v in fits[0].coef],
        "coef_after_cutoff": [round(v, 8) for v in fits[1].coef],
        "formula": "p' = sigmoid(a + b * logit(p)), coef = [a, b]",
        "n": n,
        "excluded_no_data": int((~ok).sum()),
        "cutoff_year": mapped.cutoff_year,
        "ece_sample": {f.band: {"before": round(f.ece_before, 6), "after": round(f.ece_after, 6)} for f in fits},
        "not_corrected": NOT_CORRECTED,
        "date": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    src_dir = mapped.folder
    out = Path(cfg.out_dir) if cfg.out_dir else src_dir
    in_place = out.resolve() == src_dir.resolve()
    if not in_place and (out / MANIFEST).exists():
        raise PlantationError(f"{out / MANIFEST}: out_dir already holds a map; choose a new folder (or out_dir=null to correct {src_dir} in place)")
    capped = write_corrected(mapped, out, correction, window=cfg.window)
    return RecalibrationResult(out, in_place, correction, fits, n, int((~ok).sum()), capped)


def write_corrected(mapped: MappedRegion, out: Path, correction: dict[str, Any], *, window: int = 1024) -> int:
    """Write every tile of ``mapped`` recalibrated into ``out`` (its own folder: in place), then the manifest; all or nothing.

    ``out`` is locked for the whole write (:class:`plantation.mapping.guard.FolderLock`, the
    lock of `plantation map`): a mapping run or another recalibration on it is refused.

    Returns the pixels where p_after_cutoff was capped at p_conversion.

    Raises:
        FolderBusyError: another run holds ``out``.
        PlantationError: the map's manifest changed since ``mapped`` was read.
    """
    created = not out.exists()
    out.mkdir(parents=True, exist_ok=True)
    lock = FolderLock(out, verb="recalibrate")
    try:
        lock.acquire()
    except FolderBusyError:
        if created:
            shutil.rmtree(out, ignore_errors=True)
        raise FolderBusyError(f"out_dir: {out} is in use: another run ({lock.holder()}) holds it; wait for that run to end, then recalibrate") from None
    try:
        return _write_locked(mapped, out, correction, window=window, created=created)
    finally:
        lock.release()


def _write_locked(mapped: MappedRegion, out: Path, correction: dict[str, Any], *, window: int, created: bool) -> int:
    src_dir = mapped.folder
    in_place = out.resolve() == src_dir.resolve()
    raw = read_manifest(src_dir)
    if raw is None:  # open_map read it a moment ago
        raise PlantationError(f"{src_dir / MANIFEST}: disappeared while recalibrating")
    # The fit read the tiles open_map verified; a mapping run that finished before the lock was taken may have replaced some since.
    if {n: e.get("sha256") for n, e in raw["tiles"].items()} != {t.name: t.sha256 for t in mapped.tiles}:
        raise PlantationError(f"{src_dir / MANIFEST}: the map changed while recalibrating (a mapping run?); run the recalibration again")
    staged: dict[Path, Path] = {}
    extras: list[Path] = []
    kept: dict[Path, Path] = {}
    placed: list[Path] = []
    capped = 0
    try:
        for tile in mapped.tiles:
            e = raw["tiles"][tile.name]
            final = out / e["file"]
            new = out / f".{final.name}.recalibrated.tif"
            staged[new] = final
            merged = {**(tile.correction or {}), RECALIBRATION: correction}
            capped += rewrite_tile(tile.path, new, correction, json.dumps(merged, sort_keys=True), window=window)
            e["sha256"] = sha256_of(new)
            e[CORRECTION_TAG] = merged
        man_new = out / f".{MANIFEST}.partial"
        man_new.write_text(json.dumps(raw, indent=1, sort_keys=True))
        staged[man_new] = out / MANIFEST
        if not in_place:
            # The styles, quicklooks and summary of the original map go with it.
            tile_files = {src_dir / e["file"] for e in raw["tiles"].values()} | {src_dir / MANIFEST}
            for f in sorted(src_dir.iterdir()):
                # The STAC collection is rebuilt below from the corrected tiles, not copied: its items would be the original's.
                if f.is_file() and not f.name.startswith(".") and f not in tile_files and f.name != COLLECTION and not (out / f.name).exists():
                    shutil.copy2(f, out / f.name)
                    extras.append(out / f.name)
        # Commit: keep the originals aside (in place) so a failure can put them back.
        for new, final in staged.items():
            if final.exists():
                aside = final.with_name(f".{final.name}.original")
                os.replace(final, aside)
                kept[final] = aside
            os.replace(new, final)
            placed.append(final)
    except BaseException:
        for final, aside in kept.items():
            os.replace(aside, final)
        for new in staged:
            new.unlink(missing_ok=True)
        for final in placed:
            if final not in kept:
                final.unlink(missing_ok=True)  # put in a new folder before the failure
        for f in extras:
            f.unlink(missing_ok=True)
        if created:
            shutil.rmtree(out, ignore_errors=True)
        raise
    for aside in kept.values():
        aside.unlink(missing_ok=True)
    # The collection's items carry each tile's checksum and correction: rewritten from the corrected files.
    write_collection(out)
    return capped
