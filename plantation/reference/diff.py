"""What changed between two versions of a label set, point by point, matched by location.

Two tables of labelled points (a :class:`~plantation.reference.labels.LabelSet`'s
``points``, or a run's ``points.csv`` read by
:func:`plantation.model.runs.read_points`) are compared:

* a pixel (tile, row, col) in both is ``unchanged`` when its label and onset
  year agree, else ``relabelled``;
* of the rest, an old and a new point with the same label and onset year at
  most ``move_px`` pixels apart (measured on the imagery CRS coordinates, so
  across tile seams) are ``moved``: pairs are taken greedily, nearest first,
  each point used once;
* the old points left are ``removed``, the new ones ``added``.

Pure and torch-free: pandas, numpy and a k-d tree.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from plantation.errors import LabelError
from plantation.reference.labels import LABEL_NAMES

#: Categories in the order they are reported.
CATEGORIES: tuple[str, ...] = ("added", "removed", "moved", "relabelled", "unchanged")
#: Columns the compared tables must have (``source`` is optional).
REQUIRED: tuple[str, ...] = ("tile", "row", "col", "x", "y", "label", "onset_year")
_SIDE: tuple[str, ...] = ("tile", "row", "col", "x", "y", "label", "onset_year", "source", "index")
#: Columns of every category's table: each side's point (``index`` = its row position in the input table), NA where a side has none.
COLUMNS: tuple[str, ...] = (*(f"old_{c}" for c in _SIDE), *(f"new_{c}" for c in _SIDE), "distance_px")


def source_unit(path: str | Path) -> str:
    """What a label file's ``source`` numbers count: ``line`` for CSV, ``feature`` for vector files."""
    return "line" if Path(path).suffix.lower() == ".csv" else "feature"


