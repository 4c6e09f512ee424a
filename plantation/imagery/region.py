"""Read a region's multi-date imagery lazily into xarray.

A region is a list of tiles. Each tile is either

* a folder of GeoTIFFs, one per acquisition or composite, with the date as
  ``YYYY-MM-DD`` somewhere in the file name, all on one grid, bands in the
  order the region config lists them (plus an optional QA band), or
* a NetCDF (``.nc``) or Zarr (``.zarr``) cube with a variable of dims
  ``(time, band, y, x)`` and a CF grid mapping that gives its CRS, or
* a folder of delivered scene folders (Landsat Collection 2 Level-2,
  Sentinel-2 Level-2A; :mod:`plantation.imagery.products`), or a STAC
  ItemCollection or static catalogue (:mod:`plantation.imagery.stac`), both
  loaded by odc-stac onto the tile's grid (``tiles[].grid``, or the first
  scene's), one date per solar day, with the products' own scaling and masks.

Each date's sensor is recorded (``TileStack.sensors``): product folders and
STAC items name it; a GeoTIFF folder's or cube's files take it from
``region.sensors`` (rules on file names; none: one unnamed sensor). Dates of
several sensors in one tile make one series sorted by date. The rule of one
date per day stays: a GeoTIFF folder or cube refuses a repeated date, and a
solar day with scenes of several sensors in a product folder or STAC file is
one date of one sensor (see :func:`plantation.imagery.stac.load_tile`). With
``region.harmonise.enabled`` every date is adjusted to the reference sensor
(:mod:`plantation.imagery.harmonise`) in the lazy arrays and the windowed
reads alike. Delivered products of several sensors are refused unless
harmonised (their reflectance is the sensors' own); a GeoTIFF folder or cube
may mix named sensors without it (its files may come harmonised already, as
HLS products do).

Nothing is read at open time but file headers: values come as dask arrays
chunked in space, so a tile larger than memory is processed window by window.
Stored integers become reflectance (unitless, float32) through the region's
:class:`~plantation.imagery.config.ScalingRule` list, resolved per date.

Bad values inside readable files are masked, never passed on: a pixel of a
date is invalid (``valid`` False, every band NaN; the model leaves the date
out of that pixel's summary) when, besides the nodata value and the QA rule,

* any band is NaN or ±inf (float files);
* any band's reflectance, after scaling (and harmonisation), lies outside
  :data:`PLAUSIBLE_REFLECTANCE`, −0.2 to 1.6: values far outside 0–1, such
  as a wrong scale factor or garbage, are no surface's;
* any band holds the largest value of its integer type (65535 for uint16,
  32767 for int16): the code products use for a saturated pixel
  (Sentinel-2 product metadata, ``Special_Values``: SATURATED 65535);
* every band is stored as exactly 0: a fill value whatever the nodata tag
  says (Landsat Collection 2 and Sentinel-2 both fill with 0), so a date
  delivered as zeros is a date with no data.

What follows from the mask: a pixel cloudy on every date, a date cloudy
everywhere, or a whole tile without one valid pixel are read without error
(``plantation survey`` counts them; a mapped pixel with fewer than
``min_clear`` clear dates is nodata in the map). A file found unreadable
while reading (truncated, garbage blocks) raises :class:`RegionError` naming
the file and its date, from the windowed reads and the lazy arrays alike; a
NetCDF or Zarr cube found damaged (an HDF error, a Zarr chunk that does not
decompress) names the cube, the dates of the chunk and its window
(:class:`LazyCubeVariable`).
"""

from __future__ import annotations

import re
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import date
from fnmatch import fnmatchcase
from pathlib import Path

import dask
import numpy as np
import pystac
import rasterio
import rasterio.windows
import xarray as xr
from affine import Affine
from rasterio.crs import CRS

from plantation.errors import ConfigError, InputNotFoundError, RegionError
from plantation.imagery import harmonise as harmonise_io
from plantation.imagery import products
from plantation.imagery import stac as stac_io
from plantation.imagery.config import RegionConfig, ScalingRule, SensorRule, TileConfig

_DATE = re.compile(r"(\d{4})-(\d{2})-(\d{2})")
RASTER_SUFFIXES = (".tif", ".tiff")
#: The region formats the reader knows.
FORMATS: tuple[str, ...] = ("geotiff_folder", "cube", "products", "stac")
#: Reflectance outside [low, high] after scaling is masked as no surface's. The
#: bounds are the range Landsat Collection 2 Level-2 surface reflectance can
#: take (stored 1–65455, × 0.0000275 − 0.2, USGS), wide enough for the small
#: negative values of atmospheric correction over dark water and for bright
#: cloud edges, which the QA mask handles.
PLAUSIBLE_REFLECTANCE: tuple[float, float] = (-0.2, 1.6)


def saturated_value(dtype: np.dtype) -> int | None:
    """The stored value that means "saturated" for an integer type (its largest), None for floats."""
    dtype = np.dtype(dtype)
    return int(np.iinfo(dtype).max) if np.issubdtype(dtype, np.integer) else None


def unusable(raw, refl, *, axis: int | str):  # noqa: ANN001, ANN201 - numpy arrays or DataArrays alike
    """Pixels whose stored values or reflectance no surface gives (see the module docstring), reduced over the band axis.

    Args:
        raw: stored values, with a band axis (numpy) or ``band`` dim (xarray).
        refl: the reflectance of ``raw`` after scaling and harmonisation, same shape.
        axis: the band axis (int, numpy) or dim name (str, xarray).

    Returns:
        bool, True where any band is non-finite, outside
        :data:`PLAUSIBLE_REFLECTANCE` or saturated, or every band is stored as 0.
    """
    kw = {"dim": axis} if isinstance(axis, str) else {"axis": axis}
    low, high = PLAUSIBLE_REFLECTANCE
    # NaN and ±inf fail both comparisons, so they are caught here too.
    out = ~((refl >= low) & (refl <= high)).all(**kw)
    out = out | (raw == 0).all(**kw)
    sat = saturated_value(raw.dtype)
    if sat is not None:
        out = out | (raw == sat).any(**kw)
    return out


def read_failed(path: str, when: str, exc: Exception, what: str) -> RegionError:
    """The error for a file found unreadable while reading: the file, its date, where, and GDAL's reason."""
    cause = exc.__cause__ or exc.__context__
    reason = str(cause or exc).splitlines()[0] if str(cause or exc) else type(exc).__name__
    return RegionError(f"{path}: date {when}: cannot read {what} ({reason}); the file is truncated or corrupt, replace it (or delete it to leave the date out)")


