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
    except OSError as exc:
        line = unreadable_raster(exc)
        if line is None:
            raise
        if debug:
            traceback.print_exc(file=sys.stderr)
        print(f"error: {line}", file=sys.stderr)
        sys.exit(1)


def unreadable_raster(exc: BaseException) -> str | None:
    """One line for a raster file found unreadable inside a library's lazy read (odc-stac's, xarray's), or None when ``exc`` is not that.

    The windowed readers and the GeoTIFF folders' lazy arrays name the file
    themselves (a :class:`PlantationError`); a product folder's, STAC file's
    or cube's lazy arrays are read by those libraries, whose error reaches
    here as rasterio's ``RasterioIOError``. GDAL's message, in the error it
    was raised from, names the file.
    """
    if not type(exc).__module__.startswith("rasterio"):
        return None
    reason = type(exc).__name__
    seen: BaseException | None = exc
    for _ in range(5):  # the first message that says something: GDAL's, with the file's name
        if seen is None:
            break
        text = str(seen).splitlines()[0] if str(seen) else ""
        if text and "See previous exception" not in text:
            reason = text.rstrip(".")
            break
        seen = seen.__cause__ or seen.__context__
    return f"{reason}: a raster file could not be read (truncated or corrupt); replace it, or run with --debug for where it was read"
