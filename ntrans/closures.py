"""Composite n and face conveyance per friction closure (pure numpy).

Composite n along a face or across a section (METHODS.md "Composite n"; Chow 1959 6-7,
Yen 2002):

- ``horton_einstein``  n_e = (sum P_i n_i^1.5 / P)^(2/3)      equal mean velocity
- ``pavlovskii``       n_e = (sum P_i n_i^2 / P)^(1/2)        resistances add
- ``lotter``           n_e = P R^(5/3) / sum(P_i R_i^(5/3) / n_i)   discharges add
- ``krishnamurthy_christensen``  ln n_e = sum P_i y_i^1.5 ln n_i / sum P_i y_i^1.5

Face conveyance per friction closure (METHODS.md "Friction closures"), at stage eta,
k = 1.0 (SI) or 1.486 (US customary):

- ``flat``:   K = (k / n_f) L h^(5/3), h = (eta - z_f)+, n_f the composite of the
  segment n weighted by plan length (every segment at the same depth)
- ``lumped``: K = k A R^(2/3) / n_e, n_e the composite over the parts wet at that stage
  (perimeter-weighted); with ``lotter``, K = k sum_i A_i R_i^(2/3) / n_i per segment
- ``strip``:  K = k sum_j (1/n_j) integral over segment j of h^(5/3) ds, integrated
  exactly over each linear segment (closed form in h^(8/3), partial wetting included)

Segment indexing: per-segment n values are arrays indexed by the segment's start
station (length ``n_stations`` or ``n_stations - 1``; see :class:`ntrans.faces.Profiles`).
Segments with a NaN elevation end or a NaN n are dropped.

To evaluate at arbitrary stage matrices (e.g. a vectorised bisection on stage), call
:func:`face_conveyance` with an ``(n_faces, 1)`` stage matrix per iteration, or use
:func:`segment_hydraulics` on the :class:`ntrans.faces.Segments` of the profiles.
"""

from __future__ import annotations

import logging
from typing import Literal

import numpy as np

from .errors import InputError
from .faces import (
    LEVEL_RATIO,
    Profiles,
    Segments,
    _breakpoints,
    _chunks,
    _queries,
    _station_column,
    profile_segments,
    ramp_sums,
)

logger = logging.getLogger(__name__)

__all__ = [
    "CLOSURES",
    "COMPOSITE_METHODS",
    "composite_n",
    "face_conveyance",
    "segment_hydraulics",
]

CompositeMethod = Literal["horton_einstein", "pavlovskii", "lotter", "krishnamurthy_christensen"]
COMPOSITE_METHODS: tuple[str, ...] = (
    "horton_einstein",
    "pavlovskii",
    "lotter",
    "krishnamurthy_christensen",
)
Closure = Literal["flat", "lumped", "strip"]
CLOSURES: tuple[str, ...] = ("flat", "lumped", "strip")

#: Simpson's rule replaces the closed form when the depth varies by less than this
#: fraction over a fully wet segment (the closed form then loses digits)
_SIMPSON_BELOW = 1e-3
_CHUNK = 1 << 21  # segment-stage values per block


def _check_method(method: str) -> None:
    if method not in COMPOSITE_METHODS:
        raise InputError(
            f"composite method {method!r} is not one of {', '.join(COMPOSITE_METHODS)}; pick one"
        )