@dataclass(frozen=True)
class Grid:
    """A raster grid: CRS, affine transform (pixel corner → CRS units) and shape."""

    crs: CRS
    transform: Affine
    height: int
    width: int

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        """(left, bottom, right, top) in CRS units."""
        west, south, east, north = rasterio.transform.array_bounds(self.height, self.width, self.transform)
        return (west, south, east, north)

    @property
    def pixel_area_m2(self) -> float:
        """Area of one pixel in m² for a projected CRS in metres.

        Raises:
            RegionError: the CRS is geographic (areas then vary by latitude;
                compute them geodesically instead).
        """
        if not self.crs.is_projected:
            raise RegionError(f"grid CRS {self.crs.to_string()} is geographic; pixel area is not constant")
        factor = self.crs.linear_units_factor[1]
        return abs(self.transform.a * self.transform.e - self.transform.b * self.transform.d) * factor**2

    def row_areas_m2(self) -> np.ndarray:
        """Area in m² of one pixel in each row, (height,) float64.

        Constant for a projected CRS; for a geographic CRS, the geodesic area
        of each row's pixel footprint on the CRS's ellipsoid (pyproj).

        Raises:
            RegionError: a geographic grid is rotated (its pixel footprints
                are then not bounded by meridians and parallels).
        """
        if self.crs.is_projected:
            return np.full(self.height, self.pixel_area_m2)
        if self.transform.b != 0 or self.transform.d != 0:
            raise RegionError(f"grid CRS {self.crs.to_string()} is geographic and rotated; reproject before computing areas")
        from pyproj import CRS as ProjCRS

        geod = ProjCRS.from_user_input(self.crs.to_wkt()).get_geod()
        t = self.transform
        # A footprint's top and bottom edges are parallels, not geodesics:
        # points along them keep large (degree-sized) pixels exact too.
        xs = np.linspace(t.c, t.c + t.a, 17)
        lons = np.concatenate([xs, xs[::-1]])
        out = np.empty(self.height)
        for r in range(self.height):
            y0, y1 = t.f + r * t.e, t.f + (r + 1) * t.e
            area, _ = geod.polygon_area_perimeter(lons, np.repeat([y0, y1], len(xs)))
            out[r] = abs(area)
        return out

    def same_as(self, other: Grid) -> bool:
        return self.crs == other.crs and self.height == other.height and self.width == other.width and self.transform.almost_equals(other.transform)

    def describe(self) -> str:
        return f"{self.width}x{self.height} px, {self.crs.to_string()}, origin ({self.transform.c:g}, {self.transform.f:g}), pixel {self.transform.a:g}"


@dataclass
class TileStack:
    """One tile's imagery, lazily loaded.

    Attributes:
        name: tile name from the region config.
        reflectance: float32 DataArray, dims (time, band, y, x), unitless
            surface reflectance; NaN where ``valid`` is False.
        valid: bool DataArray, dims (time, y, x): True where every band has
            data, no QA bit in ``invalid_bits`` is set and the QA value
            is not one of ``invalid_values``.
        grid: the tile's grid (same for every date).
    """

    name: str
    reflectance: xr.DataArray
    valid: xr.DataArray
    grid: Grid
    reader: WindowReader | None = None
    #: Every input file (product folders and STAC, where no window reader lists them).
    sources: list[str] = field(default_factory=list)
    #: The sensor of each date, aligned with :attr:`dates` (``""``: unnamed;
    #: empty for a stack built without one, see :meth:`date_sensors`).
    sensors: list[str] = field(default_factory=list)
    #: The sensor every date was adjusted to (``region.harmonise``), or ``""``: as stored.
    harmonised_to: str = ""

    def read(self, row: int, col: int, height: int, width: int) -> tuple[np.ndarray, np.ndarray]:
        """One window, inside the tile: float32 reflectance (time, band, h, w), NaN where invalid, and bool validity (time, h, w).

        Goes straight to the files where the layout allows it: through the
        lazy arrays, a small window would read every chunk it touches whole.
        """
        if self.reader is not None:
            return self.reader(row, col, height, width)
        ys, xs = slice(row, row + height), slice(col, col + width)
        with dask.config.set(scheduler="synchronous"):  # inside a worker, don't reach for the cluster
            # One graph: the stored values are read once for both.
            refl, valid = dask.compute(self.reflectance.isel(y=ys, x=xs).data, self.valid.isel(y=ys, x=xs).data)
        return refl.astype(np.float32, copy=False), valid.astype(bool, copy=False)

    @property
    def dates(self) -> np.ndarray:
        """Acquisition dates as ``datetime64[D]``, ascending."""
        return np.asarray(self.reflectance["time"].values, dtype="datetime64[D]")

    def date_sensors(self) -> list[str]:
        """The sensor of each date (``""`` for every date of a stack built without sensors)."""
        return list(self.sensors) if self.sensors else [harmonise_io.UNNAMED] * len(self.dates)

    @property
    def years(self) -> np.ndarray:
        """Distinct calendar years covered, ascending."""
        return np.unique(self.dates.astype("datetime64[Y]").astype(int) + 1970)


class _PerThreadFiles:
    """Open datasets kept per thread (``self._local``), never pickled: dask ships a stack's reader to its workers, which open their own."""

    _local: threading.local

    def __getstate__(self) -> dict:
        state = self.__dict__.copy()
        del state["_local"]
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._local = threading.local()


