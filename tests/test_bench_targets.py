"""The benchmark's target verdicts (bench/bench_tables.py): the figures in, the verdicts out.

The benchmark itself is a script that prints figures and is never run by the tests; its
verdict on the scale targets is plain arithmetic on those figures, checked here on rows
shaped like the ones it writes.  The limits are the targets as stated for the project.
"""

from __future__ import annotations

import importlib.util
import json
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[1] / "bench"


@pytest.fixture(scope="module")
def bench():
    sys.path.insert(0, str(BENCH))  # bench_tables imports its neighbour make_case
    try:
        spec = importlib.util.spec_from_file_location("bench_tables", BENCH / "bench_tables.py")
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        yield module
    finally:
        sys.path.remove(str(BENCH))


def _row(case, pipeline, seconds, peak_mb=400.0, mpx_per_s=None):
    return {"case": case, "pipeline": pipeline, "seconds": seconds, "cpu_s": seconds, "peak_mb": peak_mb,
            "mpx_per_s": mpx_per_s}


def _verdicts(checks):
    return {c["target"]: c["verdict"] for c in checks}


def _passing_rows():
    return [
        _row("1e6", "ntrans_cells", 0.20, mpx_per_s=5.0),
        _row("1e6", "floor", 0.08),
        _row("1e7", "ntrans_cells", 1.00, peak_mb=900.0, mpx_per_s=10.0),
        _row("1e7", "floor", 0.40),
        _row("1e7", "exactextract", 2.00),
        _row("1e7", "rasterstats", 50.0),
        _row("1e7", "ntrans_faces", 5.0),
        _row("1e7", "ntrans_workers", 5.0),
        _row("1e8", "ntrans_cells", 10.0, peak_mb=1430.0, mpx_per_s=10.0),
        _row("1e8", "floor", 4.0),
    ]


def test_every_target_met_at_its_limit(bench):
    # on or just inside each limit: 2x, 50x, 2.5x the floor (limit 3x), 900 MiB < 1 GB
    # (953.7 MiB), 1430 MiB < 1.5 GB (1430.5 MiB), equal throughput, equal seconds
    checks = bench.check_targets(_passing_rows(), n_stages=30, workers=2)
    assert [c["verdict"] for c in checks] == ["met"] * len(checks)
    assert len(checks) == 10  # 2 speed-ups, 3 floors, 2 memories, 2 throughputs, 1 cluster


@pytest.mark.parametrize(
    ("change", "target"),
    [
        (("1e7", "exactextract", 1.99), "1e7 cell tables at least 2x faster than exactextract"),
        (("1e7", "rasterstats", 49.9), "1e7 cell tables at least 50x faster than rasterstats"),
        (("1e7", "floor", 0.33), "1e7 cell tables within 3x of the read-and-sort floor"),
        (("1e7", "ntrans_workers", 5.01),
         "1e7 local 2-worker cluster not slower than one process"),
    ],
)
def test_a_figure_past_its_limit_is_not_met(bench, change, target):
    case, pipeline, seconds = change
    rows = [_row(case, pipeline, seconds) if (r["case"], r["pipeline"]) == (case, pipeline)
            else r for r in _passing_rows()]
    verdicts = _verdicts(bench.check_targets(rows, n_stages=30, workers=2))
    assert verdicts[target] == "NOT MET"
    assert sum(v == "NOT MET" for v in verdicts.values()) == 1


def test_memory_limits_are_decimal_gigabytes(bench):
    # 1 GB = 1e9 bytes = 953.67 MiB (the peak is measured in MiB)
    rows = _passing_rows()
    rows[2]["peak_mb"] = 954.0
    verdicts = _verdicts(bench.check_targets(rows, n_stages=30, workers=2))
    assert verdicts["1e7 cell tables peak memory under 1 GB"] == "NOT MET"


def test_falling_throughput_is_not_met(bench):
    rows = _passing_rows()
    rows[-2]["mpx_per_s"] = 9.9  # 1e8 slower per pixel than 1e7
    verdicts = _verdicts(bench.check_targets(rows, n_stages=30, workers=2))
    assert verdicts["cell tables' throughput does not fall from 1e7 to 1e8"] == "NOT MET"
    assert verdicts["cell tables' throughput does not fall from 1e6 to 1e7"] == "met"


def test_missing_failed_or_off_condition_runs_are_not_measured(bench):
    rows = [r for r in _passing_rows() if r["pipeline"] != "rasterstats"]
    rows.append({"case": "1e7", "pipeline": "rasterstats", "error": "timed out"})
    checks = {c["target"]: c for c in bench.check_targets(rows, n_stages=20, workers=3)}
    assert checks["1e7 cell tables at least 50x faster than rasterstats"]["verdict"] == (
        "not measured")
    # the 1e7 timing targets are stated for 30 stages and the cluster's for 2 workers
    exact = checks["1e7 cell tables at least 2x faster than exactextract"]
    assert exact["verdict"] == "not measured" and "30" in exact["measured"]
    cluster = checks["1e7 local 2-worker cluster not slower than one process"]
    assert cluster["verdict"] == "not measured" and "2" in cluster["measured"]


def test_saved_results_give_the_same_verdicts(bench, tmp_path, capsys):
    saved = {"started": "then", "stages": 30, "workers": 2, "repeat": 1,
             "cases": [{"case": "1e7", "rows": [r for r in _passing_rows()
                                                if r["case"] == "1e7"]}]}
    path = tmp_path / "results.json"
    path.write_text(json.dumps(saved))
    checks = bench.show_saved(path)
    printed = capsys.readouterr().out
    assert _verdicts(checks)["1e7 cell tables within 3x of the read-and-sort floor"] == "met"
    assert "not measured" in printed and "1e8 cell tables peak memory under 1.5 GB" in printed
