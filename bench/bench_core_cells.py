"""Micro-benchmark of the per-cell computing core (coverage, surface factor, stage tables).

Builds ~N Voronoi cells tessellating a square grid of about P pixels with a synthetic
DEM, then times each core step (wall and CPU seconds) and prints the figures.

    .venv/bin/python bench/bench_core_cells.py [--cells 50000] [--pixels 10000000] [--stages 30]

Speed is never asserted anywhere; this script only prints.
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
import shapely
from affine import Affine

from ntrans.cells import cell_stage_table, cell_terrain_summary
from ntrans.coverage import centre_coverage, exact_coverage
from ntrans.terrain import surface_factor


def timed(label, func, *args, repeat=1):
    best = None
    for _ in range(repeat):
        w0, c0 = time.perf_counter(), time.process_time()
        out = func(*args)
        wall, cpu = time.perf_counter() - w0, time.process_time() - c0
        if best is None or wall < best[0]:
            best = (wall, cpu)
    print(f"{label:<28s} wall {best[0]:7.2f} s   cpu {best[1]:7.2f} s")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cells", type=int, default=50_000)
    parser.add_argument("--pixels", type=int, default=10_000_000)
    parser.add_argument("--stages", type=int, default=30)
    parser.add_argument("--repeat", type=int, default=1, help="report the best of N runs")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()

    rng = np.random.default_rng(args.seed)
    n = int(round(np.sqrt(args.pixels)))
    transform = Affine(1.0, 0.0, 0.0, 0.0, -1.0, float(n))
    pts = shapely.multipoints(rng.uniform(0, n, (args.cells, 2)))
    box = shapely.box(0, 0, n, n)
    cells = shapely.clip_by_rect(
        shapely.get_parts(shapely.voronoi_polygons(pts, extend_to=box)), 0, 0, n, n
    )
    x = np.arange(n) + 0.5
    z = 100.0 + 0.002 * x[None, :] + 3.0 * np.sin(x[:, None] / 50.0) * np.cos(x[None, :] / 70.0)
    z = np.round(z, 3)
    z[rng.random(z.shape) < 0.001] = np.nan
    print(f"grid {n} x {n} = {n * n:,} pixels, {len(cells):,} cells, {args.stages} stages")

    w = timed("exact_coverage", exact_coverage, cells, transform, (n, n), repeat=args.repeat)
    print(f"  {len(w):,} pixel weights, sum(fraction) = {w.fraction.sum():,.3f}")
    c = timed("centre_coverage", centre_coverage, cells, transform, (n, n), repeat=args.repeat)
    print(f"  {len(c):,} pixels")
    s = timed("surface_factor", surface_factor, z, 1.0, 1.0, repeat=args.repeat)

    zz = z[w.row, w.col]
    plan = w.fraction
    bed = plan * s[w.row, w.col]
    summary = timed(
        "cell_terrain_summary", cell_terrain_summary, w.item, zz, plan, len(cells), repeat=args.repeat
    )
    depths = np.linspace(0.0, 6.0, args.stages)
    stages = summary["z_min"][:, None] + depths[None, :]
    timed("cell_stage_table", cell_stage_table, w.item, zz, plan, bed, stages, repeat=args.repeat)
    n_cs = len(cells) * args.stages
    print(f"  {len(w):,} entries x {n_cs:,} cell-stages")
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"peak resident memory {peak:,.0f} MiB")


if __name__ == "__main__":
    main()
