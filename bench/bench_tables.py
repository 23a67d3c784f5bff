"""Benchmark: cell / face stage tables with ntrans against generic reference pipelines.

For each case size (about N one-metre pixels, a Voronoi mesh of ~N/200 cells) this runs
every pipeline in its own subprocess, times it, measures its peak memory, checks that the
tables agree, and prints one table.  Results also go to ``bench/_cases/results.json``.

    python bench/bench_tables.py                       # sizes 1e6,1e7
    python bench/bench_tables.py --sizes 1e6,1e7,1e8   # the 1e8 case on request
    python bench/bench_tables.py --sizes 1e6 --pipelines ntrans_cells,exactextract
    python bench/bench_tables.py --repeat 3            # three rounds, median run of each

Pipelines:
  ntrans_cells     build_tables(..., faces=False)           cell stage table only
  ntrans_faces     build_tables(..., faces=True)            cells + faces
  ntrans_threads   build_tables(..., faces=True, threads=T) T tiles at once in one process
                   (--threads, default 1: one at a time; the other ntrans pipelines use
                   the library default, one tile thread per core up to four)
  ntrans_workers   build_tables(..., faces=True, workers=W) local Dask cluster of W workers
  ntrans_adjust    adjust_roughness(n=0.035, flat -> subgrid, lumped closure, 30 depths)
  exactextract     exactextract pixel lists + numpy per cell (reference_pipelines.py)
  rasterstats      rasterstats custom statistic, pixel-centre rule (cases up to --rasterstats-max)
  floor            read the DEM + one numpy sort of all pixels

Seconds are measured inside the subprocess around the pipeline call (imports excluded,
Dask cluster start-up included); cpu_s is user + system time of the subprocess and all
its descendants: the larger of what os.wait4 reports (the subprocess and the children it
reaped) and the sum of the last sampled CPU time of every process in its tree (every
50 ms), which also counts Dask workers forked by a server process.  Peak memory is
the larger of the subprocess's own peak (VmHWM, read by it at the end; ru_maxrss where
that is missing, which on Linux also carries the memory of this benchmark process at the
fork, e.g. after it has built a large case) and the largest sampled sum of resident
memory over the subprocess and all its descendants (every 50 ms; counts the Dask
workers, may double-count shared pages).  The sampler reads each process's
/proc/PID/stat and finds the tree through /proc/PID/task/TID/children (about 0.7 ms a
sample, 1-2 % of a core); where the kernel has no such files it falls back to psutil,
which scans every process on the machine (about 2.7 ms a sample, 5 % of a core, taken
from the pipeline on a 2-core machine).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import signal
import subprocess
import sys
import time
import traceback
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from make_case import CASES_DIR, cached_case, case_folder, estimate_case_bytes  # noqa: E402

ALL_PIPELINES = [
    "ntrans_cells",
    "ntrans_faces",
    "ntrans_threads",
    "ntrans_workers",
    "ntrans_adjust",
    "exactextract",
    "rasterstats",
    "floor",
]
TABLE_PIPELINES = {"ntrans_cells", "ntrans_faces", "ntrans_threads", "ntrans_workers",
                   "exactextract", "rasterstats"}
FACE_PIPELINES = {"ntrans_faces", "ntrans_threads", "ntrans_workers", "ntrans_adjust"}
BYTES_DISK_PER_PIXEL = 60  # case + the largest pipeline output + temporary rasters (rough)
BYTES_MEMORY_PER_PIXEL = 60  # peak of the heaviest pipeline (rough, from the 1e7 case)


# --------------------------------------------------------------------------- child side
def _run_child(job_path: Path) -> None:
    """Run one pipeline described by a JSON job file; write its result JSON."""
    job = json.loads(job_path.read_text())
    name = job["pipeline"]
    out = Path(job["out"])
    common = {"out": out, "id_field": "cell_id"}
    # heavy libraries every pipeline may import lazily: load them before the clock starts
    import geopandas  # noqa: F401
    import pandas  # noqa: F401
    import pyarrow.parquet  # noqa: F401
    import pyogrio  # noqa: F401
    import rasterio  # noqa: F401
    import scipy.sparse  # noqa: F401
    import shapely  # noqa: F401

    if name == "ntrans_workers":
        import dask.distributed  # noqa: F401
    if name.startswith("ntrans_"):
        import ntrans.adjust
        import ntrans.tables  # noqa: F401  (import before the clock starts)
    if name == "exactextract" or name == "rasterstats" or name == "floor":
        import reference_pipelines as ref

        if name == "exactextract":
            import exactextract  # noqa: F401
        if name == "rasterstats":
            import rasterstats  # noqa: F401
    import warnings

    from ntrans.stages import parse_spec

    result: dict = {"pipeline": name}
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        t0 = time.perf_counter()
        if name in ("ntrans_cells", "ntrans_faces", "ntrans_threads", "ntrans_workers"):
            res = ntrans.tables.build_tables(
                job["dem"], job["cells"], stages=job["stages"],
                faces=name != "ntrans_cells",
                workers=job["workers"] if name == "ntrans_workers" else None,
                threads=job["threads"] if name == "ntrans_threads" else None,
                overwrite=True, **common,
            )
            result.update(n_cells=res.n_cells, n_faces=res.n_faces, n_stages=res.n_stages,
                          n_tiles=res.n_tiles, n_partial=res.n_partial)
        elif name == "ntrans_adjust":
            res = ntrans.adjust.adjust_roughness(
                job["dem"], job["cells"], n=0.035, source="flat", target="subgrid",
                closure="lumped", depths=job["depths"], overwrite=True, **common,
            )
            result.update(n_stages=len(parse_spec(job["depths"])),
                          classes=json.loads(res.classes.to_json(orient="records"))
                          if hasattr(res.classes, "to_json") else str(res.classes))
        else:
            detail = ref.PIPELINES[name](job["dem"], job["cells"], parse_spec(job["stages"]),
                                         **common)
            result["detail"] = detail
        result["seconds"] = time.perf_counter() - t0
    result["warnings"] = sorted({f"{w.category.__name__}: {w.message}"[:200] for w in caught})
    result["own_peak_mb"] = _own_peak_mb()
    Path(job["result"]).write_text(json.dumps(result, default=str))


def _own_peak_mb() -> float | None:
    """This process's peak resident memory since it started its program (VmHWM), MB.

    Unlike ``ru_maxrss`` it does not carry over the memory of the process it was forked
    from: Linux keeps the larger of the two across ``exec``, so a benchmark that has just
    built a 10^8-pixel case in its own process would report that for every pipeline.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return None


