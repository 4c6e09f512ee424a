"""Guards of a map folder: one run at a time, room for the outputs before work starts, no half-written file left.

A mapping run holds an exclusive lock on its output folder (:class:`FolderLock`,
an ``flock`` on a hidden file inside it): a second run on the same folder is
refused at once with one line naming the folder and the run that holds it.
The operating system drops the lock when the holding process dies, however it
dies, so a killed run never blocks the next one. Under the lock every
temporary file in the folder is the run's own, so the run clears those a
killed run left (:func:`remove_partials`) and removes its own on failure.

Before any tile is mapped the folder must be writable and hold the outputs'
estimated size (:func:`output_bytes`, :func:`check_room`); a disk that fills
anyway is reported in one line (:func:`is_disk_full`, :class:`OutputSpaceError`).
"""

from __future__ import annotations

import errno
import logging
import os
import shutil
import socket
import time
from collections.abc import Iterable
from pathlib import Path

from plantation.errors import PlantationError
from plantation.mapping.folder import MAP_LAYERS

try:  # POSIX; elsewhere runs are not locked (see FolderLock)
    import fcntl
except ImportError:  # pragma: no cover - not a POSIX system
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger(__name__)

#: The lock file's name inside the output folder (hidden; removed when the run ends).
LOCK_NAME = ".plantation-map.lock"
#: Bytes per output pixel of a tile's GeoTIFF: its int16 layers, the eight of the map and the three of fire (:data:`plantation.mapping.folder.MAP_LAYERS`).
BYTES_PER_PIXEL = len(MAP_LAYERS) * 2
#: Extra bytes per finished tile for its overviews (a quarter, a sixteenth, ... of the pixels: under a third more).
OVERVIEW_SHARE = 1 / 3
#: Bytes per pixel of the PNG quicklook, a bound (RGBA at most).
QUICKLOOK_BYTES_PER_PIXEL = 4
#: Bytes per tile for its styles, STAC Item and manifest entry, and for the folder's manifest, summary and collection.
SMALL_FILES_BYTES = 64 * 1024


class OutputFolderError(PlantationError, OSError):
    """The output folder cannot be written (read-only, no permission, not a folder)."""


class FolderBusyError(PlantationError, OSError):
    """Another mapping run holds the output folder."""


class OutputSpaceError(PlantationError, OSError):
    """The output folder's disk has no room for the outputs."""


def _mb(n: float) -> str:
    return f"{n / 2**20:,.1f} MB"


def ensure_writable(folder: Path) -> None:
    """Create ``folder`` if needed and check a file can be created in it.

    Raises:
        OutputFolderError: the folder (or its parent) is read-only, not
            writable by this user, or a file stands in its place.
    """
    try:
        folder.mkdir(parents=True, exist_ok=True)
        probe = folder / f".plantation-write-test.{os.getpid()}"
        probe.write_bytes(b"")
        probe.unlink()
    except FileExistsError:
        raise OutputFolderError(f"out_dir: {folder} exists and is not a folder; choose another out_dir") from None
    except OSError as exc:
        why = "the file system is read-only" if exc.errno == errno.EROFS else "no permission to write there" if exc.errno in (errno.EACCES, errno.EPERM) else (exc.strerror or str(exc))
        if exc.errno in (errno.ENOSPC, errno.EDQUOT):
            raise OutputSpaceError(f"out_dir: {folder}: the disk is full ({why}); free space there or choose another out_dir") from None
        raise OutputFolderError(f"out_dir: {folder} cannot be written ({why}); choose a writable out_dir") from None


