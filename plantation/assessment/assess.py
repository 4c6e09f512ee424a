"""Accuracy and area of a mapped region from its interpreted validation sample.

Reads the sample drawn by :mod:`plantation.assessment.design` after interpreters filled
its reference columns, joins back each point's bookkeeping (stratum, map class,
mapped onset year) from ``design.json`` by ``point_id`` — the interpreters'
sheet never shows the map's answer — checks it row by row, and estimates with
:mod:`plantation.assessment.estimators`: the error matrix in area proportions, overall,
user's and producer's accuracy, the area of each class, converted area per
onset year and after the cutoff, and the timing accuracy of conversions —
each with its standard error and interval. Areas come from the sample, not
from counting the map's pixels (the pixel counts are shown beside them).

This module writes ``assessment.json`` and is the one that reads it
(:func:`read_assessment`).
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from plantation.assessment.design import BOOKKEEPING, DESIGN_NAME, MAP_CLASSES, SIMULATED, read_design
from plantation.assessment.estimators import Estimate, EstimationError, Strata, accuracy, stratified_mean, stratified_ratio, z_value
from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, LabelError, PlantationError
from plantation.imagery.config import RegionConfig
from plantation.mapping.folder import open_map, sha256_of
from plantation.model.card import CARD, WEIGHTS, read_card, read_validation, resolve_model
from plantation.records import check_shapes, load_object, locate
from plantation.reference.labels import LABEL_NAMES

FORMAT = "plantation-assessment/1"
#: The assessment's file name in ``out_dir``.
ASSESSMENT_NAME = "assessment.json"
#: Columns the filled sheet must have: the point's id and pixel (checked against the design) and the reference.
REQUIRED = ("point_id", "tile", "row", "col", "label", "onset_year")


@dataclass
class AssessConfig:
    """What ``plantation assess`` needs (see ``configs/assess.yaml``)."""

    region: RegionConfig = field(default_factory=RegionConfig)
    #: The interpreted sample: samples.csv or samples.gpkg with the reference columns filled.
    samples: str = "outputs/assess/selvara_toy/samples.csv"
    #: The sample's design.json (null: the one beside the samples file).
    design: str | None = None
    #: The mapped region folder the sample was drawn from.
    map: str = "outputs/maps/selvara_toy"
    #: The model folder, for provenance and its validation record (null: as recorded in the map's manifest).
    model: str | None = None
    out_dir: str = "outputs/assess/selvara_toy"
    confidence: float = 0.95
    #: Apply 1 − n_h/N_h; off, as in Olofsson et al. (2014), which is conservative.
    finite_population_correction: bool = False
    #: Drop points with a blank label (and say how many) instead of stopping.
    allow_unlabelled: bool = False
    #: Write report.html as well.
    report: bool = True


def read_sample_table(path: str | Path) -> tuple[pd.DataFrame, str]:
    """The sample as text columns, and the word for its rows in messages (``line`` or ``feature``).

    Row ``i`` of the table is CSV line ``i + 2`` (after the header) or
    feature ``i + 1``; the column ``_where`` holds that number.
    """
    p = Path(path)
    if not p.is_file():
        raise InputNotFoundError(f"{p.absolute()}: sample file not found")
    suffix = p.suffix.lower()
    if suffix == ".csv":
        try:
            table = pd.read_csv(p, dtype=str, keep_default_na=False)
        except (pd.errors.ParserError, UnicodeDecodeError) as exc:
            raise LabelError(f"{p}: cannot read as CSV ({str(exc).splitlines()[0]})") from None
        table["_where"] = np.arange(len(table)) + 2
        unit = "line"
    elif suffix in (".gpkg", ".geojson", ".json"):
        import pyogrio

        try:
            meta, _, _, fields = pyogrio.raw.read(p, read_geometry=False)
        except Exception as exc:  # pyogrio raises several error types for unreadable files
            raise LabelError(f"{p}: cannot read as a vector file ({str(exc).splitlines()[0]})") from None
        table = pd.DataFrame({name: ["" if v is None else str(v) for v in col] for name, col in zip(meta["fields"], fields, strict=True)})
        table["_where"] = np.arange(len(table)) + 1
        unit = "feature"
    else:
        raise LabelError(f"{p}: unsupported sample format {suffix!r}; use the .csv or .gpkg written by `plantation sample`")
    missing = [c for c in REQUIRED if c not in table.columns]
    if missing:
        raise LabelError(f"{p}: missing column(s) {missing}; expected the columns written by `plantation sample`")
    for c in REQUIRED:
        table[c] = table[c].astype(str).str.strip()
    return table, unit


def _int_or_none(text: str) -> int | None:
    try:
        v = float(text)
    except ValueError:
        return None
    return int(v) if v == int(v) else None


@dataclass
class CheckedSample:
    """Validated sample points, with their bookkeeping joined from the design, stratum codes and the design's weights.

    ``dropped`` lists the points left out as unlabelled (blank on the sheet,
    then missing from it), ``ignored`` the sheet's columns that repeat the
    design's bookkeeping (an older, non-blind sheet) and were not used.
    """

    table: pd.DataFrame
    strata: Strata
    stratum_names: list[str]
    design: dict[str, Any]
    dropped: list[str]
    missing: list[str] = field(default_factory=list)
    ignored: list[str] = field(default_factory=list)


def check_sample(
    table: pd.DataFrame,
    unit: str,
    path: Path,
    design: dict[str, Any],
    years: list[int],
    *,
    allow_unlabelled: bool = False,
    fpc: bool = False,
    design_path: str | Path = DESIGN_NAME,
) -> CheckedSample:
    """Join each row to its point in the design and check it with the label rules; the first problem stops with its row.

    The sheet is blind: the stratum, map class, mapped onset year and
    inclusion probability of each point come from ``design["points"]``
    (:func:`plantation.assessment.design.read_design`), matched by
    ``point_id``. Columns of those names still on the sheet (an older
    sheet) are ignored and listed in ``ignored``: the design is the record.

    Raises:
        LabelError: a duplicate point id; a point id not in the design, or
            at another pixel (tile, row, col) than the design's; a point of
            the design missing from the sheet or a blank label (unless
            ``allow_unlabelled``, which drops both); an unknown label; a
            conversion without a valid onset year; an onset year on a
            non-conversion; or a stratum left with fewer than two labelled
            points.
    """
    names = [s["name"] for s in design["strata"]]
    code_of = {n: i for i, n in enumerate(names)}
    points = {q["point_id"]: q for q in design["points"]}
    ignored = [c for c in BOOKKEEPING if c in table.columns]
    table = table.drop(columns=ignored)

    def fail(i: int, msg: str) -> None:
        raise LabelError(f"{path}: {unit} {int(table['_where'].iloc[i])}: {msg}")

    dup = table["point_id"].duplicated(keep="first")
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        first = int(table.loc[table["point_id"] == table["point_id"].iloc[i], "_where"].iloc[0])
        fail(i, f"point_id {table['point_id'].iloc[i]!r} appears again (first on {unit} {first}); each point once")
    for i, (pid, tile, row, col) in enumerate(zip(table["point_id"], table["tile"], table["row"], table["col"], strict=True)):
        q = points.get(pid)
        if q is None:
            fail(i, f"point_id {pid!r} is not in the design {design_path}; label the sheet that was drawn with this design (or set design= to its own design.json)")
        if (tile, _int_or_none(row), _int_or_none(col)) != (q["tile"], q["row"], q["col"]):
            here, there = f"tile {tile!r} row {row!r} col {col!r}", f"tile {q['tile']!r} row {q['row']} col {q['col']}"
            fail(i, f"point_id {pid!r} is at {here} here but at {there} in {design_path}; the sheet and the design come from different draws")
    on_sheet = set(table["point_id"])
    missing = [pid for pid in points if pid not in on_sheet]
    if missing and not allow_unlabelled:
        raise LabelError(
            f"{path}: point_id {missing[0]!r} of the design {design_path} is not on the sheet ({len(missing)} point(s) missing); "
            "put every drawn point back, or set allow_unlabelled=true to drop them as unlabelled (this can bias the estimates)"
        )
    blank = table["label"] == ""
    dropped: list[str] = []
    if blank.any():
        if not allow_unlabelled:
            i = int(np.flatnonzero(blank)[0])
            fail(i, f"label is blank ({int(blank.sum())} points unlabelled); label every point, or set allow_unlabelled=true to drop them (this can bias the estimates)")
        dropped = table.loc[blank, "point_id"].tolist()
        table = table.loc[~blank].reset_index(drop=True)
    dropped += missing
    ref_year = np.zeros(len(table), np.int64)
    for i, (lab, yr) in enumerate(zip(table["label"], table["onset_year"], strict=True)):
        if lab not in LABEL_NAMES:
            fail(i, f"label {lab!r} is not one of {list(LABEL_NAMES)}")
        if lab == "conversion":
            y = _int_or_none(yr)
            if y is None:
                fail(i, f"conversion needs an onset_year, got {yr!r}")
            if y not in years:
                fail(i, f"onset_year {y} is outside the map's years {years[0]}-{years[-1]}")
            ref_year[i] = y
        elif yr not in ("", "0"):
            fail(i, f"onset_year {yr!r} given for label {lab!r}; only conversions have one")
    table = table.copy()
    for c in BOOKKEEPING:
        table[c] = [points[pid][c] for pid in table["point_id"]]
    table["ref_year"] = ref_year
    table["map_year"] = table["map_onset_year"].astype(np.int64)
    code = table["stratum"].map(code_of).to_numpy()
    area = np.array([s["area_ha"] for s in design["strata"]], dtype=np.float64)
    n = np.bincount(code, minlength=len(names))
    for k, s in enumerate(design["strata"]):
        if area[k] > 0 and n[k] < 2:
            raise LabelError(f"{path}: stratum {s['name']!r} has {n[k]} labelled point(s); the estimates need at least 2 in every stratum with area")
    strata = Strata(code=code, weight=area / area.sum(), size=np.array([s["pixels"] for s in design["strata"]]), fpc=fpc)
    return CheckedSample(table, strata, names, design, dropped, missing, ignored)


def _est(e: Estimate | None, digits: int = 6) -> dict[str, float] | None:
    return None if e is None else e.as_dict(digits)


def _area(e: Estimate, total_ha: float, mapped_ha: float) -> dict[str, float]:
    return e.scaled(total_ha).as_dict(3) | {"mapped_ha": round(float(mapped_ha), 3)}


def estimate(sample: CheckedSample, *, years: list[int], cutoff_year: int, mapped_by_year: dict[int, float], confidence: float = 0.95) -> dict[str, Any]:
    """All estimates of one interpreted sample, as the JSON-ready sections of ``assessment.json``."""
    t = sample.table
    s = sample.strata
    strata_meta = sample.design["strata"]
    total_ha = float(sum(x["area_ha"] for x in strata_meta))
    used_map = [c for c in MAP_CLASSES if c != "no_data" or (t["map_class"] == "no_data").any() or any(x["kind"] == "no_data" and x["area_ha"] > 0 for x in strata_meta)]
    acc = accuracy(t["map_class"].to_numpy(), t["label"].to_numpy(), s, map_classes=used_map, ref_classes=list(LABEL_NAMES), confidence=confidence)
    kind_to_class = {"conversion": "conversion", "stable_forest": "stable_forest", "forest_buffer": "stable_forest", "old_plantation": "old_plantation", "other": "other", "no_data": "no_data"}
    mapped_ha = {c: 0.0 for c in MAP_CLASSES}
    for x in strata_meta:
        mapped_ha[kind_to_class[x["kind"]]] += x["area_ha"]
    ref_conv = (t["label"] == "conversion").to_numpy()
    map_conv = (t["map_class"] == "conversion").to_numpy()
    ry, my = t["ref_year"].to_numpy(), t["map_year"].to_numpy()
    by_year = []
    for y in years:
        e = stratified_mean(ref_conv & (ry == y), s, confidence)
        by_year.append({"year": int(y)} | _area(e, total_ha, mapped_by_year.get(int(y), 0.0)))
    after_ref = ref_conv & (ry > cutoff_year)
    after_map = map_conv & (my > cutoff_year)
    after = _area(stratified_mean(after_ref, s, confidence), total_ha, sum(v for k, v in mapped_by_year.items() if k > cutoff_year))
    after |= {
        "cutoff_year": int(cutoff_year),
        # The cutoff question as a two-class map: converted after the cutoff, or not.
        "users": _est(stratified_ratio(after_ref & after_map, after_map, s, confidence)),
        "producers": _est(stratified_ratio(after_ref & after_map, after_ref, s, confidence)),
    }
    both = ref_conv & map_conv
    timing = {
        "n": int(both.sum()),
        "exact": _est(stratified_ratio(both & (my == ry), both, s, confidence)),
        "within1": _est(stratified_ratio(both & (np.abs(my - ry) <= 1), both, s, confidence)),
    }
    # Strata are the map classes when each stratum holds one map class and no map class spans two strata.
    pairs = t[["stratum", "map_class"]].drop_duplicates()
    is_olofsson = not pairs["stratum"].duplicated().any() and not pairs["map_class"].duplicated().any()
    n_used = np.bincount(s.code, minlength=len(strata_meta))
    return {
        "confidence": confidence,
        "z": round(z_value(confidence), 6),
        "estimator": "stratified estimator, strata = map classes (Olofsson et al. 2014)"
        if is_olofsson
        else "Stehman (2014) estimator for strata that differ from the map classes (conversion by year group, forest buffer)",
        "classes": list(LABEL_NAMES),
        "map_classes": used_map,
        "error_matrix": {"proportions": np.round(acc.proportions, 6).tolist(), "counts": acc.counts.tolist()},
        "overall": _est(acc.overall),
        "users": {k: _est(v) for k, v in acc.users.items()},
        "producers": {k: _est(v) for k, v in acc.producers.items()},
        "area_ha": {c: _area(acc.area_share[c], total_ha, mapped_ha[c]) for c in LABEL_NAMES},
        "total_area_ha": round(total_ha, 3),
        "conversion_by_year": by_year,
        "after_cutoff": after,
        "timing": timing,
        "strata": [{"name": x["name"], "kind": x["kind"], "pixels": x["pixels"], "area_ha": x["area_ha"], "n_planned": x["n"], "n_used": int(n_used[k])} for k, x in enumerate(strata_meta)],
    }


def _model_provenance(folder: Path | None) -> tuple[dict[str, Any] | None, dict[str, Any] | None]:
    """The model's card summary and its validation record, if the folder holds them."""
    if folder is None:
        return None, None
    try:
        folder = resolve_model(folder)
    except InputNotFoundError:
        return {"path": str(folder), "note": "model folder not found"}, None
    card = read_card(folder)
    digest = sha256_of(*[folder / n for n in (CARD, WEIGHTS) if (folder / n).is_file()])
    prov = {"path": str(folder), "sha256": digest, "region": card.region, "labels_fingerprint": card.labels_fingerprint, "package_version": card.package_version}
    return prov, read_validation(folder)