class WindowReader(_PerThreadFiles):
    """Windowed reads from a folder of per-date GeoTIFFs, with the same scaling and masking as the lazy arrays.

    Datasets are opened on first use, once per thread (GDAL handles are not
    shared between threads).
    """

    def __init__(
        self,
        files: Sequence[Path],
        n_bands: int,
        qa_band: int | None,
        invalid_bits: Sequence[int],
        nodata: float | None,
        scale: np.ndarray,
        offset: np.ndarray,
        invalid_values: Sequence[int] = (),
        adjust: tuple[np.ndarray, np.ndarray] | None = None,
        dates: Sequence[date] | None = None,
    ) -> None:
        """``adjust``: (slope, intercept) float32 (dates, bands) of the cross-sensor adjustment applied after scaling (None: none); ``dates``: each file's date, for messages."""
        self.files = [str(f) for f in files]
        self.dates = [str(d) for d in dates] if dates is not None else [f"#{i + 1}" for i in range(len(self.files))]
        self.n_bands = n_bands
        self.qa_band = qa_band
        self.qa_mask = qa_bit_mask(invalid_bits)
        self.qa_values = qa_value_list(invalid_values)
        self.nodata = nodata
        self.scale = np.asarray(scale, np.float32)
        self.offset = np.asarray(offset, np.float32)
        self.adjust = None if adjust is None else (np.asarray(adjust[0], np.float32), np.asarray(adjust[1], np.float32))
        self._local = threading.local()

    def _datasets(self) -> list[rasterio.io.DatasetReader]:
        ds = getattr(self._local, "datasets", None)
        if ds is None:
            ds = []
            for f, d in zip(self.files, self.dates, strict=True):
                try:
                    ds.append(rasterio.open(f))
                except rasterio.errors.RasterioError as exc:
                    for opened in ds:
                        opened.close()
                    raise read_failed(f, d, exc, "the file's header") from None
            self._local.datasets = ds
        return ds

    def close(self) -> None:
        for d in getattr(self._local, "datasets", None) or []:
            d.close()
        self._local.datasets = None

    def __call__(self, row: int, col: int, height: int, width: int) -> tuple[np.ndarray, np.ndarray]:
        win = rasterio.windows.Window(col, row, width, height)
        t = len(self.files)
        refl = np.empty((t, self.n_bands, height, width), np.float32)
        valid = np.empty((t, height, width), bool)
        indexes = list(range(1, self.n_bands + 1)) + ([self.qa_band] if self.qa_band else [])
        for i, src in enumerate(self._datasets()):
            try:
                raw = src.read(indexes, window=win)
            except rasterio.errors.RasterioError as exc:
                raise read_failed(self.files[i], self.dates[i], exc, f"rows {row}–{row + height - 1}, cols {col}–{col + width - 1}") from None
            data = raw[: self.n_bands]
            bad = np.zeros((height, width), bool)
            if self.nodata is not None:
                bad |= (data == self.nodata).any(0)
            if np.issubdtype(data.dtype, np.floating):
                bad |= np.isnan(data).any(0)
            if self.qa_band:
                qa = raw[self.n_bands].astype(np.int64)
                bad |= (qa & self.qa_mask) != 0
                if len(self.qa_values):
                    bad |= np.isin(qa, self.qa_values)
            out = refl[i]
            np.multiply(data, self.scale[i], out=out, casting="unsafe")
            out += self.offset[i]
            if self.adjust is not None:
                # The same float32 operations, in the same order, as the lazy arrays.
                out *= self.adjust[0][i][:, None, None]
                out += self.adjust[1][i][:, None, None]
            bad |= unusable(data, out, axis=0)
            out[:, bad] = np.nan
            valid[i] = ~bad
        return refl, valid


class LazyRaster(_PerThreadFiles):
    """One dated GeoTIFF as an array-like (band, y, x) that dask slices chunk by chunk.

    ``dask.array.from_array`` reads each chunk through :meth:`__getitem__`, so
    a file found truncated or corrupt while a job runs raises a
    :class:`RegionError` naming the file and its date, not GDAL's error from
    inside a dask task. Datasets are opened per thread, on first use.
    """

    def __init__(self, path: Path, when: date, count: int, height: int, width: int, dtype: str) -> None:
        self.path = str(path)
        self.when = str(when)
        self.shape = (count, height, width)
        self.dtype = np.dtype(dtype)
        self.ndim = 3
        self._local = threading.local()

    def _dataset(self) -> rasterio.io.DatasetReader:
        ds = getattr(self._local, "dataset", None)
        if ds is None:
            try:
                ds = rasterio.open(self.path)
            except rasterio.errors.RasterioError as exc:
                raise read_failed(self.path, self.when, exc, "the file's header") from None
            self._local.dataset = ds
        return ds

    def __getitem__(self, key: tuple[slice, ...]) -> np.ndarray:
        bands, ys, xs = (k.indices(n) for k, n in zip(key, self.shape, strict=True))
        if bands[2] != 1 or ys[2] != 1 or xs[2] != 1:  # dask slices chunks with unit steps
            raise RegionError(f"{self.path}: a strided read {key!r} is not supported")
        out = np.empty((max(bands[1] - bands[0], 0), max(ys[1] - ys[0], 0), max(xs[1] - xs[0], 0)), self.dtype)
        if out.size == 0:
            return out
        win = rasterio.windows.Window(xs[0], ys[0], out.shape[2], out.shape[1])
        try:
            return self._dataset().read(list(range(bands[0] + 1, bands[1] + 1)), window=win, out=out)
        except rasterio.errors.RasterioError as exc:
            raise read_failed(self.path, self.when, exc, f"rows {ys[0]}–{ys[1] - 1}, cols {xs[0]}–{xs[1] - 1}") from None


def _lazy_geotiff(path: Path, when: date, count: int, grid: Grid, dtype: str, chunk: int) -> xr.DataArray:
    """A dated GeoTIFF as a lazy (band, y, x) DataArray chunked ``chunk`` pixels in space, all bands in one chunk; pixel-centre x/y coordinates."""
    import dask.array

    stat = Path(path).stat()
    # The key names the file's state: two opens of a file rewritten in between are two arrays.
    name = "raster-" + dask.base.tokenize(str(path), str(when), stat.st_size, stat.st_mtime_ns, count, dtype, chunk)
    arr = dask.array.from_array(LazyRaster(path, when, count, grid.height, grid.width, dtype), chunks=(-1, chunk, chunk), lock=False, asarray=False, name=name)
    t = grid.transform
    ys = t.f + t.e * (np.arange(grid.height) + 0.5)
    xs = t.c + t.a * (np.arange(grid.width) + 0.5)
    return xr.DataArray(arr, dims=("band", "y", "x"), coords={"band": np.arange(1, count + 1), "y": ys, "x": xs})


