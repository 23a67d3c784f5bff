"""Faces from cell polygons: the lines two neighbouring cells share, and the mesh boundary.

A *face* is one connected line shared by two cells (``cell_a < cell_b``, local cell
indices), or one connected piece of a cell's boundary that no other cell shares
(``cell_b == -1``).  A border in two disjoint pieces gives two faces; cells that touch
only at a corner share no face.

Real meshes are rarely exact: neighbours may not share vertices (one side's edge is
split, the other not), there may be gaps or overlaps, slivers, multi-part borders and
holes.  Everything within ``snap_tolerance`` (CRS units) of a neighbour counts as
shared.  Face end points are accurate to about ``snap_tolerance``; the face geometry is
taken from one of the two cell boundaries (chosen by the cells' centroids, so it does not
depend on the input order).

Method (vectorised over cell pairs with shapely 2): candidate pairs from an STRtree
``dwithin`` query.  Pairs of *conforming* cells (every ring edge shared exactly, same two
vertices, with one other cell, and every neighbour within tolerance sharing such an
edge) take their shared border straight from the matched edges, chained in numpy (the
common case for generated meshes, and much cheaper).  For every other pair (p, q), the
part of p's boundary inside the buffer of q, merged into lines and split into connected
parts; the ``snap_tolerance``
over-reach at each open end (where p's boundary leaves q's buffer) is trimmed off in
numpy; pieces shorter than ``3 * snap_tolerance`` (corner contacts) are dropped.  A
cell's boundary faces are its boundary minus its shared parts.

Memory: the neighbour pairs, the centroid order and the coordinate scale are found once
for all cells; everything else runs in spatial blocks of ``block_cells`` cells, each with
its neighbours two rings out (a cell is judged conforming from all of its neighbours, so
every neighbour of a block cell must see all of its own).  A block keeps the faces whose
``cell_a`` is one of its cells.  Every step is computed per pair, per cell or per line
(never from sums over other lines), so the faces are the same to the bit for any block
size.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import numpy as np
import shapely

from .errors import GeometryError, InputError

logger = logging.getLogger(__name__)

__all__ = ["BorderGaps", "Faces", "border_gaps", "build_faces"]

_LINESTRING = 1
_POLYGON = 3
_MULTIPOLYGON = 6


@dataclass
class Faces:
    """Faces of a mesh, in a deterministic order.

    Attributes
    ----------
    geometry : ndarray of shapely.LineString
        The face line (CRS units).  Open lines start at their lexicographically smaller
        end (x, then y).  With ``build_faces(..., lines_as_wkb=True)``: their WKB (bytes).
    cell_a, cell_b : ndarray of int64
        Local cell indices (positions in the input polygon array), ``cell_a < cell_b``;
        ``cell_b == -1`` for a boundary face.
    length : ndarray of float64
        Length of each face (CRS units).
    bounds : (n_faces, 4) ndarray of float64 or None
        ``xmin, ymin, xmax, ymax`` of each face (:func:`build_faces` sets it).
    has_z : bool
        Whether any face line has z coordinates.
    """

    geometry: np.ndarray
    cell_a: np.ndarray
    cell_b: np.ndarray
    length: np.ndarray
    bounds: np.ndarray | None = None
    has_z: bool = False

    @property
    def n_faces(self) -> int:
        """Number of faces."""
        return int(self.cell_a.size)

    @property
    def is_boundary(self) -> np.ndarray:
        """Boolean mask of boundary faces (``cell_b == -1``)."""
        return self.cell_b < 0

    def __len__(self) -> int:
        return self.n_faces


def _empty_faces() -> Faces:
    return Faces(
        geometry=np.empty(0, dtype=object),
        cell_a=np.empty(0, dtype=np.int64),
        cell_b=np.empty(0, dtype=np.int64),
        length=np.empty(0, dtype=np.float64),
        bounds=np.empty((0, 4)),
    )


def is_valid(geoms: np.ndarray) -> np.ndarray:
    """``shapely.is_valid`` without the warnings filter shapely sets around it.

    shapely silences GEOS's messages with ``warnings.catch_warnings()``, which is not
    thread-safe: two threads testing at once can leave every warning of the process
    ignored (the job's cautions among them).  The GEOS test itself warns of nothing.
    """
    return shapely.lib.is_valid(geoms)


def _check_polygons(polygons: object) -> np.ndarray:
    geoms = np.asarray(polygons, dtype=object).ravel()
    if geoms.size == 0:
        return geoms
    types = shapely.get_type_id(geoms)
    bad = ~np.isin(types, (_POLYGON, _MULTIPOLYGON)) | shapely.is_empty(geoms)
    if np.any(bad):
        first = int(np.flatnonzero(bad)[0])
        raise GeometryError(
            f"{int(bad.sum())} cell geometries are empty or not polygons (first at position "
            f"{first}); give one non-empty Polygon or MultiPolygon per cell"
        )
    invalid = ~is_valid(geoms)
    if np.any(invalid):
        first = int(np.flatnonzero(invalid)[0])
        raise GeometryError(
            f"{int(invalid.sum())} cell polygons are invalid (first at position {first}); "
            "repair them (e.g. shapely.make_valid) before building faces"
        )
    return geoms


def _explode_lines(geoms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Merge each geometry's linear parts and explode them: (lines, source index)."""
    merged = shapely.line_merge(geoms)
    parts, index = shapely.get_parts(merged, return_index=True)
    linear = shapely.get_type_id(parts) == _LINESTRING
    linear &= ~shapely.is_empty(parts)
    return parts[linear], index[linear].astype(np.int64)


def _segment_cumsum(values: np.ndarray, idx: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Running sum of ``values`` within each line (vertices of line ``i`` are where ``idx == i``,
    contiguous, in order).

    Each line's sums are computed from its own values only (a padded row per line, lines
    grouped by vertex count in powers of two), so they do not depend on which other lines
    are processed with it, to the bit.
    """
    out = np.empty(values.size)
    if values.size == 0:
        return out
    start = np.cumsum(n) - n
    pos = np.arange(values.size) - start[idx]
    width_class = np.ceil(np.log2(np.maximum(n, 1))).astype(np.int64)
    vclass = width_class[idx]
    for c in np.unique(width_class[n > 0]):
        rows = np.flatnonzero((width_class == c) & (n > 0))
        verts = np.flatnonzero(vclass == c)
        row_of = np.searchsorted(rows, idx[verts])
        m = np.zeros((rows.size, int(n[rows].max())))
        m[row_of, pos[verts]] = values[verts]
        np.cumsum(m, axis=1, out=m)
        out[verts] = m[row_of, pos[verts]]
    return out


def _trim_open_ends(
    lines: np.ndarray, tol: float, min_length: float, *, corner_cap: float = 6.0
) -> tuple[np.ndarray, np.ndarray]:
    """Cut the over-reach off both ends of every open shared part.

    An open part ends where one cell's boundary leaves the neighbour's buffer, i.e. it
    reaches past the true end of the shared border (the corner where the two boundaries
    part).  At each end: if the nearest interior vertex is a corner (direction turns by
    more than 30 degrees) within ``corner_cap * tol``, cut back to it (exact for acute
    junctions, where the over-reach is ``tol / sin(angle)``); otherwise cut ``tol`` (exact
    where the border continues straight or turns at 90 degrees or more).  Closed lines
    (rings) are kept whole.  Returns (new lines, kept mask over input).
    """
    if lines.size == 0:
        return lines, np.zeros(0, dtype=bool)
    closed = shapely.is_closed(lines)
    out = lines.copy()
    keep = shapely.length(lines) >= min_length
    sel = np.flatnonzero(keep & ~closed)
    if sel.size == 0:
        return out[keep], keep
    coords, idx = shapely.get_coordinates(lines[sel], return_index=True)
    n = np.bincount(idx, minlength=sel.size)
    start = np.cumsum(n) - n  # first vertex of each line
    last = start + n - 1
    seg = np.zeros(coords.shape[0])
    seg[1:] = np.hypot(*(coords[1:] - coords[:-1]).T)
    seg[start] = 0.0  # no length across line boundaries
    dist = _segment_cumsum(seg, idx, n)  # along each line, nondecreasing within it
    d0 = dist[start]
    d_end = dist[last]

    def _corner_trim(v: np.ndarray, before: np.ndarray, after: np.ndarray) -> np.ndarray:
        u1 = coords[v] - coords[before]
        u2 = coords[after] - coords[v]
        n1 = np.hypot(*u1.T)
        n2 = np.hypot(*u2.T)
        with np.errstate(invalid="ignore", divide="ignore"):
            cos_turn = np.einsum("ij,ij->i", u1, u2) / (n1 * n2)
        return np.where((n >= 3) & (cos_turn < np.cos(np.radians(30.0))), 1.0, 0.0)

    v_s = np.minimum(start + 1, last)
    v_e = np.maximum(last - 1, start)
    corner_s = _corner_trim(v_s, start, np.minimum(start + 2, last)) > 0
    corner_e = _corner_trim(v_e, np.maximum(last - 2, start), last) > 0
    ds_v = dist[v_s] - d0
    de_v = d_end - dist[v_e]
    trim_s = np.where(corner_s & (ds_v <= corner_cap * tol), ds_v, tol)
    trim_e = np.where(corner_e & (de_v <= corner_cap * tol), de_v, tol)
    ok = d_end - d0 - trim_s - trim_e >= min_length
    keep[sel[~ok]] = False
    if not np.any(ok):
        return out[keep], keep
    a = d0 + trim_s
    b = d_end - trim_e
    # first vertex strictly beyond a, first vertex at or beyond b (inside the line)
    ka = start + np.bincount(idx[dist <= a[idx]], minlength=sel.size)
    kb = start + np.bincount(idx[dist < b[idx]], minlength=sel.size)
    ka = np.clip(ka, start + 1, last)
    kb = np.clip(kb, ka, last)

    def _interp(k: np.ndarray, target: np.ndarray) -> np.ndarray:
        d_lo, d_hi = dist[k - 1], dist[k]
        span = np.where(d_hi > d_lo, d_hi - d_lo, 1.0)
        t = np.clip((target - d_lo) / span, 0.0, 1.0)[:, None]
        return coords[k - 1] + t * (coords[k] - coords[k - 1])

    p_start = _interp(ka, a)
    p_end = _interp(kb, b)
    inner = kb - ka  # vertices strictly between the new ends
    count = inner + 2
    offset = np.cumsum(count) - count
    total = int(count.sum())
    new = np.empty((total, 2))
    owner = np.repeat(np.arange(sel.size), count)
    pos = np.arange(total) - offset[owner]
    src = ka[owner] + pos - 1
    mid = (pos > 0) & (pos < count[owner] - 1)
    new[mid] = coords[src[mid]]
    new[offset] = p_start
    new[offset + count - 1] = p_end
    lines_new = shapely.linestrings(new, indices=owner)
    out[sel[ok]] = lines_new[ok]
    return out[keep], keep


def _orient(lines: np.ndarray) -> np.ndarray:
    """Reverse open lines whose end is lexicographically (x, y) before their start."""
    if lines.size == 0:
        return lines
    coords, idx = shapely.get_coordinates(lines, return_index=True)
    n = np.bincount(idx, minlength=lines.size)
    first = np.cumsum(n) - n
    last = first + n - 1
    xs, ys = coords[first].T
    xe, ye = coords[last].T
    rev = ~shapely.is_closed(lines) & ((xe < xs) | ((xe == xs) & (ye < ys)))
    if not np.any(rev):
        return lines
    perm = np.arange(coords.shape[0])
    r = rev[idx]
    perm[r] = first[idx[r]] + last[idx[r]] - perm[r]
    out = lines.copy()
    sel = np.flatnonzero(rev)
    keep_v = rev[idx]
    sub_idx = np.searchsorted(sel, idx[keep_v])
    out[sel] = shapely.linestrings(coords[perm][keep_v], indices=sub_idx)
    return out


def _intersection_threaded(a: np.ndarray, b: np.ndarray, *, chunk: int = 20_000) -> np.ndarray:
    """``shapely.intersection(a, b)`` in chunks on a thread pool (GEOS releases the GIL)."""
    if a.size <= chunk:
        return shapely.intersection(a, b)
    starts = range(0, a.size, chunk)
    workers = max(1, min(len(starts), os.cpu_count() or 1))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        out = list(pool.map(lambda s: shapely.intersection(a[s : s + chunk], b[s : s + chunk]), starts))
    return np.concatenate(out)


def _shared_parts(
    boundary: np.ndarray, buffered: np.ndarray, p: np.ndarray, q: np.ndarray, tol: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Connected parts of p's boundary shared with q: (lines, p, q) per part."""
    if p.size == 0:
        empty = np.empty(0, dtype=np.int64)
        return np.empty(0, dtype=object), empty, empty.copy()
    raw = _intersection_threaded(boundary[p], buffered[q])
    parts, row = _explode_lines(raw)
    parts, kept = _trim_open_ends(parts, tol, 3.0 * tol)
    row = row[kept]
    return parts, p[row], q[row]


def _exact_shared(
    geoms: np.ndarray, p: np.ndarray, q: np.ndarray, rank: np.ndarray, min_length: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Shared borders of conforming neighbours, found by matching identical edges.

    A cell is *conforming* when every edge of its rings is also an edge (same two
    vertices, exactly) of exactly one other cell, it has no zero-length edge, and every
    neighbour within the snap tolerance shares at least one such edge with it (so no
    corner contact, gap or sliver).  For a pair of conforming cells the shared border is
    exactly the chain of their common edges, which is what the buffer intersection
    returns for them; it is taken from the boundary of the cell first in centroid order.
    Returns ``(lines, cell p, cell q, handled)``, ``handled`` a mask over the pairs.
    """
    n_cells = geoms.size
    handled = np.zeros(p.size, dtype=bool)
    none = (np.empty(0, dtype=object), np.empty(0, dtype=np.int64), np.empty(0, dtype=np.int64))
    parts, part_cell = shapely.get_parts(geoms, return_index=True)
    rings, ring_part = shapely.get_rings(parts, return_index=True)
    if rings.size == 0:
        return (*none, handled)
    ring_cell = part_cell[ring_part].astype(np.int64)
    coords, cring = shapely.get_coordinates(rings, return_index=True)
    cring = cring.astype(np.int64)
    nc = coords.shape[0]
    e = np.flatnonzero(cring[1:] == cring[:-1])  # edge k: coordinate k -> k + 1
    ecell = ring_cell[cring[e]]
    zero = (coords[e, 0] == coords[e + 1, 0]) & (coords[e, 1] == coords[e + 1, 1])
    bad_cell = np.zeros(n_cells, dtype=bool)
    bad_cell[ecell[zero]] = True
    _, vid = np.unique(coords[:, 0] + 1j * coords[:, 1], return_inverse=True)
    vid = vid.astype(np.int64).ravel()
    v0, v1 = vid[e], vid[e + 1]
    key = np.minimum(v0, v1) * np.int64(nc) + np.maximum(v0, v1)
    order = np.argsort(key, kind="stable")
    ks = key[order]
    new = np.ones(ks.size, dtype=bool)
    new[1:] = ks[1:] != ks[:-1]
    gid = np.cumsum(new) - 1
    gsize = np.bincount(gid)
    size = gsize[gid]
    # orphan edges (mesh boundary, unmatched vertices) or edges used more than twice
    bad_cell[ecell[order[size != 2]]] = True
    pair_first = np.flatnonzero(new & (size == 2))
    ea, eb = order[pair_first], order[pair_first + 1]
    ca, cb = ecell[ea], ecell[eb]
    bad_cell[ca[ca == cb]] = True
    # every tolerance neighbour must share an exact edge
    lo, hi = np.minimum(ca, cb), np.maximum(ca, cb)
    adj = np.unique(lo * np.int64(n_cells) + hi)
    pk = np.minimum(p, q) * np.int64(n_cells) + np.maximum(p, q)
    pos = np.clip(np.searchsorted(adj, pk), 0, max(adj.size - 1, 0))
    matched = (adj[pos] == pk) if adj.size else np.zeros(p.size, dtype=bool)
    bad_cell[p[~matched]] = True
    bad_cell[q[~matched]] = True
    good = ~bad_cell
    handled = good[p] & good[q]
    keep = good[ca] & good[cb] & (ca != cb)
    ea, eb, ca, cb = ea[keep], eb[keep], ca[keep], cb[keep]
    if ea.size == 0:
        return (*none, handled)
    # the edge of the owner (first in centroid order), labelled with the partner
    a_owns = rank[ca] < rank[cb]
    k = e[np.where(a_owns, ea, eb)]
    owner = np.where(a_owns, ca, cb)
    partner = np.where(a_owns, cb, ca)
    o = np.argsort(partner * np.int64(nc) + k, kind="stable")
    k, owner, partner = k[o], owner[o], partner[o]
    start_run = np.ones(k.size, dtype=bool)
    start_run[1:] = (partner[1:] != partner[:-1]) | (k[1:] != k[:-1] + 1)
    run = np.cumsum(start_run) - 1
    n_run = int(run[-1]) + 1
    run_first = k[start_run]
    run_last = k[np.r_[np.flatnonzero(start_run)[1:] - 1, k.size - 1]]
    # a run through the ring's closing vertex continues at the ring's first edge
    ring_start = np.searchsorted(cring, np.arange(rings.size), side="left")
    ring_last_edge = np.searchsorted(cring, np.arange(rings.size), side="right") - 2
    r_ring = cring[run_first]
    r_partner = partner[start_run]
    at_end = run_last == ring_last_edge[r_ring]
    at_start = run_first == ring_start[r_ring]
    sort_k = k.astype(np.float64)
    if np.any(at_end & ~at_start):
        # pair each ring-end run with the ring-start run of the same partner and ring
        ends = np.flatnonzero(at_end & ~at_start)
        starts = np.flatnonzero(at_start & ~at_end)
        skey = r_ring[starts] * np.int64(n_cells) + r_partner[starts]
        so = np.argsort(skey)
        ekey = r_ring[ends] * np.int64(n_cells) + r_partner[ends]
        j = np.clip(np.searchsorted(skey[so], ekey), 0, max(starts.size - 1, 0))
        ok = starts.size > 0
        if ok:
            hit = skey[so][j] == ekey
            src = starts[so][j[hit]]
            dst = ends[hit]
            remap = np.arange(n_run)
            remap[src] = dst
            moved = np.isin(run, src)
            sort_k[moved] += float(nc)  # after the end run's edges
            run = remap[run]
    o = np.lexsort((sort_k, run))
    k, run, owner, partner = k[o], run[o], owner[o], partner[o]
    _, run = np.unique(run, return_inverse=True)
    run = run.ravel()
    last_of_run = np.r_[run[1:] != run[:-1], True]
    # vertices: each edge's start, plus the end of the run's last edge
    rep = 1 + last_of_run.astype(np.int64)
    idx_v = np.repeat(k, rep)
    extra = np.cumsum(rep) - 1  # position of the appended end vertex
    idx_v[extra[last_of_run]] = k[last_of_run] + 1
    lines = shapely.linestrings(coords[idx_v], indices=np.repeat(run, rep))
    first = np.r_[True, run[1:] != run[:-1]]
    r_owner, r_partner = owner[first], partner[first]
    # short shared pieces (near corner contacts) are left to the buffer method, which
    # trims them the same way as every other non-conforming piece
    short = shapely.length(lines) < 2.0 * min_length
    if short.any():
        lo_s = np.minimum(r_owner[short], r_partner[short])
        hi_s = np.maximum(r_owner[short], r_partner[short])
        short_keys = np.unique(lo_s * np.int64(n_cells) + hi_s)
        handled &= ~np.isin(pk, short_keys)
        rk = np.minimum(r_owner, r_partner) * np.int64(n_cells) + np.maximum(r_owner, r_partner)
        keep_run = ~np.isin(rk, short_keys)
        lines, r_owner, r_partner = lines[keep_run], r_owner[keep_run], r_partner[keep_run]
    return lines, r_owner, r_partner, handled


def _split_at_corners(lines: np.ndarray, max_turn: float) -> tuple[np.ndarray, np.ndarray]:
    """Split lines at vertices where the direction turns by more than ``max_turn`` degrees.

    Closed lines with a corner are first rotated to start at one.  Returns
    (pieces, index of the source line).
    """
    if lines.size == 0:
        return lines, np.zeros(0, dtype=np.int64)
    coords, idx = shapely.get_coordinates(lines, return_index=True)
    idx = idx.astype(np.int64)
    n = np.bincount(idx, minlength=lines.size)
    first = np.cumsum(n) - n
    last = first + n - 1
    closed = shapely.is_closed(lines)
    ar = np.arange(coords.shape[0])
    pos = ar - first[idx]
    c_idx = closed[idx]
    has_prev = (pos > 0) | (c_idx & (n[idx] > 3))
    has_next = (pos < n[idx] - 1) | (c_idx & (n[idx] > 3))
    prev = np.where(pos > 0, ar - 1, last[idx] - 1)
    nxt = np.where(pos < n[idx] - 1, ar + 1, first[idx] + 1)
    prev = np.clip(prev, 0, coords.shape[0] - 1)
    nxt = np.clip(nxt, 0, coords.shape[0] - 1)
    u1 = coords - coords[prev]
    u2 = coords[nxt] - coords
    with np.errstate(invalid="ignore", divide="ignore"):
        cos_turn = np.einsum("ij,ij->i", u1, u2) / (np.hypot(*u1.T) * np.hypot(*u2.T))
    corner = has_prev & has_next & (cos_turn < np.cos(np.radians(max_turn)))
    corner &= ~(c_idx & (pos == n[idx] - 1))  # the closing copy of a ring
    # rotate rings with a corner so they start (and end) at their first corner
    ring_corner = np.zeros(lines.size, dtype=bool)
    shift = np.zeros(lines.size, dtype=np.int64)
    cpos = np.flatnonzero(corner & c_idx)
    if cpos.size:
        owner = idx[cpos]
        firsts = np.unique(owner, return_index=True)
        ring_corner[firsts[0]] = True
        shift[firsts[0]] = pos[cpos[firsts[1]]]
    rot = ring_corner[idx]
    if rot.any():
        m = n[idx] - 1  # ring vertices without the closing copy
        src_pos = np.where(pos == n[idx] - 1, shift[idx], (pos + shift[idx]) % np.maximum(m, 1))
        src = np.where(rot, first[idx] + src_pos, ar)
        coords = coords[src]
        corner = corner[src]
        corner[rot & ((pos == 0) | (pos == n[idx] - 1))] = False
    corner &= (pos > 0) & (pos < n[idx] - 1)
    rep = 1 + corner.astype(np.int64)
    out = np.repeat(coords, rep, axis=0)
    src_line = np.repeat(idx, rep)
    inc = np.zeros(out.shape[0], dtype=np.int64)
    start_out = np.cumsum(rep) - rep
    inc[start_out[pos == 0]] = 1
    inc[start_out[corner] + 1] = 1
    piece = np.cumsum(inc) - 1
    pieces = shapely.linestrings(out, indices=piece)
    piece_src = np.zeros(pieces.size, dtype=np.int64)
    piece_src[piece] = src_line
    return pieces, piece_src


def _near_pairs(geoms: np.ndarray, tol: float, chunk: int) -> tuple[np.ndarray, np.ndarray]:
    """All ordered pairs ``(p, q)``, ``p != q``, of cells within ``tol``, sorted by (p, q).

    Each unordered pair is tested once (``dwithin`` of the lower index against the
    higher), so the pairs are symmetric.
    """
    n = geoms.size
    tree = shapely.STRtree(geoms)
    keys = []
    for s in range(0, n, chunk):
        # boxes grown by 2 tol (a margin over tol, so that rounding cannot hide a pair
        # from the query of its lower index), then the exact distance test on those
        # candidates (cheaper than the tree's own dwithin predicate)
        box = shapely.bounds(geoms[s : s + chunk])
        box[:, :2] -= 2.0 * tol
        box[:, 2:] += 2.0 * tol
        p, q = tree.query(shapely.box(box[:, 0], box[:, 1], box[:, 2], box[:, 3]))
        p = p.astype(np.int64) + s
        q = q.astype(np.int64)
        up = q > p
        p, q = p[up], q[up]
        near = shapely.dwithin(geoms[p], geoms[q], tol)
        keys.append(p[near] * np.int64(n) + q[near])
    lo_hi = np.sort(np.concatenate(keys))
    del keys
    lo, hi = np.divmod(lo_hi, n)
    hi_lo = np.sort(hi * np.int64(n) + lo)
    del lo, hi
    # both halves are sorted: the stable sort (timsort) merges them
    return np.divmod(np.sort(np.concatenate([lo_hi, hi_lo]), kind="stable"), n)


def _centroids(geoms: np.ndarray, chunk: int) -> np.ndarray:
    """Centroid coordinates, shape (n, 2), computed in chunks."""
    out = np.empty((geoms.size, 2))
    for s in range(0, geoms.size, chunk):
        out[s : s + chunk] = shapely.get_coordinates(shapely.centroid(geoms[s : s + chunk]))
    return out


def _blocks(cent: np.ndarray, rank: np.ndarray, block_cells: int) -> list[np.ndarray]:
    """Split cells into spatial blocks of at most ``block_cells`` (sorted cell indices each).

    Strips of equal count in centroid x order, each cut into runs of equal count in
    centroid y order; the number of strips follows the extent's aspect ratio, so blocks
    are roughly square.
    """
    n = cent.shape[0]
    n_blocks = -(-n // block_cells)
    if n_blocks <= 1:
        return [np.arange(n)]
    width, height = np.ptp(cent, axis=0)
    ratio = width / height if height > 0 else float(n_blocks)
    n_strips = int(np.clip(np.rint(np.sqrt(n_blocks * ratio)), 1, n_blocks))
    by_x = np.empty(n, dtype=np.int64)
    by_x[rank] = np.arange(n)  # cells in (x, y) centroid order
    blocks = []
    for strip in np.array_split(by_x, n_strips):
        strip = strip[np.lexsort((cent[strip, 0], cent[strip, 1]))]
        for block in np.array_split(strip, -(-strip.size // block_cells)):
            blocks.append(np.sort(block))
    return blocks


def _gather(indptr: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """Positions, in the (p, q)-sorted pair arrays, of the pairs whose p is in ``cells``."""
    lo = indptr[cells]
    cnt = indptr[cells + 1] - lo
    total = int(cnt.sum())
    return np.repeat(lo - (np.cumsum(cnt) - cnt), cnt) + np.arange(total)


def _block_faces(
    geoms: np.ndarray,
    p: np.ndarray,
    q: np.ndarray,
    rank: np.ndarray,
    core: np.ndarray,
    tol: float,
    eps: float,
    boundary_corner_angle: float | None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Faces of the cells of one block, with local indices: (lines, cell_a, cell_b).

    ``geoms`` are the block's cells and their neighbours two rings out (so every cell of
    the block and every neighbour of it sees all of its own neighbours), ``p, q`` all
    pairs within ``tol`` among them, ``rank`` their global centroid order, ``core`` the
    mask of the block's own cells.  Only faces whose ``cell_a`` is in the core are
    returned; local indices must increase with the global ones.
    """
    n_cells = geoms.size
    min_length = 3.0 * tol
    core_idx = np.flatnonzero(core)
    boundary = np.full(n_cells, None, dtype=object)
    buffered = np.full(n_cells, None, dtype=object)

    def _fill(store: np.ndarray, cells: np.ndarray, make) -> np.ndarray:
        todo = np.unique(cells)
        todo = todo[shapely.is_missing(store[todo])]
        if todo.size:
            store[todo] = make(geoms[todo])
        return store

    def _boundary(cells: np.ndarray) -> np.ndarray:
        return _fill(boundary, cells, shapely.boundary)

    def _buffered(cells: np.ndarray) -> np.ndarray:
        return _fill(buffered, cells, lambda g: shapely.buffer(g, tol, quad_segs=4))

    # interior faces: for each neighbour pair, the shared part of the boundary of the
    # cell that comes first in centroid order (so the result does not depend on input order).
    # Conforming pairs (identical shared edges, nothing else within tol) by edge matching,
    # the others by intersecting one boundary with the other cell's buffer.  Pairs with no
    # cell in the core are not needed (neither for the faces kept nor for the boundary).
    canon = rank[p] < rank[q]
    exact_parts, exact_p, exact_q, handled = _exact_shared(geoms, p, q, rank, min_length)
    slow = canon & ~handled & (core[p] | core[q])
    ps, qs = p[slow], q[slow]
    parts, part_p, part_q = _shared_parts(_boundary(ps), _buffered(qs), ps, qs, tol)
    parts = np.concatenate([exact_parts, parts])
    part_p = np.concatenate([exact_p, part_p])
    part_q = np.concatenate([exact_q, part_q])
    in_a = np.minimum(part_p, part_q)
    in_b = np.maximum(part_p, part_q)
    kept = core[in_a]
    in_geom, in_a, in_b = parts[kept], in_a[kept], in_b[kept]

    # boundary faces (core cells only): a cell's boundary minus its own shared parts.
    # Cells whose faces (measured from either side) cover their perimeter have none; for
    # the others the shared parts on their own side are computed too.
    perimeter = np.zeros(n_cells)
    perimeter[core_idx] = shapely.length(_boundary(core_idx)[core_idx])
    plen = shapely.length(parts)
    covered = np.bincount(part_p, weights=plen, minlength=n_cells)
    covered += np.bincount(part_q, weights=plen, minlength=n_cells)
    cand = core_idx[perimeter[core_idx] - covered[core_idx] >= 0.5 * min_length]
    if cand.size:
        rev = ~canon & np.isin(p, cand)
        r_parts, r_p, _ = _shared_parts(boundary, _buffered(q[rev]), p[rev], q[rev], tol)
        own = np.isin(part_p, cand)
        parts = np.concatenate([parts[own], r_parts])
        part_p = np.concatenate([part_p[own], r_p])
        shared_len = np.bincount(part_p, weights=shapely.length(parts), minlength=n_cells)
        cand = cand[perimeter[cand] - shared_len[cand] >= min_length]
    bd_geom = np.empty(0, dtype=object)
    bd_a = np.empty(0, dtype=np.int64)
    if cand.size:
        rest = boundary[cand].copy()
        has = np.flatnonzero(np.isin(part_p, cand))
        if has.size:
            has = has[np.argsort(part_p[has], kind="stable")]
            owners, local = np.unique(part_p[has], return_inverse=True)
            removed = shapely.multilinestrings(parts[has], indices=local)
            pos = np.searchsorted(cand, owners)
            rest[pos] = shapely.difference(
                rest[pos], shapely.buffer(removed, eps, quad_segs=2)
            )
        pieces, src = _explode_lines(rest)
        if boundary_corner_angle is not None:
            pieces, sub = _split_at_corners(pieces, float(boundary_corner_angle))
            src = src[sub]
        good = shapely.length(pieces) >= min_length
        bd_geom = pieces[good]
        bd_a = cand[src[good]]
    return (
        np.concatenate([in_geom, bd_geom]),
        np.concatenate([in_a, bd_a]).astype(np.int64),
        np.concatenate([in_b, np.full(bd_a.size, -1, dtype=np.int64)]),
    )


def _check_block_cells(block_cells: object) -> int | None:
    ok = block_cells is None or (
        isinstance(block_cells, int | np.integer)
        and not isinstance(block_cells, bool | np.bool_)
        and block_cells > 0
    )
    if not ok:
        raise InputError(
            f"block_cells must be a positive whole number of cells or None, got {block_cells!r}"
        )
    return None if block_cells is None else int(block_cells)


@dataclass
class _BlockJob:
    """One block of :func:`build_faces`: its cells with two rings of neighbours.

    ``geoms`` are shapely polygons, or their WKB when ``wkb`` (as the job travels):
    :func:`run_block_job` decodes them, a Dask scheduler forwarding the job does not.
    """

    geoms: np.ndarray
    p: np.ndarray
    q: np.ndarray
    rank: np.ndarray
    core: np.ndarray
    cells: np.ndarray  # global index of each local cell
    tol: float
    eps: float
    corner_angle: float | None
    wkb: bool = False

    def __reduce__(self):
        # geometry travels as WKB, converted for the whole array at once
        wkb = self.geoms if self.wkb else shapely.to_wkb(self.geoms)
        return (_BlockJob, (wkb, self.p, self.q, self.rank, self.core, self.cells, self.tol,
                            self.eps, self.corner_angle, True))


class _BlockResult:
    """Faces of one block, global cell indices, their end points (x0, y0, x1, y1),
    lengths and bounds (taken where the lines were made).

    The lines travel as WKB and are decoded only if ``geometry`` is used, so a job that
    keeps WKB (``build_faces(..., lines_as_wkb=True)``) takes a worker's bytes as they are.
    """

    def __init__(self, geometry: np.ndarray | None, cell_a: np.ndarray, cell_b: np.ndarray,
                 ends: np.ndarray, length: np.ndarray, bounds: np.ndarray, has_z: bool,
                 wkb: np.ndarray | None = None) -> None:
        self._geometry, self._wkb = geometry, wkb
        self.cell_a, self.cell_b, self.ends = cell_a, cell_b, ends
        self.length, self.bounds, self.has_z = length, bounds, has_z

    @property
    def geometry(self) -> np.ndarray:
        if self._geometry is None:
            self._geometry = shapely.from_wkb(self._wkb)
        return self._geometry

    @property
    def wkb(self) -> np.ndarray:
        if self._wkb is None:
            self._wkb = shapely.to_wkb(self._geometry)
        return self._wkb

    def __reduce__(self):
        return (_block_result_from_wkb, (self.wkb, self.cell_a, self.cell_b, self.ends,
                                         self.length, self.bounds, self.has_z))


def _block_result_from_wkb(wkb, cell_a, cell_b, ends, length, bounds, has_z) -> _BlockResult:
    return _BlockResult(None, cell_a, cell_b, ends, length, bounds, has_z, wkb=wkb)


class _Sized:
    """An iterator that knows how many items it yields (``len``)."""

    def __init__(self, items: Iterator[Any], size: int) -> None:
        self._items, self._size = items, int(size)

    def __len__(self) -> int:
        return self._size

    def __iter__(self) -> Iterator[Any]:
        return self._items


def run_block_job(job: _BlockJob) -> _BlockResult:
    """Faces of one block of :func:`build_faces` (pure; runs anywhere)."""
    geoms = shapely.from_wkb(job.geoms) if job.wkb else job.geoms
    geom, a, b = _block_faces(geoms, job.p, job.q, job.rank, job.core, job.tol, job.eps,
                              job.corner_angle)
    geom = _orient(geom)
    ctx = job.cells
    coords, idx = shapely.get_coordinates(geom, return_index=True)
    n = np.bincount(idx, minlength=geom.size)
    last = np.cumsum(n) - 1
    ends = np.hstack([coords[last - n + 1], coords[last]]) if geom.size else np.zeros((0, 4))
    return _BlockResult(geom, ctx[a], np.where(b >= 0, ctx[np.maximum(b, 0)], -1), ends,
                        shapely.length(geom).astype(np.float64), shapely.bounds(geom),
                        bool(shapely.has_z(geom).any()))


def build_faces(
    polygons: object,
    *,
    snap_tolerance: float,
    boundary_corner_angle: float | None = None,
    block_cells: int | None = 20_000,
    map_blocks: Callable[[Callable[[Any], Any], Iterable[Any]], Iterable[Any]] | None = None,
    lines_as_wkb: bool = False,
) -> Faces:
    """Find the faces of a mesh of cell polygons.

    Parameters
    ----------
    polygons : array_like of shapely Polygon / MultiPolygon
        One geometry per cell; its position is the cell's local index.
    snap_tolerance : float
        Distance (CRS units, > 0) within which two cell boundaries count as shared:
        covers unmatched vertices, small gaps and overlaps.  Pieces shorter than
        ``3 * snap_tolerance`` (corner contacts) are not faces.
    boundary_corner_angle : float, optional
        Degrees.  By default a boundary face is one connected piece of a cell's
        boundary (around a mesh corner it bends).  With an angle, boundary pieces are
        also split where the boundary turns by more than it (e.g. 45: one face per side
        of a rectangular cell).
    block_cells : int or None, default 20_000
        Cells per spatial block.  The cells are processed block by block (each with its
        neighbours two rings out), which bounds the working memory; the result is the
        same, to the bit, for every block size.  ``None``: all cells in one block.
    map_blocks : callable, optional
        Used instead of the built-in ``map`` to run :func:`run_block_job` over the
        blocks; it must yield the results in order (e.g. one that runs the blocks on
        Dask workers: jobs and results pickle their geometry as WKB).  The jobs it gets
        support ``len``.
    lines_as_wkb : bool
        Return the face lines as WKB, with their bounds: each block's lines are encoded
        as the block comes in, so the lines of the whole mesh are never held as shapely
        objects (about 260 bytes a face against 90 as WKB).

    Returns
    -------
    Faces
        Sorted by ``(cell_a, cell_b, start x, start y, end x, end y)``; boundary faces
        have ``cell_b == -1`` (so a cell's boundary faces come before its shared ones).

    Examples
    --------
    >>> from shapely import box
    >>> f = build_faces([box(0, 0, 1, 1), box(1, 0, 2, 1)], snap_tolerance=1e-6)
    >>> [(int(a), int(b)) for a, b in zip(f.cell_a, f.cell_b) if b >= 0]
    [(0, 1)]
    """
    tol = float(snap_tolerance)
    if not (np.isfinite(tol) and tol > 0):
        raise InputError(
            f"snap_tolerance must be a positive distance in CRS units, got {snap_tolerance!r}"
        )
    block = _check_block_cells(block_cells)
    geoms = _check_polygons(polygons)
    n_cells = geoms.size
    if n_cells == 0:
        return _empty_faces()
    if block is None:
        block = n_cells
    chunk = max(block, 1_000)

    # global quantities, so that every block sees the same as one run over all cells:
    # the centroid order, the clean-up buffer width and the neighbour pairs
    cent = _centroids(geoms, chunk)
    rank = np.empty(n_cells, dtype=np.int64)
    rank[np.lexsort((cent[:, 1], cent[:, 0]))] = np.arange(n_cells)
    scale = float(np.max(np.abs(cent)))
    eps = min(max(tol * 1e-3, 1e-11 * scale), 0.5 * tol)
    p, q = _near_pairs(geoms, tol, chunk)
    indptr = np.searchsorted(p, np.arange(n_cells + 1))
    blocks = _blocks(cent, rank, block)
    del cent

    def jobs():
        mark = np.zeros(n_cells, dtype=np.int8)  # 1 core, 2 first ring, 3 second ring
        local = np.zeros(n_cells, dtype=np.int64)
        for core in blocks:
            if core.size == n_cells:
                ctx, lp, lq = core, p, q
                is_core = np.ones(n_cells, dtype=bool)
            else:
                # the block's cells and their neighbours two rings out, in index order
                mark[core] = 1
                ring = q[_gather(indptr, core)]
                mark[ring[mark[ring] == 0]] = 2
                ring = q[_gather(indptr, np.flatnonzero(mark == 2))]
                mark[ring[mark[ring] == 0]] = 3
                ctx = np.flatnonzero(mark)
                is_core = mark[ctx] == 1
                at = _gather(indptr, ctx)
                at = at[mark[q[at]] > 0]
                local[ctx] = np.arange(ctx.size)
                lp, lq = local[p[at]], local[q[at]]
                mark[ctx] = 0
            yield _BlockJob(geoms[ctx], lp, lq, rank[ctx], is_core, ctx, tol, eps,
                            boundary_corner_angle)

    out_geom, out_a, out_b, out_ends, out_length, out_bounds = [], [], [], [], [], []
    has_z = False
    for res in (map_blocks or map)(run_block_job, _Sized(jobs(), len(blocks))):
        out_geom.append(res.wkb if lines_as_wkb else res.geometry)
        out_length.append(res.length)
        out_bounds.append(res.bounds)
        has_z = has_z or res.has_z
        out_a.append(res.cell_a)
        out_b.append(res.cell_b)
        out_ends.append(res.ends)
        logger.debug("faces of a block done (%d faces)", res.cell_a.size)
        del res

    geometry = np.concatenate(out_geom)
    del out_geom
    if geometry.size == 0:
        return _empty_faces()
    cell_a = np.concatenate(out_a)
    cell_b = np.concatenate(out_b)
    ends = np.concatenate(out_ends)
    order = np.lexsort((ends[:, 3], ends[:, 2], ends[:, 1], ends[:, 0], cell_b, cell_a))
    faces = Faces(
        geometry=geometry[order],
        cell_a=cell_a[order],
        cell_b=cell_b[order],
        length=np.concatenate(out_length)[order],
        bounds=np.concatenate(out_bounds)[order],
        has_z=has_z,
    )
    logger.debug(
        "built %d faces (%d boundary) for %d cells in %d blocks",
        faces.n_faces,
        int(np.count_nonzero(faces.cell_b < 0)),
        n_cells,
        len(blocks),
    )
    return faces


#: points sampled along each boundary face (ends left out) to find gaps along it
_GAP_SAMPLES = 20
#: cosine of the smallest angle (80 degrees) between a face and the way to another cell
#: across a gap; a neighbour that only meets the face's end at a sharp corner lies at a
#: smaller angle near that end
_ACROSS_COS = float(np.cos(np.radians(87.0)))


@dataclass(frozen=True)
class BorderGaps:
    """Stretches of boundary faces that run along another cell just beyond the snap
    tolerance (:func:`border_gaps`).

    ``faces`` counts the boundary faces with such a stretch and ``length`` sums the
    stretches (CRS units, to 1/20 of each face's length); ``width`` is the gap's width at
    nine faces in ten or more (CRS units): the 90th percentile over the faces of their
    widest sampled gap; ``first`` holds the first few ``(cell_a, other cell)`` pairs of
    local cell indices, in face order.
    """

    faces: int
    length: float
    width: float
    first: list[tuple[int, int]]


def border_gaps(polygons: object, faces: Faces, *, snap_tolerance: float,
                reach: float) -> BorderGaps:
    """Where boundary faces run along another cell across a gap or overlap wider than
    ``snap_tolerance`` but within ``reach`` (CRS units): borders two cells meant to share.

    Each boundary face is sampled at 20 points (its ends left out).  A point is in such a
    gap when a cell other than the face's own lies within ``reach`` of it, farther than
    half the tolerance, in a direction across the face (more than 80 degrees from the
    face's direction there), with none of the face's own cell half-way to it (the ring of
    a hole near the cell's border has); a face needs two such points.  A boundary face that only ends where a neighbour starts (a
    mesh corner) has that neighbour along its own direction, and the mesh's outer
    boundary has no cell beyond it: neither counts.
    """
    geoms = np.asarray(polygons, dtype=object)
    tol = float(snap_tolerance)
    reach = float(reach)
    bnd = np.flatnonzero(faces.cell_b < 0)
    none = BorderGaps(0, 0.0, 0.0, [])
    if bnd.size == 0 or geoms.size < 2:
        return none
    lines = faces.geometry[bnd]
    if lines.size and isinstance(lines[0], (bytes, bytearray)):
        lines = shapely.from_wkb(lines)
    lines = shapely.force_2d(lines)
    length = shapely.length(lines)
    own = faces.cell_a[bnd]
    n = _GAP_SAMPLES
    face = np.repeat(np.arange(bnd.size), n)
    at = np.tile((np.arange(n) + 0.5) / n, bnd.size) * length[face]
    half = np.minimum(0.5 / n, 0.25) * length[face]
    point = shapely.line_interpolate_point(lines[face], at)
    tangent = (shapely.get_coordinates(shapely.line_interpolate_point(lines[face], at + half))
               - shapely.get_coordinates(shapely.line_interpolate_point(lines[face], at - half)))
    pt, cell = shapely.STRtree(geoms).query(point, predicate="dwithin", distance=reach)
    keep = cell != own[face[pt]]
    pt, cell = pt[keep], cell[keep]
    if pt.size == 0:
        return none
    to_cell = shapely.get_coordinates(shapely.shortest_line(point[pt], geoms[cell]))
    v = to_cell[1::2] - to_cell[0::2]
    dist = np.hypot(v[:, 0], v[:, 1])
    t = tangent[pt]
    along = np.abs(v[:, 0] * t[:, 0] + v[:, 1] * t[:, 1])
    gap = (dist > 0.5 * tol) & (along < _ACROSS_COS * dist * np.hypot(t[:, 0], t[:, 1]))
    # a gap is empty between the two cells; a hole's ring (a building cut out) near the
    # cell's border has the cell's own ground between it and the neighbour
    half_way = 0.5 * (to_cell[0::2] + to_cell[1::2])
    gap &= ~shapely.intersects_xy(geoms[own[face[pt]]], half_way[:, 0], half_way[:, 1])
    pt, cell, dist = pt[gap], cell[gap], dist[gap]
    if pt.size == 0:
        return none
    # a point counts once (its nearest such cell); then per face
    order = np.lexsort((dist, pt))
    pt, cell, dist = pt[order], cell[order], dist[order]
    first = np.ones(pt.size, dtype=bool)
    first[1:] = pt[1:] != pt[:-1]
    pt, cell, dist = pt[first], cell[first], dist[first]
    of_face = face[pt]
    hit, start, count = np.unique(of_face, return_index=True, return_counts=True)
    widest = np.maximum.reduceat(dist, start)
    # one sample alone is no stretch (a neighbour's sharp corner near the face)
    two = count >= 2
    hit, start, count, widest = hit[two], start[two], count[two], widest[two]
    if hit.size == 0:
        return none
    a = own[hit]
    return BorderGaps(int(hit.size), float(np.sum(length[hit] * count / n)),
                      float(np.percentile(widest, 90.0)),
                      [(int(x), int(y)) for x, y in zip(a[:5], cell[start][:5], strict=True)])