def run(cfg: AssessConfig, resolved_config: str | None = None, echo: Any = print) -> dict[str, Any]:
    """Assess a map from its interpreted sample and write ``assessment.json``, two CSV tables and the report.

    Raises:
        PlantationError: a missing or malformed input, a sample that no
            longer matches the map, or a stratum without enough points.
    """
    if not 0 < cfg.confidence < 1:
        raise ConfigError(f"confidence: {cfg.confidence!r} must be in (0, 1)")
    samples = Path(cfg.samples)
    table, unit = read_sample_table(samples)
    design_path = Path(cfg.design) if cfg.design else samples.with_name(DESIGN_NAME)
    design = read_design(design_path)
    mapped = open_map(cfg.map)
    now = {t.name: t.sha256 for t in mapped.tiles}
    if now != design.get("tiles"):
        raise PlantationError(f"{cfg.map}: the map's tiles differ from those the sample was drawn from ({design_path}); draw a new sample for this map")
    years = list(range(min(mapped.years), max(mapped.years) + 1)) if mapped.years else []
    checked = check_sample(table, unit, samples, design, years, allow_unlabelled=cfg.allow_unlabelled, fpc=cfg.finite_population_correction, design_path=design_path)
    if checked.ignored:
        echo(f"note: {samples} carries the map's columns {checked.ignored} (an older, non-blind sheet): ignored, the bookkeeping comes from {design_path}; its interpreters saw the map's answer")
    if checked.dropped:
        ids = ", ".join(checked.dropped[:5]) + (", ..." if len(checked.dropped) > 5 else "")
        absent = f", {len(checked.missing)} of them missing from the sheet" if checked.missing else ""
        echo(f"warning: {len(checked.dropped)} unlabelled point(s) dropped ({ids}){absent}; the estimates assume they are missing at random")
    try:
        result = estimate(checked, years=years, cutoff_year=mapped.cutoff_year, mapped_by_year=mapped.converted_ha, confidence=cfg.confidence)
    except EstimationError as exc:
        raise PlantationError(f"{samples}: {exc}") from None
    model_dir = Path(cfg.model) if cfg.model else (Path(mapped.model) if mapped.model else None)
    model_prov, validation = _model_provenance(model_dir)
    simulated = bool(design.get("simulated_reference")) or bool((checked.table.get("interpreter", pd.Series(dtype=str)) == SIMULATED).any())
    doc: dict[str, Any] = {
        "kind": FORMAT,
        "region": cfg.region.name,
        "map_dir": str(mapped.folder),
        "generated": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
        "simulated_reference": simulated,
        **result,
        "sample": {
            "path": str(samples),
            "sha256": sha256_of(samples),
            "n": len(checked.table),
            "dropped_unlabelled": checked.dropped,
            "missing_from_sheet": checked.missing,
            "design": str(design_path),
        },
        "provenance": {"model": model_prov, "map_manifest_sha256": mapped.manifest_sha256, "design_config": design.get("config"), "config": resolved_config},
        "validation": validation,
    }
    out = Path(cfg.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    _write_atomic(out / ASSESSMENT_NAME, json.dumps(doc, indent=1))
    _write_tables(doc, out)
    for line in summary_lines(doc):
        echo(line)
    return doc


#: Sections of assessment.json that, when present, must be JSON objects or lists (what the report walks through).
_OBJECTS = ("error_matrix", "users", "producers", "area_ha", "after_cutoff", "timing", "sample", "provenance")


def read_assessment(path: str | Path) -> dict[str, Any]:
    """``assessment.json`` as :func:`run` wrote it.

    Args:
        path: the file, or the folder holding it (``out_dir`` of the assessment).

    Raises:
        InputNotFoundError: there is no such file.
        FileFormatError: it is not valid JSON, not an assessment (its ``kind``),
            or a section has the wrong shape; one line naming the file.
    """
    p = locate(path, ASSESSMENT_NAME, missing="run `plantation assess` to write it")
    again = "write it again with `plantation assess`"
    doc = load_object(p, what="an assessment", again=again)
    if doc.get("kind") != FORMAT:
        raise FileFormatError(f"{p}: kind {doc.get('kind')!r}, expected {FORMAT!r}; is this the right file?")
    check_shapes(p, doc, objects=_OBJECTS, lists=("classes", "map_classes"), records=("conversion_by_year", "strata"), again=again)
    return doc


def _write_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(text)
    os.replace(tmp, path)


def _write_tables(doc: dict[str, Any], out: Path) -> None:
    """``error_matrix.csv`` (proportions and counts) and ``accuracy.csv`` (one row per class)."""
    em = doc["error_matrix"]
    rows = []
    for i, m in enumerate(doc["map_classes"]):
        rows.append({"map_class": m} | {f"p_{c}": v for c, v in zip(doc["classes"], em["proportions"][i], strict=True)} | {f"n_{c}": v for c, v in zip(doc["classes"], em["counts"][i], strict=True)})
    tmp = out / "error_matrix.csv.partial"
    pd.DataFrame(rows).to_csv(tmp, index=False, lineterminator="\n")
    os.replace(tmp, out / "error_matrix.csv")
    acc = []
    for c in doc["classes"]:
        u, p, a = doc["users"].get(c), doc["producers"].get(c), doc["area_ha"][c]
        acc.append(
            {
                "class": c,
                "users": u and u["estimate"],
                "users_se": u and u["se"],
                "users_lo": u and u["lo"],
                "users_hi": u and u["hi"],
                "producers": p and p["estimate"],
                "producers_se": p and p["se"],
                "producers_lo": p and p["lo"],
                "producers_hi": p and p["hi"],
                "area_ha": a["estimate"],
                "area_se_ha": a["se"],
                "area_lo_ha": a["lo"],
                "area_hi_ha": a["hi"],
                "mapped_ha": a["mapped_ha"],
            }
        )
    tmp = out / "accuracy.csv.partial"
    pd.DataFrame(acc).to_csv(tmp, index=False, lineterminator="\n")
    os.replace(tmp, out / "accuracy.csv")


def summary_lines(doc: dict[str, Any]) -> list[str]:
    """A short account for the terminal."""
    pct = int(round(doc["confidence"] * 100))

    def f(e: dict[str, float] | None, scale: float = 1.0, fmt: str = ".3f") -> str:
        if e is None:
            return "n/a"
        return f"{e['estimate'] * scale:{fmt}} ({e['lo'] * scale:{fmt}} to {e['hi'] * scale:{fmt}})"

    out = [f"{doc['estimator']}; {doc['sample']['n']} points; {pct}% intervals"]
    if doc["simulated_reference"]:
        out.append("reference labels were filled from simulated truth (demo only)")
    out.append(f"overall accuracy {f(doc['overall'])}")
    out.append(f"{'class':<16}{'user':>26}{'producer':>26}{'area ha (sample)':>32}{'map ha':>10}")
    for c in doc["classes"]:
        a = doc["area_ha"][c]
        out.append(f"{c:<16}{f(doc['users'].get(c)):>26}{f(doc['producers'].get(c)):>26}{f(a, fmt=',.1f'):>32}{a['mapped_ha']:>10,.1f}")
    ac = doc["after_cutoff"]
    out.append(f"converted after {ac['cutoff_year']}: {f(ac, fmt=',.1f')} ha from the sample; the map counts {ac['mapped_ha']:,.1f} ha")
    t = doc["timing"]
    out.append(f"onset year of conversions ({t['n']} points): exact {f(t['exact'])}, within one year {f(t['within1'])}")
    return out
