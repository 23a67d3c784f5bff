"""Tests of ntrans.outputs: atomic output folder, Parquet / CSV / GeoPackage writers, units."""

from __future__ import annotations

import errno
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import shapely
from conftest import grid_polygons

from ntrans.errors import OutputError, OutputExistsError
from ntrans.outputs import (
    DESCRIPTION_KEY,
    OUTPUT_MARKERS,
    UNITS_KEY,
    OutputFolder,
    TableWriter,
    column_descriptions,
    column_units,
    encode_geometry,
    read_table_metadata,
    remove_stale_staging,
    write_csv,
    write_geopackage,
)


def _entries(folder: Path) -> list[str]:
    """Every name in ``folder`` (hidden temp siblings included)."""
    return sorted(p.name for p in folder.iterdir())


# --------------------------------------------------------------------------- OutputFolder


def _earlier_output(target: Path, marker: str = "tables_summary.json") -> None:
    """``target`` as an earlier ntrans job left it: its marker file and one more file."""
    target.mkdir()
    (target / marker).write_text("{}")
    (target / "old.txt").write_text("old")


def test_output_folder_clean_exit(tmp_path: Path) -> None:
    target = tmp_path / "out"
    with OutputFolder(target) as folder:
        assert folder.final == target
        assert folder.path.parent == tmp_path
        # the staging name says which process on which machine writes it
        assert folder.path.name.startswith(".out.tmp-")
        assert f"-{os.getpid()}-" in folder.path.name
        (folder.path / "a.txt").write_text("x")
        assert not target.exists()  # nothing at the target before the end
    assert (target / "a.txt").read_text() == "x"
    assert _entries(tmp_path) == ["out"]  # no temp folder left


@pytest.mark.parametrize("error", [RuntimeError, KeyboardInterrupt])
def test_output_folder_exception_leaves_nothing(tmp_path: Path, error: type) -> None:
    target = tmp_path / "out"
    with pytest.raises(error) as info, OutputFolder(target) as folder:
        (folder.path / "half.parquet").write_bytes(b"PAR1")
        raise error("stop")
    assert _entries(tmp_path) == []
    assert info.value.__notes__ == [f"nothing was written to {target}"]  # the CLI says it


@pytest.mark.parametrize("raised", [
    OSError(errno.ENOSPC, "No space left on device"),
    OSError(errno.EDQUOT, "Disk quota exceeded"),
    RuntimeError("IOError: No space left on device"),  # a library's own error, message only
])
def test_output_folder_full_disk_is_one_clear_error(tmp_path: Path, raised: Exception) -> None:
    # a full disk (or quota) while writing: one sentence saying what to do, nothing left
    # behind, the original error kept as the cause (for --debug)
    target = tmp_path / "out"
    with pytest.raises(OutputError, match="ran out of space") as info, \
            OutputFolder(target) as folder:
        (folder.path / "half.parquet").write_bytes(b"PAR1")
        raise raised
    assert info.value.__cause__ is raised
    assert _entries(tmp_path) == []


def test_output_folder_exists_without_overwrite(tmp_path: Path) -> None:
    target = tmp_path / "out"
    target.mkdir()
    (target / "old.txt").write_text("old")
    with pytest.raises(OutputExistsError), OutputFolder(target):
        pytest.fail("the body must not run")  # pragma: no cover
    assert _entries(tmp_path) == ["out"]
    assert _entries(target) == ["old.txt"]


def test_earlier_output_names_the_option_and_the_project_key(tmp_path: Path) -> None:
    target = tmp_path / "out"
    target.mkdir()
    (target / "manifest.json").write_text("{}")  # an earlier ntrans output
    with pytest.raises(OutputExistsError, match=r"output folder '.*out' exists; pass "
                       r"--overwrite \(overwrite = true in a project file, overwrite=True "
                       r"from Python\)"), OutputFolder(target):
        pytest.fail("the body must not run")  # pragma: no cover


@pytest.mark.parametrize("marker", OUTPUT_MARKERS)
def test_output_folder_overwrite_replaces(tmp_path: Path, marker: str) -> None:
    target = tmp_path / "out"
    _earlier_output(target, marker)  # tables, adjust or a run bundle
    with OutputFolder(target, overwrite=True) as folder:
        (folder.path / "new.txt").write_text("new")
        assert (target / "old.txt").exists()  # old results stay until the end
    assert _entries(target) == ["new.txt"]
    assert _entries(tmp_path) == ["out"]


