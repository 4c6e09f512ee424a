"""Region priors: the config keys, inclusion probabilities in the labels, the card's prior shift, old cards, the map's tag, and a whole run."""

from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import asdict, replace
from pathlib import Path

import numpy as np
import pytest
import rasterio
import torch

from plantation.config import to_object
from plantation.errors import ConfigError, LabelError
from plantation.imagery.config import LabelsConfig, PopulationShares, RegionConfig, check_labels_config, population_shares
from plantation.imagery.region import open_region
from plantation.mapping.tiles import Settings, map_tile
from plantation.model import artefact
from plantation.model.artefact import calibrated_log_probs
from plantation.model.calibration import population_prior, prior_from_shares, reweight
from plantation.model.card import Calibration, ModelCard
from plantation.model.config import CalibrationConfig
from plantation.model.network import ConvRecurrentNet
from plantation.model.training import TrainConfig, check_config, resolve_prior
from plantation.reference.labels import read_labels
from tests.conftest import BANDS, DATES
from tests.test_labels import GRIDS, YEARS, lonlat

ROOT = Path(__file__).resolve().parents[1]
SHARES = {"stable_forest": 0.7, "conversion": 0.1, "old_plantation": 0.1, "other": 0.1}
#: A network for the conftest region: 5 dates in 2015-2017, 6 bands + 4 indices.
SPEC = {"n_channels": 10, "date_year": [0, 0, 1, 1, 2], "day_of_year": [0.12, 0.62, 0.12, 0.62, 0.62], "neighbourhood": 3, "conv_width": 4, "hidden": 8, "dropout": 0.0}
K = 3 + 3  # stable forest, old plantation, other + conversion in 2015, 2016, 2017


# --------------------------------------------------------------------------- config


def test_region_config_reads_shares_and_inclusion_column():
    r = to_object({"name": "x", "labels": {"population_shares": SHARES, "inclusion_column": "pi"}}, RegionConfig)
    assert population_shares(r.labels) == SHARES and r.labels.inclusion_column == "pi"
    check_labels_config(r.labels)
    # Unset (every group null) means unknown; a misspelt group is an unknown key.
    assert population_shares(to_object({"name": "x"}, RegionConfig).labels) is None
    with pytest.raises(ConfigError, match="labels.population_shares.palm: Key 'palm' not in 'PopulationShares'"):
        to_object({"name": "x", "labels": {"population_shares": {"palm": 0.5}}}, RegionConfig)


@pytest.mark.parametrize(
    ("shares", "message"),
    [
        ({**SHARES, "conversion": 0.3}, "sum to 1.2, not 1"),
        ({**SHARES, "palm": 0.0}, r"unknown group\(s\) \['palm'\]"),
        ({k: v for k, v in SHARES.items() if k != "other"}, r"missing \['other'\]"),
        ({"conversion": 0.3}, r"missing \['stable_forest', 'old_plantation', 'other'\]"),
        ({**SHARES, "stable_forest": 1.1, "conversion": -0.3}, r"must be shares in \[0, 1\]"),
    ],
)
def test_bad_population_shares_are_refused(shares, message):
    with pytest.raises(ConfigError, match=f"region.labels.population_shares: .*{message}"):
        # A plain mapping (as a library caller may pass) is checked like the typed node.
        check_labels_config(LabelsConfig(population_shares=shares))  # type: ignore[arg-type]
    if set(shares) <= set(SHARES):
        with pytest.raises(ConfigError, match=message):
            check_labels_config(LabelsConfig(population_shares=PopulationShares(**shares)))


