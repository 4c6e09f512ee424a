"""One exception family for everything the tool rejects.

Every error a user can cause is a :class:`PlantationError`. Subclasses also
inherit the matching built-in, so ``except ValueError`` or
``except FileNotFoundError`` still work for callers who do not know this
package. Messages are one line: the culprit (file, line or band) first, then
what is wrong, then what to do.
"""

from __future__ import annotations

from pathlib import Path


class PlantationError(Exception):
    """Base class of every error this package raises on bad input."""


class InputNotFoundError(PlantationError, FileNotFoundError):
    """A file or folder named in the configuration does not exist."""


class RegionError(PlantationError, ValueError):
    """The imagery of a region is inconsistent or unreadable."""


class LabelError(PlantationError, ValueError):
    """A reference-label file is malformed or disagrees with the imagery."""


class FileFormatError(PlantationError, ValueError):
    """A file this tool writes (model card, map manifest, sample design, assessment, plot results) is malformed or of another kind."""


class ConfigError(PlantationError, ValueError):
    """A configuration value is missing, out of range or of the wrong kind."""


def where(path: str | Path, detail: str | None = None) -> str:
    """Format the culprit part of a message: ``'file.tif'`` or ``'file.csv: line 4'``."""
    text = str(path)
    return f"{text}: {detail}" if detail else text
