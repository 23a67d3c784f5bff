"""Cell stage tables: subgrid terrain and flat bed.

Pure functions on numpy arrays; no loop per cell in Python (the per-entry sums are
compiled kernels in :mod:`ntrans._kernels`, one pass over the entries and no sort).
The inputs are per-entry arrays of one tile: ``item`` (local cell index), ``z`` (pixel
elevation, NaN for nodata), ``plan_area`` (covered fraction x pixel area, horizontal
units squared) and ``bed_area`` (plan area x surface factor).  Stage matrices are ``(n_items, n_stages)`` float64, NaN allowed.

Definitions (shared design notes, section 2), at stage eta:

- wet area ``A_w = sum a [z < eta]``; volume ``V = sum a (eta - z)+``;
  wetted bed ``A_b = sum a s [z < eta]``; ``R = V / A_b``; mean depth ``V / A_w``.
- flat bed at ``z_c``: ``h = (eta - z_c)+``, ``A_w`` = covered area when ``h > 0``,
  ``V`` = covered area x h, ``R = h``.

A pixel exactly at the stage (``z == eta``) counts as dry.
"""

from __future__ import annotations

from typing import Literal, get_args

import numpy as np

from ._kernels import item_stage_sums, stage_sums
from .coverage import _group_cumsum, _sorted_order
from .errors import InputError

__all__ = [
    "ElevationRule",
    "cell_stage_table",
    "cell_tables",
    "cell_terrain_summary",
    "flat_cell_table",
    "flat_elevation",
    "sorted_levels",
    "tables_from_sums",
]

ElevationRule = Literal["mean", "min", "median", "centroid", "field"]
ELEVATION_RULES: tuple[str, ...] = get_args(ElevationRule)


def _entries(item, z, *others, n_items: int):
    """Validate per-entry arrays and drop entries with non-finite z."""
    item = np.asarray(item)
    z = np.asarray(z, dtype=np.float64)
    arrays = [np.asarray(o, dtype=np.float64) for o in others]
    if item.ndim != 1 or any(a.shape != item.shape for a in (z, *arrays)):
        raise InputError(
            "item, z and the area arrays must be 1-D and of equal length; "
            f"got shapes {[np.shape(a) for a in (item, z, *arrays)]}"
        )
    if item.size and not np.issubdtype(item.dtype, np.integer):
        raise InputError(f"item holds {item.dtype} values; give integer cell indices")
    item = item.astype(np.int64, copy=False)
    if item.size and (item.min() < 0 or item.max() >= n_items):
        raise InputError(
            f"item indices span {item.min()}..{item.max()} but there are {n_items} items; "
            "give indices 0..n_items-1"
        )
    ok = np.isfinite(z)
    if not ok.all():
        item, z, arrays = item[ok], z[ok], [a[ok] for a in arrays]
    for a in arrays:
        if not np.isfinite(a).all():
            raise InputError(
                "an area array holds NaN or infinite values at pixels with valid elevation; "
                "give finite areas (set z to NaN to leave a pixel out)"
            )
    return item, z, arrays