def test_output_folder_overwrite_replaces_an_empty_folder(tmp_path: Path) -> None:
    target = tmp_path / "out"
    target.mkdir()
    with OutputFolder(target, overwrite=True) as folder:
        (folder.path / "new.txt").write_text("new")
    assert _entries(target) == ["new.txt"]


@pytest.mark.parametrize("overwrite", [False, True])
@pytest.mark.parametrize("contents", [
    {"important/model.hdf": "data"},
    {"notes.txt": "x", "tables_summary.json/x": "a folder of that name is no marker"},
])
def test_output_folder_never_replaces_other_files(tmp_path: Path, overwrite: bool,
                                                  contents: dict[str, str]) -> None:
    # a folder that holds none of the files an ntrans job writes at its top is someone's
    # data: refused with or without overwrite, before the job does any work
    target = tmp_path / "out"
    for name, text in contents.items():
        (target / name).parent.mkdir(parents=True, exist_ok=True)
        (target / name).write_text(text)
    error = OutputError if overwrite else OutputExistsError
    with pytest.raises(error, match="does not look like ntrans output") as info, \
            OutputFolder(target, overwrite=overwrite):
        pytest.fail("the body must not run")  # pragma: no cover
    assert "--overwrite" not in str(info.value)  # it would not help
    assert _entries(tmp_path) == ["out"]
    for name, text in contents.items():
        assert (target / name).read_text() == text


def test_output_folder_overwrite_error_keeps_old(tmp_path: Path) -> None:
    target = tmp_path / "out"
    _earlier_output(target)
    with pytest.raises(ValueError), OutputFolder(target, overwrite=True) as folder:
        (folder.path / "new.txt").write_text("new")
        raise ValueError("boom")
    assert _entries(target) == ["old.txt", "tables_summary.json"]
    assert _entries(tmp_path) == ["out"]


def test_output_folder_interrupt_while_removing_old_says_written(tmp_path: Path,
                                                                monkeypatch) -> None:
    # an interrupt after the new folder is in place: the old results are still removed
    # and the note says the outputs were written
    import shutil

    target = tmp_path / "out"
    _earlier_output(target)
    real_rmtree = shutil.rmtree
    calls = []

    def interrupted_once(path, *args, **kwargs):
        calls.append(Path(path).name)
        if len(calls) == 1:
            raise KeyboardInterrupt
        return real_rmtree(path, *args, **kwargs)

    with pytest.raises(KeyboardInterrupt) as info, OutputFolder(target, overwrite=True) as folder:
        (folder.path / "new.txt").write_text("new")
        monkeypatch.setattr(shutil, "rmtree", interrupted_once)
    assert calls[0].startswith(".out.old-")
    assert _entries(target) == ["new.txt"]
    assert _entries(tmp_path) == ["out"]
    assert info.value.__notes__ == [f"the outputs were written to {target}"]


def _dead_pid() -> int:
    """The id of a process that has ended (a child that exited and was reaped)."""
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                           capture_output=True, text=True, check=True)
    return int(child.stdout)


def test_stale_staging_of_a_dead_run_is_removed_a_live_one_kept(tmp_path: Path) -> None:
    from ntrans.outputs import _host_tag

    host, dead = _host_tag(), _dead_pid()
    names = {
        "dead": f".out.tmp-{host}-{dead}-0123abcd",
        "live": f".out.tmp-{host}-{os.getpid()}-0123abcd",  # this test's own process
        "other host": f".out.tmp-not-{host}-{dead}-0123abcd",  # cannot tell: kept
        "no pid": ".out.tmp-0123abcd",  # named before process ids were written: kept
        "other output": f".other.tmp-{host}-{dead}-0123abcd",
    }
    for name in names.values():
        (tmp_path / name).mkdir()
        (tmp_path / name / "half.parquet").write_bytes(b"PAR1")
    assert remove_stale_staging(tmp_path / "out") == [tmp_path / names["dead"]]
    assert _entries(tmp_path) == sorted(n for k, n in names.items() if k != "dead")


def test_output_folder_removes_stale_staging_on_enter(tmp_path: Path) -> None:
    from ntrans.outputs import _host_tag

    stale = tmp_path / f".out.tmp-{_host_tag()}-{_dead_pid()}-0123abcd"
    stale.mkdir()
    with OutputFolder(tmp_path / "out") as folder:
        (folder.path / "a.txt").write_text("x")
        assert not stale.exists()
    assert _entries(tmp_path) == ["out"]


