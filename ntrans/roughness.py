"""Roughness classes and Manning's n values.

A :class:`RoughnessModel` holds the class names, one n per class, the optional surface
kind of each class (a key of :data:`PUBLISHED_N_RANGES`) and the source of the class
map: class polygons, a class raster, or one class for everything.  The pure function
:func:`class_index_on_window` turns the map into a class-index array on any DEM window,
so n is known at every DEM pixel and, through :func:`class_at_points` (nearest pixel),
at every face segment midpoint.

Inputs, in the order they are tried by :func:`load_roughness`:

- ``n``: one n for the whole mesh (one class ``"all"``);
- ``classes`` + ``class_field`` + ``n_table``: class polygons and a CSV with columns
  ``class, n`` and optional ``surface``;
- ``classes`` + ``n_field``: polygons carrying their own n (one class per distinct n);
- ``class_raster`` + ``n_table``: an integer class raster and the CSV.

``default_class`` names the class for ground no polygon (or raster pixel) covers.
Every bad input raises :class:`~ntrans.errors.RoughnessError` with one sentence: among
them an n outside :data:`N_MIN`..:data:`N_MAX`, the class fit's search bounds, which no
Manning's n reaches (a Strickler coefficient, or a value in the wrong unit); an n
outside the published range for its surface, or above 0.3, emits
:class:`~ntrans.errors.RoughnessRangeWarning`.  :func:`check_roughness_inputs` checks
the classes against the n table without building the class map, before long work.
"""

from __future__ import annotations

import functools
import logging
import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

from .errors import (
    CRSError,
    InputFileError,
    RoughnessError,
    RoughnessRangeWarning,
    closest_name,
    warn,
)

log = logging.getLogger(__name__)

# rasterio's in-memory raster operations (rasterize, reproject) run one at a time: two at
# once in threads of one process emit a spurious NotGeoreferencedWarning (results stay
# right; seen with rasterio 1.4.4), and GDAL's rasterize is single-threaded anyway
_IN_MEMORY_RASTER_LOCK = threading.Lock()

OverlapRule = Literal["error", "first", "last", "max_n"]
OVERLAP_RULES: tuple[str, ...] = ("error", "first", "last", "max_n")

#: Chow (1959) Table 5-6, Manning's n (min, normal, max) [recalled from memory, METHODS.md].
PUBLISHED_N_RANGES: dict[str, tuple[float, float, float]] = {
    "channel_clean": (0.025, 0.030, 0.033),
    "channel_winding": (0.033, 0.040, 0.045),
    "channel_sluggish_weedy": (0.050, 0.070, 0.080),
    "pasture_short_grass": (0.025, 0.030, 0.035),
    "pasture_high_grass": (0.030, 0.035, 0.050),
    "cultivated_mature_crops": (0.030, 0.040, 0.050),
    "light_brush_trees": (0.040, 0.060, 0.080),
    "medium_dense_brush": (0.070, 0.100, 0.160),
    "heavy_timber": (0.080, 0.100, 0.120),
    "concrete_float": (0.013, 0.015, 0.016),
}

#: Above this n a value is unusual for any natural surface (warning only).
N_HIGH = 0.3

#: Accepted Manning's n (s/m^(1/3), the same number in US-customary use): the class fit's
#: absolute bounds (:func:`ntrans.translate.solve_class_n` searches n source divided or
#: multiplied by 10 within them), so the fit can always return the source n.  Values
#: outside are no Manning's n: the smoothest built surfaces lie near 0.01, the roughest
#: floodplains near 0.2 (common practice, no source).
N_MIN, N_MAX = 0.005, 1.0
#: the range of Manning's n named in messages (common practice, no source)
N_TYPICAL = (0.01, 0.2)
#: Strickler coefficients (1/n, m^(1/3)/s) of natural channels and floodplains start
#: about here; an n this large is taken for one in messages (common practice, no source)
STRICKLER_LOW = 5.0

#: Overlaps and uncovered ground smaller than this share of the area are ignored.
AREA_TOLERANCE = 1e-6

#: how messages name a setting: its command-line option and its project-file key
DEFAULT_CLASS_OPTION = "--default-class; default_class in a project file"
OVERLAP_RULE_OPTION = "--overlap-rule; overlap_rule in a project file"
N_OPTION = "--n; n in a project file"


@dataclass(frozen=True)
class RoughnessModel:
    """Roughness classes, their n, and the map that places them.

    Attributes
    ----------
    classes : tuple of str
        Class names; class index ``i`` is ``classes[i]``.
    n : ndarray (n_classes,)
        Manning's n per class (s m^-1/3 or its US-customary equivalent).
    surface : tuple of str or None
        Surface kind per class (key of :data:`PUBLISHED_N_RANGES`) or None.
    default : int
        Class index for ground no polygon or raster pixel covers; -1 when none.
    polygons : ndarray of shapely geometry or None
        Class polygons in the DEM's CRS, already ordered by the overlap rule
        (later polygons are burnt over earlier ones).
    polygon_class : ndarray of int or None
        Class index of each polygon.
    raster, raster_transform, raster_crs
        Class-index raster (-1 where unknown) as an array, or a :class:`RasterClasses`
        file read window by window; its affine transform and CRS.
    """

    classes: tuple[str, ...]
    n: np.ndarray
    surface: tuple[str | None, ...]
    default: int = -1
    polygons: np.ndarray | None = None
    polygon_class: np.ndarray | None = None
    raster: np.ndarray | RasterClasses | None = None
    raster_transform: Any = None
    raster_crs: Any = None
    source: str = "uniform"
    details: dict[str, Any] = field(default_factory=dict)

    @property
    def n_classes(self) -> int:
        return len(self.classes)

    def published_range(self, index: int) -> tuple[float, float] | None:
        """(min, max) published n of class ``index``'s surface, or None."""
        key = self.surface[index]
        if key is None:
            return None
        low, _, high = PUBLISHED_N_RANGES[key]
        return low, high


@dataclass(frozen=True)
class RasterClasses:
    """A class raster file, read window by window (never whole).

    ``codes`` are the raster's class codes (sorted) and ``code_class`` the class index of
    each; pixels with another value, nodata or outside the raster are -1 (unknown).
    """

    path: str
    transform: Any
    crs: Any
    width: int
    height: int
    codes: np.ndarray
    code_class: np.ndarray

    def index_window(self, row_off: int, col_off: int, height: int, width: int) -> np.ndarray:
        """Class index (int32, -1 unknown) of a window of the raster's own grid."""
        from .inputs import _read_band1

        values = _read_band1(self.path, int(row_off), int(col_off), int(height), int(width),
                             (self.height, self.width))
        return _code_index(values, self.codes, self.code_class)


