"""Figures for a run's maps, plots and report, read from the adjustment tables in passes.

The adjustment tables hold one row per face (or cell) and window stage: 45 million face
rows for a 10^8-pixel DEM, more than a job should hold in memory at once.  Everything the
maps, plots and report need is computed here in passes over the Parquet files, reading a
few columns of one row group at a time:

- per item (face or cell): medians over its rows (:func:`item_medians`; an item's rows are
  contiguous in the table, and those of a row group's last item wait for the next group);
- per cell, medians over every row of every face of the cell
  (:func:`cell_medians_over_faces`): (cell, values) rows go to partition files by cell
  range, and each partition is reduced on its own;
- quantiles per class and depth (:func:`class_ratio_bands`) and of the stage bias
  (:func:`stage_bias_figures`) from :class:`ntrans.quantiles.SourceQuantiles`: one pass
  makes histograms, a second reads back the values of the few bins that decide.

Each figure is the one the whole table in memory gives (pandas medians, numpy / pandas
linear quantiles), to round-off; memory is a row group, a partition and per-item arrays.
"""

from __future__ import annotations

import math
import os
import tempfile
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .plots import StageBiasHistogram
from .quantiles import SourceQuantiles

#: rows read from a table at a time (whole row groups)
READ_ROWS = 1 << 19
#: (cell, values) rows per partition of the per-cell medians over faces: a partition is
#: read whole and grouped (about 200 MB at 2^21 rows of two values)
PART_ROWS = 1 << 21
#: stage-bias quantile bins: uniform in asinh(bias / this), in the DEM's vertical unit
BIAS_BIN_UNIT = 0.001
#: quantiles of the stage bias read in one go: the histogram's range (0.5 and 99.5 % of
#: both sets), then 10, 50 and 90 % for the summary
BIAS_QUANTILES = (0.005, 0.1, 0.5, 0.9, 0.995)
BIAS_NAMES = ("unadjusted", "adjusted")


def read_row_groups(path: str | os.PathLike[str], columns: Sequence[str], *,
                    categorical: Sequence[str] = ()) -> Iterator[pd.DataFrame]:
    """The ``columns`` of a Parquet table (those it has) as DataFrames of whole row groups,
    about :data:`READ_ROWS` rows at a time (one read of several groups costs about a
    third of reading them one by one); ``categorical`` text columns come as pandas
    categoricals."""
    import pyarrow.parquet as pq

    file = pq.ParquetFile(path, read_dictionary=list(categorical) or None)
    present = [c for c in dict.fromkeys(columns) if c in file.schema_arrow.names]
    groups: list[int] = []
    rows = 0
    for i in range(file.num_row_groups):
        groups.append(i)
        rows += file.metadata.row_group(i).num_rows
        if rows >= READ_ROWS or i == file.num_row_groups - 1:
            yield file.read_row_groups(groups, columns=present).to_pandas()
            groups, rows = [], 0


def table_columns(path: str | os.PathLike[str]) -> list[str]:
    """Column names of a Parquet table (from its footer)."""
    import pyarrow.parquet as pq

    return list(pq.ParquetFile(path).schema_arrow.names)


def rows_with(path: str | os.PathLike[str], column: str, wanted: Sequence[Any]) -> pd.DataFrame:
    """The rows of a Parquet table whose ``column`` is one of ``wanted``, in file order,
    reading one row group at a time (those whose min / max statistics rule every wanted
    value out are skipped)."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    file = pq.ParquetFile(path)
    index = file.schema_arrow.get_field_index(column)
    keys = pa.array(list(wanted), type=file.schema_arrow.field(index).type)
    parts = []
    for i in range(file.num_row_groups):
        stats = file.metadata.row_group(i).column(index).statistics
        if stats is not None and stats.has_min_max and len(keys):
            inside = pc.and_(pc.greater_equal(keys, pa.scalar(stats.min, keys.type)),
                             pc.less_equal(keys, pa.scalar(stats.max, keys.type)))
            if not pc.any(inside).as_py():
                continue
        group = file.read_row_group(i)
        parts.append(group.filter(pc.is_in(group.column(column), value_set=keys)))
    if not parts:
        return file.schema_arrow.empty_table().to_pandas()
    return pa.concat_tables(parts).to_pandas()


def whole_items(frames: Iterator[pd.DataFrame], key: str) -> Iterator[pd.DataFrame]:
    """The frames again, the rows of each frame's last ``key`` value held back and put in
    front of the next frame, so no item's contiguous rows are split between two."""
    carry: pd.DataFrame | None = None
    for frame in frames:
        if carry is not None:
            frame = pd.concat([carry, frame], ignore_index=True)
            carry = None
        keys = frame[key].to_numpy()
        if not keys.size:
            continue
        other = keys[::-1] != keys[-1]
        start = keys.size - int(np.argmax(other)) if other.any() else 0
        carry = frame.iloc[start:]
        if start:
            yield frame.iloc[:start]
    if carry is not None and len(carry):
        yield carry


