# cython: language_level=3, boundscheck=False, wraparound=False, cdivision=True
# cython: initializedcheck=False
"""Compiled kernels (Cython) for the hot loops that numpy cannot express without sorting.

Arrays in, arrays out, no Python objects inside the loops; every loop runs without the
GIL, so tile threads and the threads of a Dask worker run them in parallel.  The module is
compiled when the package is installed, so nothing is compiled or loaded at run time.

The public functions that call these kernels (and validate their inputs) live in
:mod:`ntrans.coverage`, :mod:`ntrans.cells`, :mod:`ntrans.terrain`,
:mod:`ntrans.closures` and :mod:`ntrans.translate`; the definitions are documented there.
Each kernel takes any array-like and converts it to the contiguous dtype it needs (no copy
when it already is one).
"""

import numpy as np

from libc.math cimport INFINITY, NAN, cbrt, ceil, floor, isfinite, sqrt
from libc.stdint cimport int64_t, uint64_t
from libc.string cimport memcpy

ctypedef Py_ssize_t index_t


cdef inline index_t _floor_index(double x) noexcept nogil:
    return <index_t>floor(x)


cdef inline index_t _ceil_index(double x) noexcept nogil:
    return <index_t>ceil(x)


cdef inline void _deposit(double[::1] diff, index_t width, index_t rmin, index_t cmin,
                          index_t rows, index_t cols, double ua, double va, double ub,
                          double vb, double sign) noexcept nogil:
    """Add the row deposits of one piece lying inside one pixel row band."""
    cdef double dv = (vb - va) * sign
    cdef double um, local
    cdef index_t r, c, at
    if dv == 0.0:
        return
    um = 0.5 * (ua + ub)
    r = _floor_index(0.5 * (va + vb))
    c = _floor_index(um)
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


cdef void _deposit_split(double[::1] diff, index_t width, index_t rmin, index_t cmin,
                         index_t rows, index_t cols, double u0, double v0, double u1,
                         double v1, double sign, bint at_columns) noexcept nogil:
    """Split a piece at the integer columns (``at_columns``) or rows it crosses.

    Each part of a split at columns is split again at rows; each part of a split at rows
    lies in one pixel and is deposited.  An edge enters with ``at_columns`` true.
    """
    # a: the coordinate split at integers, b: the other one
    cdef double a0 = u0 if at_columns else v0
    cdef double a1 = u1 if at_columns else v1
    cdef double b0 = v0 if at_columns else u0
    cdef double b1 = v1 if at_columns else u1
    cdef double lo = a0 if a0 < a1 else a1
    cdef double hi = a1 if a0 < a1 else a0
    cdef index_t n_cross = max(_ceil_index(hi) - _floor_index(lo) - 1, 0)
    cdef double base = 0.0, step = 0.0, slope = 0.0, pa = a0, pb = b0, ka, kb
    cdef index_t j
    if n_cross:
        if a1 > a0:
            base, step = floor(a0) + 1.0, 1.0
        else:
            base, step = ceil(a0) - 1.0, -1.0
        slope = (b1 - b0) / (a1 - a0)
    for j in range(n_cross + 1):  # the parts between crossings, the last one to the end
        if j < n_cross:
            ka = base + step * j
            kb = b0 + (ka - a0) * slope
        else:
            ka, kb = a1, b1
        if at_columns:
            _deposit_split(diff, width, rmin, cmin, rows, cols, pa, pb, ka, kb, sign, False)
        else:
            _deposit(diff, width, rmin, cmin, rows, cols, pb, pa, kb, ka, sign)
        pa, pb = ka, kb


#: first guess of x^(-1/3) from the bits of x: this constant minus a third of the bits
#: (the exponent divided by -3), at most 3.5 % off for every normal x (fitted by search)
cdef uint64_t _INVERSE_CUBE_ROOT_BITS = 0x553EF10000000000