@pytest.mark.parametrize("overwrite", [False, True])
def test_output_folder_refuses_inputs(tmp_path: Path, overwrite: bool) -> None:
    target = tmp_path / "data"
    target.mkdir()
    dem = target / "dem.tif"
    dem.write_bytes(b"dem")
    with pytest.raises(OutputError), OutputFolder(
        target, overwrite=overwrite, inputs=[dem]
    ):
        pytest.fail("the body must not run")  # pragma: no cover
    assert dem.read_bytes() == b"dem"
    assert _entries(tmp_path) == ["data"]


def test_output_folder_refuses_to_be_inside_an_input(tmp_path: Path) -> None:
    gdb = tmp_path / "model.gdb"  # a folder-style dataset
    gdb.mkdir()
    with pytest.raises(OutputError):
        OutputFolder(gdb / "out", inputs=[gdb]).__enter__()
    assert _entries(gdb) == []


def test_output_folder_refuses_file_and_cwd(tmp_path: Path, monkeypatch) -> None:
    afile = tmp_path / "out"
    afile.write_text("x")
    with pytest.raises(OutputError):
        OutputFolder(afile, overwrite=True).__enter__()
    monkeypatch.chdir(tmp_path)
    with pytest.raises(OutputError):  # never replace the folder the user works in
        OutputFolder(".", overwrite=True).__enter__()
    assert _entries(tmp_path) == ["out"]


def test_output_folder_refuses_home_even_with_a_marker(tmp_path: Path, monkeypatch) -> None:
    home = tmp_path / "home"
    _earlier_output(home, "manifest.json")
    monkeypatch.setenv("HOME", str(home))
    with pytest.raises(OutputError, match="home"):
        OutputFolder(home, overwrite=True).__enter__()
    assert _entries(home) == ["manifest.json", "old.txt"]


def test_output_folder_creates_parents_and_path_outside_block(tmp_path: Path) -> None:
    folder = OutputFolder(tmp_path / "a" / "b" / "out")
    with pytest.raises(RuntimeError):
        _ = folder.path
    with folder:
        (folder.path / "x").write_text("1")
    assert (tmp_path / "a" / "b" / "out" / "x").exists()


# --------------------------------------------------------------------------- TableWriter


def _chunk(start: int, n: int, *, string_ids: bool = False) -> dict[str, np.ndarray]:
    ids = np.arange(start, start + n)
    return {
        "cell_id": ids.astype(str).astype(object) if string_ids else ids,
        "stage": np.linspace(0.0, 1.0, n) + start,
        "volume": np.full(n, 1.0 / 3.0),
    }


@pytest.mark.parametrize("string_ids", [False, True])
def test_table_writer_chunks_and_metadata(tmp_path: Path, string_ids: bool) -> None:
    path = tmp_path / "t.parquet"
    units = {"stage": "m", "volume": "m3", "not_a_column": "x"}
    with TableWriter(path, units=units, descriptions={"stage": "water level"},
                     metadata={"ntrans:version": "0.1.0", "ntrans:options": {"a": 1}},
                     row_group_rows=10) as writer:
        for start in range(0, 50, 7):
            writer.write(_chunk(start, 7, string_ids=string_ids))
    table = pq.read_table(path)
    assert table.num_rows == 56
    chunks = [_chunk(s, 7, string_ids=string_ids) for s in range(0, 50, 7)]
    for column in ("cell_id", "stage", "volume"):
        expected = np.concatenate([c[column] for c in chunks]).tolist()
        assert table.column(column).to_pylist() == expected, column
    assert table.schema.field("cell_id").type == (pa.string() if string_ids else pa.int64())
    assert pq.ParquetFile(path).num_row_groups == 4  # 14 + 14 + 14 + 14 rows, >= 10 each
    meta = table.schema.metadata
    assert json.loads(meta[UNITS_KEY.encode()]) == {"stage": "m", "volume": "m3"}
    assert json.loads(meta[DESCRIPTION_KEY.encode()]) == {"stage": "water level"}
    read = read_table_metadata(path)
    assert read["units"]["volume"] == "m3"
    assert read["ntrans:version"] == "0.1.0"
    assert json.loads(read["ntrans:options"]) == {"a": 1}