def item_medians(path: str | os.PathLike[str], *, key: str, values: Sequence[str],
                 first: Sequence[str] = ()) -> pd.DataFrame:
    """Per item (the rows sharing ``key``, contiguous in the table): the median of each of
    ``values`` over its rows (NaN ignored) and the first of each of ``first``.

    Returns a DataFrame indexed by ``key``, sorted, with the columns of the table among
    ``values`` and ``first`` (text columns as Python strings).
    """
    present = set(table_columns(path))
    values = [c for c in values if c in present]
    first = [c for c in first if c in present]
    parts = []
    frames = read_row_groups(path, [key, *values, *first], categorical=first)
    for frame in whole_items(frames, key):
        grouped = frame.groupby(key, sort=True)
        part = grouped[values].median()
        for column in first:
            part[column] = grouped[column].first().astype(object)
        parts.append(part)
    if not parts:
        return pd.DataFrame(columns=[*values, *first], index=pd.Index([], name=key))
    out = pd.concat(parts)
    if out.index.has_duplicates:
        raise ValueError(f"the rows of one {key} are not contiguous in {path}")
    return out.sort_index()


def cell_medians_over_faces(path: str | os.PathLike[str], *, cell_ids: np.ndarray,
                            values: Sequence[str], work_dir: str | os.PathLike[str],
                            part_rows: int = PART_ROWS) -> pd.DataFrame:
    """Per cell, the median of each of ``values`` over every row of every face of the
    cell: a face's rows count for both of its cells (``cell_a``, ``cell_b``; no cell
    across the boundary); NaN and infinite values ignored.

    ``path``: a face table with ``face_id, cell_a, cell_b`` and ``values`` (cell ids as in
    ``cell_ids``).  Rows go to partition files by cell (about ``part_rows`` each, in a
    temporary folder under ``work_dir``) and each partition is grouped on its own.

    Returns a DataFrame of ``len(cell_ids)`` rows in the order of ``cell_ids`` (NaN for a
    cell none of whose faces has a value).
    """
    import pyarrow.parquet as pq

    values = list(values)
    n_cells = len(cell_ids)
    out = np.full((n_cells, len(values)), np.nan)
    n_rows = pq.ParquetFile(path).metadata.num_rows
    n_parts = max(1, min(math.ceil(2 * n_rows / int(part_rows)), max(n_cells, 1)))
    per_part = max(math.ceil(n_cells / n_parts), 1)
    index = pd.Index(cell_ids)
    dtype = np.dtype([("cell", "<i8"), *((f"v{i}", "<f8") for i in range(len(values)))])
    with tempfile.TemporaryDirectory(dir=work_dir, prefix="_cell_medians-") as tmp:
        paths = [Path(tmp) / f"part-{p:05d}.bin" for p in range(n_parts)]
        for p in paths:
            p.touch()
        for frame in read_row_groups(path, ["face_id", "cell_a", "cell_b", *values]):
            v = np.array(frame[values].to_numpy(dtype=float))  # a copy: may be read-only
            v[~np.isfinite(v)] = np.nan
            keep = ~np.isnan(v).all(axis=1)
            if not keep.all():
                frame, v = frame[keep], v[keep]
            faces = frame["face_id"].to_numpy()
            if not faces.size:
                continue
            # a face's rows share its cells: look the ids up once per run of one face
            starts = np.flatnonzero(np.r_[True, faces[1:] != faces[:-1]])
            runs = np.diff(np.r_[starts, faces.size])
            for side in ("cell_a", "cell_b"):
                ids = frame[side].to_numpy()[starts]
                cell = np.repeat(index.get_indexer(pd.Index(ids)), runs)
                mine = np.flatnonzero(cell >= 0)
                if not mine.size:
                    continue
                rows = np.empty(mine.size, dtype=dtype)
                rows["cell"] = cell[mine]
                for i in range(len(values)):
                    rows[f"v{i}"] = v[mine, i]
                part = rows["cell"] // per_part
                order = np.argsort(part, kind="stable")
                rows, part = rows[order], part[order]
                bounds = np.searchsorted(part, np.arange(n_parts + 1))
                for p in np.flatnonzero(np.diff(bounds)):
                    # opened for each write: hundreds of partitions must not hold as many
                    # open files (the limit is 256 on some systems)
                    with open(paths[p], "ab") as sink:
                        rows[bounds[p]:bounds[p + 1]].tofile(sink)
        for p in paths:
            rows = np.fromfile(p, dtype=dtype)
            p.unlink()
            if not rows.size:
                continue
            frame = pd.DataFrame({f"v{i}": rows[f"v{i}"] for i in range(len(values))})
            frame["cell"] = rows["cell"]
            del rows
            med = frame.groupby("cell", sort=True).median()
            out[med.index.to_numpy()] = med.to_numpy(dtype=float)
    return pd.DataFrame(out, columns=values)


