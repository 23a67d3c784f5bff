"""Roughness translation between model families: n ratios, class fit, stage bias.

Pure numpy / scipy.  Everything rests on per (item, class) *sufficient statistics* at
each stage (:class:`ClassStats`), where an item is a face (or a cell):

==========  ==============================  ====================================
stat        face                            cell
==========  ==============================  ====================================
extent      plan length of the class        covered plan area of the class
wet         wet plan length L_c             wet plan area
perimeter   wetted perimeter P_c            wetted bed area (3-D)
area        flow area A_c                   volume V_c
strip       I_c = integral h^(5/3) ds       sum of a h^(5/3) over wet pixels
==========  ==============================  ====================================

so the conveyance for ANY vector of class n is cheap (:func:`conveyance`):

- ``strip``:  K = k sum_c I_c / n_c  (for cells: the conveyance form,
  n_eff = <h>^(5/3) / <h^(5/3)/n>, METHODS.md);
- ``lumped``: K = k A R^(2/3) / n_e with A = sum A_c, R = A / sum P_c and n_e the
  composite of the class n over the wetted perimeters (Horton-Einstein
  (sum P_c n_c^1.5 / P)^(2/3), Pavlovskii (sum P_c n_c^2 / P)^(1/2), or Lotter
  K = k sum_c P_c R_c^(5/3) / n_c) (Chow 1959 6-7; Yen 2002).  For cells R = V / A_bed.

A *flat* family is the same statistics built from one bed elevation per item
(:class:`FlatGeometry`): wet = perimeter = extent where h > 0, area = extent h,
strip = extent h^(5/3); with ``lumped`` it gives K = k L h^(5/3) / n_f, n_f composite
over plan lengths.

Cell conveyance (cell-based friction) is formed as K = k V R^(2/3) / n with R the
closure's radius: a flat cell gives k a h^(5/3) / n [der, METHODS.md "Translation rule"].

Translation rule [der]: equal conveyance at equal stage.  Every closure is homogeneous of
degree -1 in the n vector, so the uniform-scaling ratio is
n_ratio = K_target(n_source) / K_source(n_source).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field, replace
from typing import Any, Literal, Protocol

import numpy as np
from scipy import sparse

from .errors import RoughnessError
from .roughness import N_HIGH, N_MAX, N_MIN

Closure = Literal["lumped", "strip"]
Composite = Literal["horton_einstein", "pavlovskii", "lotter"]
CLOSURES: tuple[str, ...] = ("lumped", "strip")
COMPOSITES: tuple[str, ...] = ("horton_einstein", "pavlovskii", "lotter")

# N_MIN, N_MAX: absolute bounds of a fitted n, and of an accepted source n (roughness.py)
BOUND_FACTOR = 10.0  # a fitted n stays within n source / BOUND_FACTOR .. x BOUND_FACTOR
FEW_FACES = 10
WIDE_SPREAD = 1.5

#: what each flag of a class fit (``ClassFit.flags``, ``n_by_class.csv``) tells a
#: reviewer; ``dry_wet_mismatch`` is written with its count, ``dry_wet_mismatch:N``
FLAG_MEANINGS: dict[str, str] = {
    "not_fitted": "the class is under water in no face (or cell, with cell friction) that "
                  "is wet in both families within the window, so n target is n source, "
                  "unchanged.",
    "few_faces": f"fewer than {FEW_FACES} faces (or cells) hold the class, so its n rests on "
                 "little terrain.",
    "wide_spread": f"the ratio's 90 % is more than {WIDE_SPREAD:g} times its 10 %: one n cannot "
                   "suit every face of the class, and stage errors remain at some of them "
                   "(see the stage error columns and maps).",
    "outside_published_range": "n target lies outside the published range of the class's "
                               "surface (the n table's surface column), or above "
                               f"{N_HIGH:g}.",
    "dry_wet_mismatch": "N face-stages (or cell-stages) are wet in one family and dry in the "
                        "other; they have no finite ratio and were left out of the fit.",
    "at_bound": "the fit stopped at the edge of its search range (n source divided or "
                f"multiplied by {BOUND_FACTOR:g}, within {N_MIN:g} to {N_MAX:g}), so the "
                "terrain does not settle this class's n.",
}

_TINY = 1e-12


def flags_explained(flag_texts: Iterable[object]) -> list[tuple[str, str]]:
    """(flag, meaning) for every flag in ``flag_texts`` (the ``;``-separated texts of a
    ``flags`` column), in the order of :data:`FLAG_MEANINGS`; ``dry_wet_mismatch`` is
    shown as ``dry_wet_mismatch:N``.  Unknown names are left out."""
    shown: set[str] = set()
    for text in flag_texts:
        if isinstance(text, str):
            shown.update(part.split(":", 1)[0].strip() for part in text.split(";"))
    return [(name + (":N" if name == "dry_wet_mismatch" else ""), meaning)
            for name, meaning in FLAG_MEANINGS.items() if name in shown]


def flag_lines(flag_texts: Iterable[object], width: int = 88) -> list[str]:
    """:func:`flags_explained` as text lines for a terminal: a ``flags:`` heading, then
    each flag with its meaning, wrapped at ``width`` characters; no lines without flags."""
    import textwrap

    lines: list[str] = []
    for name, meaning in flags_explained(flag_texts):
        lines += textwrap.wrap(f"{name}: {meaning}", width=width, initial_indent="  ",
                               subsequent_indent="    ", break_on_hyphens=False)
    return ["flags:", *lines] if lines else []


# ---------------------------------------------------------------------------------------
# sufficient statistics


@dataclass(frozen=True)
class ClassStats:
    """Per (item, class) pair statistics at each stage column.

    Attributes
    ----------
    item, cls : ndarray (n_pairs,) int
        The item (local face or cell index) and class index of each pair.
    n_items, n_classes : int
    extent : ndarray (n_pairs,)
        Plan length (faces, length unit) or plan area (cells, area unit) of the class.
    wet, perimeter, area, strip : ndarray (n_pairs, n_stages)
        See the module docstring; units length / length / length^2 / length^(8/3) for
        faces, one length power more for cells.
    """

    item: np.ndarray
    cls: np.ndarray
    n_items: int
    n_classes: int
    extent: np.ndarray
    wet: np.ndarray
    perimeter: np.ndarray
    area: np.ndarray
    strip: np.ndarray
    _sum: sparse.csr_matrix | None = field(default=None, repr=False, compare=False)

    @property
    def n_stages(self) -> int:
        return int(self.wet.shape[1])

    def summer(self) -> sparse.csr_matrix:
        """Sparse (n_items, n_pairs) matrix that sums pairs into items."""
        if self._sum is None:
            mat = sparse.csr_matrix(
                (np.ones(self.item.size), (self.item, np.arange(self.item.size))),
                shape=(self.n_items, self.item.size),
            )
            object.__setattr__(self, "_sum", mat)
        return self._sum  # type: ignore[return-value]

    def total(self, values: np.ndarray) -> np.ndarray:
        """Sum a (n_pairs, n_stages) array into (n_items, n_stages)."""
        if values.ndim == 2 and values.shape[1] == 1 and self._sum is None:
            return np.bincount(self.item, weights=values[:, 0],
                               minlength=self.n_items).reshape(self.n_items, 1)
        return np.asarray(self.summer() @ values)

    def dominant_class(self) -> np.ndarray:
        """Class with the largest extent per item (-1 for items without pairs)."""
        out = np.full(self.n_items, -1, dtype=np.int64)
        if self.item.size == 0:
            return out
        order = np.lexsort((-self.extent, self.item))
        first = np.r_[True, self.item[order][1:] != self.item[order][:-1]]
        out[self.item[order][first]] = self.cls[order][first]
        return out

    def class_share(self) -> np.ndarray:
        """Extent share of each pair within its item, (n_pairs,)."""
        tot = np.bincount(self.item, weights=self.extent, minlength=self.n_items)
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(tot[self.item] > 0, self.extent / tot[self.item], 0.0)


def _pairs(item: np.ndarray, cls: np.ndarray, n_classes: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unique (item, class) pairs sorted by item then class, and the inverse index."""
    width = max(n_classes, 1)
    key = item.astype(np.int64) * width + cls.astype(np.int64)
    span = int(key.max()) + 1 if key.size else 0
    if key.size and int(key.min()) >= 0 and span <= 4 * key.size + 4096:
        # a tile's keys span a small range: counted instead of sorted (same result)
        seen = np.bincount(key, minlength=span) > 0
        uniq = np.flatnonzero(seen)
        inv = (np.cumsum(seen) - 1)[key]
    else:
        uniq, inv = np.unique(key, return_inverse=True)
    return uniq // width, uniq % width, inv


def _aggregator(inv: np.ndarray, n_pairs: int) -> sparse.csr_matrix:
    """Sparse (n_pairs, n_elem) matrix summing elements into their pair."""
    return sparse.csr_matrix((np.ones(inv.size), (inv, np.arange(inv.size))),
                             shape=(n_pairs, inv.size))


def _accumulate(agg: sparse.csr_matrix, columns: list[np.ndarray]) -> list[np.ndarray]:
    """Sum (n_elem, n_stages) arrays into (n_pairs, n_stages)."""
    return [np.asarray(agg @ values) for values in columns]


def _pow53(h: np.ndarray) -> np.ndarray:
    """h^(5/3) for h >= 0 (cube root: faster than a general power)."""
    c = np.cbrt(h)
    return h * c * c