@dataclass
class LabelDiff:
    """The points of two label versions, by category of change.

    Every table has the columns :data:`COLUMNS`: ``old_*`` describe the old
    point (NA for ``added``), ``new_*`` the new one (NA for ``removed``);
    ``*_index`` is the point's row position in the table given to
    :func:`diff_labels`, ``*_source`` its line or feature number in its file
    (NA when the table had no ``source`` column); ``distance_px`` is the
    distance between the two in pixels (NA for ``added`` and ``removed``).
    Tables are sorted by the new pixel (the old one for ``removed``).

    Attributes:
        added, removed, moved, relabelled, unchanged: one table per category.
        move_px: the largest move, in pixels, counted as ``moved``.
        units: what the old and new ``source`` numbers count (``line`` or ``feature``).
    """

    added: pd.DataFrame
    removed: pd.DataFrame
    moved: pd.DataFrame
    relabelled: pd.DataFrame
    unchanged: pd.DataFrame
    move_px: float
    units: tuple[str, str] = ("line", "line")

    def table(self, category: str) -> pd.DataFrame:
        """The table of one category (see :data:`CATEGORIES`)."""
        if category not in CATEGORIES:
            raise ValueError(f"category {category!r} is not one of {list(CATEGORIES)}")
        return getattr(self, category)

    def counts(self) -> dict[str, int]:
        """Number of points per category, in :data:`CATEGORIES` order."""
        return {c: len(self.table(c)) for c in CATEGORIES}

    @property
    def changed(self) -> bool:
        """Whether anything but ``unchanged`` is non-empty."""
        return any(n for c, n in self.counts().items() if c != "unchanged")

    def counts_by_label(self) -> dict[str, dict[str, int]]:
        """Per category, points per label (the new label; the old one for ``removed``).

        Every label of :data:`~plantation.reference.labels.LABEL_NAMES` is
        listed, zeros included. ``relabelled`` is counted per change instead:
        ``"old→new"`` (e.g. ``"conversion→stable_forest"``), or
        ``"conversion year changed"`` when only the onset year changed.
        """
        out: dict[str, dict[str, int]] = {}
        for c in CATEGORIES:
            t = self.table(c)
            if c == "relabelled":
                keys = [f"{o}→{n}" if o != n else f"{n} year changed" for o, n in zip(t["old_label"], t["new_label"], strict=True)]
                out[c] = {k: int(v) for k, v in pd.Series(keys, dtype=object).value_counts(sort=False).sort_index().items()}
                continue
            labels = t["old_label"] if c == "removed" else t["new_label"]
            vc = labels.value_counts()
            names = list(LABEL_NAMES) + sorted(set(vc.index) - set(LABEL_NAMES))
            out[c] = {n: int(vc.get(n, 0)) for n in names}
        return out

    def summary(self) -> str:
        """One line: ``added 120, removed 3, moved 2, relabelled 5, unchanged 400``."""
        return ", ".join(f"{c} {n}" for c, n in self.counts().items())

    def lines(self, examples: int = 5) -> list[str]:
        """Human-readable lines: the summary, then per changed category its counts by label and up to ``examples`` points."""
        out = [f"label changes: {self.summary()}"]
        by_label = self.counts_by_label()
        for c in CATEGORIES:
            t = self.table(c)
            if c == "unchanged" or t.empty:
                continue
            parts = ", ".join(f"{k} {v}" for k, v in by_label[c].items() if v)
            out.append(f"  {c} ({parts}):")
            for rec in t.head(max(examples, 0)).itertuples(index=False):
                out.append(f"    {self._describe(c, rec._asdict())}")
            if len(t) > examples:
                out.append(f"    ... and {len(t) - max(examples, 0)} more")
        return out

    def _describe(self, category: str, r: dict[str, Any]) -> str:
        if category == "added":
            return f"{_pixel(r, 'new')}: {_label(r, 'new')}{self._sources(r)}"
        if category == "removed":
            return f"{_pixel(r, 'old')}: {_label(r, 'old')}{self._sources(r)}"
        if category == "moved":
            return f"{_pixel(r, 'old')} → {_pixel(r, 'new')} ({r['distance_px']:.1f} px): {_label(r, 'new')}{self._sources(r)}"
        return f"{_pixel(r, 'new')}: {_label(r, 'old')} → {_label(r, 'new')}{self._sources(r)}"

    def _sources(self, r: dict[str, Any]) -> str:
        parts = [f"{side} {unit} {int(r[f'{side}_source'])}" for side, unit in zip(("old", "new"), self.units, strict=True) if not pd.isna(r[f"{side}_source"])]
        return f" ({', '.join(parts)})" if parts else ""

    def record(self) -> dict[str, Any]:
        """A JSON-able record: counts, counts by label, and every changed point.

        Each changed point is a dict of the :data:`COLUMNS` that apply to it
        (``old_tile``, ``old_row``, ..., ``new_source``, ``distance_px``;
        the ``*_index`` positions are left out), so ``added`` points carry
        only ``new_*`` and ``removed`` ones only ``old_*``.
        """
        rec: dict[str, Any] = {"move_px": float(self.move_px), "counts": self.counts(), "counts_by_label": self.counts_by_label(), "source_units": {"old": self.units[0], "new": self.units[1]}}
        for c in CATEGORIES:
            if c != "unchanged":
                rec[c] = [_plain(r) for r in self.table(c).to_dict("records")]
        return rec


def _pixel(r: dict[str, Any], side: str) -> str:
    return f"tile {r[f'{side}_tile']} row {int(r[f'{side}_row'])} col {int(r[f'{side}_col'])}"


def _label(r: dict[str, Any], side: str) -> str:
    lab = r[f"{side}_label"]
    year = r[f"{side}_onset_year"]
    return f"{lab} {int(year)}" if lab == "conversion" or (not pd.isna(year) and int(year) != 0) else str(lab)


