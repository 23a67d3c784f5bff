"""The output edge: an atomic output folder and the Parquet / CSV / GeoPackage writers.

- :class:`OutputFolder` -- write into a hidden temporary sibling folder, move it into
  place only when everything succeeded; nothing half-written ever sits at the target,
  and only an empty folder or an earlier ntrans output is ever replaced.
- :class:`TableWriter` -- stream a Parquet table chunk by chunk, with column units and
  descriptions in the file's key-value metadata.
- :func:`write_csv`, :func:`write_geopackage` -- the same tables as CSV, geometry as GPKG.
- :func:`column_units`, :func:`column_descriptions` -- units and meanings of the contract
  columns (DESIGN.md section 4) for a DEM's units.
"""

from __future__ import annotations

import contextlib
import errno
import itertools
import json
import logging
import os
import re
import secrets
import shutil
import socket
from collections import deque
from collections.abc import Iterable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from .errors import OutputError, OutputExistsError
from .inputs import check_output_not_input

logger = logging.getLogger(__name__)

UNITS_KEY = "ntrans:units"
DESCRIPTION_KEY = "ntrans:description"
#: float columns that say which row is which (readers filter on them): they keep their
#: Parquet min / max statistics, as integer and text columns do; measured values do not
KEY_FLOAT_COLUMNS = ("stage", "depth")


# --------------------------------------------------------------------------- folder

#: files an ntrans job writes at the top of its output folder (``tables``, ``adjust``, a
#: ``run`` / ``demo`` bundle): ``overwrite`` replaces only an empty folder or one that
#: holds one of them, never a folder of other files
OUTPUT_MARKERS = ("tables_summary.json", "adjust_summary.json", "manifest.json")


def _host_tag() -> str:
    """This machine's name as written into staging folder names."""
    return re.sub(r"[^A-Za-z0-9.-]", "", socket.gethostname()) or "host"


def _process_alive(pid: int) -> bool:
    """False only when no process ``pid`` exists on this machine (POSIX; elsewhere
    every process counts as alive)."""
    if os.name != "posix" or pid <= 0:
        return True
    try:
        os.kill(pid, 0)  # signal 0: only checks that the process exists
    except ProcessLookupError:
        return False
    except OSError:  # another user's process
        return True
    return True


def remove_stale_staging(out_dir: str | os.PathLike[str]) -> list[Path]:
    """Remove the staging folders of output folder ``out_dir`` left behind by runs on
    this machine whose process no longer exists (killed); return the removed paths.

    Only hidden siblings named ``.<name>.tmp-<host>-<pid>-<hex>`` are considered: a
    folder of a live process, of another machine or of another name is kept.
    """
    final = Path(os.fspath(out_dir)).expanduser().absolute()
    pattern = re.compile(rf"\.{re.escape(final.name)}\.tmp-(.+)-(\d+)-[0-9a-f]{{8}}")
    host = _host_tag()
    removed: list[Path] = []
    try:
        siblings = list(final.parent.iterdir())
    except OSError:  # no parent yet, or not readable: nothing to clean
        return removed
    for path in siblings:
        match = pattern.fullmatch(path.name)
        if (match is None or match.group(1) != host or _process_alive(int(match.group(2)))
                or path.is_symlink() or not path.is_dir()):
            continue
        shutil.rmtree(path, ignore_errors=True)
        logger.info("removed %s, left by an earlier run that was stopped", path)
        removed.append(path)
    return removed


def _is_disk_full(exc: BaseException | None) -> bool:
    """True for an error that says the disk (or the user's quota) is full, also when a
    library wrapped it (its message, its cause)."""
    seen = 0
    while exc is not None and seen < 5:
        if isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT):
            return True
        if "No space left on device" in str(exc) or "Disk quota exceeded" in str(exc):
            return True
        exc, seen = exc.__cause__ or exc.__context__, seen + 1
    return False


#: where else than ``--overwrite`` the setting that replaces an earlier output is set
OVERWRITE_SETTING = "overwrite = true in a project file, overwrite=True from Python"


def _replace_refusal(final: Path) -> str | None:
    """Why the existing ``final`` is never replaced, even with ``overwrite`` (a file; the
    current, home or root folder; a folder of other files than an ntrans output), or
    None when it may be."""
    if not final.is_dir():
        return f"output path '{final}' is a file, not a folder; choose another output folder"
    resolved = final.resolve()
    protected = {Path(resolved.anchor), Path.home().resolve()}
    cwd = Path.cwd().resolve()
    if resolved in protected or resolved == cwd or resolved in cwd.parents:
        return (f"output folder '{final}' is the current, home or root folder (or holds it) "
                "and will not be replaced; choose a dedicated output folder")
    try:
        empty = next(final.iterdir(), None) is None
        ours = any((final / name).is_file() for name in OUTPUT_MARKERS)
    except OSError as exc:
        raise OutputError(
            f"output folder '{final}' cannot be read ({exc.strerror or exc}); check its "
            "permissions or choose another folder"
        ) from exc
    if not (empty or ours):
        return (f"output folder '{final}' is not empty and does not look like ntrans output, "
                "so it will not be replaced; choose another output folder or remove it yourself")
    return None


