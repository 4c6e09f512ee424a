"""A refused input as the command reports it: one line on stderr, exit status 1."""

from __future__ import annotations

import sys
from collections.abc import Iterator
from contextlib import contextmanager

from plantation.errors import PlantationError


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