# --------------------------------------------------------------------------- parent side
_CLOCK_TICKS = os.sysconf("SC_CLK_TCK") if hasattr(os, "sysconf") else 100
_PAGE_BYTES = os.sysconf("SC_PAGE_SIZE") if hasattr(os, "sysconf") else 4096


#: the kernel lists each task's children (Linux with CONFIG_PROC_CHILDREN)
_HAS_CHILDREN_FILES = os.path.exists(f"/proc/{os.getpid()}/task/{os.getpid()}/children")


def _proc_tree(pid: int) -> list[int]:
    """``pid`` and all its descendants, from ``/proc/PID/task/TID/children``.  A process
    starting or ending during the walk may be missed: the next sample sees it."""
    tree, i = [pid], 0
    while i < len(tree):
        parent = tree[i]
        i += 1
        try:
            tasks = os.listdir(f"/proc/{parent}/task")
        except OSError:
            continue  # ended since it was listed
        for task in tasks:
            try:
                with open(f"/proc/{parent}/task/{task}/children") as f:
                    tree.extend(int(child) for child in f.read().split())
            except OSError:
                continue  # the thread ended
    return tree


def _proc_sample(pid: int) -> tuple[tuple[int, int], float, int]:
    """``((pid, start ticks), user + system CPU seconds, resident bytes)`` of one process
    from ``/proc/PID/stat`` (fields 14, 15, 22 and 24; ``proc(5)``)."""
    with open(f"/proc/{pid}/stat", "rb") as f:
        fields = f.read().rsplit(b")", 1)[1].split()  # fields[0] is field 3 (state)
    cpu = (int(fields[11]) + int(fields[12])) / _CLOCK_TICKS
    return (pid, int(fields[19])), cpu, int(fields[21]) * _PAGE_BYTES