class OutputFolder:
    """Context manager giving an all-or-nothing output folder.

    On enter the target is checked (exists without ``overwrite`` ->
    :class:`OutputExistsError`; would replace an input, is a file, the current, home or
    root folder, or a non-empty folder without any of :data:`OUTPUT_MARKERS` ->
    :class:`OutputError`), staging folders a killed run left for this target are removed
    (:func:`remove_stale_staging`) and a hidden sibling
    ``.<name>.tmp-<host>-<pid>-<random>`` is created: write everything into
    :attr:`path`.  On a clean exit the temporary folder is renamed to :attr:`final`
    (an existing target is first moved aside and deleted after the rename).  On any
    exception, KeyboardInterrupt included, the temporary folder is deleted, an existing
    target is left untouched and the exception propagates with a note saying whether
    the outputs were written (``exc.__notes__``).

    >>> with OutputFolder("out", overwrite=True) as folder:  # doctest: +SKIP
    ...     (folder.path / "a.txt").write_text("x")
    """

    def __init__(
        self,
        out_dir: str | os.PathLike[str],
        *,
        overwrite: bool = False,
        inputs: Iterable[str | os.PathLike[str] | None] = (),
    ) -> None:
        self.final = Path(os.fspath(out_dir)).expanduser().absolute()
        self.overwrite = bool(overwrite)
        self.inputs = list(inputs)
        self._tmp: Path | None = None

    @property
    def path(self) -> Path:
        """The temporary folder to write into (valid inside the ``with`` block)."""
        if self._tmp is None:
            raise RuntimeError("OutputFolder.path is only available inside the with block")
        return self._tmp

    def _check_target(self) -> None:
        final = self.final
        check_output_not_input(final, self.inputs)  # first: --overwrite would not help
        if final.exists() or final.is_symlink():
            refusal = _replace_refusal(final)
            if not self.overwrite:  # suggest --overwrite only where it would help
                raise OutputExistsError(refusal or (
                    f"output folder '{final}' exists; pass --overwrite ({OVERWRITE_SETTING}) "
                    "to replace it or choose another folder"
                ))
            if refusal is not None:
                raise OutputError(refusal)

    def __enter__(self) -> OutputFolder:
        self._check_target()
        remove_stale_staging(self.final)
        parent = self.final.parent
        try:
            parent.mkdir(parents=True, exist_ok=True)
            # host and process id in the name: a later run tells a killed run's folder
            # from a live one's (remove_stale_staging)
            owner = f"{_host_tag()}-{os.getpid()}"
            tmp = parent / f".{self.final.name}.tmp-{owner}-{secrets.token_hex(4)}"
            tmp.mkdir()
        except OSError as exc:
            raise OutputError(
                f"output folder '{self.final}' cannot be created ({exc.strerror or exc}); "
                "check the path and permissions"
            ) from exc
        self._tmp = tmp
        logger.debug("writing outputs into temporary folder %s", tmp)
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> bool:
        tmp = self._tmp
        self._tmp = None
        if tmp is None:
            return False
        if exc_type is not None:
            shutil.rmtree(tmp, ignore_errors=True)
            logger.debug("removed temporary folder %s after an error", tmp)
            if exc is not None:
                exc.add_note(f"nothing was written to {self.final}")
            if _is_disk_full(exc):
                raise OutputError(
                    f"the disk of output folder '{self.final}' ran out of space while writing "
                    "(nothing was written); free some space or choose a folder on another disk"
                ) from exc
            return False
        try:
            self._commit(tmp)
        except BaseException as error:
            written = not tmp.exists()  # renamed into place; the old folder's removal stopped
            shutil.rmtree(tmp, ignore_errors=True)
            error.add_note(f"the outputs were written to {self.final}" if written
                           else f"nothing was written to {self.final}")
            raise
        return False

    def _commit(self, tmp: Path) -> None:
        final = self.final
        old: Path | None = None
        if final.exists() or final.is_symlink():
            if not self.overwrite:  # appeared while we were working
                raise OutputExistsError(
                    f"output folder '{final}' appeared while writing; pass --overwrite "
                    f"({OVERWRITE_SETTING}) to replace it or choose another folder"
                )
            old = final.parent / f".{final.name}.old-{secrets.token_hex(4)}"
            try:
                os.replace(final, old)
            except OSError as exc:
                raise OutputError(
                    f"output folder '{final}' cannot be replaced ({exc.strerror or exc}); close "
                    "programs using it or choose another folder"
                ) from exc
        try:
            os.replace(tmp, final)
        except BaseException as exc:  # KeyboardInterrupt included: put old results back
            if old is not None and not final.exists():
                os.replace(old, final)
            if isinstance(exc, OSError):
                raise OutputError(
                    f"output folder '{final}' cannot be written ({exc.strerror or exc}); "
                    "check permissions and free space"
                ) from exc
            raise
        if old is not None:
            try:
                shutil.rmtree(old, ignore_errors=True)
            except BaseException:  # an interrupt: finish removing the old results first
                shutil.rmtree(old, ignore_errors=True)
                raise
        logger.info("outputs written to %s", final)


