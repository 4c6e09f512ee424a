"""Model files that cannot be trusted, refused in one line and never run.

A pickle planted as the weights, the card or a checkpoint is refused and
never runs; weights changed after export are refused by their checksum; no
loader of the package unpickles.

The payload is live: the first test shows plain ``pickle.loads`` (what
``torch.load(weights_only=False)`` does) creates the marker file, so its
absence afterwards means the tool never ran it.
"""

from __future__ import annotations

import pickle
import re
from pathlib import Path

import pytest
import torch

from plantation.benchmarks.faults.models import Payload, pickle_payload
from plantation.errors import FileFormatError, PlantationError, RegionError
from plantation.imagery.config import ScalingRule
from plantation.imagery.region import open_region
from plantation.model import artefact, training
from plantation.model.card import check_bands
from plantation.model.inference import check_compatible
from plantation.model.network import ConvRecurrentNet
from plantation.model.training import load_finished, resumable_checkpoint
from tests.conftest import BANDS, DATES
from tests.test_artefact import SPEC, _card, _members

PACKAGE = Path(__file__).resolve().parents[1] / "plantation"


def test_the_payload_runs_when_unpickled(tmp_path):
    marker = tmp_path / "ran"
    pickle.loads(pickle_payload(marker))
    assert marker.exists()


@pytest.fixture
def exported(tmp_path: Path) -> Path:
    folder = tmp_path / "model"
    artefact.save(folder, _card(1), _members(1))
    return folder


@pytest.mark.parametrize("name", ["model.safetensors", "model.json"])
@pytest.mark.parametrize("checksum", [True, False])
def test_pickle_planted_in_the_artefact_is_refused_and_never_runs(exported, tmp_path, name, checksum):
    if not checksum:  # a card from before checksums: the parser itself must refuse the bytes
        card = artefact.read_card(exported)
        card.weights_sha256 = ""
        artefact.write_card(exported, card)
    marker = tmp_path / "ran"
    (exported / name).write_bytes(pickle_payload(marker))
    with pytest.raises(FileFormatError) as err:
        artefact.load(exported)
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith(str(exported / name))
    assert not marker.exists()


@pytest.mark.parametrize("form", ["raw pickle", "torch.save"])
def test_pickle_planted_as_the_checkpoint_to_resume_is_refused_and_never_runs(tmp_path, form):
    marker = tmp_path / "ran"
    path = training.last_checkpoint(tmp_path, "member0")
    path.parent.mkdir(parents=True)
    if form == "raw pickle":
        path.write_bytes(pickle_payload(marker))
    else:
        torch.save({"state_dict": {}, "loops": {}, "epoch": 0, "hook": Payload(marker)}, path)
    with pytest.raises(FileFormatError, match=r"member0-last.ckpt: refused as a checkpoint to resume from \(it holds objects other than tensors") as err:
        resumable_checkpoint(tmp_path, "member0")
    assert "\n" not in str(err.value)
    assert not marker.exists()


def test_checkpoint_of_plain_values_is_accepted_and_others_refused(tmp_path):
    path = training.last_checkpoint(tmp_path, "member0")
    path.parent.mkdir(parents=True)
    torch.save({"state_dict": {"w": torch.ones(2)}, "loops": {"fit_loop": {}}, "epoch": 1, "hyper_parameters": {"net": {"hidden": 8}}}, path)
    assert resumable_checkpoint(tmp_path, "member0") == (path, 2)
    torch.save({"weights": torch.ones(2)}, path)
    with pytest.raises(FileFormatError, match="not a training checkpoint"):
        resumable_checkpoint(tmp_path, "member0")
    path.write_bytes(b"PK\x03\x04 truncated")
    with pytest.raises(FileFormatError, match=r"refused as a checkpoint to resume from \(unreadable\)"):
        resumable_checkpoint(tmp_path, "member0")
    assert resumable_checkpoint(tmp_path, "member1") is None