cdef inline double _pow_two_thirds(double x) noexcept nogil:
    """x^(2/3) for x >= 0, within 2 units in the last place of the exact value.

    For 1e-290 < x < 1e290: the first guess s of x^(-1/3) from the bits of x, two steps
    of the fourth-order iteration s <- s (1 + d/3 + 2 d^2/9 + 14 d^3/81) with
    d = 1 - x s^3 (the series of (1 - d)^(-1/3): 3.5 % -> 1e-5 -> round-off), then x s.
    Additions and products only, so successive calls overlap in the processor, where
    ``cbrt(x * x)`` waits on library calls (the face tables of the 10^7-pixel benchmark
    case, 94 million roots: :func:`strip_station_sums` 1.88 -> 0.85 s).  Other x (zero,
    tiny, huge, negative, NaN) take ``cbrt(x * x)``.
    """
    cdef uint64_t bits
    cdef double s, d
    if not (x > 1e-290 and x < 1e290):
        return cbrt(x * x)
    memcpy(&bits, &x, sizeof(double))
    bits = _INVERSE_CUBE_ROOT_BITS - bits // 3
    memcpy(&s, &bits, sizeof(double))
    d = 1.0 - x * s * s * s
    s = s + s * (d * (1.0 / 3.0 + d * (2.0 / 9.0 + d * (14.0 / 81.0))))
    d = 1.0 - x * s * s * s
    s = s + s * (d * (1.0 / 3.0 + d * (2.0 / 9.0 + d * (14.0 / 81.0))))
    return x * s


cdef inline index_t _clamp(index_t x, index_t top) noexcept nogil:
    return 0 if x < 0 else (top if x > top else x)


cdef inline double _per_step(const double* eta, index_t m) noexcept nogil:
    """Stages per unit of elevation across ``m`` increasing stages (0 when they cannot say)."""
    if m > 1 and eta[m - 1] > eta[0]:
        return (m - 1) / (eta[m - 1] - eta[0])
    return 0.0


cdef inline index_t _first_above(const double* eta, index_t m, double per_step,
                                 double z) noexcept nogil:
    """Index of the first of the ``m`` increasing stages ``eta`` above ``z`` (``m`` if none).

    A first guess from the mean spacing (exact for evenly spaced stages up to rounding),
    then a walk to the exact bin: real terrain keeps the walk short, and this beat a
    binary search by about 2x.
    """
    cdef double guess
    cdef index_t lo
    if m == 0:
        return 0
    guess = (z - eta[0]) * per_step + 1.0
    lo = 0 if not guess > 0.0 else (m if guess >= m else <index_t>guess)
    while lo < m and eta[lo] <= z:
        lo += 1
    while lo > 0 and eta[lo - 1] > z:
        lo -= 1
    return lo


cdef void _item_bins(const double* z, const double* plan, const double* bed, index_t count,
                     const double* lv, index_t n_lv, bint relative, double* eta,
                     double* low, double* high, double* covered, double* moment,
                     double* wet, double* wet_bed, double* wet_moment) noexcept nogil:
    """One item's terrain statistics and stage bins from its ``count`` >= 1 entries.

    ``wet``, ``wet_bed`` and ``wet_moment`` point at the item's row (``n_lv + 1`` zeros);
    each entry is added to the bin of the first stage that wets it, then the bins are
    summed cumulatively.  ``eta`` is scratch for ``n_lv`` stages.
    """
    cdef double z_lo = z[0], z_hi = z[0], total = 0.0, mom = 0.0, p, d, per_step
    cdef index_t e, j, k, b
    for e in range(1, count):
        if not z_lo <= z[e]:
            z_lo = z[e]
        if not z_hi >= z[e]:
            z_hi = z[e]
    low[0] = z_lo
    high[0] = z_hi
    for k in range(n_lv):
        eta[k] = lv[k] + z_lo if relative else lv[k]
    per_step = _per_step(eta, n_lv)
    for j in range(count):
        p = plan[j]
        d = z[j] - z_lo
        total += p
        mom += p * d
        if n_lv:
            b = _first_above(eta, n_lv, per_step, z[j])
            wet[b] += p
            wet_bed[b] += bed[j]
            wet_moment[b] += p * d
    covered[0] = total
    moment[0] = mom
    for k in range(1, n_lv):
        wet[k] += wet[k - 1]
        wet_bed[k] += wet_bed[k - 1]
        wet_moment[k] += wet_moment[k - 1]