# --------------------------------------------------------------------------- Parquet


SchemaLike = pa.Schema | Mapping[str, pa.DataType | str]


def _as_schema(schema: SchemaLike) -> pa.Schema:
    if isinstance(schema, pa.Schema):
        return schema
    fields = []
    for name, kind in schema.items():
        dtype = kind if isinstance(kind, pa.DataType) else pa.type_for_alias(str(kind))
        fields.append(pa.field(name, dtype))
    return pa.schema(fields)


def _to_table(chunk: Any) -> pa.Table:
    """A pyarrow Table from a dict of arrays, a pandas DataFrame or a Table."""
    if isinstance(chunk, pa.Table):
        return chunk
    if isinstance(chunk, pa.RecordBatch):
        return pa.Table.from_batches([chunk])
    if isinstance(chunk, Mapping):
        arrays = {}
        for name, values in chunk.items():
            arr = values if isinstance(values, pa.Array | pa.ChunkedArray) else np.asarray(values)
            if isinstance(arr, np.ndarray):
                if arr.ndim != 1:
                    raise ValueError(f"column {name!r} must be one-dimensional")
                if arr.dtype.kind == "O":
                    arr = pa.array(arr.tolist(), from_pandas=True)
                else:
                    arr = pa.array(arr)
            arrays[str(name)] = arr
        return pa.table(arrays)

    if isinstance(chunk, pd.DataFrame):
        geometry_name = getattr(chunk, "_geometry_column_name", None)
        if geometry_name is not None and geometry_name in chunk.columns:
            chunk = pd.DataFrame(chunk.drop(columns=geometry_name))
        return pa.Table.from_pandas(chunk, preserve_index=False)
    raise TypeError(f"cannot write a chunk of type {type(chunk).__name__}")


def _stable_type(dtype: pa.DataType) -> pa.DataType:
    """Normalise inferred types so that later chunks cast cleanly."""
    if pa.types.is_large_string(dtype) or pa.types.is_string_view(dtype):
        return pa.string()
    if pa.types.is_dictionary(dtype):
        return _stable_type(dtype.value_type)
    if pa.types.is_integer(dtype):
        return pa.int64()
    if pa.types.is_floating(dtype):
        return pa.float64()
    return dtype


