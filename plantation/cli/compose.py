"""Composing a job's configuration from ``configs/``, the user's own config folders and ``key=value`` overrides.

The configs ship inside the package (a wheel carries them as
``plantation/configs``; a source checkout reads the top-level ``configs/``).
A user's own files live anywhere: a region file is named by its path
(``region=path/to/mine.yaml``), and a folder of config files laid out like
``configs/`` (``region/``, ``network/``, ...) is added with ``--config-dir``
or the ``PLANTATION_CONFIG_DIR`` environment variable (several folders
separated by ``os.pathsep``). Relative paths inside a region file are taken
from that file's folder, so it works from any working directory; paths given
on the command line are taken from the working directory.

Every override is checked before composing, so a typo gets one line naming
the key, the job and the closest valid key instead of the config library's
advice.
"""

from __future__ import annotations

import difflib
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from hydra import compose, initialize_config_dir
from hydra.core.config_store import ConfigStore
from hydra.core.override_parser.overrides_parser import OverridesParser
from hydra.core.override_parser.types import Override
from hydra.errors import HydraException
from omegaconf import DictConfig, ListConfig, OmegaConf, open_dict
from omegaconf.errors import OmegaConfBaseException

from plantation.errors import ConfigError, InputNotFoundError
from plantation.imagery.config import RegionConfig
from plantation.model.config import NetworkConfig, TrainerConfig, TrainingConfig
from plantation.simulation.scenario import SimulationConfig

#: Environment variable naming the user's own config folders (``os.pathsep``-separated).
CONFIG_DIR_ENV = "PLANTATION_CONFIG_DIR"
#: ConfigStore name of the region file chosen for this composition (see :func:`load_region_file`).
SELECTED_REGION = "_selected"
#: Schemas listed first in each group file's ``defaults:``; not options a user picks.
_SCHEMAS = {"region_schema", "sim_schema", "network_schema", "training_schema", "trainer_schema"}
#: Keys of a region file that hold paths (resolved against the file's folder).
_REGION_PATHS = (("tiles", "path"), ("tiles", "truth"), ("labels", "path"))


def packaged_config_dir() -> Path:
    """The configs shipped with the package: ``plantation/configs`` in a wheel, ``configs/`` beside the package in a checkout."""
    here = Path(__file__).resolve().parents[1]
    for cand in (here / "configs", here.parent / "configs"):
        if (cand / "train.yaml").is_file():
            return cand
    raise InputNotFoundError(f"{here / 'configs'}: the package's configs are missing; reinstall plantation")


def user_config_dirs(extra: Sequence[str | Path] = ()) -> list[Path]:
    """The user's config folders: ``--config-dir`` first, then ``PLANTATION_CONFIG_DIR``; each must exist."""
    dirs = [Path(d) for d in extra] + [Path(d) for d in os.environ.get(CONFIG_DIR_ENV, "").split(os.pathsep) if d]
    for d in dirs:
        if not d.is_dir():
            raise InputNotFoundError(f"{d.absolute()}: config folder does not exist (from --config-dir or {CONFIG_DIR_ENV})")
    return [d.resolve() for d in dirs]


def register_configs() -> None:
    """Register the group schemas with Hydra's ConfigStore (each group file lists its schema first)."""
    cs = ConfigStore.instance()
    cs.store(group="region", name="region_schema", node=RegionConfig)
    cs.store(group="sim", name="sim_schema", node=SimulationConfig)
    cs.store(group="network", name="network_schema", node=NetworkConfig)
    cs.store(group="training", name="training_schema", node=TrainingConfig)
    cs.store(group="trainer", name="trainer_schema", node=TrainerConfig)