cdef class _StageSums:
    """The per-item outputs of the stage-sum kernels, filled item by item by :meth:`add`."""

    cdef object low_a, high_a, covered_a, moment_a, wet_a, wet_bed_a, wet_moment_a, eta_a
    cdef double[::1] low, high, covered, moment, eta
    cdef const double[::1] lv
    cdef double[:, ::1] wet, wet_bed, wet_moment
    cdef index_t n_lv
    cdef bint relative

    def __init__(self, index_t n_rows, levels, bint relative):
        self.lv = _f64(levels)
        self.n_lv = self.lv.shape[0]
        self.relative = relative
        self.low = self.low_a = np.full(n_rows, np.nan)
        self.high = self.high_a = np.full(n_rows, np.nan)
        self.covered = self.covered_a = np.zeros(n_rows)
        self.moment = self.moment_a = np.zeros(n_rows)
        self.wet = self.wet_a = np.zeros((n_rows, self.n_lv + 1))
        self.wet_bed = self.wet_bed_a = np.zeros((n_rows, self.n_lv + 1))
        self.wet_moment = self.wet_moment_a = np.zeros((n_rows, self.n_lv + 1))
        self.eta = self.eta_a = np.empty(max(self.n_lv, 1))

    cdef void add(self, index_t i, const double* z, const double* plan, const double* bed,
                  index_t count) noexcept nogil:
        """Item ``i`` from its ``count`` >= 1 entries."""
        _item_bins(z, plan, bed, count, &self.lv[0] if self.n_lv else NULL, self.n_lv,
                   self.relative, &self.eta[0], &self.low[i], &self.high[i],
                   &self.covered[i], &self.moment[i], &self.wet[i, 0], &self.wet_bed[i, 0],
                   &self.wet_moment[i, 0])

    def result(self):
        n = self.n_lv
        return (self.low_a, self.high_a, self.covered_a, self.moment_a, self.wet_a[:, :n],
                self.wet_bed_a[:, :n], self.wet_moment_a[:, :n])


def _f64(a):
    return np.ascontiguousarray(a, dtype=np.float64)


def _i64(a):
    return np.ascontiguousarray(a, dtype=np.int64)


def exact_coverage_runs(edge_start, u0, v0, u1, v1, sign, index_t rows, index_t cols,
                        double threshold):
    """Covered fraction of every pixel of every item, one bounding box at a time.

    ``edge_start`` (n_items + 1) delimits each item's edges (pixel units, oriented by
    ``sign``).  Returns ``(item, row, col, fraction)`` sorted by (item, row, col):
    fractions above ``threshold`` only, clipped to 1.
    """
    return _coverage_walk(edge_start, u0, v0, u1, v1, sign, rows, cols, threshold,
                          None, None, 0.0)


def exact_coverage_values(edge_start, u0, v0, u1, v1, sign, index_t rows, index_t cols,
                          double threshold, elevation, surface, double pixel_area):
    """:func:`exact_coverage_runs` and :func:`entry_values` in one walk.

    Returns ``(item, z, plan, bed)`` of the covered pixels whose elevation is not NaN,
    sorted by (item, row, col): the same numbers as the two kernels in turn followed by
    dropping the NaN elevations, without writing or reading back rows and columns.
    """
    return _coverage_walk(edge_start, u0, v0, u1, v1, sign, rows, cols, threshold,
                          elevation, surface, pixel_area)


def exact_coverage_stage_sums(edge_start, u0, v0, u1, v1, sign, index_t rows, index_t cols,
                              double threshold, elevation, surface, double pixel_area,
                              levels, bint relative, index_t n_items):
    """:func:`exact_coverage_values` and :func:`item_stage_sums` in one walk.

    Each item's entries (pixels with a finite elevation) are gathered into a buffer the
    size of its bounding box and summed there, in the order :func:`item_stage_sums`
    reads them, so the results are the same to the bit; no per-pixel array is written.
    ``n_items`` (at least ``len(edge_start) - 1``) rows are returned.  Returns what
    :func:`item_stage_sums` returns and, last, the number of entries whose bed area is
    not finite (they are left out; the caller reports them).
    """
    if len(edge_start) - 1 > n_items:
        raise ValueError("n_items is smaller than the number of items with edges")
    return _coverage_walk(edge_start, u0, v0, u1, v1, sign, rows, cols, threshold,
                          elevation, surface, pixel_area, levels, relative, n_items)