def composite_n(
    part_perimeter: np.ndarray,
    part_n: np.ndarray,
    method: CompositeMethod = "horton_einstein",
    *,
    part_radius: np.ndarray | None = None,
    part_depth: np.ndarray | None = None,
    axis: int = -1,
) -> np.ndarray:
    """Composite Manning's n of parts of a section, reduced along ``axis``.

    Parameters
    ----------
    part_perimeter : array
        Wetted perimeter P_i of each part (length units, >= 0).
    part_n : array
        Manning's n_i of each part (broadcast with ``part_perimeter``).
    method : {"horton_einstein", "pavlovskii", "lotter", "krishnamurthy_christensen"}
    part_radius : array, optional
        Hydraulic radius R_i of each part (needed by ``lotter``).
    part_depth : array, optional
        Mean depth y_i of each part (needed by ``krishnamurthy_christensen``).

    Returns
    -------
    array with ``axis`` removed; NaN where the total perimeter is 0 (or the weights
    of the method are all 0).

    Examples
    --------
    >>> float(composite_n([1.0, 3.0], [0.03, 0.03], "pavlovskii"))
    0.03
    """
    _check_method(method)
    p = np.asarray(part_perimeter, dtype=np.float64)
    n = np.asarray(part_n, dtype=np.float64)
    p, n = np.broadcast_arrays(p, n)
    ptot = np.sum(p, axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        if method == "horton_einstein":
            out = (np.sum(p * n**1.5, axis=axis) / ptot) ** (2.0 / 3.0)
        elif method == "pavlovskii":
            out = np.sqrt(np.sum(p * n**2, axis=axis) / ptot)
        elif method == "lotter":
            if part_radius is None:
                raise InputError("composite method 'lotter' needs part_radius; pass the hydraulic radius of each part")
            r = np.broadcast_to(np.asarray(part_radius, dtype=np.float64), p.shape)
            area = np.sum(p * r, axis=axis)
            radius = area / ptot
            den = np.sum(np.where(p > 0, p * r ** (5.0 / 3.0) / n, 0.0), axis=axis)
            out = ptot * radius ** (5.0 / 3.0) / den
        else:
            if part_depth is None:
                raise InputError(
                    "composite method 'krishnamurthy_christensen' needs part_depth; pass the mean depth of each part"
                )
            y = np.broadcast_to(np.asarray(part_depth, dtype=np.float64), p.shape)
            w = p * y**1.5
            wsum = np.sum(w, axis=axis)
            out = np.exp(np.sum(np.where(w > 0, w * np.log(n), 0.0), axis=axis) / wsum)
        out = np.where(ptot > 0, out, np.nan)
    return out


def segment_hydraulics(
    z0: np.ndarray,
    z1: np.ndarray,
    ds: np.ndarray,
    dl: np.ndarray,
    eta: np.ndarray,
) -> dict[str, np.ndarray]:
    """Exact hydraulics of linear profile segments at given stages.

    Parameters
    ----------
    z0, z1, ds, dl : (n_segments,) arrays
        End elevations, plan length and 3-D length of each segment (e.g. the fields of
        :class:`ntrans.faces.Segments`).
    eta : (n_segments, m) array
        Stage for each segment (e.g. ``stages[segments.face]``).

    Returns
    -------
    dict of (n_segments, m) arrays: ``area`` integral of h ds, ``perimeter`` submerged
    3-D length, ``top_width`` wet plan length, ``h53`` integral of h^(5/3) ds.
    """
    z0 = np.asarray(z0, dtype=np.float64)[:, None]
    z1 = np.asarray(z1, dtype=np.float64)[:, None]
    ds = np.asarray(ds, dtype=np.float64)[:, None]
    dl = np.asarray(dl, dtype=np.float64)[:, None]
    eta = np.asarray(eta, dtype=np.float64)
    zlo = np.minimum(z0, z1)
    zhi = np.maximum(z0, z1)
    dz = zhi - zlo
    level = dz <= LEVEL_RATIO * ds
    zmid = 0.5 * (zlo + zhi)
    h_lo = np.maximum(eta - zhi, 0.0)  # depth at the high end
    h_hi = np.maximum(eta - zlo, 0.0)  # depth at the low end
    h_mid = np.maximum(eta - zmid, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        span = np.where(level, 1.0, dz)
        frac = np.where(level, (eta > zmid) * 1.0, np.clip((eta - zlo) / span, 0.0, 1.0))
        area = np.where(
            level,
            ds * h_mid,
            np.where(eta >= zhi, ds * h_mid, ds * h_hi * h_hi / (2.0 * span)),
        )
        # integral of h^(5/3): ds/dz * 3/8 * (h_hi^(8/3) - h_lo^(8/3)); Simpson where the
        # depth barely varies along a fully wet segment (closed form would cancel)
        closed = ds / span * 0.375 * (h_hi ** (8.0 / 3.0) - h_lo ** (8.0 / 3.0))
        simpson = ds / 6.0 * (
            h_lo ** (5.0 / 3.0) + 4.0 * (0.5 * (h_lo + h_hi)) ** (5.0 / 3.0) + h_hi ** (5.0 / 3.0)
        )
        thin = (h_lo > 0) & (h_hi - h_lo < _SIMPSON_BELOW * h_hi)
        h53 = np.where(level, ds * h_mid ** (5.0 / 3.0), np.where(thin, simpson, closed))
    bad = np.isnan(eta)
    out = {
        "area": area,
        "perimeter": dl * frac,
        "top_width": ds * frac,
        "h53": h53,
    }
    for v in out.values():
        v[bad] = np.nan
    return out


def _segment_n(profiles: Profiles, n_segment: np.ndarray | float | None) -> np.ndarray:
    """n per start station (length n_stations)."""
    ns = profiles.n_stations
    if n_segment is None:
        return np.ones(ns)
    n = np.asarray(n_segment, dtype=np.float64)
    if n.ndim == 0:
        return np.full(ns, float(n))
    n = n.ravel()
    if n.size == ns - 1:
        n = np.concatenate([n, [np.nan]])
    if n.size != ns:
        raise InputError(
            f"n_segment has {n.size} values for {ns} stations; give one per start station "
            "(n_stations or n_stations - 1 values)"
        )
    used = profiles.segment_index()
    if np.any(n[used] <= 0):
        raise InputError("n_segment holds zero or negative Manning's n; give positive values")
    return n


def _pow53(x: np.ndarray) -> np.ndarray:
    """x^(5/3) for x >= 0 (cube roots are cheaper than a general power)."""
    return x * np.cbrt(x * x)


def _pow83(x: np.ndarray) -> np.ndarray:
    """x^(8/3) for x >= 0."""
    x2 = x * x
    return x2 * np.cbrt(x2)


def _lotter_kernel(seg: Segments, sl: slice, eta: np.ndarray, inv_n: np.ndarray) -> np.ndarray:
    """(1/n) A_i^(5/3) / P_i^(2/3) per segment of ``sl`` and stage (the segment's own A, P)."""
    zlo, zhi = seg.zlo[sl][:, None], seg.zhi[sl][:, None]
    ds, dl = seg.ds[sl][:, None], seg.dl[sl][:, None]
    dz = zhi - zlo
    level = dz <= LEVEL_RATIO * ds
    span = np.where(level, 1.0, dz)
    h_low_end = np.maximum(eta - zlo, 0.0)
    full = eta >= zhi
    frac = np.where(full, 1.0, np.where(level, 0.0, h_low_end / span))
    area = np.where(full, ds * (eta - 0.5 * (zlo + zhi)), ds * h_low_end * h_low_end / (2.0 * span))
    area = np.where(level & ~full, 0.0, area)
    # A^(5/3) P^(-2/3) = A (A/P)^(2/3); ds/dl scales the plan fraction to the 3-D one
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.where(frac > 0, area / (dl * np.where(frac > 0, frac, 1.0)), 0.0)
    return area * np.cbrt(r * r) * inv_n[sl][:, None]


def _strip_by_stations(seg: Segments, eta: np.ndarray, inv_n: np.ndarray) -> np.ndarray:
    """Strip conveyance sum over a face's segments of (1/n) integral of h^(5/3) ds.

    A rising segment contributes (3/8) ds/dz [(eta - zlo)+^(8/3) - (eta - zhi)+^(8/3)] / n,
    so the face total is a sum over stations i of C_i (eta - z_i)+^(8/3), with C_i the
    signed coefficients of the segments meeting there; level segments add
    ds/n (eta - z_mean)+^(5/3).  The stations (and level means) are the breakpoints of
    :func:`ntrans.faces.ramp_sums`, sorted by elevation within each face, so the wet ones
    at a stage are a prefix: one power per *wet* station and stage, summed per
    (face, stage) with ``np.add.reduceat``.
    """
    n_faces, n_st = eta.shape
    out = np.zeros((n_faces, n_st))
    for f0, f1, lo, hi, sub in _chunks(seg):
        out[f0:f1] = _strip_chunk(sub, np.ascontiguousarray(eta[f0:f1]), inv_n[lo:hi])
    return np.maximum(out, 0.0)


def _strip_chunk(seg: Segments, eta: np.ndarray, inv_n: np.ndarray) -> np.ndarray:
    from ._kernels import strip_station_sums

    bp = _breakpoints(seg)
    q = _queries(seg, bp, eta)
    ds_n = seg.ds * inv_n
    c83 = _station_column(seg, bp, 0.375 * ds_n * bp["inv_dz_up"], None)
    if bp["lev"].size:
        c53 = _station_column(seg, bp, None, ds_n)
        is_level = bp["order"] >= bp["n_used"]
    else:
        c53 = np.zeros(c83.size)
        is_level = np.zeros(c83.size, dtype=bool)
    # the wet breakpoints of each (face, stage) are a prefix of the face's sorted ones:
    # one pass per query in compiled code (no pairs array, one root per wet station)
    total = strip_station_sums(
        np.ascontiguousarray(q["ev"], dtype=np.float64),
        np.ascontiguousarray(q["q_start"], dtype=np.int64),
        np.ascontiguousarray(q["pos"], dtype=np.int64),
        np.ascontiguousarray(bp["b"], dtype=np.float64),
        np.ascontiguousarray(c83, dtype=np.float64),
        np.ascontiguousarray(c53, dtype=np.float64),
        np.ascontiguousarray(is_level, dtype=np.bool_),
    )
    return total.reshape(eta.shape)


def _sum_per_face(seg: Segments, eta: np.ndarray, kernel, inv_n: np.ndarray) -> np.ndarray:
    """Sum ``kernel`` over each face's segments, chunked over segments to bound memory."""
    n_faces, n_st = eta.shape
    acc = np.zeros(n_faces * n_st)
    rows_per = max(1, _CHUNK // max(n_st, 1))
    cols = np.arange(n_st)
    for lo in range(0, seg.face.size, rows_per):
        sl = slice(lo, lo + rows_per)
        f = seg.face[sl]
        values = kernel(seg, sl, eta[f], inv_n)
        flat_idx = (f[:, None] * n_st + cols[None, :]).ravel()
        acc += np.bincount(flat_idx, weights=np.nan_to_num(values).ravel(), minlength=acc.size)
    return acc.reshape(n_faces, n_st)


def _kc_kernel_sums(seg: Segments, eta: np.ndarray, nseg: np.ndarray) -> list[np.ndarray]:
    """Per face: sum P_i y_i^1.5, sum P_i y_i^1.5 ln n_i (y_i = A_i / T_i)."""
    log_n = np.log(nseg)

    def w(seg_: Segments, sl: slice, e: np.ndarray, _inv: np.ndarray) -> np.ndarray:
        hyd = segment_hydraulics(seg_.z0[sl], seg_.z1[sl], seg_.ds[sl], seg_.dl[sl], e)
        a, p, t = hyd["area"], hyd["perimeter"], hyd["top_width"]
        with np.errstate(invalid="ignore", divide="ignore"):
            y = np.where(t > 0, a / np.where(t > 0, t, 1.0), 0.0)
        return p * y**1.5

    def wl(seg_: Segments, sl: slice, e: np.ndarray, _inv: np.ndarray) -> np.ndarray:
        return w(seg_, sl, e, _inv) * log_n[sl][:, None]

    return [_sum_per_face(seg, eta, w, nseg), _sum_per_face(seg, eta, wl, nseg)]


def face_conveyance(
    profiles: Profiles,
    stages: np.ndarray,
    *,
    closure: Closure,
    n_segment: np.ndarray | float | None = None,
    flat_bed: np.ndarray | None = None,
    composite: CompositeMethod = "horton_einstein",
    k: float = 1.0,
    z_to_xy: float = 1.0,
) -> np.ndarray:
    """Conveyance K of each face at each stage for one friction closure.

    Parameters
    ----------
    profiles : Profiles
    stages : (n_faces, n_stages) or (n_stages,) array
        Water-surface elevations (vertical units); NaN gives NaN.
    closure : {"flat", "lumped", "strip"}
    n_segment : array or float, optional
        Manning's n per segment, indexed by start station (see module docstring);
        default 1.0 everywhere (geometric conveyance G = K n).
    flat_bed : (n_faces,) array
        Bed elevation of each flat face (needed by ``flat``).
    composite : {"horton_einstein", "pavlovskii", "lotter", "krishnamurthy_christensen"}
        How segment n values combine (``flat``: plan-length weights at equal depth;
        ``lumped``: over the wet parts at each stage).  Not used by ``strip``.
    k : float
        Manning unit factor, 1.0 (SI) or 1.486 (US customary).
    z_to_xy : float
        Converts vertical to horizontal units for the wetted perimeter.

    Returns
    -------
    (n_faces, n_stages) array, units k x length^(8/3) / n; 0 where dry, NaN where the
    stage is NaN or the face has no usable segment (``flat``: no usable n).
    """
    if closure not in CLOSURES:
        raise InputError(f"closure {closure!r} is not one of {', '.join(CLOSURES)}; pick one")
    _check_method(composite)
    n_st_all = _segment_n(profiles, n_segment)
    eta = np.asarray(stages, dtype=np.float64)
    if eta.ndim == 1:
        eta = np.broadcast_to(eta, (profiles.n_faces, eta.size))
    if eta.ndim != 2 or eta.shape[0] != profiles.n_faces:
        raise InputError(
            f"stages have shape {np.shape(stages)}; give (n_stages,) or (n_faces, n_stages)"
        )
    k = float(k)

    if closure == "flat":
        if flat_bed is None:
            raise InputError("closure 'flat' needs flat_bed, the bed elevation of each face")
        bed = np.asarray(flat_bed, dtype=np.float64).ravel()
        idx = profiles.segment_index()
        nseg = n_st_all[idx]
        ok = np.isfinite(nseg)
        face = profiles.face[idx][ok]
        ds = (profiles.station[idx + 1] - profiles.station[idx])[ok]
        nseg = nseg[ok]
        if n_segment is None or np.ndim(n_segment) == 0:  # uniform n: no terrain needed
            n_f = np.full(profiles.n_faces, 1.0 if n_segment is None else float(n_segment))
        else:
            n_f = _plan_composite(face, ds, nseg, composite, profiles.n_faces)
        h = np.maximum(eta - bed[:, None], 0.0)
        h[np.isnan(eta) | np.isnan(bed)[:, None]] = np.nan
        length = np.asarray(profiles.length, dtype=np.float64)
        return k / n_f[:, None] * length[:, None] * h ** (5.0 / 3.0)

    finite = np.isfinite(n_st_all)
    seg = profile_segments(profiles, z_to_xy=z_to_xy, keep=None if finite.all() else finite)
    nseg = n_st_all[seg.start]
    no_terrain = ~np.isfinite(seg.low)[:, None] | np.isnan(eta)

    if closure == "strip":
        out = k * _strip_by_stations(seg, eta, 1.0 / nseg)
    elif composite == "lotter":
        out = k * _sum_per_face(seg, eta, _lotter_kernel, 1.0 / nseg)
    else:
        power = 2.0 if composite == "pavlovskii" else 1.5
        (_, perim, weighted), area = ramp_sums(
            seg, [seg.ds, seg.dl, seg.dl * nseg**power], eta, integrate_first=True
        )
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            if composite == "horton_einstein":
                n_e = (weighted / perim) ** (2.0 / 3.0)
            elif composite == "pavlovskii":
                n_e = np.sqrt(weighted / perim)
            else:  # krishnamurthy_christensen
                wsum, wlog = _kc_kernel_sums(seg, eta, nseg)
                n_e = np.exp(wlog / wsum)
            out = np.where(
                perim > 0, k * area * np.cbrt((area / np.where(perim > 0, perim, 1.0)) ** 2) / n_e, 0.0
            )
    out = np.asarray(out, dtype=np.float64)
    out[no_terrain] = np.nan
    return out


def _plan_composite(
    face: np.ndarray, ds: np.ndarray, n: np.ndarray, method: str, n_faces: int
) -> np.ndarray:
    """Composite n per face with plan-length weights and equal depth on every segment."""
    total = np.bincount(face, weights=ds, minlength=n_faces)
    with np.errstate(invalid="ignore", divide="ignore"):
        if method == "horton_einstein":
            out = (np.bincount(face, weights=ds * n**1.5, minlength=n_faces) / total) ** (2.0 / 3.0)
        elif method == "pavlovskii":
            out = np.sqrt(np.bincount(face, weights=ds * n**2, minlength=n_faces) / total)
        elif method == "lotter":  # equal R: harmonic mean weighted by length
            out = total / np.bincount(face, weights=ds / n, minlength=n_faces)
        else:  # equal depth: length-weighted geometric mean
            out = np.exp(np.bincount(face, weights=ds * np.log(n), minlength=n_faces) / total)
    return np.where(total > 0, out, np.nan)
