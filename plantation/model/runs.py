"""The training run folder's records and the lineage of runs: which run grew from which, on which labels.

A run folder (``plantation train`` or ``plantation retrain``) holds, beside
the model and checkpoints:

* ``labels.json``: the label file, its fingerprint, counts per label and split sizes;
* ``metrics.json``: training time, calibration, scores on the held-out test split;
* ``points.csv``: every labelled point the run used, with its pixel (tile,
  row, col), coordinates in the imagery CRS (x, y), label, onset year and
  split (train, val, test, or dropped). A later retrain diffs its labels
  against this copy (the label file itself may since have grown in place)
  and keeps every point's split;
* ``lineage.json``: when and how the run was made (``afresh``, ``warm``
  from a parent, or ``extended`` to more years), its parent run folder and
  the parent model's digest, the label changes since the parent and the
  comparison of the two models on the same test points.

This module reads and writes those records and lists runs side by side; it
never imports torch.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from plantation.errors import FileFormatError, InputNotFoundError

POINTS = "points.csv"
LINEAGE = "lineage.json"
LABELS = "labels.json"
METRICS = "metrics.json"
LINEAGE_FORMAT = "plantation-lineage/1"
#: Split codes of ``points.csv`` (−1: dropped by the spatial buffer).
SPLIT_NAMES: dict[int, str] = {0: "train", 1: "val", 2: "test", -1: "dropped"}
POINT_COLUMNS: tuple[str, ...] = ("tile", "row", "col", "x", "y", "label", "onset_year", "split")


def _atomic(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(text)
    os.replace(tmp, path)


def write_points(folder: str | Path, points: pd.DataFrame, split: dict[tuple[str, int, int], int]) -> Path:
    """Write ``points.csv``: the labelled points (a :class:`~plantation.reference.labels.LabelSet`'s ``points``) with each one's split code by (tile, row, col)."""
    table = points.loc[:, ["tile", "row", "col", "x", "y", "label", "onset_year"]].copy()
    table["split"] = [SPLIT_NAMES[int(split.get((t, int(r), int(c)), -1))] for t, r, c in zip(table["tile"], table["row"], table["col"], strict=True)]
    path = Path(folder) / POINTS
    _atomic(path, table.to_csv(index=False, lineterminator="\n"))
    return path


def read_points(folder: str | Path) -> pd.DataFrame | None:
    """``points.csv`` of a run (``split`` as codes, see :data:`SPLIT_NAMES`), or None for a run that predates it.

    Raises:
        FileFormatError: the file lacks a column or has an unknown split.
    """
    path = Path(folder) / POINTS
    if not path.is_file():
        return None
    try:
        table = pd.read_csv(path, dtype={"tile": str, "label": str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{path}: not a points table ({str(exc).splitlines()[0]})") from None
    missing = [c for c in POINT_COLUMNS if c not in table.columns]
    if missing:
        raise FileFormatError(f"{path}: missing column(s) {missing}")
    codes = {v: k for k, v in SPLIT_NAMES.items()}
    bad = ~table["split"].isin(list(codes))
    if bad.any():
        raise FileFormatError(f"{path}: line {int(np.flatnonzero(bad.to_numpy())[0]) + 2}: split {table['split'][bad].iloc[0]!r} is not one of {list(codes)}")
    table["split"] = table["split"].map(codes).astype(np.int8)
    table["onset_year"] = table["onset_year"].fillna(0).astype(np.int64)
    return table


def split_of_points(table: pd.DataFrame) -> dict[tuple[str, int, int], int]:
    """(tile, row, col) → split code, from :func:`read_points`."""
    return {(str(t), int(r), int(c)): int(s) for t, r, c, s in zip(table["tile"], table["row"], table["col"], table["split"], strict=True)}


def model_digest(folder: str | Path) -> str:
    """SHA-256 of a run's exported weights and card: names the parent model exactly, even if its folder is later replaced."""
    h = hashlib.sha256()
    for name in ("model.safetensors", "model.json"):
        path = Path(folder) / "model" / name
        if not path.is_file():
            raise InputNotFoundError(f"{path.absolute()}: model file not found; is {folder} a training run folder?")
        h.update(path.read_bytes())
    return h.hexdigest()


def lineage_record(*, run: str, start: str, labels_fingerprint: str, years: list[int], parent: str | None = None, **extra: Any) -> dict[str, Any]:
    """A ``lineage.json`` record: ``start`` is ``afresh``, ``warm`` or ``extended``; ``extra`` (label changes, comparison, parent digest) is kept as given."""
    return {
        "format": LINEAGE_FORMAT,
        "run": run,
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "start": start,
        "parent": parent,
        "labels_fingerprint": labels_fingerprint,
        "years": [int(years[0]), int(years[-1])],
        **extra,
    }


def write_lineage(folder: str | Path, record: dict[str, Any]) -> Path:
    path = Path(folder) / LINEAGE
    _atomic(path, json.dumps(record, indent=1) + "\n")
    return path


def _json(path: Path) -> dict[str, Any] | None:
    if not path.is_file():
        return None
    try:
        doc = json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{path}: not valid JSON ({exc.msg}, line {exc.lineno})") from None
    if not isinstance(doc, dict):
        raise FileFormatError(f"{path}: not a JSON object")
    return doc


def read_lineage(folder: str | Path) -> dict[str, Any] | None:
    """``lineage.json`` of a run, or None for a run that predates it.

    Raises:
        FileFormatError: the file is not JSON or of another kind.
    """
    path = Path(folder) / LINEAGE
    doc = _json(path)
    if doc is not None and doc.get("format") != LINEAGE_FORMAT:
        raise FileFormatError(f"{path}: format {doc.get('format')!r}, expected {LINEAGE_FORMAT!r}")
    return doc


@dataclass
class RunSummary:
    """One run as ``plantation runs`` lists it."""

    name: str
    folder: Path
    parent: str | None
    start: str
    created: str
    labels: int
    conversions: int
    years: list[int]
    #: Test-split scores of ``metrics.json`` (empty where the run had no test split).
    test: dict[str, float] = field(default_factory=dict)
    #: The retrain's verdict against its parent on the same test points (empty for a first run).
    versus_parent: str = ""


def summarise_run(folder: str | Path) -> RunSummary:
    """What a run folder says of itself (runs older than ``lineage.json`` are listed as first runs)."""
    folder = Path(folder)
    lineage = read_lineage(folder) or {}
    labels = _json(folder / LABELS) or {}
    metrics = _json(folder / METRICS) or {}
    card = _json(folder / "model" / "model.json") or {}
    counts = labels.get("counts", {})
    years = lineage.get("years") or ([card["years"][0], card["years"][-1]] if card.get("years") else [])
    verdict = ""
    comp = lineage.get("comparison") or {}
    if comp.get("metrics"):
        verdict = "; ".join(f"{k} {v['difference']:+.3f} ({v['verdict']})" for k, v in comp["metrics"].items() if "difference" in v)
    created = lineage.get("created") or datetime.fromtimestamp((folder / "model" / "model.json").stat().st_mtime, UTC).isoformat(timespec="seconds")
    return RunSummary(
        name=folder.name,
        folder=folder,
        parent=lineage.get("parent"),
        start=lineage.get("start", "afresh"),
        created=created,
        labels=int(sum(counts.values())),
        conversions=int(counts.get("conversion", 0)),
        years=[int(y) for y in years],
        test={k: v for k, v in metrics.get("test", {}).items() if k in ("n", "label_accuracy", "year_exact", "nll", "ece_p_conversion")},
        versus_parent=verdict,
    )


def list_runs(out_dir: str | Path) -> list[RunSummary]:
    """Every finished run under ``out_dir`` (folders holding ``model/model.json``), parents before their children, then by creation time.

    Raises:
        InputNotFoundError: ``out_dir`` does not exist.
    """
    root = Path(out_dir)
    if not root.is_dir():
        raise InputNotFoundError(f"{root.absolute()}: no runs folder here; train a model with `plantation train` (or give out_dir=)")
    runs = [summarise_run(p) for p in sorted(root.iterdir()) if p.is_dir() and not p.name.endswith((".partial", ".old")) and (p / "model" / "model.json").is_file()]
    by_path = {str(r.folder.resolve()): r for r in runs}

    def depth(r: RunSummary, seen: int = 0) -> int:
        p = by_path.get(str(Path(r.parent).resolve())) if r.parent else None
        return 0 if p is None or seen > len(runs) else 1 + depth(p, seen + 1)

    return sorted(runs, key=lambda r: (depth(r), r.created, r.name))


def runs_table(runs: list[RunSummary]) -> list[str]:
    """The runs side by side: labels, years, test scores, parent and how the run compares with it."""
    if not runs:
        return ["no finished runs"]
    head = f"{'run':<28} {'start':<9} {'labels':>7} {'conv':>6} {'years':<10} {'test n':>6} {'label acc':>9} {'year exact':>10} {'nll':>7}  parent / against it"
    out = [head, "-" * len(head)]
    for r in runs:
        t = r.test
        years = f"{r.years[0]}-{r.years[-1]}" if r.years else "?"
        parent = Path(r.parent).name if r.parent else "-"
        tail = f"{parent}: {r.versus_parent}" if r.versus_parent else parent
        out.append(
            f"{r.name:<28} {r.start:<9} {r.labels:>7} {r.conversions:>6} {years:<10} {t.get('n', ''):>6} {t.get('label_accuracy', ''):>9} {t.get('year_exact', ''):>10} {t.get('nll', ''):>7}  {tail}"
        )
    out.append("test scores are on each run's own held-out test points (stratified label sample, not map accuracy); compare runs on the same points with `plantation retrain` (lineage.json)")
    return out
