"""The input edge: read and validate the DEM, the cell polygons and water-surface rasters.

Everything a user hands to ntrans enters through this module.  Each problem found is
raised as one :mod:`ntrans.errors` exception whose message is one sentence starting with
the thing that is wrong and ending with what to do.  Nothing here computes hydraulics.

- :func:`open_dem` -> :class:`DemInfo` (grid, CRS, units; windows read on demand, nodata
  and the outside of the raster as NaN)
- :func:`read_cells` -> :class:`CellLayer` (ids, valid polygons in the DEM's CRS)
- :func:`read_water_surfaces` / :func:`open_water_surface` -> :class:`WaterSurface`
  (sampling onto points or onto a DEM window), :func:`sample_water_surface`
- :func:`check_output_not_input` (an output folder never replaces an input)
"""

from __future__ import annotations

import contextlib
import functools
import logging
import math
import os
import threading
from collections.abc import Callable, Iterable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np
import pyproj
import rasterio
import shapely
from affine import Affine
from rasterio.crs import CRS
from rasterio.enums import MaskFlags
from rasterio.windows import Window

from .coverage import polygon_rings
from .errors import (
    CRSError,
    GeometryError,
    GeometryRepairedWarning,
    InputError,
    InputFileError,
    OutputError,
    ProjectionScaleWarning,
    ReprojectionAccuracyWarning,
    warn,
)
from .mesh import is_valid

logger = logging.getLogger(__name__)

LengthUnit = Literal["metre", "foot"]
SampleMethod = Literal["bilinear", "nearest"]

#: Manning unit factor k per horizontal length unit (DESIGN.md section 2): 1.0 with n in
#: s/m^(1/3) and lengths in metres; 1.486 ft^(1/3)/s for lengths in feet, so the same n
#: serves both (Manning's equation in US customary units, V = (1.486/n) R^(2/3) S^(1/2):
#: Chow 1959, Open-Channel Hydraulics, section 5-6, from memory).  1.486 is the customary
#: rounding of the exact (1 / 0.3048)^(1/3) = 1.48592 (international foot).
MANNING_K: dict[str, float] = {"metre": 1.0, "foot": 1.486}

_INTERNATIONAL_FOOT = 0.3048
_US_SURVEY_FOOT = 1200.0 / 3937.0
#: Values ``vertical_units`` takes (aliases aside): ``foot`` is the foot of the CRS when
#: the horizontal unit is a foot, else the international foot (0.3048 m);
#: ``us_survey_foot`` is 1200/3937 m.
VERTICAL_UNITS: tuple[str, ...] = ("metre", "foot", "us_survey_foot")
_UNIT_ALIASES: dict[str, str] = {
    "metre": "metre",
    "meter": "metre",
    "metres": "metre",
    "meters": "metre",
    "m": "metre",
    "foot": "foot",
    "feet": "foot",
    "ft": "foot",
    "us_survey_foot": "us_survey_foot",
    "us_survey_feet": "us_survey_foot",
    "us-ft": "us_survey_foot",
    "ftus": "us_survey_foot",
}
#: Largest relative error of lengths (the projection's point scale at the DEM's centre
#: against 1) accepted silently, and the largest accepted at all: UTM zones and national
#: grids stay within about 0.1 %; beyond 2 % every length, area and volume would be
#: wrong by the scale (areas by its square).
SCALE_WARNING_LIMIT = 0.005
SCALE_ERROR_LIMIT = 0.02
#: Column names tried, in order and ignoring case, when no id field is given.
ID_FIELD_CANDIDATES: tuple[str, ...] = ("cell_id", "cellid", "id", "fid", "objectid", "ogc_fid")
_POLYGON_TYPE_IDS = (3, 6)  # shapely type ids of Polygon and MultiPolygon
_SAMPLE_BLOCK = 2048  # pixels per side of the raster blocks read when sampling points


# --------------------------------------------------------------------------- helpers


def _name_list(values: Iterable[Any], *, limit: int = 5) -> str:
    """``"a, b, c and 4 more"`` for messages."""
    items = [str(v) for v in values]
    if len(items) <= limit:
        return ", ".join(items)
    return ", ".join(items[:limit]) + f" and {len(items) - limit} more"


def _reason(exc: BaseException, path: str) -> str:
    """The first sentence of a library error, without the path and final full stop."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    text = text.replace(f"'{path}' ", "").replace(f"{path}: ", "").replace(path, "the file")
    return text.split(". ")[0].split(".;")[0].rstrip(". ")


def _is_local_path(path: str) -> bool:
    """True for ordinary file paths (not GDAL /vsi... paths or URLs)."""
    return not (path.startswith("/vsi") or "://" in path)


def missing_path_hint(path: str | os.PathLike[str]) -> str:
    """A hint for a path that does not exist, or ``""``: written with Windows backslashes
    where the same path with forward slashes exists (only Windows reads a backslash as a
    separator), or holding a tab or line break (a backslash escape of a double-quoted TOML
    string, such as ``\\n`` in ``"data\\new.tif"``)."""
    text = os.fspath(path)
    if "\\" in text:
        forward = text.replace("\\", "/")
        if Path(forward).exists():
            return (f" ({forward!r} exists: write paths with forward slashes, which every "
                    "system reads)")
    if any(c in text for c in "\t\n\r\b\f"):
        return (" (it holds a tab, line break or other control character: in a double-quoted TOML "
                "string a backslash starts an escape such as \\n; write paths with forward "
                "slashes)")
    return ""


def _check_exists(path: str | os.PathLike[str], what: str) -> str:
    text = os.fspath(path)
    if _is_local_path(text) and not Path(text).exists():
        raise InputFileError(f"{what} file '{text}' does not exist{missing_path_hint(text)}; "
                             "check the path")
    return text


@functools.lru_cache(maxsize=32)
def _pyproj_from_wkt(wkt: str) -> pyproj.CRS:
    return pyproj.CRS.from_wkt(wkt)


def _to_pyproj(crs: CRS | pyproj.CRS | str) -> pyproj.CRS:
    if isinstance(crs, pyproj.CRS):
        return crs
    if isinstance(crs, CRS):
        return _pyproj_from_wkt(crs.to_wkt())
    return pyproj.CRS.from_user_input(crs)


@functools.lru_cache(maxsize=32)
def _transformer(source_wkt: str, target_wkt: str) -> pyproj.Transformer:
    """A cached x/y transformer between the horizontal parts of two CRSs."""
    source = _split_compound(_pyproj_from_wkt(source_wkt))[0]
    target = _split_compound(_pyproj_from_wkt(target_wkt))[0]
    return pyproj.Transformer.from_crs(source, target, always_xy=True)


def _split_compound(crs: pyproj.CRS) -> tuple[pyproj.CRS, pyproj.CRS | None]:
    """(horizontal part, vertical part or None) of a CRS."""
    if crs.is_compound:
        horizontal, vertical = crs, None
        for sub in crs.sub_crs_list:
            if sub.is_vertical:
                vertical = sub
            else:
                horizontal = sub
        return horizontal, vertical
    return crs, None


def _unit_of_factor(factor: float) -> LengthUnit | None:
    """metre / foot from the number of metres per unit, or None."""
    if math.isclose(factor, 1.0, rel_tol=1e-9):
        return "metre"
    if math.isclose(factor, _INTERNATIONAL_FOOT, rel_tol=1e-7) or math.isclose(
        factor, _US_SURVEY_FOOT, rel_tol=1e-7
    ):
        return "foot"
    return None


def conveyance_factor(manning_k: float, z_to_xy: float) -> float:
    """Factor turning a conveyance formed from vertical depths into horizontal units.

    Every conveyance form (``A R^(2/3)``, ``L h^(5/3)``, ``sum h^(5/3) ds``, ``V R^(2/3)``)
    is of degree 5/3 in vertical lengths once the plan lengths and the wetted perimeter are
    in horizontal units.  Converting the depths to horizontal units first therefore equals
    multiplying by ``z_to_xy ** (5/3)``; with ``manning_k`` the result is a discharge in
    horizontal units cubed per second at n = 1 (faces).  Exactly ``manning_k`` when the
    units agree (``z_to_xy == 1``).
    """
    return float(manning_k) * float(z_to_xy) ** (5.0 / 3.0)


def _parse_unit(value: str, option: str) -> str:
    """One of :data:`VERTICAL_UNITS` from a name or alias."""
    unit = _UNIT_ALIASES.get(str(value).strip().lower())
    if unit is None:
        raise InputError(f"{option} {value!r} is not a known unit; choose one of "
                         f"{', '.join(VERTICAL_UNITS)}")
    return unit


def _same_crs(a: pyproj.CRS, b: pyproj.CRS) -> bool:
    try:
        return a.equals(b, ignore_axis_order=True)
    except Exception:  # pragma: no cover - defensive, pyproj comparisons rarely fail
        return a == b


RASTER_CACHE_BYTES = 32 * 2**20
"""GDAL's block cache while ntrans reads windows: neighbouring tiles share blocks (jobs
take their tiles in bands narrow enough for it: :func:`ntrans.engine.band_tiles_for_cache`)."""


class _OpenRasters:
    """Datasets kept open by :func:`rasters_kept_open`: one per path, shared by threads.

    A GDAL dataset must not be used by two threads at once, so each handle has a lock
    and :meth:`read` holds it while GDAL reads; the conversion to float64 runs outside
    it.  One handle per path (not per thread) lets every thread use the blocks GDAL has
    decoded for it: tiles overlap by their margins, and with a handle per thread every
    block a window shares with a window of another thread was decoded twice (two tile
    threads on the 10^7-pixel benchmark case: 0.22 CPU-s of DEM reading against 0.11 for
    one thread; 0.15 with the handle shared, the rest waiting).  A handle is reopened
    when the file at its path is no longer the one it was opened on (replaced or
    rewritten: another inode, size or modification time), so a long-lived session never
    reads a stale file.  With ``max_open`` at most that many paths stay open, the least
    recently used closed first (a worker that serves job after job on other rasters).
    """

    def __init__(self, max_open: int | None = None) -> None:
        self._lock = threading.Lock()
        self._by_path: dict[str, _Handle] = {}
        self._max_open = max_open

    def _handle(self, path: str) -> _Handle:
        stamp = file_stamp(path)
        stale: list[_Handle] = []
        with self._lock:
            held = self._by_path.pop(path, None)
            if held is not None and held.stamp == stamp and not held.closed:
                self._by_path[path] = held  # most recently used last
                return held
            if held is not None:
                stale.append(held)
            handle = _Handle(path, stamp)
            self._by_path[path] = handle
            if self._max_open is not None:
                for old in list(self._by_path)[:max(len(self._by_path) - self._max_open, 0)]:
                    stale.append(self._by_path.pop(old))
        for old in stale:
            old.close()  # waits for a read in progress
        return handle

    def read(self, path: str, read: Callable[[Any], Any]) -> Any:
        """``read(dataset)`` on the shared handle of ``path``, under its lock (a handle
        another thread closed meanwhile, as stale or least recently used, is looked up
        again)."""
        while True:
            done, value = self._handle(path).read(read)
            if done:
                return value

    def handles(self) -> list[Any]:
        with self._lock:
            return [h.src for h in self._by_path.values() if h.src is not None]

    def close(self) -> None:
        with self._lock:
            handles, self._by_path = list(self._by_path.values()), {}
        for handle in handles:
            handle.close()


class _Handle:
    """One dataset (opened on first use) and the lock its readers take turns on."""

    def __init__(self, path: str, stamp: tuple[int, ...] | None) -> None:
        self.path, self.stamp = path, stamp
        self.src: Any = None
        self.closed = False
        self.lock = threading.Lock()

    def read(self, read: Callable[[Any], Any]) -> tuple[bool, Any]:
        """``(True, read(dataset))``, or ``(False, None)`` once the handle is closed."""
        with self.lock:
            if self.closed:
                return False, None
            if self.src is None:
                self.src = rasterio.open(self.path)
            return True, read(self.src)

    def close(self) -> None:
        with self.lock:
            self.closed = True
            if self.src is not None:
                self.src.close()
                self.src = None


def file_stamp(path: str) -> tuple[int, ...] | None:
    """Identity of the file at ``path`` (device, inode, size, mtime); None if not a file."""
    try:
        st = os.stat(path)
    except (OSError, ValueError):  # a GDAL virtual path (/vsicurl/...) or a URL
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


_session: _OpenRasters | None = None
_session_lock = threading.Lock()
_process_session: _OpenRasters | None = None  # see rasters_kept_open_by_this_process
PROCESS_RASTERS_OPEN = 4
"""Rasters a worker process keeps open between tasks (least recently used closed first)."""


@contextlib.contextmanager
def rasters_kept_open() -> Iterator[None]:
    """Keep the rasters read inside this block open until it ends (one handle per path).

    Tiles overlap by their margins and share compressed blocks; with the dataset kept
    open, GDAL decodes each block once instead of once per window (reading every 512 px
    window of a 10^8-pixel tiled, compressed DEM: 7.3 s -> 1.6 s with a 64 MB cache,
    2.9 s with 16 MB), in a block cache of at most :data:`RASTER_CACHE_BYTES`.  Jobs
    wrap their whole run in it, and threads that read for the job (tile threads) share
    the session; the block must outlive them.  Outside it every read opens and closes
    the file.  Nested blocks (from any thread) leave the handles to the outermost one.
    """
    global _session
    with _session_lock:
        owner = _session is None
        if owner:
            _session = _OpenRasters()
    if not owner:
        yield
        return
    try:
        with rasterio.Env(GDAL_CACHEMAX=RASTER_CACHE_BYTES):
            yield
    finally:
        with _session_lock:
            session, _session = _session, None
        if session is not None:
            session.close()


@contextlib.contextmanager
def rasters_kept_open_by_this_process() -> Iterator[None]:
    """Like :func:`rasters_kept_open`, for a process that serves many jobs (a Dask worker).

    The handles stay open after the block ends, for the next task of any job, so a
    worker decodes each compressed block of the DEM once instead of once per tile
    window; a file replaced or rewritten at the same path is reopened (see
    :class:`_OpenRasters`).  The block cache is bounded by :data:`RASTER_CACHE_BYTES` as
    in a job.  A job's own session, when one is open in this process, takes precedence.
    """
    global _process_session
    with _session_lock:
        if _process_session is None:
            _process_session = _OpenRasters(max_open=PROCESS_RASTERS_OPEN)
    with rasterio.Env(GDAL_CACHEMAX=RASTER_CACHE_BYTES):
        yield


def _read_window(path: str, window: Window) -> np.ndarray:
    """Band 1 in ``window`` as float64, NaN where GDAL's mask says the pixel is invalid."""
    session = _session or _process_session
    if session is None:
        with rasterio.open(path) as src:
            return _valid_float64(*_read_raw(src, window))
    return _valid_float64(*session.read(path, functools.partial(_read_raw, window=window)))


