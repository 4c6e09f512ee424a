"""The exported model: safetensors + JSON round trip, refusals, and calibrated outputs."""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch

from plantation.errors import InputNotFoundError, PlantationError
from plantation.model import artefact
from plantation.model.artefact import calibrated_log_probs
from plantation.model.card import Calibration, ModelCard
from plantation.model.network import ConvRecurrentNet

SPEC = {"n_channels": 4, "date_year": [0, 0, 1, 1], "day_of_year": [0.1, 0.6, 0.1, 0.6], "neighbourhood": 3, "conv_width": 4, "hidden": 8, "dropout": 0.0}


def _card(members: int = 2) -> ModelCard:
    return ModelCard(
        bands=["red", "nir"],
        indices=["NDVI", "NBR"],
        scaling=[{"start": None, "scale": 1e-4, "offset": 0.0}],
        dates=["2015-02-01", "2015-08-01", "2016-02-01", "2016-08-01"],
        years=[2015, 2016],
        network=SPEC,
        members=members,
        calibration=Calibration(temperature=1.5, loss_weights=[1.0, 2.0, 1.0, 0.5, 0.5], train_prior=[0.4, 0.1, 0.2, 0.15, 0.15]),
        cutoff_year=2015,
        interval_level=0.8,
        region="tiny",
        labels_fingerprint="abc",
        package_version="0",
    )


def _members(n: int = 2) -> list[ConvRecurrentNet]:
    out = []
    for i in range(n):
        torch.manual_seed(i)
        out.append(ConvRecurrentNet(**SPEC).eval())
    return out


def test_round_trip_gives_the_same_outputs(tmp_path):
    nets = _members()
    artefact.save(tmp_path / "m", _card(), nets)
    assert {p.name for p in (tmp_path / "m").iterdir()} == {"model.safetensors", "model.json"}
    art = artefact.load(tmp_path / "m")
    x = torch.randn(3, 4, 4, 3, 3)
    v = torch.ones(3, 4, 3, 3, dtype=torch.bool)
    with torch.no_grad():
        ref = torch.stack([n(x, v) for n in nets])
    with torch.no_grad():
        loaded = torch.stack([n(x, v) for n in art.members])
    torch.testing.assert_close(loaded, ref)
    assert art.card.calibration.temperature == 1.5 and art.card.years == [2015, 2016]


def test_calibrated_probabilities_follow_the_formula():
    z = torch.tensor([[[2.0, 0.0, 0.0, 1.0, -1.0]], [[0.0, 1.0, 0.0, 1.0, 0.0]]])  # (2 members, 1, 5)
    cal = Calibration(temperature=2.0, loss_weights=[1.0, 2.0, 1.0, 0.5, 0.5])
    mean_p = torch.softmax(z, -1).mean(0)
    expected = torch.softmax((torch.log(mean_p) - torch.log(torch.tensor(cal.loss_weights))) / 2.0, -1)
    torch.testing.assert_close(calibrated_log_probs(z, cal).exp(), expected)


def test_refusals_name_the_file(tmp_path):
    with pytest.raises(InputNotFoundError, match="model.json: model file not found"):
        artefact.load(tmp_path)
    artefact.save(tmp_path, _card(), _members())
    meta = json.loads((tmp_path / "model.json").read_text())
    (tmp_path / "model.json").write_text(json.dumps(meta | {"format": "other/9"}))
    with pytest.raises(PlantationError, match="format 'other/9'"):
        artefact.load(tmp_path)
    (tmp_path / "model.json").write_text(json.dumps(meta | {"network": SPEC | {"hidden": 16}}))
    with pytest.raises(PlantationError, match="member 0 does not match model.json"):
        artefact.load(tmp_path)
    (tmp_path / "model.json").write_text("{not json")
    with pytest.raises(PlantationError, match="not valid JSON"):
        artefact.load(tmp_path)


def test_weights_file_holds_no_pickle(tmp_path):
    artefact.save(tmp_path, _card(1), _members(1))
    raw = (tmp_path / "model.safetensors").read_bytes()
    header_len = int(np.frombuffer(raw[:8], dtype="<u8")[0])
    header = json.loads(raw[8 : 8 + header_len])  # the safetensors layout: a JSON header, then raw tensors
    assert header["__metadata__"]["format"] == artefact.FORMAT
    assert any(k.startswith("member0.gru.") for k in header)