class TableWriter:
    """Stream a Parquet table chunk by chunk, with units and descriptions as metadata.

    Parameters
    ----------
    path : path-like
        The ``.parquet`` file to write (normally inside :attr:`OutputFolder.path`).
    schema : pyarrow.Schema or dict of column -> type, optional
        The columns and types.  Without it the first chunk decides (integers -> int64,
        floats -> float64, text -> string); a column that is all null in the first chunk
        must then be declared.  Give it always when the table may end up empty.
    units, descriptions : dict of column -> str, optional
        Stored as JSON under the metadata keys ``ntrans:units`` and
        ``ntrans:description`` (only entries for columns of the table are kept).
    metadata : dict of str -> str, optional
        Further key-value metadata (non-str values are JSON-encoded).
    row_group_rows : int
        Chunks are buffered until this many rows, then written as one row group.
    compression : str
        Parquet compression codec.  Snappy: read by every Parquet reader, and encoding
        the face table of a 10^7-pixel case takes 1.6 s against 2.1-2.5 s with zstd
        (files about a fifth larger).
    background : bool
        Encode and write row groups in a background thread (pyarrow releases the GIL),
        so the caller computes the next rows meanwhile.  At most two row groups wait;
        an error of the thread is raised by a later ``write`` or by ``close``.

    Chunks are a dict of column -> 1-D array, a pandas DataFrame or a pyarrow Table; the
    column set must match the schema (order may differ).  Cell ids may be int64 or string;
    nullable columns (``cell_b``) take None / pandas NA.

    >>> with TableWriter(p, units={"stage": "m"}) as w:  # doctest: +SKIP
    ...     w.write({"cell_id": np.arange(3), "stage": np.zeros(3)})
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        schema: SchemaLike | None = None,
        units: Mapping[str, str] | None = None,
        descriptions: Mapping[str, str] | None = None,
        metadata: Mapping[str, Any] | None = None,
        row_group_rows: int = 65_536,
        compression: str = "snappy",
        background: bool = True,
    ) -> None:
        self.path = Path(os.fspath(path))
        self.schema: pa.Schema | None = None
        self._units = dict(units or {})
        self._descriptions = dict(descriptions or {})
        self._extra = dict(metadata or {})
        self._row_group_rows = int(row_group_rows)
        self._compression = compression
        self._writer: pq.ParquetWriter | None = None
        self._pool = (
            ThreadPoolExecutor(1, thread_name_prefix="ntrans-parquet") if background else None
        )
        self._pending: deque[Future[None]] = deque()
        self._buffer: list[pa.Table] = []
        self._buffered = 0
        self.rows_written = 0
        self.closed = False
        if schema is not None:
            self.schema = self._with_metadata(_as_schema(schema))

    def _with_metadata(self, schema: pa.Schema) -> pa.Schema:
        names = set(schema.names)
        meta: dict[str, str] = {
            UNITS_KEY: json.dumps({k: v for k, v in self._units.items() if k in names}),
            DESCRIPTION_KEY: json.dumps(
                {k: v for k, v in self._descriptions.items() if k in names}
            ),
        }
        for key, value in self._extra.items():
            meta[str(key)] = value if isinstance(value, str) else json.dumps(value)
        return schema.remove_metadata().with_metadata(meta)

    def _infer_schema(self, table: pa.Table) -> pa.Schema:
        fields = []
        for field in table.schema:
            if pa.types.is_null(field.type):
                raise ValueError(
                    f"column {field.name!r} is all null in the first chunk; declare its type "
                    "with TableWriter(schema=...)"
                )
            fields.append(pa.field(field.name, _stable_type(field.type)))
        return self._with_metadata(pa.schema(fields))

    def write(self, chunk: Any) -> None:
        """Append one chunk (dict of arrays, DataFrame or Table) of rows."""
        if self.closed:
            raise ValueError("TableWriter is closed")
        table = _to_table(chunk)
        if self.schema is None:
            self.schema = self._infer_schema(table)
        names = self.schema.names
        if set(table.column_names) != set(names):
            missing = sorted(set(names) - set(table.column_names))
            extra = sorted(set(table.column_names) - set(names))
            raise ValueError(
                f"chunk columns differ from the table's: missing {missing}, extra {extra}"
            )
        table = table.select(names).cast(self.schema.remove_metadata())
        if table.num_rows == 0:
            return
        self._buffer.append(table)
        self._buffered += table.num_rows
        if self._buffered >= self._row_group_rows:
            self._flush()

    def _open(self) -> pq.ParquetWriter:
        if self._writer is None:
            assert self.schema is not None
            try:
                # dictionary encoding pays for repeated ids and labels, not for
                # measured floats, where it only costs time; so do min / max
                # statistics, which let readers skip row groups by id or stage but
                # not by a measured value (every row group holds the whole range):
                # a fifth of the cell table's encoding time at 10^7 pixels
                repeated = [
                    f.name for f in self.schema if not pa.types.is_floating(f.type)
                ]
                keys = [f.name for f in self.schema if f.name in KEY_FLOAT_COLUMNS]
                self._writer = pq.ParquetWriter(
                    self.path, self.schema, compression=self._compression,
                    use_dictionary=repeated, write_statistics=repeated + keys,
                )
            except OSError as exc:
                raise OutputError(
                    f"table '{self.path}' cannot be written ({exc}); check the output folder"
                ) from exc
        return self._writer

    def _flush(self) -> None:
        if not self._buffer:
            return
        parts, rows = self._buffer, self._buffered
        self._buffer, self._buffered = [], 0
        writer = self._open()
        if self._pool is None:
            self._write_group(writer, parts, rows)
            return
        while len(self._pending) >= 2:  # bounded: at most two row groups wait
            self._pending.popleft().result()
        self._pending.append(self._pool.submit(self._write_group, writer, parts, rows))

    def _write_group(self, writer: pq.ParquetWriter, parts: list[pa.Table], rows: int) -> None:
        table = pa.concat_tables(parts)
        writer.write_table(table.replace_schema_metadata(self.schema.metadata),
                           row_group_size=max(self._row_group_rows, rows))
        self.rows_written += rows

    def _drain(self) -> None:
        """Wait for the row groups in the background; raise the first error."""
        while self._pending:
            self._pending.popleft().result()

    def _stop_pool(self) -> None:
        """Stop the background thread: queued row groups are dropped, a running one ends."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        self._pending.clear()

    def close(self) -> Path:
        """Write what is buffered and finish the file; returns its path."""
        if self.closed:
            return self.path
        if self.schema is None:
            raise ValueError(
                "TableWriter got no chunk and no schema; pass schema= to write an empty table"
            )
        self._flush()
        try:
            self._drain()
        except BaseException:
            self.abort()
            raise
        self._stop_pool()
        writer = self._open()  # an empty table still gets its schema and metadata
        writer.close()
        self.closed = True
        logger.debug("wrote %d rows to %s", self.rows_written, self.path)
        return self.path

    def abort(self) -> None:
        """Close without finishing normally (used on errors); the file may be partial."""
        self._stop_pool()
        if self._writer is not None:
            self._writer.close()
        self.closed = True

    def __enter__(self) -> TableWriter:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> bool:
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False


def read_table_metadata(path: str | os.PathLike[str]) -> dict[str, Any]:
    """``{"units": {...}, "description": {...}, other keys: str}`` from a Parquet file."""
    meta = pq.read_schema(os.fspath(path)).metadata or {}
    out: dict[str, Any] = {}
    for key, value in meta.items():
        k, v = key.decode(), value.decode()
        if k == UNITS_KEY:
            out["units"] = json.loads(v)
        elif k == DESCRIPTION_KEY:
            out["description"] = json.loads(v)
        else:
            out[k] = v
    return out


# --------------------------------------------------------------------------- CSV / GPKG


