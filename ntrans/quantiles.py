"""Exact quantiles of more values than a job should hold in memory, by group.

The values are read chunk by chunk, twice: from a spill file on disk that a job fills
one tile at a time (:class:`SpilledQuantiles`), or from a source that gives them again
on every call, such as a few columns of a Parquet table (:class:`SourceQuantiles`).  The
quantiles take two passes over the values: one makes a histogram per group on
fixed bins, which says which bins hold the values each quantile needs (the value where
the cumulative weight or count crosses it and its neighbours); the other reads back only
those bins' values, which are sorted and interpolated.  Memory: the histograms (two
arrays of ``n_bins + 2`` per group) and the values of a few bins; the answer is the one
the whole array would give (:func:`ntrans.translate.weighted_quantile` for weighted
values, ``numpy.quantile`` for plain ones), to round-off.

Weights may come in two parts, a weight per value and a factor per column (a stage
column whose total is only known once every tile is in): the spill keeps the column and
the factors are given when the quantiles are asked for.

Bins are uniform on a monotone scale of the values (``log`` for positive ratios,
``asinh`` around a length unit for signed differences), with one bin below and one above
the range, so every value has a bin; the bins only decide how many values are read
back, never the answer.  With 65,536 bins a bin of ratios spans 0.04 %; values crowded
into a few bins (many exactly equal, say) are read back whole, so memory then grows with
their number.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path
from typing import Literal

import numpy as np

Scale = Literal["log", "asinh"]

#: rows read back at a time from a spill file (a chunk's arrays: about 60 bytes a row)
READ_ROWS = 1 << 18


def _order_position(n: int, q: float) -> float:
    """0-based position of the q-quantile among n sorted values, numpy.quantile's linear
    method, in the same arithmetic as numpy (n q + (1 - q) - 1, not (n - 1) q)."""
    return n * q + (1.0 - q) - 1.0


Chunk = tuple[np.ndarray, np.ndarray, "np.ndarray | None", "np.ndarray | None"]


class BinnedQuantiles:
    """Exact quantiles by group from values read chunk by chunk, twice (see the module).

    Subclasses say where the values come from (:meth:`_source`): a spill file
    (:class:`SpilledQuantiles`) or a table that can be read again (:class:`SourceQuantiles`).

    Parameters
    ----------
    n_groups : groups are 0 .. n_groups - 1; :meth:`quantiles` also answers for all
        groups together.
    scale, unit, span, n_bins : the bins: ``n_bins`` uniform bins of ``log(v)`` (values
        <= 0 below the range) or ``asinh(v / unit)`` over ``span``, plus one bin on each
        side.  They decide how many values are read back, never the answer.
    weighted : values carry weights (quantiles of the weighted mid-step ECDF); else
        plain values (``numpy.quantile``'s default, linear between order statistics).
    """

    def __init__(self, n_groups: int, *, scale: Scale = "log", unit: float = 1.0,
                 span: tuple[float, float] = (-12.0, 12.0), n_bins: int = 1 << 16,
                 weighted: bool = True) -> None:
        if scale not in ("log", "asinh"):
            raise ValueError(f"scale {scale!r} is unknown; use 'log' or 'asinh'")
        self.n_groups = int(n_groups)
        self.scale, self.unit = scale, float(unit)
        self.lo, self.hi = float(span[0]), float(span[1])
        self.n_bins = int(n_bins)
        self.weighted = bool(weighted)
        #: values counted by the last :meth:`quantiles` call, per group and in all
        self.last_counts: np.ndarray | None = None

    def _source(self) -> Iterator[Chunk]:
        """(groups, values, weights or None, columns or None) chunk by chunk, from the
        start each time it is called."""
        raise NotImplementedError

    def _bins(self, values: np.ndarray) -> np.ndarray:
        """Bin of each value (0 below the range, n_bins + 1 above), in value order."""
        with np.errstate(divide="ignore", invalid="ignore"):
            t = np.log(values) if self.scale == "log" else np.arcsinh(values / self.unit)
        pos = (t - self.lo) * (self.n_bins / (self.hi - self.lo))
        out = np.floor(np.clip(np.nan_to_num(pos, nan=-1.0, neginf=-1.0), -1.0, self.n_bins))
        return out.astype(np.int64) + 1

    def _chunks(self, absolute: bool, column_factor: np.ndarray | None,
                ) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None, np.ndarray]]:
        """(groups, values, weights or None, bins) chunk by chunk, values made absolute and
        weights multiplied by their column factor as asked; NaN values and weights not
        > 0 are left out."""
        for groups, values, weights, columns in self._source():
            groups = np.asarray(groups, dtype=np.int64)
            values = np.abs(values) if absolute else np.asarray(values, dtype=float)
            keep = np.isfinite(values)
            if self.weighted:
                if weights is None:
                    raise ValueError("weighted quantiles need weights")
                weights = np.array(weights, dtype=float)
                if column_factor is not None:
                    weights *= column_factor[0 if columns is None else columns]
                keep &= np.isfinite(weights) & (weights > 0)
            else:
                weights = None
            if not keep.all():
                groups, values = groups[keep], values[keep]
                weights = None if weights is None else weights[keep]
            yield groups, values, weights, self._bins(values)

    def counts(self) -> np.ndarray:
        """Values per group and, last, in all groups (weighted: those with a weight > 0)."""
        counts = np.zeros(self.n_groups, dtype=np.int64)
        for groups, _, _, _ in self._chunks(False, None):
            counts += np.bincount(groups, minlength=self.n_groups)
        return np.append(counts, counts.sum())

    def quantiles(self, q: list[float] | np.ndarray, *, absolute: bool = False,
                  column_factor: np.ndarray | None = None, lower: bool = False) -> np.ndarray:
        """(n_groups + 1, len(q)) quantiles (of |v| with ``absolute``), the last row of
        all groups together; NaN for a group without values.  Weighted values count with
        their weight x ``column_factor[column]`` (rows whose product is 0 are left out).
        The values counted, per group and in all, are kept in ``last_counts``.

        ``lower`` (weighted only): instead of the mid-step ECDF, the smallest value whose
        cumulative weight (values in ascending order) reaches q x the total weight.
        """
        if lower and not self.weighted:
            raise ValueError("the lower quantile is defined here for weighted values only")
        q = np.asarray(q, dtype=float)
        factor = None if column_factor is None else np.asarray(column_factor, dtype=float)
        width = self.n_bins + 2
        count = np.zeros((self.n_groups, width), dtype=np.int64)
        weight = np.zeros((self.n_groups, width)) if self.weighted else None
        for groups, _, weights, bins in self._chunks(absolute, factor):
            key = groups * width + bins
            count += np.bincount(key, minlength=count.size).reshape(count.shape)
            if weight is not None:
                weight += np.bincount(key, weights=weights,
                                      minlength=weight.size).reshape(weight.shape)
        tables = np.vstack([count, count.sum(axis=0)])
        self.last_counts = tables.sum(axis=1)
        masses = (tables.astype(float) if weight is None
                  else np.vstack([weight, weight.sum(axis=0)]))
        out = np.full((tables.shape[0], q.size), np.nan)
        # per (row, q): the bin range whose values decide, and the mass before it
        plans: list[list[tuple[int, int, int, float, float, int]]] = [
            [] for _ in range(tables.shape[0])]
        wanted = np.zeros(tables.shape, dtype=bool)
        for r in range(tables.shape[0]):
            n = int(tables[r].sum())
            if n == 0:
                continue
            cum = np.cumsum(masses[r])
            total = float(cum[-1])
            nonempty = np.flatnonzero(tables[r])
            for j, qj in enumerate(q):
                if self.weighted:
                    # the bracket of the mid-step ECDF (and the lower quantile) lies
                    # within the value where the cumulative weight reaches q and its two
                    # neighbours
                    target = int(np.searchsorted(cum, qj * total, side="left"))
                    at = min(target, int(nonempty[-1]))
                    i = int(np.searchsorted(nonempty, at))
                    lo_bin = int(nonempty[max(i - 1, 0)])
                    i = int(np.searchsorted(nonempty, at, side="right"))
                    hi_bin = int(nonempty[min(i, nonempty.size - 1)])
                else:
                    # numpy.quantile (linear): order statistics floor(h) and floor(h) + 1
                    k0 = int(np.floor(_order_position(n, float(qj))))
                    lo_bin = int(np.searchsorted(cum, k0 + 1, side="left"))
                    hi_bin = int(np.searchsorted(cum, min(k0 + 2, n), side="left"))
                before = float(cum[lo_bin - 1]) if lo_bin > 0 else 0.0
                plans[r].append((j, lo_bin, hi_bin, before, total, n))
                wanted[r, lo_bin:hi_bin + 1] = True
        picked = self._read_back(wanted, absolute, factor)
        for r, plan in enumerate(plans):
            values, weights, bins = picked[r]
            for j, lo_bin, hi_bin, before, total, n in plan:
                sel = (bins >= lo_bin) & (bins <= hi_bin)
                out[r, j] = _answer(values[sel], None if weights is None else weights[sel],
                                    before, total, n, float(q[j]), lower=lower)
        return out

    def _read_back(self, wanted: np.ndarray, absolute: bool, factor: np.ndarray | None,
                   ) -> list[tuple[np.ndarray, np.ndarray | None, np.ndarray]]:
        """Values (in the order read), weights and bins of the wanted bins, per row."""
        found: list[list[tuple[np.ndarray, np.ndarray | None, np.ndarray]]] = [
            [] for _ in range(wanted.shape[0])]
        per_group = wanted[:-1].reshape(-1)
        if wanted.any():
            for groups, values, weights, bins in self._chunks(absolute, factor):
                mine = np.flatnonzero(per_group[groups * (self.n_bins + 2) + bins])
                for g in np.unique(groups[mine]):
                    take = mine[groups[mine] == g]
                    found[g].append((values[take], None if weights is None else weights[take],
                                     bins[take]))
                take = np.flatnonzero(wanted[-1, bins])
                if take.size:
                    found[-1].append((values[take], None if weights is None else weights[take],
                                      bins[take]))
        out = []
        for parts in found:
            if parts:
                values = np.concatenate([p[0] for p in parts])
                weights = None if parts[0][1] is None else np.concatenate([p[1] for p in parts])
                bins = np.concatenate([p[2] for p in parts])
            else:
                values, weights, bins = np.empty(0), None, np.empty(0, dtype=np.int64)
            out.append((values, weights, bins))
        return out


class SpilledQuantiles(BinnedQuantiles):
    """Values (with optional weights) by group, added chunk by chunk to a spill file, for
    exact quantiles in bounded memory.

    Parameters
    ----------
    path : spill file to create (removed by :meth:`close`).
    n_groups, scale, unit, span, n_bins, weighted : as :class:`BinnedQuantiles`.
    """

    def __init__(self, path: str | os.PathLike[str], n_groups: int, *, scale: Scale = "log",
                 unit: float = 1.0, span: tuple[float, float] = (-12.0, 12.0),
                 n_bins: int = 1 << 16, weighted: bool = True) -> None:
        super().__init__(n_groups, scale=scale, unit=unit, span=span, n_bins=n_bins,
                         weighted=weighted)
        self.path = Path(path)
        self.dtype = np.dtype([("group", "<i4"), ("value", "<f8")]
                              + ([("weight", "<f8"), ("column", "<i4")] if weighted else []))
        self.rows = 0
        self._counts = np.zeros(self.n_groups, dtype=np.int64)
        self._file = open(self.path, "wb")  # noqa: SIM115 - kept open across add() calls

    def add(self, groups: np.ndarray, values: np.ndarray, weights: np.ndarray | None = None,
            columns: np.ndarray | None = None) -> None:
        """Add values of the given groups (arrays of one shape, or broadcast to the
        values'); NaN values and weights not > 0 are left out.  ``columns`` index the
        column factors given to :meth:`quantiles` (default 0)."""
        values = np.asarray(values, dtype=float)
        shape = values.shape
        values = values.ravel()
        groups = np.broadcast_to(np.asarray(groups, dtype=np.int64), shape).ravel()
        keep = np.isfinite(values)
        if self.weighted:
            if weights is None:
                raise ValueError("weighted quantiles need weights")
            weights = np.broadcast_to(np.asarray(weights, dtype=float), shape).ravel()
            columns = np.broadcast_to(np.asarray(0 if columns is None else columns,
                                                 dtype=np.int64), shape).ravel()
            keep &= np.isfinite(weights) & (weights > 0)
        if not keep.all():
            values, groups = values[keep], groups[keep]
            if weights is not None and columns is not None:
                weights, columns = weights[keep], columns[keep]
        if values.size == 0:
            return
        if groups.min() < 0 or groups.max() >= self.n_groups:
            raise ValueError(f"groups must be 0 .. {self.n_groups - 1}")
        rows = np.empty(values.size, dtype=self.dtype)
        rows["group"], rows["value"] = groups, values
        if self.weighted:
            rows["weight"], rows["column"] = weights, columns
        rows.tofile(self._file)
        self.rows += values.size
        self._counts += np.bincount(groups, minlength=self.n_groups)

    def _source(self) -> Iterator[Chunk]:
        self._file.flush()
        if not self.rows:
            return
        # read into memory chunk by chunk (a memory map would add every page of the file
        # to the process's resident memory as it is read)
        with open(self.path, "rb") as source:
            for start in range(0, self.rows, READ_ROWS):
                chunk = np.fromfile(source, dtype=self.dtype,
                                    count=min(READ_ROWS, self.rows - start))
                yield (chunk["group"], chunk["value"],
                       chunk["weight"] if self.weighted else None,
                       chunk["column"] if self.weighted else None)

    def counts(self) -> np.ndarray:
        """Values added per group and, last, in all groups."""
        return np.append(self._counts, self._counts.sum())

    def close(self) -> None:
        """Close and remove the spill file."""
        if not self._file.closed:
            self._file.close()
        self.path.unlink(missing_ok=True)

    def __enter__(self) -> SpilledQuantiles:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class SourceQuantiles(BinnedQuantiles):
    """Exact quantiles by group of values a source gives again on every call, such as a
    few columns of a Parquet table read row group by row group: no spill file.

    Parameters
    ----------
    read : called once per pass (two per :meth:`quantiles`, one per :meth:`counts`); an
        iterable of ``(groups, values, weights)`` array triples (weights None when not
        ``weighted``).  NaN values and weights not > 0 are left out.
    n_groups, scale, unit, span, n_bins, weighted : as :class:`BinnedQuantiles`.
    """

    def __init__(self, read: Callable[[], Iterable[tuple[np.ndarray, np.ndarray, np.ndarray | None]]],
                 n_groups: int, *, scale: Scale = "log", unit: float = 1.0,
                 span: tuple[float, float] = (-12.0, 12.0), n_bins: int = 1 << 16,
                 weighted: bool = True) -> None:
        super().__init__(n_groups, scale=scale, unit=unit, span=span, n_bins=n_bins,
                         weighted=weighted)
        self._read = read

    def _source(self) -> Iterator[Chunk]:
        for groups, values, weights in self._read():
            yield groups, values, weights, None


def _answer(values: np.ndarray, weights: np.ndarray | None, before: float, total: float,
            n: int, q: float, *, lower: bool = False) -> float:
    """The quantile from the values of a run of bins, with the weight (or count) of all
    values before them, ``total`` weight and ``n`` values in all (``lower``: see
    :meth:`BinnedQuantiles.quantiles`)."""
    order = np.argsort(values, kind="stable")
    v = values[order]
    if weights is None:
        h = _order_position(n, q)
        k0 = int(np.floor(h))
        i0 = k0 - int(before)
        i1 = min(i0 + 1, v.size - 1)
        return float(np.quantile(v[[i0, i1]], h - k0)) if i1 > i0 else float(v[i0])
    w = weights[order]
    if lower:
        at = int(np.searchsorted(before + np.cumsum(w), q * total, side="left"))
        return float(v[min(at, v.size - 1)])
    mid = (before + np.cumsum(w) - 0.5 * w) / total
    return float(np.interp(q, mid, v))