def test_incomplete_card_and_damaged_weights_are_refused(tmp_path):
    artefact.save(tmp_path, _card(1), _members(1))
    meta = json.loads((tmp_path / "model.json").read_text())
    del meta["years"]
    (tmp_path / "model.json").write_text(json.dumps(meta))
    with pytest.raises(PlantationError, match="not a complete model card"):
        artefact.load(tmp_path)
    artefact.save(tmp_path, _card(1), _members(1))
    (tmp_path / "model.safetensors").write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{broken")
    with pytest.raises(PlantationError, match="model.safetensors: sha256 .* is not the .* recorded in model.json"):
        artefact.load(tmp_path)
    # Without a checksum to stop it first, the parser refuses the bytes itself.
    meta = json.loads((tmp_path / "model.json").read_text())
    (tmp_path / "model.json").write_text(json.dumps(meta | {"weights_sha256": ""}))
    with pytest.raises(PlantationError, match="cannot read the weights"):
        artefact.load(tmp_path)


def test_checksum_is_recorded_and_checked(tmp_path, caplog):
    import hashlib

    artefact.save(tmp_path, _card(1), _members(1))
    meta = json.loads((tmp_path / "model.json").read_text())
    assert meta["weights_sha256"] == hashlib.sha256((tmp_path / "model.safetensors").read_bytes()).hexdigest()
    # Another valid weights file of the same shape (other values): refused, though safetensors would read it.
    other = tmp_path / "other"
    artefact.save(other, _card(1), [ConvRecurrentNet(**SPEC).eval()])
    (tmp_path / "model.safetensors").write_bytes((other / "model.safetensors").read_bytes())
    with pytest.raises(PlantationError, match=r"model.safetensors: sha256 \w{12}… is not the \w{12}… recorded in model.json") as err:
        artefact.load(tmp_path)
    assert "\n" not in str(err.value)
    # A card from before checksums: loaded, with a warning saying to re-export.
    (tmp_path / "model.json").write_text(json.dumps({k: v for k, v in meta.items() if k != "weights_sha256"}))
    with caplog.at_level("WARNING"):
        art = artefact.load(tmp_path)
    assert art.card.weights_sha256 == "" and "records no checksum" in caplog.text and "re-export" in caplog.text


def test_card_with_wrong_types_or_binary_is_refused(tmp_path):
    artefact.save(tmp_path, _card(1), _members(1))
    meta = json.loads((tmp_path / "model.json").read_text())
    (tmp_path / "model.json").write_text(json.dumps(meta | {"bands": "red"}))
    with pytest.raises(PlantationError, match="model.json: bands is a str, expected a list"):
        artefact.load(tmp_path)
    (tmp_path / "model.json").write_text(json.dumps(meta | {"network": SPEC | {"no_such_argument": 1}}))
    with pytest.raises(PlantationError, match="model.json: the network's settings do not build a network"):
        artefact.load(tmp_path)
    (tmp_path / "model.json").write_bytes(b"\x80\x04\x95binary")
    with pytest.raises(PlantationError, match="model.json: not a model card .*binary"):
        artefact.load(tmp_path)


def test_inference_refuses_a_tile_the_model_was_not_trained_for(make_region):
    from plantation.errors import RegionError
    from plantation.imagery.config import ScalingRule
    from plantation.imagery.region import open_region
    from plantation.model.inference import check_compatible
    from tests.conftest import BANDS, DATES

    spec = SPEC | {"n_channels": 10, "date_year": [0, 0, 1, 1, 2], "day_of_year": [0.1, 0.6, 0.1, 0.6, 0.6]}
    card = _card(1)
    card.network, card.bands, card.indices, card.dates, card.years = spec, BANDS, ["NDVI", "EVI", "NBR", "NDMI"], DATES, [2015, 2016, 2017]
    card.scaling = [{"start": None, "scale": 1e-4, "offset": 0.0}]
    torch.manual_seed(0)
    art = artefact.Artefact(card, [ConvRecurrentNet(**spec).eval()])
    stack = open_region(make_region())[0]
    check_compatible(art, stack, [ScalingRule(None, 1e-4, 0.0)])
    with pytest.raises(RegionError, match="scaling rules"):
        check_compatible(art, stack, [ScalingRule(None, 1e-4, -0.1)])
    card.dates = [*DATES[:4], "2017-09-01"]
    with pytest.raises(RegionError, match="date 5 is 2017-08-15, the model was trained with 2017-09-01"):
        check_compatible(art, stack)