def _plain(r: dict[str, Any]) -> dict[str, Any]:
    """One table row as JSON-able values, NA and the index positions left out."""
    out: dict[str, Any] = {}
    for k, v in r.items():
        if k.endswith("_index") or v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v)):
            continue
        if isinstance(v, np.integer | int) and not isinstance(v, bool):
            out[k] = int(v)
        elif isinstance(v, np.floating | float):
            out[k] = round(float(v), 6) if k == "distance_px" else float(v)
        else:
            out[k] = str(v)
    return out


def _prepare(points: pd.DataFrame, name: str) -> pd.DataFrame:
    missing = [c for c in REQUIRED if c not in points.columns]
    if missing:
        raise LabelError(f"{name} labels: missing column(s) {missing}; expected {list(REQUIRED)} (and source)")
    t = pd.DataFrame(
        {
            "tile": points["tile"].astype(str).to_numpy(),
            "row": points["row"].to_numpy(dtype=np.int64),
            "col": points["col"].to_numpy(dtype=np.int64),
            "x": points["x"].to_numpy(dtype=np.float64),
            "y": points["y"].to_numpy(dtype=np.float64),
            "label": points["label"].astype(str).to_numpy(),
            # Onset years are 0 unless conversion (points.csv may leave them empty).
            "onset_year": pd.to_numeric(points["onset_year"], errors="coerce").fillna(0).to_numpy(dtype=np.int64),
            "source": pd.array(points["source"], dtype="Int64") if "source" in points.columns else pd.array([pd.NA] * len(points), dtype="Int64"),
            "index": np.arange(len(points), dtype=np.int64),
        }
    )
    dup = t.duplicated(["tile", "row", "col"], keep=False)
    if dup.any():
        d = t[dup].iloc[0]
        times = int(((t["tile"] == d["tile"]) & (t["row"] == d["row"]) & (t["col"] == d["col"])).sum())
        raise LabelError(f"{name} labels: pixel (tile {d['tile']}, row {d['row']}, col {d['col']}) appears {times} times; give each pixel once")
    return t


def _side(t: pd.DataFrame, side: str) -> pd.DataFrame:
    return t.rename(columns={c: f"{side}_{c}" for c in _SIDE}).reset_index(drop=True)


def _frame(old: pd.DataFrame | None, new: pd.DataFrame | None, distance: np.ndarray | None) -> pd.DataFrame:
    """A category table from row-aligned old and new points (either may be None)."""
    n = len(old) if old is not None else len(new) if new is not None else 0
    parts = []
    for side, t in (("old", old), ("new", new)):
        if t is not None:
            parts.append(_side(t, side))
        else:
            empty = {f"{side}_{c}": pd.array([pd.NA] * n, dtype=dtype) for c, dtype in zip(_SIDE, ("string", "Int64", "Int64", "Float64", "Float64", "string", "Int64", "Int64", "Int64"), strict=True)}
            parts.append(pd.DataFrame(empty))
    out = pd.concat(parts, axis=1)
    out["distance_px"] = np.full(n, np.nan) if distance is None else np.asarray(distance, dtype=np.float64)
    side = "old" if new is None else "new"
    return out.sort_values([f"{side}_tile", f"{side}_row", f"{side}_col"], kind="stable").reset_index(drop=True).loc[:, list(COLUMNS)]