def band_scale_offset(src: Any) -> tuple[float, float]:
    """Band 1's GDAL scale and offset: a stored value v stands for ``v * scale + offset``
    (e.g. an int16 DEM of centimetres with scale 0.01); (1, 0) when the file sets none."""
    scale = (src.scales or (1.0,))[0]
    offset = (src.offsets or (0.0,))[0]
    return (1.0 if scale is None else float(scale)), (0.0 if offset is None else float(offset))


def _read_raw(src: Any, window: Window) -> tuple[np.ndarray, float | None, bool, float, float]:
    """``(values, nodata, masked, scale, offset)`` of band 1 in ``window`` as stored (the
    part that needs the dataset)."""
    scale, offset = band_scale_offset(src)
    flags = src.mask_flag_enums[0]
    if flags == [MaskFlags.all_valid] or flags == [MaskFlags.nodata]:
        # GDAL's nodata mask compares in the band's own type (a float32 band with
        # nodata -3.4e38 masks float32(-3.4e38)); doing the same here saves the mask
        # band read, which costs as much as the data (0.33 s -> 0.2 s for every window
        # of a 10^7-pixel DEM)
        nodata = src.nodatavals[0] if flags == [MaskFlags.nodata] else None
        return src.read(1, window=window), nodata, False, scale, offset
    # alpha or mask bands
    return src.read(1, window=window, masked=True), None, True, scale, offset


def _valid_float64(raw: np.ndarray, nodata: float | None, masked: bool, scale: float = 1.0,
                   offset: float = 0.0) -> np.ndarray:
    """Stored values as float64 in the band's units (scale and offset applied; the nodata
    value is compared as stored), NaN where invalid."""
    if masked:
        values = np.ma.filled(raw.astype(np.float64), np.nan)
    else:
        values = raw.astype(np.float64)
        if nodata is not None:
            invalid = _equals_nodata(raw, nodata)
            if invalid is not None:
                values[invalid] = np.nan
    if scale != 1.0 or offset != 0.0:
        values = values * scale + offset
    return values


def _equals_nodata(raw: np.ndarray, nodata: float) -> np.ndarray | None:
    """Where ``raw`` equals ``nodata`` in its own dtype; None if no value can."""
    if np.isnan(nodata):
        return np.isnan(raw) if raw.dtype.kind == "f" else None
    if raw.dtype.kind == "f":
        return raw == raw.dtype.type(nodata)
    info = np.iinfo(raw.dtype)
    if nodata != int(nodata) or not info.min <= nodata <= info.max:
        return None  # not a value of this integer type
    return raw == raw.dtype.type(int(nodata))


def _read_band1(path: str, row_off: int, col_off: int, height: int, width: int,
                shape: tuple[int, int]) -> np.ndarray:
    """Boundless float64 read of band 1: NaN for masked pixels and outside the raster."""
    if height < 0 or width < 0:
        raise ValueError("window height and width must be zero or positive")
    n_rows, n_cols = shape
    r0, r1 = max(row_off, 0), min(row_off + height, n_rows)
    c0, c1 = max(col_off, 0), min(col_off + width, n_cols)
    if r1 <= r0 or c1 <= c0:
        return np.full((height, width), np.nan, dtype=np.float64)
    try:
        data = _read_window(path, Window(c0, r0, c1 - c0, r1 - r0))
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(
            f"raster '{path}' could not be read ({_reason(exc, path)}); check the file"
        ) from exc
    if data.shape == (height, width):  # wholly inside the raster: already the result
        return data
    out = np.full((height, width), np.nan, dtype=np.float64)
    out[r0 - row_off : r1 - row_off, c0 - col_off : c1 - col_off] = data
    return out


# --------------------------------------------------------------------------- DEM


