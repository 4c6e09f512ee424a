"""The faults benchmark's bookkeeping: counts, reruns of named cases, paths in the result."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from plantation.benchmarks.faults import FaultsConfig, relative_paths, select, summarise, with_earlier_rows
from plantation.errors import ConfigError


def _row(name: str, kind: str, held: bool = True, **detail: object) -> dict:
    return {"name": name, "kind": kind, "what": "", "held": held, "message": "", "corrupt_outputs": 0, "traceback": False, "pickle_executed": False, "detail": detail}


def test_counts_split_kills_from_refusals_and_keep_the_largest_resume_delta():
    rows = [
        _row("a", "kill"),
        _row("b", "kill", held=False),
        _row("c", "bad_input"),
        _row("d", "model_file"),
        _row("e", "resource", peak_rss_mb=900.0),
        _row("f", "kill", resume_metric_delta=-0.01, peak_rss_mb=1200.0),
        _row("g", "kill", resume_metric_delta=0.0),
    ]
    s = summarise(rows, FaultsConfig(memory_budget_mb=2048))
    assert (s["kills_tried"], s["kills_survived"]) == (4, 3)
    assert (s["bad_inputs_tried"], s["bad_inputs_refused"]) == (2, 2)
    assert s["cases_tried"] == 7 and s["cases_held"] == 6
    assert s["resume_metric_delta"] == -0.01 and s["peak_rss_mb"] == 1200.0 and s["memory_budget_mb"] == 2048


def test_a_rerun_of_named_cases_replaces_their_rows_and_keeps_the_others(tmp_path):
    result = tmp_path / "faults.json"
    result.write_text(json.dumps({"cases": [_row("a", "kill"), _row("b", "kill", held=False), _row("gone", "kill")]}))
    rows = with_earlier_rows([_row("b", "kill")], result, ["a", "b", "c"])
    assert [(r["name"], r["held"]) for r in rows] == [("a", True), ("b", True)]  # "gone" is no longer a case
    assert [r["name"] for r in with_earlier_rows([_row("c", "kill")], tmp_path / "none.json", ["a", "b", "c"])] == ["c"]


def test_paths_in_the_result_are_given_from_the_project():
    project = Path("/srv/some project")
    out = relative_paths({"message": "error: /srv/some project/bench/x.tif: bad", "n": [1, 2.5, None]}, project)
    assert out == {"message": "error: bench/x.tif: bad", "n": [1, 2.5, None]}


def test_an_unknown_case_name_is_refused_with_the_known_ones():
    with pytest.raises(ConfigError, match=r"cases: \['nope'\] are not fault cases; known: "):
        select([], ["nope"])
