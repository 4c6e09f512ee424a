"""The keys of a job, with their comments and defaults, read from its config files for ``plantation <verb> --help``.

Every key in ``configs/`` carries a comment on the lines above it; that
comment is the key's help. This reads the comments of the small YAML subset
the config files use (mappings, inline lists, ``#`` comments above a key).
"""

from __future__ import annotations

import re
import textwrap
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, ListConfig, OmegaConf

_KEY = re.compile(r"^(?P<indent> *)(?P<key>[A-Za-z_][\w@]*):(?P<rest>.*)$")


@dataclass(frozen=True)
class KeyHelp:
    """One documented key: its dotted name and the comment above it (may be empty)."""

    key: str
    comment: str
    #: True where the key holds further keys (its children are listed after it).
    mapping: bool


def comments(path: Path) -> tuple[str, list[KeyHelp]]:
    """The file's header comment (its lines) and every key's comment, in file order.

    The header is the comment block at the top of the file, before its first key.
    """
    header: list[str] = []
    block: list[str] = []
    in_header = True
    stack: list[tuple[int, str]] = []
    out: list[KeyHelp] = []
    for line in path.read_text().splitlines():
        stripped = line.strip()
        if not stripped:
            block = []
            continue
        if stripped.startswith("#"):
            # Keep the indentation after "# ": usage lines in headers are aligned.
            text = stripped[1:][1:] if stripped[1:].startswith(" ") else stripped[1:]
            if not text.startswith("@package"):
                (header if in_header else block).append(text)
            continue
        m = _KEY.match(line)
        if m is None:  # a list item or a continuation line
            block = []
            continue
        in_header = False
        indent = len(m["indent"])
        while stack and stack[-1][0] >= indent:
            stack.pop()
        dotted = ".".join([k for _, k in stack] + [m["key"]])
        rest = m["rest"].split(" #")[0].strip()
        out.append(KeyHelp(dotted, " ".join(t.strip() for t in block), mapping=rest == ""))
        stack.append((indent, m["key"]))
        block = []
    return "\n".join(header), [k for k in out if k.key != "defaults" and not k.key.startswith("defaults.")]


def _shown(value: Any) -> str:
    if isinstance(value, DictConfig | ListConfig):
        return str(OmegaConf.to_container(value, resolve=False)).replace("'", "")
    return "null" if value is None else str(value)


def _value(cfg: DictConfig, key: str) -> Any:
    node: Any = cfg
    for part in key.split("."):
        if not isinstance(node, DictConfig) or part not in node:
            return None
        node = node._get_node(part)
        node = node if isinstance(node, DictConfig | ListConfig) else node._value()
    return node


def key_lines(cfg: DictConfig, path: Path, prefix: str = "", width: int = 100) -> list[str]:
    """Help lines for the keys of one config file: ``key = default`` then its comment, indented."""
    lines: list[str] = []
    _, keys = comments(path)
    for k in keys:
        name = prefix + k.key
        if k.mapping:
            if k.comment:
                lines.append(f"  {name}.*")
                lines += textwrap.wrap(k.comment, width, initial_indent="      ", subsequent_indent="      ")
            continue
        if _value(cfg, name) is None and not _has(cfg, name):
            continue
        lines.append(f"  {name} = {_shown(_value(cfg, name))}")
        if k.comment:
            lines += textwrap.wrap(k.comment, width, initial_indent="      ", subsequent_indent="      ")
    return lines


def _has(cfg: DictConfig, key: str) -> bool:
    return OmegaConf.select(cfg, key, default="__absent__", throw_on_missing=False) != "__absent__"