def test_prior_choice_auto_and_refusals():
    assert resolve_prior(CalibrationConfig(), LabelsConfig()) == "bbse"
    assert resolve_prior(CalibrationConfig(), LabelsConfig(inclusion_column="pi")) == "inclusion"
    assert resolve_prior(CalibrationConfig(), LabelsConfig(population_shares=PopulationShares(**SHARES), inclusion_column="pi")) == "shares"
    assert resolve_prior(CalibrationConfig(prior="bbse"), LabelsConfig(population_shares=PopulationShares(**SHARES))) == "bbse"
    assert resolve_prior(CalibrationConfig(prior="sample"), LabelsConfig(inclusion_column="pi")) == "sample"
    with pytest.raises(ConfigError, match="calibration.prior: 'posterior' is not one of"):
        resolve_prior(CalibrationConfig(prior="posterior"), LabelsConfig())
    with pytest.raises(ConfigError, match="needs region.labels.population_shares"):
        check_config(TrainConfig(calibration=CalibrationConfig(prior="shares")))
    with pytest.raises(ConfigError, match="needs region.labels.inclusion_column"):
        check_config(TrainConfig(calibration=CalibrationConfig(prior="inclusion")))
    with pytest.raises(ConfigError, match="calibration.bbse_pixels"):
        check_config(TrainConfig(calibration=CalibrationConfig(bbse_pixels=0)))


# --------------------------------------------------------------------------- inclusion probabilities in the labels