def _coverage_walk(edge_start, u0, v0, u1, v1, sign, index_t rows, index_t cols,
                   double threshold, elevation, surface, double pixel_area,
                   levels=None, bint relative=False, index_t n_items_out=0):
    """The walk of the coverage kernels: pixel runs; with ``elevation`` entry values;
    with ``levels`` too, per-item stage sums (see the public functions)."""
    cdef const int64_t[::1] es = _i64(edge_start)
    cdef const double[::1] eu0 = _f64(u0)
    cdef const double[::1] ev0 = _f64(v0)
    cdef const double[::1] eu1 = _f64(u1)
    cdef const double[::1] ev1 = _f64(v1)
    cdef const double[::1] esign = _f64(sign)
    cdef bint gather = elevation is not None
    cdef bint summing = levels is not None
    cdef const double[:, ::1] grid = np.ascontiguousarray(
        elevation if gather else np.empty((0, 0)), dtype=np.float64)
    cdef const double[:, ::1] factor = np.ascontiguousarray(
        surface if gather else np.empty((0, 0)), dtype=np.float64)
    if gather and (grid.shape[0] != rows or grid.shape[1] != cols
                   or factor.shape[0] != rows or factor.shape[1] != cols):
        raise ValueError("elevation and surface must have the window's shape")
    if summing and not gather:
        raise ValueError("stage sums need the elevation and surface")
    cdef index_t n_items = es.shape[0] - 1
    rmin_a = np.zeros(max(n_items, 0), np.intp)
    rmax_a = np.zeros(max(n_items, 0), np.intp)
    cmin_a = np.zeros(max(n_items, 0), np.intp)
    cmax_a = np.zeros(max(n_items, 0), np.intp)
    cdef index_t[::1] rmin = rmin_a
    cdef index_t[::1] rmax = rmax_a
    cdef index_t[::1] cmin = cmin_a
    cdef index_t[::1] cmax = cmax_a
    cdef index_t capacity = 0, largest = 0, i, e, e0, e1, h, w, width, r, c, at, n = 0
    cdef index_t rr, cc, n_bad = 0
    cdef double vlo, vhi, ulo, uhi, running, frac, zz, p, bb
    with nogil:
        for i in range(n_items):
            e0, e1 = es[i], es[i + 1]
            if e0 == e1:
                continue
            vlo, vhi, ulo, uhi = INFINITY, -INFINITY, INFINITY, -INFINITY
            for e in range(e0, e1):
                vlo = min(vlo, ev0[e], ev1[e])
                vhi = max(vhi, ev0[e], ev1[e])
                ulo = min(ulo, eu0[e], eu1[e])
                uhi = max(uhi, eu0[e], eu1[e])
            rmin[i] = _clamp(_floor_index(vlo), rows)
            rmax[i] = _clamp(_ceil_index(vhi), rows)
            cmin[i] = _clamp(_floor_index(ulo), cols)
            cmax[i] = _clamp(_ceil_index(uhi), cols)
            capacity += (rmax[i] - rmin[i]) * (cmax[i] - cmin[i])
            largest = max(largest, (rmax[i] - rmin[i]) * (cmax[i] - cmin[i] + 2))

    if summing:  # one item's entries at a time
        capacity = largest
    # sized for every pixel of every bounding box; the results are views of their first n
    out_item_a = np.empty(0 if summing else capacity, np.int64)
    # runs: row, column (int64) and fraction; values: elevation, plan and bed area
    out_b_a = np.empty(capacity, np.float64 if gather else np.int64)
    out_c_a = np.empty(capacity, np.float64 if gather else np.int64)
    out_d_a = np.empty(capacity, np.float64)
    diff_a = np.zeros(largest, np.float64)
    cdef int64_t[::1] out_item = out_item_a
    cdef int64_t[::1] out_row = out_b_a if not gather else np.empty(0, np.int64)
    cdef int64_t[::1] out_col = out_c_a if not gather else np.empty(0, np.int64)
    cdef double[::1] out_z = out_b_a if gather else np.empty(0)
    cdef double[::1] out_plan = out_c_a if gather else np.empty(0)
    cdef double[::1] out_d = out_d_a  # fraction, or bed area
    cdef double[::1] diff = diff_a

    # per-item stage sums (the outputs of item_stage_sums)
    cdef _StageSums sums = _StageSums(n_items_out if summing else 0,
                                      levels if summing else np.empty(0), relative)
    with nogil:
        for i in range(n_items):
            h = rmax[i] - rmin[i]
            w = cmax[i] - cmin[i]
            if h <= 0 or w <= 0:
                continue
            width = w + 2
            for e in range(es[i], es[i + 1]):
                _deposit_split(diff, width, rmin[i], cmin[i], rows, cols,
                               eu0[e], ev0[e], eu1[e], ev1[e], esign[e], True)
            if summing:
                n = 0
            for r in range(h):
                running = 0.0
                at = r * width
                rr = rmin[i] + r
                for c in range(w):
                    running += diff[at + c]
                    if running > threshold:
                        frac = running if running < 1.0 else 1.0
                        cc = cmin[i] + c
                        if summing:
                            zz = grid[rr, cc]
                            if not isfinite(zz):  # nodata (or an infinite value): no entry
                                continue
                            p = frac * pixel_area
                            bb = p * factor[rr, cc]
                            if not isfinite(bb):
                                n_bad += 1
                                continue
                            out_z[n] = zz
                            out_plan[n] = p
                            out_d[n] = bb
                            n += 1
                            continue
                        if gather:
                            zz = grid[rr, cc]
                            if zz != zz:  # nodata: no entry
                                continue
                            p = frac * pixel_area
                            out_z[n] = zz
                            out_plan[n] = p
                            out_d[n] = p * factor[rr, cc]
                        else:
                            out_row[n] = rr
                            out_col[n] = cc
                            out_d[n] = frac
                        out_item[n] = i
                        n += 1
                for c in range(width):
                    diff[at + c] = 0.0
            if summing and n:
                sums.add(i, &out_z[0], &out_plan[0], &out_d[0], n)
    if summing:
        return (*sums.result(), n_bad)
    return out_item_a[:n], out_b_a[:n], out_c_a[:n], out_d_a[:n]