def write_csv(parquet_path: str | os.PathLike[str], csv_path: str | os.PathLike[str]) -> Path:
    """Copy a Parquet table to CSV, one row group at a time (bounded memory).

    Nulls and NaN become empty fields (a spreadsheet reads them as blank cells, pandas as
    NaN; the text ``nan`` would be a word to a spreadsheet); floats are written with
    enough digits to round-trip.
    """
    source = pq.ParquetFile(os.fspath(parquet_path))
    schema = source.schema_arrow.remove_metadata()
    target = Path(os.fspath(csv_path))
    options = pacsv.WriteOptions(include_header=True, quoting_style="needed")
    with pacsv.CSVWriter(os.fspath(target), schema, write_options=options) as writer:
        for i in range(source.num_row_groups):
            writer.write_table(_nan_as_null(source.read_row_group(i).replace_schema_metadata(None)))
    return target


def _nan_as_null(table: pa.Table) -> pa.Table:
    """``table`` with every NaN of its floating-point columns made a null."""
    import pyarrow.compute as pc

    for i, column in enumerate(table.columns):
        if pa.types.is_floating(column.type):
            nulled = pc.if_else(pc.is_nan(column), pa.scalar(None, column.type), column)
            table = table.set_column(i, table.field(i), nulled)
    return table


@dataclass(frozen=True)
class EncodedGeometry:
    """A geometry array as :func:`write_geopackage` writes it: the layer type and the WKB
    of every row (single parts promoted to multi where the layer mixes them)."""

    geometry_type: str
    wkb: np.ndarray


def encode_geometry(geometry: np.ndarray) -> EncodedGeometry:
    """The layer type and WKB of ``geometry`` (shapely releases the GIL: this can run in
    a thread beside other work, which :func:`write_geopackage` then skips)."""
    import shapely

    geometry_type, promote = _layer_geometry_type(geometry)
    if promote:
        geometry = _promoted(geometry)
    return EncodedGeometry(geometry_type, shapely.to_wkb(geometry))


@dataclass(frozen=True)
class EncodedLayer:
    """A GeoPackage layer read without making geometry objects: the attributes as
    geopandas reads them (integer columns with empty fields as nullable ``Int64``), the
    geometry as :class:`EncodedGeometry` and the CRS (a pyproj
    CRS or None)."""

    frame: pd.DataFrame
    geometry: EncodedGeometry
    crs: Any


def read_encoded_layer(path: str | os.PathLike[str], columns: list[str] | None = None,
                       ) -> EncodedLayer:
    """The attributes (``columns``, default all) and the WKB geometry of a GeoPackage's
    first layer: 1.5 million face lines take about 110 MB as WKB against about 500 MB as
    shapely objects, and :func:`write_geopackage` writes them back as they are."""
    import pyogrio
    import pyogrio.raw
    import pyproj

    frame = pyogrio.read_dataframe(
        path, columns=columns, read_geometry=False, use_arrow=True,
        arrow_to_pandas_kwargs={"types_mapper": _nullable_integers})
    for name in frame.columns:
        # an id column with empty fields (cell_b on the boundary) stays integer, exact
        # beyond 2^53, and is written back as one; a column without them is plain int64
        if isinstance(frame[name].dtype, pd.Int64Dtype) and not frame[name].hasnans:
            frame[name] = frame[name].to_numpy(dtype=np.int64)
    meta, _, wkb, _ = pyogrio.raw.read(path, columns=[])
    crs = pyproj.CRS(meta["crs"]) if meta.get("crs") else None
    return EncodedLayer(frame, EncodedGeometry(str(meta["geometry_type"]), wkb), crs)


def _nullable_integers(arrow_type: pa.DataType) -> Any:
    """pandas type of an Arrow integer column read from a layer: nullable Int64 (NumPy
    would make a column with nulls float, rounding ids beyond 2^53)."""
    return pd.Int64Dtype() if pa.types.is_integer(arrow_type) else None