def _sort_by_item_z(
    item: np.ndarray, z: np.ndarray, n_items: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sort entries by (item, z) exactly; returns ``(order, item[order], z[order])``.

    Packs (item, z quantised within its item, position) into one uint64 and sorts the
    values (much faster than ``argsort``); quantisation keeps the order of z but may tie
    distinct values, so items where a tie left z out of order are re-sorted exactly with
    ``lexsort``.
    """
    n = item.size
    if n == 0:
        return np.zeros(0, dtype=np.int64), item, z
    idx_bits = max(int(n - 1).bit_length(), 1)
    item_bits = max(int(n_items - 1).bit_length(), 1)
    z_bits = min(64 - idx_bits - item_bits, 52)
    if z_bits < 8:
        order = np.lexsort((z, item))
        return order, item[order], z[order]
    if np.any(item[1:] < item[:-1]):
        order = _sorted_order(item, n_items)
        it, zs = item[order], z[order]
    else:
        order, it, zs = None, item, z
    starts = np.flatnonzero(np.r_[True, it[1:] != it[:-1]])
    zmin = np.minimum.reduceat(zs, starts)
    span = np.maximum.reduceat(zs, starts) - zmin
    levels = float((1 << z_bits) - 1)
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        scale = np.where(span > 0, levels / np.where(span > 0, span, 1.0), 0.0)
    # a span too small to scale (subnormal) gets one level; the exact repair below
    # orders its elevations
    scale[~np.isfinite(scale)] = 0.0
    if n_items <= n:  # look up per item (cheaper than repeating per group)
        zmin_i, scale_i = np.zeros(n_items), np.zeros(n_items)
        zmin_i[it[starts]], scale_i[it[starts]] = zmin, scale
        q = zs - zmin_i[it]
        q *= scale_i[it]
    else:
        sizes = np.diff(np.r_[starts, n])
        q = zs - np.repeat(zmin, sizes)
        q *= np.repeat(scale, sizes)
    np.floor(q, out=q)
    np.clip(q, 0.0, levels, out=q)
    packed = it.astype(np.uint64) << np.uint64(z_bits + idx_bits)
    packed |= q.astype(np.uint64) << np.uint64(idx_bits)
    packed |= np.arange(n, dtype=np.uint64)
    packed.sort()
    packed &= np.uint64((1 << idx_bits) - 1)
    sub = packed.view(np.int64)
    order = sub if order is None else order[sub]
    zs = z[order]  # items keep their positions: only z moves
    bad = (it[1:] == it[:-1]) & (zs[1:] < zs[:-1])
    if bad.any():
        # exact repair where quantisation tied distinct elevations in the wrong order
        pos = np.flatnonzero(np.isin(it, np.unique(it[1:][bad])))
        sel = order[pos]
        order[pos] = sel[np.lexsort((z[sel], item[sel]))]
        zs = z[order]
    return order, it, zs


def cell_stage_table(
    item: np.ndarray,
    z: np.ndarray,
    plan_area: np.ndarray,
    bed_area: np.ndarray,
    stages: np.ndarray,
) -> dict[str, np.ndarray]:
    """Subgrid stage table of every cell.

    Parameters
    ----------
    item : (n,) int, local cell index of each entry (0..n_items-1).
    z : (n,) float, pixel elevation (vertical units); NaN entries are left out.
    plan_area : (n,) float, covered plan area of the entry (horizontal units squared).
    bed_area : (n,) float, 3-D bed area of the entry (plan area x surface factor).
    stages : (n_items, n_stages) float, water-surface elevations; NaN allowed.

    Returns
    -------
    dict of (n_items, n_stages) float64 arrays: ``wet_area``, ``bed_area`` (area units),
    ``volume`` (area x vertical units), ``hydraulic_radius`` = volume / bed_area (NaN
    where no bed is wet), ``mean_depth`` = volume / wet_area (NaN where dry).  Cells
    without any valid entry and NaN stages give NaN in every table.

    Examples
    --------
    >>> t = cell_stage_table([0, 0], [1.0, 2.0], [1.0, 1.0], [1.0, 1.0], [[1.5, 3.0]])
    >>> t["volume"].tolist()
    [[0.5, 3.0]]
    """
    stages = np.asarray(stages, dtype=np.float64)
    if stages.ndim != 2:
        raise InputError(
            f"stages has shape {stages.shape}; give a (n_items, n_stages) matrix, one row per cell"
        )
    n_items, n_stages = stages.shape
    item, z, (a, b) = _entries(item, z, plan_area, bed_area, n_items=n_items)
    gi, (gz,) = _grouped(item, z)  # each item's low point (its sums are not needed here)
    low = item_stage_sums(gi, gz, gz, gz, np.empty(0), False, n_items)[0]
    # each item's stages in increasing order, NaN last; results go back by `order`
    order = np.argsort(stages, axis=1, kind="stable")
    stages_sorted = np.ascontiguousarray(np.take_along_axis(stages, order, axis=1))
    n_finite = np.count_nonzero(~np.isnan(stages), axis=1).astype(np.int64)
    sums = stage_sums(item, z, a, b, low, stages_sorted, n_finite)
    wet, wet_bed, moment = (np.empty((n_items, n_stages)) for _ in range(3))
    for target, value in zip((wet, wet_bed, moment), sums, strict=True):
        np.put_along_axis(target, order, value, axis=1)
    return _stage_table(stages, low, wet, wet_bed, moment)


def _stage_table(stages: np.ndarray, low: np.ndarray, wet: np.ndarray, wet_bed: np.ndarray,
                 moment: np.ndarray) -> dict[str, np.ndarray]:
    """The stage table from the wet sums: volume = (stage - low) x wet area - moment."""
    unknown = np.isnan(stages) | np.isnan(low)[:, None]  # no stage, or no terrain
    with np.errstate(invalid="ignore"):
        volume = np.maximum((stages - low[:, None]) * wet - moment, 0.0)
    out = {"wet_area": wet, "volume": volume, "bed_area": wet_bed}
    for value in out.values():
        value[unknown] = np.nan

    with np.errstate(invalid="ignore", divide="ignore"):
        out["hydraulic_radius"] = np.where(
            out["bed_area"] > 0, out["volume"] / out["bed_area"], np.nan
        )
        out["mean_depth"] = np.where(out["wet_area"] > 0, out["volume"] / out["wet_area"], np.nan)
    return out


def _grouped(item: np.ndarray, *arrays: np.ndarray) -> tuple[np.ndarray, list[np.ndarray]]:
    """The entries with each item's contiguous (a stable sort, only when out of order)."""
    if item.size > 1 and bool(np.any(item[1:] < item[:-1])):
        order = np.argsort(item, kind="stable")
        return item[order], [a[order] for a in arrays]
    return item, list(arrays)


def cell_tables(
    item: np.ndarray,
    z: np.ndarray,
    plan_area: np.ndarray,
    bed_area: np.ndarray,
    n_items: int,
    levels: np.ndarray,
    *,
    relative: bool = False,
    median: bool = False,
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Terrain summary and stage table of every cell, for stages all cells share.

    One pass over each cell's entries instead of one per table (the tiles use this).

    Parameters
    ----------
    item, z, plan_area, bed_area : per entry, as for :func:`cell_stage_table`.
    n_items : number of cells.
    levels : (n_levels,) finite stages, the same for every cell; with ``relative`` depths
        above each cell's lowest terrain (stage = z_min + level).
    median : also the area-weighted median elevation (one sort of the entries).

    Returns
    -------
    ``(summary, table)``: what :func:`cell_terrain_summary` and :func:`cell_stage_table`
    give for the same entries and the stages ``levels`` (or ``z_min + levels``), in the
    order of ``levels``.
    """
    n_items = int(n_items)
    lv, order = sorted_levels(levels)
    item, z, (a, b) = _entries(item, z, plan_area, bed_area, n_items=n_items)
    as_given = (item, z, a)
    item, (z, a, b) = _grouped(item, z, a, b)
    sums = item_stage_sums(item, z, a, b, lv[order], bool(relative), n_items)
    return tables_from_sums(sums, lv, order, relative=relative,
                            median_entries=as_given if median else None)


def sorted_levels(levels) -> tuple[np.ndarray, np.ndarray]:
    """``(levels, order)``: the levels as a flat float64 array and the stable order that
    sorts them (the stage-sum kernels take ``levels[order]``)."""
    lv = np.asarray(levels, dtype=np.float64).ravel()
    if not np.isfinite(lv).all():
        raise InputError("levels hold NaN or infinite values; give finite stages or depths")
    return lv, np.argsort(lv, kind="stable")


def tables_from_sums(
    sums: tuple, levels: np.ndarray, order: np.ndarray, *, relative: bool = False,
    median_entries: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None,
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """What :func:`cell_tables` returns, from the per-item sums at ``levels[order]``.

    ``sums``: ``(low, high, covered, moment, wet, wet_bed, wet_moment)`` as
    :func:`ntrans._kernels.item_stage_sums` (or
    :func:`ntrans.coverage.exact_coverage_stage_sums`) returns them; ``median_entries``:
    ``(item, z, plan_area)`` of the valid entries for the median elevation (None: NaN).
    """
    low, high, covered, moment, *bins = sums
    n_items = low.size
    if median_entries is None:
        summary = _summary(low, high, covered, moment, None, None, None, n_items, False)
    else:
        summary = _summary(low, high, covered, moment, *median_entries, n_items, True)
    wet, wet_bed, wet_moment = (np.empty((n_items, levels.size)) for _ in range(3))
    for target, value in zip((wet, wet_bed, wet_moment), bins, strict=True):
        target[:, order] = value
    stages = (low[:, None] + levels[None, :] if relative
              else np.broadcast_to(levels, (n_items, levels.size)))
    return summary, _stage_table(stages, low, wet, wet_bed, wet_moment)


def cell_terrain_summary(
    item: np.ndarray, z: np.ndarray, plan_area: np.ndarray, n_items: int, *, median: bool = True
) -> dict[str, np.ndarray]:
    """Terrain statistics of every cell, weighted by covered plan area.

    Returns
    -------
    dict of (n_items,) float64 arrays: ``covered_area`` (area over valid terrain; 0 for a
    cell without terrain), ``z_min``, ``z_max``, ``z_mean`` (area-weighted), ``z_median``
    (first elevation where the cumulative area reaches half the covered area; NaN for all
    when ``median`` is False, which skips the one sort this needs).  The elevation
    statistics are NaN for a cell without terrain.

    Examples
    --------
    >>> s = cell_terrain_summary([0, 0, 0], [3.0, 1.0, 2.0], [1.0, 1.0, 2.0], 1)
    >>> s["z_mean"].tolist(), s["z_median"].tolist()
    ([2.0], [2.0])
    """
    n_items = int(n_items)
    item, z, (a,) = _entries(item, z, plan_area, n_items=n_items)
    gi, (gz, ga) = _grouped(item, z, a)
    low, high, covered, moment, *_ = item_stage_sums(gi, gz, ga, ga, np.empty(0), False,
                                                     n_items)
    return _summary(low, high, covered, moment, item, z, a, n_items, median)


def _summary(low, high, covered, moment, item, z, a, n_items: int,
             median: bool) -> dict[str, np.ndarray]:
    """The terrain summary from the per-item sums (and the entries, for the median)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        z_mean = np.where(covered > 0, low + moment / np.where(covered > 0, covered, 1.0), np.nan)
    out = {"covered_area": covered, "z_min": low, "z_max": high, "z_mean": z_mean}
    out["z_median"] = _weighted_median(item, z, a, n_items) if median else np.full(n_items, np.nan)
    return out


def _weighted_median(item: np.ndarray, z: np.ndarray, a: np.ndarray, n_items: int) -> np.ndarray:
    """First elevation of each item where the cumulative area reaches half its total."""
    out = np.full(n_items, np.nan)
    if item.size == 0:
        return out
    order, item, z = _sort_by_item_z(item, z, n_items)
    a = a[order]
    count = np.bincount(item, minlength=n_items)
    start = np.zeros(n_items, dtype=np.int64)
    np.cumsum(count[:-1], out=start[1:])
    has = count > 0
    gstart, gsize = start[has], count[has]
    cum = _group_cumsum(a, gstart, gsize)
    total = cum[gstart + gsize - 1]
    below = cum < 0.5 * np.repeat(total, gsize)
    n_below = np.bincount(item[below], minlength=n_items)[has]
    out[has] = z[gstart + np.minimum(n_below, gsize - 1)]
    return out


def flat_elevation(
    rule: ElevationRule,
    summary: dict[str, np.ndarray],
    *,
    centroid_z: np.ndarray | None = None,
    field: np.ndarray | None = None,
) -> np.ndarray:
    """Flat-bed elevation of every cell by an elevation rule.

    Parameters
    ----------
    rule : ``mean`` | ``min`` | ``median`` (terrain statistics from
        :func:`cell_terrain_summary`), ``centroid`` (``centroid_z``: terrain at each cell's
        centroid) or ``field`` (``field``: a value per cell supplied by the user).
    summary : output of :func:`cell_terrain_summary`.

    Returns
    -------
    (n_items,) float64 array, vertical units; NaN where the rule has no value.
    """
    n_items = int(np.asarray(summary["covered_area"]).shape[0])
    if rule == "mean":
        values = summary["z_mean"]
    elif rule == "min":
        values = summary["z_min"]
    elif rule == "median":
        values = summary["z_median"]
    elif rule in ("centroid", "field"):
        values = centroid_z if rule == "centroid" else field
        name = "centroid_z" if rule == "centroid" else "field"
        if values is None:
            raise InputError(f"elevation rule {rule!r} needs {name}; pass one value per cell")
        values = np.asarray(values, dtype=np.float64)
        if values.shape != (n_items,):
            raise InputError(
                f"{name} has shape {values.shape} but there are {n_items} cells; "
                "pass one value per cell"
            )
    else:
        raise InputError(
            f"elevation rule {rule!r} is unknown; use one of {', '.join(ELEVATION_RULES)}"
        )
    return np.array(values, dtype=np.float64, copy=True)


def flat_cell_table(
    flat_elevation: np.ndarray, covered_area: np.ndarray, stages: np.ndarray
) -> dict[str, np.ndarray]:
    """Flat-bed stage table of every cell.

    Parameters
    ----------
    flat_elevation : (n_items,) bed elevation z_c (vertical units), NaN allowed.
    covered_area : (n_items,) plan area of the cell (horizontal units squared).
    stages : (n_items, n_stages) water-surface elevations.

    Returns
    -------
    dict of (n_items, n_stages) float64 arrays: ``flat_depth`` = (eta - z_c)+,
    ``flat_wet_area`` (covered area where the depth is positive, else 0),
    ``flat_volume`` = covered area x depth, ``flat_hydraulic_radius`` = depth.  NaN where
    the stage or z_c is NaN.

    Examples
    --------
    >>> t = flat_cell_table([1.0], [4.0], [[0.5, 2.0]])
    >>> t["flat_volume"].tolist()
    [[0.0, 4.0]]
    """
    zc = np.asarray(flat_elevation, dtype=np.float64)
    area = np.asarray(covered_area, dtype=np.float64)
    stages = np.asarray(stages, dtype=np.float64)
    if stages.ndim != 2 or zc.shape != (stages.shape[0],) or area.shape != zc.shape:
        raise InputError(
            f"flat_elevation {zc.shape}, covered_area {area.shape} and stages {stages.shape} "
            "do not match; give (n_items,), (n_items,) and (n_items, n_stages)"
        )
    depth = np.maximum(stages - zc[:, None], 0.0)  # NaN propagates
    wet = np.where(depth > 0, area[:, None], 0.0)
    wet[np.isnan(depth)] = np.nan
    return {
        "flat_depth": depth,
        "flat_wet_area": wet,
        "flat_volume": area[:, None] * depth,
        "flat_hydraulic_radius": depth.copy(),
    }