def entry_values(row, col, fraction, elevation, surface, double pixel_area):
    """Per entry (pixel of an item): elevation, plan area and bed area, in one pass.

    ``z = elevation[row, col]``, ``plan = fraction x pixel_area`` and ``bed = plan x
    surface[row, col]`` (the surface factor), the same products numpy would form.
    """
    cdef const int64_t[::1] r = _i64(row)
    cdef const int64_t[::1] c = _i64(col)
    cdef const double[::1] f = _f64(fraction)
    cdef const double[:, ::1] grid = np.ascontiguousarray(elevation, dtype=np.float64)
    cdef const double[:, ::1] s = np.ascontiguousarray(surface, dtype=np.float64)
    cdef index_t n = r.shape[0], j
    z_a = np.empty(n)
    plan_a = np.empty(n)
    bed_a = np.empty(n)
    cdef double[::1] z = z_a
    cdef double[::1] plan = plan_a
    cdef double[::1] bed = bed_a
    cdef double p
    with nogil:
        for j in range(n):
            z[j] = grid[r[j], c[j]]
            p = f[j] * pixel_area
            plan[j] = p
            bed[j] = p * s[r[j], c[j]]
    return z_a, plan_a, bed_a


def stage_sums(item, z, plan, bed, low, stages_sorted, n_finite):
    """Per item and stage: wetted plan area, wetted bed area and sum of plan x (z - low).

    ``stages_sorted`` (n_items, n_stages) holds each item's stages in increasing order,
    its ``n_finite[i]`` finite ones first.  An entry is wet at stage eta when
    ``z < eta``.  Each entry is added once, to the bin of the first stage that wets it
    (:func:`_first_above`), and the bins are then summed cumulatively, so no sort of the
    entries is needed.  Returns three (n_items, n_stages) arrays in the sorted order.
    """
    cdef const int64_t[::1] it = _i64(item)
    cdef const double[::1] zz = _f64(z)
    cdef const double[::1] pl = _f64(plan)
    cdef const double[::1] bd = _f64(bed)
    cdef const double[::1] lw = _f64(low)
    cdef const double[:, ::1] st = np.ascontiguousarray(stages_sorted, dtype=np.float64)
    cdef const int64_t[::1] nf = _i64(n_finite)
    cdef index_t n_items = st.shape[0], n_stages = st.shape[1]
    wet_a = np.zeros((n_items, n_stages + 1))
    wet_bed_a = np.zeros((n_items, n_stages + 1))
    moment_a = np.zeros((n_items, n_stages + 1))
    cdef double[:, ::1] wet = wet_a
    cdef double[:, ::1] wet_bed = wet_bed_a
    cdef double[:, ::1] moment = moment_a
    per_step_a = np.zeros(n_items)
    cdef double[::1] per_step = per_step_a
    cdef index_t j, i, k, lo
    cdef double zj
    with nogil:
        for i in range(n_items):
            per_step[i] = _per_step(&st[i, 0], nf[i]) if n_stages else 0.0
        for j in range(it.shape[0]):
            i = it[j]
            zj = zz[j]
            lo = _first_above(&st[i, 0], nf[i], per_step[i], zj) if n_stages else 0
            wet[i, lo] += pl[j]
            wet_bed[i, lo] += bd[j]
            moment[i, lo] += pl[j] * (zj - lw[i])
        for i in range(n_items):
            for k in range(1, n_stages):
                wet[i, k] += wet[i, k - 1]
                wet_bed[i, k] += wet_bed[i, k - 1]
                moment[i, k] += moment[i, k - 1]
    return wet_a[:, :n_stages], wet_bed_a[:, :n_stages], moment_a[:, :n_stages]


