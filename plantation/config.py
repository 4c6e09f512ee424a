"""Turning a composed configuration into the typed dataclass a job takes.

Library code takes typed objects (never a DictConfig); :func:`to_object`
converts at the edge and reports a bad key or value as one
:class:`~plantation.errors.ConfigError`.
"""

from __future__ import annotations

from typing import Any, TypeVar

from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from plantation.errors import ConfigError

T = TypeVar("T")


def to_object(cfg: Any, cls: type[T]) -> T:
    """Turn a (possibly partial) DictConfig into a validated dataclass instance.

    Raises:
        ConfigError: a key is unknown, a value has the wrong type, or a
            required value (``???``) is missing.
    """
    try:
        # Merge from plain containers: a key forced in with ``+key=`` is then
        # checked against the schema like any other.
        src = OmegaConf.to_container(cfg, resolve=True) if isinstance(cfg, DictConfig) else cfg
        merged = OmegaConf.merge(OmegaConf.structured(cls), src)
        obj = OmegaConf.to_object(merged)
    except OmegaConfBaseException as exc:
        key = getattr(exc, "full_key", None)
        raise ConfigError(f"{cls.__name__}: {key + ': ' if key else ''}{str(exc).splitlines()[0]}") from exc
    if not isinstance(obj, cls):
        raise ConfigError(f"expected a {cls.__name__} configuration, got {type(obj).__name__}")
    return obj