class _TreeSampler:
    """CPU seconds and resident memory of a process and its descendants, sampled."""

    def __init__(self, pid: int) -> None:
        self.pid = pid
        self.cpu_seen: dict[tuple[int, float], float] = {}  # process -> last CPU seconds
        self.peak_bytes = 0
        self._fallback = None  # psutil.Process where the kernel lists no children

    def sample(self) -> None:
        rss = 0
        if _HAS_CHILDREN_FILES:
            for member in _proc_tree(self.pid):
                try:
                    key, cpu, resident = _proc_sample(member)
                except (OSError, ValueError, IndexError):
                    continue  # ended while sampled
                self.cpu_seen[key] = cpu
                rss += resident
        else:
            import psutil

            if self._fallback is None:
                self._fallback = psutil.Process(self.pid)
            try:
                members = [self._fallback, *self._fallback.children(recursive=True)]
            except psutil.Error:
                return
            for member in members:
                try:
                    with member.oneshot():
                        rss += member.memory_info().rss
                        times = member.cpu_times()
                        self.cpu_seen[(member.pid, member.create_time())] = (
                            times.user + times.system)
                except psutil.Error:
                    pass
        self.peak_bytes = max(self.peak_bytes, rss)

    @property
    def cpu_s(self) -> float:
        return sum(self.cpu_seen.values())


def _run_pipeline(name: str, job: dict, run_dir: Path, timeout: float) -> dict:
    """Start one pipeline subprocess, sample its memory, return its result dict.

    The subprocess leads its own process group; past ``timeout`` seconds that group (the
    subprocess and the workers it started) is killed and the run reported as timed out.
    """
    run_dir.mkdir(parents=True, exist_ok=True)
    job = {**job, "pipeline": name, "out": str(run_dir / "out"),
           "result": str(run_dir / "result.json")}
    job_path = run_dir / "job.json"
    job_path.write_text(json.dumps(job))
    Path(job["result"]).unlink(missing_ok=True)
    log = open(run_dir / "log.txt", "w")  # closed below, after the child ends
    t0 = time.perf_counter()
    proc = subprocess.Popen(
        [sys.executable, str(Path(__file__).resolve()), "--child", str(job_path)],
        stdout=log, stderr=subprocess.STDOUT, cwd=str(HERE.parent), start_new_session=True,
    )
    sampler = _TreeSampler(proc.pid)
    timed_out = False
    while True:
        pid, status, usage = os.wait4(proc.pid, os.WNOHANG)
        if pid != 0:
            break
        sampler.sample()
        if not timed_out and time.perf_counter() - t0 > timeout:
            timed_out = True
            os.killpg(proc.pid, signal.SIGKILL)
        time.sleep(0.05)
    wall = time.perf_counter() - t0
    proc.returncode = os.waitstatus_to_exitcode(status)
    log.close()
    outcome = {"pipeline": name, "returncode": proc.returncode, "wall_s": wall,
               "cpu_s": max(usage.ru_utime + usage.ru_stime, sampler.cpu_s),
               "maxrss_mb": usage.ru_maxrss / 1024.0, "tree_peak_mb": sampler.peak_bytes / 2**20}
    outcome["peak_mb"] = max(outcome["maxrss_mb"], outcome["tree_peak_mb"])
    result_path = Path(job["result"])
    if timed_out:
        outcome["error"] = f"timed out after {timeout:.0f} s (killed)"
    elif proc.returncode == 0 and result_path.exists():
        outcome.update(json.loads(result_path.read_text()))
        if outcome.get("own_peak_mb") is not None:  # exact, without ru_maxrss's carry-over
            outcome["peak_mb"] = max(outcome["own_peak_mb"], outcome["tree_peak_mb"])
    else:
        tail = (run_dir / "log.txt").read_text().splitlines()[-15:]
        outcome["error"] = "\n".join(tail)
    return outcome