def write_geopackage(
    frame: Any, path: str | os.PathLike[str], layer: str, *, chunk_rows: int = 65_536,
    encoded: EncodedGeometry | None = None, crs: Any = None, geometry_name: str = "geometry",
    descriptions: Mapping[str, str] | None = None,
) -> Path:
    """Write a GeoDataFrame as one layer of a GeoPackage (created or appended to).

    The rows stream to GDAL in batches of ``chunk_rows`` within one write, so the
    encoded geometry of only one batch is in memory at a time (1.5 million faces: about
    85 MB above the frame, 130 MB with batches of 250,000), and the layer's spatial index
    is built once (appending batch by batch would update it row by row: about twice the
    time for 500,000 cells).  The layer type is taken from all
    rows: a mix of single and multi parts (``Polygon`` and ``MultiPolygon``) is written
    as the multi type.  ``encoded``: the frame's geometry already encoded by
    :func:`encode_geometry` (the same rows, in order).  A plain DataFrame (attributes
    only) is written with ``encoded`` as its geometry, in ``crs`` (a pyproj CRS or None),
    under ``geometry_name``.  ``descriptions`` (column -> text) go to the GeoPackage's
    ``gpkg_data_columns`` table (:func:`write_column_descriptions`).
    """
    import geopandas as gpd
    import pyogrio.raw

    target = Path(os.fspath(path))
    try:
        if isinstance(frame, gpd.GeoDataFrame):
            geometry = frame.geometry.to_numpy()
            crs, geometry_name = frame.crs, frame.geometry.name
        elif encoded is None:
            raise ValueError("a frame without geometry needs its geometry encoded")
        else:
            geometry = None
        if encoded is not None:
            if len(encoded.wkb) != len(frame):
                raise ValueError("the encoded geometry does not have one row per feature")
            geometry_type, promote = encoded.geometry_type, False
        else:
            geometry_type, promote = _layer_geometry_type(geometry)
        batches = _geopackage_batches(frame, geometry, chunk_rows=max(int(chunk_rows), 1),
                                      promote=promote, geometry_name=geometry_name,
                                      wkb=None if encoded is None else encoded.wkb)
        first = next(batches)
        stream = pa.RecordBatchReader.from_batches(first.schema, itertools.chain([first], batches))
        epsg = crs.to_epsg() if crs is not None else None
        pyogrio.raw.write_arrow(
            stream, os.fspath(target), layer=layer, driver="GPKG",
            geometry_name=geometry_name, geometry_type=geometry_type,
            crs=None if crs is None else (f"EPSG:{epsg}" if epsg else crs.to_wkt("WKT1_GDAL")),
            append=target.exists(),
        )
        if descriptions:
            write_column_descriptions(target, layer, descriptions)
    except Exception as exc:  # pyogrio / GDAL / Arrow errors, sqlite errors
        raise OutputError(
            f"GeoPackage '{target}' layer '{layer}' cannot be written ({exc}); check the output "
            "folder"
        ) from exc
    return target


def write_column_descriptions(path: str | os.PathLike[str], layer: str,
                              descriptions: Mapping[str, str]) -> None:
    """Record what each column of ``layer`` holds in the GeoPackage's ``gpkg_data_columns``
    table (the GeoPackage schema extension: GIS programs show it as the field's comment).
    """
    import sqlite3

    with contextlib.closing(sqlite3.connect(os.fspath(path))) as db, db:
        db.execute(
            "CREATE TABLE IF NOT EXISTS gpkg_data_columns (table_name TEXT NOT NULL, "
            "column_name TEXT NOT NULL, name TEXT, title TEXT, description TEXT, "
            "mime_type TEXT, constraint_name TEXT, "
            "CONSTRAINT pk_gdc PRIMARY KEY (table_name, column_name), "
            "CONSTRAINT gdc_tn UNIQUE (table_name, name))")
        db.execute(
            "CREATE TABLE IF NOT EXISTS gpkg_extensions (table_name TEXT, column_name TEXT, "
            "extension_name TEXT NOT NULL, definition TEXT NOT NULL, scope TEXT NOT NULL, "
            "CONSTRAINT ge_tce UNIQUE (table_name, column_name, extension_name))")
        if not db.execute("SELECT 1 FROM gpkg_extensions WHERE table_name = "
                          "'gpkg_data_columns'").fetchone():
            db.execute("INSERT INTO gpkg_extensions VALUES ('gpkg_data_columns', NULL, "
                       "'gpkg_schema', 'http://www.geopackage.org/spec/#extension_schema', "
                       "'read-write')")
        columns = {row[1] for row in db.execute(f'PRAGMA table_info("{layer}")')}
        db.executemany(
            "INSERT OR REPLACE INTO gpkg_data_columns (table_name, column_name, name, "
            "description) VALUES (?, ?, ?, ?)",
            [(layer, c, c, text) for c, text in descriptions.items() if c in columns])


def column_descriptions_of(path: str | os.PathLike[str], layer: str) -> dict[str, str]:
    """Column -> description recorded in a GeoPackage by :func:`write_column_descriptions`
    (empty when it has none)."""
    import sqlite3

    with contextlib.closing(sqlite3.connect(os.fspath(path))) as db:
        try:
            rows = db.execute("SELECT column_name, description FROM gpkg_data_columns "
                              "WHERE table_name = ?", (layer,)).fetchall()
        except sqlite3.OperationalError:  # no such table
            return {}
    return {c: d for c, d in rows if d is not None}


#: GDAL layer type per shapely type id (a linear ring is written as a line string)
_GDAL_TYPE = {0: "Point", 1: "LineString", 2: "LineString", 3: "Polygon", 4: "MultiPoint",
              5: "MultiLineString", 6: "MultiPolygon", 7: "GeometryCollection"}
_MULTI_OF = {"Point": "MultiPoint", "LineString": "MultiLineString", "Polygon": "MultiPolygon"}


