"""Reading and writing the JSON records this tool writes (model card, map manifest, sample design, assessment, plot and benchmark results).

Each record's own module reads and writes it; these helpers give them one
way to refuse a damaged file: a :class:`~plantation.errors.FileFormatError`
in one line naming the file, what is wrong and how to get a good one back.
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from plantation.errors import FileFormatError, InputNotFoundError


def locate(path: str | Path, name: str, *, missing: str) -> Path:
    """The record file: ``path`` itself, or ``path/name`` when ``path`` is a folder.

    Raises:
        InputNotFoundError: there is no such file; the message gives the absolute path tried, then ``missing`` (what to do).
    """
    p = Path(path)
    if p.is_dir():
        p = p / name
    if not p.is_file():
        raise InputNotFoundError(f"{p.absolute()}: {name} not found; {missing}")
    return p


def load_object(path: Path, *, what: str, again: str) -> dict[str, Any]:
    """The JSON object in ``path`` (UTF-8).

    Args:
        path: the file; it must exist (callers say what a missing one means).
        what: what the file should hold, for the message ("an assessment").
        again: how to get a good file back ("write it again with `plantation assess`").

    Raises:
        FileFormatError: not UTF-8, not valid JSON, or not a JSON object.
    """
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        why = f"{exc.msg}, line {exc.lineno}" if isinstance(exc, json.JSONDecodeError) else "not UTF-8 text"
        raise FileFormatError(f"{path}: not valid JSON ({why}); {again}") from None
    if not isinstance(doc, dict):
        raise FileFormatError(f"{path}: holds a JSON {type(doc).__name__}, not {what}; is this the right file?")
    return doc


def check_shapes(path: Path, doc: dict[str, Any], *, objects: Iterable[str] = (), lists: Iterable[str] = (), records: Iterable[str] = (), again: str) -> None:
    """Refuse a record whose sections are not the JSON objects, lists and lists of objects they should be (absent is fine).

    Args:
        objects: keys that hold a JSON object; ``lists``: a list of anything; ``records``: a list of objects.

    Raises:
        FileFormatError: a section of the wrong type, or a record entry that is not an object.
    """
    records = tuple(records)
    for keys, kind in ((objects, dict), ((*lists, *records), list)):
        for k in keys:
            if doc.get(k) is not None and not isinstance(doc[k], kind):
                raise FileFormatError(f"{path}: {k!r} is a JSON {type(doc[k]).__name__}, expected {'an object' if kind is dict else 'a list'}; the file was edited or damaged, {again}")
    for k in records:
        for i, entry in enumerate(doc.get(k) or [], start=1):
            if not isinstance(entry, dict):
                raise FileFormatError(f"{path}: {k} entry {i} is a JSON {type(entry).__name__}, expected an object; the file was edited or damaged, {again}")


def write_object(doc: dict[str, Any], dest: str | Path, *, indent: int = 1) -> Path:
    """Write ``doc`` as JSON (UTF-8) to ``dest`` through ``<dest>.partial`` and a rename: a failed write leaves no finished-looking file."""
    out = Path(dest)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".partial")
    try:
        tmp.write_text(json.dumps(doc, indent=indent, ensure_ascii=False) + "\n", encoding="utf-8")
        os.replace(tmp, out)
    finally:
        tmp.unlink(missing_ok=True)
    return out
