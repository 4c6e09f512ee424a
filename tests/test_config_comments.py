"""Every key in configs/ carries a comment on the lines above it: that comment is its `plantation <verb> --help` text.

common practice: every knob a user may change is documented where it is set.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from plantation.cli.helptext import comments

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
#: Hydra's own settings: not a user's knobs, and not shown by --help.
SKIPPED = {"hydra"}
FILES = sorted(p for p in CONFIGS.rglob("*.yaml") if not SKIPPED & set(p.relative_to(CONFIGS).parts[:-1]))


def test_there_are_configs_to_check():
    assert FILES, f"no YAML files found under {CONFIGS}"


@pytest.mark.parametrize("path", FILES, ids=lambda p: str(p.relative_to(CONFIGS)))
def test_every_key_has_a_comment(path: Path):
    _, keys = comments(path)
    name = path.relative_to(CONFIGS.parent)
    missing = [k.key for k in keys if not k.mapping and not k.comment]
    assert not missing, "\n".join(f"{name}: key {key!r} has no comment on the lines directly above it" for key in missing)