def segment_integrals(h0: np.ndarray, h1: np.ndarray, ds: np.ndarray,
                      dl: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Exact integrals over one linear profile segment with end depths h0, h1 (may be < 0).

    Parameters
    ----------
    h0, h1 : ndarray
        Stage minus bed at both ends (length unit).
    ds, dl : ndarray
        Plan length and 3-D length of the segment (broadcast against h0).

    Returns
    -------
    wet plan length, wetted perimeter, flow area (integral of h+), strip integral
    (integral of h+^(5/3) ds), each of the broadcast shape.  Only wet segments are
    computed; h = (h0 + (h1 - h0) s)+ is integrated in closed form.
    """
    shape = np.broadcast_shapes(np.shape(h0), np.shape(h1), np.shape(ds), np.shape(dl))
    hmax = np.broadcast_to(np.maximum(h0, h1), shape).ravel()
    hmin = np.broadcast_to(np.minimum(h0, h1), shape).ravel()
    out = [np.zeros(hmax.size) for _ in range(4)]
    idx = np.flatnonzero(hmax > 0)
    if idx.size:
        hx, hn = hmax[idx], hmin[idx]
        dsw = np.broadcast_to(ds, shape).ravel()[idx]
        dlw = np.broadcast_to(dl, shape).ravel()[idx]
        full = hn >= 0
        lo = np.where(full, hn, 0.0)
        frac = np.where(full, 1.0, hx / np.where(full, 1.0, hx - hn))
        wet = dsw * frac
        d = hx - lo
        close = d <= 1e-6 * hx
        # integral of h^(5/3) over the wet part: (hx^(8/3) - lo^(8/3)) / ((8/3) (hx - lo)),
        # or the midpoint value when the ends are (nearly) equal (error ~ (d/h)^2)
        exact = (hx * _pow53(hx) - lo * _pow53(lo)) / ((8.0 / 3.0) * np.where(close, 1.0, d))
        mean = _pow53(0.5 * (hx + lo))
        out[0][idx] = wet
        out[1][idx] = dlw * frac
        out[2][idx] = wet * (hx + lo) * 0.5
        out[3][idx] = wet * np.where(close, mean, exact)
    return tuple(o.reshape(shape) for o in out)  # type: ignore[return-value]


#: a segment whose rise is at most this fraction of its plan length is a step at its mean
#: elevation in the breakpoint evaluation (as in ``ntrans.faces``)
LEVEL_RATIO = 1e-6
_QUERY_CHUNK = 1 << 20


def _pair_order(pair: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Order sorting by (pair, b), b >= 0: one argsort of a combined key, checked exactly
    (``np.lexsort`` when rounding of the key left anything out of order)."""
    if pair.size == 0:
        return np.zeros(0, dtype=np.int64)
    scale = 2.0 * float(b.max()) + 4.0
    order = np.argsort(pair * scale + b)
    p, v = pair[order], b[order]
    if np.any(p[1:] < p[:-1]) or np.any((p[1:] == p[:-1]) & (v[1:] < v[:-1])):
        order = np.lexsort((b, pair))
    return order


def _restarted_prefix(columns: list[Any], pair: np.ndarray, start: np.ndarray,
                      end: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Prefix sums of ``columns`` (arrays, or callables giving one) sorted by pair,
    restarted per pair: a pad row before each pair's rows takes the previous pair's total
    off, so the round-off scales with one pair, not the whole tile.  Row i of pair p sits
    at row i + shift[p] + 1 of the returned (n + n_pairs_used + 1, n_columns) array, whose
    first row is 0.  Returns (shift, prefix)."""
    from ._kernels import cumulative_rows

    nonempty = end > start
    firsts = start[nonempty]
    shift = np.cumsum(nonempty)
    n = pair.size
    pref = np.zeros((n + firsts.size + 1, len(columns)))
    rows = np.arange(n) + shift[pair] + 1
    pads = firsts[1:] + np.arange(1, firsts.size) + 1
    for j, col in enumerate(columns):  # loop over a few columns
        values = col() if callable(col) else col
        pref[rows, j] = values
        if firsts.size > 1:
            pref[pads, j] = -np.add.reduceat(values, firsts)[:-1]
    cumulative_rows(pref)  # row 0 is 0: the same sums as np.cumsum(pref[1:], axis=0)
    return shift, pref


class _StepTable:
    """Wet plan area, wet bed area and volume per (cell, class) pair at any stage.

    Pixels sorted by elevation per pair once (relative to the pair's low point) with
    prefix sums of a, a_bed and a z restarted per pair; a query is a bisection within its
    pair (a pixel with z == stage is dry) and one gather.  Same sums as the per-pixel
    evaluation up to round-off.
    """

    def __init__(self, pair: np.ndarray, z: np.ndarray, a: np.ndarray, bed: np.ndarray,
                 n_pairs: int) -> None:
        base = np.full(n_pairs, np.inf)
        np.minimum.at(base, pair, z)
        self.base = np.where(np.isfinite(base), base, 0.0)
        b = z - self.base[pair]
        order = _pair_order(pair, b)
        pair, b = pair[order], b[order]
        self.order = order
        a_s = a[order]
        self.a_sorted = a_s
        self.start = np.searchsorted(pair, np.arange(n_pairs), side="left")
        self.end = np.searchsorted(pair, np.arange(n_pairs), side="right")
        self.shift, self.pref = _restarted_prefix([a_s, bed[order], a_s * b], pair, self.start,
                                                  self.end)
        self.pair0 = self.pref[self.start + self.shift]  # prefix before each pair's rows
        self.breakpoints = np.ascontiguousarray(b, dtype=float)  # sorted per pair

    def query(self, pair: np.ndarray, eta: np.ndarray, *,
              strip: bool = False) -> tuple[np.ndarray, ...]:
        """(wet plan area, wet bed area, volume) of ``pair`` at ``eta``; 0 where not finite.

        ``strip=True`` adds a fourth array: the sum of a h^(5/3) over the pair's wet pixels
        (h = eta - z).  It has no closed form, so it is summed pixel by pixel, but over the
        wet pixels only: they are a prefix of the pair's sorted pixels.
        """
        from ._kernels import first_at_least, strip_station_sums

        wet, bed, vol = (np.zeros(eta.size) for _ in range(3))
        h53 = np.zeros(eta.size) if strip else None
        if strip:
            no_ramp = np.zeros(self.a_sorted.size)
            every = np.ones(self.a_sorted.size, dtype=bool)
        ok = np.flatnonzero(np.isfinite(eta))
        for i0 in range(0, ok.size, _QUERY_CHUNK):
            idx = ok[i0:i0 + _QUERY_CHUNK]
            p = pair[idx]
            e = eta[idx] - self.base[p]
            first = self.start[p]
            pos = first_at_least(self.breakpoints, first, self.end[p], e)  # b >= e
            s = self.pref[pos + self.shift[p]] - self.pair0[p]
            dry = pos == first
            wet[idx] = np.where(dry, 0.0, s[:, 0])
            bed[idx] = np.where(dry, 0.0, s[:, 1])
            vol[idx] = np.where(dry, 0.0, np.maximum(e * s[:, 0] - s[:, 2], 0.0))
            if h53 is not None:
                # the kernel's level term: a x^(5/3) at every breakpoint, no ramp term
                h53[idx] = strip_station_sums(np.ascontiguousarray(e), first, pos, self.breakpoints,
                                              no_ramp, self.a_sorted, every)
        return (wet, bed, vol) if h53 is None else (wet, bed, vol, h53)


class _RampTable:
    """Wet length, wetted perimeter and flow area per (face, class) pair at any stage.

    On a segment rising by dz over ds the wet fraction is a ramp in the stage from the
    low end to the high end, so per pair W = sum ds f, P = sum dl f are sums of ramps and
    A (integral of W over the stage) a sum of quadratics.  The ramps' start / stop
    breakpoints are sorted per pair once (elevations relative to the pair's low point,
    against cancellation) with prefix sums of c, c b, c b^2 (c = w / dz) restarted per
    pair; each (pair, stage) query is then a vectorised bisection within its pair plus
    one gather: O(log) per query instead of O(segments).  Level segments
    (dz <= LEVEL_RATIO ds) are steps at their mean elevation; a breakpoint equal to the
    stage counts as dry.  Agrees with :func:`segment_integrals` to round-off.
    """

    def __init__(self, pair: np.ndarray, z0: np.ndarray, z1: np.ndarray, ds: np.ndarray,
                 dl: np.ndarray, n_pairs: int) -> None:
        zlo, zhi = np.minimum(z0, z1), np.maximum(z0, z1)
        dz = zhi - zlo
        level = dz <= LEVEL_RATIO * ds
        base = np.full(n_pairs, np.inf)
        np.minimum.at(base, pair, zlo)
        self.base = np.where(np.isfinite(base), base, 0.0)
        sl = ~level
        inv = 1.0 / dz[sl]
        n_sl, n_lv = int(sl.sum()), int(level.sum())
        ev_pair = np.concatenate([pair[sl], pair[sl], pair[level]])
        b = np.concatenate([zlo[sl], zhi[sl], 0.5 * (zlo + zhi)[level]]) - self.base[ev_pair]
        zeros_sl, zeros_lv = np.zeros(2 * n_sl), np.zeros(n_lv)
        c_ds = np.concatenate([ds[sl] * inv, -ds[sl] * inv, zeros_lv])
        c_dl = np.concatenate([dl[sl] * inv, -dl[sl] * inv, zeros_lv])
        d_ds = np.concatenate([zeros_sl, ds[level]])
        d_dl = np.concatenate([zeros_sl, dl[level]])
        order = _pair_order(ev_pair, b)
        ev_pair, b = ev_pair[order], b[order]
        c_ds, c_dl, d_ds, d_dl = c_ds[order], c_dl[order], d_ds[order], d_dl[order]
        self.start = np.searchsorted(ev_pair, np.arange(n_pairs), side="left")
        self.end = np.searchsorted(ev_pair, np.arange(n_pairs), side="right")
        columns = [c_ds, lambda: c_ds * b, lambda: c_ds * b * b, c_dl, lambda: c_dl * b, d_ds,
                   lambda: d_ds * b, d_dl]
        self.shift, self.pref = _restarted_prefix(columns, ev_pair, self.start, self.end)
        self.pair0 = self.pref[self.start + self.shift]  # prefix before each pair's rows
        self.breakpoints = np.ascontiguousarray(b, dtype=float)  # sorted per pair
        self.n_pairs = n_pairs

    def query(self, pair: np.ndarray, eta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(wet, perimeter, area) of ``pair`` at stage ``eta`` (1-D, same length).

        Stages that are not finite give 0.
        """
        from ._kernels import first_at_least, ramp_table_values

        wet, per, area = (np.zeros(eta.size) for _ in range(3))
        ok = np.flatnonzero(np.isfinite(eta))
        for i0 in range(0, ok.size, _QUERY_CHUNK):
            idx = ok[i0:i0 + _QUERY_CHUNK]
            p = pair[idx]
            e = eta[idx] - self.base[p]
            first = self.start[p]
            lo = first_at_least(self.breakpoints, first, self.end[p], e)  # b >= e
            # W = e s0 - s1 + s5, P = e s3 - s4 + s7, A = (e^2 s0 - 2 e s1 + s2) / 2
            # + e s5 - s6 from the pair's prefix sums s (compiled; 0 where dry)
            wet[idx], per[idx], area[idx] = ramp_table_values(
                self.pref, self.pair0, lo + self.shift[p], p, e, lo == first)
        return wet, per, area



class Geometry(Protocol):
    """Anything that gives :class:`ClassStats` at a stage matrix (n_items, n_stages)."""

    n_items: int
    n_classes: int
    low: np.ndarray

    def stats(self, stages: np.ndarray, *, strip: bool = True) -> ClassStats: ...


@dataclass
class FaceGeometry:
    """Subgrid face geometry: piecewise-linear profiles with a class per segment.

    Parameters
    ----------
    face, station, z : ndarray (n_points,)
        Profiles as in ``ntrans.faces.Profiles`` (stations of one face contiguous and
        increasing; NaN z allowed: segments touching it are dropped).
    seg_class : ndarray (n_points,)
        Class index of the segment starting at each point (value at the last point of a
        face is ignored); -1 drops the segment.
    n_items, n_classes : int
    z_to_xy : float
        Converts vertical to horizontal units for the wetted perimeter.
    """

    face: np.ndarray
    station: np.ndarray
    z: np.ndarray
    seg_class: np.ndarray
    n_items: int
    n_classes: int
    z_to_xy: float = 1.0

    def __post_init__(self) -> None:
        face = np.asarray(self.face, dtype=np.int64)
        st = np.asarray(self.station, dtype=float)
        z = np.asarray(self.z, dtype=float)
        cls = np.asarray(self.seg_class, dtype=np.int64)
        same = face[1:] == face[:-1]
        ok = same & np.isfinite(z[1:]) & np.isfinite(z[:-1]) & (cls[:-1] >= 0)
        self.seg_face = face[:-1][ok]
        self.z0 = z[:-1][ok]
        self.z1 = z[1:][ok]
        self.ds = (st[1:] - st[:-1])[ok]
        self.dl = np.hypot(self.ds, (self.z1 - self.z0) * self.z_to_xy)
        seg_cls = cls[:-1][ok]
        self.pair_item, self.pair_cls, self.inv = _pairs(self.seg_face, seg_cls, self.n_classes)
        self.extent = np.bincount(self.inv, weights=self.ds, minlength=self.pair_item.size)
        self._agg = _aggregator(self.inv, self.pair_item.size)
        low = np.full(self.n_items, np.inf)
        np.minimum.at(low, self.seg_face, np.minimum(self.z0, self.z1))
        self.low = np.where(np.isfinite(low), low, np.nan)
        mean_num = np.bincount(self.seg_face, weights=self.ds * (self.z0 + self.z1) / 2,
                               minlength=self.n_items)
        length = np.bincount(self.seg_face, weights=self.ds, minlength=self.n_items)
        with np.errstate(invalid="ignore", divide="ignore"):
            self.mean_elevation = np.where(length > 0, mean_num / length, np.nan)
        self.length = length

    def stats(self, stages: np.ndarray, chunk: int = 64, *, strip: bool = True) -> ClassStats:
        """Statistics at a stage matrix (n_items, n_stages).

        With ``strip=False`` the strip integral is not computed (NaN) and wet, perimeter
        and area come from the sorted breakpoint sums (:class:`_RampTable`, built once per
        geometry): far cheaper, for the lumped closures and repeated evaluations.
        """
        stages = np.atleast_2d(np.asarray(stages, dtype=float))
        if not strip:
            return self._ramp_stats(stages)
        parts: list[list[np.ndarray]] = []
        for j0 in range(0, stages.shape[1], chunk):
            eta = stages[self.seg_face, j0:j0 + chunk]
            h0 = eta - self.z0[:, None]
            h1 = eta - self.z1[:, None]
            bad = ~np.isfinite(eta)
            h0 = np.where(bad, -1.0, h0)
            h1 = np.where(bad, -1.0, h1)
            cols = segment_integrals(h0, h1, self.ds[:, None], self.dl[:, None])
            parts.append(_accumulate(self._agg, list(cols)))
        wet, per, area, h53 = (np.concatenate([p[i] for p in parts], axis=1) for i in range(4))
        return ClassStats(self.pair_item, self.pair_cls, self.n_items, self.n_classes,
                          self.extent, wet, per, area, h53)

    def _ramp_stats(self, stages: np.ndarray) -> ClassStats:
        if getattr(self, "_ramps", None) is None:
            self._ramps = _RampTable(self.inv, self.z0, self.z1, self.ds, self.dl,
                                     self.pair_item.size)
        n_p, n_st = self.pair_item.size, stages.shape[1]
        eta = stages[self.pair_item] if n_p else np.empty((0, n_st))
        pair = np.repeat(np.arange(n_p), n_st)
        wet, per, area = (v.reshape(n_p, n_st) for v in self._ramps.query(pair, eta.ravel()))
        return ClassStats(self.pair_item, self.pair_cls, self.n_items, self.n_classes,
                          self.extent, wet, per, area, np.broadcast_to(np.nan, (n_p, n_st)))


@dataclass
class CellGeometry:
    """Subgrid cell geometry: weighted pixels with a class each.

    Parameters
    ----------
    item, z, plan_area, bed_area, pix_class : ndarray (n_pixels,)
        Cell of each pixel share, elevation, covered plan area (fraction x pixel area),
        bed area (plan area x surface factor), class index (-1 drops the pixel).
    """

    item: np.ndarray
    z: np.ndarray
    plan_area: np.ndarray
    bed_area: np.ndarray
    pix_class: np.ndarray
    n_items: int
    n_classes: int

    def __post_init__(self) -> None:
        ok = np.isfinite(np.asarray(self.z, float)) & (np.asarray(self.pix_class) >= 0)
        self._item = np.asarray(self.item, dtype=np.int64)[ok]
        self._z = np.asarray(self.z, dtype=float)[ok]
        self._a = np.asarray(self.plan_area, dtype=float)[ok]
        self._b = np.asarray(self.bed_area, dtype=float)[ok]
        cls = np.asarray(self.pix_class, dtype=np.int64)[ok]
        self.pair_item, self.pair_cls, self.inv = _pairs(self._item, cls, self.n_classes)
        self.extent = np.bincount(self.inv, weights=self._a, minlength=self.pair_item.size)
        self._agg = _aggregator(self.inv, self.pair_item.size)
        low = np.full(self.n_items, np.inf)
        np.minimum.at(low, self._item, self._z)
        self.low = np.where(np.isfinite(low), low, np.nan)

    def stats(self, stages: np.ndarray, chunk: int = 16, *, strip: bool = True) -> ClassStats:
        """Statistics at a stage matrix (n_items, n_stages); ``strip=False``: strip NaN."""
        stages = np.atleast_2d(np.asarray(stages, dtype=float))
        n_p, n_st = self.pair_item.size, stages.shape[1]
        if getattr(self, "_steps", None) is None:
            self._steps = _StepTable(self.inv, self._z, self._a, self._b, n_p)
        eta_p = stages[self.pair_item] if n_p else np.empty((0, n_st))
        pair = np.repeat(np.arange(n_p), n_st)
        del chunk
        # sum of a h^(5/3) over the wet pixels (no closed form: per pixel and stage)
        out = self._steps.query(pair, eta_p.ravel(), strip=strip)
        wet, per, area = (v.reshape(n_p, n_st) for v in out[:3])
        h53 = out[3].reshape(n_p, n_st) if strip else np.full(wet.shape, np.nan)
        return ClassStats(self.pair_item, self.pair_cls, self.n_items, self.n_classes,
                          self.extent, wet, per, area, h53)


@dataclass
class FlatGeometry:
    """Flat family: one bed elevation per item, classes by extent along the item.

    Built from the (item, class, extent) pairs of a subgrid geometry so both families
    share the same pair order: :meth:`from_geometry`.
    """

    pair_item: np.ndarray
    pair_cls: np.ndarray
    extent: np.ndarray
    z_flat: np.ndarray
    n_items: int
    n_classes: int

    @classmethod
    def from_geometry(cls, geometry: FaceGeometry | CellGeometry, z_flat: np.ndarray) -> FlatGeometry:
        return cls(geometry.pair_item, geometry.pair_cls, geometry.extent,
                   np.asarray(z_flat, dtype=float), geometry.n_items, geometry.n_classes)

    @property
    def low(self) -> np.ndarray:
        return self.z_flat

    def stats(self, stages: np.ndarray, *, strip: bool = True) -> ClassStats:
        del strip  # always computed (cheap)
        stages = np.atleast_2d(np.asarray(stages, dtype=float))
        h = stages[self.pair_item] - self.z_flat[self.pair_item][:, None]
        h = np.where(np.isfinite(h) & (h > 0), h, 0.0)
        wet = self.extent[:, None] * (h > 0)
        return ClassStats(self.pair_item, self.pair_cls, self.n_items, self.n_classes,
                          self.extent, wet, wet.copy(), self.extent[:, None] * h,
                          self.extent[:, None] * h ** (5.0 / 3.0))


# ---------------------------------------------------------------------------------------
# conveyance


def conveyance(stats: ClassStats, n_class: np.ndarray, *, closure: Closure = "lumped",
               composite: Composite = "horton_einstein", k: float = 1.0,
               cell: bool = False) -> np.ndarray:
    """Conveyance per item and stage for a vector of class n.

    Parameters
    ----------
    stats : ClassStats
    n_class : ndarray (n_classes,)
    closure : {"lumped", "strip"}
    composite : {"horton_einstein", "pavlovskii", "lotter"}
        Composite n for the lumped closure (ignored by ``strip``).
    k : float
        Manning unit factor (1.0 SI, 1.486 US customary).
    cell : bool
        Cell conveyance K = k V R^(2/3) / n (``area`` holds volume, ``perimeter`` bed
        area); identical formulas, named for clarity.

    Returns
    -------
    ndarray (n_items, n_stages), 0 where dry.  Units length^(8/3)/n (faces).
    """
    del cell  # same algebra for cells and faces
    if closure not in CLOSURES:
        raise ValueError(f"closure {closure!r} is unknown; use one of {list(CLOSURES)}")
    if composite not in COMPOSITES:
        raise ValueError(f"composite method {composite!r} is unknown; use one of {list(COMPOSITES)}")
    n_p = np.asarray(n_class, dtype=float)[stats.cls][:, None]
    if closure == "strip":
        return k * stats.total(stats.strip / n_p)
    # powers 2/3 as squared cube roots: np.cbrt is several times faster than np.power
    if composite == "lotter":
        with np.errstate(invalid="ignore", divide="ignore"):
            # A^(5/3) / P^(2/3) = A (A / P)^(2/3)
            part = np.where(stats.perimeter > 0, stats.area * np.cbrt(
                stats.area / np.where(stats.perimeter > 0, stats.perimeter, 1.0)) ** 2, 0.0)
        return k * stats.total(part / n_p)
    area = stats.total(stats.area)
    per = stats.total(stats.perimeter)
    wet = (per > 0) & (area > 0)
    if composite == "horton_einstein":
        # A R^(2/3) / n_e with n_e = (sum P_i n_i^1.5 / P)^(2/3): the P cancels, leaving
        # A (A / sum P_i n_i^1.5)^(2/3)
        num = np.where(wet, stats.total(stats.perimeter * n_p ** 1.5), 1.0)
        return np.where(wet, k * area * np.cbrt(area / num) ** 2, 0.0)
    num = stats.total(stats.perimeter * n_p ** 2)
    safe_per = np.where(wet, per, 1.0)
    n_e = np.sqrt(np.where(wet, num, 1.0) / safe_per)
    return np.where(wet, k * area * np.cbrt(area / safe_per) ** 2 / n_e, 0.0)


def composite_n(perimeter: np.ndarray, n: np.ndarray, method: Composite = "horton_einstein",
                radius: np.ndarray | None = None) -> np.ndarray:
    """Composite n of parts along the last axis (Chow 1959 6-7; Yen 2002).

    ``lotter`` needs the part radii; it returns P R^(5/3) / sum(P_i R_i^(5/3) / n_i)
    with R = sum(P_i R_i) / P.
    """
    p = np.asarray(perimeter, dtype=float)
    n = np.asarray(n, dtype=float)
    tot = p.sum(axis=-1)
    if method == "horton_einstein":
        return ((p * n ** 1.5).sum(axis=-1) / tot) ** (2.0 / 3.0)
    if method == "pavlovskii":
        return np.sqrt((p * n ** 2).sum(axis=-1) / tot)
    if method == "lotter":
        if radius is None:
            raise ValueError("the Lotter composite needs the part radii")
        r = np.asarray(radius, dtype=float)
        big_r = (p * r).sum(axis=-1) / tot
        return tot * big_r ** (5.0 / 3.0) / (p * r ** (5.0 / 3.0) / n).sum(axis=-1)
    raise ValueError(f"composite method {method!r} is unknown; use one of {list(COMPOSITES)}")


@dataclass(frozen=True)
class Family:
    """One side of a translation: a geometry and its friction closure."""

    geometry: Geometry
    closure: Closure = "lumped"

    def conveyance(self, stages: np.ndarray, n_class: np.ndarray, *,
                   composite: Composite = "horton_einstein", k: float = 1.0,
                   stats: ClassStats | None = None) -> np.ndarray:
        st = (self.geometry.stats(stages, strip=self.closure == "strip") if stats is None
              else stats)
        return conveyance(st, n_class, closure=self.closure, composite=composite, k=k)


# ---------------------------------------------------------------------------------------
# ratios


@dataclass(frozen=True)
class RatioResult:
    """n_target / n_source per item and stage, with the conveyances behind it."""

    ratio: np.ndarray        # (n_items, n_stages), NaN where either family is dry
    k_source: np.ndarray     # source conveyance at the source n
    k_target: np.ndarray     # target conveyance at the source n (n carried over)
    mismatch: np.ndarray     # bool: wet in one family and dry in the other


def n_ratio(k_source: np.ndarray, k_target_at_source_n: np.ndarray) -> RatioResult:
    """Equal-conveyance n ratio at equal stage [der, METHODS.md "Translation rule"].

    Parameters
    ----------
    k_source : ndarray (n_items, n_stages)
        Source conveyance at the source n.
    k_target_at_source_n : ndarray (n_items, n_stages)
        Target conveyance with the same class n (n carried over).

    Returns
    -------
    RatioResult; ``ratio = K_target / K_source`` (every closure is homogeneous of degree
    -1 in n, so this is the uniform factor on n that restores the source conveyance);
    NaN where either is dry or not finite; ``mismatch`` flags items wet in exactly one
    family.  Never divides by zero.
    """
    ks = np.asarray(k_source, dtype=float)
    kt = np.asarray(k_target_at_source_n, dtype=float)
    wet_s = np.isfinite(ks) & (ks > 0)
    wet_t = np.isfinite(kt) & (kt > 0)
    both = wet_s & wet_t
    ratio = np.full(ks.shape, np.nan)
    ratio[both] = kt[both] / ks[both]
    return RatioResult(ratio, ks, kt, wet_s ^ wet_t)


# ---------------------------------------------------------------------------------------
# class fit


def weighted_quantile(values: np.ndarray, weights: np.ndarray, q: np.ndarray | list[float]) -> np.ndarray:
    """Weighted quantiles (inverse of the weighted ECDF at mid-steps, linear between).

    Values with a weight that is not positive and finite, or a value that is not finite,
    are left out.  Works on an index sort: about 24 bytes per value beside the inputs.
    """
    v = np.asarray(values, dtype=float)
    w = np.asarray(weights, dtype=float)
    keep = np.isfinite(v) & np.isfinite(w) & (w > 0)
    if not keep.all():
        v, w = v[keep], w[keep]
    del keep
    q = np.asarray(q, dtype=float)
    if v.size == 0:
        return np.full(q.shape, np.nan)
    order = np.argsort(v, kind="stable")
    half = w[order]
    mid = np.cumsum(half)
    total = half.sum()
    half *= 0.5
    mid -= half  # cumulative weight at each sorted value's mid-step
    del half
    mid /= total
    # np.interp(q, mid, v[order]) without the sorted copy of v: mid rises strictly (every
    # weight > 0), so each q falls between two neighbours found by bisection
    upper = np.clip(np.searchsorted(mid, q, side="right"), 1, v.size - 1) if v.size > 1 else None
    out = np.empty(q.shape)
    for j, qj in np.ndenumerate(q):
        if upper is None:
            out[j] = v[order[0]]
            continue
        i = int(upper[j])
        out[j] = np.interp(qj, mid[i - 1:i + 1], v[order[i - 1:i + 1]])
    return out


@dataclass(frozen=True)
class ClassFit:
    """Result of :func:`fit_class_n` (arrays per class)."""

    n_source: np.ndarray
    n_target: np.ndarray
    ratio: np.ndarray
    ratio_p10: np.ndarray
    ratio_p50: np.ndarray
    ratio_p90: np.ndarray
    items: np.ndarray          # items holding the class
    weight_share: np.ndarray
    mismatch: np.ndarray       # item-stages with a dry/wet mismatch touching the class
    flags: list[list[str]]
    success: bool
    cost: float


@dataclass(frozen=True)
class _LumpedSums:
    """Per entry parts of the lumped closure: K = geo / n_e, n_e = (sums @ n^expo / P)^power
    where wet, else 0."""

    expo: float
    power: float
    geo: np.ndarray       # k A R^(2/3): the conveyance at n = 1
    wet: np.ndarray
    safe_p: np.ndarray    # total wetted perimeter (1 where dry)

    def take(self, index: np.ndarray) -> _LumpedSums:
        return _LumpedSums(self.expo, self.power, self.geo[index], self.wet[index],
                           self.safe_p[index])


def _entry_sums(stats: ClassStats, rows: np.ndarray, cols: np.ndarray, *, closure: Closure,
                composite: Composite, k: float) -> tuple[sparse.csr_matrix, _LumpedSums | None]:
    """Per entry and class sums behind ``conveyance(stats, n)[rows, cols]``, everything that
    does not depend on n: a sparse (n_entries, n_classes) matrix, canonical (classes in
    order within each entry), and for the lumped closures with a Horton-Einstein or
    Pavlovskii composite the per entry totals (else None: K = k sums @ (1 / n))."""
    order = np.argsort(stats.item, kind="stable")
    items = stats.item[order]
    first = np.searchsorted(items, rows, side="left")
    count = np.searchsorted(items, rows, side="right") - first
    del items
    # the (entry, class) pairs in entry order, laid out as the rows of a CSR matrix: the
    # pairs of entry i are indptr[i]:indptr[i + 1] (built in place: this runs over every
    # wet item-stage, the largest arrays of the fit)
    indptr = np.zeros(rows.size + 1, dtype=np.int64)
    np.cumsum(count, out=indptr[1:])
    q = np.repeat(first - indptr[:-1], count)
    del first
    q += np.arange(q.size)
    q = order[q]
    del order
    qc = np.repeat(cols, count)
    per = stats.perimeter[q, qc]
    area = stats.area[q, qc]
    if closure == "strip":
        x = stats.strip[q, qc]
    elif composite == "lotter":
        with np.errstate(invalid="ignore", divide="ignore"):
            x = np.where(per > 0, area ** (5.0 / 3.0) / np.where(per > 0, per, 1.0) ** (2.0 / 3.0),
                         0.0)
    else:
        x = per
    del qc
    lumped_sums = not (closure == "strip" or composite == "lotter")
    if lumped_sums:  # before the matrix, which may reorder x (= per) in place
        owner = np.repeat(np.arange(rows.size), count)
        a_tot = np.bincount(owner, weights=area, minlength=rows.size)
        p_tot = np.bincount(owner, weights=per, minlength=rows.size)
        del owner
    del per, area
    mat = sparse.csr_matrix((x, stats.cls[q], indptr), shape=(rows.size, stats.n_classes))
    del q, x
    mat.sum_duplicates()  # canonical: classes in order within each entry
    if not lumped_sums:
        return mat, None
    expo, power = (1.5, 2.0 / 3.0) if composite == "horton_einstein" else (2.0, 0.5)
    wet = (p_tot > 0) & (a_tot > 0)
    safe_p = np.where(wet, p_tot, 1.0)
    geo = np.where(wet, k * a_tot * (a_tot / safe_p) ** (2.0 / 3.0), 0.0)
    return mat, _LumpedSums(expo, power, geo, wet, safe_p)


def _conveyance_from_sums(mat: sparse.csr_matrix, lumped: _LumpedSums | None, k: float,
                          n: np.ndarray) -> np.ndarray:
    """K at every entry of :func:`_entry_sums` for the class n vector ``n``."""
    n = np.asarray(n, dtype=float)
    if lumped is None:
        return k * (mat @ (1.0 / n))
    num = mat @ (n ** lumped.expo)
    n_e = (np.where(lumped.wet, num, 1.0) / lumped.safe_p) ** lumped.power
    return np.where(lumped.wet, lumped.geo / n_e, 0.0)


def _entry_conveyance(stats: ClassStats, rows: np.ndarray, cols: np.ndarray, *,
                      closure: Closure, composite: Composite, k: float) -> Any:
    """``n -> conveyance(stats, n)[rows, cols]`` with everything that does not depend on n
    computed once (:func:`_entry_sums`)."""
    mat, lumped = _entry_sums(stats, rows, cols, closure=closure, composite=composite, k=k)
    return lambda n: _conveyance_from_sums(mat, lumped, k, n)


@dataclass(frozen=True)
class FitTerms:
    """What the class fit needs from some items (one tile's, or all of them).

    The fit minimises sum w (ln K_target(n) - ln K_source)^2 over the item-stages wet in
    both families (:func:`fit_class_n`).  Where only one class is wet at an item-stage,
    ln K_target(n) = ln K_target(n_source) - ln(n_c / n_source_c) for every closure (each
    is homogeneous of degree -1 in n and only n_c enters), so those terms reduce exactly
    to three sums per class and stage column of the carried-over log ratio
    d = ln(K_target(n_source) / K_source), weighted by K_source:
    sum w (d - ln(n_c / n_source_c))^2 = W_c (m_c - ln(n_c / n_source_c))^2 + const with
    W_c = sum w, m_c = sum w d / W_c.  Only item-stages wet in several classes are kept
    one by one (``mixed_*``).  Weights stay unscaled here (K_source): the column totals
    that scale them are only known once every item is in (:func:`solve_class_n`).

    ``spread_*`` hold the carried-over ratio of every wet (pair, stage) with its weight
    K_source x class share of the item's extent (for the weighted quantiles).
    """

    closure: Closure
    composite: Composite
    k: float
    source_total: np.ndarray        # (n_stages,) sum of K_source over the entries
    single_weight: np.ndarray       # (n_classes, n_stages) sum K_source
    single_first: np.ndarray        # (n_classes, n_stages) sum K_source d
    single_second: np.ndarray       # (n_classes, n_stages) sum K_source d^2
    mixed_stage: np.ndarray         # (m,) stage column of each entry wet in several classes
    mixed_source: np.ndarray        # (m,) K_source
    mixed_sums: sparse.csr_matrix   # (m, n_classes), see _entry_sums
    mixed_lumped: _LumpedSums | None
    present: np.ndarray             # (n_classes,) class wet in an entry: its n can move
    items: np.ndarray               # (n_classes,) items holding the class
    mismatch: np.ndarray            # (n_classes,) item-stages wet in one family only
    class_weight: np.ndarray        # (n_classes, n_stages) sum K_source x class part of K
    spread_class: np.ndarray        # (s,) class of each wet (pair, stage)
    spread_stage: np.ndarray        # (s,)
    spread_ratio: np.ndarray        # (s,) carried-over ratio of the pair's item
    spread_weight: np.ndarray       # (s,) K_source x class share

    @property
    def n_classes(self) -> int:
        return int(self.present.size)

    @property
    def n_stages(self) -> int:
        return int(self.source_total.size)

    def without_spread(self) -> FitTerms:
        """The same terms without the spread's values (once they are kept elsewhere, e.g.
        in a :class:`ntrans.quantiles.SpilledQuantiles`)."""
        none = np.empty(0, dtype=np.int32)
        return replace(self, spread_class=none, spread_stage=none, spread_ratio=np.empty(0),
                       spread_weight=np.empty(0))


def _per_class_stage(cls: np.ndarray, stage: np.ndarray, weights: np.ndarray, n_classes: int,
                     n_stages: int) -> np.ndarray:
    """Sum ``weights`` into a (n_classes, n_stages) table."""
    return np.bincount(cls * n_stages + stage, weights=weights,
                       minlength=n_classes * n_stages).reshape(n_classes, n_stages)


def _fit_class_weight(mat: sparse.csr_matrix, lumped: _LumpedSums | None, source: np.ndarray,
                      cols: np.ndarray, n_source: np.ndarray, n_stages: int) -> np.ndarray:
    """Each entry's fit weight (K_source) split among the classes wet in it by their part
    of the entry's conveyance sum at n carried over, which is minus d ln K / d ln n_c (see
    :func:`solve_class_n`'s Jacobian), summed into a (n_classes, n_stages) table.  A class
    dry at every entry gets none of the weight, as it gets none of the fit."""
    per_class = (n_source ** lumped.expo if lumped is not None else 1.0 / n_source)
    part = mat.data * per_class[mat.indices]
    entry = np.repeat(np.arange(mat.shape[0]), np.diff(mat.indptr))
    total = np.bincount(entry, weights=part, minlength=mat.shape[0])
    alive = total > 0 if lumped is None else (total > 0) & lumped.wet
    factor = np.where(alive, source / np.where(alive, total, 1.0), 0.0)
    return _per_class_stage(mat.indices, cols[entry], part * factor[entry], n_source.size,
                            n_stages)


def fit_terms(
    k_source: np.ndarray,
    target_stats: ClassStats,
    n_source: np.ndarray,
    *,
    closure: Closure = "lumped",
    composite: Composite = "horton_einstein",
    k: float = 1.0,
) -> FitTerms:
    """The class fit's terms from these items (see :class:`FitTerms`).

    Parameters
    ----------
    k_source : ndarray (n_items, n_stages)
        Source conveyance at its own n.
    target_stats : ClassStats
        Target sufficient statistics at the same stages.
    n_source : ndarray (n_classes,)
    """
    n_source = np.asarray(n_source, dtype=float)
    st = target_stats
    n_cls = st.n_classes
    kt0 = conveyance(st, n_source, closure=closure, composite=composite, k=k)
    res = n_ratio(k_source, kt0)
    both = np.isfinite(res.ratio)
    ks = np.where(both, res.k_source, 0.0)
    n_st = ks.shape[1]
    ratio, item_mismatch = res.ratio, res.mismatch.sum(axis=1)
    del res, kt0

    # which classes can move: present in a wet item-stage of the target
    present = np.zeros(n_cls, dtype=bool)
    wet_pair = (st.perimeter > 0).any(axis=1) & both[st.item].any(axis=1)
    present[np.unique(st.cls[wet_pair])] = True
    items = np.bincount(st.cls[st.extent > 0], minlength=n_cls)
    mismatch = np.bincount(st.cls, weights=item_mismatch[st.item], minlength=n_cls).astype(int)
    del both

    weight_p = ks[st.item] * st.class_share()[:, None]  # (n_pairs, n_stages)
    pair_row, pair_col = np.nonzero(weight_p > 0)
    spread_class = st.cls[pair_row].astype(np.int32)
    spread_ratio = ratio[st.item[pair_row], pair_col]
    spread_weight = weight_p[pair_row, pair_col]
    del weight_p, ratio, pair_row
    spread_stage = pair_col.astype(np.int32)
    del pair_col

    rows, cols = np.nonzero(ks > 0)
    source = ks[rows, cols]
    mat, lumped = _entry_sums(st, rows, cols, closure=closure, composite=composite, k=k)
    del rows
    mat.eliminate_zeros()  # classes dry at the entry's stage do not enter K
    class_weight = _fit_class_weight(mat, lumped, source, cols, n_source, n_st)
    one = np.diff(mat.indptr) == 1
    if lumped is not None:
        one &= lumped.wet
    single = np.flatnonzero(one)
    cls_one = mat.indices[mat.indptr[single]]
    base = lumped.geo[single] if lumped is not None else k * mat.data[mat.indptr[single]]
    with np.errstate(divide="ignore"):
        d = np.log(base) - np.log(n_source[cls_one]) - np.log(source[single])
    del base
    ks_one, col_one = source[single], cols[single]
    single_weight = _per_class_stage(cls_one, col_one, ks_one, n_cls, n_st)
    single_first = _per_class_stage(cls_one, col_one, ks_one * d, n_cls, n_st)
    single_second = _per_class_stage(cls_one, col_one, ks_one * d * d, n_cls, n_st)
    del d, ks_one, col_one, cls_one, single
    mixed = np.flatnonzero(~one)
    return FitTerms(
        closure=closure, composite=composite, k=float(k), source_total=ks.sum(axis=0),
        single_weight=single_weight, single_first=single_first, single_second=single_second,
        mixed_stage=cols[mixed].astype(np.int32), mixed_source=source[mixed],
        mixed_sums=mat[mixed], mixed_lumped=None if lumped is None else lumped.take(mixed),
        present=present, items=items, mismatch=mismatch, class_weight=class_weight,
        spread_class=spread_class, spread_stage=spread_stage, spread_ratio=spread_ratio,
        spread_weight=spread_weight,
    )


def combine_fit_terms(parts: list[FitTerms]) -> FitTerms:
    """One :class:`FitTerms` from the terms of disjoint sets of items (e.g. tiles).

    The list is emptied as its parts are copied in, so their memory is freed on the way
    and the combined terms never sit beside a second copy.
    """
    if not parts:
        raise ValueError("no fit terms to combine")
    if len(parts) == 1:
        return parts.pop()
    first = parts[0]
    if any((p.closure, p.composite, p.k) != (first.closure, first.composite, first.k)
           or p.present.shape != first.present.shape
           or p.source_total.shape != first.source_total.shape for p in parts):
        raise ValueError("fit terms of different closures or shapes cannot be combined")

    def total(name: str) -> np.ndarray:
        return np.sum([getattr(p, name) for p in parts], axis=0)

    dense = {name: total(name) for name in (
        "source_total", "single_weight", "single_first", "single_second", "items",
        "mismatch", "class_weight")}
    present = np.logical_or.reduce([p.present for p in parts])
    flat_names = ("spread_class", "spread_stage", "spread_ratio", "spread_weight",
                  "mixed_stage", "mixed_source")
    out = {name: np.empty(sum(getattr(p, name).size for p in parts),
                          dtype=getattr(first, name).dtype) for name in flat_names}
    lumped = first.mixed_lumped
    lumped_out = None if lumped is None else {
        name: np.empty(sum(p.mixed_stage.size for p in parts), dtype=getattr(lumped, name).dtype)
        for name in ("geo", "wet", "safe_p")}
    sums: list[sparse.csr_matrix] = []
    at = dict.fromkeys(flat_names, 0)
    at_mixed = 0
    closure, composite, k = first.closure, first.composite, first.k
    del first
    parts.reverse()
    while parts:  # pop in the original order, freeing each part once copied
        p = parts.pop()
        for name in flat_names:
            a = getattr(p, name)
            out[name][at[name]:at[name] + a.size] = a
            at[name] += a.size
        m = p.mixed_stage.size
        if lumped_out is not None and p.mixed_lumped is not None:
            for name, arr in lumped_out.items():
                arr[at_mixed:at_mixed + m] = getattr(p.mixed_lumped, name)
        at_mixed += m
        sums.append(p.mixed_sums)
        del p
    mixed_sums = sparse.vstack(sums, format="csr")
    del sums
    return FitTerms(
        closure=closure, composite=composite, k=k, **dense, present=present,
        mixed_sums=mixed_sums,
        mixed_lumped=None if lumped is None else _LumpedSums(lumped.expo, lumped.power,
                                                             **lumped_out),
        **out,
    )


def _spread_in_memory(terms: FitTerms, scale: np.ndarray, p10: np.ndarray, p50: np.ndarray,
                      p90: np.ndarray) -> None:
    """Weighted p10 / p50 / p90 of the carried-over ratio per class, into the arrays."""
    weights = terms.spread_weight * scale[terms.spread_stage]
    classes = terms.spread_class
    if classes.size and not np.any(classes != classes[0]):  # one class: no copies
        p10[classes[0]], p50[classes[0]], p90[classes[0]] = weighted_quantile(
            terms.spread_ratio, weights, [0.1, 0.5, 0.9])
    elif classes.size:
        order = np.argsort(classes, kind="stable")
        bounds = np.searchsorted(classes[order], np.arange(p10.size + 1))
        for c in range(p10.size):  # loop over classes
            sel = order[bounds[c]:bounds[c + 1]]
            if sel.size:
                p10[c], p50[c], p90[c] = weighted_quantile(terms.spread_ratio[sel], weights[sel],
                                                           [0.1, 0.5, 0.9])


def fit_class_n(
    k_source: np.ndarray,
    target_stats: ClassStats,
    n_source: np.ndarray,
    *,
    closure: Closure = "lumped",
    composite: Composite = "horton_einstein",
    k: float = 1.0,
    outside_range: np.ndarray | None = None,
    bound_factor: float = BOUND_FACTOR,
) -> ClassFit:
    """Fit one target n per class: equal conveyance over the window, least squares.

    Minimises sum w (ln K_target(n) - ln K_source)^2 over all items and window stages
    where both families are wet, in ln n (``scipy.optimize.least_squares``, bounds
    [n_source / bound_factor, n_source * bound_factor] clipped to 0.005..1.0).  Items
    with several classes enter through the closure's composite.  Weight w = the item's
    share of the source conveyance at that window stage (column), so the items that
    carry the flow decide and every window stage counts equally.

    Spread: the per-item ratio ``K_target(n_source) / K_source`` at each stage is given to
    every class of the item with weight w x (class share of the item's extent); p10 /
    p50 / p90 are weighted quantiles (:func:`weighted_quantile`).  ``items`` counts items
    holding the class, ``weight_share`` the class's share of the fit's total weight (each
    entry's weight split among the classes wet in it by their part of its conveyance at n
    carried over; 0 for a class wet nowhere, flagged ``not_fitted``).  Flags:
    ``few_faces`` (< 10 items), ``wide_spread`` (p90 / p10 > 1.5),
    ``outside_published_range`` (from ``outside_range`` evaluated by the caller on the
    fitted n), ``dry_wet_mismatch:N`` (N item-stages wet in one family only),
    ``not_fitted`` (no wet item: n_target = n_source), ``at_bound`` (the fit stopped
    at a bound).

    The same as :func:`solve_class_n` of :func:`fit_terms`, which a tiled job gathers
    tile by tile (:func:`combine_fit_terms`) instead of holding every item-stage.

    Parameters
    ----------
    k_source : ndarray (n_items, n_stages)
        Source conveyance at its own n.
    target_stats : ClassStats
        Target sufficient statistics at the same stages.
    n_source : ndarray (n_classes,)
    """
    terms = fit_terms(k_source, target_stats, n_source, closure=closure, composite=composite,
                      k=k)
    return solve_class_n(terms, n_source, outside_range=outside_range,
                         bound_factor=bound_factor)


def solve_class_n(
    terms: FitTerms,
    n_source: np.ndarray,
    *,
    outside_range: np.ndarray | None = None,
    bound_factor: float = BOUND_FACTOR,
    spread: Any = None,
) -> ClassFit:
    """The class fit of :func:`fit_class_n` from its gathered terms (:class:`FitTerms`).

    ``spread``: a weighted :class:`ntrans.quantiles.SpilledQuantiles` by class holding the
    terms' spread values (added with their weights and stage columns) instead of the
    terms themselves; the quantiles are then read from it, in bounded memory.
    """
    from scipy.optimize import least_squares
    from scipy.sparse.linalg import LinearOperator

    n_source = np.asarray(n_source, dtype=float)
    n_cls = n_source.size
    outside = ~((n_source >= N_MIN) & (n_source <= N_MAX))
    if outside.any():
        raise RoughnessError(
            f"source n {', '.join(f'{v:g}' for v in n_source[outside])} lies outside "
            f"{N_MIN:g}-{N_MAX:g}, the class fit's search bounds; give Manning's n values "
            "within them")
    if terms.n_classes != n_cls:
        raise ValueError(f"fit terms for {terms.n_classes} classes, n for {n_cls}")
    col_tot = terms.source_total
    n_cols_used = max(int(np.count_nonzero(col_tot > 0)), 1)
    # weight of an entry = its K_source over its column's total, every column counting equally
    scale = np.where(col_tot > 0, 1.0 / np.where(col_tot > 0, col_tot, 1.0), 0.0) / n_cols_used
    w_one = terms.single_weight @ scale
    s1 = terms.single_first @ scale
    s2 = terms.single_second @ scale
    fitted = np.flatnonzero(w_one > 0)
    mean_one = s1[fitted] / w_one[fitted]
    # the part of the single-class sum no n can remove (adds to the reported cost)
    spread_one = float(np.sum(np.maximum(s2[fitted] - s1[fitted] * mean_one, 0.0)))
    sqrt_w_one = np.sqrt(w_one[fitted])
    log_n_source = np.log(n_source)

    w_mixed = terms.mixed_source * scale[terms.mixed_stage]
    sqrt_w_mixed = np.sqrt(w_mixed)
    log_ks_mixed = np.log(terms.mixed_source)

    def k_mixed(n: np.ndarray) -> np.ndarray:
        return _conveyance_from_sums(terms.mixed_sums, terms.mixed_lumped, terms.k, n)

    lo = np.log(np.clip(n_source / bound_factor, N_MIN, N_MAX))
    hi = np.log(np.clip(n_source * bound_factor, N_MIN, N_MAX))
    x0 = np.log(np.clip(n_source, N_MIN, N_MAX))
    # start from the weighted mean ratio: uniform scaling is exact for one class
    weight_sum = float(w_one.sum() + w_mixed.sum())
    if weight_sum > 0:
        with np.errstate(divide="ignore"):
            log_ratio_mixed = np.log(k_mixed(n_source)) - log_ks_mixed
        start_ratio = float(np.exp((s1.sum() + np.sum(w_mixed * log_ratio_mixed)) / weight_sum))
        x0 = np.clip(x0 + np.log(start_ratio), lo + 1e-12, hi - 1e-12)
        del log_ratio_mixed

    # which classes can move: present in a wet item-stage of the target
    present = terms.present
    free = np.flatnonzero(present)

    # spread per class (at n carried over: it does not depend on the fit)
    p10 = np.full(n_cls, np.nan)
    p50 = np.full(n_cls, np.nan)
    p90 = np.full(n_cls, np.nan)
    wsum = terms.class_weight @ scale
    total_w = wsum.sum()
    weight_share = wsum / total_w if total_w > 0 else np.zeros(n_cls)
    if spread is not None:
        p10[:], p50[:], p90[:] = spread.quantiles([0.1, 0.5, 0.9], column_factor=scale)[:n_cls].T
    else:
        _spread_in_memory(terms, scale, p10, p50, p90)
    # a class wet nowhere has no ratio of its own: the ratios of the items that hold it
    # (by extent, while other classes carry their flow) would read as its spread
    p10[~present] = p50[~present] = p90[~present] = np.nan

    def full_x(x_free: np.ndarray) -> np.ndarray:
        x = x0.copy()
        x[free] = x_free
        return x

    def residual(x_free: np.ndarray) -> np.ndarray:
        x = full_x(x_free)
        with np.errstate(divide="ignore"):
            mixed = sqrt_w_mixed * (np.log(np.maximum(k_mixed(np.exp(x)), 1e-300)) - log_ks_mixed)
        one = sqrt_w_one * (mean_one + log_n_source[fitted] - x[fitted])
        return np.concatenate([mixed, one])

    # the Jacobian, exact and sparse: every closure gives d ln K / d ln n_c = minus the
    # share of class c in the entry's sum (sum_c M_c n_c^expo for the lumped composites,
    # sum_c M_c / n_c for the strip sums), so an entry has one nonzero per class it holds
    # (a dense matrix would cost entries x classes; finite differences one more residual
    # per class and step).  It goes to the solver as an operator: a sparse matrix would be
    # kept by it with a scaled copy, about a quarter more memory at the fit
    column = np.full(n_cls, -1)
    column[free] = np.arange(free.size)
    lumped = terms.mixed_lumped
    sums = terms.mixed_sums
    keep = column[sums.indices] >= 0
    entry = np.repeat(np.arange(w_mixed.size), np.diff(sums.indptr))[keep]
    entry_class, entry_sum = sums.indices[keep], sums.data[keep]
    del keep
    shape = (w_mixed.size + fitted.size, free.size)

    entry_column = column[entry_class]
    one_column = column[fitted]
    n_mixed = w_mixed.size

    def jacobian(x_free: np.ndarray) -> LinearOperator:
        n = np.exp(full_x(x_free))
        part = entry_sum * (n[entry_class] ** lumped.expo if lumped is not None
                            else 1.0 / n[entry_class])
        total = np.bincount(entry, weights=part, minlength=n_mixed)
        alive = total > 0 if lumped is None else (total > 0) & lumped.wet
        factor = np.where(alive, -sqrt_w_mixed / np.where(alive, total, 1.0), 0.0)
        part *= factor[entry]

        def matvec(v: np.ndarray) -> np.ndarray:
            v = np.ravel(v)
            return np.concatenate([np.bincount(entry, weights=part * v[entry_column],
                                               minlength=n_mixed),
                                   -sqrt_w_one * v[one_column]])

        def rmatvec(u: np.ndarray) -> np.ndarray:
            u = np.ravel(u)
            g = np.bincount(entry_column, weights=part * u[entry], minlength=free.size)
            np.add.at(g, one_column, -sqrt_w_one * u[n_mixed:])
            return g

        return LinearOperator(shape, matvec=matvec, rmatvec=rmatvec, dtype=float)

    success, cost = True, 0.0
    n_target = n_source.copy()
    if free.size and (fitted.size or w_mixed.size):
        sol = least_squares(residual, x0[free], jac=jacobian, bounds=(lo[free], hi[free]),
                            method="trf", tr_solver="lsmr",
                            tr_options={"atol": 1e-14, "btol": 1e-14}, x_scale=1.0,
                            xtol=1e-12, ftol=1e-12, gtol=1e-12, max_nfev=200)
        n_target = np.exp(full_x(sol.x))
        n_target[~present] = n_source[~present]
        success, cost = bool(sol.success), float(sol.cost) + 0.5 * spread_one

    items, mismatch = terms.items, terms.mismatch
    flags: list[list[str]] = []
    for c in range(n_cls):
        f: list[str] = []
        if not present[c]:
            f.append("not_fitted")
        if items[c] < FEW_FACES:
            f.append("few_faces")
        if np.isfinite(p10[c]) and p10[c] > 0 and p90[c] / p10[c] > WIDE_SPREAD:
            f.append("wide_spread")
        if outside_range is not None and bool(outside_range[c]):
            f.append("outside_published_range")
        if mismatch[c] > 0:
            f.append(f"dry_wet_mismatch:{mismatch[c]}")
        if present[c] and (np.isclose(np.log(n_target[c]), lo[c], atol=1e-9)
                           or np.isclose(np.log(n_target[c]), hi[c], atol=1e-9)):
            f.append("at_bound")
        flags.append(f)
    return ClassFit(n_source=n_source, n_target=n_target, ratio=n_target / n_source,
                    ratio_p10=p10, ratio_p50=p50, ratio_p90=p90, items=items,
                    weight_share=weight_share, mismatch=mismatch, flags=flags,
                    success=success, cost=cost)


# ---------------------------------------------------------------------------------------
# stage bias


def _entry_stats(geom: Any, rows: np.ndarray, eta: np.ndarray) -> ClassStats | None:
    """Statistics of items ``rows`` at stages ``eta`` (one entry each) as a ClassStats whose
    items are the entries (one stage column); None where the geometry has no cheap path."""
    if not isinstance(geom, FaceGeometry | CellGeometry | FlatGeometry):
        return None
    pair_item = geom.pair_item
    first = np.searchsorted(pair_item, rows, side="left")
    count = np.searchsorted(pair_item, rows, side="right") - first
    owner = np.repeat(np.arange(rows.size), count)
    offset = np.arange(owner.size) - np.repeat(np.cumsum(count) - count, count)
    q = np.repeat(first, count) + offset
    e = eta[owner]
    if isinstance(geom, FaceGeometry):
        if getattr(geom, "_ramps", None) is None:
            geom._ramps = _RampTable(geom.inv, geom.z0, geom.z1, geom.ds, geom.dl,
                                     geom.pair_item.size)
        wet, per, area = geom._ramps.query(q, e)
        h53 = np.full(wet.size, np.nan)
    elif isinstance(geom, CellGeometry):
        if getattr(geom, "_steps", None) is None:
            geom._steps = _StepTable(geom.inv, geom._z, geom._a, geom._b, geom.pair_item.size)
        wet, per, area = geom._steps.query(q, e)
        h53 = np.full(wet.size, np.nan)
    else:
        h = e - geom.z_flat[geom.pair_item[q]]
        h = np.where(np.isfinite(h) & (h > 0), h, 0.0)
        ext = geom.extent[q]
        wet = ext * (h > 0)
        per, area, h53 = wet, ext * h, ext * h ** (5.0 / 3.0)
    return ClassStats(owner, geom.pair_cls[q], rows.size, geom.n_classes, geom.extent[q],
                      wet[:, None], per[:, None], area[:, None], h53[:, None])


def _conveyance_entries(target: Family, shape: tuple[int, int], rows: np.ndarray,
                        cols: np.ndarray, eta: np.ndarray, n_class: np.ndarray,
                        composite: Composite, k: float) -> np.ndarray:
    """Target conveyance at stage ``eta`` of entry (``rows``, ``cols``) of a stage matrix."""
    geom = target.geometry
    st = None if target.closure == "strip" else _entry_stats(geom, rows, eta)
    if st is not None:
        return conveyance(st, n_class, closure=target.closure, composite=composite, k=k)[:, 0]
    full = np.full(shape, -np.inf)
    full[rows, cols] = eta
    return target.conveyance(full, n_class, composite=composite, k=k)[rows, cols]


def solve_stage(
    target: Family,
    k_wanted: np.ndarray,
    n_class: np.ndarray,
    *,
    start: np.ndarray,
    composite: Composite = "horton_einstein",
    k: float = 1.0,
    rtol: float = 1e-9,
    max_iter: int = 100,
) -> np.ndarray:
    """Stage at which the target conveyance equals ``k_wanted`` (vectorised, bracketed).

    K is zero at the item's low point and grows with the stage (a lumped closure may dip
    where a bench floods, so a bracket may hold several roots: the iteration path below
    decides which one is returned).  A bracket [low point, upper] with the upper end
    (first the start stage) expanded until K >= k_wanted holds a root.  The brackets are
    closed for all entries at once by false position on
    f = K^(3/5) - k_wanted^(3/5) (nearly linear in depth; exact for a flat bed) with the
    Illinois modification, which keeps a bracket and converges superlinearly; only the
    entries still open are evaluated.  Stops when |f| <= rtol x k_wanted^(3/5) or the
    bracket is narrower than rtol x depth.  NaN where ``k_wanted`` is not a positive
    finite number or no bracket is found.

    Parameters
    ----------
    target : Family
    k_wanted : ndarray (n_items, n_stages)
    n_class : ndarray (n_classes,)
    start : ndarray (n_items, n_stages)
        A first guess of the upper end (the source stage).
    """
    geom = target.geometry
    kw = np.asarray(k_wanted, dtype=float)
    shape = kw.shape
    n_items, n_st = shape
    low_i = np.asarray(geom.low, dtype=float)
    low = low_i[:, None] + np.zeros(shape)
    active = np.isfinite(kw) & (kw > 0) & np.isfinite(low)
    t = np.where(active, kw, 0.0) ** 0.6
    s0 = np.where(np.isfinite(start), start, low)
    depth0 = np.maximum(s0 - low, 0.0)
    scale = np.where(depth0 > 0, depth0, 1.0)
    width_tol = rtol * np.maximum(scale, 1.0)

    def f(rows: np.ndarray, cols: np.ndarray, x: np.ndarray, tt: np.ndarray) -> np.ndarray:
        x = np.where(np.isfinite(x), x, -np.inf)
        kk = _conveyance_entries(target, shape, rows, cols, x, n_class, composite, k)
        return kk ** 0.6 - tt

    # bracket [low point, start], the upper end's depth doubled until K >= k_wanted
    lo = np.where(active, low, np.nan)
    f_lo = -t
    hi = np.where(active, low + np.maximum(depth0, 1e-3 * scale), np.nan)
    f_hi = np.full(shape, np.nan)
    r, c = np.nonzero(active)
    h = hi[r, c]
    fh = f(r, c, h, t[r, c])
    sel = np.flatnonzero(fh < 0)
    for _ in range(60):
        if sel.size == 0:
            break
        rs, cs = r[sel], c[sel]
        h[sel] = low[rs, cs] + 2.0 * (h[sel] - low[rs, cs])
        fh[sel] = f(rs, cs, h[sel], t[rs, cs])
        sel = sel[fh[sel] < 0]
    hi[r, c] = h
    f_hi[r, c] = fh
    found = active & np.isfinite(hi) & (f_hi >= 0)

    root = np.full(shape, np.nan)
    hit0 = found & (f_hi <= rtol * t)
    root[hit0] = hi[hit0]
    rr, cc = np.nonzero(found & ~hit0)
    a, b_ = lo[rr, cc], hi[rr, cc]
    fa, fb = f_lo[rr, cc], f_hi[rr, cc]
    ga, gb = fa.copy(), fb.copy()  # Illinois-scaled copies
    side = np.zeros(rr.size, dtype=np.int8)
    tt, wt = t[rr, cc], width_tol[rr, cc]
    res = np.full(rr.size, np.nan)
    todo = np.flatnonzero(b_ - a > wt)
    for _ in range(max_iter):
        if todo.size == 0:
            break
        A, B, GA, GB = a[todo], b_[todo], ga[todo], gb[todo]
        with np.errstate(invalid="ignore", divide="ignore"):
            x = B - GB * (B - A) / (GB - GA)
        bad = ~np.isfinite(x) | (x <= A) | (x >= B)
        x = np.where(bad, 0.5 * (A + B), x)
        fx = f(rr[todo], cc[todo], x, tt[todo])
        hit = np.abs(fx) <= rtol * tt[todo]
        res[todo[hit]] = x[hit]
        up = ~hit & (fx > 0)
        down = ~hit & (fx < 0)
        sd = side[todo]
        # Illinois: the end kept twice in a row has its value halved
        ga[todo] = np.where(up & (sd == 1), 0.5 * GA, GA)
        gb[todo] = np.where(down & (sd == -1), 0.5 * GB, GB)
        iu, idn = todo[up], todo[down]
        b_[iu], fb[iu], gb[iu] = x[up], fx[up], fx[up]
        a[idn], fa[idn], ga[idn] = x[down], fx[down], fx[down]
        side[iu], side[idn] = 1, -1
        keep = ~hit & (b_[todo] - a[todo] > wt[todo])
        todo = todo[keep]
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(fb > fa, -fa / np.where(fb > fa, fb - fa, 1.0), 1.0)
    interp = a + np.clip(frac, 0.0, 1.0) * (b_ - a)
    root[rr, cc] = np.where(np.isfinite(res), res, interp)
    return np.where(found, root, np.nan)


@dataclass(frozen=True)
class StageBias:
    """Target stage minus source stage for the same conveyance (length unit)."""

    unadjusted: np.ndarray   # (n_items, n_stages): n carried over unchanged
    adjusted: np.ndarray     # with the fitted n
    summary: dict[str, dict[str, float]]


def bias_summary(bias: np.ndarray, item_class: np.ndarray, classes: list[str] | tuple[str, ...]) -> dict[str, dict[str, float]]:
    """Median (signed), p90 and max of |bias| per dominant class and overall."""

    def figures(values: np.ndarray) -> dict[str, float]:
        v = values[np.isfinite(values)]
        if v.size == 0:
            return {"median": float("nan"), "p90_abs": float("nan"), "max_abs": float("nan"), "count": 0}
        a = np.abs(v)
        return {"median": float(np.median(v)), "p90_abs": float(np.quantile(a, 0.9)),
                "max_abs": float(a.max()), "count": int(v.size)}

    out = {"overall": figures(bias.ravel())}
    for c, name in enumerate(classes):
        out[str(name)] = figures(bias[item_class == c].ravel())
    return out


def bias_summary_spilled(spill: Any, classes: list[str] | tuple[str, ...]) -> dict[str, dict[str, float]]:
    """:func:`bias_summary` from bias values gathered tile by tile: ``spill`` a plain
    :class:`ntrans.quantiles.SpilledQuantiles` with one group per class and one more for
    items of no class (counted in ``overall`` only).  The largest |bias| is its 1-quantile."""
    counts = spill.counts()
    signed = spill.quantiles([0.5])[:, 0]
    p90_abs, max_abs = spill.quantiles([0.9, 1.0], absolute=True).T

    def figures(row: int) -> dict[str, float]:
        if counts[row] == 0:
            return {"median": float("nan"), "p90_abs": float("nan"), "max_abs": float("nan"),
                    "count": 0}
        return {"median": float(signed[row]), "p90_abs": float(p90_abs[row]),
                "max_abs": float(max_abs[row]), "count": int(counts[row])}

    out = {"overall": figures(counts.size - 1)}
    for c, name in enumerate(classes):
        out[str(name)] = figures(c)
    return out


def stage_bias(
    source_stages: np.ndarray,
    k_source: np.ndarray,
    target: Family,
    n_source: np.ndarray,
    n_fitted: np.ndarray,
    *,
    composite: Composite = "horton_einstein",
    k: float = 1.0,
    item_class: np.ndarray | None = None,
    classes: list[str] | tuple[str, ...] = (),
) -> StageBias:
    """Stage bias of the target with n carried over and with the fitted n.

    For each item and window stage eta_s, the target stage eta_t solves
    K_target(eta_t) = K_source(eta_s) (DESIGN.md "Stage bias"); bias = eta_t - eta_s.
    Positive = the target overpredicts stage.  NaN where the source is dry.

    ``summary`` holds, overall and per class (the item's dominant class), the signed
    median and the p90 and max of |bias|.
    """
    eta = np.asarray(source_stages, dtype=float)
    un = solve_stage(target, k_source, n_source, start=eta, composite=composite, k=k) - eta
    ad = solve_stage(target, k_source, n_fitted, start=eta, composite=composite, k=k) - eta
    ic = np.full(eta.shape[0], -1) if item_class is None else np.asarray(item_class)
    summary = {"unadjusted": bias_summary(un, ic, classes), "adjusted": bias_summary(ad, ic, classes)}
    return StageBias(un, ad, summary)  # type: ignore[arg-type]