def item_stage_sums(item, z, plan, bed, levels, bint relative, index_t n_items):
    """Per item, from its entries in one pass: terrain statistics and stage sums.

    The entries of each item must be contiguous (``item`` grouped, as
    :func:`exact_coverage_runs` returns them); ``ValueError`` otherwise.  ``levels``
    (n_levels,) are increasing and finite: the stages of every item, or with
    ``relative`` the depths above each item's low point (stage = levels[k] + low).

    Returns ``low``, ``high`` (lowest and highest ``z``, NaN for an item without entries),
    ``covered`` (sum of ``plan``), ``moment`` (sum of plan x (z - low)) and three
    (n_items, n_levels) arrays ``wet``, ``wet_bed``, ``wet_moment``: the sums of
    ``plan``, ``bed`` and plan x (z - low) over the entries wet at each stage
    (``z < stage``).  Each entry is added once, to the bin of the first stage that wets
    it, and the bins are then summed cumulatively.
    """
    cdef const int64_t[::1] it = _i64(item)
    cdef const double[::1] zz = _f64(z)
    cdef const double[::1] pl = _f64(plan)
    cdef const double[::1] bd = _f64(bed)
    cdef index_t n = it.shape[0]
    cdef _StageSums sums = _StageSums(n_items, levels, relative)
    seen_a = np.zeros(n_items, np.uint8)
    cdef unsigned char[::1] seen = seen_a
    cdef index_t s = 0, e, i
    cdef bint grouped = True
    with nogil:
        while s < n:
            i = it[s]
            if seen[i]:
                grouped = False
                break
            seen[i] = 1
            e = s + 1
            while e < n and it[e] == i:
                e += 1
            sums.add(i, &zz[s], &pl[s], &bd[s], e - s)
            s = e
    if not grouped:
        raise ValueError("the entries of an item are not contiguous; group them by item")
    return sums.result()


