"""Acceptance checks of `ntrans tables` on the demo data against independent brute force.

The brute force shares no code with ntrans: pixel fractions come from shapely
polygon-box intersections, face profiles from scipy's bilinear ``map_coordinates`` on a
profile sampled 20 times finer than a pixel, integrated with the trapezoid rule.
"""

from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
import rasterio
import shapely
from scipy import ndimage

from ntrans.errors import PartialCoverageWarning
from ntrans.tables import build_tables

DEMO = Path(__file__).resolve().parents[1] / "data_demo"
DEPTHS = "0.5,2"


@pytest.fixture(scope="module")
def demo_tables(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "tables"
    with pytest.warns(PartialCoverageWarning):  # the demo has a data gap on purpose
        build_tables(DEMO / "dem.tif", DEMO / "cells.gpkg", out=out, depths=DEPTHS)
    with rasterio.open(DEMO / "dem.tif") as src:
        z = src.read(1, masked=True).astype(float).filled(np.nan)
        transform = src.transform
    return out, z, transform


def _to_pixel(transform, x, y):
    """Column and row (fractional) of map coordinates on a north-up grid."""
    return (np.asarray(x) - transform.c) / transform.a, (np.asarray(y) - transform.f) / transform.e


def _brute_force_cell_volume(polygon, stages, z, transform):
    """Volume below each stage from shapely pixel-box intersection areas."""
    xmin, ymin, xmax, ymax = polygon.bounds
    c0, r0 = (int(np.floor(v)) for v in _to_pixel(transform, xmin, ymax))
    c1, r1 = (int(np.ceil(v)) for v in _to_pixel(transform, xmax, ymin))
    rows, cols = np.mgrid[r0:r1, c0:c1]
    x0, y0 = transform.c + cols * transform.a, transform.f + rows * transform.e
    x1, y1 = x0 + transform.a, y0 + transform.e
    boxes = shapely.box(x0, np.minimum(y0, y1), x1, np.maximum(y0, y1))
    area = shapely.area(shapely.intersection(boxes, polygon))
    zz = z[rows, cols]
    ok = np.isfinite(zz) & (area > 0)
    return np.array([np.sum(area[ok] * np.clip(s - zz[ok], 0, None)) for s in stages])


def test_cell_volumes_match_brute_force(demo_tables):
    out, z, transform = demo_tables
    table = pd.read_parquet(out / "cell_stage.parquet")
    cells = gpd.read_file(DEMO / "cells.gpkg").set_index("cell_id")
    pixel_area = abs(transform.a * transform.e)
    big = cells[cells.area >= 100 * pixel_area].index.to_numpy()
    sample = big[:: max(1, big.size // 120)]  # ~120 cells spread over the mesh
    worst = 0.0
    for cell_id in sample:
        rows = table[table.cell_id == cell_id].sort_values("stage")
        expected = _brute_force_cell_volume(
            cells.geometry.loc[cell_id], rows.stage.to_numpy(), z, transform
        )
        got = rows.volume.to_numpy()
        wet = expected > 1.0  # m3; a nearly dry cell has no meaningful relative error
        if wet.any():
            worst = max(worst, float(np.max(np.abs(got[wet] / expected[wet] - 1))))
    # acceptance: within 2 % for cells of 100+ pixels; exact coverage makes it round-off
    assert worst < 0.02, worst


def _brute_force_face(line, stage, z, transform, step):
    """Flow area and wetted perimeter of a face from a densely sampled profile."""
    length = line.length
    s = np.linspace(0.0, length, max(int(np.ceil(length / step)), 2) + 1)
    pts = shapely.line_interpolate_point(line, s)
    x, y = shapely.get_x(pts), shapely.get_y(pts)
    col, row = _to_pixel(transform, x, y)
    zs = ndimage.map_coordinates(z, [row - 0.5, col - 0.5], order=1, mode="nearest")
    depth = np.clip(stage - zs, 0, None)
    area = np.trapezoid(depth, s)
    ds, dz = np.diff(s), np.diff(zs)
    seg_len = np.hypot(ds, dz)
    d0, d1 = depth[:-1], depth[1:]
    # wet share of each fine segment (linear between its ends)
    share = np.where((d0 > 0) & (d1 > 0), 1.0, np.where((d0 > 0) | (d1 > 0), (d0 + d1) / np.maximum(np.abs(dz), 1e-12), 0.0))
    return area, float(np.sum(seg_len * np.clip(share, 0, 1)))


def test_face_sections_match_brute_force(demo_tables):
    out, z, transform = demo_tables
    table = pd.read_parquet(out / "face_stage.parquet")
    faces = gpd.read_file(out / "faces.gpkg").set_index("face_id")
    pixel = abs(transform.a)
    keep = faces[(faces.length >= 10 * pixel) & (faces.covered_fraction == 1.0)].index.to_numpy()
    sample = keep[:: max(1, keep.size // 150)]  # ~150 faces spread over the mesh
    step = pixel / 20  # 20 samples per pixel: the bilinear surface is resolved finely
    rows = table[table.face_id.isin(sample)]
    worst_area = worst_perimeter = 0.0
    for rec in rows.itertuples():
        area, perimeter = _brute_force_face(faces.geometry.loc[rec.face_id], rec.stage, z, transform, step)
        if area > 0.05 * rec.length * 0.1:  # skip faces wet over a sliver only
            worst_area = max(worst_area, abs(rec.flow_area / area - 1))
            worst_perimeter = max(worst_perimeter, abs(rec.wetted_perimeter / perimeter - 1))
    # acceptance: 2 % (flow area) and 3 % (wetted perimeter) for faces of 10+ pixels
    assert worst_area < 0.02, worst_area
    assert worst_perimeter < 0.03, worst_perimeter