def any_finite(path: str | os.PathLike[str], column: str) -> bool:
    """True when ``column`` of the table has a finite value (False when it has none or
    no such column); stops at the first row group that has one."""
    if column not in table_columns(path):
        return False
    for frame in read_row_groups(path, [column]):
        if np.isfinite(frame[column].to_numpy(dtype=float)).any():
            return True
    return False


def class_ratio_bands(path: str | os.PathLike[str], *, x: str, value: str = "n_ratio",
                      by: str = "dominant_class", round_x: int | None = None,
                      max_levels: int = 20) -> pd.DataFrame:
    """Median and 10 / 90 % of ``value`` per (class, ``x``), NaN values ignored, over a
    table read in passes: :func:`ntrans.plots.ratio_bands` of the whole table.

    ``by``: the class column (every row in one class ``all`` when the table has none);
    ``round_x``: decimals ``x`` is rounded to first.  When ``x`` takes more than
    ``max_levels`` distinct values it is cut into ``max_levels`` equal bins, labelled by
    their centres.

    Returns columns ``class, x, p10, p50, p90, count`` sorted by (class, ``x``).
    """
    columns = table_columns(path)
    has_class = by in columns
    read = [x, value, *([by] if has_class else [])]

    def rows() -> Iterator[tuple[np.ndarray, np.ndarray, Any]]:
        """(x, value, class labels) of the rows with a finite value."""
        for frame in read_row_groups(path, read, categorical=[by] if has_class else []):
            v = frame[value].to_numpy(dtype=float)
            keep = np.isfinite(v)
            xs = frame[x].to_numpy(dtype=float)[keep]
            if round_x is not None:
                xs = np.round(xs, round_x)
            labels = frame[by][keep] if has_class else None
            yield xs, v[keep], labels

    # pass 1: the classes and the x levels
    classes: set[str] = set()
    levels = np.empty(0)
    binned = False
    lo, hi = np.inf, -np.inf
    for xs, _, labels in rows():
        if labels is not None:
            codes = labels.cat.codes.to_numpy()
            classes.update(str(c) for c in labels.cat.categories[np.unique(codes[codes >= 0])])
        elif xs.size:
            classes.add("all")
        if not binned:
            levels = np.unique(np.concatenate([levels, np.unique(xs)]))
            binned = levels.size > max_levels
        finite = xs[np.isfinite(xs)]
        if finite.size:
            lo, hi = min(lo, float(finite.min())), max(hi, float(finite.max()))
    names = sorted(classes)
    class_of = {name: i for i, name in enumerate(names)}
    if binned:
        edges = np.linspace(lo, hi, max_levels + 1)
        labels_x = 0.5 * (edges[:-1] + edges[1:])
    else:
        labels_x = levels[np.isfinite(levels)]
    n_levels = max(labels_x.size, 1)

    def groups() -> Iterator[tuple[np.ndarray, np.ndarray, None]]:
        for xs, v, labels in rows():
            if labels is None:
                cls = np.zeros(v.size, dtype=np.int64)
            else:  # rows of no class (null) have no band
                codes = labels.cat.codes.to_numpy().astype(np.int64)
                lookup = np.array([class_of.get(str(c), -1) for c in labels.cat.categories]
                                  + [-1], dtype=np.int64)
                cls = lookup[codes]
                ok = cls >= 0
                xs, v, cls = xs[ok], v[ok], cls[ok]
            if binned:
                level = np.clip(np.searchsorted(edges, xs, side="right") - 1, 0,
                                max_levels - 1)
            else:  # rows without an x have no band
                ok = np.isfinite(xs)
                xs, v, cls = xs[ok], v[ok], cls[ok]
                level = np.searchsorted(labels_x, xs)
            yield cls * n_levels + level, v, None

    source = SourceQuantiles(groups, max(len(names), 1) * n_levels, scale="log",
                             weighted=False)
    q = source.quantiles([0.10, 0.50, 0.90])[:-1]
    counts = source.last_counts[:-1]
    used = np.flatnonzero(counts)
    return pd.DataFrame({
        "class": [names[g // n_levels] for g in used],
        x: labels_x[used % n_levels] if labels_x.size else np.full(used.size, np.nan),
        "p10": q[used, 0], "p50": q[used, 1], "p90": q[used, 2],
        "count": counts[used],
    })


def stage_bias_figures(path: str | os.PathLike[str], *, weight: str | None = "conveyance_source",
                       bins: int = 40) -> tuple[dict[str, dict[str, Any]], StageBiasHistogram | None]:
    """Stage-bias figures of a table's ``stage_bias_unadjusted`` / ``_adjusted`` columns,
    read in passes.

    Returns the summary per column present (``unadjusted`` / ``adjusted``: count, median,
    p10, p90 and mean |bias| of the finite values; with a ``weight`` column also the
    weighted median, the smallest bias whose cumulative weight reaches half the total,
    and the weighted mean |bias|, over values whose weight is finite and >= 0), and the
    histograms of both (:func:`ntrans.plots.stage_bias_histogram`'s, None unless both
    columns are there).
    """
    columns = table_columns(path)
    names = [n for n in BIAS_NAMES if f"stage_bias_{n}" in columns]
    weight = weight if weight in columns else None
    if not names:
        return {}, None
    wanted = [f"stage_bias_{n}" for n in names] + ([weight] if weight else [])

    def chunks(weighted: bool) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray | None]]:
        for frame in read_row_groups(path, wanted):
            w = frame[weight].to_numpy(dtype=float) if weighted else None
            for g, name in enumerate(names):
                v = frame[f"stage_bias_{name}"].to_numpy(dtype=float)
                yield np.full(v.size, g, dtype=np.int64), v, w

    plain = SourceQuantiles(lambda: chunks(False), len(names), scale="asinh",
                            unit=BIAS_BIN_UNIT, weighted=False)
    q = plain.quantiles(list(BIAS_QUANTILES))
    counts = plain.last_counts
    lower = None
    if weight is not None:
        lower = SourceQuantiles(lambda: chunks(True), len(names), scale="asinh",
                                unit=BIAS_BIN_UNIT).quantiles([0.5], lower=True)[:, 0]
    edges = None
    if names == list(BIAS_NAMES) and counts[-1]:
        bound = max(abs(q[-1, 0]), abs(q[-1, -1]), 1e-6)
        edges = np.linspace(-bound, bound, bins + 1)
    elif names == list(BIAS_NAMES):
        edges = np.linspace(-1.0, 1.0, bins + 1)
    # one more pass: sums for the mean |bias| and the histograms
    sum_abs = np.zeros(len(names))
    sum_w_abs = np.zeros(len(names))
    sum_w = np.zeros(len(names))
    hist = np.zeros((len(names), bins), dtype=np.int64)
    for frame in read_row_groups(path, wanted):
        w = frame[weight].to_numpy(dtype=float) if weight else None
        for g, name in enumerate(names):
            v = frame[f"stage_bias_{name}"].to_numpy(dtype=float)
            v = v[np.isfinite(v)] if w is None else v
            if w is not None:
                finite = np.isfinite(v)
                ok = finite & np.isfinite(w) & (w >= 0)
                sum_w_abs[g] += float(np.sum(w[ok] * np.abs(v[ok])))
                sum_w[g] += float(np.sum(w[ok]))
                v = v[finite]
            sum_abs[g] += float(np.sum(np.abs(v)))
            if edges is not None:
                hist[g] += np.histogram(np.clip(v, edges[0], edges[-1]), bins=edges)[0]
    stats: dict[str, dict[str, Any]] = {}
    for g, name in enumerate(names):
        n = int(counts[g])
        entry: dict[str, Any] = {"count": n, "median": None, "p10": None, "p90": None,
                                 "mean_abs": None, "weighted_median": None,
                                 "weighted_mean_abs": None}
        if n:
            entry.update(median=float(q[g, 2]), p10=float(q[g, 1]), p90=float(q[g, 3]),
                         mean_abs=sum_abs[g] / n)
            if lower is not None and sum_w[g] > 0:
                entry.update(weighted_median=float(lower[g]),
                             weighted_mean_abs=sum_w_abs[g] / sum_w[g])
        stats[f"stage_bias_{name}"] = entry
    histogram = None
    if edges is not None:
        histogram = StageBiasHistogram(
            edges=edges, before=hist[0], after=hist[1],
            median_before=float(q[0, 2]), median_after=float(q[1, 2]),
            count_before=int(counts[0]), count_after=int(counts[1]))
    return stats, histogram