def _layer_geometry_type(geometry: np.ndarray) -> tuple[str, bool]:
    """(GDAL layer geometry type, promote single parts to multi) for a geometry array."""
    import shapely

    present = geometry[~shapely.is_missing(geometry)]
    names = {_GDAL_TYPE[int(k)] for k in np.unique(shapely.get_type_id(present))}
    promote = False
    if len(names) == 1:
        kind = names.pop()
    elif len(names) == 2 and any(names == {single, multi} for single, multi in _MULTI_OF.items()):
        kind, promote = max(names, key=len), True
    else:
        kind = "Unknown"
    if kind != "Unknown" and present.size and bool(shapely.has_z(present).any()):
        kind += " Z"
    return kind, promote


def _geopackage_batches(frame: Any, all_geometry: np.ndarray | None, *, chunk_rows: int,
                        promote: bool, geometry_name: str, wkb: np.ndarray | None = None
                        ) -> Iterator[pa.RecordBatch]:
    """Arrow record batches of ``frame`` with its geometry as WKB, ``chunk_rows`` at a
    time (``wkb``: already encoded)."""
    import shapely

    columns = [c for c in frame.columns if c != geometry_name]
    schema: pa.Schema | None = None
    for start in range(0, max(len(frame), 1), chunk_rows):
        # one batch's attributes at a time (no copy of the whole table)
        stop = start + chunk_rows
        if wkb is not None:
            encoded = wkb[start:stop]
        else:
            geometry = all_geometry[start:stop]
            if promote:
                geometry = _promoted(geometry)
            encoded = shapely.to_wkb(geometry)
        table = pa.table({**{str(c): pa.Array.from_pandas(frame[c].iloc[start:stop])
                             for c in columns},
                          geometry_name: pa.array(encoded, pa.binary())})
        if schema is None:
            # GDAL has no null type: a column with no values in the first batch is text
            schema = pa.schema([f.with_type(pa.string()) if pa.types.is_null(f.type) else f
                                for f in table.schema]).remove_metadata()
        yield from table.cast(schema).to_batches()


def _promoted(geometry: np.ndarray) -> np.ndarray:
    """Single-part geometries as one-part multi geometries (others unchanged)."""
    import shapely

    out = geometry.copy()
    type_id = shapely.get_type_id(geometry)
    for single, make in ((0, shapely.multipoints), (1, shapely.multilinestrings),
                         (3, shapely.multipolygons)):
        pick = np.flatnonzero(type_id == single)
        if pick.size:
            out[pick] = make(geometry[pick][:, None], axis=1)
    return out


# --------------------------------------------------------------------------- units


_SYMBOL = {"metre": "m", "meter": "m", "m": "m", "foot": "ft", "feet": "ft", "ft": "ft"}


def unit_symbol(unit: str) -> str:
    """``"m"`` or ``"ft"`` for a unit name (metre/foot and their aliases)."""
    try:
        return _SYMBOL[str(unit).lower()]
    except KeyError:
        raise ValueError(f"unit {unit!r} is not metre or foot") from None


#: Manning's n is reported as the SI value; k = 1.486 carries US customary units.
N_UNIT = "s/m^(1/3)"


def column_units(horizontal_unit: str, vertical_unit: str | None = None) -> dict[str, str]:
    """Unit string per contract column for a DEM's units (DESIGN.md section 4).

    ``L`` is the horizontal unit, ``Z`` the vertical one: stage and depths in ``Z``;
    plan and bed areas in ``L2``; volume ``L2*Z`` (``m3`` when equal); flow area ``L*Z``;
    lengths, perimeters and widths in ``L`` (perimeters are measured with elevations
    converted to ``L``); hydraulic radius ``Z``; face conveyance in ``L3/s`` (depths, flow
    areas and radii converted to ``L``, k of ``L``: :func:`ntrans.inputs.conveyance_factor`;
    a cell's conveyance k V R^(2/3) / n is ``L4/s``, set by ``adjust``); ratios and
    fractions ``1``; ids and flags ``""``.

    >>> column_units("metre")["volume"]
    'm3'
    >>> column_units("foot", "metre")["volume"]
    'ft2*m'
    """
    L = unit_symbol(horizontal_unit)
    Z = unit_symbol(vertical_unit) if vertical_unit is not None else L
    area = f"{L}2"
    volume = f"{L}3" if Z == L else f"{L}2*{Z}"
    flow_area = f"{L}2" if Z == L else f"{L}*{Z}"
    conveyance = f"{L}3/s"
    return {
        # ids
        "cell_id": "", "face_id": "", "cell_a": "", "cell_b": "", "class": "",
        # cell stage table
        "stage": Z, "depth": Z, "wet_area": area, "volume": volume, "bed_area": area,
        "hydraulic_radius": Z, "mean_depth": Z, "flat_elevation": Z, "flat_depth": Z,
        "flat_wet_area": area, "flat_volume": volume, "flat_hydraulic_radius": Z,
        # cell / face summaries
        "area": area, "covered_area": area, "covered_fraction": "1",
        "z_min": Z, "z_max": Z, "z_mean": Z, "z_median": Z,
        "low_point": Z, "high_point": Z, "mean_elevation": Z, "flat_bed": Z,
        # face stage table
        "length": L, "flow_area": flow_area, "wetted_perimeter": L, "top_width": L,
        # adjust outputs
        "n_source": N_UNIT, "n_target": N_UNIT, "n": N_UNIT, "ratio": "1",
        "ratio_p10": "1", "ratio_p50": "1", "ratio_p90": "1", "faces": "count",
        "weight_share": "1", "flags": "", "n_ratio": "1",
        "conveyance_source": conveyance, "conveyance_target": conveyance, "conveyance": conveyance,
        "stage_bias_unadjusted": Z, "stage_bias_adjusted": Z,
    }


