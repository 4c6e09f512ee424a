"""A refused input as the command reports it: one line on stderr, exit status 1.

``plantation --debug <verb> ...`` (or ``PLANTATION_DEBUG=1`` in the
environment) prints the full traceback of a refused input as well, for a
report or a look at where in the tool it was refused.
"""

from __future__ import annotations

import os
import sys
import traceback
from collections.abc import Iterator
from contextlib import contextmanager

from plantation.errors import PlantationError

#: Environment variable that turns on tracebacks for refused inputs (any value but "", "0", "false", "no").
DEBUG_ENV = "PLANTATION_DEBUG"


def debug_from_env() -> bool:
    """Whether ``PLANTATION_DEBUG`` asks for tracebacks."""
    return os.environ.get(DEBUG_ENV, "").strip().lower() not in ("", "0", "false", "no", "off")


@contextmanager
def user_errors(debug: bool | None = None) -> Iterator[None]:
    """Turn a :class:`PlantationError` into one line on stderr and exit status 1.

    With ``debug`` (None: from ``PLANTATION_DEBUG``) the traceback is printed
    above that line. Anything else is a bug and keeps its traceback.
    """
    if debug is None:
        debug = debug_from_env()
    try:
        yield
    except PlantationError as exc:
        if debug:
            traceback.print_exc(file=sys.stderr)
        print(f"error: {exc}", file=sys.stderr)
        sys.exit(1)