@pytest.mark.parametrize("key", ["stage", "depth"])
def test_table_writer_statistics_on_keys_only(tmp_path: Path, key: str) -> None:
    """Ids, labels, stages and depths keep Parquet min / max statistics (readers skip row
    groups by them); measured floats, which span their range in every row group, do not."""
    path = tmp_path / "t.parquet"
    values = np.linspace(0.0, 1.0, 10)
    with TableWriter(path, row_group_rows=4) as w:
        for lo, hi in ((0, 4), (4, 8), (8, 10)):  # one row group per chunk
            w.write({"cell_id": np.arange(lo, hi), key: values[lo:hi],
                     "label": list("abcdefghij"[lo:hi]), "volume": np.arange(lo, hi) * 1.0})
    meta = pq.ParquetFile(path).metadata
    assert meta.num_row_groups == 3
    for g in range(meta.num_row_groups):
        stats = {meta.row_group(g).column(i).path_in_schema:
                 meta.row_group(g).column(i).is_stats_set for i in range(4)}
        assert stats == {"cell_id": True, key: True, "label": True, "volume": False}
    # a filter on a key reads the right rows (its statistics let readers skip groups)
    got = pq.read_table(path, filters=[(key, ">", 0.5)]).to_pandas()
    assert got["cell_id"].tolist() == [5, 6, 7, 8, 9]


def test_table_writer_nullable_cell_b(tmp_path: Path) -> None:
    path = tmp_path / "f.parquet"
    schema = {"face_id": "int64", "cell_a": "int64", "cell_b": "int64", "flow_area": "float64"}
    with TableWriter(path, schema=schema) as writer:
        writer.write({"face_id": np.array([0]), "cell_a": np.array([1]),
                      "cell_b": np.array([None], dtype=object), "flow_area": np.array([0.5])})
        writer.write(pd.DataFrame({"cell_b": pd.array([2, None], dtype="Int64"),
                                   "face_id": [1, 2], "cell_a": [1, 3],
                                   "flow_area": [1.5, 2.5]}))
    table = pq.read_table(path)
    assert table.column("cell_b").to_pylist() == [None, 2, None]
    assert table.column("cell_b").type == pa.int64()
    assert table.column_names == list(schema)


def test_table_writer_first_chunk_types_kept(tmp_path: Path) -> None:
    """Later chunks are cast to the first chunk's types (int32 -> int64, float32 -> float64)."""
    path = tmp_path / "t.parquet"
    with TableWriter(path) as writer:
        writer.write({"cell_id": np.array([1, 2], dtype=np.int32),
                      "stage": np.array([1.0, 2.0], dtype=np.float32)})
        writer.write({"cell_id": np.array([3], dtype=np.int64),
                      "stage": np.array([0.1], dtype=np.float64)})
    table = pq.read_table(path)
    assert table.schema.field("cell_id").type == pa.int64()
    assert table.schema.field("stage").type == pa.float64()
    assert table.column("stage").to_pylist()[2] == 0.1


def test_table_writer_empty_with_schema(tmp_path: Path) -> None:
    path = tmp_path / "e.parquet"
    with TableWriter(path, schema={"cell_id": "string", "stage": "float64"},
                     units={"stage": "ft"}):
        pass
    table = pq.read_table(path)
    assert table.num_rows == 0
    assert table.schema.field("cell_id").type == pa.string()
    assert read_table_metadata(path)["units"] == {"stage": "ft"}


def test_table_writer_errors(tmp_path: Path) -> None:
    with pytest.raises(ValueError):  # no chunk and no schema: nothing to declare
        TableWriter(tmp_path / "a.parquet").close()
    with pytest.raises(ValueError):  # an all-null first column has no type
        TableWriter(tmp_path / "b.parquet").write({"cell_b": np.array([None, None], dtype=object)})
    writer = TableWriter(tmp_path / "c.parquet")
    writer.write({"a": np.arange(2)})
    with pytest.raises(ValueError):  # columns must not change between chunks
        writer.write({"b": np.arange(2)})
    writer.close()
    assert pq.read_table(tmp_path / "c.parquet").num_rows == 2


def test_table_writer_background_writes_the_same_file(tmp_path: Path) -> None:
    chunks = [_chunk(s, 7) for s in range(0, 70, 7)]
    for background in (True, False):
        with TableWriter(tmp_path / f"{background}.parquet", row_group_rows=10,
                         background=background) as writer:
            for chunk in chunks:
                writer.write(chunk)
        assert writer.rows_written == 70
    a, b = pq.ParquetFile(tmp_path / "True.parquet"), pq.ParquetFile(tmp_path / "False.parquet")
    assert a.num_row_groups == b.num_row_groups == 5  # same row groups, same order
    assert a.read().equals(b.read())