def _csv(path: Path, rows: list[tuple]) -> Path:
    lines = ["x,y,label,onset_year,pi"] + [",".join("" if v is None else str(v) for v in r) for r in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_inclusion_probabilities_are_read_and_give_the_hajek_prior(tmp_path):
    rows = [(*lonlat(0, 0), "conversion", 2016, 0.5), (*lonlat(1, 1), "stable_forest", None, 0.05), (*lonlat(2, 2), "stable_forest", None, 0.05), (*lonlat(3, 3), "other", None, 0.25)]
    ls = read_labels(_csv(tmp_path / "l.csv", rows), grids=GRIDS, years=YEARS, inclusion_column="pi")
    np.testing.assert_allclose(ls.points["inclusion"], [0.5, 0.05, 0.05, 0.25])
    # Weights 2, 20, 20, 4 (sum 46): forest 40/46, other 4/46, conversion 2/46.
    q = population_prior(np.array([4, 0, 0, 2]), ls.points["inclusion"].to_numpy(), 6, floor=0.0)
    np.testing.assert_allclose(q, [40 / 46, 0, 4 / 46, 0, 2 / 46, 0])
    # Without the key the column is ignored.
    assert "inclusion" not in read_labels(tmp_path / "l.csv", grids=GRIDS, years=YEARS).points


@pytest.mark.parametrize(("pi", "shown"), [("0", "0"), ("1.5", "1.5"), ("-0.1", "-0.1"), ("", "nan"), ("often", "'often'")])
def test_inclusion_outside_0_1_is_refused_with_file_and_line(tmp_path, pi, shown):
    path = tmp_path / "l.csv"
    path.write_text(f"x,y,label,onset_year,pi\n{lonlat(0, 0)[0]},{lonlat(0, 0)[1]},stable_forest,,0.5\n{lonlat(1, 1)[0]},{lonlat(1, 1)[1]},other,,{pi}\n")
    with pytest.raises(LabelError) as err:
        read_labels(path, grids=GRIDS, years=YEARS, inclusion_column="pi")
    msg = str(err.value)
    assert msg.startswith(f"{path}: line 3: inclusion probability ") and "not a number in (0, 1]" in msg and "\n" not in msg
    assert shown in msg


def test_missing_inclusion_column_is_refused(tmp_path):
    path = tmp_path / "l.csv"
    path.write_text(f"x,y,label,onset_year\n{lonlat(0, 0)[0]},{lonlat(0, 0)[1]},stable_forest,\n")
    with pytest.raises(LabelError, match=r"missing column\(s\) \['weight'\]"):
        read_labels(path, grids=GRIDS, years=YEARS, inclusion_column="weight")


# --------------------------------------------------------------------------- the card's prior shift


def _cal(**kw: object) -> Calibration:
    base = {"temperature": 1.3, "loss_weights": [1.0, 2.0, 1.5, 0.5, 0.7, 0.9], "train_prior": [0.3, 0.1, 0.2, 0.15, 0.15, 0.1]}
    base.update(kw)
    return Calibration(**base)  # type: ignore[arg-type]


@pytest.mark.parametrize("seed", range(5))
def test_target_prior_is_bayes_reweighting_of_the_sample_probabilities(seed):
    rng = np.random.default_rng(seed)
    z = torch.as_tensor(rng.normal(0, 3, (3, 50, K)))
    q = rng.dirichlet(np.ones(K))
    plain = calibrated_log_probs(z, _cal()).exp().numpy()
    shifted = calibrated_log_probs(z, _cal(target_prior=q.tolist(), prior_source="bbse")).exp().numpy()
    np.testing.assert_allclose(shifted, reweight(plain, _cal().train_prior, q), rtol=1e-9, atol=1e-12)
    # The target prior equal to the sample's changes nothing.
    same = calibrated_log_probs(z, _cal(target_prior=_cal().train_prior)).exp().numpy()
    np.testing.assert_allclose(same, plain, rtol=1e-9, atol=1e-12)


def test_no_target_prior_gives_todays_formula():
    rng = np.random.default_rng(0)
    z = torch.as_tensor(rng.normal(0, 3, (2, 20, K)))
    cal = _cal()
    lp = np.log(torch.softmax(z, -1).numpy().mean(0)) - np.log(cal.loss_weights)
    want = torch.log_softmax(torch.as_tensor(lp / cal.temperature), -1).numpy()
    np.testing.assert_allclose(calibrated_log_probs(z, cal).numpy(), want, rtol=1e-9, atol=1e-12)


def test_lower_conversion_share_lowers_p_conversion():
    rng = np.random.default_rng(1)
    z = torch.as_tensor(rng.normal(0, 2, (1, 200, K)))
    cal = _cal()
    groups = Calibration(train_prior=cal.train_prior).prior_groups()
    half = {g: v * (1 if g != "conversion" else 0.5) for g, v in groups.items()}
    total = sum(half.values())
    q = prior_from_shares({g: v / total for g, v in half.items()}, np.array(cal.train_prior))
    p0 = calibrated_log_probs(z, cal).exp().numpy()[..., 3:].sum(-1)
    p1 = calibrated_log_probs(z, replace(cal, target_prior=q.tolist(), prior_source="shares")).exp().numpy()[..., 3:].sum(-1)
    assert (p1 < p0).all()


def test_a_target_prior_of_the_wrong_length_is_refused():
    z = torch.zeros(1, 2, K)
    with pytest.raises(Exception, match="target_prior .* one value per outcome"):
        calibrated_log_probs(z, _cal(target_prior=[0.5, 0.5]))


# --------------------------------------------------------------------------- old cards and the map's tag


def _card(cal: Calibration) -> ModelCard:
    return ModelCard(
        bands=BANDS,
        indices=["NDVI", "EVI", "NBR", "NDMI"],
        scaling=[{"start": None, "scale": 1e-4, "offset": 0.0}],
        dates=DATES,
        years=[2015, 2016, 2017],
        network=SPEC,
        members=2,
        calibration=cal,
        cutoff_year=2015,
        interval_level=0.8,
        region="tiny",
        labels_fingerprint="x",
        package_version="0",
    )


def _save(folder: Path, cal: Calibration) -> Path:
    nets = []
    for i in range(2):
        torch.manual_seed(i)
        nets.append(ConvRecurrentNet(**SPEC).eval())
    return artefact.save(folder, _card(cal), nets)


def _map(model: Path, region: RegionConfig, dest: Path) -> tuple[np.ndarray, dict[str, str]]:
    art = artefact.load(model)
    stack = open_region(region)[0]
    map_tile(stack, art, Settings(min_clear=1, cutoff_year=2015, interval_level=0.8, interval_mass=0.8, window=8, pixel_batch=64, threads=1, quicklook=False), dest, region=region)
    with rasterio.open(dest) as src:
        return src.read(), src.tags()


def test_old_card_loads_and_maps_as_before_and_the_tag_says_so(tmp_path, make_region):
    region = make_region()
    cal = _cal(loss_weights=[1.0] * K)
    new = _save(tmp_path / "new", cal)
    old = _save(tmp_path / "old", cal)
    raw = json.loads((old / "model.json").read_text())
    del raw["calibration"]["target_prior"], raw["calibration"]["prior_source"]
    (old / "model.json").write_text(json.dumps(raw))
    art = artefact.load(old)
    assert art.card.calibration.target_prior == [] and art.card.calibration.prior_source == "sample"
    got_old, tags_old = _map(old, region, tmp_path / "old.tif")
    got_new, _ = _map(new, region, tmp_path / "new.tif")
    np.testing.assert_array_equal(got_old, got_new)
    tag = json.loads(tags_old["probability_correction"])
    assert tag["prior"] == "sample"
    assert tag["target_prior_groups"] == pytest.approx({"stable_forest": 0.3, "conversion": 0.4, "old_plantation": 0.1, "other": 0.2})

    q = prior_from_shares(SHARES, np.array(cal.train_prior))
    shifted = _save(tmp_path / "shifted", replace(cal, target_prior=q.tolist(), prior_source="shares"))
    assert artefact.load(shifted).card.calibration.target_prior == pytest.approx(q.tolist())
    got, tags = _map(shifted, region, tmp_path / "shifted.tif")
    tag = json.loads(tags["probability_correction"])
    assert tag["prior"] == "shares" and tag["target_prior_groups"] == pytest.approx(SHARES)
    # Band 5 is p_conversion (× 1e-4): the region's lower conversion share (0.1 < 0.4) lowers it everywhere.
    assert (got[4] <= got_new[4]).all() and got[4].mean() < got_new[4].mean()


def test_card_round_trips_the_prior_fields(tmp_path):
    cal = _cal(target_prior=[0.5, 0.1, 0.1, 0.1, 0.1, 0.1], prior_source="inclusion")
    folder = _save(tmp_path / "m", cal)
    assert asdict(artefact.load(folder).card.calibration) == asdict(cal)


def test_card_round_trips_the_interval_curve_and_old_cards_keep_the_nominal_level(tmp_path):
    cal = _cal(interval_masses=[0.6, 0.7, 0.8, 0.9], interval_coverage=[0.71, 0.79, 0.86, 0.93])
    card = artefact.load(_save(tmp_path / "m", cal)).card
    assert card.calibration.interval_coverage == [0.71, 0.79, 0.86, 0.93]
    assert card.calibration.interval_mass(0.8) == 0.7
    old = _save(tmp_path / "old", _cal())
    raw = json.loads((old / "model.json").read_text())
    del raw["calibration"]["interval_masses"], raw["calibration"]["interval_coverage"]
    (old / "model.json").write_text(json.dumps(raw))
    assert artefact.load(old).card.calibration.interval_mass(0.8) == 0.8


# --------------------------------------------------------------------------- a whole run


QUICK = ["network.members=1", "training.max_epochs=2", "trainer.enable_progress_bar=false"]


def _train(tmp_path: Path, name: str, *overrides: str) -> Path:
    res = subprocess.run(
        [str(Path(sys.executable).parent / "plantation"), "train", f"out_dir={tmp_path}", f"run_name={name}", *QUICK, *overrides], cwd=ROOT, capture_output=True, text=True, timeout=900
    )
    assert res.returncode == 0, res.stderr[-3000:]
    return tmp_path / name


def _mean_p_conversion(run: Path, n: int = 3000) -> float:
    from omegaconf import OmegaConf

    from plantation.model.training import unlabelled_probs

    art = artefact.load(run / "model")
    cfg = to_object(OmegaConf.load(run / "config.yaml"), TrainConfig)
    probs = unlabelled_probs(art.members, art.card.calibration, open_region(cfg.region), cfg, n=n, seed=5)
    return float(probs[:, 3:].sum(-1).mean())


@pytest.mark.slow
def test_halving_the_conversion_share_lowers_the_regions_p_conversion(tmp_path):
    sample = _train(tmp_path, "sample", "calibration.prior=sample")
    # The toy labels are about 35% conversion; say the region has half that.
    shares = "{stable_forest:0.46,conversion:0.175,old_plantation:0.125,other:0.24}"
    shifted = _train(tmp_path, "shares", "calibration.prior=shares", f"region.labels.population_shares={shares}")
    ms, mh = (json.loads((r / "metrics.json").read_text()) for r in (sample, shifted))
    # The prior does not touch training, and the metrics stay those of the sample-mix probabilities.
    assert ms["test"] == mh["test"]
    assert ms["prior"]["prior"] == "sample" and ms["prior"]["target_prior"] == []
    assert mh["prior"]["prior"] == "shares" and mh["prior"]["target_prior_groups"]["conversion"] == pytest.approx(0.175, abs=1e-5)
    assert json.loads((shifted / "model" / "validation.json").read_text())["prior"]["prior"] == "shares"
    assert _mean_p_conversion(shifted) < _mean_p_conversion(sample)


@pytest.mark.slow
def test_bbse_prior_from_the_regions_pixels(tmp_path):
    run = _train(tmp_path, "bbse", "calibration.prior=bbse", "calibration.bbse_pixels=4000")
    m = json.loads((run / "metrics.json").read_text())
    if "refused" in m["prior"]:
        # A bbse estimate leaving a labelled group out is refused: the sample's mix is kept and the estimate recorded.
        refused = m["prior"]["refused"]
        assert m["prior"]["prior"] == "sample" and refused["source"] == "bbse" and refused["vanished"]
        assert all(refused["estimate_groups"][g] < 1e-4 for g in refused["vanished"])
        groups = refused["estimate_groups"]
    else:
        assert m["prior"]["prior"] == "bbse" and len(m["prior"]["target_prior"]) == 15
        groups = m["prior"]["target_prior_groups"]
    assert sum(groups.values()) == pytest.approx(1.0, abs=1e-4)
    # The toy region has much less conversion than its labels (about 35%).
    assert groups["conversion"] < m["prior"]["sample_prior_groups"]["conversion"]


def test_target_prior_from_shares_and_inclusion_probabilities():
    from types import SimpleNamespace

    import pandas as pd

    from plantation.model.outcomes import Outcomes
    from plantation.model.training import target_prior

    cal = _cal()
    samples = SimpleNamespace(outcomes=Outcomes((2015, 2016, 2017)))
    pts = pd.DataFrame({"label": ["conversion", "stable_forest", "stable_forest", "other"], "onset_year": [2016, 0, 0, 0], "inclusion": [0.5, 0.05, 0.05, 0.25]})
    labels = SimpleNamespace(points=pts)
    cfg = TrainConfig(region=RegionConfig(name="x", labels=LabelsConfig(population_shares=PopulationShares(**SHARES), inclusion_column="pi")))
    assert target_prior("sample", cfg, cal, samples, np.empty((0, K)), nets=[]) is None  # type: ignore[arg-type]
    q = target_prior("shares", cfg, cal, samples, np.empty((0, K)), nets=[])  # type: ignore[arg-type]
    assert Calibration(target_prior=q.tolist()).prior_groups() == pytest.approx(SHARES)
    q = target_prior("inclusion", cfg, cal, samples, np.empty((0, K)), nets=[], labels=labels)  # type: ignore[arg-type]
    # Weights 2, 20, 20, 4 (sum 46); conversion in 2016 is outcome 3 + 1.
    np.testing.assert_allclose(q, [40 / 46, 0, 4 / 46, 0, 2 / 46, 0], atol=1e-5)