def _code_index(values: np.ndarray, codes: np.ndarray, code_class: np.ndarray) -> np.ndarray:
    """Class index of each value by its code (-1 for NaN and codes not listed)."""
    out = np.full(values.shape, -1, dtype=np.int32)
    ok = np.isfinite(values)
    if codes.size and ok.any():
        v = values[ok]
        pos = np.minimum(np.searchsorted(codes, v), codes.size - 1)
        out[ok] = np.where(codes[pos] == v, code_class[pos], -1)
    return out


# ---------------------------------------------------------------------------------------
# pure: class map on a window


def class_index_on_window(model: RoughnessModel, transform: Any, shape: tuple[int, int],
                          crs: Any = None) -> np.ndarray:
    """Class index of every pixel of a DEM window.

    Parameters
    ----------
    model : RoughnessModel
    transform : affine.Affine
        The window's transform (DEM pixel frame).
    shape : (rows, cols)
    crs : optional
        The DEM's CRS; needed only when the class raster has another CRS.

    Returns
    -------
    ndarray of int32, shape ``shape``
        Class index per pixel; ``model.default`` (possibly -1) where nothing covers it.
        Polygons are burnt at pixel centres (``rasterio.features.rasterize``); a class
        raster is resampled nearest onto the window.
    """
    rows, cols = int(shape[0]), int(shape[1])
    if model.polygons is not None:
        from rasterio.features import rasterize

        out = np.full((rows, cols), model.default, dtype=np.int32)
        if rows == 0 or cols == 0 or len(model.polygons) == 0:
            return out
        shapes = ((geom, int(c)) for geom, c in zip(model.polygons, model.polygon_class, strict=True))
        with _IN_MEMORY_RASTER_LOCK:
            return rasterize(shapes, out_shape=(rows, cols), transform=transform,
                             fill=model.default, dtype="int32", out=out)
    if model.raster is not None:
        out = _raster_on_window(model, transform, rows, cols, crs)
        if model.default >= 0:
            out[out < 0] = model.default
        return out
    return np.zeros((rows, cols), dtype=np.int32)


def class_at_points(class_index: np.ndarray, transform: Any, x: np.ndarray,
                    y: np.ndarray) -> np.ndarray:
    """Class index at map points (nearest pixel of the window), -1 outside the window.

    Used for face segments: the class of a segment is the class at its midpoint.
    """
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    inv = ~transform
    col_f = inv.a * x + inv.b * y + inv.c
    row_f = inv.d * x + inv.e * y + inv.f
    col = np.floor(col_f).astype(np.int64)
    row = np.floor(row_f).astype(np.int64)
    rows, cols = class_index.shape
    # a point exactly on the far edge belongs to the last pixel
    col = np.where((col == cols) & np.isclose(col_f, cols), cols - 1, col)
    row = np.where((row == rows) & np.isclose(row_f, rows), rows - 1, row)
    inside = (row >= 0) & (row < rows) & (col >= 0) & (col < cols)
    out = np.full(x.shape, -1, dtype=np.int64)
    out[inside] = class_index[row[inside], col[inside]]
    return out


# ---------------------------------------------------------------------------------------
# validation helpers


def _check_n_values(names: list[str], values: list[Any], what: str, *,
                    labels: list[str] | None = None) -> np.ndarray:
    """Parse n values; raise listing every bad one.

    ``labels`` name each value in the message about values outside :data:`N_MIN` ..
    :data:`N_MAX` (e.g. ``"class 'channel'"``; default: none).
    """
    out = np.full(len(values), np.nan)
    bad: list[str] = []
    for i, (name, value) in enumerate(zip(names, values, strict=True)):
        try:
            number = float(value)
        except (TypeError, ValueError):
            bad.append(f"{name}={value!r}")
            continue
        if not np.isfinite(number) or number <= 0:
            bad.append(f"{name}={value!r}")
            continue
        out[i] = number
    if bad:
        comma = any(_is_number(str(v).replace(",", ".", 1)) and "," in str(v) for v in values)
        raise RoughnessError(
            f"{what} holds n values that are not positive numbers ({', '.join(bad)}); "
            + ("write n with a decimal point (0.035, not 0,035)" if comma else
               "give every n as a number above zero")
        )
    outside = [i for i, v in enumerate(out) if not N_MIN <= v <= N_MAX]
    if outside:
        raise _outside_error(what, [(None if labels is None else labels[i], float(out[i]))
                                    for i in outside])
    return out


def _outside_error(what: str, bad: list[tuple[str | None, float]]) -> RoughnessError:
    """The error for n values outside N_MIN..N_MAX: (label or None, value) each."""
    label, value = bad[0]
    if len(bad) == 1:
        given = f"n {value:g}" + (f" for {label}" if label else "")
    else:
        given = "n " + ", ".join(f"{v:g}" + (f" ({lab})" if lab else "") for lab, v in bad)
    if value >= STRICKLER_LOW:
        hint = (f"if it is a Strickler coefficient, give its reciprocal (1/{value:g} = "
                f"{1.0 / value:.3g})")
    else:
        hint = "check the value and its decimal point"
    verb = "is not a Manning's n" if len(bad) == 1 else "are not Manning's n values"
    return RoughnessError(
        f"{what} gives {given}, which {verb} (expected about {N_TYPICAL[0]:g}-"
        f"{N_TYPICAL[1]:g} s/m^(1/3); accepted {N_MIN:g}-{N_MAX:g}); {hint}"
    )


def check_ranges(model: RoughnessModel, n: np.ndarray | None = None, *, what: str = "n") -> list[str]:
    """Warn (RoughnessRangeWarning) about n outside its published range or above 0.3.

    Returns the names of the classes warned about.
    """
    values = model.n if n is None else np.asarray(n, dtype=float)
    warned: list[str] = []
    for i, name in enumerate(model.classes):
        value = float(values[i])
        if not np.isfinite(value):
            continue
        rng = model.published_range(i)
        if rng is not None and not (rng[0] <= value <= rng[1]):
            warn(
                f"{what} {value:g} of class {name!r} lies outside the published range "
                f"{rng[0]:g}-{rng[1]:g} for {model.surface[i]} (Chow 1959, Table 5-6); "
                "check the value",
                RoughnessRangeWarning,
                stacklevel=2,
            )
            warned.append(name)
        elif value > N_HIGH:
            warn(
                f"{what} {value:g} of class {name!r} is above {N_HIGH:g}, unusual for any "
                "natural surface; check the value",
                RoughnessRangeWarning,
                stacklevel=2,
            )
            warned.append(name)
    return warned