def horn_surface_factor(zp, double x_scale, double y_scale):
    """``sqrt(1 + zx^2 + zy^2)`` by Horn's 3x3 stencil on a grid padded by one NaN pixel.

    ``x_scale`` = 1 / (8 dx), ``y_scale`` = 1 / (8 dy).  Returns ``(factor, partial)``:
    ``factor`` is NaN where the centre pixel is NaN (nodata) or one of its eight
    neighbours is; ``partial`` holds the flat indices (row x cols + col, increasing) of
    the pixels with a valid centre and a missing neighbour, which the caller fills from
    the neighbours that exist.
    """
    cdef const double[:, ::1] g = np.ascontiguousarray(zp, dtype=np.float64)
    cdef index_t rows = max(g.shape[0] - 2, 0), cols = max(g.shape[1] - 2, 0), r, c
    out_a = np.empty((rows, cols))
    cdef double[:, ::1] out = out_a
    cdef double a, b, cc, d, f, gg, h, i, zx, zy
    cdef index_t n_partial = 0, k = 0
    with nogil:
        for r in range(rows):
            for c in range(cols):
                a, b, cc = g[r, c], g[r, c + 1], g[r, c + 2]
                d, f = g[r + 1, c], g[r + 1, c + 2]
                gg, h, i = g[r + 2, c], g[r + 2, c + 1], g[r + 2, c + 2]
                zx = ((cc + 2.0 * f + i) - (a + 2.0 * d + gg)) * x_scale
                zy = ((gg + 2.0 * h + i) - (a + 2.0 * b + cc)) * y_scale
                out[r, c] = sqrt(zx * zx + zy * zy + 1.0)
        # a separate pass, so the compiler can vectorise the stencil above
        for r in range(rows):
            for c in range(cols):
                if g[r + 1, c + 1] != g[r + 1, c + 1]:  # nodata centre
                    out[r, c] = NAN
                elif out[r, c] != out[r, c]:
                    n_partial += 1
    partial_a = np.empty(n_partial, np.int64)
    cdef int64_t[::1] partial = partial_a
    with nogil:
        if n_partial:
            for r in range(rows):
                for c in range(cols):
                    if out[r, c] != out[r, c] and g[r + 1, c + 1] == g[r + 1, c + 1]:
                        partial[k] = r * cols + c
                        k += 1
    return out_a, partial_a


def strip_station_sums(ev, q_start, wet_end, b, c83, c53, is_level):
    """Per query i: sum over breakpoints k in [q_start[i], wet_end[i]) of
    ``c83[k] x^(8/3)`` plus, at level breakpoints, ``c53[k] x^(5/3)``, with
    ``x = ev[i] - b[k]`` (> 0: the breakpoints are below the query's stage).
    """
    cdef const double[::1] e_ = _f64(ev)
    cdef const int64_t[::1] qs = _i64(q_start)
    cdef const int64_t[::1] we = _i64(wet_end)
    cdef const double[::1] bb = _f64(b)
    cdef const double[::1] k83 = _f64(c83)
    cdef const double[::1] k53 = _f64(c53)
    cdef const unsigned char[::1] lvl = np.ascontiguousarray(is_level, dtype=np.bool_).view(
        np.uint8)
    total_a = np.zeros(e_.shape[0])
    cdef double[::1] total = total_a
    cdef index_t i, k
    cdef double e, acc, x, x2, root, step
    with nogil:
        for i in range(e_.shape[0]):
            e = e_[i]
            acc = 0.0
            for k in range(qs[i], we[i]):
                x = e - bb[k]
                x2 = x * x
                root = _pow_two_thirds(x)
                step = k53[k] * x * root
                # a select, not a branch: level breakpoints come in no pattern
                acc += k83[k] * x2 * root + (step if lvl[k] else 0.0)
            total[i] = acc
    return total_a


def first_at_least(b, lo, hi, e):
    """Per query i: the first index k in [lo[i], hi[i]) with ``b[k] >= e[i]``, else hi[i].

    ``b`` is sorted (ascending) within every range; a bisection of the query's own range
    only, so the search touches a few neighbouring values instead of the whole array.
    """
    cdef const double[::1] bb = _f64(b)
    cdef const int64_t[::1] lo_ = _i64(lo)
    cdef const int64_t[::1] hi_ = _i64(hi)
    cdef const double[::1] e_ = _f64(e)
    pos_a = np.empty(e_.shape[0], dtype=np.int64)
    cdef int64_t[::1] pos = pos_a
    cdef index_t i
    cdef int64_t a, z, mid
    cdef double x
    with nogil:
        for i in range(e_.shape[0]):
            a = lo_[i]
            z = hi_[i]
            x = e_[i]
            while a < z:
                mid = a + (z - a) // 2
                if bb[mid] < x:
                    a = mid + 1
                else:
                    z = mid
            pos[i] = a
    return pos_a


cdef inline double _at_least_zero(double x) noexcept nogil:
    """``np.maximum(x, 0.0)``: NaN stays NaN, -0.0 stays -0.0."""
    return x if (x >= 0.0 or x != x) else 0.0