_DESCRIPTIONS: dict[str, str] = {
    "cell_id": "cell id as given in the cells layer",
    "face_id": "face id (0..n-1, sorted by cell pair then position)",
    "cell_a": "id of the first cell beside the face",
    "cell_b": "id of the second cell beside the face; empty for a boundary face",
    "class": "roughness class",
    "stage": "water-surface elevation",
    "depth": "depth above the item's lowest terrain",
    "wet_area": "plan area of terrain below the stage (subgrid)",
    "volume": "water volume above the terrain (subgrid)",
    "bed_area": "3-D area of submerged terrain (subgrid, Horn slope factor)",
    "hydraulic_radius": (
        "hydraulic radius: volume/bed_area for cells, flow_area/wetted_perimeter for faces"
    ),
    "mean_depth": "volume / wet_area",
    "flat_elevation": "bed elevation of the flat cell (elevation rule)",
    "flat_depth": "stage minus flat_elevation, zero when dry",
    "flat_wet_area": ("cell area over valid terrain (covered_area, as the subgrid columns "
                      "count it) when the flat cell is wet"),
    "flat_volume": "covered_area times flat_depth",
    "flat_hydraulic_radius": "hydraulic radius of the flat cell (= flat_depth)",
    "area": "plan area",
    "covered_area": "plan area over valid DEM pixels",
    "covered_fraction": (
        "share of the item over valid DEM pixels (a face: of its line where the terrain, "
        "bilinear between the four nearest pixel centres, has no nodata pixel among them; "
        "a cell under the centre rule: of the pixels the rule gives it, times its share "
        "inside the DEM)"
    ),
    "z_min": "lowest terrain elevation", "z_max": "highest terrain elevation",
    "z_mean": "area-weighted mean terrain elevation",
    "z_median": "area-weighted median terrain elevation",
    "low_point": "lowest point of the face profile",
    "high_point": "highest point of the face profile",
    "mean_elevation": "length-weighted mean elevation of the face profile",
    "flat_bed": "bed elevation of the flat face (face rule)",
    "length": "face length in plan",
    "flow_area": "area of the face cross-section below the stage",
    "wetted_perimeter": "length of submerged profile",
    "top_width": "wet length along the face",
    "n_source": "Manning's n of the source model",
    "n_target": "fitted Manning's n for the target model",
    "n": "Manning's n",
    "ratio": "n_target / n_source",
    "ratio_p10": "10th percentile of per-face n ratios",
    "ratio_p50": "median of per-face n ratios",
    "ratio_p90": "90th percentile of per-face n ratios",
    "faces": "number of faces (cells, when the fit is on cells) holding the class",
    "weight_share": "the class's share of the fit's weight (0 where not fitted)",
    "flags": "warnings about the fit, separated by ';'",
    "n_ratio": "n ratio target/source at equal conveyance; NaN where one family is dry",
    "conveyance_source": "conveyance of the source family at n = 1",
    "conveyance_target": "conveyance of the target family at n = 1",
    "conveyance": "conveyance at n = 1",
    "stage_bias_unadjusted": "target stage minus source stage with n carried over unchanged",
    "stage_bias_adjusted": "target stage minus source stage with the fitted n",
}


def column_descriptions() -> dict[str, str]:
    """Short description per contract column (same keys as :func:`column_units`)."""
    return dict(_DESCRIPTIONS)


def id_arrow_type(ids: np.ndarray) -> pa.DataType:
    """Arrow type of a column of user ids: int64 for integer ids, else string."""
    return pa.int64() if ids.dtype.kind in "iub" else pa.string()


def ids_at(ids: np.ndarray, index: np.ndarray) -> pa.Array:
    """User ids at global indices; null where the index is -1."""
    index = np.asarray(index, dtype=np.int64)
    missing = index < 0
    any_missing = bool(missing.any())
    if not ids.size:
        values = np.empty(0, dtype=ids.dtype)
    else:
        values = ids.take(np.where(missing, 0, index) if any_missing else index)
    kind = id_arrow_type(ids)
    if kind == pa.int64():
        # no validity bitmap when every index is known (cell rows, most face columns)
        return pa.array(values.astype(np.int64, copy=False), type=kind,
                        mask=missing if any_missing else None)
    text = [None if m else str(v) for v, m in zip(values.tolist(), missing.tolist(), strict=True)]
    return pa.array(text, type=kind)


def ids_series(ids: np.ndarray, index: np.ndarray) -> Any:
    """:func:`ids_at` as a pandas column: nullable ``Int64`` for integer ids, else text."""

    return ids_at(ids, index).to_pandas(
        types_mapper=lambda t: pd.Int64Dtype() if t == pa.int64() else None
    )