@dataclass(frozen=True)
class DemInfo:
    """A DEM's grid, CRS and units; pixel values are read on demand by window.

    Attributes
    ----------
    path : str
        The raster as given (any GDAL raster; band 1 is used).
    crs : rasterio.crs.CRS
        Its CRS (projected, in metres or feet; may be compound).
    transform : affine.Affine
        North-up, unrotated pixel -> map transform.
    width, height : int
        Columns and rows.
    nodata : float or None
        The declared nodata value (decoded to NaN on read).
    dtype : str
        Band 1 data type.
    horizontal_unit, vertical_unit : {"metre", "foot"}
        Units of x/y and of elevations.
    z_to_xy : float
        Factor turning a vertical length into horizontal units (1.0 when equal).
    manning_k : float
        Manning unit factor from the horizontal unit: 1.0 (metre) or 1.486 (foot).
    conveyance_factor : float (property)
        ``manning_k * z_to_xy ** (5/3)``: turns a conveyance formed from depths in vertical
        units into horizontal units cubed per second (:func:`conveyance_factor`).
    pixel_size : (float, float)
        (dx, dy) in horizontal units, both positive.
    pixel_area : float
        dx * dy in horizontal units squared.
    bounds : rasterio.coords.BoundingBox
        (left, bottom, right, top) in the CRS.
    xy_metres_per_unit, z_metres_per_unit : float
        Metres per horizontal / vertical unit (0.3048 or 0.3048006 for feet).
    block_shape : (rows, cols) or None
        How band 1 is stored: the pixels GDAL decodes at once (None when not known).
    """

    path: str
    crs: CRS
    transform: Affine
    width: int
    height: int
    nodata: float | None
    dtype: str
    horizontal_unit: LengthUnit
    vertical_unit: LengthUnit
    z_to_xy: float
    manning_k: float
    pixel_size: tuple[float, float]
    pixel_area: float
    bounds: rasterio.coords.BoundingBox
    xy_metres_per_unit: float = 1.0
    z_metres_per_unit: float = 1.0
    block_shape: tuple[int, int] | None = None

    @property
    def conveyance_factor(self) -> float:
        """``manning_k * z_to_xy ** (5/3)`` (see :func:`conveyance_factor`)."""
        return conveyance_factor(self.manning_k, self.z_to_xy)

    @property
    def shape(self) -> tuple[int, int]:
        """(height, width) in pixels."""
        return (self.height, self.width)

    @property
    def horizontal_crs(self) -> pyproj.CRS:
        """The horizontal part of :attr:`crs` as a pyproj CRS (vector data goes here)."""
        return _split_compound(_to_pyproj(self.crs))[0]

    def read_window(self, row_off: int, col_off: int, height: int, width: int) -> np.ndarray:
        """Elevations of a pixel window as float64, NaN for nodata and outside the raster.

        The window may extend past the raster's edges (a boundless read); those pixels are
        NaN, never 0 or the nodata value.  GDAL masks (nodata value, mask bands, alpha)
        and NaN in float rasters all become NaN.

        >>> dem.read_window(-1, -1, 3, 3)[0, 0]  # doctest: +SKIP
        nan
        """
        return _read_band1(self.path, int(row_off), int(col_off), int(height), int(width),
                           self.shape)

    def window_transform(self, row_off: int, col_off: int) -> Affine:
        """The affine transform of a window whose top-left pixel is (row_off, col_off)."""
        return self.transform @ Affine.translation(col_off, row_off)

    def window_for_bounds(
        self, bounds: Sequence[float], *, pad: int = 0
    ) -> tuple[int, int, int, int]:
        """Pixel window ``(row_off, col_off, height, width)`` covering map ``bounds``.

        ``bounds`` is ``(minx, miny, maxx, maxy)``; ``pad`` extra pixels on every side.  The
        window may reach outside the raster (read it with :meth:`read_window`).
        """
        minx, miny, maxx, maxy = (float(v) for v in bounds)
        a, c, e, f = self.transform.a, self.transform.c, self.transform.e, self.transform.f
        eps = 1e-9
        col0 = math.floor((minx - c) / a + eps) - pad
        col1 = math.ceil((maxx - c) / a - eps) + pad
        row0 = math.floor((maxy - f) / e + eps) - pad
        row1 = math.ceil((miny - f) / e - eps) + pad
        return row0, col0, max(row1 - row0, 0), max(col1 - col0, 0)


def length_scale_error(crs: CRS | pyproj.CRS | str, x: float, y: float) -> float | None:
    """How far the projection of ``crs`` stretches or shrinks lengths at map point (x, y).

    The largest of ``|a - 1|`` and ``|b - 1|``, where a and b are the greatest and least
    point scales there (the semi-axes of Tissot's indicatrix, from PROJ's factors); 0 for
    a true-scale point.  None when it cannot be computed (a CRS PROJ cannot evaluate, a
    point outside the projection's domain).

    >>> round(length_scale_error("EPSG:3857", 0.0, 5_591_295.9), 3)  # 45 deg N  # doctest: +SKIP
    0.414
    """
    horizontal = _split_compound(_to_pyproj(crs))[0]
    if not horizontal.is_projected:
        return None
    try:
        lon, lat = _lonlat(horizontal, x, y)
        factors = pyproj.Proj(horizontal).get_factors(lon, lat)
        a, b = float(factors.tissot_semimajor), float(factors.tissot_semiminor)
    except Exception:  # pyproj / PROJ errors of every kind: the check is only advice
        return None
    if not (math.isfinite(a) and math.isfinite(b) and a > 0 and b > 0):
        return None
    return max(abs(a - 1.0), abs(b - 1.0))


def _lonlat(horizontal: pyproj.CRS, x: float, y: float) -> tuple[float, float]:
    """Longitude and latitude (degrees, on the CRS's own datum) of map point (x, y)."""
    to_lonlat = pyproj.Transformer.from_crs(horizontal, horizontal.geodetic_crs,
                                            always_xy=True)
    lon, lat = to_lonlat.transform(x, y)
    return float(lon), float(lat)


def _percent(share: float) -> str:
    pct = 100.0 * share
    return f"{pct:.0f} %" if pct >= 10 else f"{pct:.2g} %"