def diff_labels(old: pd.DataFrame, new: pd.DataFrame, *, pixel_size: float, move_px: float = 3.0, units: tuple[str, str] = ("line", "line")) -> LabelDiff:
    """Compare two versions of a label set, matched by location.

    Args:
        old, new: labelled points with columns ``tile``, ``row``, ``col``
            (the pixel), ``x``, ``y`` (imagery CRS coordinates), ``label``,
            ``onset_year`` (0 or empty unless conversion) and optionally
            ``source`` (the file's line or feature number); one row per pixel.
        pixel_size: the imagery's pixel size in CRS units (metres), to turn
            coordinate distances into pixels.
        move_px: the farthest, in pixels, a point with the same label and
            onset year may have moved to count as ``moved`` rather than
            removed and added.
        units: what the old and new ``source`` numbers count (see
            :func:`source_unit`), for :meth:`LabelDiff.lines`.

    Returns:
        A :class:`LabelDiff`.

    Raises:
        LabelError: a table lacks a column or holds a pixel twice.
        ValueError: ``pixel_size`` is not positive or ``move_px`` negative.
    """
    if not pixel_size > 0:
        raise ValueError(f"diff_labels: pixel_size {pixel_size!r} must be a positive length in CRS units")
    if not move_px >= 0:
        raise ValueError(f"diff_labels: move_px {move_px!r} must be at least 0 pixels")
    o = _prepare(old, "old")
    n = _prepare(new, "new")

    # Same pixel in both versions.
    key = ["tile", "row", "col"]
    both = o[key + ["index"]].merge(n[key + ["index"]], on=key, suffixes=("_o", "_n"))
    oi, ni = both["index_o"].to_numpy(), both["index_n"].to_numpy()
    same = (o["label"].to_numpy()[oi] == n["label"].to_numpy()[ni]) & (o["onset_year"].to_numpy()[oi] == n["onset_year"].to_numpy()[ni])

    def dist(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return np.hypot(o["x"].to_numpy()[a] - n["x"].to_numpy()[b], o["y"].to_numpy()[a] - n["y"].to_numpy()[b]) / pixel_size

    unchanged = _frame(o.iloc[oi[same]], n.iloc[ni[same]], dist(oi[same], ni[same]))
    relabelled = _frame(o.iloc[oi[~same]], n.iloc[ni[~same]], dist(oi[~same], ni[~same]))

    # Moves among the rest: same label and year, within move_px, nearest pairs first.
    rest_o = np.setdiff1d(np.arange(len(o)), oi)
    rest_n = np.setdiff1d(np.arange(len(n)), ni)
    mo, mn, md = _greedy_pairs(o, n, rest_o, rest_n, pixel_size, move_px)
    moved = _frame(o.iloc[mo], n.iloc[mn], md)
    removed = _frame(o.iloc[np.setdiff1d(rest_o, mo)], None, None)
    added = _frame(None, n.iloc[np.setdiff1d(rest_n, mn)], None)
    return LabelDiff(added=added, removed=removed, moved=moved, relabelled=relabelled, unchanged=unchanged, move_px=float(move_px), units=units)


def _greedy_pairs(o: pd.DataFrame, n: pd.DataFrame, rest_o: np.ndarray, rest_n: np.ndarray, pixel_size: float, move_px: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Old and new row positions paired as moves, with their distances in pixels.

    Candidates are all (old, new) pairs with the same label and onset year at
    most ``move_px`` apart; they are taken nearest first (ties: old, then new
    row order), skipping any whose old or new point is already used.
    """
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float64))
    if len(rest_o) == 0 or len(rest_n) == 0:
        return empty
    po = np.column_stack([o["x"].to_numpy()[rest_o], o["y"].to_numpy()[rest_o]]) / pixel_size
    pn = np.column_stack([n["x"].to_numpy()[rest_n], n["y"].to_numpy()[rest_n]]) / pixel_size
    pairs = cKDTree(po).sparse_distance_matrix(cKDTree(pn), move_px, output_type="ndarray")
    if len(pairs) == 0:
        return empty
    a, b, d = rest_o[pairs["i"]], rest_n[pairs["j"]], pairs["v"].astype(np.float64)
    alike = (o["label"].to_numpy()[a] == n["label"].to_numpy()[b]) & (o["onset_year"].to_numpy()[a] == n["onset_year"].to_numpy()[b])
    a, b, d = a[alike], b[alike], d[alike]
    order = np.lexsort((b, a, d))
    used_o: set[int] = set()
    used_n: set[int] = set()
    keep = []
    for i in order.tolist():
        if int(a[i]) in used_o or int(b[i]) in used_n:
            continue
        used_o.add(int(a[i]))
        used_n.add(int(b[i]))
        keep.append(i)
    k = np.asarray(keep, dtype=np.int64)
    return a[k], b[k], d[k]
