"""Compiled kernels (numba) for the hot loops that numpy cannot express without sorting.

Arrays in, arrays out, no Python objects; each kernel releases the GIL, so threads of a
Dask worker run them in parallel.  Compiled code is cached on disk next to this module
(``cache=True``), so only the first run after an install pays the compile time (a few
seconds).

The public functions that call these kernels (and validate their inputs) live in
:mod:`ntrans.coverage` and :mod:`ntrans.cells`; the definitions are documented there.
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

_JIT = {"cache": True, "nogil": True}


@njit(**_JIT)
def _deposit(diff, width, rmin, cmin, rows, cols, ua, va, ub, vb, sign):
    """Add the row deposits of one piece lying inside one pixel row band."""
    dv = (vb - va) * sign
    if dv == 0.0:
        return
    um = 0.5 * (ua + ub)
    r = math.floor(0.5 * (va + vb))
    c = math.floor(um)
    if r < 0 or r >= rows or c >= cols:
        return
    if c < 0:
        local = dv
        c = 0
    else:
        local = dv * (c + 1 - um)
    at = (r - rmin) * width + (c - cmin)
    diff[at] += local
    diff[at + 1] += dv - local


@njit(**_JIT)
def _deposit_split_rows(diff, width, rmin, cmin, rows, cols, ua, va, ub, vb, sign):
    """Split a piece (inside one pixel column) at the integer rows it crosses."""
    lo, hi = min(va, vb), max(va, vb)
    n_cross = max(math.ceil(hi) - math.floor(lo) - 1, 0)
    if n_cross == 0:
        _deposit(diff, width, rmin, cmin, rows, cols, ua, va, ub, vb, sign)
        return
    if vb > va:
        base, step = math.floor(va) + 1.0, 1.0
    else:
        base, step = math.ceil(va) - 1.0, -1.0
    slope = (ub - ua) / (vb - va)
    pu, pv = ua, va
    for j in range(n_cross):
        k = base + step * j
        ku = ua + (k - va) * slope
        _deposit(diff, width, rmin, cmin, rows, cols, pu, pv, ku, k, sign)
        pu, pv = ku, k
    _deposit(diff, width, rmin, cmin, rows, cols, pu, pv, ub, vb, sign)


@njit(**_JIT)
def _deposit_edge(diff, width, rmin, cmin, rows, cols, u0, v0, u1, v1, sign):
    """Split an edge at the integer columns, then rows, it crosses; deposit the pieces."""
    lo, hi = min(u0, u1), max(u0, u1)
    n_cross = max(math.ceil(hi) - math.floor(lo) - 1, 0)
    if n_cross == 0:
        _deposit_split_rows(diff, width, rmin, cmin, rows, cols, u0, v0, u1, v1, sign)
        return
    if u1 > u0:
        base, step = math.floor(u0) + 1.0, 1.0
    else:
        base, step = math.ceil(u0) - 1.0, -1.0
    slope = (v1 - v0) / (u1 - u0)
    pu, pv = u0, v0
    for j in range(n_cross):
        k = base + step * j
        kv = v0 + (k - u0) * slope
        _deposit_split_rows(diff, width, rmin, cmin, rows, cols, pu, pv, k, kv, sign)
        pu, pv = k, kv
    _deposit_split_rows(diff, width, rmin, cmin, rows, cols, pu, pv, u1, v1, sign)


@njit(**_JIT)
def exact_coverage_runs(edge_start, u0, v0, u1, v1, sign, rows, cols, threshold):
    """Covered fraction of every pixel of every item, one bounding box at a time.

    ``edge_start`` (n_items + 1) delimits each item's edges (pixel units, oriented by
    ``sign``).  Returns ``(item, row, col, fraction)`` sorted by (item, row, col):
    fractions above ``threshold`` only, clipped to 1.
    """
    n_items = edge_start.size - 1
    rmin = np.zeros(n_items, np.int64)
    rmax = np.zeros(n_items, np.int64)
    cmin = np.zeros(n_items, np.int64)
    cmax = np.zeros(n_items, np.int64)
    capacity = 0
    largest = 0
    for i in range(n_items):
        e0, e1 = edge_start[i], edge_start[i + 1]
        if e0 == e1:
            continue
        vlo, vhi, ulo, uhi = np.inf, -np.inf, np.inf, -np.inf
        for e in range(e0, e1):
            vlo = min(vlo, v0[e], v1[e])
            vhi = max(vhi, v0[e], v1[e])
            ulo = min(ulo, u0[e], u1[e])
            uhi = max(uhi, u0[e], u1[e])
        rmin[i] = min(max(math.floor(vlo), 0), rows)
        rmax[i] = min(max(math.ceil(vhi), 0), rows)
        cmin[i] = min(max(math.floor(ulo), 0), cols)
        cmax[i] = min(max(math.ceil(uhi), 0), cols)
        area = (rmax[i] - rmin[i]) * (cmax[i] - cmin[i])
        capacity += area
        largest = max(largest, (rmax[i] - rmin[i]) * (cmax[i] - cmin[i] + 2))

    out_item = np.empty(capacity, np.int32)
    out_row = np.empty(capacity, np.int32)
    out_col = np.empty(capacity, np.int32)
    out_frac = np.empty(capacity, np.float64)
    diff = np.zeros(largest, np.float64)
    n = 0
    for i in range(n_items):
        h = rmax[i] - rmin[i]
        w = cmax[i] - cmin[i]
        if h <= 0 or w <= 0:
            continue
        width = w + 2
        for e in range(edge_start[i], edge_start[i + 1]):
            _deposit_edge(diff, width, rmin[i], cmin[i], rows, cols,
                          u0[e], v0[e], u1[e], v1[e], sign[e])
        for r in range(h):
            running = 0.0
            at = r * width
            for c in range(w):
                running += diff[at + c]
                if running > threshold:
                    out_item[n] = i
                    out_row[n] = rmin[i] + r
                    out_col[n] = cmin[i] + c
                    out_frac[n] = min(running, 1.0)
                    n += 1
            for c in range(width):
                diff[at + c] = 0.0
    return (out_item[:n].astype(np.int64), out_row[:n].astype(np.int64),
            out_col[:n].astype(np.int64), out_frac[:n].copy())


@njit(**_JIT)
def item_low_high(item, z, n_items):
    """Per item: lowest and highest ``z`` (NaN for an item without entries)."""
    low = np.full(n_items, np.nan)
    high = np.full(n_items, np.nan)
    for j in range(item.size):
        i = item[j]
        if not low[i] <= z[j]:  # also true while low[i] is NaN
            low[i] = z[j]
        if not high[i] >= z[j]:
            high[i] = z[j]
    return low, high


@njit(**_JIT)
def item_weighted_sums(item, z, weight, low, n_items):
    """Per item: sum of ``weight`` and of ``weight * (z - low[item])``."""
    total = np.zeros(n_items)
    moment = np.zeros(n_items)
    for j in range(item.size):
        i = item[j]
        total[i] += weight[j]
        moment[i] += weight[j] * (z[j] - low[i])
    return total, moment


@njit(**_JIT)
def stage_sums(item, z, plan, bed, low, stages_sorted, n_finite):
    """Per item and stage: wetted plan area, wetted bed area and sum of plan x (z - low).

    ``stages_sorted`` (n_items, n_stages) holds each item's stages in increasing order,
    its ``n_finite[i]`` finite ones first.  An entry is wet at stage eta when
    ``z < eta``.  Each entry is added once, to the bin of the first stage that wets it
    (binary search), and the bins are then summed cumulatively, so no sort of the
    entries is needed.  Returns three (n_items, n_stages) arrays in the sorted order.
    """
    n_items, n_stages = stages_sorted.shape
    wet = np.zeros((n_items, n_stages + 1))
    wet_bed = np.zeros((n_items, n_stages + 1))
    moment = np.zeros((n_items, n_stages + 1))
    for j in range(item.size):
        i = item[j]
        zj = z[j]
        lo, hi = 0, n_finite[i]
        while lo < hi:  # first stage with eta > z
            mid = (lo + hi) >> 1
            if stages_sorted[i, mid] > zj:
                hi = mid
            else:
                lo = mid + 1
        wet[i, lo] += plan[j]
        wet_bed[i, lo] += bed[j]
        moment[i, lo] += plan[j] * (zj - low[i])
    for i in range(n_items):
        for k in range(1, n_stages):
            wet[i, k] += wet[i, k - 1]
            wet_bed[i, k] += wet_bed[i, k - 1]
            moment[i, k] += moment[i, k - 1]
    return wet[:, :n_stages], wet_bed[:, :n_stages], moment[:, :n_stages]


def warm_up() -> None:
    """Load (or compile) every kernel once, on tiny inputs."""
    one = np.zeros(1, np.int64)
    z = np.zeros(1)
    exact_coverage_runs(np.array([0, 1], np.int64), z, z, z + 1.0, z + 1.0, z + 1.0, 1, 1, 1e-12)
    low, _ = item_low_high(one, z, 1)
    item_weighted_sums(one, z, z, low, 1)
    stage_sums(one, z, z, z, low, np.ones((1, 1)), one + 1)
    horn_surface_factor(np.zeros((3, 3)), 0.125, 0.125)
    strip_station_sums(z + 1.0, one, one + 1, z, z, z, np.zeros(1, np.bool_))


@njit(**_JIT)
def horn_surface_factor(zp, x_scale, y_scale):
    """``sqrt(1 + zx^2 + zy^2)`` by Horn's 3x3 stencil on a grid padded by one NaN pixel.

    ``x_scale`` = 1 / (8 dx), ``y_scale`` = 1 / (8 dy).  NaN wherever one of the eight
    neighbours is NaN (the caller fills those pixels from the neighbours that exist).
    """
    rows, cols = zp.shape[0] - 2, zp.shape[1] - 2
    out = np.empty((rows, cols))
    for r in range(rows):
        for c in range(cols):
            a, b, cc = zp[r, c], zp[r, c + 1], zp[r, c + 2]
            d, f = zp[r + 1, c], zp[r + 1, c + 2]
            g, h, i = zp[r + 2, c], zp[r + 2, c + 1], zp[r + 2, c + 2]
            zx = ((cc + 2.0 * f + i) - (a + 2.0 * d + g)) * x_scale
            zy = ((g + 2.0 * h + i) - (a + 2.0 * b + cc)) * y_scale
            out[r, c] = math.sqrt(zx * zx + zy * zy + 1.0)
    return out


@njit(**_JIT)
def strip_station_sums(ev, q_start, wet_end, b, c83, c53, is_level):
    """Per query i: sum over breakpoints k in [q_start[i], wet_end[i]) of
    ``c83[k] x^(8/3)`` plus, at level breakpoints, ``c53[k] x^(5/3)``, with
    ``x = ev[i] - b[k]`` (> 0: the breakpoints are below the query's stage).
    """
    total = np.zeros(ev.size)
    for i in range(ev.size):
        e = ev[i]
        acc = 0.0
        for k in range(q_start[i], wet_end[i]):
            x = e - b[k]
            x2 = x * x
            root = np.cbrt(x2)  # x^(2/3)
            v = c83[k] * x2 * root
            if is_level[k]:
                v += c53[k] * x * root
            acc += v
        total[i] = acc
    return total