@dataclass(frozen=True)
class Sources:
    """Where configs are looked up: the user's folders (searched first for region files), then the package's."""

    packaged: Path
    user: tuple[Path, ...] = ()

    @property
    def all(self) -> list[Path]:
        return [*self.user, self.packaged]

    def options(self, group: str) -> list[str]:
        """Option names of a config group across all folders."""
        names = {p.stem for d in self.all for p in (d / group).glob("*.yaml")}
        return sorted(names - _SCHEMAS)

    def find(self, group: str, name: str) -> Path | None:
        for d in self.all:
            p = d / group / f"{name}.yaml"
            if p.is_file():
                return p
        return None

    def where_user_files_go(self) -> str:
        return f"put your own files in a folder given with --config-dir or {CONFIG_DIR_ENV} (laid out like {self.packaged}), or name a region file by its path: region=path/to/my_region.yaml"


def sources(extra_dirs: Sequence[str | Path] = ()) -> Sources:
    return Sources(packaged_config_dir(), tuple(user_config_dirs(extra_dirs)))


# --------------------------------------------------------------------------- region files


def _looks_like_path(value: str) -> bool:
    return value.endswith((".yaml", ".yml")) or "/" in value or os.sep in value


def load_region_file(path: Path) -> DictConfig:
    """A region file checked against :class:`RegionConfig`, its relative paths made absolute from the file's folder.

    Raises:
        InputNotFoundError: the file does not exist (the message holds the absolute path).
        ConfigError: it is not YAML, not a mapping, or holds an unknown key or a wrong type.
    """
    path = path.absolute()
    if not path.is_file():
        raise InputNotFoundError(f"{path}: region file not found")
    try:
        raw = OmegaConf.load(path)
    except Exception as exc:  # the YAML parser's own error types
        raise ConfigError(f"{path}: not a readable YAML file ({str(exc).splitlines()[0]})") from None
    if not isinstance(raw, DictConfig):
        raise ConfigError(f"{path}: a region file holds keys (name, tiles, bands, ...), not a {type(raw).__name__}")
    raw.pop("defaults", None)
    schema = OmegaConf.structured(RegionConfig)
    known = list(schema.keys())
    for key in raw:
        if key not in known:
            raise ConfigError(f"{path}: unknown key {key!r} in a region file{_suggest(str(key), known)}")
    try:
        merged = OmegaConf.merge(schema, raw)
    except OmegaConfBaseException as exc:
        key = getattr(exc, "full_key", None) or ""
        raise ConfigError(f"{path}: {key + ': ' if key else ''}{_first_line(exc)}") from None
    base = path.parent
    for tile in merged.tiles:
        for key in ("path", "truth"):
            if tile[key] is not None and not OmegaConf.is_missing(tile, key):
                tile[key] = _from(base, tile[key])
    if merged.labels.path is not None:
        merged.labels.path = _from(base, merged.labels.path)
    return merged


def _from(base: Path, value: str) -> str:
    p = Path(os.path.expanduser(value))
    return str(p if p.is_absolute() else (base / p).resolve())


# --------------------------------------------------------------------------- overrides


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _suggest(word: str, candidates: Sequence[str], prefix: str = "") -> str:
    match = difflib.get_close_matches(word, [str(c) for c in candidates], n=1, cutoff=0.6)
    return f" (did you mean {prefix + match[0]!r}?)" if match else ""


def parse_overrides(overrides: Sequence[str], verb: str) -> list[Override]:
    try:
        return OverridesParser.create().parse_overrides(list(overrides))
    except HydraException as exc:
        raise ConfigError(f"{verb}: cannot read the overrides ({_first_line(exc)}); write them as key=value") from None


def _check_key(base: DictConfig, key: str, verb: str) -> None:
    """Refuse a key the job does not have, naming the closest one."""
    if key.startswith("hydra."):
        return
    parts = key.split(".")
    node: Any = base
    for i, part in enumerate(parts):
        here = ".".join(parts[:i])
        if isinstance(node, DictConfig):
            if part not in node.keys():
                prefix = f"{here}." if here else ""
                raise ConfigError(f"{verb}: unknown key {key!r}{_suggest(part, list(node.keys()), prefix)}; `plantation {verb} --help` lists the keys")
            node = node._get_node(part)
            node = node if isinstance(node, DictConfig | ListConfig) else None
        elif isinstance(node, ListConfig):
            if not part.isdigit() or int(part) >= len(node):
                raise ConfigError(f"{verb}: {key!r}: {here} has {len(node)} items, numbered from 0")
            node = node._get_node(int(part))
            node = node if isinstance(node, DictConfig | ListConfig) else None
        else:
            raise ConfigError(f"{verb}: unknown key {key!r}: {here} holds a value, not keys; `plantation {verb} --help` lists the keys")