class LazyCubeVariable:
    """One variable of a NetCDF or Zarr cube as an array-like that dask slices chunk by chunk.

    The variable is xarray's lazy (not dask) view of the file, decoded as
    xarray decodes it; each chunk is read through :meth:`__getitem__`, so a
    cube found truncated or corrupt while a job runs (an HDF error, a Zarr
    chunk that does not decompress) raises a :class:`RegionError` naming the
    file, the dates and the window, not the library's error from inside a
    dask task. File handles stay with xarray's backend (locked and cached per
    file, picklable for distributed workers).
    """

    def __init__(self, path: Path, variable: xr.Variable, times: np.ndarray) -> None:
        self.path = str(path)
        self.variable = variable
        self.shape = tuple(variable.shape)
        self.dtype = np.dtype(variable.dtype)
        self.ndim = variable.ndim
        #: datetime64[D] of the file's time axis, in the file's order (the chunks' own indexing).
        self.times = np.asarray(times, dtype="datetime64[D]")

    def _where(self, key: tuple[slice, ...]) -> tuple[str, str]:
        """(dates, window) a chunk key covers, for the error message."""
        by_dim = {d: k.indices(n) for d, k, n in zip(self.variable.dims, key, self.shape, strict=True)}
        when = "?"
        if "time" in by_dim:
            t = self.times[slice(*by_dim["time"])]
            when = "?" if len(t) == 0 else str(t[0]) if len(t) == 1 else f"{t[0]}–{t[-1]}"
        ys, xs = by_dim.get("y"), by_dim.get("x")
        window = f"rows {ys[0]}–{ys[1] - 1}, cols {xs[0]}–{xs[1] - 1}" if ys and xs else "a chunk"
        return when, window

    def __getitem__(self, key: tuple[slice, ...]) -> np.ndarray:
        try:
            return np.asarray(self.variable[key].values)
        # netCDF4 reports a damaged HDF5 block as RuntimeError ("NetCDF: HDF error"), a truncated file as OSError;
        # Zarr codecs raise RuntimeError or ValueError on a chunk that does not decompress or has the wrong size.
        except (OSError, RuntimeError, ValueError, EOFError) as exc:
            when, window = self._where(key)
            raise read_failed(self.path, when, exc, window) from None


def _guarded_cube(path: Path, lazy: xr.Variable, times: np.ndarray, chunks: tuple[tuple[int, ...], ...], variable: str) -> dask.array.Array:
    """``lazy`` (a cube variable opened without dask) as a dask array of the given ``chunks`` whose reads raise :class:`RegionError` (see :class:`LazyCubeVariable`)."""
    import dask.array

    stat = Path(path).stat()
    # The key names the file's state: two opens of a file rewritten in between are two arrays.
    name = "cube-" + dask.base.tokenize(str(path), variable, stat.st_size, stat.st_mtime_ns, chunks)
    arr = LazyCubeVariable(path, lazy, times)
    return dask.array.from_array(arr, chunks=chunks, lock=False, asarray=False, name=name, meta=np.empty((0,) * arr.ndim, arr.dtype))


class AssetWindowReader(_PerThreadFiles):
    """Windowed reads of one file per band and date (product folders, local STAC assets) already on the tile's grid, one scene a date.

    The lazy arrays' scaling, nodata, per-sensor QA rule and harmonisation,
    applied to a window read straight from each file: without it a small
    window would make odc-stac open every band file of every date for each
    chunk it touches. ``tests/test_products.py`` checks it against the lazy
    arrays.

    Args:
        band_files: per date, the file of each band role, in band order.
        qa_files: per date, its QA file; None when there is no QA layer.
        nodata: per band, the stored nodata value (None: none).
        scale, offset: (time, band) scaling of the stored values.
        qa_rules: per date, (invalid bits, invalid values) of its sensor's QA layer.
        adjust: per date and band, the harmonisation's (slope, intercept); None: none.
    """

    def __init__(
        self,
        band_files: Sequence[Sequence[str]],
        qa_files: Sequence[str] | None,
        nodata: Sequence[float | None],
        scale: np.ndarray,
        offset: np.ndarray,
        qa_rules: Sequence[tuple[Sequence[int], Sequence[int]]],
        adjust: tuple[np.ndarray, np.ndarray] | None = None,
        dates: Sequence[date] | None = None,
    ) -> None:
        self.band_files = [list(f) for f in band_files]
        self.dates = [str(d) for d in dates] if dates is not None else []
        self.qa_files = list(qa_files) if qa_files is not None else None
        self.nodata = list(nodata)
        self.scale = np.asarray(scale, np.float32)
        self.offset = np.asarray(offset, np.float32)
        self.qa_rules = [(qa_bit_mask(b), qa_value_list(v)) for b, v in qa_rules]
        self.adjust = None if adjust is None else (np.asarray(adjust[0], np.float32), np.asarray(adjust[1], np.float32))
        self._local = threading.local()

    @property
    def files(self) -> list[str]:
        """Every file read, bands then QA (for a map's input signature)."""
        return [f for fs in self.band_files for f in fs] + list(self.qa_files or [])

    def _date(self, i: int) -> str:
        return self.dates[i] if i < len(self.dates) else f"#{i + 1}"

    def _open(self, path: str, i: int) -> rasterio.io.DatasetReader:
        try:
            return rasterio.open(path)
        except rasterio.errors.RasterioError as exc:
            raise read_failed(path, self._date(i), exc, "the file's header") from None

    def _datasets(self) -> tuple[list[list[rasterio.io.DatasetReader]], list[rasterio.io.DatasetReader] | None]:
        ds = getattr(self._local, "datasets", None)
        if ds is None:
            ds = ([[self._open(f, i) for f in fs] for i, fs in enumerate(self.band_files)], [self._open(f, i) for i, f in enumerate(self.qa_files)] if self.qa_files is not None else None)
            self._local.datasets = ds
        return ds

    def close(self) -> None:
        ds = getattr(self._local, "datasets", None)
        if ds:
            for d in [x for fs in ds[0] for x in fs] + (ds[1] or []):
                d.close()
        self._local.datasets = None

    def __call__(self, row: int, col: int, height: int, width: int) -> tuple[np.ndarray, np.ndarray]:
        win = rasterio.windows.Window(col, row, width, height)
        bands, qas = self._datasets()
        t, nb = len(bands), len(bands[0])
        refl = np.empty((t, nb, height, width), np.float32)
        valid = np.empty((t, height, width), bool)
        what = f"rows {row}–{row + height - 1}, cols {col}–{col + width - 1}"
        for i in range(t):
            bad = np.zeros((height, width), bool)
            stored = []
            for b, src in enumerate(bands[i]):
                try:
                    data = src.read(1, window=win)
                except rasterio.errors.RasterioError as exc:
                    raise read_failed(self.band_files[i][b], self._date(i), exc, what) from None
                stored.append(data)
                if self.nodata[b] is not None:
                    bad |= data == self.nodata[b]
                np.multiply(data, self.scale[i, b], out=refl[i, b], casting="unsafe")
                refl[i, b] += self.offset[i, b]
            if self.adjust is not None:
                refl[i] *= self.adjust[0][i][:, None, None]
                refl[i] += self.adjust[1][i][:, None, None]
            bad |= unusable(np.stack(stored), refl[i], axis=0)
            if qas is not None:
                try:
                    qa = qas[i].read(1, window=win).astype(np.int64)
                except rasterio.errors.RasterioError as exc:
                    raise read_failed(self.qa_files[i] if self.qa_files else "QA", self._date(i), exc, what) from None
                mask, values = self.qa_rules[i]
                bad |= (qa & mask) != 0
                if len(values):
                    bad |= np.isin(qa, values)
            refl[i][:, bad] = np.nan
            valid[i] = ~bad
        return refl, valid


