"""Retraining pieces on tiny inputs: weights carried into a longer series, run records and lineage, run names."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
import torch

from plantation.errors import ConfigError
from plantation.model import runs
from plantation.model.network import ConvRecurrentNet
from plantation.model.transfer import carry_weights, transfer_spec
from plantation.retraining.retrain import next_run_name


def _spec(years: int) -> dict:
    date_year = [y for y in range(years) for _ in range(2)]
    return {"n_channels": 4, "date_year": date_year, "day_of_year": [0.2, 0.7] * years, "neighbourhood": 3, "date_width": 4, "conv_width": 4, "hidden": 8, "mean": [0.0] * 4, "std": [1.0] * 4}


def test_a_network_extended_by_a_year_keeps_every_learnt_weight_and_scores_the_new_year():
    torch.manual_seed(0)
    parent = ConvRecurrentNet(**_spec(3))
    child_spec = transfer_spec(_spec(3), {**_spec(4), "mean": [9.0] * 4}, parent_years=[2015, 2016, 2017], child_years=[2015, 2016, 2017, 2018])
    assert child_spec["mean"] == [0.0] * 4  # the parent's normalisation: the weights were learnt on it
    child = carry_weights(parent.state_dict(), child_spec)
    for k, v in parent.state_dict().items():
        if k not in ("date_year", "season", "dates_in_year"):
            assert torch.equal(v, child.state_dict()[k]), k
    x = torch.randn(2, 8, 4, 3, 3)
    valid = torch.ones(2, 8, 3, 3, dtype=torch.bool)
    assert child.eval()(x, valid).shape == (2, parent.n_outcomes + 1)


@pytest.mark.parametrize(
    ("child_years", "message"),
    [([2016, 2017, 2018], "same first year"), ([2015, 2016], "does not shrink")],
)
def test_a_series_that_moves_its_start_or_shrinks_is_refused(child_years, message):
    with pytest.raises(ConfigError, match=message):
        transfer_spec(_spec(3), _spec(len(child_years)), parent_years=[2015, 2016, 2017], child_years=child_years)


def test_a_network_of_another_shape_is_refused():
    with pytest.raises(ConfigError, match="hidden"):
        transfer_spec(_spec(3), {**_spec(3), "hidden": 16}, parent_years=[2015, 2016, 2017], child_years=[2015, 2016, 2017])


def test_points_and_lineage_round_trip(tmp_path):
    pts = pd.DataFrame(
        {"tile": ["t01", "t01", "t02"], "row": [1, 2, 3], "col": [4, 5, 6], "x": [0.0, 1.0, 2.0], "y": [0.0, 1.0, 2.0], "label": ["conversion", "other", "stable_forest"], "onset_year": [2019, 0, 0]}
    )
    runs.write_points(tmp_path, pts, {("t01", 1, 4): 0, ("t01", 2, 5): 2})
    back = runs.read_points(tmp_path)
    assert back["split"].tolist() == [0, 2, -1]
    assert runs.split_of_points(back) == {("t01", 1, 4): 0, ("t01", 2, 5): 2, ("t02", 3, 6): -1}
    rec = runs.lineage_record(run="r_v2", start="warm", labels_fingerprint="abc", years=[2013, 2024], parent="/somewhere/r")
    runs.write_lineage(tmp_path, rec)
    assert runs.read_lineage(tmp_path)["parent"] == "/somewhere/r"
    (tmp_path / "lineage.json").write_text('{"format": "other"}')
    with pytest.raises(Exception, match="format"):
        runs.read_lineage(tmp_path)


def test_runs_are_listed_parents_first(tmp_path):
    for name, parent in (("b_v2", "a"), ("a", None)):
        folder = tmp_path / name
        (folder / "model").mkdir(parents=True)
        (folder / "model" / "model.json").write_text('{"years": [2013, 2024]}')
        (folder / "labels.json").write_text('{"counts": {"stable_forest": 5, "conversion": 3}}')
        (folder / "metrics.json").write_text('{"test": {"n": 4, "label_accuracy": 0.75, "year_exact": 0.5, "nll": 0.9}}')
        runs.write_lineage(folder, runs.lineage_record(run=name, start="warm" if parent else "afresh", labels_fingerprint="x", years=[2013, 2024], parent=str(tmp_path / parent) if parent else None))
    listed = runs.list_runs(tmp_path)
    assert [r.name for r in listed] == ["a", "b_v2"]
    assert listed[0].labels == 8 and listed[0].conversions == 3
    table = "\n".join(runs.runs_table(listed))
    assert "b_v2" in table and "warm" in table


@pytest.mark.parametrize(("parent", "child"), [("toy_seed0", "toy_seed0_v2"), ("toy_seed0_v2", "toy_seed0_v3"), ("x_v9", "x_v10")])
def test_run_names_count_versions(parent, child):
    assert next_run_name(parent) == child


def test_runs_folder_missing_is_one_clear_error(tmp_path):
    with pytest.raises(FileNotFoundError, match="no runs folder"):
        runs.list_runs(tmp_path / "none")


@pytest.mark.slow
def test_a_short_retrain_on_the_toy_region_extends_a_year_and_records_its_parent(tmp_path, capsys):
    from plantation.cli import main

    labels = pd.read_csv(Path(__file__).resolve().parents[1] / "toy_tiles" / "labels.csv")
    old = labels.copy()
    late = old["onset_year"] == 2024  # before the 2024 imagery, an interpreter saw forest there
    old.loc[late, "label"], old.loc[late, "onset_year"] = "stable_forest", None
    old.iloc[:2500].to_csv(tmp_path / "old.csv", index=False)
    quick = ["network.members=2", "distillation.enabled=false", "training.max_epochs=1", "calibration.bbse_pixels=500", "trainer.enable_progress_bar=false", f"out_dir={tmp_path / 'runs'}"]
    assert main(["train", *quick, "run_name=p", "region.end_date=2023-12-31", f"region.labels.path={tmp_path / 'old.csv'}"]) == 0
    assert main(["retrain", *quick, f"parent={tmp_path / 'runs' / 'p'}"]) == 0
    out = capsys.readouterr().out
    assert "label changes: added 500, removed 0, moved 0, relabelled" in out
    assert "the series grew from 2013-2023 to 2013-2024" in out
    child = tmp_path / "runs" / "p_v2"
    lineage = runs.read_lineage(child)
    assert lineage["start"] == "extended" and lineage["parent"] == str((tmp_path / "runs" / "p").resolve())
    assert set(lineage["comparison"]["metrics"]) == {"label_accuracy", "year_exact", "nll"}
    # Every point the parent had keeps its split.
    before = runs.split_of_points(runs.read_points(tmp_path / "runs" / "p"))
    after = runs.split_of_points(runs.read_points(child))
    assert all(after[k] == s for k, s in before.items() if k in after)
    assert main(["runs", f"out_dir={tmp_path / 'runs'}"]) == 0
    assert "p_v2" in capsys.readouterr().out