def _compose(src: Sources, config_name: str, overrides: list[str], verb: str) -> DictConfig:
    search = [f"file://{d}" for d in src.user]
    extra = [f"hydra.searchpath=[{','.join(search)}]"] if search else []
    try:
        with initialize_config_dir(config_dir=str(src.packaged), version_base="1.3"):
            return compose(config_name=config_name, overrides=[*overrides, *extra], return_hydra_config=True)
    except (HydraException, OmegaConfBaseException) as exc:
        cause: BaseException = exc
        while cause.__cause__ is not None and not isinstance(cause, OmegaConfBaseException):
            cause = cause.__cause__
        key = getattr(cause, "full_key", None)
        text = _first_line(cause)
        if "To append to your config use +" in text or "Key '" in text and "is not in struct" in text:
            text = "unknown key"
        raise ConfigError(f"{verb}: {key + ': ' if key else ''}{text}") from None


def compose_job(config_name: str, overrides: Sequence[str], *, verb: str, config_dirs: Sequence[str | Path] = ()) -> DictConfig:
    """The composed, checked configuration of one job (without Hydra's own node).

    Args:
        config_name: the job's file in ``configs/`` without ``.yaml``.
        overrides: ``key=value`` and ``group=option`` strings as typed.
        verb: the command's verb, named in error messages.
        config_dirs: the user's config folders from ``--config-dir``.

    Raises:
        ConfigError: an unknown key, group option or region, or a value of
            the wrong type, in one line with the closest valid name.
        InputNotFoundError: a region file or config folder that does not exist.
    """
    register_configs()
    src = sources(config_dirs)
    parsed = parse_overrides(overrides, verb)
    groups = {p.name for d in src.all for p in d.iterdir() if p.is_dir() and p.name != "hydra"}
    defaults = _compose(src, config_name, [], verb).hydra.runtime.choices
    group_args: list[str] = []
    key_args: list[tuple[Override, str]] = []
    region_value: str | None = None
    for o, text in zip(parsed, overrides, strict=True):
        name = o.key_or_group
        if name in groups and o.package is None and not o.is_delete():
            value = str(o.value())
            if name not in defaults:
                raise ConfigError(f"{verb}: this job has no {name} to choose; `plantation {verb} --help` lists its keys and groups")
            if name == "region":
                region_value = value
                continue
            if value not in src.options(name):
                raise ConfigError(f"{verb}: unknown {name} {value!r}; available: {', '.join(src.options(name)) or 'none'}; {src.where_user_files_go()}")
            group_args.append(text)
        else:
            key_args.append((o, text))
    if defaults.get("region") is not None:
        chosen = region_value or str(defaults["region"])
        if _looks_like_path(chosen):
            path = Path(os.path.expanduser(chosen))
        else:
            found = src.find("region", chosen)
            if found is None:
                raise ConfigError(f"{verb}: unknown region {chosen!r}; available: {', '.join(src.options('region')) or 'none'}; {src.where_user_files_go()}")
            path = found
        ConfigStore.instance().store(group="region", name=SELECTED_REGION, node=load_region_file(path))
        group_args.append(f"region={SELECTED_REGION}")
    # Keys are checked against the job as composed with the chosen options (a region of five tiles has tiles.4).
    base = _compose(src, config_name, group_args, verb)
    final = list(group_args)
    for o, text in key_args:
        key = o.key_or_group
        _check_key(base, key, verb)
        # A key the job has is set, never added: ``+key`` and ``++key`` mean the same here.
        final.append(text.lstrip("+") if o.is_add() or o.is_force_add() else text)
    cfg = _compose(src, config_name, final, verb)
    with open_dict(cfg):
        cfg.pop("hydra", None)
    return cfg