def _aligned_reader(
    loaded: stac_io.LoadedTile,
    items: Sequence[pystac.Item],
    roles: Sequence[str],
    qa_asset: str | None,
    grid: Grid,
    qa_rule: Callable[[str], tuple[Sequence[int], Sequence[int]]],
    adjust: tuple[np.ndarray, np.ndarray] | None,
) -> AssetWindowReader | None:
    """A direct windowed reader when every date is one scene whose assets are local files on the tile's grid; None otherwise (mosaics, reprojection: the lazy arrays)."""
    by_day: dict[date, list[pystac.Item]] = {}
    for it in items:
        by_day.setdefault(stac_io.solar_day(it), []).append(it)
    if sorted(by_day) != list(loaded.dates) or any(len(v) > 1 for v in by_day.values()):
        return None
    files, qa_files, nodata = [], [], None
    for day in loaded.dates:
        it = by_day[day][0]
        keys = stac_io.role_assets(it, roles, qa_asset)
        for key in keys.values():
            try:
                crs, transform, h, w = stac_io.default_grid(it, key)
            except RegionError:
                return None
            if not grid.same_as(Grid(crs, transform, h, w)) or "://" in it.assets[key].href:
                return None
        files.append([it.assets[keys[r]].href for r in roles])
        if nodata is None:
            nodata = [stac_io._raster_band(it.assets[keys[r]]).get("nodata") for r in roles]
        if "qa" in keys:
            qa_files.append(it.assets[keys["qa"]].href)
    has_qa = loaded.qa is not None and len(qa_files) == len(files)
    rules = [qa_rule(s) if has_qa else ([], []) for s in loaded.sensors]
    return AssetWindowReader(files, qa_files if has_qa else None, nodata, loaded.scale, loaded.offset, rules, adjust, dates=loaded.dates)


def parse_date_from_name(path: Path) -> date:
    """The ``YYYY-MM-DD`` date in a file name.

    Raises:
        RegionError: no such pattern, or it is not a calendar date.
    """
    m = _DATE.search(path.name)
    if m is None:
        raise RegionError(f"{path}: no date YYYY-MM-DD in the file name")
    try:
        return date(int(m[1]), int(m[2]), int(m[3]))
    except ValueError as exc:
        raise RegionError(f"{path}: cannot parse date {m[0]!r} in the file name ({exc})") from None


def scaling_for_dates(dates: Sequence[date] | np.ndarray, rules: Sequence[ScalingRule]) -> tuple[np.ndarray, np.ndarray]:
    """Scale and offset that apply on each date.

    The rule with the latest ``start`` on or before a date wins; a rule with
    ``start=None`` applies from the beginning.

    Returns:
        (scale, offset), float64 arrays of len(dates).

    Raises:
        ConfigError: no rule covers some date, or a start date is malformed
            or repeated.
    """
    if not rules:
        raise ConfigError("region.scaling: at least one rule is needed")
    starts: list[np.datetime64] = []
    for i, r in enumerate(rules):
        if r.start is None:
            starts.append(np.datetime64("0001-01-01"))
            continue
        try:
            starts.append(np.datetime64(date.fromisoformat(str(r.start)), "D"))
        except ValueError:
            raise ConfigError(f"region.scaling[{i}].start: {r.start!r} is not a date YYYY-MM-DD") from None
    order = np.argsort(np.array(starts))
    sorted_starts = np.array(starts)[order]
    if len(np.unique(sorted_starts)) != len(sorted_starts):
        raise ConfigError("region.scaling: two rules start on the same date")
    d = np.asarray(dates, dtype="datetime64[D]")
    pos = np.searchsorted(sorted_starts, d, side="right") - 1
    if (pos < 0).any():
        first = d[pos < 0][0]
        raise ConfigError(f"region.scaling: no rule covers {first}; add a rule with start: null")
    picked = order[pos]
    scale = np.array([rules[i].scale for i in picked], dtype=np.float64)
    offset = np.array([rules[i].offset for i in picked], dtype=np.float64)
    return scale, offset


def qa_bit_mask(bits: Sequence[int]) -> int:
    """The integer with ``bits`` set (0 = least significant).

    Raises:
        ConfigError: a bit outside 0..31.
    """
    mask = 0
    for b in bits:
        if not 0 <= int(b) < 32:
            raise ConfigError(f"region.mask.invalid_bits: bit {b} is outside 0..31")
        mask |= 1 << int(b)
    return mask


def qa_value_list(values: Sequence[int]) -> np.ndarray:
    """The QA class values that mark a pixel invalid, as int64.

    Raises:
        ConfigError: a value that is not a whole number (QA classes are integers).
    """
    out = []
    for v in values:
        if isinstance(v, bool) or not float(v).is_integer():
            raise ConfigError(f"region.mask.invalid_values: {v!r} is not a whole number; QA classes are integer values")
        out.append(int(v))
    return np.asarray(sorted(set(out)), dtype=np.int64)


def qa_invalid(qa: xr.DataArray, bits: Sequence[int], values: Sequence[int] = ()) -> xr.DataArray:
    """True where any of ``bits`` is set in an integer QA array, or its value is one of ``values`` (QA classes)."""
    q = qa.astype(np.int64)
    invalid = (q & qa_bit_mask(bits)) != 0
    vals = qa_value_list(values)
    if len(vals):
        invalid = invalid | q.isin(vals)
    return invalid


def _grid_of(src: rasterio.io.DatasetReader, path: Path) -> Grid:
    if src.crs is None:
        raise RegionError(f"{path}: the file has no CRS; assign one (e.g. gdal_edit.py -a_srs EPSG:XXXX)")
    return Grid(src.crs, src.transform, src.height, src.width)