def outside_range(model: RoughnessModel, n: np.ndarray) -> np.ndarray:
    """Boolean per class: n outside the published range of its surface, or above 0.3."""
    out = np.zeros(model.n_classes, dtype=bool)
    for i in range(model.n_classes):
        value = float(n[i])
        if not np.isfinite(value):
            continue
        rng = model.published_range(i)
        out[i] = (rng is not None and not (rng[0] <= value <= rng[1])) or value > N_HIGH
    return out


def _decode_n_table(raw: bytes, where: str) -> str:
    """The text of an n table file: UTF-8 (with or without a byte-order mark) or UTF-16
    with a byte-order mark; RoughnessError for a workbook or other binary file."""
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            return raw.decode("utf-16")
        except UnicodeDecodeError:
            pass
    elif raw.startswith(b"PK\x03\x04") or raw.startswith(b"\xd0\xcf\x11\xe0"):
        raise RoughnessError(f"n table {where} is a spreadsheet workbook or archive, not CSV text; "
                             "save it as CSV (comma-separated, UTF-8)")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise RoughnessError(
            f"n table {where} is not UTF-8 text (byte {exc.start + 1} cannot be read); save it "
            "as CSV UTF-8 (comma-separated)"
        ) from None
    if "\x00" in text:
        raise RoughnessError(f"n table {where} holds binary data, not CSV text; save it as CSV "
                             "(comma-separated, UTF-8)")
    return text


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def read_n_table(path: str | Path) -> tuple[list[str], list[Any], list[str | None]]:
    """Read an n table CSV: columns ``class, n`` and optional ``surface``.

    Accepted as well: a byte-order mark, Windows line ends, semicolons or tabs as the
    separator (told by the header line), spaces around names and numbers, blank lines,
    lines that start with ``#`` (comments), other columns (ignored), header names in any
    case, and a class given twice with the same values.  A class given twice with
    different values, a row with more fields than the header, or n with a decimal comma
    raise :class:`~ntrans.errors.RoughnessError` saying what to change.
    """
    import csv

    path = Path(path)
    where = repr(str(path))
    if path.is_dir():
        raise InputFileError(f"n table {where} is a folder; give the path of a CSV file")
    if not path.is_file():
        from .inputs import missing_path_hint

        raise InputFileError(f"n table {where} does not exist{missing_path_hint(path)}; give "
                             "the path of a CSV file")
    text = _decode_n_table(path.read_bytes(), where)
    lines = [(number, line) for number, line in enumerate(text.splitlines(), start=1)
             if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise RoughnessError(f"n table {where} is empty; give a header line class,n and one row "
                             "per class")
    header_line = lines[0][1]
    delimiter = next((d for d in (",", ";", "\t") if d in header_line), ",")
    parsed = list(csv.reader([line for _, line in lines], delimiter=delimiter))
    header = [h.strip().lstrip("\ufeff").lower() for h in parsed[0]]
    if "class" not in header or "n" not in header:
        if any(_is_number(h) for h in header):
            raise RoughnessError(
                f"n table {where} has no header line (its first line is {header_line.strip()!r}); "
                "add the line class,n (or class,n,surface) above the rows"
            )
        raise RoughnessError(
            f"n table {where} has columns {header}; it needs columns class,n "
            "(and optionally surface)"
        )
    twice = sorted({h for h in header if h and header.count(h) > 1} & {"class", "n", "surface"})
    if twice:
        raise RoughnessError(f"n table {where} has column {twice[0]!r} more than once; keep one")
    column = {name: header.index(name) for name in ("class", "n", "surface") if name in header}
    rows: dict[str, tuple[int, str, str | None]] = {}
    for (number, line), fields in zip(lines[1:], parsed[1:], strict=True):
        fields = [f.strip() for f in fields]
        if len(fields) > len(header) and any(fields[len(header):]):
            at = column["n"]
            if delimiter == "," and fields[at].isdigit() and fields[at + 1][:1].isdigit():
                hint = "write n with a decimal point (0.035, not 0,035)"
            else:
                hint = "name the extra column in the header, or quote values that hold the separator"
            raise RoughnessError(
                f"line {number} of n table {where} ({line.strip()!r}) has {len(fields)} fields but "
                f"the header has {len(header)}; {hint}"
            )
        fields += [""] * (len(header) - len(fields))
        if not any(fields):
            continue  # a row of separators only, as spreadsheets write below a table
        name, value = fields[column["class"]], fields[column["n"]]
        surface = fields[column["surface"]] or None if "surface" in column else None
        if not name:
            raise RoughnessError(f"line {number} of n table {where} ({line.strip()!r}) has no "
                                 "class name; add it or delete the row")
        if name in rows:
            first_number, first_value, first_surface = rows[name]
            same_n = value == first_value or (_is_number(value) and _is_number(first_value)
                                              and float(value) == float(first_value))
            if not (same_n and surface == first_surface):
                raise RoughnessError(
                    f"n table {where} gives class {name!r} twice with different values (line "
                    f"{first_number}: n {first_value or 'empty'}, line {number}: n "
                    f"{value or 'empty'}"
                    + ("" if surface == first_surface else
                       f"; surfaces {first_surface or 'empty'} and {surface or 'empty'}")
                    + "); keep one row per class"
                )
            continue
        rows[name] = (number, value, surface)
    names = list(rows)
    return names, [rows[n][1] for n in names], [rows[n][2] for n in names]


def _check_surfaces(surfaces: list[str | None]) -> None:
    bad = sorted({s for s in surfaces if s is not None and s not in PUBLISHED_N_RANGES})
    if bad:
        raise RoughnessError(
            f"surface kinds {bad} are unknown; use one of {sorted(PUBLISHED_N_RANGES)} or leave "
            "the surface column empty"
        )


# ---------------------------------------------------------------------------------------
# building a model (pure on in-memory layers)


def uniform_model(n: float | str) -> RoughnessModel:
    """One class ``"all"`` with one n for the whole mesh."""
    values = _check_n_values(["n"], [n], f"the uniform n ({N_OPTION})")
    model = RoughnessModel(classes=("all",), n=values, surface=(None,), default=0,
                           source="uniform")
    check_ranges(model)
    return model


def _integer_key(name: str) -> int | None:
    """The whole number a class code such as ``'7'``, ``'07'`` or ``'7.0'`` stands for,
    else None."""
    try:
        value = float(name)
    except ValueError:
        return None
    return int(value) if np.isfinite(value) and value == int(value) else None


def _is_numeric_labels(labels: np.ndarray) -> bool:
    """True when every class label is a number (a numeric attribute), not text."""
    return all(isinstance(v, (int, float, np.integer, np.floating))
               and not isinstance(v, (bool, np.bool_)) for v in labels)


def _table_lookup(classes_used: list[str], table: tuple[list[str], list[Any], list[str | None]],
                  *, what: str, default_class: str | None, numeric: bool = False
                  ) -> tuple[list[str], np.ndarray, list[str | None], int, dict[str, int]]:
    """The n table's rows for the classes used and the default class: (class names as
    the table spells them, n, surfaces, index of the default class or -1, index of each
    class used).

    With ``numeric`` (codes of a class raster or of a numeric attribute) a class also
    matches a table row that writes the same whole number another way (``7`` matches
    ``07`` and ``7.0``).
    """
    names, values, surfaces = table
    lookup = dict(zip(names, range(len(names)), strict=True))

    def row_of(name: str) -> int | None:
        if name in lookup:
            return lookup[name]
        key = _integer_key(name) if numeric else None
        if key is None:
            return None
        rows = [i for i, other in enumerate(names) if _integer_key(other) == key]
        if len(rows) > 1:
            raise RoughnessError(
                f"the n table gives class code {key} more than once "
                f"({', '.join(repr(names[i]) for i in rows)}); keep one row per code"
            )
        return rows[0] if rows else None

    needed = list(dict.fromkeys(classes_used))
    row = {c: row_of(c) for c in needed}
    missing = [c for c in needed if row[c] is None]
    if missing:
        close = [(c, m) for c in missing if (m := closest_name(c, names)) is not None]
        hint = ""
        if close:
            shown = ", ".join(f"{m!r} for {c!r}" for c, m in close[:3])
            more = f" and {len(close) - 3} more" if len(close) > 3 else ""
            case = ("names match case-sensitively; " if any(c.casefold() == m.casefold()
                                                            for c, m in close) else "")
            hint = f" ({case}the table has {shown}{more})"
        raise RoughnessError(
            f"classes {missing} of {what} are missing from the n table{hint}; add a row for "
            "each (columns class,n) or correct the names"
        )
    default_row = None if default_class is None else row_of(default_class)
    if default_class is not None and default_row is None:
        match = closest_name(default_class, names)
        near = f" (closest: {match!r})" if match is not None else ""
        listed = ", ".join(names[:10]) + (f" and {len(names) - 10} more" if len(names) > 10
                                          else "")
        raise RoughnessError(
            f"default class {default_class!r} is not in the n table{near}; give one of its "
            f"classes ({listed}) or add a row for it"
        )
    idx = list(dict.fromkeys([row[c] for c in needed]
                             + ([] if default_row is None else [default_row])))
    n = _check_n_values([names[i] for i in idx], [values[i] for i in idx], "the n table",
                        labels=[f"class {names[i]!r}" for i in idx])
    surf = [surfaces[i] for i in idx]
    _check_surfaces(surf)
    default = idx.index(default_row) if default_row is not None else -1
    return [names[i] for i in idx], n, surf, default, {c: idx.index(row[c]) for c in needed}


def _overlap_area(polygons: np.ndarray) -> tuple[float, int]:
    """Total pairwise overlap area and the number of overlapping pairs."""
    import shapely

    tree = shapely.STRtree(polygons)
    left, right = tree.query(polygons, predicate="intersects")
    keep = left < right
    left, right = left[keep], right[keep]
    if left.size == 0:
        return 0.0, 0
    areas = shapely.area(shapely.intersection(polygons[left], polygons[right]))
    return float(areas.sum()), int(np.count_nonzero(areas > 0))


def _class_labels(labels: np.ndarray) -> list[str]:
    """Class names of polygons as text; RoughnessError when any is empty."""
    label_str = [str(v).strip() if v is not None else "" for v in labels]
    empty = sum(1 for v in label_str if v in ("", "nan", "None"))
    if empty:
        raise RoughnessError(f"{empty} class polygons have an empty class value; give every polygon a class")
    return label_str


def polygon_model(
    polygons: np.ndarray,
    labels: np.ndarray,
    *,
    table: tuple[list[str], list[Any], list[str | None]] | None = None,
    n_values: np.ndarray | None = None,
    default_class: str | float | None = None,
    overlap_rule: OverlapRule = "error",
    mesh_area: Any = None,
) -> RoughnessModel:
    """Build a model from class polygons (already in the DEM's CRS).

    Parameters
    ----------
    polygons : array of shapely Polygon/MultiPolygon
    labels : array
        Class name per polygon (``table`` mode) or ignored (``n_values`` mode).
    table : (names, n, surfaces), optional
        The n table; every label must be in it.
    n_values : array, optional
        n per polygon (the ``n_field`` mode); one class per distinct n.
    default_class : str or float, optional
        Class (or, in ``n_values`` mode, n) for ground no polygon covers.
    overlap_rule : {"error", "first", "last", "max_n"}
    mesh_area : shapely geometry, optional
        Union of the mesh cells; used to check that the layer meets the mesh and to
        measure uncovered ground.
    """
    import shapely

    if overlap_rule not in OVERLAP_RULES:
        raise RoughnessError(f"overlap rule {overlap_rule!r} is unknown; use one of {list(OVERLAP_RULES)}")
    polygons = np.asarray(polygons, dtype=object)
    keep = ~(shapely.is_missing(polygons) | shapely.is_empty(polygons))
    if not np.any(keep):
        raise RoughnessError("the class polygon layer holds no polygons; give a layer with class polygons")
    polygons = shapely.make_valid(polygons[keep])
    labels = np.asarray(labels, dtype=object)[keep]

    if n_values is not None:
        raw = np.asarray(n_values, dtype=object)[keep]
        names_raw = [f"polygon {i}" for i in range(raw.size)]
        n_poly = _check_n_values(names_raw, list(raw), "the n field of the class polygons",
                                 labels=names_raw)
        distinct = list(np.unique(n_poly))
        default_index = -1
        if default_class is not None:
            d = _check_n_values(["default"], [default_class], "the default n")[0]
            if d not in distinct:
                distinct.append(d)
            default_index = distinct.index(d)
        classes = [f"n={v:g}" for v in distinct]
        n = np.asarray(distinct, dtype=float)
        surf: list[str | None] = [None] * len(classes)
        lookup = {v: i for i, v in enumerate(distinct)}
        poly_class = np.array([lookup[v] for v in n_poly], dtype=np.int64)
        source = "n_field"
    else:
        assert table is not None
        label_str = _class_labels(labels)
        classes, n, surf, default_index, lookup = _table_lookup(
            sorted(set(label_str)), table, what="the class polygons",
            default_class=None if default_class is None else str(default_class),
            numeric=_is_numeric_labels(labels))
        poly_class = np.array([lookup[v] for v in label_str], dtype=np.int64)
        source = "polygons"

    # the layer must meet the mesh
    if mesh_area is not None:
        layer = shapely.union_all(polygons)
        if not shapely.intersects(layer, mesh_area) or shapely.intersection(layer, mesh_area).area <= 0:
            raise RoughnessError(
                "the class polygons do not overlap the mesh at all; check that the layer covers "
                "the model area and has the right CRS"
            )

    # overlaps
    total_area = float(shapely.area(polygons).sum())
    overlap, pairs = _overlap_area(polygons)
    order = np.arange(polygons.size)
    if overlap > AREA_TOLERANCE * total_area:
        if overlap_rule == "error":
            raise RoughnessError(
                f"class polygons overlap ({pairs} overlapping pairs, {overlap:.6g} square units "
                "in all); "
                "remove the overlaps or choose an overlap rule: first, last or max_n "
                f"({OVERLAP_RULE_OPTION})"
            )
        log.info("%d overlapping class polygon pairs resolved by rule %r", pairs, overlap_rule)
    if overlap_rule == "first":
        order = order[::-1]  # the first polygon is burnt last, so it wins
    elif overlap_rule == "max_n":
        order = np.argsort(n[poly_class], kind="stable")

    details: dict[str, Any] = {"overlap_area": overlap, "overlap_pairs": pairs}
    if mesh_area is not None:
        uncovered = float(shapely.difference(mesh_area, shapely.union_all(polygons)).area)
        share = uncovered / mesh_area.area if mesh_area.area > 0 else 0.0
        details["uncovered_share"] = share
        if share > AREA_TOLERANCE and default_index < 0:
            raise RoughnessError(
                f"{100 * share:.3g}% of the mesh area is covered by no class polygon; "
                f"give a default class ({DEFAULT_CLASS_OPTION}) or extend the polygons"
            )

    model = RoughnessModel(
        classes=tuple(classes), n=np.asarray(n, dtype=float), surface=tuple(surf),
        default=default_index, polygons=polygons[order], polygon_class=poly_class[order],
        source=source, details=details,
    )
    check_ranges(model)
    return model


def _raster_on_window(model: RoughnessModel, transform: Any, rows: int, cols: int,
                      crs: Any) -> np.ndarray:
    """The class raster's index (-1 unknown) on a DEM window, nearest pixel."""
    from affine import Affine
    from rasterio.enums import Resampling
    from rasterio.warp import reproject

    out = np.full((rows, cols), -1, dtype=np.int32)
    if rows == 0 or cols == 0:
        return out
    source, src_transform = model.raster, model.raster_transform
    src_crs = model.raster_crs if model.raster_crs is not None else crs
    dst_crs = crs if crs is not None else model.raster_crs
    if isinstance(source, RasterClasses):
        offset = _aligned_offset(source.transform, transform, src_crs, dst_crs)
        if offset is not None:  # the same grid: the window itself, nothing to resample
            return source.index_window(offset[0], offset[1], rows, cols)
        # the part of the file under the window (2 pixels more each side), then nearest
        # resampling from it as from the whole raster
        r0, c0, r1, c1 = _source_window(source, transform, rows, cols, src_crs, dst_crs)
        src_transform = source.transform @ Affine.translation(c0, r0)
        source = source.index_window(r0, c0, r1 - r0, c1 - c0)
    with _IN_MEMORY_RASTER_LOCK:
        reproject(
            source=np.asarray(source, dtype=np.int32),  # no copy: int32 already
            destination=out,
            src_transform=src_transform,
            src_crs=src_crs,
            dst_transform=transform,
            dst_crs=dst_crs,
            src_nodata=-1,
            dst_nodata=-1,
            resampling=Resampling.nearest,
        )
    return out


def _aligned_offset(src: Any, dst: Any, src_crs: Any, dst_crs: Any) -> tuple[int, int] | None:
    """(row, col) of the window's first pixel in the raster's grid when both grids are the
    same (CRS, pixel size, north-up, whole-pixel offset), else None."""
    if src_crs is not None and dst_crs is not None and src_crs != dst_crs:
        return None
    if src.b != 0 or src.d != 0 or dst.b != 0 or dst.d != 0:
        return None
    if not (np.isclose(src.a, dst.a, rtol=1e-9, atol=0) and np.isclose(src.e, dst.e, rtol=1e-9, atol=0)):
        return None
    col = (dst.c - src.c) / src.a
    row = (dst.f - src.f) / src.e
    if abs(col - round(col)) > 1e-6 or abs(row - round(row)) > 1e-6:
        return None
    return int(round(row)), int(round(col))


def _source_window(source: RasterClasses, transform: Any, rows: int, cols: int, src_crs: Any,
                   dst_crs: Any) -> tuple[int, int, int, int]:
    """(row0, col0, row1, col1) of the raster pixels under a DEM window, 2 more each side."""
    from rasterio.transform import array_bounds

    west, south, east, north = array_bounds(rows, cols, transform)
    if src_crs is not None and dst_crs is not None and src_crs != dst_crs:
        from rasterio.warp import transform_bounds

        west, south, east, north = transform_bounds(dst_crs, src_crs, west, south, east, north,
                                                    densify_pts=21)
    inverse = ~source.transform
    xs = np.array([west, east, west, east])
    ys = np.array([south, south, north, north])
    c, r = inverse @ (xs, ys)
    return (int(np.floor(np.min(r))) - 2, int(np.floor(np.min(c))) - 2,
            int(np.ceil(np.max(r))) + 2, int(np.ceil(np.max(c))) + 2)


def raster_model(
    raster: np.ndarray,
    transform: Any,
    crs: Any,
    nodata: float | None,
    table: tuple[list[str], list[Any], list[str | None]],
    *,
    default_class: str | None = None,
    mesh_bounds: tuple[float, float, float, float] | None = None,
) -> RoughnessModel:
    """Build a model from an integer class raster (an array) and the n table.

    Raster values are matched to the table's ``class`` column as text (``3`` matches
    ``"3"``).  Pixels equal to ``nodata`` (or NaN) are unknown (the default class).
    """
    values = np.asarray(raster)
    valid = np.isfinite(values) if values.dtype.kind == "f" else np.ones(values.shape, bool)
    if nodata is not None and np.isfinite(nodata):
        valid &= values != nodata
    known = values[valid]

    def index_array(codes: np.ndarray, code_class: np.ndarray) -> np.ndarray:
        index = np.full(values.shape, -1, dtype=np.int32)
        index[valid] = _code_index(known.astype(float), codes, code_class)
        return index

    return _raster_classes_model(_integer_codes(known), transform, values.shape, crs, table,
                                 default_class=default_class, mesh_bounds=mesh_bounds,
                                 raster=index_array)


def raster_file_model(
    path: str | Path,
    table: tuple[list[str], list[Any], list[str | None]],
    *,
    default_class: str | None = None,
    mesh_bounds: tuple[float, float, float, float] | None = None,
) -> RoughnessModel:
    """Build a model from an integer class raster file and the n table, as
    :func:`raster_model` does from an array, without holding the raster: its codes are
    gathered strip by strip and tiles read their own windows (:class:`RasterClasses`)."""
    import rasterio

    path = str(path)
    with rasterio.open(path) as src:
        transform, crs, width, height = src.transform, src.crs, src.width, src.height
    codes = raster_file_codes(path)
    return _raster_classes_model(
        codes, transform, (height, width), crs, table, default_class=default_class,
        mesh_bounds=mesh_bounds,
        raster=lambda codes, code_class: RasterClasses(path, transform, crs, width, height,
                                                       codes, code_class))


def raster_file_codes(path: str | Path) -> np.ndarray:
    """Sorted distinct class codes (float64) of a class raster file, read in strips of
    about 4 million pixels; RoughnessError if any is not an integer.

    Read once per version of the file: a job checks the codes against the n table before
    its long work and builds its class map from them later.
    """
    from .inputs import file_stamp

    path = str(path)
    stamp = file_stamp(path)
    if stamp is None:  # not a local file (a URL): its identity is not known, read it again
        return _raster_codes.__wrapped__(path, None)
    return _raster_codes(path, stamp).copy()


@functools.lru_cache(maxsize=4)
def _raster_codes(path: str, stamp: tuple[int, ...] | None) -> np.ndarray:
    """:func:`raster_file_codes` of ``path`` as it is at ``stamp`` (its file identity:
    a file replaced or rewritten is read again)."""
    import rasterio

    from .inputs import _read_band1

    with rasterio.open(path) as src:
        width, height = src.width, src.height
    codes = np.empty(0)
    rows_per_strip = max(1, (1 << 22) // max(width, 1))  # strips of about 4 million pixels
    for row in range(0, height, rows_per_strip):
        values = _read_band1(path, row, 0, min(rows_per_strip, height - row), width,
                             (height, width))
        codes = np.union1d(codes, _integer_codes(values[np.isfinite(values)]))
    return codes


def _integer_codes(values: np.ndarray) -> np.ndarray:
    """Sorted distinct values (float64); RoughnessError if any is not an integer."""
    values = np.asarray(values)
    if values.dtype.kind == "f" and np.any(values != np.round(values)):
        raise RoughnessError("the class raster holds non-integer values; give integer class codes")
    return np.unique(values).astype(np.float64)


def _raster_classes_model(codes: np.ndarray, transform: Any, shape: tuple[int, int], crs: Any,
                          table: tuple[list[str], list[Any], list[str | None]], *,
                          default_class: str | None, mesh_bounds: tuple | None,
                          raster: Callable[[np.ndarray, np.ndarray], Any]) -> RoughnessModel:
    """The model of a class raster with these codes (sorted, float64); its ``raster`` is
    ``raster(codes, code_class)`` (an index array, or a :class:`RasterClasses`)."""
    if mesh_bounds is not None:
        from rasterio.transform import array_bounds

        west, south, east, north = array_bounds(shape[0], shape[1], transform)
        mx0, my0, mx1, my1 = mesh_bounds
        if east <= mx0 or west >= mx1 or north <= my0 or south >= my1 or codes.size == 0:
            raise RoughnessError(
                "the class raster does not overlap the mesh at all; check its extent and CRS"
            )
    names = [str(int(c)) for c in codes]
    classes, n, surf, default_index, lookup = _table_lookup(
        names, table, what="the class raster",
        default_class=None if default_class is None else str(default_class), numeric=True)
    code_class = np.array([lookup[name] for name in names], dtype=np.int32)
    model = RoughnessModel(
        classes=tuple(classes), n=n, surface=tuple(surf), default=default_index,
        raster=raster(np.asarray(codes, dtype=np.float64), code_class),
        raster_transform=transform, raster_crs=crs, source="raster",
    )
    check_ranges(model)
    return model


# ---------------------------------------------------------------------------------------
# I/O edge


def _check_forms(*, n: Any, classes: Any, class_field: Any, n_table: Any, n_field: Any,
                 class_raster: Any) -> None:
    """RoughnessError unless exactly one roughness input is given, with what it needs."""
    given = [name for name, v in (("n", n), ("classes", classes), ("class_raster", class_raster))
             if v is not None]
    if len(given) != 1:
        raise RoughnessError(
            "give exactly one roughness input: an n value, class polygons, or a class raster"
            + (f" (got {', '.join(given)})" if given else "")
        )
    if classes is not None:
        if (class_field is None) == (n_field is None):
            raise RoughnessError("class polygons need either a class field with an n table, or an n field")
        if class_field is not None and n_table is None:
            raise RoughnessError("a class field needs an n table (CSV with columns class,n)")
    if class_raster is not None and n_table is None:
        raise RoughnessError("a class raster needs an n table (CSV with columns class,n)")


def _read_class_layer(classes: str | Path, column: str, crs: Any = None, *,
                      layer: str | int | None = None) -> Any:
    """The class polygon layer ``layer`` (geometry and ``column``) as a GeoDataFrame, in
    ``crs`` when given (:func:`ntrans.inputs.read_class_polygons`)."""
    from .inputs import read_class_polygons

    frame = read_class_polygons(classes, layer=layer, crs=crs)
    if column not in frame.columns:
        raise RoughnessError(
            f"class polygon layer has no field {column!r}; its fields are "
            f"{[c for c in frame.columns if c != frame.geometry.name]}"
        )
    return frame


def _open_class_raster(class_raster: str | Path) -> tuple[Path, Any]:
    """(path, CRS) of a class raster that exists and can be opened."""
    import rasterio

    path = Path(class_raster)
    if not path.exists():
        from .inputs import missing_path_hint

        raise InputFileError(f"class raster {str(path)!r} does not exist"
                             f"{missing_path_hint(path)}; give an existing file")
    try:
        with rasterio.open(path) as src:
            return path, src.crs
    except rasterio.errors.RasterioIOError as exc:
        raise RoughnessError(f"class raster {str(path)!r} cannot be read ({exc})") from exc


def check_roughness_inputs(
    *,
    n: float | str | None = None,
    classes: str | Path | None = None,
    class_field: str | None = None,
    n_table: str | Path | None = None,
    n_field: str | None = None,
    class_raster: str | Path | None = None,
    default_class: str | None = None,
    classes_layer: str | int | None = None,
) -> None:
    """Check the roughness inputs as :func:`load_roughness` does, without the mesh: one
    input form, every class of the polygons (or codes of the raster) and the default
    class in the n table, every n a positive number within :data:`N_MIN`..:data:`N_MAX`,
    known surface kinds.

    Jobs call it before their long work, so a bad n table fails in seconds; the checks
    that need the mesh (the layer meets it, uncovered ground, overlaps) stay with
    :func:`load_roughness`.  Emits no warning.  Raises :class:`RoughnessError` (or
    :class:`InputFileError` for a missing file, :class:`CRSError` for a class raster
    without a CRS) with the same sentence as :func:`load_roughness`.
    """
    import shapely

    _check_forms(n=n, classes=classes, class_field=class_field, n_table=n_table,
                 n_field=n_field, class_raster=class_raster)
    if n is not None:
        _check_n_values(["n"], [n], f"the uniform n ({N_OPTION})")
        return
    if classes is not None:
        column = class_field if class_field is not None else n_field
        frame = _read_class_layer(classes, column, layer=classes_layer)  # type: ignore[arg-type]
        geoms = np.asarray(frame.geometry.values, dtype=object)
        keep = ~(shapely.is_missing(geoms) | shapely.is_empty(geoms))
        values = frame[column].to_numpy(dtype=object)[keep]
        if class_field is not None:
            table = read_n_table(n_table)  # type: ignore[arg-type]
            _table_lookup(sorted(set(_class_labels(values))), table, what="the class polygons",
                          default_class=None if default_class is None else str(default_class),
                          numeric=_is_numeric_labels(values))
            return
        names = [f"polygon {i}" for i in range(values.size)]
        _check_n_values(names, list(values), "the n field of the class polygons", labels=names)
        if default_class is not None:
            _check_n_values(["default"], [default_class], "the default n")
        return
    path, rcrs = _open_class_raster(class_raster)  # type: ignore[arg-type]
    if rcrs is None:  # a job's DEM always has one, so load_roughness would refuse it
        raise CRSError(f"class raster {str(path)!r} has no CRS; assign the CRS it was made in")
    table = read_n_table(n_table)  # type: ignore[arg-type]
    names = [str(int(c)) for c in raster_file_codes(path)]
    _table_lookup(names, table, what="the class raster",
                  default_class=None if default_class is None else str(default_class),
                  numeric=True)


def load_roughness(
    *,
    n: float | str | None = None,
    classes: str | Path | None = None,
    classes_layer: str | int | None = None,
    class_field: str | None = None,
    n_table: str | Path | None = None,
    n_field: str | None = None,
    class_raster: str | Path | None = None,
    default_class: str | None = None,
    overlap_rule: OverlapRule = "error",
    crs: Any = None,
    mesh_area: Any = None,
) -> RoughnessModel:
    """Read the roughness inputs and build a :class:`RoughnessModel`.

    Exactly one of ``n``, ``classes`` (with ``class_field`` + ``n_table`` or with
    ``n_field``) or ``class_raster`` (with ``n_table``) must be given.  ``classes_layer``
    names the layer of ``classes`` to read (needed when the file holds several).  Layers
    in another CRS than ``crs`` (the DEM's) are reprojected, with a log line; with
    ``crs``, class polygons or a class raster without a CRS raise
    :class:`~ntrans.errors.CRSError`, as cells do.  ``mesh_area`` is the
    union of the mesh cells, used for the coverage checks.
    """
    _check_forms(n=n, classes=classes, class_field=class_field, n_table=n_table,
                 n_field=n_field, class_raster=class_raster)
    if n is not None:
        return uniform_model(n)
    if classes is not None:
        column = class_field if class_field is not None else n_field
        frame = _read_class_layer(classes, column, crs, layer=classes_layer)  # type: ignore[arg-type]
        geoms = np.asarray(frame.geometry.values, dtype=object)
        if class_field is not None:
            table = read_n_table(n_table)  # type: ignore[arg-type]
            return polygon_model(geoms, frame[class_field].to_numpy(dtype=object), table=table,
                                 default_class=default_class, overlap_rule=overlap_rule,
                                 mesh_area=mesh_area)
        return polygon_model(geoms, np.zeros(len(geoms)), n_values=frame[n_field].to_numpy(dtype=object),
                             default_class=default_class, overlap_rule=overlap_rule,
                             mesh_area=mesh_area)
    # class raster
    path, rcrs = _open_class_raster(class_raster)  # type: ignore[arg-type]
    if crs is not None and rcrs is None:  # never assumed to be the DEM's, as for polygons
        raise CRSError(f"class raster {str(path)!r} has no CRS; assign the CRS it was made in")
    if crs is not None and rcrs is not None and rcrs != crs:
        log.info("class raster %s will be resampled (nearest) from %s to the DEM's CRS", path.name, rcrs)
    mesh_bounds = None
    if mesh_area is not None:
        mesh_bounds = tuple(mesh_area.bounds)
        if rcrs is not None and crs is not None and rcrs != crs:
            from rasterio.warp import transform_bounds

            mesh_bounds = transform_bounds(crs, rcrs, *mesh_bounds)
    return raster_file_model(path, read_n_table(n_table), default_class=default_class,
                             mesh_bounds=mesh_bounds)


#: the early check of a class raster's holes refuses a job only above this many times
#: :data:`AREA_TOLERANCE` (its estimate counts whole pixels by their centres): nearer the
#: tolerance the job's own exact count decides, after its statistics pass
HOLE_ESTIMATE_MARGIN = 10.0
#: hole pixels the early check places on the mesh at most (a fixed random sample beyond)
HOLE_SAMPLE = 2_000_000


@dataclass(frozen=True)
class RasterHoles:
    """Nodata pixels of a class raster (:func:`class_raster_holes`): ``rows``, ``cols``
    of all of them or of a fixed random sample of ``count``."""

    count: int
    rows: np.ndarray
    cols: np.ndarray
    transform: Any
    crs: Any


def class_raster_holes(class_raster: str | Path) -> RasterHoles | None:
    """The nodata pixels of a class raster, read strip by strip; None when it has none.
    Beyond :data:`HOLE_SAMPLE` of them a fixed random sample is kept."""
    import rasterio

    from .inputs import _read_band1

    path = str(class_raster)
    with rasterio.open(path) as src:
        transform, crs, width, height = src.transform, src.crs, src.width, src.height
    rows_per_strip = max(1, (1 << 22) // max(width, 1))  # strips of about 4 million pixels
    hole_rows, hole_cols = [], []
    for row in range(0, height, rows_per_strip):
        values = _read_band1(path, row, 0, min(rows_per_strip, height - row), width,
                             (height, width))
        r, c = np.nonzero(np.isnan(values))
        hole_rows.append(r + row)
        hole_cols.append(c)
    rows, cols = np.concatenate(hole_rows), np.concatenate(hole_cols)
    if rows.size == 0:
        return None
    count = int(rows.size)
    if count > HOLE_SAMPLE:
        pick = np.random.default_rng(0).choice(count, HOLE_SAMPLE, replace=False)
        rows, cols = rows[pick], cols[pick]
    return RasterHoles(count, rows, cols, transform, crs)


def class_raster_hole_share(holes: RasterHoles, geoms: np.ndarray, dem: Any) -> float:
    """Estimated share of the mesh ground (valid DEM pixels under the cells) that has no
    class in the class raster, from its nodata pixels (:func:`class_raster_holes`).

    Each nodata pixel whose centre lies in a cell (``geoms``, polygons in the DEM's CRS)
    over a valid DEM pixel counts its whole area, over the cells' total area.  The pixels
    of a raster in another CRS than the DEM's are not compared by area: 0.0 (the job's
    exact count still applies).  Ground outside the raster is not counted here.
    """
    import pyproj
    import shapely

    if (holes.crs is None or geoms.size == 0
            or pyproj.CRS.from_user_input(holes.crs) != dem.horizontal_crs):
        return 0.0
    x, y = holes.transform @ (holes.cols + 0.5, holes.rows + 0.5)
    # a valid DEM pixel under the hole's centre? read strip by strip where holes are
    col_f, row_f = ~dem.transform @ (x, y)
    dem_col, dem_row = np.floor(col_f).astype(np.int64), np.floor(row_f).astype(np.int64)
    inside = (dem_row >= 0) & (dem_row < dem.height) & (dem_col >= 0) & (dem_col < dem.width)
    dem_strip = max(1, (1 << 22) // max(dem.width, 1))
    strip_of = np.where(inside, dem_row // dem_strip, -1)
    valid = np.zeros(x.size, dtype=bool)
    for strip in np.unique(strip_of[inside]):
        at = np.flatnonzero(strip_of == strip)
        r0 = int(strip) * dem_strip
        block = dem.read_window(r0, 0, min(dem_strip, dem.height - r0), dem.width)
        valid[at] = np.isfinite(block[dem_row[at] - r0, dem_col[at]])
    points = shapely.points(x[valid], y[valid])
    if points.size == 0:
        return 0.0
    in_mesh = np.unique(shapely.STRtree(geoms).query(points, predicate="within")[0]).size
    t = holes.transform
    hole_area = in_mesh * (holes.count / holes.rows.size) * abs(t.a * t.e - t.b * t.d)
    mesh_area = float(shapely.area(geoms).sum())
    return hole_area / mesh_area if mesh_area > 0 else 0.0


def class_raster_holes_error(share: float, *, about: bool = False) -> RoughnessError:
    """The error for ``share`` of the mesh ground without a class in the class raster and
    no default class (``about``: the share is an estimate)."""
    return RoughnessError(
        f"{'about ' if about else ''}{100 * share:.3g}% of the mesh ground has no class in "
        f"the class raster; give a default class ({DEFAULT_CLASS_OPTION}) or fill the raster")


def check_class_raster_holes(class_raster: str | Path | None, geoms: Any, dem: Any, *,
                             default_class: str | None = None) -> None:
    """Refuse a class raster with nodata holes under the mesh and no default class before
    a job's long work, where :func:`class_raster_hole_share` leaves no doubt (above
    :data:`HOLE_ESTIMATE_MARGIN` x :data:`AREA_TOLERANCE`); the job's exact count still
    decides nearer the tolerance.

    ``geoms`` and ``dem`` (cell polygons in the DEM's CRS, :class:`ntrans.inputs.DemInfo`)
    may be callables that return them: they are then only called when the raster has
    nodata pixels, so a raster without holes costs one read of itself.
    """
    if class_raster is None or default_class is not None:
        return
    holes = class_raster_holes(class_raster)
    if holes is None:
        return
    dem = dem() if callable(dem) else dem
    geoms = geoms() if callable(geoms) else geoms
    share = class_raster_hole_share(holes, np.asarray(geoms, dtype=object), dem)
    if share > HOLE_ESTIMATE_MARGIN * AREA_TOLERANCE:
        raise class_raster_holes_error(share, about=True)