def ramp_table_values(pref, pair0, row, p, e, dry):
    """Per query i: (wet length, wetted perimeter, flow area) of a face's ramp table.

    ``s = pref[row[i]] - pair0[p[i]]`` (eight prefix sums: c_ds, c_ds b, c_ds b^2, c_dl,
    c_dl b, d_ds, d_ds b, d_dl) and, at the stage ``x = e[i]`` above the pair's base,
    W = x s0 - s1 + s5, P = x s3 - s4 + s7, A = (x^2 s0 - 2 x s1 + s2) / 2 + x s5 - s6,
    each at least 0; 0 where ``dry[i]``.  The operations are those of the numpy form, in
    its order, so the results are the same to the bit.
    """
    cdef const double[:, ::1] pr = np.ascontiguousarray(pref, dtype=np.float64)
    cdef const double[:, ::1] p0 = np.ascontiguousarray(pair0, dtype=np.float64)
    cdef const int64_t[::1] row_ = _i64(row)
    cdef const int64_t[::1] p_ = _i64(p)
    cdef const double[::1] e_ = _f64(e)
    cdef const unsigned char[::1] dry_ = np.ascontiguousarray(dry, dtype=np.bool_).view(
        np.uint8)
    cdef index_t n = e_.shape[0]
    wet_a, per_a, area_a = np.zeros(n), np.zeros(n), np.zeros(n)
    cdef double[::1] wet = wet_a
    cdef double[::1] per = per_a
    cdef double[::1] area = area_a
    cdef index_t i, r, q
    cdef double x, s0, s1, s2, s3, s4, s5, s6, s7
    with nogil:
        for i in range(n):
            if dry_[i]:
                continue
            r = row_[i]
            q = p_[i]
            x = e_[i]
            s0 = pr[r, 0] - p0[q, 0]
            s1 = pr[r, 1] - p0[q, 1]
            s2 = pr[r, 2] - p0[q, 2]
            s3 = pr[r, 3] - p0[q, 3]
            s4 = pr[r, 4] - p0[q, 4]
            s5 = pr[r, 5] - p0[q, 5]
            s6 = pr[r, 6] - p0[q, 6]
            s7 = pr[r, 7] - p0[q, 7]
            wet[i] = _at_least_zero(x * s0 - s1 + s5)
            per[i] = _at_least_zero(x * s3 - s4 + s7)
            area[i] = _at_least_zero(0.5 * (x * x * s0 - 2.0 * x * s1 + s2) + x * s5 - s6)
    return wet_a, per_a, area_a


def cumulative_rows(values):
    """``np.cumsum(values, axis=0, out=values)`` in place on a C-contiguous float64 2-D array.

    The same additions in the same order (row i += row i-1, top to bottom), so the same
    bits; unlike numpy's accumulate along the first axis it runs without the GIL, which a
    tile thread building its prefix tables would otherwise hold for the whole sum.
    """
    if not (isinstance(values, np.ndarray) and values.ndim == 2 and values.dtype == np.float64
            and values.flags.c_contiguous and values.flags.writeable):
        raise TypeError("values must be a writeable C-contiguous float64 2-D array")
    cdef double[:, ::1] v = values
    cdef index_t n = v.shape[0], k = v.shape[1], i, j
    with nogil:
        for i in range(1, n):
            for j in range(k):
                v[i, j] += v[i - 1, j]
    return values


def distance_along(seg_len, first):
    """Per vertex: its distance from its line's first vertex, ``seg_len[k]`` being the
    length from vertex k to k + 1 and ``first`` marking the first vertex of each line
    (lines contiguous).  Summed in order within each line only, so a line's distances do
    not depend on the lines before it (a running sum over all would carry their
    round-off)."""
    cdef const double[::1] s = _f64(seg_len)
    cdef const unsigned char[::1] f = np.ascontiguousarray(first, dtype=np.bool_).view(np.uint8)
    if f.shape[0] != s.shape[0]:
        raise ValueError("seg_len and first must have the same length")
    out_a = np.zeros(s.shape[0])
    cdef double[::1] out = out_a
    cdef index_t i
    with nogil:
        for i in range(1, s.shape[0]):
            if not f[i]:
                out[i] = out[i - 1] + s[i - 1]
    return out_a