def test_finished_member_changed_after_it_was_recorded_is_refused(tmp_path):
    net = _members(1)[0]
    doc = {"format": training.RESUME_FORMAT, "key": "k", "finished": {}}
    (tmp_path / "checkpoints").mkdir()
    training.finish(tmp_path, doc, "member0", net, 4)
    fresh = _members(2)[1]
    assert load_finished(tmp_path, doc, "member0", fresh) == 4
    torch.testing.assert_close(fresh.state_dict(), net.state_dict())
    (tmp_path / "checkpoints" / "member0.safetensors").write_bytes(pickle_payload(tmp_path / "ran"))
    with pytest.raises(FileFormatError, match=r"member0.safetensors: missing or changed since member0 finished"):
        load_finished(tmp_path, doc, "member0", fresh)
    assert not (tmp_path / "ran").exists()


def test_mismatched_region_is_refused_with_expected_and_found(make_region):
    spec = SPEC | {"n_channels": 10, "date_year": [0, 0, 1, 1, 2], "day_of_year": [0.1, 0.6, 0.1, 0.6, 0.6]}
    card = _card(1)
    card.network, card.bands, card.indices, card.dates, card.years = spec, list(BANDS), ["NDVI", "EVI", "NBR", "NDMI"], list(DATES), [2015, 2016, 2017]
    card.scaling = [{"start": None, "scale": 1e-4, "offset": 0.0}]
    art = artefact.Artefact(card, [ConvRecurrentNet(**spec).eval()])
    stack = open_region(make_region())[0]
    check_compatible(art, stack, [ScalingRule(None, 1e-4, 0.0)])
    with pytest.raises(RegionError, match=r"scaling rules differ from the model's \(rule 1 has offset -0.1 here, 0.0 in the model\)"):
        check_compatible(art, stack, [ScalingRule(None, 1e-4, -0.1)])
    with pytest.raises(RegionError, match=r"scaling rules differ from the model's \(2 here, 1 in the model\)"):
        check_compatible(art, stack, [ScalingRule(None, 1e-4, 0.0), ScalingRule("2016-01-01", 1e-4, -0.1)])
    swapped = [BANDS[1], BANDS[0], *BANDS[2:]]
    with pytest.raises(RegionError, match=re.escape(f"item 1 is {BANDS[1]!r} here, {BANDS[0]!r} in the model")):
        check_bands(card, swapped, "region 'x'")
    card.dates = [*DATES[:4], "2018-09-01"]
    with pytest.raises(RegionError, match=r"date 5 is 2017-08-15, the model was trained with 2018-09-01 \(5 dates, years 2015-2017 here; 5 dates, years 2015-2018 in the model\)"):
        check_compatible(art, stack)


def test_no_loader_in_the_package_unpickles():
    """Every torch.load passes weights_only=True; pickle, joblib and dill are not used to read anything (the faults benchmark's payload maker only writes one)."""
    allowed_pickle = {PACKAGE / "benchmarks" / "faults" / "models.py"}
    bad = []
    for path in PACKAGE.rglob("*.py"):
        text = path.read_text()
        for n, line in enumerate(text.splitlines(), 1):
            code = line.split("#", 1)[0]
            if "torch.load(" in code and "weights_only=True" not in code:
                bad.append(f"{path}:{n}: {line.strip()}")
            if re.search(r"\b(pickle\.loads?|joblib\.load|dill\.loads?|load_from_checkpoint)\(", code):
                bad.append(f"{path}:{n}: {line.strip()}")
            if re.search(r"^\s*(import|from) (pickle|joblib|dill|cloudpickle)\b", code) and path not in allowed_pickle:
                bad.append(f"{path}:{n}: {line.strip()}")
            if re.search(r"\.fit\(.*ckpt_path=", code) and "weights_only=True" not in code:
                bad.append(f"{path}:{n}: {line.strip()}")
    assert not bad, bad


def test_plantation_error_is_what_the_cli_prints():
    # The refusals above are PlantationErrors, which the command prints as one `error:` line (exit 1) rather than a traceback.
    assert issubclass(FileFormatError, PlantationError)
