"""Face profiles and face stage tables (pure numpy).

A face profile is the terrain sampled along the face line: stations (distance from the
face's start, CRS units) and elevations ``z`` (DEM vertical units, NaN = nodata),
treated as piecewise linear.  A *segment* is the piece between two consecutive stations
of one face; segments with a NaN end are dropped (they lower ``covered_fraction``).

At a water-surface elevation (stage) eta, exactly for the piecewise-linear profile:

- flow area        A(eta) = integral of (eta - z(s))+ ds
- wetted perimeter P(eta) = submerged length of the profile polyline, sqrt(ds^2 + dz^2)
- top width        T(eta) = wet length along the face
- hydraulic radius R = A / P (NaN when dry)

Method: on a segment rising by dz over ds, the wet length is a ramp in eta from the low
end to the high end (slope ds/dz), so T is a sum of ramps started and stopped at
breakpoints (one per station, the two adjacent segments' slopes added); A is its
integral, a sum of quadratics.  Breakpoints are sorted per face (one sort of packed
uint64 keys, repaired exactly where quantisation tied), prefix sums of c, c*b, c*b^2
taken (b relative to the face's low point, against cancellation), and each (face, stage)
located with one searchsorted plus an exact fix-up (stages equal to a breakpoint count it
as dry).  Level segments (dz <= 1e-6 ds) are steps at their mean elevation.  Chunked over
faces for memory; no loop per face or per station.

Sharing: :func:`profile_segments` without ``keep`` is cached on the :class:`Profiles`
(per ``z_to_xy``), and the breakpoint sort and the stage lookup are cached on the
:class:`Segments`, so the summary, the table and the conveyances of one profile set
sort once (treat a ``Profiles`` as read-only once used).
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
import shapely

from .errors import GeometryError, InputError

logger = logging.getLogger(__name__)

__all__ = [
    "FACE_RULES",
    "Profiles",
    "Segments",
    "face_flat_bed",
    "face_profile_summary",
    "face_stage_table",
    "flat_face_table",
    "profile_segments",
    "ramp_sums",
    "sample_profiles",
]

FaceRule = Literal["higher", "mean", "min", "profile_mean"]
FACE_RULES: tuple[str, ...] = ("higher", "mean", "min", "profile_mean")

#: a segment whose rise is at most this fraction of its length is treated as level
LEVEL_RATIO = 1e-6
#: segments per chunk of the breakpoint sums (bounds memory to a few hundred MB)
_SEGMENTS_PER_CHUNK = 1_000_000


@dataclass
class Profiles:
    """Station-elevation profiles of faces.

    Attributes
    ----------
    face : ndarray of int64 (n_stations,)
        Local face index of each station; stations of one face contiguous.
    station : ndarray of float64
        Distance along the face from its start (CRS units), increasing within a face.
    z : ndarray of float64
        Terrain elevation at the station (vertical units), NaN = nodata.
    n_faces : int
        Number of faces (faces without stations have no segments).
    x, y : ndarray of float64, optional
        Station coordinates (CRS units).
    length : ndarray of float64 (n_faces,), optional
        Face length; defaults to the last station of each face.

    Notes
    -----
    Segment indexing: segment ``k`` runs from station ``k`` to station ``k + 1`` when
    both belong to the same face.  Per-segment inputs (e.g. ``n_segment`` in
    :func:`ntrans.closures.face_conveyance`) are arrays indexed by the start station,
    of length ``n_stations`` or ``n_stations - 1``; the value at a face's last station
    is ignored.  :meth:`segment_index` lists the start stations of all segments and
    :meth:`segment_midpoints` their plan midpoints (to look up a roughness class).
    """

    face: np.ndarray
    station: np.ndarray
    z: np.ndarray
    n_faces: int
    x: np.ndarray | None = None
    y: np.ndarray | None = None
    length: np.ndarray | None = field(default=None)
    _segments: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        self.face = np.asarray(self.face, dtype=np.int64).ravel()
        self.station = np.asarray(self.station, dtype=np.float64).ravel()
        self.z = np.asarray(self.z, dtype=np.float64).ravel()
        self.n_faces = int(self.n_faces)
        if not (self.face.size == self.station.size == self.z.size):
            raise InputError("profile face, station and z arrays differ in length; give one value per station")
        if self.x is not None:
            self.x = np.asarray(self.x, dtype=np.float64).ravel()
        if self.y is not None:
            self.y = np.asarray(self.y, dtype=np.float64).ravel()
        if self.length is None:
            length = np.zeros(self.n_faces)
            if self.face.size:
                np.maximum.at(length, self.face, self.station)
            self.length = length
        else:
            self.length = np.asarray(self.length, dtype=np.float64).ravel()

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_segments"] = {}  # caches are not shipped to other processes
        return state

    @property
    def n_stations(self) -> int:
        """Number of stations."""
        return int(self.face.size)

    def segment_index(self) -> np.ndarray:
        """Start-station index of every segment (both ends on the same face)."""
        return np.flatnonzero(self.face[1:] == self.face[:-1]).astype(np.int64)

    def station_weights(self) -> np.ndarray:
        """Plan length each station stands for (CRS units): half of each adjacent segment
        of its face, so a weighted mean over the stations is the trapezoidal mean along
        the line whatever the station spacing."""
        k = self.segment_index()
        half = 0.5 * (self.station[k + 1] - self.station[k])
        weights = np.zeros(self.station.size)
        np.add.at(weights, k, half)
        np.add.at(weights, k + 1, half)
        return weights

    def segment_midpoints(self) -> tuple[np.ndarray, np.ndarray]:
        """Plan coordinates (x, y) of the midpoint of every segment of :meth:`segment_index`."""
        if self.x is None or self.y is None:
            raise InputError("these profiles carry no station coordinates; build them with sample_profiles")
        k = self.segment_index()
        return 0.5 * (self.x[k] + self.x[k + 1]), 0.5 * (self.y[k] + self.y[k + 1])


@dataclass
class Segments:
    """Valid segments of profiles (both ends finite): the input of the stage algebra.

    ``start`` is the start-station index (see :class:`Profiles`); ``face`` the face;
    ``ds`` plan length; ``z0``, ``z1`` end elevations; ``dl`` 3-D length
    ``sqrt(ds^2 + (z_to_xy dz)^2)``; ``low`` (n_faces,) lowest valid point per face.
    """

    start: np.ndarray
    face: np.ndarray
    ds: np.ndarray
    z0: np.ndarray
    z1: np.ndarray
    dl: np.ndarray
    low: np.ndarray
    n_faces: int
    _cache: dict = field(default_factory=dict, repr=False, compare=False)

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_cache"] = {}  # caches are not shipped to other processes
        return state

    @property
    def zlo(self) -> np.ndarray:
        return np.minimum(self.z0, self.z1)

    @property
    def zhi(self) -> np.ndarray:
        return np.maximum(self.z0, self.z1)


def profile_segments(
    profiles: Profiles, *, z_to_xy: float = 1.0, keep: np.ndarray | None = None
) -> Segments:
    """Valid segments of ``profiles``; ``keep`` (per start station) drops more of them.

    Without ``keep`` the result is cached on ``profiles`` (per ``z_to_xy``), so the
    table, the summary and the conveyances share one set of segments and one sort.
    """
    p = profiles
    if keep is None:
        cached = p._segments.get(float(z_to_xy))
        if cached is not None:
            return cached
        seg = _profile_segments(p, z_to_xy, None)
        p._segments[float(z_to_xy)] = seg
        return seg
    return _profile_segments(p, z_to_xy, keep)


def _profile_segments(p: Profiles, z_to_xy: float, keep: np.ndarray | None) -> Segments:
    k = p.segment_index()
    z0, z1 = p.z[k], p.z[k + 1]
    ok = np.isfinite(z0) & np.isfinite(z1)
    if keep is not None:
        ok &= np.asarray(keep, dtype=bool)[k]
    k, z0, z1 = k[ok], z0[ok], z1[ok]
    face = p.face[k]
    ds = p.station[k + 1] - p.station[k]
    dl = np.hypot(ds, (z1 - z0) * float(z_to_xy))
    low = np.full(p.n_faces, np.inf)
    if k.size:
        np.minimum.at(low, face, np.minimum(z0, z1))
    low[~np.isfinite(low)] = np.nan
    return Segments(k, face, ds, z0, z1, dl, low, p.n_faces)


def _grid_crossings(start: np.ndarray, delta: np.ndarray, mask: np.ndarray):
    """Segments' parameters t in (0, 1) where ``start + t*delta`` crosses an integer.

    Returns ``(owner, t)`` sorted by owner, then t.
    """
    end = start + delta
    lo, hi = np.minimum(start, end), np.maximum(start, end)
    first = np.floor(lo) + 1.0
    last = np.ceil(hi) - 1.0
    count = np.where(mask & (delta != 0), np.maximum(last - first + 1.0, 0.0), 0.0)
    count = count.astype(np.int64)
    owner = np.repeat(np.arange(start.size), count)
    j = np.arange(int(count.sum()), dtype=np.float64) - np.repeat(np.cumsum(count) - count, count)
    # crossings in increasing t: up from the first integer when rising, down from the last
    # when falling
    rising = delta[owner] > 0
    k = np.where(rising, first[owner] + j, last[owner] - j)
    return owner, (k - start[owner]) / delta[owner]


def _merge_sorted_runs(owner: np.ndarray, t: np.ndarray, nv: int) -> np.ndarray:
    """Order sorting (owner, t) when the arrays are a few runs each sorted that way."""
    owner_bits = max(int(nv).bit_length(), 1)
    t_bits = min(63 - owner_bits, 52)
    if t_bits < 24:
        return np.lexsort((t, owner))
    key = owner.astype(np.uint64) << np.uint64(t_bits)
    key |= np.floor(np.clip(t, 0.0, 1.0) * float((1 << t_bits) - 1)).astype(np.uint64)
    # ties of the quantised t are closer than the 1e-9 merge distance: any order is fine
    return np.argsort(key, kind="stable")  # merges the sorted runs


def _add_grid_crossings(owner, t, vx, vy, dx, dy, same_next, transform):
    """Merge the crossings of pixel-centre columns and rows into the stations."""
    a, e = float(transform.a), float(transform.e)
    col0 = (vx - float(transform.c)) / a - 0.5
    row0 = (vy - float(transform.f)) / e - 0.5
    own_c, t_c = _grid_crossings(col0, dx / a, same_next)
    own_r, t_r = _grid_crossings(row0, dy / e, same_next)
    owner = np.concatenate([owner, own_c, own_r])
    t = np.concatenate([t, t_c, t_r])
    order = _merge_sorted_runs(owner, t, vx.size)
    owner, t = owner[order], t[order]
    keep = np.ones(owner.size, dtype=bool)
    keep[1:] = (owner[1:] != owner[:-1]) | (np.abs(t[1:] - t[:-1]) > 1e-9)
    return owner[keep], t[keep]


def sample_profiles(
    lines: object,
    elevation: np.ndarray,
    transform: object,
    spacing: float,
    *,
    sampler: Callable[..., np.ndarray] | None = None,
) -> Profiles:
    """Sample the terrain along face lines.

    Parameters
    ----------
    lines : array_like of shapely LineString (n_faces,)
        Face lines in the window's CRS; None or empty lines give faces without stations.
    elevation : (rows, cols) ndarray
        DEM window, NaN = nodata.
    transform : affine.Affine
        Transform of the window.
    spacing : float
        Largest distance between stations (CRS units, > 0); every vertex of a line is
        a station too, and so is every crossing of a pixel-centre row or column (with
        the default sampler), where the bilinear surface bends.  Use at most half a pixel.
    sampler : callable, optional
        ``sampler(elevation, transform, x, y) -> z``; default
        :func:`ntrans.terrain.sample_bilinear`.

    Returns
    -------
    Profiles
    """
    spacing = float(spacing)
    if not (np.isfinite(spacing) and spacing > 0):
        raise InputError(f"profile spacing must be a positive distance, got {spacing!r}")
    lines = np.asarray(lines, dtype=object).ravel()
    n_faces = lines.size
    present = shapely.is_geometry(lines)
    types = shapely.get_type_id(lines[present])
    if np.any(types != 1):
        raise GeometryError(
            "face geometries must be LineStrings; explode multi-part faces into one face per part"
        )
    coords, idx = shapely.get_coordinates(lines, return_index=True)
    idx = idx.astype(np.int64)
    # drop repeated vertices
    if coords.shape[0] > 1:
        step = np.hypot(*(coords[1:] - coords[:-1]).T)
        dup = np.zeros(coords.shape[0], dtype=bool)
        dup[1:] = (idx[1:] == idx[:-1]) & (step == 0)
        coords, idx = coords[~dup], idx[~dup]
    nv = coords.shape[0]
    if nv == 0:
        empty = np.empty(0)
        return Profiles(
            np.empty(0, dtype=np.int64), empty, empty.copy(), n_faces, empty.copy(),
            empty.copy(), np.zeros(n_faces),
        )
    same_next = np.zeros(nv, dtype=bool)
    same_next[:-1] = idx[1:] == idx[:-1]
    seg_len = np.zeros(nv)
    seg_len[:-1] = np.hypot(*(coords[1:] - coords[:-1]).T)
    seg_len[~same_next] = 0.0
    # distance of each vertex from its face's start, summed within the face only (a
    # running sum over every face of the tile would make it depend on the tiling)
    from ._kernels import distance_along

    first = np.ones(nv, dtype=bool)
    first[1:] = idx[1:] != idx[:-1]
    cum = distance_along(seg_len, first)
    m = np.where(same_next, np.maximum(1, np.ceil(seg_len / spacing)), 1).astype(np.int64)
    total = int(m.sum())
    owner = np.repeat(np.arange(nv), m)
    offset = np.cumsum(m) - m
    # fraction along the vertex's segment: j / m for the j-th station of the segment
    t = np.arange(total, dtype=np.float64)
    t -= np.repeat(offset.astype(np.float64), m)
    t *= np.repeat(1.0 / m, m)
    vx, vy = coords[:, 0], coords[:, 1]
    dx = np.zeros(nv)
    dy = np.zeros(nv)
    dx[:-1] = np.where(same_next[:-1], vx[1:] - vx[:-1], 0.0)
    dy[:-1] = np.where(same_next[:-1], vy[1:] - vy[:-1], 0.0)
    if sampler is None:
        # Bilinear terrain is linear along a line only between the pixel-centre grid
        # lines it crosses: add a station at every crossing so the piecewise-linear
        # profile keeps every kink of the surface (narrow ditches, bank tops).
        owner, t = _add_grid_crossings(owner, t, vx, vy, dx, dy, same_next, transform)
    x = vx[owner] + t * dx[owner]
    y = vy[owner] + t * dy[owner]
    station = cum[owner] + t * seg_len[owner]
    face = idx[owner]
    if sampler is None:
        from .terrain import sample_bilinear as sampler
    z = np.asarray(sampler(elevation, transform, x, y), dtype=np.float64)
    length = np.zeros(n_faces)
    last = np.flatnonzero(~same_next)  # each face's last vertex
    length[idx[last]] = cum[last]
    return Profiles(face, station, z, n_faces, x, y, length)


def _stage_matrix(stages: np.ndarray, n_faces: int) -> np.ndarray:
    s = np.asarray(stages, dtype=np.float64)
    if s.ndim == 1:
        s = np.broadcast_to(s, (n_faces, s.size))
    if s.ndim != 2 or s.shape[0] != n_faces:
        raise InputError(
            f"stages have shape {np.shape(stages)}; give (n_stages,) or (n_faces={n_faces}, n_stages)"
        )
    return s


def _fix_positions(
    pos: np.ndarray, b: np.ndarray, e: np.ndarray, start: np.ndarray, end: np.ndarray
) -> np.ndarray:
    """Make ``pos`` the exact count position: b[start:pos] < e <= b[pos:end]."""
    pos = np.clip(pos, start, end)
    n = b.size
    if n == 0:
        return pos
    for _ in range(64):
        down = (pos > start) & (b[np.clip(pos - 1, 0, n - 1)] >= e)
        up = (pos < end) & (b[np.clip(pos, 0, n - 1)] < e)
        if not (down.any() or up.any()):
            break
        pos = pos - down + up
    return pos


def _chunks(seg: Segments) -> list[tuple[int, int, int, int, Segments]]:
    """Whole-face chunks of ``seg`` as ``(f0, f1, lo, hi, sub)`` (cached on ``seg``)."""
    n_seg = seg.face.size
    if n_seg <= _SEGMENTS_PER_CHUNK:
        # not cached: a cache on ``seg`` holding ``seg`` would be a reference cycle, and
        # the tile's arrays would then wait for Python's cyclic garbage collector
        return [(0, seg.n_faces, 0, n_seg, seg)]
    cached = seg._cache.get("chunks")
    if cached is not None:
        return cached
    cuts = np.searchsorted(seg.face, seg.face[np.arange(0, n_seg, _SEGMENTS_PER_CHUNK)[1:]])
    bounds = np.unique(np.concatenate([[0], cuts, [n_seg]]))
    out = []
    for lo, hi in zip(bounds[:-1], bounds[1:], strict=True):
        lo, hi = int(lo), int(hi)
        f0, f1 = int(seg.face[lo]), int(seg.face[hi - 1]) + 1
        s_lo = int(seg.start[lo])
        sub = Segments(
            seg.start[lo:hi] - s_lo, seg.face[lo:hi] - f0, seg.ds[lo:hi], seg.z0[lo:hi],
            seg.z1[lo:hi], seg.dl[lo:hi], seg.low[f0:f1], f1 - f0,
        )
        out.append((f0, f1, lo, hi, sub))
    seg._cache["chunks"] = out
    return out


def _breakpoints(seg: Segments) -> dict[str, np.ndarray]:
    """Breakpoints of ``seg`` sorted by (face, elevation), cached on ``seg``.

    One breakpoint per used station (where ramps start and stop) plus one per level
    segment (a step at its mean elevation); values relative to the face's low point.
    """
    bp = seg._cache.get("bp")
    if bp is not None:
        return bp
    from .cells import _sort_by_item_z

    n_faces = seg.n_faces
    dz = np.abs(seg.z1 - seg.z0)
    level = dz <= LEVEL_RATIO * seg.ds
    low = seg.low
    base = np.where(np.isfinite(low), low, 0.0)
    s0 = seg.start
    s1 = s0 + 1
    ns = int(s1.max()) + 1 if s0.size else 0
    z_st = np.zeros(ns)
    z_st[s0] = seg.z0
    z_st[s1] = seg.z1
    f_st = np.full(ns, -1, dtype=np.int64)
    f_st[s0] = seg.face
    f_st[s1] = seg.face
    used = np.flatnonzero(f_st >= 0)
    lev = np.flatnonzero(level)
    bp_face = np.concatenate([f_st[used], seg.face[lev]])
    bp_val = np.concatenate(
        [z_st[used] - base[f_st[used]], 0.5 * (seg.z0[lev] + seg.z1[lev]) - base[seg.face[lev]]]
    )
    order, bf, b = _sort_by_item_z(bp_face, bp_val, max(n_faces, 1))
    faces_idx = np.arange(n_faces)
    face_start = np.searchsorted(bf, faces_idx, side="left")
    face_end = np.searchsorted(bf, faces_idx, side="right")
    relief = np.zeros(n_faces)
    has = face_end > face_start
    relief[has] = b[face_end[has] - 1]
    key_scale = 2.0 * max(float(relief.max()) if relief.size else 0.0, 0.0) + 4.0
    with np.errstate(invalid="ignore", divide="ignore"):
        # +1/dz where the start is the low end, -1/dz where it is the high end, 0 level
        inv_dz_up = np.where(level, 0.0, np.sign(seg.z1 - seg.z0) / np.where(level, 1.0, dz))
    bp = {
        "b": b, "bf": bf, "order": order, "used": used, "lev": lev, "level": level,
        "n_used": used.size, "ns": ns, "base": base, "face_start": face_start,
        "face_end": face_end, "relief": relief, "key": bf * key_scale + b,
        "key_scale": key_scale, "inv_dz_up": inv_dz_up,
    }
    seg._cache["bp"] = bp
    return bp


def _station_column(seg: Segments, bp: dict, ramp: np.ndarray | None, step: np.ndarray | None) -> np.ndarray:
    """One value per sorted breakpoint: the change of ramp rate at each station (``ramp``
    per segment, added at its start, subtracted at its end) or, with ``step``, the
    per-segment step at the level breakpoints (0 elsewhere)."""
    lev = bp["lev"]
    if step is not None:
        head = np.zeros(bp["n_used"])
        return np.concatenate([head, np.asarray(step, dtype=np.float64)[lev]])[bp["order"]]
    ns = bp["ns"]
    c_st = np.bincount(seg.start, weights=ramp, minlength=ns)
    c_st -= np.bincount(seg.start + 1, weights=ramp, minlength=ns)
    return np.concatenate([c_st[bp["used"]], np.zeros(lev.size)])[bp["order"]]


def _queries(seg: Segments, bp: dict, eta: np.ndarray) -> dict[str, np.ndarray]:
    """Per (face, stage) query: stage above the low point ``ev`` and the sorted
    breakpoint range ``[q_start, pos)`` strictly below it (cached for equal stages)."""
    cached = seg._cache.get("q")
    if cached is not None:
        eta_c, q = cached
        if eta_c.shape == eta.shape and np.array_equal(eta_c, eta, equal_nan=True):
            return q
    n_faces, n_st = eta.shape
    base = bp["base"]
    e = eta - base[:, None]
    ev = e.ravel()
    qf = np.repeat(np.arange(n_faces), n_st)
    b = bp["b"]
    e_clip = np.clip(np.where(np.isnan(ev), -1.0, ev), -1.0, bp["relief"][qf] + 1.0)
    ks = bp["key_scale"]
    pos = np.searchsorted(bp["key"], qf * ks + e_clip, side="left")
    q_start = bp["face_start"][qf]
    pos = _fix_positions(pos, b, e_clip, q_start, bp["face_end"][qf])
    q = {"ev": ev, "qf": qf, "pos": pos, "q_start": q_start}
    seg._cache["q"] = (np.array(eta, copy=True), q)
    return q


def ramp_sums(
    seg: Segments,
    weights: list[np.ndarray],
    stages: np.ndarray,
    *,
    integrate_first: bool = False,
) -> tuple[list[np.ndarray], np.ndarray | None]:
    """Sum over segments of ``w * wet fraction(eta)`` per face, for several weights.

    The wet fraction of a segment is 0 below its low end, 1 above its high end and
    linear between (a step at the mean elevation for level segments).  With
    ``integrate_first`` also returns the integral over eta (from the face's low point)
    of the first weight's sum; with ``weights[0] = ds`` that is the flow area.

    Parameters
    ----------
    seg : Segments
    weights : list of (n_segments,) arrays (amount contributed when fully wet)
    stages : (n_faces, n_stages) or (n_stages,)

    Returns
    -------
    (list of (n_faces, n_stages) arrays, integral or None).  NaN where the stage is NaN
    or the face has no valid segment.
    """
    eta = _stage_matrix(stages, seg.n_faces)
    chunks = _chunks(seg)
    if len(chunks) == 1:
        return _ramp_sums_chunk(seg, weights, eta, integrate_first)
    out = [np.full(eta.shape, np.nan) for _ in weights]
    integral = np.full(eta.shape, np.nan) if integrate_first else None
    for f0, f1, lo, hi, sub in chunks:
        vals, integ = _ramp_sums_chunk(
            sub, [np.asarray(w)[lo:hi] for w in weights], eta[f0:f1], integrate_first
        )
        for acc, v in zip(out, vals, strict=True):
            acc[f0:f1] = v
        if integral is not None:
            integral[f0:f1] = integ
    return out, integral


def _ramp_sums_chunk(
    seg: Segments, weights: list[np.ndarray], eta: np.ndarray, integrate_first: bool
) -> tuple[list[np.ndarray], np.ndarray | None]:
    # breakpoints at the stations: a ramp starts (+c) at its segment's low end and stops
    # (-c) at its high end; the contributions of a station's two segments are added, one
    # breakpoint per station.  A level segment steps (+w) at its mean elevation (one more
    # breakpoint each).  Sorted once per segment set (cached), located per stage matrix.
    n_faces, n_st = eta.shape
    bp = _breakpoints(seg)
    q = _queries(seg, bp, eta)
    b, ev, pos, q_start = bp["b"], q["ev"], q["pos"], q["q_start"]
    any_level = bool(bp["lev"].size)

    pref = np.empty(b.size + 1)
    pref[0] = 0.0

    def window_sum(column: np.ndarray) -> np.ndarray:
        np.cumsum(column, out=pref[1:])
        return pref[pos] - pref[q_start]

    results = []
    integral = None
    for i, w in enumerate(weights):
        w = np.asarray(w, dtype=np.float64)
        c = _station_column(seg, bp, w * bp["inv_dz_up"], None)
        sc = window_sum(c)
        cb = c * b
        scb = window_sum(cb)
        val = ev * sc
        val -= scb
        if any_level:
            d = _station_column(seg, bp, None, w)
            sd = window_sum(d)
            val += sd
        results.append(val)
        if i == 0 and integrate_first:
            cb *= b
            integral = ev * ev * sc
            integral -= 2.0 * ev * scb
            integral += window_sum(cb)
            integral *= 0.5
            if any_level:
                integral += ev * sd
                d *= b
                integral -= window_sum(d)
    bad = np.isnan(ev) | ~np.isfinite(seg.low)[q["qf"]]
    out = []
    for val in results:
        val = np.maximum(val, 0.0)
        val[bad] = np.nan
        out.append(val.reshape(n_faces, n_st))
    if integral is not None:
        integral = np.maximum(integral, 0.0)
        integral[bad] = np.nan
        integral = integral.reshape(n_faces, n_st)
    return out, integral


def face_stage_table(
    profiles: Profiles, stages: np.ndarray, *, z_to_xy: float = 1.0
) -> dict[str, np.ndarray]:
    """Flow area, wetted perimeter, top width and hydraulic radius per face and stage.

    Exact for the piecewise-linear profile (segments with a NaN end dropped).

    Parameters
    ----------
    profiles : Profiles
    stages : (n_faces, n_stages) or (n_stages,) array
        Water-surface elevations (vertical units); NaN gives NaN.
    z_to_xy : float
        Converts vertical to horizontal units for the wetted perimeter.

    Returns
    -------
    dict of (n_faces, n_stages) arrays: ``flow_area`` (horizontal x vertical units),
    ``wetted_perimeter``, ``top_width`` (horizontal units), ``hydraulic_radius``
    (A / P, NaN when dry).  NaN for faces without any valid segment.

    Examples
    --------
    >>> p = Profiles([0, 0, 0], [0.0, 1.0, 2.0], [1.0, 0.0, 1.0], 1)
    >>> t = face_stage_table(p, [0.5])
    >>> float(t["flow_area"][0, 0]), float(t["top_width"][0, 0])
    (0.25, 1.0)
    """
    seg = profile_segments(profiles, z_to_xy=z_to_xy)
    (top, perim), area = ramp_sums(seg, [seg.ds, seg.dl], stages, integrate_first=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        radius = np.where(perim > 0, area / np.where(perim > 0, perim, 1.0), np.nan)
    radius[np.isnan(area)] = np.nan
    return {
        "flow_area": area,
        "wetted_perimeter": perim,
        "top_width": top,
        "hydraulic_radius": radius,
    }


def face_profile_summary(profiles: Profiles) -> dict[str, np.ndarray]:
    """Per-face profile summary over the valid segments.

    Returns
    -------
    dict of (n_faces,) arrays: ``low_point``, ``high_point``, ``relief`` (high - low),
    ``mean_elevation`` (length-weighted mean of the piecewise-linear profile),
    ``covered_fraction`` (valid segment length / face length; 0 for a zero-length face;
    1 within 1e-6 of it, round-off).
    NaN elevations where a face has no valid segment.
    """
    seg = profile_segments(profiles)
    n = profiles.n_faces
    high = np.full(n, -np.inf)
    if seg.face.size:
        np.maximum.at(high, seg.face, seg.zhi)
    high[~np.isfinite(high)] = np.nan
    valid_len = np.bincount(seg.face, weights=seg.ds, minlength=n)
    mean_num = np.bincount(seg.face, weights=seg.ds * 0.5 * (seg.z0 + seg.z1), minlength=n)
    length = np.asarray(profiles.length, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(valid_len > 0, mean_num / np.where(valid_len > 0, valid_len, 1.0), np.nan)
        covered = np.where(length > 0, valid_len / np.where(length > 0, length, 1.0), 0.0)
    return {
        "low_point": seg.low,
        "high_point": high,
        "relief": high - seg.low,
        "mean_elevation": mean,
        # 1 within round-off, as the cells' (ntrans.tables.whole_within_round_off)
        "covered_fraction": np.where(covered >= 1.0 - 1e-6, 1.0, np.clip(covered, 0.0, 1.0)),
    }


def flat_face_table(
    flat_bed: np.ndarray, length: np.ndarray, stages: np.ndarray
) -> dict[str, np.ndarray]:
    """Stage table of flat faces (one bed elevation per face).

    Returns
    -------
    dict of (n_faces, n_stages) arrays: ``flat_depth`` h = (eta - z_f)+,
    ``flat_flow_area`` = L h, ``flat_wetted_perimeter`` = ``flat_top_width`` = L where
    wet (0 dry), ``flat_hydraulic_radius`` = h (0 dry).  NaN where the stage or the
    bed is NaN.
    """
    bed = np.asarray(flat_bed, dtype=np.float64).ravel()
    length = np.asarray(length, dtype=np.float64).ravel()
    eta = _stage_matrix(stages, bed.size)
    h = np.maximum(eta - bed[:, None], 0.0)
    h[np.isnan(eta) | np.isnan(bed)[:, None]] = np.nan
    wet_len = np.where(h > 0, length[:, None], 0.0)
    wet_len[np.isnan(h)] = np.nan
    return {
        "flat_depth": h,
        "flat_flow_area": length[:, None] * h,
        "flat_wetted_perimeter": wet_len,
        "flat_top_width": wet_len.copy(),
        "flat_hydraulic_radius": h.copy(),
    }


def face_flat_bed(
    rule: FaceRule,
    cell_flat_a: np.ndarray,
    cell_flat_b: np.ndarray,
    summary: dict[str, np.ndarray] | None = None,
) -> np.ndarray:
    """Bed elevation of flat faces from the adjacent flat cell elevations.

    Parameters
    ----------
    rule : {"higher", "mean", "min", "profile_mean"}
        ``higher`` (default in the product): the higher of the two cells; ``mean``,
        ``min`` of the two; ``profile_mean``: the face profile's mean elevation
        (``summary["mean_elevation"]``).  A side without a flat elevation (NaN: a
        boundary face's missing cell, or a cell the elevation rule gave no value) is
        left out: the face takes the other cell's elevation under ``higher``, ``mean``
        and ``min``, and is NaN when neither side has one.
    cell_flat_a, cell_flat_b : (n_faces,) arrays
    summary : output of :func:`face_profile_summary` (for ``profile_mean``)
    """
    za = np.asarray(cell_flat_a, dtype=np.float64).ravel()
    zb = np.asarray(cell_flat_b, dtype=np.float64).ravel()
    zb = np.where(np.isnan(zb), za, zb)
    za = np.where(np.isnan(za), zb, za)
    if rule == "higher":
        return np.fmax(za, zb)
    if rule == "mean":
        return 0.5 * (za + zb)
    if rule == "min":
        return np.fmin(za, zb)
    if rule == "profile_mean":
        if summary is None:
            raise InputError("face rule 'profile_mean' needs the face profile summary; pass summary=")
        return np.asarray(summary["mean_elevation"], dtype=np.float64).copy()
    raise InputError(f"face rule {rule!r} is not one of {', '.join(FACE_RULES)}; pick one of them")
