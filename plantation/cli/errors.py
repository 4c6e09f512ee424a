"""Helpers for the thin entry points in ``scripts/``."""

from __future__ import annotations

import functools
import sys
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import TypeVar

from plantation.errors import PlantationError

T = TypeVar("T")


@contextmanager
def user_errors() -> Iterator[None]:
    """Turn a :class:`PlantationError` into one line on stderr and exit status 1.

    Anything else is a bug and keeps its traceback.
    """
    try:
        yield
    except PlantationError as exc:
        print(f"error: {exc}", file=sys.stderr)
        sys.exit(1)


def guarded(fn: Callable[..., T]) -> Callable[..., T]:
    """Decorator form of :func:`user_errors` for a Hydra task function."""

    @functools.wraps(fn)
    def wrapper(*args: object, **kwargs: object) -> T:
        with user_errors():
            return fn(*args, **kwargs)

    return wrapper
