"""Model files that cannot be trusted: pickles planted where the artefact's files are expected, weights changed after export, a model meeting a region it was not trained for.

Every case works on a copy of the workspace's run folder whose artefact is
written again (:func:`model_copy`), so it carries the weights' checksum
whatever code built the workspace. The tool must refuse each file in one
line naming it, run no planted code (a marker file the payload would create
stays absent) and write nothing that looks like a result.
"""

from __future__ import annotations

import pickle
import shutil
from pathlib import Path

from safetensors.torch import load_file, save_file

from plantation.benchmarks.faults import Case, Outcome, Ran, Workspace
from plantation.model import artefact

#: Name of the file a planted payload creates when it is unpickled.
MARKER = "PICKLE_RAN"


class Payload:
    """An object whose unpickling creates ``marker`` (what a malicious model file would do instead, with worse code).

    ``__reduce__`` tells pickle to rebuild it by calling ``open(marker, "w")``;
    only a loader that runs pickled calls creates the file.
    """

    def __init__(self, marker: Path) -> None:
        self.marker = str(marker)

    def __reduce__(self) -> tuple[object, tuple[str, str]]:
        return (open, (self.marker, "w"))


def pickle_payload(marker: Path) -> bytes:
    """The bytes of a pickle that creates ``marker`` when loaded by plain unpickling (as torch's loader does without ``weights_only``).

    Protocol 2, torch's own, so a checkpoint loader reads it as far as its first refused object.
    """
    return pickle.dumps(Payload(marker), protocol=2)


def model_copy(ws: Workspace, dest: Path) -> Path:
    """A copy of the workspace's run folder under ``dest`` with its artefact saved again (weights' sha256 in the card); the run folder."""
    run = dest / "run"
    shutil.copytree(ws.model, run)
    art = artefact.load(run / "model")
    artefact.save(run / "model", art.card, art.members, art.distilled)
    return run


def refusal(r: Ran, scratch: Path, *, names: str, out: Path | None = None) -> Outcome:
    """The outcome of a run that must be refused in one line naming ``names``, with no payload run and nothing written to ``out``."""
    ran = (scratch / MARKER).exists()
    written = [p for p in out.rglob("*") if p.is_file() and p.suffix in (".tif", ".json", ".csv")] if out is not None and out.exists() else []
    held = r.refused_in_one_line() and names in r.last_line and not ran and not written
    return Outcome(
        held=held,
        message=r.last_line,
        corrupt_outputs=len(written),
        traceback=r.traceback,
        pickle_executed=ran,
        detail={"returncode": r.returncode, "names_file": names in r.last_line, "seconds": round(r.seconds, 1)},
    )


def _map(ws: Workspace, scratch: Path, model: Path, region: Path | None = None) -> tuple[Ran, Path]:
    out = scratch / "map"
    return ws.cli("map", f"region={region or ws.region}", f"model={model}", f"out_dir={out}", *ws.map_keys), out


def weights_pickle(ws: Workspace, scratch: Path) -> Outcome:
    run = model_copy(ws, scratch)
    (run / "model" / "model.safetensors").write_bytes(pickle_payload(scratch / MARKER))
    r, out = _map(ws, scratch, run)
    return refusal(r, scratch, names="model.safetensors", out=out)


def card_pickle(ws: Workspace, scratch: Path) -> Outcome:
    run = model_copy(ws, scratch)
    (run / "model" / "model.json").write_bytes(pickle_payload(scratch / MARKER))
    r, out = _map(ws, scratch, run)
    return refusal(r, scratch, names="model.json", out=out)