def test_table_writer_background_error_reaches_the_caller(tmp_path: Path, monkeypatch) -> None:
    writer = TableWriter(tmp_path / "t.parquet", row_group_rows=5)
    writer.write(_chunk(0, 5))  # opens the file and queues one row group

    def disk_full(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(writer._writer, "write_table", disk_full)
    writer.write(_chunk(5, 5))
    with pytest.raises(OSError, match="No space left"):
        for start in range(10, 60, 5):  # waits on the queue within two row groups
            writer.write(_chunk(start, 5))
        writer.close()
    writer.abort()  # after an error: closes what is open, raises nothing
    assert writer.closed and writer._pool is None


# --------------------------------------------------------------------------- CSV / GPKG


def test_write_csv_equals_parquet(tmp_path: Path) -> None:
    parquet = tmp_path / "t.parquet"
    rng = np.random.default_rng(7)
    with TableWriter(parquet, row_group_rows=5,
                     schema={"cell_id": "string", "cell_b": "int64", "stage": "float64"}) as w:
        for k in range(4):
            w.write({"cell_id": np.array([f"c,{k}", f'q"{k}', "plain"], dtype=object),
                     "cell_b": np.array([k, None, 2], dtype=object),
                     "stage": np.array([0.1, 1.0 / 3.0, rng.normal() * 1e6])})
    csv = write_csv(parquet, tmp_path / "t.csv")
    got = pd.read_csv(csv, dtype={"cell_id": str}, keep_default_na=False,
                      na_values={"cell_b": [""]})
    want = pq.read_table(parquet).to_pandas()
    assert list(got.columns) == ["cell_id", "cell_b", "stage"]
    assert got["cell_id"].tolist() == want["cell_id"].tolist()
    assert got["cell_b"].isna().tolist() == want["cell_b"].isna().tolist()
    np.testing.assert_array_equal(got["cell_b"].dropna().to_numpy(),
                                  want["cell_b"].dropna().to_numpy())
    # floats are written with round-trip precision: exact equality
    np.testing.assert_array_equal(got["stage"].to_numpy(), want["stage"].to_numpy())


def test_write_csv_writes_nan_as_an_empty_field(tmp_path: Path) -> None:
    # a NaN (n_ratio where one family is dry) must read back as missing in a spreadsheet
    # and in pandas: the text "nan" is a word to a spreadsheet, and it differed from the
    # empty field written for a null in the same file
    parquet = tmp_path / "t.parquet"
    with TableWriter(parquet, schema={"face_id": "int64", "n_ratio": "float64",
                                      "stage_bias": "float32"}) as w:
        w.write({"face_id": np.array([0, 1, 2]),
                 "n_ratio": np.array([1.25, np.nan, 0.5]),
                 "stage_bias": np.array([np.nan, -0.125, 0.0], dtype=np.float32)})
    csv = write_csv(parquet, tmp_path / "t.csv")
    lines = csv.read_text().splitlines()
    assert lines[1:] == ["0,1.25,", "1,,-0.125", "2,0.5,0"]
    got = pd.read_csv(csv)
    want = pq.read_table(parquet).to_pandas()
    np.testing.assert_array_equal(got["n_ratio"].to_numpy(), want["n_ratio"].to_numpy())
    np.testing.assert_array_equal(got["stage_bias"].to_numpy(dtype=np.float32),
                                  want["stage_bias"].to_numpy())


def test_write_geopackage_round_trip(tmp_path: Path) -> None:
    import geopandas as gpd

    frame = gpd.GeoDataFrame({"cell_id": ["a", "b"], "area": [100.0, 100.0]},
                             geometry=grid_polygons(2, 1, 10.0), crs="EPSG:32633")
    path = write_geopackage(frame, tmp_path / "cells.gpkg", "cells")
    back = gpd.read_file(path, layer="cells")
    assert back["cell_id"].tolist() == ["a", "b"]
    assert all(shapely.equals(back.geometry.to_numpy(), frame.geometry.to_numpy()))
    assert back.crs.to_epsg() == 32633


@pytest.mark.parametrize("chunk_rows", [1, 4, 7, 100_000])
def test_write_geopackage_in_chunks_keeps_every_row(tmp_path: Path, chunk_rows) -> None:
    import geopandas as gpd

    n = 23
    cells = gpd.GeoDataFrame(
        {"cell_id": np.arange(n), "cell_b": pd.array([1, None] * 11 + [3], dtype="Int64")},
        geometry=grid_polygons(n, 1, 2.0), crs="EPSG:32633",
    )
    path = write_geopackage(cells, tmp_path / "m.gpkg", "cells", chunk_rows=chunk_rows)
    write_geopackage(cells.iloc[:3], path, "other", chunk_rows=chunk_rows)  # second layer
    back = gpd.read_file(path, layer="cells")
    assert back["cell_id"].tolist() == list(range(n))  # order kept across chunks
    assert back["cell_b"].isna().sum() == 11  # nulls survive the chunked append
    assert all(shapely.equals(back.geometry.to_numpy(), cells.geometry.to_numpy()))
    assert len(gpd.read_file(path, layer="other")) == 3  # the first layer is kept


@pytest.mark.parametrize("chunk_rows", [2, 100])
@pytest.mark.parametrize("early", [False, True])
def test_write_geopackage_layer_type_from_all_rows(tmp_path: Path, chunk_rows, early) -> None:
    """Single and multi polygons in one layer: written as multi, whichever batch has them
    (GDAL's layer type is one per layer; pyogrio's own rule promotes a mix to multi)."""
    import geopandas as gpd
    import pyogrio

    squares = list(grid_polygons(4, 1, 2.0))
    geometry = squares[:3] + [shapely.MultiPolygon([squares[3], shapely.box(20, 0, 22, 2)])]
    frame = gpd.GeoDataFrame({"cell_id": np.arange(4), "flags": [None, None, "a", "b"]},
                             geometry=geometry, crs="EPSG:32633")
    # early: the geometry encoded beforehand (as the cell tables do beside their tiles)
    encoded = encode_geometry(frame.geometry.to_numpy()) if early else None
    path = write_geopackage(frame, tmp_path / "m.gpkg", "cells", chunk_rows=chunk_rows,
                            encoded=encoded)
    info = pyogrio.read_info(path, layer="cells")
    assert info["geometry_type"] == "MultiPolygon"
    assert info["features"] == 4
    assert info["capabilities"]["fast_spatial_filter"]  # the spatial index is there
    back = gpd.read_file(path, layer="cells")
    # a column with no value in the first batch is still text, values kept
    assert back["flags"].tolist()[2:] == ["a", "b"]
    assert back["flags"].isna().tolist()[:2] == [True, True]
    # promotion to one-part multi polygons keeps the shapes
    assert all(shapely.equals(back.geometry.to_numpy(), frame.geometry.to_numpy()))


def test_write_geopackage_encoded_rows_must_match(tmp_path: Path) -> None:
    import geopandas as gpd

    frame = gpd.GeoDataFrame(geometry=list(grid_polygons(3, 1, 2.0)), crs="EPSG:32633")
    encoded = encode_geometry(frame.geometry.to_numpy()[:2])
    with pytest.raises(OutputError, match="one row per feature"):
        write_geopackage(frame, tmp_path / "g.gpkg", "cells", encoded=encoded)


@pytest.mark.parametrize("chunk_rows", [2, 100])
def test_write_geopackage_attributes_with_encoded_geometry(tmp_path: Path, chunk_rows) -> None:
    """A plain DataFrame with its geometry given as WKB (the faces of a job) writes the
    same layer as the GeoDataFrame with shapely geometry."""
    import geopandas as gpd
    import pyogrio

    lines = [shapely.LineString([(0, 0), (1, 0)]), shapely.LineString([(1, 0), (1, 1), (2, 1)]),
             shapely.LineString([(2, 1), (2, 3)])]
    attributes = pd.DataFrame({"face_id": np.arange(3), "length": shapely.length(lines)})
    frame = gpd.GeoDataFrame(attributes, geometry=lines, crs="EPSG:32633")
    a = write_geopackage(frame, tmp_path / "a.gpkg", "faces")
    b = write_geopackage(attributes, tmp_path / "b.gpkg", "faces", chunk_rows=chunk_rows,
                         encoded=encode_geometry(np.array(lines, dtype=object)),
                         crs=frame.crs)
    assert pyogrio.read_info(b, layer="faces")["geometry_type"] == "LineString"
    assert pyogrio.read_info(b, layer="faces")["capabilities"]["fast_spatial_filter"]
    back_a, back_b = gpd.read_file(a, layer="faces"), gpd.read_file(b, layer="faces")
    assert back_b.crs == back_a.crs == frame.crs
    pd.testing.assert_frame_equal(back_a.drop(columns="geometry"),
                                  back_b.drop(columns="geometry"))
    assert all(shapely.equals_exact(back_a.geometry.to_numpy(), back_b.geometry.to_numpy(),
                                    tolerance=0))


def test_write_geopackage_attributes_need_encoded_geometry(tmp_path: Path) -> None:
    with pytest.raises(OutputError, match="needs its geometry encoded"):
        write_geopackage(pd.DataFrame({"face_id": [1]}), tmp_path / "g.gpkg", "faces")


def test_write_geopackage_geometry_only(tmp_path: Path) -> None:
    import geopandas as gpd
    import pyogrio

    frame = gpd.GeoDataFrame(geometry=list(grid_polygons(3, 1, 2.0)), crs="EPSG:32633")
    path = write_geopackage(frame, tmp_path / "g.gpkg", "cells", chunk_rows=2)
    assert pyogrio.read_info(path, layer="cells")["features"] == 3


def test_write_geopackage_lines_keep_their_type(tmp_path: Path) -> None:
    import geopandas as gpd
    import pyogrio

    lines = gpd.GeoDataFrame({"face_id": np.arange(3)},
                             geometry=[shapely.LineString([(0, i), (1, i)]) for i in range(3)],
                             crs="EPSG:32633")
    path = write_geopackage(lines, tmp_path / "f.gpkg", "faces", chunk_rows=2)
    assert pyogrio.read_info(path, layer="faces")["geometry_type"] == "LineString"


# --------------------------------------------------------------------------- units

CONTRACT_COLUMNS = [  # DESIGN.md section 4
    "cell_id", "stage", "wet_area", "volume", "bed_area", "hydraulic_radius", "flat_elevation",
    "flat_depth", "flat_hydraulic_radius",
    "face_id", "cell_a", "cell_b", "length", "flow_area", "wetted_perimeter", "top_width",
    "class", "n_source", "n_target", "ratio", "ratio_p10", "ratio_p50", "ratio_p90", "faces",
    "weight_share", "flags",
    "n_ratio", "conveyance_source", "conveyance_target", "stage_bias_unadjusted",
    "stage_bias_adjusted",
]


@pytest.mark.parametrize(
    ("horizontal", "vertical", "expected"),
    [
        ("metre", None, {"stage": "m", "wet_area": "m2", "volume": "m3", "flow_area": "m2",
                         "hydraulic_radius": "m", "length": "m", "conveyance_source": "m3/s"}),
        ("foot", "foot", {"stage": "ft", "wet_area": "ft2", "volume": "ft3",
                          "conveyance_target": "ft3/s", "top_width": "ft"}),
        ("foot", "metre", {"stage": "m", "wet_area": "ft2", "volume": "ft2*m",
                           "flow_area": "ft*m", "hydraulic_radius": "m", "length": "ft"}),
    ],
)
def test_column_units(horizontal: str, vertical: str | None, expected: dict[str, str]) -> None:
    units = column_units(horizontal, vertical)
    for column, unit in expected.items():
        assert units[column] == unit, column


def test_every_contract_column_has_unit_and_description() -> None:
    units = column_units("metre")
    descriptions = column_descriptions()
    assert set(CONTRACT_COLUMNS) <= set(units)
    assert set(CONTRACT_COLUMNS) <= set(descriptions)
    assert set(descriptions) == set(units)


def test_column_units_rejects_unknown_unit() -> None:
    with pytest.raises(ValueError):
        column_units("yard")


def test_covered_fraction_says_how_a_face_counts_its_terrain():
    # a face's share is that of its bilinear profile, smaller than its share over valid
    # pixels near nodata; the description written into faces.gpkg must say so
    from ntrans.outputs import column_descriptions

    text = column_descriptions()["covered_fraction"]
    assert "a face" in text and "bilinear" in text


def test_flat_columns_say_they_use_the_covered_area():
    # a cell partly off the DEM is flat over its covered area only (so the two families
    # compare on the same ground); the descriptions must not promise the whole cell
    from ntrans.outputs import column_descriptions

    described = column_descriptions()
    assert "covered_area" in described["flat_wet_area"]
    assert "covered_area" in described["flat_volume"]
