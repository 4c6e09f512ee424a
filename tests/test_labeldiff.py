"""Label diff: points added, removed, moved, relabelled and unchanged between two label versions, on tiny tables built in code."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from plantation.errors import LabelError
from plantation.reference.diff import CATEGORIES, diff_labels

PIXEL = 10.0
#: Tile "a" covers columns 0–99 (x 0–1000), tile "b" the next 100 columns (x 1000–2000); rows run down from y = 0.


def points(rows: list[tuple], *, first_source: int = 2) -> pd.DataFrame:
    """(tile, row, col, label, onset_year) → a LabelSet-like table at pixel centres, sources counting lines from ``first_source``."""
    recs = []
    for i, (tile, r, c, lab, year) in enumerate(rows):
        x0 = 0.0 if tile == "a" else 1000.0
        recs.append({"label": lab, "onset_year": year, "tile": tile, "row": r, "col": c, "x": x0 + (c + 0.5) * PIXEL, "y": -(r + 0.5) * PIXEL, "source": first_source + i})
    return pd.DataFrame(recs)


OLD = [
    ("a", 0, 0, "stable_forest", 0),  # unchanged
    ("a", 1, 1, "conversion", 2016),  # year changed
    ("a", 2, 2, "conversion", 2017),  # now stable forest
    ("a", 5, 5, "other", 0),  # moved 2 px right
    ("a", 20, 20, "other", 0),  # removed
]
NEW = [
    ("a", 30, 30, "conversion", 2018),  # added
    ("a", 0, 0, "stable_forest", 0),
    ("a", 1, 1, "conversion", 2017),
    ("a", 2, 2, "stable_forest", 0),
    ("a", 5, 7, "other", 0),
    ("a", 31, 31, "conversion", 2019),  # added
]


def test_every_category_with_its_points_and_sources():
    d = diff_labels(points(OLD), points(NEW), pixel_size=PIXEL)
    assert d.counts() == {"added": 2, "removed": 1, "moved": 1, "relabelled": 2, "unchanged": 1}
    assert list(d.counts()) == list(CATEGORIES) and d.changed
    assert d.added[["new_row", "new_col", "new_onset_year", "new_source"]].values.tolist() == [[30, 30, 2018, 2], [31, 31, 2019, 7]]
    assert d.added["old_tile"].isna().all()
    assert d.removed[["old_row", "old_col", "old_label", "old_source"]].values.tolist() == [[20, 20, "other", 6]]
    mv = d.moved.iloc[0]
    assert (mv.old_row, mv.old_col, mv.new_row, mv.new_col, mv.old_source, mv.new_source) == (5, 5, 5, 7, 5, 6)
    assert mv.distance_px == pytest.approx(2.0)
    rl = d.relabelled
    assert rl[["new_row", "old_label", "old_onset_year", "new_label", "new_onset_year"]].values.tolist() == [[1, "conversion", 2016, "conversion", 2017], [2, "conversion", 2017, "stable_forest", 0]]
    assert d.unchanged[["old_index", "new_index"]].values.tolist() == [[0, 1]]
    by = d.counts_by_label()
    assert by["added"] == {"stable_forest": 0, "conversion": 2, "old_plantation": 0, "other": 0}
    assert by["removed"]["other"] == 1 and by["moved"]["other"] == 1 and by["unchanged"]["stable_forest"] == 1
    assert by["relabelled"] == {"conversion year changed": 1, "conversion→stable_forest": 1}


def test_lines_summary_examples_and_sources():
    d = diff_labels(points(OLD), points(NEW), pixel_size=PIXEL, units=("line", "feature"))
    lines = d.lines()
    assert lines[0] == "label changes: added 2, removed 1, moved 1, relabelled 2, unchanged 1"
    text = "\n".join(lines)
    assert "  added (conversion 2):" in text
    assert "tile a row 30 col 30: conversion 2018 (new feature 2)" in text
    assert "tile a row 20 col 20: other (old line 6)" in text
    assert "tile a row 5 col 5 → tile a row 5 col 7 (2.0 px): other (old line 5, new feature 6)" in text
    assert "tile a row 1 col 1: conversion 2016 → conversion 2017 (old line 3, new feature 4)" in text
    assert "tile a row 2 col 2: conversion 2017 → stable_forest (old line 4, new feature 5)" in text
    assert "unchanged (" not in text
    # At most `examples` points per category, then how many more.
    many = points([("a", 50 + i, 0, "other", 0) for i in range(8)])
    lines = diff_labels(points(OLD[:1]), pd.concat([points(OLD[:1]), many], ignore_index=True), pixel_size=PIXEL).lines(examples=3)
    assert sum(ln.startswith("    tile") for ln in lines) == 3 and lines[-1] == "    ... and 5 more"


def test_record_is_json_and_holds_every_changed_point():
    rec = diff_labels(points(OLD), points(NEW), pixel_size=PIXEL).record()
    back = json.loads(json.dumps(rec, allow_nan=False))
    assert back["counts"]["added"] == 2 and back["counts_by_label"]["added"]["conversion"] == 2
    assert "unchanged" not in back and len(back["relabelled"]) == 2
    assert back["added"][0] == {"new_tile": "a", "new_row": 30, "new_col": 30, "new_x": 305.0, "new_y": -305.0, "new_label": "conversion", "new_onset_year": 2018, "new_source": 2}
    moved = back["moved"][0]
    assert moved["old_col"] == 5 and moved["new_col"] == 7 and moved["old_source"] == 5 and moved["new_source"] == 6 and moved["distance_px"] == 2.0
    assert back["removed"][0]["old_label"] == "other" and "new_label" not in back["removed"][0]


def test_greedy_pairing_takes_the_nearest_first_and_uses_each_point_once():
    # Columns (pixels): old A at 0, B at 2; new P at 3, Q at 5 (move_px 3).
    # Distances: A–P 3, A–Q 5, B–P 1, B–Q 3. Nearest first: B–P (1); then A–P and B–Q are spent,
    # A–Q is too far. A is removed and Q added, though A–P, B–Q would have paired both.
    old = points([("a", 0, 0, "other", 0), ("a", 0, 2, "other", 0)])
    new = points([("a", 0, 3, "other", 0), ("a", 0, 5, "other", 0)])
    d = diff_labels(old, new, pixel_size=PIXEL, move_px=3.0)
    assert d.counts() == {"added": 1, "removed": 1, "moved": 1, "relabelled": 0, "unchanged": 0}
    assert (d.moved.old_col[0], d.moved.new_col[0]) == (2, 3)
    assert d.removed.old_col.tolist() == [0] and d.added.new_col.tolist() == [5]
    # One old point, two new candidates: the nearer one is the move.
    d = diff_labels(points([("a", 0, 0, "other", 0)]), points([("a", 0, 2, "other", 0), ("a", 1, 1, "other", 0)]), pixel_size=PIXEL)
    assert (d.moved.new_row[0], d.moved.new_col[0]) == (1, 1) and d.moved.distance_px[0] == pytest.approx(np.sqrt(2))
    assert d.added.new_col.tolist() == [2]


def test_a_move_needs_the_same_label_and_year_and_at_most_move_px():
    old = points([("a", 0, 0, "conversion", 2016), ("a", 10, 0, "other", 0), ("a", 20, 0, "other", 0)])
    new = points([("a", 0, 1, "conversion", 2017), ("a", 10, 1, "stable_forest", 0), ("a", 20, 4, "other", 0)])
    d = diff_labels(old, new, pixel_size=PIXEL, move_px=3.0)
    # Another year, another label, 4 px > 3 px: none is a move.
    assert d.counts() == {"added": 3, "removed": 3, "moved": 0, "relabelled": 0, "unchanged": 0}
    # Exactly move_px is a move; so is the far one once move_px allows it.
    assert diff_labels(old, new, pixel_size=PIXEL, move_px=4.0).moved[["old_row", "new_col"]].values.tolist() == [[20, 4]]
    assert diff_labels(old, new, pixel_size=PIXEL, move_px=0.0).counts()["moved"] == 0


def test_a_move_across_a_tile_seam():
    # Last column of tile a to the first of tile b: one pixel apart on the ground.
    d = diff_labels(points([("a", 3, 99, "conversion", 2018)]), points([("b", 3, 0, "conversion", 2018)]), pixel_size=PIXEL)
    assert d.counts()["moved"] == 1 and d.moved.distance_px[0] == pytest.approx(1.0)
    assert "tile a row 3 col 99 → tile b row 3 col 0 (1.0 px)" in "\n".join(d.lines())


def test_onset_year_only_relabel():
    d = diff_labels(points([("a", 4, 4, "conversion", 2016)]), points([("a", 4, 4, "conversion", 2015)]), pixel_size=PIXEL)
    assert d.counts() == {"added": 0, "removed": 0, "moved": 0, "relabelled": 1, "unchanged": 0}
    assert d.relabelled[["old_onset_year", "new_onset_year"]].values.tolist() == [[2016, 2015]]
    assert d.counts_by_label()["relabelled"] == {"conversion year changed": 1}


def test_identical_sets_are_all_unchanged_in_any_order():
    old = points(OLD)
    new = points(OLD).iloc[::-1].reset_index(drop=True)
    d = diff_labels(old, new, pixel_size=PIXEL)
    assert d.counts() == {"added": 0, "removed": 0, "moved": 0, "relabelled": 0, "unchanged": 5}
    assert not d.changed and d.lines() == ["label changes: added 0, removed 0, moved 0, relabelled 0, unchanged 5"]
    rec = d.record()
    assert all(rec[c] == [] for c in CATEGORIES if c != "unchanged")
    assert sorted(d.unchanged.new_index.tolist()) == [0, 1, 2, 3, 4]


def test_a_runs_points_table_without_sources():
    # points.csv of a run: no source column, empty onset year for non-conversions.
    old = points(OLD).drop(columns="source")
    old["onset_year"] = old["onset_year"].where(old["label"] == "conversion")
    d = diff_labels(old, points(NEW), pixel_size=PIXEL)
    assert d.counts() == {"added": 2, "removed": 1, "moved": 1, "relabelled": 2, "unchanged": 1}
    text = "\n".join(d.lines())
    assert "tile a row 20 col 20: other\n" in text + "\n"  # no source to name
    assert "(new line 6)" in text and "old line" not in text
    json.dumps(d.record(), allow_nan=False)


def test_bad_tables_are_refused():
    with pytest.raises(LabelError, match=r"old labels: missing column\(s\) \['onset_year'\]"):
        diff_labels(points(OLD).drop(columns="onset_year"), points(NEW), pixel_size=PIXEL)
    twice = points([("a", 1, 1, "other", 0), ("a", 1, 1, "other", 0)])
    with pytest.raises(LabelError, match="new labels: pixel \\(tile a, row 1, col 1\\) appears 2 times"):
        diff_labels(points(OLD), twice, pixel_size=PIXEL)
    with pytest.raises(ValueError, match="pixel_size"):
        diff_labels(points(OLD), points(NEW), pixel_size=0.0)
    with pytest.raises(ValueError, match="move_px"):
        diff_labels(points(OLD), points(NEW), pixel_size=PIXEL, move_px=-1)


def test_module_needs_no_torch():
    code = "import sys; import plantation.reference.diff; assert 'torch' not in sys.modules, 'torch imported'"
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