def sensors_of_files(names: Sequence[str], rules: Sequence[SensorRule], where: str) -> list[str]:
    """The sensor of each file name by ``region.sensors`` (first matching rule; no rules: unnamed).

    Raises:
        ConfigError: a rule without a sensor.
        RegionError: a file matches no rule.
    """
    if not rules:
        return [harmonise_io.UNNAMED] * len(names)
    for i, r in enumerate(rules):
        if not str(r.sensor or "").strip():
            raise ConfigError(f"region.sensors[{i}]: no sensor named for pattern {r.pattern!r}")
    out = []
    for n in names:
        hit = next((r for r in rules if fnmatchcase(n, str(r.pattern))), None)
        if hit is None:
            raise RegionError(f"{where}: {n} matches no region.sensors pattern {[r.pattern for r in rules]}; add a rule for it (pattern '*' for every file)")
        out.append(harmonise_io.canonical_sensor(hit.sensor))
    return out


def harmonised_to(region: RegionConfig) -> str:
    """The sensor ``region.harmonise`` brings every date to, or ``""`` when it is off."""
    return harmonise_io.reference_sensor(region.harmonise.reference) if region.harmonise.enabled else ""


def harmonise_coefficients(sensors: Sequence[str], region: RegionConfig) -> tuple[np.ndarray, np.ndarray] | None:
    """(slope, intercept) float32 (dates, bands) that bring each date to ``region.harmonise.reference``, or None when harmonisation is off."""
    if not region.harmonise.enabled:
        return None
    return harmonise_io.coefficients(sensors, region.bands, region.harmonise.reference)


def _adjusted(refl: xr.DataArray, adjust: tuple[np.ndarray, np.ndarray] | None) -> xr.DataArray:
    """``refl`` (time, band, y, x) × slope + intercept per date and band, lazily (unchanged when ``adjust`` is None)."""
    if adjust is None:
        return refl
    coords = {"time": refl["time"].values, "band": refl["band"].values}
    slope = xr.DataArray(adjust[0], dims=("time", "band"), coords=coords)
    intercept = xr.DataArray(adjust[1], dims=("time", "band"), coords=coords)
    return refl * slope + intercept


def _finish(name: str, raw: xr.DataArray, invalid: xr.DataArray, dates: list[date], region: RegionConfig, grid: Grid, sensors: list[str]) -> TileStack:
    """Apply scaling and the cross-sensor adjustment, NaN out invalid pixels, attach coordinates and CRS."""
    scale, offset = scaling_for_dates(dates, region.scaling)
    times = np.array(dates, dtype="datetime64[ns]")
    raw = raw.assign_coords(time=times, band=list(region.bands))
    invalid = invalid.assign_coords(time=times)
    s = xr.DataArray(scale.astype(np.float32), dims="time", coords={"time": times})
    o = xr.DataArray(offset.astype(np.float32), dims="time", coords={"time": times})
    # Convert once to float32: the loaders would otherwise widen to float64.
    refl = _adjusted(raw.astype(np.float32) * s + o, harmonise_coefficients(sensors, region))
    valid = ~(invalid | unusable(raw, refl, axis="band"))
    refl = refl.where(valid)
    refl.name = "reflectance"
    valid.name = "valid"
    for arr in (refl, valid):
        arr.attrs.update(crs=grid.crs.to_string(), transform=tuple(grid.transform)[:6])
    refl.attrs["units"] = "1"
    return TileStack(name=name, reflectance=refl, valid=valid, grid=grid, sensors=list(sensors), harmonised_to=harmonised_to(region))


def _open_geotiff_folder(tile: TileConfig, region: RegionConfig) -> TileStack:
    folder = Path(tile.path)
    if not folder.is_dir():
        raise InputNotFoundError(f"{Path(folder).absolute()}: tile {tile.name!r} folder does not exist")
    files = sorted(p for p in folder.iterdir() if p.suffix.lower() in RASTER_SUFFIXES)
    if not files:
        raise RegionError(f"{folder}: no GeoTIFF files (*.tif) in the tile folder")
    by_date: dict[date, Path] = {}
    for f in files:
        d = parse_date_from_name(f)
        if d in by_date:
            raise RegionError(f"{f}: date {d} repeats (also in {by_date[d].name}); keep one file per date")
        by_date[d] = f
    n_refl = len(region.bands)
    qa_band = region.mask.band
    if qa_band is not None and qa_band != n_refl + 1:
        raise ConfigError(f"region.mask.band: {qa_band} must follow the {n_refl} reflectance bands (band {n_refl + 1})")
    expected = n_refl + (1 if qa_band else 0)
    dates = [d for d in sorted(by_date) if d <= _end_date(region)]
    if not dates:
        raise RegionError(f"{folder}: no file dated on or before region.end_date {region.end_date}")
    grid: Grid | None = None
    nodatas: list[float | None] = []
    dtypes: list[str] = []
    first = by_date[dates[0]]
    for d in dates:
        f = by_date[d]
        try:
            with rasterio.open(f) as src:
                g = _grid_of(src, f)
                if src.count != expected:
                    roles = ", ".join(region.bands) + (" + QA" if qa_band else "")
                    raise RegionError(f"{f}: has {src.count} bands, the region config expects {expected} ({roles})")
                nodatas.append(src.nodata)
                dtypes.append(str(np.result_type(*src.dtypes)))
        except rasterio.errors.RasterioError as exc:
            raise RegionError(f"{f}: cannot read as a raster ({exc})") from None
        if grid is None:
            grid = g
        elif not g.same_as(grid):
            raise RegionError(f"{f}: grid {g.describe()} differs from {first.name}'s {grid.describe()}")
    if grid is None:  # unreachable: files is non-empty
        raise RegionError(f"{folder}: no readable GeoTIFF")
    arrays = [_lazy_geotiff(by_date[d], d, expected, grid, t, region.chunk) for d, t in zip(dates, dtypes, strict=True)]
    cube = xr.concat(arrays, dim="time", join="override")
    raw = cube.isel(band=slice(0, n_refl))
    nodata = region.nodata if region.nodata is not None else nodatas[0]
    invalid = xr.zeros_like(raw.isel(band=0), dtype=bool)
    if nodata is not None:
        invalid = (raw == nodata).any("band")
    if np.issubdtype(raw.dtype, np.floating):
        invalid = invalid | raw.isnull().any("band")
    if qa_band:
        invalid = invalid | qa_invalid(cube.isel(band=qa_band - 1), region.mask.invalid_bits, region.mask.invalid_values)
    invalid = invalid.drop_vars("band", errors="ignore")
    sensors = sensors_of_files([by_date[d].name for d in dates], region.sensors, str(folder))
    stack = _finish(tile.name, raw.drop_vars("band"), invalid, dates, region, grid, sensors)
    scale, offset = scaling_for_dates(dates, region.scaling)
    stack.reader = WindowReader(
        [by_date[d] for d in dates],
        n_refl,
        qa_band,
        region.mask.invalid_bits if qa_band else [],
        nodata,
        scale,
        offset,
        invalid_values=region.mask.invalid_values if qa_band else [],
        adjust=harmonise_coefficients(sensors, region),
        dates=dates,
    )
    return stack