class FolderLock:
    """An exclusive, non-blocking lock on a map folder, for one run.

    ``flock`` on ``<folder>/.plantation-map.lock`` rather than the
    ``filelock`` package: the file is removed on release, which is safe
    only because :meth:`acquire` checks, once locked, that the path still
    names the file it locked (a run that opened the file just before the
    holder removed it would otherwise hold a lock on a deleted file while a
    third run locks a new one); and the standard library suffices. On a
    system without ``fcntl`` runs are not locked (a warning says so).
    The lock belongs to the open file: the operating system releases it when
    the process ends, killed or not, and child processes do not inherit it
    (Python opens files non-inheritable).
    """

    def __init__(self, folder: Path, verb: str = "map") -> None:
        self.folder = folder
        #: The command holding the lock, as the holder line names it (a second run sees who holds the folder).
        self.verb = verb
        self.path = folder / LOCK_NAME
        self._fd: int | None = None

    def holder(self) -> str:
        """Who holds the lock, as its holder wrote it (best effort)."""
        try:
            text = self.path.read_text().strip()
        except OSError:
            text = ""
        return text or "a process that has not said which"

    def acquire(self) -> FolderLock:
        """Take the lock or refuse at once.

        Raises:
            FolderBusyError: another run holds it.
            OutputFolderError: the lock file cannot be created.
        """
        if fcntl is None:  # pragma: no cover - not a POSIX system
            log.warning("%s: this system has no fcntl; two runs on this folder would not be stopped", self.folder)
            return self
        while True:
            try:
                fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as exc:
                raise OutputFolderError(f"out_dir: {self.folder}: cannot create its lock file ({exc.strerror or exc}); choose a writable out_dir") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except OSError as exc:
                os.close(fd)
                if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                    raise FolderBusyError(f"out_dir: {self.folder} is in use: another run ({self.holder()}) holds it; wait for that run to end, or map into another out_dir") from None
                raise OutputFolderError(f"out_dir: {self.folder}: cannot lock it ({exc.strerror or exc}); choose an out_dir on a file system with locks") from None
            try:
                same = os.stat(self.path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if same:
                break
            os.close(fd)  # the holder removed the file between our open and our lock: try the new one
        os.ftruncate(fd, 0)
        os.write(fd, f"plantation {self.verb}, pid {os.getpid()} on {socket.gethostname()}, since {time.strftime('%Y-%m-%dT%H:%M:%S%z')}\n".encode())
        self._fd = fd
        return self

    def release(self) -> None:
        """Remove the lock file, then drop the lock (in that order: see the class docstring)."""
        if self._fd is None:
            return
        try:
            self.path.unlink(missing_ok=True)
        finally:
            os.close(self._fd)  # closing the last descriptor drops the flock
            self._fd = None

    def __enter__(self) -> FolderLock:
        return self.acquire()

    def __exit__(self, *exc: object) -> None:
        self.release()


def partial_files(folder: Path) -> list[Path]:
    """Temporary files of the mapping job in a map folder (and its ``stac/``).

    The job's writers all write under a temporary name and rename when done:
    ``.<tile>.<pid>.raw.tif`` (the tiled GeoTIFF before its COG, named by the writing process), ``.<name>.partial``
    (COG, STAC files) and ``<name>.partial`` (manifest, summary, styles,
    quicklook). Nothing else in the folder matches.
    """
    out: list[Path] = []
    for sub in (folder, folder / "stac"):
        if not sub.is_dir():
            continue
        for p in sub.iterdir():
            if p.is_file() and (p.name.endswith(".partial") or (p.name.startswith(".") and p.name.endswith(".raw.tif"))):
                out.append(p)
    return sorted(out)


def remove_partials(folder: Path) -> list[Path]:
    """Remove the temporary files of :func:`partial_files`; returns those removed.

    Call only while holding the folder's lock: then no other run is writing them.
    """
    gone = []
    for p in partial_files(folder):
        try:
            p.unlink()
            gone.append(p)
        except FileNotFoundError:
            pass
    return gone


def output_bytes(tile_pixels: Iterable[int], concurrent: int, quicklook: bool) -> int:
    """An upper bound of the disk a run's outputs need, bytes.

    Each tile's COG at most its uncompressed size (:data:`BYTES_PER_PIXEL`)
    plus overviews (a third more); while a tile is converted its
    uncompressed tiled GeoTIFF exists beside the COG being written, so the largest
    ``concurrent`` tiles count that once more; quicklooks 4 B/px; 64 kB per
    tile and for the folder's records. DEFLATE makes real COGs smaller: the
    bound errs on the side of refusing too early rather than failing late.
    """
    px = sorted(tile_pixels, reverse=True)
    if not px:
        return 0
    finished = sum(px) * BYTES_PER_PIXEL * (1 + OVERVIEW_SHARE)
    in_flight = sum(px[: max(concurrent, 1)]) * BYTES_PER_PIXEL
    looks = sum(px) * QUICKLOOK_BYTES_PER_PIXEL if quicklook else 0
    return int(finished + in_flight + looks + SMALL_FILES_BYTES * (len(px) + 1))


def check_room(folder: Path, need: int) -> None:
    """Refuse before any work when ``folder``'s disk has less free space than ``need`` bytes.

    Raises:
        OutputSpaceError: naming the folder, the space free and the space needed.
    """
    free = shutil.disk_usage(folder).free
    if free < need:
        raise OutputSpaceError(f"out_dir: {folder} has {_mb(free)} free, the outputs need up to {_mb(need)}; free space there or choose another out_dir")


def is_disk_full(exc: BaseException, folder: Path | None = None) -> bool:
    """Whether an exception (or one it came from) says the disk is full.

    An ``OSError`` with ``ENOSPC``/``EDQUOT``, or a GDAL error (raised by
    rasterio) saying so; GDAL does not always keep the reason, so a write
    error of any kind counts when ``folder`` has less than 1 MB left.
    """
    seen: set[int] = set()
    e: BaseException | None = exc
    while e is not None and id(e) not in seen:
        seen.add(id(e))
        if isinstance(e, OSError) and e.errno in (errno.ENOSPC, errno.EDQUOT):
            return True
        if "no space left on device" in str(e).lower() or "disk quota exceeded" in str(e).lower():
            return True
        e = e.__cause__ or e.__context__
    if folder is not None and isinstance(exc, Exception):
        try:
            return shutil.disk_usage(folder).free < 2**20
        except OSError:
            return False
    return False