def weights_swapped(ws: Workspace, scratch: Path) -> Outcome:
    """Weights of the same shape but other values (a valid safetensors file): only the checksum can tell."""
    run = model_copy(ws, scratch)
    path = run / "model" / "model.safetensors"
    tensors = load_file(str(path))
    key = next(k for k, v in tensors.items() if v.is_floating_point() and v.numel() > 1)
    tensors[key] = tensors[key] * 1.5
    save_file(tensors, str(path), metadata={"format": "plantation-model/2"})
    r, out = _map(ws, scratch, run)
    return refusal(r, scratch, names="model.safetensors: sha256", out=out)


def suggest_pickle(ws: Workspace, scratch: Path) -> Outcome:
    run = model_copy(ws, scratch)
    (run / "model" / "model.safetensors").write_bytes(pickle_payload(scratch / MARKER))
    out = scratch / "suggest"
    r = ws.cli("suggest", f"region={ws.region}", f"model={run}", f"out_dir={out}", "n=20", "candidates=2000", "progress=false")
    return refusal(r, scratch, names="model.safetensors", out=out)


def retrain_pickle(ws: Workspace, scratch: Path) -> Outcome:
    run = model_copy(ws, scratch)
    (run / "model" / "model.safetensors").write_bytes(pickle_payload(scratch / MARKER))
    out = scratch / "runs"
    r = ws.cli("retrain", f"region={ws.region}", f"parent={run}", f"out_dir={out}", "run_name=child", "trainer.enable_progress_bar=false")
    return refusal(r, scratch, names="model.safetensors", out=out)


def _region_with(ws: Workspace, scratch: Path, old: str, new: str) -> Path:
    text = ws.region.read_text()
    if old not in text:
        raise RuntimeError(f"the workspace's region file has no {old!r} to change")
    region = scratch / "region.yaml"
    region.write_text(text.replace(old, new, 1))
    return region


def band_order(ws: Workspace, scratch: Path) -> Outcome:
    """The region lists the same band roles in another order (blue and green swapped): the model would read green as blue."""
    run = model_copy(ws, scratch)
    region = _region_with(ws, scratch, "bands: [blue, green,", "bands: [green, blue,")
    r, out = _map(ws, scratch, run, region)
    out_ = refusal(r, scratch, names="item 1 is 'green' here, 'blue' in the model", out=out)
    return out_


def other_scaling(ws: Workspace, scratch: Path) -> Outcome:
    """The region's scaling rule differs from the one the model was trained with (another scale factor)."""
    import yaml

    run = model_copy(ws, scratch)
    doc = yaml.safe_load(ws.region.read_text())
    rules = doc.get("scaling") or []
    if not rules:
        raise RuntimeError("the workspace's region file has no scaling rule to change")
    rules[0]["scale"] = float(rules[0]["scale"]) * 2
    region = scratch / "region.yaml"
    region.write_text(yaml.safe_dump(doc, sort_keys=False))
    r, out = _map(ws, scratch, run, region)
    return refusal(r, scratch, names="rule 1 has scale", out=out)


CASES: list[Case] = [
    Case("model_weights_pickle", "model_file", "a pickle that would create a file planted as model.safetensors: `map` refuses it in one line, the pickle never runs", weights_pickle),
    Case("model_card_pickle", "model_file", "a pickle planted as model.json: `map` refuses it in one line as a card that is not text, the pickle never runs", card_pickle),
    Case("model_weights_swapped", "model_file", "valid weights of the same shape but other values put in model.safetensors: `map` refuses them by the card's sha256", weights_swapped),
    Case("model_suggest_pickle", "model_file", "a pickle planted as model.safetensors of the model `suggest` scores with: refused in one line, never run", suggest_pickle),
    Case("model_retrain_pickle", "model_file", "a pickle planted as the parent run's model.safetensors for `retrain`: refused in one line before any sample is read, never run", retrain_pickle),
    Case("model_band_order", "bad_input", "a region listing the model's bands in another order: `map` refuses naming the first band that differs, here and in the model", band_order),
    Case("model_other_scaling", "bad_input", "a region whose scaling rule differs from the model's: `map` refuses naming the rule, the field and both values", other_scaling),
]