def _open_cube(tile: TileConfig, region: RegionConfig) -> TileStack:
    import rioxarray  # noqa: F401  (adds .rio to xarray objects)

    path = Path(tile.path)
    if not path.exists():
        raise InputNotFoundError(f"{Path(path).absolute()}: tile {tile.name!r} cube does not exist")
    chunks = {"y": region.chunk, "x": region.chunk}
    try:
        if path.suffix == ".zarr" or path.is_dir():
            ds = xr.open_zarr(path, chunks=chunks, decode_coords="all")
            # The same store without dask, read chunk by chunk through LazyCubeVariable (cache=False: nothing kept in memory).
            lazy = xr.open_dataset(path, engine="zarr", chunks=None, cache=False, decode_coords="all")
        else:
            ds = xr.open_dataset(path, chunks=chunks, decode_coords="all")
            lazy = xr.open_dataset(path, chunks=None, cache=False, decode_coords="all")
    except (OSError, ValueError) as exc:
        raise RegionError(f"{path}: cannot open as NetCDF or Zarr ({exc})") from None
    var = region.cube_variable
    if var not in ds:
        raise RegionError(f"{path}: no variable {var!r}; it has {sorted(map(str, ds.data_vars))} (set region.cube_variable)")
    file_times = ds["time"].values if "time" in ds.coords else np.array([], "datetime64[D]")

    def guarded(name: str) -> xr.DataArray:
        # xarray's chunk layout (the requested y/x chunks, the file's own along the other dims), read through LazyCubeVariable.
        v = ds[name]
        return v.copy(data=_guarded_cube(path, lazy[name].variable, file_times, v.chunks, name))

    da = guarded(var)
    if tuple(da.dims) != ("time", "band", "y", "x"):
        raise RegionError(f"{path}: variable {var!r} has dims {tuple(da.dims)}; expected ('time', 'band', 'y', 'x'), use transpose")
    if da.sizes["band"] != len(region.bands):
        raise RegionError(f"{path}: has {da.sizes['band']} bands, the region config expects {len(region.bands)} ({', '.join(region.bands)})")
    if da["band"].dtype.kind in "USO":
        names = [str(b) for b in da["band"].values]
        missing = [b for b in region.bands if b not in names]
        if missing:
            raise RegionError(f"{path}: band(s) {missing} are not in the cube's bands {names}")
        da = da.sel(band=list(region.bands))
    crs = da.rio.crs or ds.rio.crs
    if crs is None:
        raise RegionError(f"{path}: the cube has no CRS (write one with rioxarray's .rio.write_crs)")
    grid = Grid(CRS.from_user_input(crs), da.rio.transform(recalc=True), da.sizes["y"], da.sizes["x"])
    times = da["time"].values.astype("datetime64[D]")
    uniq, counts = np.unique(times, return_counts=True)
    if (counts > 1).any():
        raise RegionError(f"{path}: date {uniq[counts > 1][0]} repeats on the time axis")
    if (np.diff(times.astype(np.int64)) < 0).any():
        da = da.sortby("time")
        times = da["time"].values.astype("datetime64[D]")
    end = np.datetime64(_end_date(region), "D")
    if (times > end).any():
        da = da.isel(time=np.flatnonzero(times <= end))
        times = times[times <= end]
        if len(times) == 0:
            raise RegionError(f"{path}: no date on or before region.end_date {region.end_date}")
    dates = [date.fromisoformat(str(t)) for t in times]
    nodata = region.nodata if region.nodata is not None else da.rio.nodata
    invalid = da.isnull().any("band") if np.issubdtype(da.dtype, np.floating) else xr.zeros_like(da.isel(band=0), dtype=bool)
    if nodata is not None:
        invalid = invalid | (da == nodata).any("band")
    if region.mask.variable:
        if region.mask.variable not in ds:
            raise RegionError(f"{path}: no QA variable {region.mask.variable!r}")
        invalid = invalid | qa_invalid(guarded(region.mask.variable).sortby("time").sel(time=da["time"]), region.mask.invalid_bits, region.mask.invalid_values)
    if "sensor" in da.coords and da["sensor"].dims == ("time",):
        sensors = [harmonise_io.canonical_sensor(str(v)) for v in da["sensor"].values]
    else:
        sensors = sensors_of_files([path.name] * len(dates), region.sensors, str(path))
    keep = ["time", "y", "x"]
    invalid = invalid.drop_vars([c for c in invalid.coords if c not in keep])
    raw = da.drop_vars([c for c in da.coords if c not in keep])
    return _finish(tile.name, raw, invalid, dates, region, grid, sensors)


def _tile_grid(tile: TileConfig, first: pystac.Item, role: str) -> Grid:
    """The tile's grid: from ``tile.grid`` when given, else the first scene's ``role`` band."""
    g = tile.grid
    given = [g.crs is not None, g.bounds is not None, g.resolution is not None]
    if any(given) and not all(given):
        raise ConfigError(f"tiles[{tile.name}].grid: give crs, bounds and resolution together (or none: the first scene's grid)")
    if not any(given):
        crs, transform, h, w = stac_io.default_grid(first, role)
        return Grid(crs, transform, h, w)
    bounds, res = list(g.bounds or []), float(g.resolution or 0)
    if len(bounds) != 4 or bounds[2] <= bounds[0] or bounds[3] <= bounds[1] or res <= 0:
        raise ConfigError(f"tiles[{tile.name}].grid: bounds {bounds!r} must be [left, bottom, right, top] with left < right and bottom < top, resolution {res!r} above 0")
    try:
        crs = CRS.from_user_input(g.crs)
    except rasterio.errors.CRSError as exc:
        raise ConfigError(f"tiles[{tile.name}].grid.crs: {g.crs!r} is not a CRS ({exc})") from None
    w, h = round((bounds[2] - bounds[0]) / res), round((bounds[3] - bounds[1]) / res)
    return Grid(crs, Affine(res, 0.0, bounds[0], 0.0, -res, bounds[3]), h, w)