def _relative_difference(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """|a - b| / max(|a|, |b|) where that is positive, else 0."""
    scale = np.maximum(np.abs(a), np.abs(b))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(scale > 0, np.abs(a - b) / np.where(scale > 0, scale, 1.0), 0.0)


def _inside_ids(case: Path) -> tuple[np.ndarray, np.ndarray]:
    """cell_id and plan area of the cells lying wholly inside the DEM extent."""
    import geopandas as gpd
    import rasterio
    import shapely

    with rasterio.open(case / "dem.tif") as src:
        extent = shapely.box(*src.bounds)
    frame = gpd.read_file(case / "cells.gpkg", engine="pyogrio")
    inside = shapely.covers(extent, frame.geometry.values)
    return frame["cell_id"].to_numpy()[inside], shapely.area(frame.geometry.values)[inside]


def _compare(table_a: Path, table_b: Path, ids: np.ndarray, areas: np.ndarray,
             columns=("wet_area", "volume", "bed_area", "hydraulic_radius")) -> dict:
    """Max / p99 / median relative difference per column over cells in ``ids``.

    Also the largest absolute difference divided by the cell's plan area ``areas``
    (a round-off scale that does not blow up for a wet sliver of a few mm^2).
    """
    import pandas as pd

    cols = ["cell_id", "stage", *columns]
    a = pd.read_parquet(table_a, columns=cols)
    b = pd.read_parquet(table_b, columns=cols)
    a = a[a["cell_id"].isin(ids)].sort_values(["cell_id", "stage"], kind="stable")
    b = b[b["cell_id"].isin(ids)].sort_values(["cell_id", "stage"], kind="stable")
    if len(a) != len(b) or not (
        np.array_equal(a["cell_id"].to_numpy(), b["cell_id"].to_numpy())
        and np.allclose(a["stage"].to_numpy(), b["stage"].to_numpy(), rtol=0, atol=1e-9)
    ):
        return {"error": f"rows differ: {len(a)} vs {len(b)} (cell_id, stage)"}
    out = {"rows": len(a)}
    area = pd.Series(areas, index=ids).reindex(a["cell_id"].to_numpy()).to_numpy()
    for col in columns:
        x, y = a[col].to_numpy(), b[col].to_numpy()
        both = np.isfinite(x) & np.isfinite(y)
        nan_mismatch = int((np.isfinite(x) != np.isfinite(y)).sum())
        rel = _relative_difference(x[both], y[both])
        per_area = np.abs(x[both] - y[both]) / area[both]
        out[col] = {
            "max": float(rel.max()) if rel.size else 0.0,
            "p99": float(np.quantile(rel, 0.99)) if rel.size else 0.0,
            "median": float(np.median(rel)) if rel.size else 0.0,
            "over_1e-6": int((rel > 1e-6).sum()),
            "nan_mismatch": nan_mismatch,
            "max_abs_per_cell_area": float(per_area.max()) if per_area.size else 0.0,
        }
    if "volume" in columns:
        tot_a, tot_b = a.groupby("stage")["volume"].sum(), b.groupby("stage")["volume"].sum()
        out["total_volume_max_rel"] = float(_relative_difference(tot_a.to_numpy(),
                                                                 tot_b.to_numpy()).max())
    return out


def _fits(n_pixels: float, folder: Path) -> str | None:
    """None if the case fits on disk and in memory, else the reason."""
    folder.parent.mkdir(parents=True, exist_ok=True)
    need_disk = BYTES_DISK_PER_PIXEL * n_pixels
    if not (folder / "case.json").exists():
        need_disk += estimate_case_bytes(n_pixels)
    free_disk = shutil.disk_usage(folder.parent).free
    if free_disk < need_disk:
        return f"needs ~{need_disk / 1e9:.1f} GB of disk, {free_disk / 1e9:.1f} GB free"
    avail = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    need_mem = BYTES_MEMORY_PER_PIXEL * n_pixels
    if avail < need_mem:
        return f"needs ~{need_mem / 1e9:.1f} GB of memory, {avail / 1e9:.1f} GB available"
    return None


def _stage_spec(meta: dict, n_stages: int) -> str:
    """n_stages absolute stages from the 1st to the 90th elevation percentile (mm rounded)."""
    q = meta["z_quantiles"]
    values = np.round(np.linspace(q["p01"], q["p90"], n_stages), 3)
    return ",".join(f"{v:.3f}" for v in values)


def _depth_spec(n_stages: int, top: float = 3.0) -> str:
    values = np.round(np.linspace(top / n_stages, top, n_stages), 4)
    return ",".join(f"{v:.4f}" for v in values)


def _label(n: float) -> str:
    exp = int(np.floor(np.log10(n)))
    mant = n / 10**exp
    return f"{mant:g}e{exp}" if mant != 1 else f"1e{exp}"


def _fmt(value, spec: str) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return "-"
    return format(value, spec)


def print_table(rows: list[dict]) -> str:
    head = (f"{'case':<5} {'pipeline':<15} {'seconds':>8} {'cpu_s':>7} {'Mpx/s':>7} "
            f"{'cell-stg/s':>11} {'face-stg/s':>11} {'peak MB':>8} {'x ntrans':>8} "
            f"{'x n.cpu':>8} {'x floor':>8}")
    lines = [head, "-" * len(head)]
    for r in rows:
        if "error" in r or r.get("seconds") is None:
            last = (str(r.get("error", "")).strip().splitlines() or [""])[-1]
            lines.append(f"{r['case']:<5} {r['pipeline']:<15} FAILED ({last}; see "
                         f"runs/{r['pipeline']}/log.txt)")
            continue
        lines.append(
            f"{r['case']:<5} {r['pipeline']:<15} {_fmt(r['seconds'], '8.2f')} "
            f"{_fmt(r['cpu_s'], '7.1f')} {_fmt(r.get('mpx_per_s'), '7.3g')} "
            f"{_fmt(r.get('cell_stages_per_s'), '11.3g')} "
            f"{_fmt(r.get('face_stages_per_s'), '11.3g')} {_fmt(r['peak_mb'], '8.0f')} "
            f"{_fmt(r.get('x_ntrans'), '8.2f')} {_fmt(r.get('x_ntrans_cpu'), '8.2f')} "
            f"{_fmt(r.get('x_floor'), '8.1f')}"
            + (f"  {min(runs):.2f}-{max(runs):.2f} s in {len(runs)} runs"
               if len(runs := r.get("seconds_runs") or []) > 1 else "")
        )
    text = "\n".join(lines)
    print(text, flush=True)
    return text


def _agreement_lines(case: str, agreement: dict) -> list[str]:
    lines = []
    for pair, res in agreement.items():
        if "error" in res:
            lines.append(f"{case} {pair}: {res['error']}")
            continue
        parts = [f"{col} max {res[col]['max']:.1e} (p99 {res[col]['p99']:.1e}, median "
                 f"{res[col]['median']:.1e}, {res[col]['over_1e-6']} > 1e-6; max |a-b|/cell "
                 f"area {res[col]['max_abs_per_cell_area']:.1e})"
                 for col in ("volume", "wet_area", "bed_area") if col in res]
        extra = (f"; total volume per stage max {res['total_volume_max_rel']:.1e}"
                 if "total_volume_max_rel" in res else "")
        lines.append(f"{case} {pair} [{res['rows']} cell-stages]: " + "; ".join(parts) + extra)
    return lines


MIB_PER_GB = 1e9 / 2**20  # peak memory is measured in MiB; the targets are in decimal GB
TARGET_STAGES = 30  # the timing targets are stated for 30 stages per cell


def _seconds(by: dict, case: str, pipeline: str) -> float | None:
    row = by.get((case, pipeline))
    return None if row is None else row.get("seconds")


def check_targets(rows: list[dict], n_stages: int, workers: int) -> list[dict]:
    """Each scale target with the figure this run measured and whether it is met.

    ``rows``: the table's rows (median runs; ``case`` labels such as ``1e7``).  A target
    whose pipelines did not run (or failed) in this run is ``not measured``; the timing
    ratios count only with 30 stages and the cluster target only with 2 workers, as the
    targets are stated.  Returns dicts with ``target``, ``measured`` (text), ``value``,
    ``limit`` and ``verdict`` (``met``, ``NOT MET`` or ``not measured``).
    """
    by = {(r["case"], r["pipeline"]): r for r in rows
          if "error" not in r and r.get("seconds") is not None}
    out: list[dict] = []

    def add(target: str, value: float | None, limit: float, ok, measured: str,
            why_not: str | None = None) -> None:
        if value is None or why_not is not None:
            out.append({"target": target, "measured": why_not or "not in this run",
                        "value": value, "limit": limit, "verdict": "not measured"})
        else:
            out.append({"target": target, "measured": measured, "value": value,
                        "limit": limit, "verdict": "met" if ok(value) else "NOT MET"})

    stages_note = (None if n_stages == TARGET_STAGES
                   else f"run with {n_stages} stages, the target is for {TARGET_STAGES}")
    cells = _seconds(by, "1e7", "ntrans_cells")
    for ref, factor in (("exactextract", 2.0), ("rasterstats", 50.0)):
        other = _seconds(by, "1e7", ref)
        ratio = other / cells if cells and other else None
        add(f"1e7 cell tables at least {factor:g}x faster than {ref}", ratio, factor,
            lambda v, f=factor: v >= f,
            f"{ratio:.1f}x ({other:.2f} s / {cells:.2f} s)" if ratio else "", stages_note)
    cases = sorted({case for case, _ in by}, key=float)
    for case in cases:
        mine, floor = _seconds(by, case, "ntrans_cells"), _seconds(by, case, "floor")
        ratio = mine / floor if mine and floor else None
        add(f"{case} cell tables within 3x of the read-and-sort floor", ratio, 3.0,
            lambda v: v <= 3.0,
            f"{ratio:.1f}x ({mine:.2f} s / {floor:.2f} s)" if ratio else "",
            stages_note if case == "1e7" else None)
    for case, gb in (("1e7", 1.0), ("1e8", 1.5)):
        row = by.get((case, "ntrans_cells"))
        peak = None if row is None else row.get("peak_mb")
        add(f"{case} cell tables peak memory under {gb:g} GB", peak, gb * MIB_PER_GB,
            lambda v, g=gb: v < g * MIB_PER_GB,
            f"{peak / MIB_PER_GB:.2f} GB ({peak:.0f} MiB)" if peak else "")
    speeds = [(case, by[(case, "ntrans_cells")].get("mpx_per_s")) for case in cases
              if (case, "ntrans_cells") in by]
    for (small, slow), (large, fast) in zip(speeds, speeds[1:], strict=False):
        ratio = fast / slow if slow and fast else None
        add(f"cell tables' throughput does not fall from {small} to {large}", ratio, 1.0,
            lambda v: v >= 1.0,
            f"{fast:.2f} Mpx/s against {slow:.2f} ({ratio:.2f}x)" if ratio else "")
    one, cluster = _seconds(by, "1e7", "ntrans_faces"), _seconds(by, "1e7", "ntrans_workers")
    ratio = cluster / one if one and cluster else None
    add("1e7 local 2-worker cluster not slower than one process", ratio, 1.0,
        lambda v: v <= 1.0,
        f"{ratio:.2f}x ({cluster:.2f} s / {one:.2f} s)" if ratio else "",
        None if workers == 2 else f"run with {workers} workers, the target is for 2")
    return out


def print_targets(checks: list[dict]) -> str:
    """The targets as lines of text (also printed)."""
    width = max(len(c["target"]) for c in checks) if checks else 0
    lines = [f"{c['verdict']:<12} {c['target']:<{width}}  {c['measured']}" for c in checks]
    text = "\n".join(lines)
    print(text, flush=True)
    return text


def _median_run(outcomes: list[dict]) -> dict:
    """The run with the median seconds (the lower middle of an even count), with the
    seconds of every run, the largest peak memory and the errors of the runs that failed
    (``failed_runs``); the last failure if none ran."""
    done = sorted((o for o in outcomes if "error" not in o), key=lambda o: o["seconds"])
    if not done:
        return outcomes[-1]
    row = dict(done[(len(done) - 1) // 2])
    row["seconds_runs"] = [o["seconds"] for o in outcomes if "error" not in o]
    row["peak_mb"] = max(o["peak_mb"] for o in done)
    failed = [o["error"] for o in outcomes if "error" in o]
    if failed:  # kept, with the log's last lines, so a rare failure can be looked into
        row["failed_runs"] = failed
    return row


def run(sizes: list[float], n_stages: int, workers: int, pipelines: list[str],
        keep_outputs: bool, timeout: float = 1800.0,
        results_path: Path = CASES_DIR / "results.json",
        rasterstats_max: float = 1e7, threads: int = 1, repeat: int = 1) -> dict:
    results: dict = {"started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                     "python": sys.version.split()[0], "cpus": os.cpu_count(),
                     "stages": n_stages, "workers": workers, "threads": threads,
                     "repeat": repeat, "cases": []}
    all_rows: list[dict] = []
    all_agree: list[str] = []
    for size in sizes:
        label = _label(size)
        folder = case_folder(size)
        reason = _fits(size, folder)
        if reason is not None:
            msg = f"skipping case {label}: {reason}"
            print(msg, flush=True)
            results["cases"].append({"case": label, "skipped": msg})
            continue
        t0 = time.perf_counter()
        folder, meta = cached_case(size)
        print(f"\ncase {label}: {meta['rows']} x {meta['cols']} pixels, {meta['n_cells']} cells "
              f"({folder}, ready in {time.perf_counter() - t0:.1f} s)", flush=True)
        job = {"dem": str(folder / "dem.tif"), "cells": str(folder / "cells.gpkg"),
               "stages": _stage_spec(meta, n_stages), "depths": _depth_spec(n_stages),
               "workers": workers, "threads": threads}
        runs = folder / "runs"
        if "rasterstats" in pipelines and size > rasterstats_max:
            print(f"  skipping rasterstats on {label}: above --rasterstats-max "
                  f"{rasterstats_max:g} px (it is slow)", flush=True)
        names = [n for n in pipelines if not (n == "rasterstats" and size > rasterstats_max)]
        # rounds of every pipeline in turn: a slow spell of the machine hits all alike
        samples: dict[str, list[dict]] = {name: [] for name in names}
        for round_no in range(1, repeat + 1):
            for name in names:
                which = f" (round {round_no} of {repeat})" if repeat > 1 else ""
                print(f"  running {name}{which} ...", end=" ", flush=True)
                outcome = _run_pipeline(name, job, runs / name, timeout)
                outcome["case"] = label
                if "error" in outcome:  # the log's last lines: the next run overwrites it
                    print("failed:\n    " + outcome["error"].replace("\n", "\n    "), flush=True)
                else:
                    print(f"{outcome['seconds']:.1f} s (peak {outcome['peak_mb']:.0f} MB)",
                          flush=True)
                samples[name].append(outcome)
        rows = [_median_run(samples[name]) for name in names]
        by_name = {r["pipeline"]: r for r in rows if "error" not in r}
        n_faces = next((by_name[p].get("n_faces")
                        for p in ("ntrans_faces", "ntrans_threads", "ntrans_workers")
                        if p in by_name and by_name[p].get("n_faces")), None)
        base = by_name.get("ntrans_cells", {}).get("seconds")
        base_cpu = by_name.get("ntrans_cells", {}).get("cpu_s")
        floor = by_name.get("floor", {}).get("seconds")
        for r in rows:
            if "error" in r:
                continue
            s = r["seconds"]
            r["mpx_per_s"] = meta["n_pixels"] / s / 1e6
            n_st = r.get("n_stages", n_stages)
            if r["pipeline"] in TABLE_PIPELINES or r["pipeline"] == "ntrans_adjust":
                r["cell_stages_per_s"] = meta["n_cells"] * n_st / s
            if r["pipeline"] in FACE_PIPELINES and n_faces:
                r["face_stages_per_s"] = n_faces * n_st / s
            r["x_ntrans"] = s / base if base else None
            r["x_ntrans_cpu"] = r["cpu_s"] / base_cpu if base_cpu else None
            r["x_floor"] = s / floor if floor else None
        # agreement
        agreement = {}
        try:
            ids, areas = _inside_ids(folder)
            ref_table = runs / "exactextract" / "out" / "cell_stage.parquet"
            nt_table = runs / "ntrans_cells" / "out" / "cell_stage.parquet"
            pairs = [("ntrans_cells vs exactextract", nt_table, ref_table),
                     ("ntrans_faces vs ntrans_cells",
                      runs / "ntrans_faces" / "out" / "cell_stage.parquet", nt_table),
                     ("ntrans_threads vs ntrans_cells",
                      runs / "ntrans_threads" / "out" / "cell_stage.parquet", nt_table),
                     ("ntrans_workers vs ntrans_cells",
                      runs / "ntrans_workers" / "out" / "cell_stage.parquet", nt_table),
                     ("rasterstats (pixel centre) vs exactextract",
                      runs / "rasterstats" / "out" / "cell_stage.parquet", ref_table)]
            for pair, a, b in pairs:
                if a.exists() and b.exists() and a.parent.parent.name in by_name \
                        and b.parent.parent.name in by_name:
                    agreement[pair] = _compare(a, b, ids, areas)
        except Exception:  # a benchmark reports, it does not stop
            agreement["error"] = {"error": traceback.format_exc(limit=3)}
        lines = _agreement_lines(label, agreement)
        all_agree.extend(lines)
        print("\n".join(lines), flush=True)
        results["cases"].append({"case": label, "meta": meta, "stages": job["stages"],
                                 "depths": job["depths"], "n_faces": n_faces,
                                 "rows": rows, "agreement": agreement})
        all_rows.extend(rows)
        if not keep_outputs:
            for name in pipelines:
                shutil.rmtree(runs / name / "out", ignore_errors=True)
        results_path.parent.mkdir(parents=True, exist_ok=True)
        results_path.write_text(json.dumps(results, indent=2, default=str))
    print("\n" + "=" * 100)
    from ntrans.cluster import default_threads

    print(f"stages per item: {n_stages}; workers for ntrans_workers: {workers}; threads for "
          f"ntrans_threads: {threads}; default tile threads: {default_threads()}; "
          f"cpus: {os.cpu_count()}")
    table = print_table(all_rows)
    print("\nagreement (relative difference |a-b|/max(|a|,|b|), cells wholly inside the DEM):")
    print("\n".join(all_agree))
    print("rasterstats uses the pixel-centre rule (no coverage fractions): it is not exact, "
          "so only loose agreement is expected.")
    print("x ntrans = seconds / seconds of ntrans_cells of the same case; x n.cpu = the same "
          "with cpu_s; x floor = seconds / seconds of floor (read DEM + sort all pixels).")
    results["table"] = table
    print("\ntargets (medians of this run; ratios are within one run):")
    results["targets"] = check_targets(all_rows, n_stages, workers)
    results["targets_text"] = print_targets(results["targets"])
    results["agreement_text"] = all_agree
    results["finished"] = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())
    results_path.write_text(json.dumps(results, indent=2, default=str))
    print(f"results: {results_path}")
    return results


def show_saved(path: Path) -> list[dict]:
    """Print the table and the targets of a results file written by :func:`run`."""
    saved = json.loads(Path(path).read_text())
    rows = [row for case in saved.get("cases", []) for row in case.get("rows", [])]
    print(f"{path}: started {saved.get('started')}, {saved.get('stages')} stages, "
          f"{saved.get('workers')} workers, {saved.get('repeat', 1)} round(s)")
    print_table(rows)
    print("\ntargets (medians of this run; ratios are within one run):")
    checks = check_targets(rows, int(saved.get("stages", TARGET_STAGES)),
                           int(saved.get("workers", 2)))
    print_targets(checks)
    return checks


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__.splitlines()[0],
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="\n".join(__doc__.splitlines()[2:]),
    )
    parser.add_argument("--sizes", default="1e6,1e7",
                        help="comma list of pixel counts (default 1e6,1e7; add 1e8 on request)")
    parser.add_argument("--stages", type=int, default=30, help="stages (and depths) per item")
    parser.add_argument("--workers", type=int, default=2, help="Dask workers for ntrans_workers")
    parser.add_argument("--threads", type=int, default=1,
                        help="tile threads for ntrans_threads (default 1: one tile at a time)")
    parser.add_argument("--pipelines", default=",".join(ALL_PIPELINES),
                        help=f"comma list out of {','.join(ALL_PIPELINES)}")
    parser.add_argument("--keep-outputs", action="store_true",
                        help="keep each pipeline's output folder under the case's runs/")
    parser.add_argument("--timeout", type=float, default=1800.0,
                        help="seconds before a pipeline run is killed (default 1800)")
    parser.add_argument("--results", type=Path, default=CASES_DIR / "results.json",
                        help="where to write the results JSON (default bench/_cases/results.json)")
    parser.add_argument("--rasterstats-max", type=float, default=1e7,
                        help="largest case (pixels) that rasterstats runs on (default 1e7)")
    parser.add_argument("--repeat", type=int, default=1,
                        help="rounds of all pipelines (in turn); each reports its median run "
                             "(default 1)")
    parser.add_argument("--targets-of", type=Path, metavar="RESULTS_JSON",
                        help="print the table and the targets of a saved results file "
                             "instead of running")
    parser.add_argument("--child", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child is not None:
        _run_child(args.child)
        return
    if args.targets_of is not None:
        show_saved(args.targets_of)
        return
    sizes = [float(s) for s in args.sizes.split(",") if s.strip()]
    pipelines = [p.strip() for p in args.pipelines.split(",") if p.strip()]
    unknown = sorted(set(pipelines) - set(ALL_PIPELINES))
    if unknown:
        parser.error(f"unknown pipelines {unknown}; choose from {ALL_PIPELINES}")
    if args.repeat < 1:
        parser.error("--repeat must be 1 or more")
    run(sizes, args.stages, args.workers, pipelines, args.keep_outputs, args.timeout,
        args.results, rasterstats_max=args.rasterstats_max, threads=args.threads,
        repeat=args.repeat)


if __name__ == "__main__":
    main()