def _check_projection_scale(text: str, horizontal: pyproj.CRS,
                            bounds: rasterio.coords.BoundingBox) -> None:
    """Refuse a DEM whose CRS distorts lengths beyond :data:`SCALE_ERROR_LIMIT` at its
    centre (e.g. Web Mercator away from the equator); warn beyond
    :data:`SCALE_WARNING_LIMIT`."""
    x, y = 0.5 * (bounds.left + bounds.right), 0.5 * (bounds.bottom + bounds.top)
    error = length_scale_error(horizontal, x, y)
    if error is None:
        logger.debug("DEM %s: the scale of CRS '%s' could not be checked", text, horizontal.name)
        return
    if error <= SCALE_WARNING_LIMIT:
        return
    what = (f"DEM '{text}' is in the CRS '{horizontal.name}', which distorts lengths by "
            f"{_percent(error)} where the DEM lies")
    if error > SCALE_ERROR_LIMIT:
        lon, lat = _lonlat(horizontal, x, y)
        if abs(lat) < 84:
            zone = min(max(int((lon + 180.0) // 6) + 1, 1), 60)
            example = f"e.g. the UTM zone, EPSG:{(32600 if lat >= 0 else 32700) + zone}"
        else:
            example = "e.g. a polar stereographic CRS"
        raise CRSError(
            f"{what}; reproject the DEM and the cells to a local projected CRS ({example}) "
            "with gdalwarp / ogr2ogr"
        )
    warn(f"{what}, and lengths, areas and volumes carry that error; consider reprojecting "
         "the DEM and the cells to a local projected CRS (e.g. the UTM zone)",
         ProjectionScaleWarning, stacklevel=3)


def open_dem(path: str | os.PathLike[str], *, vertical_units: str | None = None,
             check_scale: bool = True) -> DemInfo:
    """Open a DEM and check its CRS, units and grid.

    Parameters
    ----------
    path : str or path-like
        Any raster GDAL reads; band 1 holds the elevations.
    vertical_units : {"metre", "foot", "us_survey_foot"} or None
        Units of the elevations.  None: the unit of a vertical CRS in the DEM's compound
        CRS if there is one, else the horizontal unit.  ``foot`` is the CRS's own foot
        when the horizontal unit is a foot, else the international foot (0.3048 m);
        ``us_survey_foot`` is 1200/3937 m.  Aliases m/meter/ft/feet accepted.
    check_scale : bool
        Check the projection's point scale at the DEM's centre: lengths off by more than
        :data:`SCALE_ERROR_LIMIT` (2 %) raise :class:`CRSError`, by more than
        :data:`SCALE_WARNING_LIMIT` (0.5 %) warn (:class:`ProjectionScaleWarning`).

    Returns
    -------
    DemInfo

    Raises
    ------
    InputFileError
        Missing or unreadable file.
    CRSError
        No CRS, a geographic CRS, a unit other than metre or foot, or a projection that
        distorts lengths by more than 2 % at the DEM's centre.
    InputError
        Rotated or skewed grid, non-numeric band, or an unknown ``vertical_units``.
    """
    text = _check_exists(path, "DEM")
    requested = None if vertical_units is None else _parse_unit(vertical_units, "vertical unit")
    try:
        with rasterio.open(text) as src:
            crs, transform = src.crs, src.transform
            width, height, count = src.width, src.height, src.count
            gcps = src.gcps[0] if transform.is_identity else []
            nodata = src.nodata
            dtype = src.dtypes[0] if count else ""
            scale, offset = band_scale_offset(src) if count else (1.0, 0.0)
            block_shape = tuple(int(b) for b in src.block_shapes[0]) if count else None
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(
            f"DEM file '{text}' cannot be read as a raster ({_reason(exc, text)}); give a "
            "GeoTIFF or another raster GDAL can read"
        ) from exc
    if count < 1:
        raise InputFileError(f"DEM file '{text}' holds no raster band; give a single-band DEM")
    if transform.is_identity:
        # GDAL's stand-in when a file has no geotransform: pixel (col, row) at map (col, row)
        if gcps:
            raise InputError(
                f"DEM '{text}' is placed only by {len(gcps)} ground control points; warp it "
                "to a north-up grid in a projected CRS (e.g. gdalwarp) first")
        raise InputError(
            f"DEM '{text}' has no geotransform (its pixels have no map position); give it "
            "its corner coordinates (e.g. gdal_translate -a_ullr) or use the georeferenced "
            "original")
    if count > 1:
        logger.warning("DEM %s has %d bands; only band 1 is used as elevation", text, count)
    if scale != 1.0 or offset != 0.0:
        logger.info("DEM %s: stored values scaled by %g and offset by %g (the file's scale "
                     "and offset) to give elevations", text, scale, offset)
    if not np.issubdtype(np.dtype(dtype), np.integer) and not np.issubdtype(
        np.dtype(dtype), np.floating
    ):
        raise InputError(f"DEM '{text}' has data type {dtype}; give integer or float elevations")
    if crs is None:
        raise CRSError(
            f"DEM '{text}' has no CRS; assign its projected CRS (metres or feet), e.g. with "
            "gdal_edit.py -a_srs"
        )
    horizontal, vertical = _split_compound(_to_pyproj(crs))
    if horizontal.is_geographic:
        raise CRSError(
            f"DEM '{text}' is in the geographic CRS '{horizontal.name}' (degrees); reproject it "
            "to a projected CRS in metres or feet"
        )
    axis = horizontal.axis_info[0] if horizontal.axis_info else None
    xy_factor = axis.unit_conversion_factor if axis is not None else float("nan")
    horizontal_unit = _unit_of_factor(xy_factor)
    if horizontal_unit is None:
        unit_name = axis.unit_name if axis is not None else "unknown"
        raise CRSError(
            f"DEM '{text}' CRS '{horizontal.name}' uses the unit '{unit_name}'; reproject it to "
            "a projected CRS in metres or feet"
        )
    if transform.b != 0 or transform.d != 0:
        raise InputError(
            f"DEM '{text}' has a rotated or skewed grid; resample it to a north-up grid "
            "(e.g. gdalwarp) first"
        )
    if not (transform.a > 0 and transform.e < 0):
        raise InputError(
            f"DEM '{text}' is not stored north-up (pixel size {transform.a}, {transform.e}); "
            "rewrite it north-up (e.g. gdalwarp) first"
        )
    if width < 1 or height < 1:
        raise InputFileError(f"DEM file '{text}' has no pixels; give a non-empty DEM")
    bounds = rasterio.coords.BoundingBox(
        transform.c, transform.f + transform.e * height, transform.c + transform.a * width,
        transform.f,
    )
    if check_scale:
        _check_projection_scale(text, horizontal, bounds)

    vertical_factor = (
        vertical.axis_info[0].unit_conversion_factor
        if vertical is not None and vertical.axis_info else float("nan")
    )
    if requested is not None:
        vertical_unit: LengthUnit = "metre" if requested == "metre" else "foot"
    elif _unit_of_factor(vertical_factor) is not None:
        vertical_unit = _unit_of_factor(vertical_factor)  # type: ignore[assignment]
        logger.info("DEM %s: vertical unit %s taken from its vertical CRS", text, vertical_unit)
    else:
        vertical_unit = horizontal_unit
    if requested is None and _unit_of_factor(vertical_factor) == vertical_unit:
        z_factor = vertical_factor  # the exact foot of the vertical CRS
    elif requested == "us_survey_foot":
        z_factor = (xy_factor if math.isclose(xy_factor, _US_SURVEY_FOOT, rel_tol=1e-9)
                    else _US_SURVEY_FOOT)
    elif vertical_unit == horizontal_unit:
        z_factor = xy_factor
    elif vertical_unit == "foot":
        z_factor = _INTERNATIONAL_FOOT
    else:
        z_factor = 1.0
    dx, dy = abs(transform.a), abs(transform.e)
    info = DemInfo(
        path=text,
        crs=crs,
        transform=transform,
        width=int(width),
        height=int(height),
        nodata=None if nodata is None else float(nodata),
        dtype=str(dtype),
        horizontal_unit=horizontal_unit,
        vertical_unit=vertical_unit,
        z_to_xy=1.0 if z_factor == xy_factor else z_factor / xy_factor,
        manning_k=MANNING_K[horizontal_unit],
        pixel_size=(float(dx), float(dy)),
        pixel_area=float(dx * dy),
        bounds=bounds,
        xy_metres_per_unit=float(xy_factor),
        z_metres_per_unit=float(z_factor),
        block_shape=block_shape,
    )
    logger.info(
        "DEM %s: %d x %d pixels of %g x %g %s, elevations in %s",
        text, width, height, dx, dy, horizontal_unit, vertical_unit,
    )
    return info


# --------------------------------------------------------------------------- cells


@dataclass
class CellLayer:
    """Cell polygons ready for the engine.

    Attributes
    ----------
    ids : numpy.ndarray
        The user's id per cell (int64, or object array of str), unique.
    geometry : numpy.ndarray
        shapely Polygon / MultiPolygon per cell, valid, 2-D, in the DEM's CRS.
    id_field : str
        Name of the id column in :attr:`frame`.
    frame : geopandas.GeoDataFrame
        All attributes, geometry in the DEM's CRS, index 0..n-1 (the local cell index).
    path : str
        The file read.
    covered_fraction : numpy.ndarray or None
        Share of each cell's area over valid DEM pixels; filled by the engine.
    """

    ids: np.ndarray
    geometry: np.ndarray
    id_field: str
    frame: Any
    path: str
    covered_fraction: np.ndarray | None = None
    pending_checks: Any = field(default=None, repr=False)

    def __len__(self) -> int:
        return int(self.ids.shape[0])

    def raise_if_checks_failed(self) -> None:
        """Raise now what a background check found, if it has finished (never waits)."""
        if self.pending_checks is not None and self.pending_checks.done():
            self.finish_checks()

    def finish_checks(self) -> None:
        """Wait for checks still running in the background and raise what they found."""
        if self.pending_checks is not None:
            pending, self.pending_checks = self.pending_checks, None
            pending.result()


@dataclass(frozen=True)
class _VectorInput:
    """Which vector input a message is about, and how its layer is named by the user."""

    what: str    # "cells", "class polygon"
    option: str  # command-line option naming the layer
    key: str     # project key and keyword argument naming the layer


_UTF8_VECTOR_SUFFIXES = frozenset({".gpkg", ".fgb", ".geojson", ".json"})
#: GeoParquet files, read with pyarrow (one layer each)
_GEOPARQUET_SUFFIXES = frozenset({".parquet", ".geoparquet"})

_CELLS = _VectorInput("cells", "--cells-layer", "cells_layer")
_CLASSES = _VectorInput("class polygon", "--classes-layer", "classes_layer")


def _choose_layer(path: str, layer: str | int | None, source: _VectorInput = _CELLS) -> str:
    """The name of the layer of ``path`` to read.

    ``layer`` (a name or a number from 0) picks one; without it the file must hold one
    layer with geometry (tables without geometry, e.g. a GeoPackage's attribute tables,
    are not candidates), else :class:`InputError` lists the layers.
    """
    import pyogrio

    if Path(path).suffix.lower() in _GEOPARQUET_SUFFIXES:
        return Path(path).stem if layer is None else str(layer)  # one layer, read whole
    try:
        layers = pyogrio.list_layers(path)
    except Exception as exc:  # pyogrio raises DataSourceError and friends
        raise InputFileError(
            f"{source.what} file '{path}' cannot be read as a vector layer "
            f"({_reason(exc, path)}); give a GeoPackage, Shapefile, GeoJSON, FlatGeobuf or "
            "GeoParquet file"
        ) from exc
    names = [str(row[0]) for row in layers]
    if not names:
        raise InputError(
            f"{source.what} file '{path}' holds no layer; give a file with a polygon layer"
        )
    if layer is not None:
        if isinstance(layer, int):
            if not 0 <= layer < len(names):
                raise InputError(
                    f"{source.what} layer number {layer} does not exist in '{path}'; it has "
                    f"{len(names)} layers: {_name_list(names, limit=10)}"
                )
            return names[layer]
        if layer not in names:
            raise InputError(
                f"{source.what} layer '{layer}' does not exist in '{path}'; choose one of "
                f"{_name_list(names, limit=10)}"
            )
        return layer
    spatial = [str(row[0]) for row in layers if row[1] is not None]
    candidates = spatial or names
    if len(candidates) == 1:
        return candidates[0]
    raise InputError(
        f"{source.what} file '{path}' holds {len(candidates)} layers "
        f"({_name_list(candidates, limit=10)}); name the one to read with {source.option} "
        f"({source.key} in a project file or a Python call)"
    )


def _read_layer(text: str, layer: str, source: _VectorInput) -> Any:
    """Layer ``layer`` of ``text`` as a GeoDataFrame indexed by feature id."""
    import geopandas as gpd

    # through Arrow: about a third faster on large layers; only for formats whose text is
    # UTF-8 by their specification (a Shapefile's may be in any code page)
    use_arrow = Path(text).suffix.lower() in _UTF8_VECTOR_SUFFIXES
    try:
        if Path(text).suffix.lower() in _GEOPARQUET_SUFFIXES:
            # read by pyarrow: GDAL's Parquet driver is often missing or half-built
            frame = gpd.read_parquet(text)
            frame.index = np.arange(len(frame))
        else:
            frame = gpd.read_file(text, layer=layer, engine="pyogrio", fid_as_index=True,
                                  use_arrow=use_arrow)
    except Exception as exc:  # pyogrio / GDAL errors of every kind
        raise InputFileError(
            f"{source.what} file '{text}' cannot be read ({_reason(exc, text)}); give a "
            "GeoPackage, Shapefile, GeoJSON, FlatGeobuf or GeoParquet polygon layer"
        ) from exc
    if not isinstance(frame, gpd.GeoDataFrame) or frame.geometry is None:
        raise GeometryError(
            f"{source.what} layer '{layer}' of '{text}' has no geometry; give a polygon layer"
        )
    return frame


def _source_crs(frame: Any, text: str, source: _VectorInput) -> pyproj.CRS:
    """The layer's CRS; :class:`CRSError` when it has none (never assumed)."""
    if frame.crs is None:
        raise CRSError(
            f"{source.what} layer '{text}' has no CRS; assign the CRS it was drawn in (e.g. "
            "write a .prj file or use ogr2ogr -a_srs)"
        )
    return _to_pyproj(frame.crs)


def unit_name(unit: str, metres_per_unit: float) -> str:
    """A length unit as a reader needs it: which foot, when it is a foot."""
    if unit != "foot":
        return unit
    if math.isclose(metres_per_unit, _US_SURVEY_FOOT, rel_tol=1e-9):
        return "US survey foot (1200/3937 m)"
    if math.isclose(metres_per_unit, _INTERNATIONAL_FOOT, rel_tol=1e-9):
        return "foot (international, 0.3048 m)"
    return f"foot ({metres_per_unit:.9g} m)"


def crs_label(crs: pyproj.CRS) -> str:
    """A CRS as a reader names it: its name and EPSG code, or for a CRS without a proper
    name (often 'unknown' in a GeoTIFF) its projection and unit."""
    epsg = crs.to_epsg(min_confidence=90)
    name = crs.name if crs.name and crs.name.lower() != "unknown" else None
    if name is None:
        method = crs.coordinate_operation.method_name if crs.coordinate_operation else None
        unit = crs.axis_info[0].unit_name if crs.axis_info else None
        name = ", ".join(v for v in ("a CRS without a name", method, unit and f"in {unit}")
                         if v)
    return f"'{name}' (EPSG:{epsg})" if epsg is not None else f"'{name}'"


def transformation_accuracy(source: pyproj.CRS, target: pyproj.CRS,
                            x: float, y: float) -> tuple[str, float] | None:
    """``(name, accuracy in metres)`` of the operation PROJ uses from ``source`` to
    ``target`` at point (x, y) of ``source``: the transformation's stated accuracy (EPSG),
    0 for a conversion within one datum, -1 when unknown (a ballpark shift); None when it
    cannot be found."""
    try:
        transformer = pyproj.Transformer.from_crs(source, target, always_xy=True)
        transformer.transform(x, y)
        operation = transformer.get_last_used_operation()
        name = operation.description or operation.name  # a pipeline's name is 'pipeline'
        return str(name), float(operation.accuracy)
    except Exception:  # pyproj / PROJ errors of every kind: the check is only advice
        return None


def _warn_if_reprojection_coarse(frame: Any, source: _VectorInput, own: pyproj.CRS,
                                 target: pyproj.CRS, pixel_metres: float) -> None:
    """:class:`ReprojectionAccuracyWarning` when ``frame`` (in ``own``) goes to ``target``
    by a transformation less accurate than half a pixel (``pixel_metres``, metres), or of
    unknown accuracy."""
    xmin, ymin, xmax, ymax = (float(v) for v in frame.total_bounds)
    if not all(map(math.isfinite, (xmin, ymin, xmax, ymax))):
        return
    found = transformation_accuracy(own, target, 0.5 * (xmin + xmax), 0.5 * (ymin + ymax))
    if found is None:
        return
    name, accuracy = found
    if 0.0 <= accuracy <= 0.5 * pixel_metres:
        return
    how = (f"accurate to about {accuracy:g} m, more than half the DEM's {pixel_metres:g} m "
           "pixel" if accuracy >= 0 else "of unknown accuracy")
    warn(f"{source.what} were reprojected from {crs_label(own)} to the DEM's CRS "
         f"{crs_label(target)} by '{name}', {how}, so they may sit beside their terrain; "
         "reproject them yourself with the datum grid the two CRSs need (PROJ grid files "
         "or network), or give them in the DEM's CRS", ReprojectionAccuracyWarning,
         stacklevel=4)


def _in_crs(frame: Any, text: str, source: _VectorInput,
            dem_crs: CRS | pyproj.CRS | str,
            pixel_metres: float | None = None) -> tuple[Any, bool]:
    """``(frame in the horizontal part of dem_crs, whether it was reprojected)``: the
    reprojection is logged, and with ``pixel_metres`` (the DEM's pixel, metres) a
    transformation coarser than half of it warns; :class:`CRSError` when the layer has no
    CRS or cannot be reprojected."""
    own = _source_crs(frame, text, source)
    full = _to_pyproj(dem_crs)
    target = _split_compound(full)[0]
    if _same_crs(own, target) or _same_crs(own, full):
        return frame.set_crs(target, allow_override=True), False
    logger.info("%s %s: reprojecting from %s to the DEM's CRS %s",
                source.what, text, crs_label(own), crs_label(target))
    try:
        moved = frame.to_crs(target)
    except Exception as exc:
        raise CRSError(
            f"{source.what} layer '{text}' cannot be reprojected from {crs_label(own)} to the "
            f"DEM's CRS {crs_label(target)} ({_reason(exc, text)}); reproject it yourself first"
        ) from exc
    if pixel_metres is not None:
        _warn_if_reprojection_coarse(frame, source, own, target, pixel_metres)
    return moved, True


def read_cell_outlines(path: str | os.PathLike[str], *, dem: DemInfo,
                       layer: str | int | None = None) -> np.ndarray:
    """The cells' geometries in the DEM's CRS, unchecked (null and empty ones left out):
    for quick checks before a job's long work, which reads them again with
    :func:`read_cells`.  Raises as :func:`read_cells` does for a missing or unreadable
    file, an unknown layer or a layer without CRS."""
    import shapely

    text = _check_exists(path, _CELLS.what)
    frame = _read_layer(text, _choose_layer(text, layer, _CELLS), _CELLS)
    frame, _ = _in_crs(frame, text, _CELLS, dem.crs)
    geoms = np.asarray(frame.geometry.array, dtype=object)
    return geoms[~(shapely.is_missing(geoms) | shapely.is_empty(geoms))]


def read_class_polygons(
    path: str | os.PathLike[str],
    *,
    layer: str | int | None = None,
    crs: CRS | pyproj.CRS | str | None = None,
) -> Any:
    """Read roughness class polygons as a GeoDataFrame, in ``crs`` when given.

    Parameters
    ----------
    path : str or path-like
        Any OGR polygon layer (GeoPackage, Shapefile, GeoJSON, FlatGeobuf, ...).
    layer : str, int or None
        Layer name or number; None: the file's only layer with geometry.
    crs : the DEM's CRS, or None to keep the layer's own.

    Raises
    ------
    InputFileError
        Missing or unreadable file.
    InputError
        Several layers and no ``layer``, or an unknown ``layer``.
    GeometryError
        A layer without geometry.
    CRSError
        With ``crs``: the layer has no CRS (it is never assumed to be the DEM's), or
        cannot be reprojected.
    """
    text = _check_exists(path, _CLASSES.what)
    name = _choose_layer(text, layer, _CLASSES)
    frame = _read_layer(text, name, _CLASSES)
    if crs is not None:
        frame = _in_crs(frame, text, _CLASSES, crs)[0]
    return frame


def _feature_numbers(frame: Any, rows: np.ndarray, text: str, layer: str) -> str:
    """How a user finds rows ``rows`` (positions in ``frame``) in the file: by the
    layer's feature ids when it has a fid column, else by position from 0."""
    import pyogrio

    try:
        info = pyogrio.read_info(text, layer=layer)
    except Exception:  # only a message depends on it
        info = {}
    fid_column, driver = info.get("fid_column") or "", info.get("driver") or ""
    if fid_column:
        fids = frame.index.to_numpy()[rows]
        by = "GeoPackage fid" if driver == "GPKG" else f"the layer's {fid_column} column"
        return f"features {_name_list(fids)} by {by}"
    return f"features at positions {_name_list(rows)} counted from 0"


def _resolve_id_field(frame: Any, id_field: str | None, path: str,
                      layer: str) -> tuple[str, np.ndarray]:
    """Pick the id column of layer ``layer`` of ``path``; return (field name, ids array)."""
    import pandas as pd

    columns = [c for c in frame.columns if c != frame.geometry.name]
    if id_field is None:
        lower = {str(c).lower(): c for c in columns}
        found = next((lower[c] for c in ID_FIELD_CANDIDATES if c in lower), None)
        if found is None:
            logger.info(
                "cells in %s have no id field (looked for %s); using the row number 0..n-1 "
                "as cell_id", path, ", ".join(ID_FIELD_CANDIDATES),
            )
            name = "cell_id" if "cell_id" not in columns else "_cell_row"
            return name, np.arange(len(frame), dtype=np.int64)
        logger.info("cells in %s: using field '%s' as the cell id", path, found)
        id_field = str(found)
    elif id_field not in columns:
        if id_field.lower() == "fid" and frame.index.name == "fid":
            logger.info("cells in %s: using the layer's feature ids (fid) as cell ids", path)
            return "fid", frame.index.to_numpy().astype(np.int64)
        raise InputError(
            f"id field '{id_field}' is not in the cells layer '{layer}' of '{path}'; its "
            f"fields are {_name_list(columns, limit=20) or 'none'}"
        )
    column = frame[id_field]
    missing = np.flatnonzero(column.isna().to_numpy())
    if missing.size:
        raise InputError(
            f"id field '{id_field}' is empty in {missing.size} cells: "
            f"{_feature_numbers(frame, missing, path, layer)}; give every cell an id"
        )
    if pd.api.types.is_bool_dtype(column):
        ids = column.astype(str).to_numpy(dtype=object)
    elif pd.api.types.is_integer_dtype(column):
        ids = column.to_numpy().astype(np.int64)
    elif pd.api.types.is_float_dtype(column):
        values = column.to_numpy(dtype=np.float64)
        if np.all(values == np.round(values)) and np.all(np.abs(values) < 2**53):
            ids = values.astype(np.int64)
        else:
            raise InputError(
                f"id field '{id_field}' holds fractional numbers; use whole numbers or text ids"
            )
    else:
        ids = column.astype(str).to_numpy(dtype=object)
    return str(id_field), ids


#: polygons per thread below which a geometry test runs in one thread
THREADED_GEOMETRY_MIN = 16_384


def _chunked(fn: Callable[[np.ndarray], np.ndarray], geoms: np.ndarray) -> np.ndarray:
    """``fn(geoms)`` for a vectorised GEOS function, in chunks on the default tile threads
    (GEOS releases the GIL); small arrays in one call."""
    from .cluster import default_threads

    n_chunks = min(default_threads(), geoms.size // THREADED_GEOMETRY_MIN)
    if n_chunks < 2:
        return fn(geoms)
    with ThreadPoolExecutor(n_chunks, thread_name_prefix="ntrans-geometry") as pool:
        return np.concatenate(list(pool.map(fn, np.array_split(geoms, n_chunks))))


def _repair(geoms: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """Make invalid polygons valid, keeping only their polygonal parts (vectorised)."""
    invalid = ~_chunked(is_valid, geoms)
    if not invalid.any():
        return geoms
    bad = np.flatnonzero(invalid)
    fixed = shapely.make_valid(geoms[bad], method="structure", keep_collapsed=False)
    # keep polygonal parts only: explode twice (collections, then multipolygons)
    parts, owner = shapely.get_parts(fixed, return_index=True)
    keep = np.isin(shapely.get_type_id(parts), _POLYGON_TYPE_IDS)
    parts, owner = parts[keep], owner[keep]
    polys, sub = shapely.get_parts(parts, return_index=True)
    owner = owner[sub]
    result = np.full(bad.size, None, dtype=object)
    if polys.size:
        present, dense = np.unique(owner, return_inverse=True)
        counts = np.bincount(dense)
        merged = np.asarray(shapely.multipolygons(polys, indices=dense), dtype=object)
        single = counts == 1
        first = np.searchsorted(dense, np.arange(present.size))  # get_parts keeps order
        merged[single] = polys[first[single]]
        result[present] = merged
    lost = bad[shapely.is_missing(result) | shapely.is_empty(result)]
    if lost.size:
        raise GeometryError(
            f"cell polygons {_name_list(ids[lost])} are invalid and have no area left after "
            "repair; fix or remove them"
        )
    warn(
        f"cell polygons {_name_list(ids[bad])} were invalid and have been repaired "
        "(polygonal parts kept); check them in the source mesh",
        GeometryRepairedWarning,
        stacklevel=3,
    )
    out = geoms.copy()
    out[bad] = result
    return out


#: polygons whose edges are matched at once; bounds the screen's memory (about 50 MB)
EDGE_SCREEN_POLYGONS = 65_536


def _edges_not_shared(geoms: np.ndarray, block: int = EDGE_SCREEN_POLYGONS) -> np.ndarray:
    """Per polygon: True where one of its edges is not shared exactly with one other polygon.

    Rings are oriented (exteriors counter-clockwise, holes clockwise), so in a valid
    coverage every interior edge appears twice, once in each direction, with the same
    two end points.  An edge alone (the mesh's outer border, a hanging node, a gap, an
    overlap), twice in the same direction, or more than twice flags its polygons.  Across
    an edge shared that way the number of polygons covering a point does not change, so
    every region covered twice is bordered by edges of flagged polygons.

    More than ``block`` polygons are matched in slabs of ``block`` across the longer side
    of the layer's extent (bounded memory).  An edge on a slab's border finds no partner
    and flags its polygons: more pairs get the exact test, none is missed.
    """
    if geoms.size <= block:
        return _edges_not_shared_block(geoms)
    box = shapely.bounds(geoms)
    along_x = np.nanmax(box[:, 2]) - np.nanmin(box[:, 0]) >= np.nanmax(box[:, 3]) - np.nanmin(box[:, 1])
    centre = box[:, 0] + box[:, 2] if along_x else box[:, 1] + box[:, 3]
    order = np.argsort(centre, kind="stable")
    flagged = np.empty(geoms.size, dtype=bool)
    for start in range(0, geoms.size, block):
        part = order[start:start + block]
        flagged[part] = _edges_not_shared_block(geoms[part])
    return flagged


def _edges_not_shared_block(geoms: np.ndarray) -> np.ndarray:
    """:func:`_edges_not_shared` of one set of polygons, matched all at once."""
    flagged = np.zeros(geoms.size, dtype=bool)
    if geoms.size == 0:
        return flagged
    coords, ring_start, ring_geom, exterior = polygon_rings(geoms)
    n_rings = ring_start.size - 1
    # one edge per coordinate except each ring's closing one
    edge_ring = np.repeat(np.arange(n_rings), np.maximum(np.diff(ring_start) - 1, 0))
    first = np.ones(coords.shape[0], dtype=bool)
    first[ring_start[1:] - 1] = False
    start = np.flatnonzero(first[:-1]) if coords.shape[0] else np.empty(0, np.int64)
    x0, y0 = coords[start, 0] + 0.0, coords[start, 1] + 0.0  # + 0.0: -0.0 becomes 0.0
    x1, y1 = coords[start + 1, 0] + 0.0, coords[start + 1, 1] + 0.0
    twice_area = np.bincount(edge_ring, weights=x0 * y1 - x1 * y0, minlength=n_rings)
    flip = ((twice_area > 0) != exterior)[edge_ring]
    x0, y0, x1, y1 = (np.where(flip, x1, x0), np.where(flip, y1, y0),
                      np.where(flip, x0, x1), np.where(flip, y0, y1))
    # each edge as its two end points in (x, y) order, and whether it runs that way
    forward = (x0 < x1) | ((x0 == x1) & (y0 <= y1))
    ends = [np.where(forward, x0, x1), np.where(forward, y0, y1),
            np.where(forward, x1, x0), np.where(forward, y1, y0)]
    order, new = _group_equal(ends)
    forward = forward[order]
    group = np.cumsum(new) - 1
    size = np.bincount(group)
    ahead = np.bincount(group, weights=forward)
    good = (size == 2) & (ahead == 1)
    flagged[ring_geom[edge_ring[order[~good[group]]]]] = True
    return flagged


#: odd 64-bit multiplier of the tuple hash (the golden ratio's bits)
_HASH_MULTIPLIER = np.uint64(0x9E3779B97F4A7C15)


def _group_equal(values: list[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Bring equal tuples ``(values[0][i], values[1][i], ...)`` (float64) together.

    Returns ``(order, new)``: ``order`` puts equal tuples next to each other and ``new``
    marks where, in that order, a tuple differs from the one before (the first is new);
    -0.0 and 0.0 are equal, as they are to ``np.lexsort``.
    Sorting one 64-bit hash of each tuple is several times faster than a lexicographic
    sort on all of them; when two different tuples share a hash (checked) the
    lexicographic sort is used instead.
    """
    n = values[0].size
    # + 0.0 turns -0.0 into 0.0, so equal numbers have equal bits
    bits = [(np.asarray(v, dtype=np.float64) + 0.0).view(np.uint64) for v in values]
    key = np.zeros(n, dtype=np.uint64)
    with np.errstate(over="ignore"):
        for b in bits:
            key ^= b
            key *= _HASH_MULTIPLIER
            key ^= key >> np.uint64(29)
    order = np.argsort(key)

    def starts(order: np.ndarray) -> np.ndarray:
        new = np.ones(n, dtype=bool)
        if n > 1:
            new[1:] = False
            for b in bits:
                sorted_b = b[order]
                new[1:] |= sorted_b[1:] != sorted_b[:-1]
        return new

    new = starts(order)
    sorted_key = key[order]
    if (new[1:] & (sorted_key[1:] == sorted_key[:-1])).any():
        # two different tuples share a hash (and may be split up): sort exactly
        order = np.lexsort(values[::-1])
        new = starts(order)
    return order, new


def _check_overlaps(geoms: np.ndarray, ids: np.ndarray, tolerance: float) -> None:
    """Raise if two cells share more than ``tolerance`` of the smaller one's area.

    Vectorised screens, cheapest first: polygons whose edges are all shared exactly with
    their neighbours (:func:`_edges_not_shared`) are cleared, so only pairs holding a
    flagged polygon go on (on a conforming mesh only the cells along its outer border);
    their neighbours come from an STRtree queried with the flagged polygons alone; pairs
    whose bounding-box overlap is already within the tolerance cannot overlap beyond it;
    then interiors are tested and areas computed.
    """
    if geoms.size < 2:
        return
    flagged = _edges_not_shared(geoms, EDGE_SCREEN_POLYGONS)
    if not flagged.any():
        return
    tree = shapely.STRtree(geoms)
    picked = np.flatnonzero(flagged)
    k, j = tree.query(geoms[picked])
    i = picked[k]
    # each pair once, smaller index first: two flagged polygons find each other twice
    keep = (i != j) & ~(flagged[j] & (j < i))
    i, j = np.minimum(i[keep], j[keep]), np.maximum(i[keep], j[keep])
    order = np.lexsort((j, i))
    i, j = i[order], j[order]
    areas = shapely.area(geoms)
    box = shapely.bounds(geoms)
    overlap_w = np.minimum(box[i, 2], box[j, 2]) - np.maximum(box[i, 0], box[j, 0])
    overlap_h = np.minimum(box[i, 3], box[j, 3]) - np.maximum(box[i, 1], box[j, 1])
    box_overlap = np.clip(overlap_w, 0, None) * np.clip(overlap_h, 0, None)
    keep = box_overlap > tolerance * np.minimum(areas[i], areas[j])
    i, j = i[keep], j[keep]
    if i.size == 0:
        return
    interior = shapely.relate_pattern(geoms[i], geoms[j], "T********")
    i, j = i[interior], j[interior]
    if i.size == 0:
        return
    shared = shapely.area(shapely.intersection(geoms[i], geoms[j]))
    smaller = np.minimum(areas[i], areas[j])
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = np.where(smaller > 0, shared / smaller, 1.0)
    bad = np.flatnonzero(fraction > tolerance)
    if bad.size:
        order = bad[np.argsort(-fraction[bad], kind="stable")]
        named = [f"{ids[i[k]]}/{ids[j[k]]} ({fraction[k]:.0%})" for k in order[:5]]
        more = f" and {order.size - 5} more pairs" if order.size > 5 else ""
        raise GeometryError(
            f"cell polygons overlap beyond {tolerance:.0%} of the smaller cell's area "
            f"(pairs {', '.join(named)}{more}); fix the mesh so that cells do not overlap"
        )


#: vector formats whose text is UTF-8 by specification


def read_cells(
    path: str | os.PathLike[str],
    *,
    dem: DemInfo,
    id_field: str | None = None,
    layer: str | int | None = None,
    overlap_tolerance: float = 0.01,
    overlaps_in_background: bool = False,
) -> CellLayer:
    """Read the cell polygons, reproject them to the DEM's CRS and check them.

    Parameters
    ----------
    path : str or path-like
        Any OGR polygon layer (GeoPackage, Shapefile, GeoJSON, FlatGeobuf, ...).
    dem : DemInfo
        The DEM the cells lie on (target CRS, extent).
    id_field : str or None
        Column holding the cell ids.  None: the first of :data:`ID_FIELD_CANDIDATES`
        present (ignoring case), else the row number 0..n-1.  ``"fid"`` also reaches the
        layer's feature ids when no such column exists.
    layer : str, int or None
        Layer name or number (``cells_layer`` of the jobs); None: the file's only layer
        with geometry (several raise :class:`InputError` listing them).
    overlap_tolerance : float
        Largest shared area allowed between two cells, as a fraction of the smaller one.
    overlaps_in_background : bool
        Run the overlap check in a background thread; the caller then calls
        :meth:`CellLayer.raise_if_checks_failed` as it goes and
        :meth:`CellLayer.finish_checks` before it writes anything final.

    Returns
    -------
    CellLayer
        Cells partly outside the DEM or over nodata are kept.

    Raises
    ------
    InputFileError
        Missing or unreadable file.
    CRSError
        The layer has no CRS.
    GeometryError
        Empty layer, null/empty or non-polygon geometry, unrepairable or overlapping cells.
    InputError
        Several layers and no ``layer``, unknown layer or id field, missing or duplicate
        ids, no cell over the DEM.
    """
    import geopandas as gpd

    text = _check_exists(path, _CELLS.what)
    chosen = _choose_layer(text, layer, _CELLS)
    frame = _read_layer(text, chosen, _CELLS)
    if len(frame) == 0:
        raise GeometryError(f"cells layer '{text}' is empty; give a layer with cell polygons")
    id_name, ids = _resolve_id_field(frame, id_field, text, chosen)
    frame = frame.reset_index(drop=True)
    if id_name not in frame.columns:
        frame[id_name] = ids
    _check_unique(ids, id_name)

    geoms = np.asarray(frame.geometry.array, dtype=object)
    missing = shapely.is_missing(geoms) | shapely.is_empty(geoms)
    if missing.any():
        raise GeometryError(
            f"cells {_name_list(ids[missing])} have no geometry (null or empty); give every "
            "cell a polygon or remove it"
        )
    type_ids = shapely.get_type_id(geoms)
    wrong = ~np.isin(type_ids, _POLYGON_TYPE_IDS)
    if wrong.any():
        names = sorted({geoms[k].geom_type for k in np.flatnonzero(wrong)[:50]})
        raise GeometryError(
            f"cells {_name_list(ids[wrong])} have {'/'.join(names)} geometry, not polygons; "
            "give a polygon layer"
        )

    target = dem.horizontal_crs
    frame, reprojected = _in_crs(frame, text, _CELLS, dem.crs,
                                 pixel_metres=min(dem.pixel_size) * dem.xy_metres_per_unit)
    if reprojected:
        geoms = np.asarray(frame.geometry.array, dtype=object)
    as_read = geoms  # the frame's own geometry, until something below changes it

    if shapely.has_z(geoms).any():  # force_2d rebuilds every geometry: only when needed
        geoms = shapely.force_2d(geoms)
    bounds = shapely.bounds(geoms)
    if not np.all(np.isfinite(bounds)):
        bad = ~np.all(np.isfinite(bounds), axis=1)
        raise GeometryError(
            f"cells {_name_list(ids[bad])} have coordinates that cannot be placed in the DEM's "
            "CRS; check the layer's CRS"
        )
    repaired = _repair(geoms, ids)
    if repaired is not geoms:  # repaired cells may have changed their bounds
        geoms, bounds = repaired, shapely.bounds(repaired)
    zero = shapely.area(geoms) <= 0
    if zero.any():
        raise GeometryError(
            f"cells {_name_list(ids[zero])} have zero area; fix or remove them"
        )
    pending = None
    if overlaps_in_background:
        # GEOS releases the GIL: the check runs beside the job's own work
        pool = ThreadPoolExecutor(1, thread_name_prefix="ntrans-overlaps")
        pending = pool.submit(_check_overlaps, geoms, ids, overlap_tolerance)
        pool.shutdown(wait=False)
    else:
        _check_overlaps(geoms, ids, overlap_tolerance)

    # over the DEM: interiors meet its extent.  Bounds settle most cells; the exact
    # predicates run only where a cell's bounding box crosses the extent's border
    left, bottom, right, top = dem.bounds
    inside = ((bounds[:, 0] > left) & (bounds[:, 2] < right)
              & (bounds[:, 1] > bottom) & (bounds[:, 3] < top))
    apart = ((bounds[:, 2] <= left) | (bounds[:, 0] >= right)
             | (bounds[:, 3] <= bottom) | (bounds[:, 1] >= top))
    touching = inside.copy()
    unsure = np.flatnonzero(~inside & ~apart)
    if unsure.size:
        extent = shapely.box(left, bottom, right, top)
        touching[unsure] = (shapely.intersects(geoms[unsure], extent)
                            & ~shapely.touches(geoms[unsure], extent))
    if not touching.any():
        raise InputError(
            f"none of the {ids.size} cells in '{text}' lies over the DEM's extent; check that "
            "both files cover the same area"
        )
    outside = ids.size - int(touching.sum())
    if outside:
        logger.info("cells %s: %d cells lie wholly outside the DEM and are kept", text, outside)

    if geoms is not as_read:  # flattened or repaired: the frame takes the new geometry
        frame = gpd.GeoDataFrame(frame.drop(columns=frame.geometry.name),
                                 geometry=gpd.GeoSeries(geoms, crs=target), crs=target)
    frame.index = np.arange(len(frame))
    return CellLayer(ids=ids, geometry=geoms, id_field=id_name, frame=frame, path=text,
                     pending_checks=pending)


def _check_unique(ids: np.ndarray, id_name: str) -> None:
    """Raise :class:`InputError` naming the first few duplicate ids."""
    import pandas as pd

    dup = pd.Series(ids).duplicated(keep="first").to_numpy()
    if dup.any():
        values = list(dict.fromkeys(ids[dup].tolist()))
        raise InputError(
            f"id field '{id_name}' has duplicate values ({_name_list(values)}); give every cell "
            "a unique id"
        )


# --------------------------------------------------------------------------- water surfaces


@dataclass(frozen=True)
class WaterSurface:
    """A water-surface elevation raster (e.g. peak stage of the calibrated source model).

    Values are taken to be in the DEM's vertical unit.  Dry or missing pixels are NaN.
    """

    name: str
    path: str
    crs: CRS
    transform: Affine
    width: int
    height: int
    nodata: float | None

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)

    def read_window(self, row_off: int, col_off: int, height: int, width: int) -> np.ndarray:
        """Boundless float64 window of this raster's own grid (NaN for nodata / outside)."""
        return _read_band1(self.path, int(row_off), int(col_off), int(height), int(width),
                           self.shape)

    def sample(
        self,
        x: np.ndarray,
        y: np.ndarray,
        *,
        crs: CRS | pyproj.CRS | str | None = None,
        method: SampleMethod = "bilinear",
    ) -> np.ndarray:
        """Water-surface elevation at points ``(x, y)`` given in ``crs`` (default: own CRS).

        ``bilinear`` interpolates between pixel centres using only the valid neighbours
        (weights renormalised); a point whose own pixel is NaN or outside the raster is NaN.
        ``nearest`` takes the pixel the point falls in.  Returns float64 of ``x``'s shape.
        """
        if method not in ("bilinear", "nearest"):
            raise InputError(
                f"sampling method {method!r} is unknown; choose 'bilinear' or 'nearest'"
            )
        xa = np.asarray(x, dtype=np.float64)
        ya = np.asarray(y, dtype=np.float64)
        xa, ya = np.broadcast_arrays(xa, ya)
        shape = xa.shape
        xs, ys = xa.ravel(), ya.ravel()
        if crs is not None:
            source = _to_pyproj(crs)
            own = _to_pyproj(self.crs)
            if not _same_crs(source, own):
                transformer = _transformer(source.to_wkt(), own.to_wkt())
                xs, ys = transformer.transform(xs, ys)
                xs, ys = np.asarray(xs, dtype=np.float64), np.asarray(ys, dtype=np.float64)
        inverse = ~self.transform
        col_f, row_f = inverse @ (xs, ys)  # fractional pixel coordinates (corner origin)
        col_f = np.asarray(col_f, dtype=np.float64)
        row_f = np.asarray(row_f, dtype=np.float64)
        out = np.full(xs.shape, np.nan)
        finite = np.isfinite(col_f) & np.isfinite(row_f)
        inside = finite & (col_f >= 0) & (col_f < self.width) & (row_f >= 0) & (row_f < self.height)
        idx = np.flatnonzero(inside)
        if idx.size == 0:
            return out.reshape(shape)
        own_row = np.floor(row_f[idx]).astype(np.int64)
        own_col = np.floor(col_f[idx]).astype(np.int64)
        blocks_per_row = self.width // _SAMPLE_BLOCK + 1
        block = (own_row // _SAMPLE_BLOCK) * blocks_per_row + own_col // _SAMPLE_BLOCK
        blocks, which = np.unique(block, return_inverse=True)
        for b in range(blocks.size):  # loop over raster blocks, not points
            sel = which == b
            rows, cols = own_row[sel], own_col[sel]
            r0, c0 = int(rows.min()) - 1, int(cols.min()) - 1
            win = self.read_window(r0, c0, int(rows.max()) - r0 + 2, int(cols.max()) - c0 + 2)
            own = win[rows - r0, cols - c0]
            if method == "nearest":
                out[idx[sel]] = own
                continue
            # bilinear between pixel centres: centre of pixel (r, c) is at (r + 0.5, c + 0.5)
            rr = row_f[idx[sel]] - 0.5
            cc = col_f[idx[sel]] - 0.5
            i0 = np.floor(rr).astype(np.int64)
            j0 = np.floor(cc).astype(np.int64)
            fr, fc = rr - i0, cc - j0
            total = np.zeros(rows.size)
            weight = np.zeros(rows.size)
            for di, dj, w in ((0, 0, (1 - fr) * (1 - fc)), (0, 1, (1 - fr) * fc),
                              (1, 0, fr * (1 - fc)), (1, 1, fr * fc)):
                v = win[i0 + di - r0, j0 + dj - c0]
                ok = np.isfinite(v)
                total += np.where(ok, v * w, 0.0)
                weight += np.where(ok, w, 0.0)
            with np.errstate(invalid="ignore", divide="ignore"):
                value = total / weight
            value[~np.isfinite(own)] = np.nan
            out[idx[sel]] = value
        return out.reshape(shape)

    def on_dem_window(
        self,
        dem: DemInfo,
        row_off: int,
        col_off: int,
        height: int,
        width: int,
        *,
        method: SampleMethod = "bilinear",
    ) -> np.ndarray:
        """Water surface on a DEM window's pixel grid, ``(height, width)`` float64, NaN = dry.

        When this raster shares the DEM's CRS and is aligned with its grid at the same pixel
        size, pixels are copied directly; otherwise each DEM pixel centre is sampled.
        """
        same_crs = _same_crs(_to_pyproj(self.crs), _to_pyproj(dem.crs))
        t, d = self.transform, dem.transform
        if same_crs and np.allclose([t.a, t.b, t.d, t.e], [d.a, d.b, d.d, d.e], rtol=1e-9):
            dc = (d.c - t.c) / t.a
            dr = (d.f - t.f) / t.e
            if abs(dc - round(dc)) < 1e-6 and abs(dr - round(dr)) < 1e-6:
                return self.read_window(row_off + round(dr), col_off + round(dc), height, width)
        wt = dem.window_transform(row_off, col_off)
        cols = np.arange(width) + 0.5
        rows = np.arange(height) + 0.5
        xs = wt.c + cols[None, :] * wt.a + rows[:, None] * wt.b
        ys = wt.f + cols[None, :] * wt.d + rows[:, None] * wt.e
        return self.sample(xs, ys, crs=None if same_crs else dem.crs, method=method)


def open_water_surface(path: str | os.PathLike[str], *, dem: DemInfo,
                       name: str | None = None) -> WaterSurface:
    """Open one water-surface raster and check it can be placed over the DEM.

    Raises :class:`InputFileError` (missing / unreadable) or :class:`CRSError` (no CRS).
    A CRS different from the DEM's is handled by reprojecting sample points (logged).
    """
    text = _check_exists(path, "water-surface")
    try:
        with rasterio.open(text) as src:
            crs, transform, width, height = src.crs, src.transform, src.width, src.height
            nodata, count = src.nodata, src.count
    except rasterio.errors.RasterioIOError as exc:
        raise InputFileError(
            f"water-surface file '{text}' cannot be read as a raster ({_reason(exc, text)}); "
            "give a GeoTIFF or another raster GDAL can read"
        ) from exc
    if count < 1:
        raise InputFileError(f"water-surface file '{text}' holds no raster band")
    if count > 1:
        logger.warning("water surface %s has %d bands; only band 1 is used", text, count)
    if crs is None:
        raise CRSError(
            f"water-surface raster '{text}' has no CRS; assign the CRS of the model it came from"
        )
    if not _same_crs(_to_pyproj(crs), _to_pyproj(dem.crs)):
        logger.info("water surface %s is in another CRS than the DEM; points are reprojected "
                    "to sample it", text)
    logger.info("water surface %s: values taken in the DEM's vertical unit (%s)",
                text, dem.vertical_unit)
    return WaterSurface(
        name=name or Path(text).stem,
        path=text,
        crs=crs,
        transform=transform,
        width=int(width),
        height=int(height),
        nodata=None if nodata is None else float(nodata),
    )


def read_water_surfaces(
    paths: Sequence[str | os.PathLike[str]] | str | os.PathLike[str], *, dem: DemInfo
) -> list[WaterSurface]:
    """Open several water-surface rasters; names are the file stems, made unique.

    Returns a list of :class:`WaterSurface` (each has ``.name``).
    """
    if isinstance(paths, str | os.PathLike):
        paths = [paths]
    surfaces: list[WaterSurface] = []
    seen: dict[str, int] = {}
    for p in paths:
        stem = Path(os.fspath(p)).stem
        seen[stem] = seen.get(stem, 0) + 1
        name = stem if seen[stem] == 1 else f"{stem}_{seen[stem]}"
        surfaces.append(open_water_surface(p, dem=dem, name=name))
    if not surfaces:
        raise InputError("no water-surface raster was given; give at least one file")
    return surfaces


def check_water_surfaces_reach(
    surfaces: Sequence[WaterSurface], dem: DemInfo, bounds: Sequence[float]
) -> None:
    """Raise :class:`InputError` when a water surface's extent misses ``bounds``
    (``minx, miny, maxx, maxy`` of the mesh, in the DEM's CRS) entirely.

    Only the rasters' extents are compared, so this costs nothing; a surface that meets
    the mesh but holds no value over it is found by the job's first pass.
    """
    minx, miny, maxx, maxy = (float(v) for v in bounds)
    target = _to_pyproj(dem.crs)
    for ws in surfaces:
        west, north = ws.transform @ (0, 0)
        east, south = ws.transform @ (ws.width, ws.height)
        west, east = sorted((west, east))
        south, north = sorted((south, north))
        own = _to_pyproj(ws.crs)
        if not _same_crs(own, target):
            transformer = _transformer(own.to_wkt(), target.to_wkt())
            west, south, east, north = transformer.transform_bounds(west, south, east, north,
                                                                    densify_pts=21)
        if east <= minx or west >= maxx or north <= miny or south >= maxy:
            raise InputError(
                f"water surface '{ws.name}' lies off the mesh everywhere (raster x "
                f"{_coord(west)} to {_coord(east)}, y {_coord(south)} to {_coord(north)}; mesh "
                f"x {_coord(minx)} to {_coord(maxx)}, y {_coord(miny)} to {_coord(maxy)}); "
                "check its extent and CRS"
            )


def _coord(value: float) -> str:
    """A map coordinate for a message: to a tenth of a unit, without exponent."""
    return f"{round(float(value), 1):.12g}"


def sample_water_surface(
    surface: WaterSurface | str | os.PathLike[str],
    dem: DemInfo,
    x: np.ndarray,
    y: np.ndarray,
    *,
    method: SampleMethod = "bilinear",
) -> np.ndarray:
    """Water-surface elevation at points ``(x, y)`` in the DEM's CRS; NaN where dry/outside."""
    ws = surface if isinstance(surface, WaterSurface) else open_water_surface(surface, dem=dem)
    return ws.sample(x, y, crs=dem.crs, method=method)


# --------------------------------------------------------------------------- output guard


def check_output_not_input(
    out_dir: str | os.PathLike[str], input_paths: Iterable[str | os.PathLike[str] | None]
) -> None:
    """Raise :class:`OutputError` if writing ``out_dir`` could replace or delete an input.

    That is when the folder is an input, contains an input (replacing the folder would
    delete it), or lies inside an input (a folder-style dataset).  ``None`` entries and
    GDAL virtual paths are ignored.
    """
    out = Path(os.fspath(out_dir)).expanduser().resolve()
    for item in input_paths:
        if item is None:
            continue
        text = os.fspath(item)
        if not _is_local_path(text):
            continue
        src = Path(text).expanduser().resolve()
        if src == out or out in src.parents:
            raise OutputError(
                f"output folder '{out}' would overwrite the input '{text}'; choose another "
                "output folder"
            )
        if src in out.parents:
            raise OutputError(
                f"output folder '{out}' lies inside the input '{text}'; choose a folder "
                "outside it"
            )


def elevation_field_values(
    layer: Any, rule: str, elevation_field: str | None
) -> np.ndarray | None:
    """Flat bed elevations from a cell attribute (rule ``field``), else None; checked."""
    if rule != "field":
        if elevation_field is not None:
            raise InputError(
                f"an elevation field ({elevation_field!r}) was given but the elevation rule is "
                f"{rule!r}; use elevation_rule='field' or drop the field"
            )
        return None
    if elevation_field is None:
        raise InputError(
            "the elevation rule 'field' needs an elevation field; name the cell attribute "
            "holding the flat bed elevations"
        )
    frame = layer.frame
    if elevation_field not in frame.columns:
        raise InputError(
            f"the cells have no attribute {elevation_field!r}; choose one of "
            f"{', '.join(map(str, [c for c in frame.columns if c != frame.geometry.name]))}"
        )
    try:
        values = np.asarray(frame[elevation_field], dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"cell attribute {elevation_field!r} holds non-numbers; give elevations as numbers"
        ) from exc
    return values