def _from_items(tile: TileConfig, region: RegionConfig, items: list[pystac.Item], *, qa_rule: Callable[[str], tuple[Sequence[int], Sequence[int]]], qa_asset: str | None, where: str) -> TileStack:
    """A TileStack of STAC items (a product folder's or a catalogue's) loaded onto the tile's grid, scaled by the assets' own scale and offset.

    ``qa_rule``: a sensor's name → (invalid QA bits, invalid QA values) for its dates.
    """
    end = _end_date(region)
    items = [it for it in items if stac_io.solar_day(it) <= end]
    if not items:
        raise RegionError(f"{where}: no scene dated on or before region.end_date {region.end_date}")
    stac_io.check_assets(items, region.bands, qa_asset, where)
    grid = _tile_grid(tile, items[0], stac_io.role_assets(items[0], region.bands, qa_asset)[region.bands[0]])
    prefer = harmonise_io.reference_sensor(region.harmonise.reference) if region.harmonise.enabled else None
    loaded = stac_io.load_tile(
        items,
        region.bands,
        crs=grid.crs,
        transform=grid.transform,
        height=grid.height,
        width=grid.width,
        chunk=region.chunk,
        qa_asset=qa_asset,
        where=where,
        mixed=region.harmonise.enabled,
        prefer=prefer,
    )
    invalid = loaded.nodata
    if loaded.qa is not None:
        rules = {s: qa_rule(s) for s in dict.fromkeys(loaded.sensors)}
        if len(rules) == 1:
            bits, values = next(iter(rules.values()))
            invalid = invalid | qa_invalid(loaded.qa, bits, values)
        else:
            # Each sensor's QA layer by its own rule (Landsat bit flags, Sentinel-2 scene classes).
            qa_bad = xr.zeros_like(invalid)
            for sensor, (bits, values) in rules.items():
                on = xr.DataArray(np.array([x == sensor for x in loaded.sensors]), dims="time")
                qa_bad = xr.where(on, qa_invalid(loaded.qa, bits, values), qa_bad)
            invalid = invalid | qa_bad
    times = np.array(loaded.dates, dtype="datetime64[ns]")
    raw = loaded.raw.assign_coords(time=times, band=list(region.bands))
    s = xr.DataArray(loaded.scale, dims=("time", "band"), coords={"time": times, "band": list(region.bands)})
    o = xr.DataArray(loaded.offset, dims=("time", "band"), coords={"time": times, "band": list(region.bands)})
    adjust = harmonise_coefficients(loaded.sensors, region)
    refl = _adjusted(raw.astype(np.float32) * s + o, adjust)
    valid = ~(invalid.assign_coords(time=times) | unusable(raw, refl, axis="band"))
    refl = refl.where(valid)
    refl.name, valid.name = "reflectance", "valid"
    for arr in (refl, valid):
        arr.attrs.update(crs=grid.crs.to_string(), transform=tuple(grid.transform)[:6])
    refl.attrs["units"] = "1"
    reader = _aligned_reader(loaded, items, region.bands, qa_asset, grid, qa_rule, adjust)
    return TileStack(name=tile.name, reflectance=refl, valid=valid, grid=grid, reader=reader, sources=loaded.files, sensors=loaded.sensors, harmonised_to=harmonised_to(region))


def _open_products(tile: TileConfig, region: RegionConfig) -> TileStack:
    folder = Path(tile.path)
    if not folder.is_dir():
        raise InputNotFoundError(f"{folder.absolute()}: tile {tile.name!r} folder of scene folders does not exist")
    scenes = products.find_scenes(folder, region.bands)
    items = [products.scene_item(s, region.bands) for s in scenes]

    def rule(sensor: str) -> tuple[Sequence[int], Sequence[int]]:
        return products.SENSORS[sensor].qa_bits, products.SENSORS[sensor].qa_values

    return _from_items(tile, region, items, qa_rule=rule, qa_asset="qa", where=str(folder))


def _open_stac(tile: TileConfig, region: RegionConfig) -> TileStack:
    path = Path(tile.path)
    items = stac_io.read_items(path)
    bits, values = list(region.mask.invalid_bits), list(region.mask.invalid_values)
    return _from_items(tile, region, items, qa_rule=lambda _sensor: (bits, values), qa_asset=region.mask.asset, where=str(path))


def _end_date(region: RegionConfig) -> date:
    """The last date the region reads (``region.end_date``; far in the future when unset)."""
    if region.end_date is None:
        return date.max
    try:
        return date.fromisoformat(str(region.end_date))
    except ValueError:
        raise ConfigError(f"region.end_date: {region.end_date!r} is not a date (YYYY-MM-DD)") from None


def open_tile(tile: TileConfig, region: RegionConfig) -> TileStack:
    """Open one tile lazily. See the module docstring for the layouts.

    Raises:
        InputNotFoundError: the tile's path does not exist.
        RegionError: files disagree (grid, band count, dates) or lack a CRS.
        ConfigError: the region config is inconsistent.
    """
    if region.format == "geotiff_folder":
        return _open_geotiff_folder(tile, region)
    if region.format == "cube":
        return _open_cube(tile, region)
    if region.format == "products":
        return _open_products(tile, region)
    if region.format == "stac":
        return _open_stac(tile, region)
    raise ConfigError(f"region.format: {region.format!r} is not one of {list(FORMATS)}")


def open_region(region: RegionConfig) -> list[TileStack]:
    """Open every tile of a region. Tiles must share CRS, dates and the sensor of each date.

    Raises:
        RegionError: a tile's CRS, dates or sensors differ from the first tile's.
    """
    if not region.tiles:
        raise ConfigError(f"region {region.name!r}: no tiles listed")
    names = [t.name for t in region.tiles]
    if len(set(names)) != len(names):
        raise ConfigError(f"region {region.name!r}: tile names repeat: {names}")
    stacks = [open_tile(t, region) for t in region.tiles]
    ref = stacks[0]
    for s, t in zip(stacks[1:], region.tiles[1:], strict=True):
        if s.grid.crs != ref.grid.crs:
            raise RegionError(f"{t.path}: CRS {s.grid.crs.to_string()} differs from tile {ref.name!r}'s {ref.grid.crs.to_string()}")
        if not np.array_equal(s.dates, ref.dates):
            raise RegionError(f"{t.path}: dates differ from tile {ref.name!r}'s; all tiles need the same dates")
        if s.date_sensors() != ref.date_sensors():
            i = next(i for i, (a, b) in enumerate(zip(s.date_sensors(), ref.date_sensors(), strict=True)) if a != b)
            have, want = harmonise_io.describe(s.date_sensors()[i]), harmonise_io.describe(ref.date_sensors()[i])
            raise RegionError(f"{t.path}: date {s.dates[i]} is {have}, tile {ref.name!r}'s is {want}; all tiles need the same sensor on each date")
    return stacks
