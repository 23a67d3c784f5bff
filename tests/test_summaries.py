"""Tests of ntrans.summaries: the run's figures read from the adjustment tables in passes
equal those of the whole table in memory.

References: pandas medians and linear quantiles of the whole frame (the way the figures
were computed before they were streamed), the in-memory functions of ntrans.maps and
ntrans.plots, and for the stage-bias summary numpy and a hand example.  Row groups of a
few rows cut the faces' runs of rows, and partitions of a few rows split the cells, so
every carry-over and partition path runs.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from ntrans import maps, plots, summaries

CLASSES = ("grass", "trees", "")  # "" is the adjustment table's "no class"


@pytest.fixture(autouse=True)
def one_row_group_per_read(monkeypatch):
    """Every read one row group (of a few rows): the carry-over paths run."""
    monkeypatch.setattr(summaries, "READ_ROWS", 1)


def face_table(seed: int, *, n_faces: int = 80, n_cells: int = 30, text_ids: bool = False,
               many_levels: bool = False) -> pd.DataFrame:
    """A face adjustment table: runs of 1-5 rows per face, boundary faces, NaN and
    infinite ratios, zero and NaN weights, three classes."""
    rng = np.random.default_rng(seed)
    runs = rng.integers(1, 6, n_faces)
    face = np.repeat(np.arange(n_faces), runs)
    a = rng.integers(0, n_cells, n_faces)
    b = np.where(rng.random(n_faces) < 0.2, -1, (a + rng.integers(1, n_cells, n_faces)) % n_cells)

    def ids(index: np.ndarray) -> list:
        return [None if i < 0 else (f"c{i}" if text_ids else 100 + int(i)) for i in index]

    n = face.size
    ratio = np.exp(rng.normal(0.0, 0.2, n))
    ratio[rng.random(n) < 0.15] = np.nan
    ratio[rng.random(n) < 0.02] = np.inf
    bias_un = rng.normal(-0.1, 0.2, n)
    bias_un[rng.random(n) < 0.1] = np.nan
    bias_ad = rng.normal(0.0, 0.1, n)
    bias_ad[rng.random(n) < 0.1] = np.nan
    weight = rng.random(n)
    weight[rng.random(n) < 0.05] = 0.0
    weight[rng.random(n) < 0.05] = np.nan
    if many_levels:  # each face at its own stage: more depths than bands
        depth = rng.uniform(0.0, 3.0, n)
    else:  # window depths with round-off, as sums of steps carry
        depth = rng.integers(1, 6, n) * 0.1 + rng.choice([0.0, 1e-12, -1e-12], n)
    return pd.DataFrame({
        "face_id": face,
        "cell_a": ids(a[face]),
        "cell_b": ids(b[face]),
        "depth": depth,
        "stage": 100.0 + depth,
        "n_ratio": ratio,
        "stage_bias_unadjusted": bias_un,
        "stage_bias_adjusted": bias_ad,
        "conveyance_source": weight,
        "dominant_class": np.array(CLASSES)[rng.integers(0, 3, n_faces)][face],
    })


def write(frame: pd.DataFrame, path, row_group: int = 7):
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path,
                   row_group_size=row_group)
    return path


def cell_ids(frame: pd.DataFrame) -> np.ndarray:
    ids = pd.concat([frame["cell_a"], frame["cell_b"]]).dropna().unique()
    return np.asarray(sorted(ids, key=str)[::-1], dtype=object)  # not in any table order


@pytest.mark.parametrize("row_group", [1, 7, 10_000])
def test_item_medians_are_the_whole_tables_groupby(tmp_path, row_group):
    frame = face_table(0)
    path = write(frame, tmp_path / "f.parquet", row_group)
    got = summaries.item_medians(path, key="face_id",
                                 values=["n_ratio", "stage_bias_adjusted", "absent"],
                                 first=["dominant_class"])
    grouped = frame.groupby("face_id", sort=True)
    want = grouped[["n_ratio", "stage_bias_adjusted"]].median()
    want["dominant_class"] = grouped["dominant_class"].first().astype(object)
    # medians of the same values: equal to the bit
    pd.testing.assert_frame_equal(got, want, check_exact=True)


def test_item_medians_refuse_items_split_in_the_table(tmp_path):
    frame = face_table(1)
    shuffled = frame.iloc[np.random.default_rng(1).permutation(len(frame))]
    path = write(shuffled, tmp_path / "f.parquet", 5)
    with pytest.raises(ValueError, match="not contiguous"):
        summaries.item_medians(path, key="face_id", values=["n_ratio"])


@pytest.mark.parametrize("text_ids", [False, True])
@pytest.mark.parametrize("part_rows", [3, 64, 1 << 21])
def test_cell_medians_over_faces_are_the_whole_tables(tmp_path, text_ids, part_rows):
    frame = face_table(2, text_ids=text_ids)
    path = write(frame, tmp_path / "f.parquet", 9)
    ids = cell_ids(frame)
    ids = np.append(ids, "lonely" if text_ids else 9999).astype(object)  # a cell of no face
    values = ["n_ratio", "stage_bias_unadjusted"]
    got = summaries.cell_medians_over_faces(path, cell_ids=ids, values=values,
                                            work_dir=tmp_path, part_rows=part_rows)
    link = frame.drop_duplicates("face_id")[["face_id", "cell_a", "cell_b"]]
    for column in values:
        want = maps.cell_median_of_faces(frame, link, value=column).reindex(ids)
        np.testing.assert_array_equal(got[column].to_numpy(), want.to_numpy(dtype=float))
    assert np.isnan(got.iloc[-1]).all()
    assert [p.name for p in tmp_path.iterdir()] == ["f.parquet"]  # partitions removed


@pytest.mark.parametrize("many_levels", [False, True])
@pytest.mark.parametrize("x", ["depth", "stage"])
def test_class_ratio_bands_are_the_whole_tables_bands(tmp_path, many_levels, x):
    frame = face_table(3, n_faces=300, many_levels=many_levels)
    path = write(frame, tmp_path / "f.parquet", 11)
    got = summaries.class_ratio_bands(path, x=x, round_x=6 if x == "depth" else None)
    ref = frame.rename(columns={"dominant_class": "class"})
    ref = ref.assign(depth=ref["depth"].round(6))
    ref["n_ratio"] = ref["n_ratio"].where(np.isfinite(ref["n_ratio"]))
    want = plots.ratio_bands(ref, x=x)
    assert got["class"].tolist() == want["class"].tolist()
    np.testing.assert_array_equal(got["count"].to_numpy(), want["count"].to_numpy())
    np.testing.assert_allclose(got[x], want[x], rtol=1e-15)  # same levels or bin centres
    # linear quantiles from the values of a few bins against pandas' on the whole group:
    # the same order statistics, interpolated in another order (1e-12 relative)
    for column in ("p10", "p50", "p90"):
        np.testing.assert_allclose(got[column], want[column], rtol=1e-12)


def test_class_ratio_bands_without_a_class_column_are_one_class(tmp_path):
    frame = face_table(4).drop(columns="dominant_class")
    path = write(frame, tmp_path / "f.parquet")
    got = summaries.class_ratio_bands(path, x="depth", round_x=6)
    ref = frame.assign(**{"class": "all"}, depth=frame["depth"].round(6))
    ref["n_ratio"] = ref["n_ratio"].where(np.isfinite(ref["n_ratio"]))
    want = plots.ratio_bands(ref, x="depth")
    assert set(got["class"]) == {"all"}
    np.testing.assert_allclose(got[["p10", "p50", "p90"]], want[["p10", "p50", "p90"]],
                               rtol=1e-12)


def lower_weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    """The smallest value whose cumulative weight (ascending) reaches half the total."""
    order = np.argsort(v, kind="stable")
    cum = np.cumsum(w[order])
    return float(v[order][np.searchsorted(cum, 0.5 * cum[-1])])


def test_stage_bias_figures_are_the_whole_tables(tmp_path):
    frame = face_table(5, n_faces=400)
    path = write(frame, tmp_path / "f.parquet", 13)
    stats, histogram = summaries.stage_bias_figures(path)
    w_all = frame["conveyance_source"].to_numpy()
    for name in ("unadjusted", "adjusted"):
        v_all = frame[f"stage_bias_{name}"].to_numpy()
        v = v_all[np.isfinite(v_all)]
        got = stats[f"stage_bias_{name}"]
        assert got["count"] == v.size
        # numpy's median and linear percentiles of the whole column (1e-12: the two order
        # statistics are interpolated from a few bins' values)
        assert got["median"] == pytest.approx(np.median(v), rel=1e-12)
        assert got["p10"] == pytest.approx(np.percentile(v, 10), rel=1e-12)
        assert got["p90"] == pytest.approx(np.percentile(v, 90), rel=1e-12)
        # sums taken row group by row group: another order of addition
        assert got["mean_abs"] == pytest.approx(np.mean(np.abs(v)), rel=1e-12)
        ok = np.isfinite(v_all) & np.isfinite(w_all) & (w_all >= 0)
        assert got["weighted_median"] == lower_weighted_median(v_all[ok], w_all[ok])
        assert got["weighted_mean_abs"] == pytest.approx(
            np.sum(w_all[ok] * np.abs(v_all[ok])) / np.sum(w_all[ok]), rel=1e-12)
    want = plots.stage_bias_histogram(frame["stage_bias_unadjusted"].to_numpy(),
                                      frame["stage_bias_adjusted"].to_numpy())
    np.testing.assert_allclose(histogram.edges, want.edges, rtol=1e-12)
    np.testing.assert_array_equal(histogram.before, want.before)
    np.testing.assert_array_equal(histogram.after, want.after)
    assert (histogram.count_before, histogram.count_after) == (want.count_before,
                                                               want.count_after)
    assert histogram.median_after == pytest.approx(want.median_after, rel=1e-12)


def test_stage_error_summary_weighted_by_conveyance_by_hand(tmp_path):
    # by hand: errors 1, -2, 10 with weights 1, 1, 8 (the NaN error drops out) -> median
    # 1; weighted median 10 (the cumulative weight passes half of 10 at the third value);
    # weighted mean |e| = (1 + 2 + 80) / 10
    frame = pd.DataFrame({"stage_bias_unadjusted": [1.0, -2.0, 10.0, np.nan],
                          "conveyance_source": [1.0, 1.0, 8.0, 5.0]})
    stats, histogram = summaries.stage_bias_figures(write(frame, tmp_path / "f.parquet", 2))
    got = stats["stage_bias_unadjusted"]
    assert got["count"] == 3
    assert got["median"] == 1.0
    assert got["weighted_median"] == 10.0
    assert got["weighted_mean_abs"] == pytest.approx(8.3, rel=1e-12)  # exact arithmetic
    assert histogram is None  # only with both columns
    stats, _ = summaries.stage_bias_figures(path=write(frame, tmp_path / "g.parquet"),
                                            weight=None)
    assert stats["stage_bias_unadjusted"]["weighted_median"] is None  # no weights


def test_whole_items_keep_each_items_rows_together():
    frames = [pd.DataFrame({"k": [1, 1, 2]}), pd.DataFrame({"k": [2, 2]}),
              pd.DataFrame({"k": [2, 3]}), pd.DataFrame({"k": []})]
    got = [f["k"].tolist() for f in summaries.whole_items(iter(frames), "k")]
    assert got == [[1, 1], [2, 2, 2, 2], [3]]


@pytest.mark.parametrize("text_ids", [False, True])
def test_rows_with_are_pyarrows_filtered_read(tmp_path, text_ids):
    # reference: pyarrow's own filtered read of the whole file; sorted ids in small row
    # groups let the statistics skip most groups, so both paths run
    frame = face_table(6, text_ids=text_ids).sort_values("cell_a", key=lambda c: c.astype(str))
    frame = frame.dropna(subset=["cell_a"]).reset_index(drop=True)
    path = write(frame, tmp_path / "f.parquet", 6)
    wanted = frame["cell_a"].unique()[[0, 3, -1]].tolist()
    got = summaries.rows_with(path, "cell_a", wanted)
    want = pq.read_table(path, filters=[("cell_a", "in", wanted)]).to_pandas()
    pd.testing.assert_frame_equal(got, want)
    assert len(summaries.rows_with(path, "cell_a", [])) == 0
