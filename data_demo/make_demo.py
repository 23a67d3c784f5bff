"""Generate the invented Ornelle River demo scenario (Pellbrook reach).

Everything here is made up: a river valley that does not exist, drawn from a fixed
random seed.  The script is deterministic; running it twice writes byte-identical files.

Usage::

    .venv/bin/python data_demo/make_demo.py [OUT_DIR]      # default: data_demo/

Writes into OUT_DIR: ``dem.tif``, ``cells.gpkg``, ``landcover.gpkg``, ``n_table.csv``,
``water_surface.tif``.  It never writes ``project.toml``.  Units are metres, CRS
EPSG:32630 (WGS 84 / UTM zone 30N).
"""

from __future__ import annotations

import argparse
import contextlib
from collections.abc import Iterator
from pathlib import Path

import geopandas as gpd
import numpy as np
import pyogrio
import rasterio
import shapely
from affine import Affine
from rasterio.features import rasterize
from scipy import ndimage
from scipy.spatial import cKDTree

SEED = 20260101
CRS = "EPSG:32630"
X0, Y0 = 513_400.0, 5_711_800.0  # south-west corner of the DEM, metres (UTM 30N)
PIXEL = 2.0  # DEM pixel size, m
WIDTH, HEIGHT = 900, 600  # DEM columns, rows
WS_PIXEL = 4.0  # water-surface raster pixel size, m (deliberately coarser)
LX, LY = WIDTH * PIXEL, HEIGHT * PIXEL  # extent, m (local frame: origin at the SW corner)
NODATA = -9999.0
MARGIN = 24.0  # distance from the DEM edge to the mesh boundary, m

# Valley and channel shape (local metres).
VALLEY_TOP = 46.20  # valley-floor elevation at the upstream (west) edge, m
VALLEY_SLOPE = 0.001  # downstream fall, m/m (1:1000); the river flows west to east
AXIS_Y = 600.0  # valley axis
CHANNEL_HALF_TOP = 15.0  # half top width, m (30 m wide)
CHANNEL_HALF_BOTTOM = 8.0  # half bottom width, m
ROAD_X = 1150.0  # road embankment crosses the valley near here
TERRACE_RISE = 1.6  # height of the terrace scarp above the floodplain, m
TOWN = (640.0, 880.0, 1060.0, 1055.0)  # Pellbrook town block: xmin, ymin, xmax, ymax

# n per land-cover class, inside the Chow (1959) Table 5-6 ranges of METHODS.md; surface keys
# as in ntrans.roughness.PUBLISHED_N_RANGES.
N_TABLE = (
    ("channel", 0.035, "channel_winding"),
    ("grass", 0.030, "pasture_short_grass"),
    ("crops", 0.040, "cultivated_mature_crops"),
    ("woods", 0.060, "light_brush_trees"),
    ("urban", 0.015, "concrete_float"),
)

GTIFF = {
    "driver": "GTiff",
    "dtype": "float32",
    "count": 1,
    "crs": CRS,
    "compress": "deflate",
    "predictor": 3,
    "tiled": True,
    "blockxsize": 256,
    "blockysize": 256,
}


# ----------------------------------------------------------------------------- geometry


def centreline_y(x: np.ndarray) -> np.ndarray:
    """Meandering centreline of the Ornelle, y as a function of x (local m)."""
    amplitude = 125.0 + 20.0 * np.sin(2 * np.pi * x / 1300.0)
    return (AXIS_Y + amplitude * np.sin(2 * np.pi * x / 620.0 + 0.4)
            + 15.0 * np.sin(2 * np.pi * x / 310.0 + 1.3) + 35.0 * np.sin(2 * np.pi * x / 1700.0 + 2.0))


def centreline_curvature(x: np.ndarray) -> np.ndarray:
    """Signed curvature of the centreline, 1/m (positive: turning left)."""
    xg = np.arange(-100.0, LX + 100.0, 0.5)
    d1 = np.gradient(centreline_y(xg), xg)
    kappa = np.gradient(d1, xg) / (1.0 + d1**2) ** 1.5
    return np.interp(x, xg, kappa)


def dense_line(xy: np.ndarray, step: float) -> np.ndarray:
    """Vertices of a polyline resampled at about ``step`` metres (linear interpolation)."""
    s = np.concatenate([[0.0], np.cumsum(np.hypot(*np.diff(xy, axis=0).T))])
    t = np.linspace(0.0, s[-1], int(np.ceil(s[-1] / step)) + 1)
    return np.column_stack([np.interp(t, s, xy[:, 0]), np.interp(t, s, xy[:, 1])])


class LineDistance:
    """Distance from points to a polyline: nearest vertex, then its two segments.

    Exact within ``NEAR`` metres of the line; farther out the vertex search runs on every
    tenth vertex (error well under 1 m there, which the far-field uses tolerate).
    """

    NEAR = 60.0
    THIN = 10

    def __init__(self, xy: np.ndarray, step: float) -> None:
        self.xy = dense_line(xy, step)
        self.tree = cKDTree(self.xy)
        self.coarse = cKDTree(self.xy[:: self.THIN])

    def query(self, x: np.ndarray, y: np.ndarray, *,
              near_only: bool = False) -> tuple[np.ndarray, ...]:
        """Distance, foot point (fx, fy) and unit tangent (tx, ty) there; shapes of ``x``.

        With ``near_only`` the distance beyond ``NEAR`` is returned as infinity.
        """
        p = np.column_stack([np.ravel(x), np.ravel(y)])
        d0, i = self.tree.query(p, distance_upper_bound=self.NEAR)
        far = np.isinf(d0)
        i[far] = 0 if near_only else self.coarse.query(p[far])[1] * self.THIN
        best = None
        for a in (np.maximum(i - 1, 0), np.minimum(i, len(self.xy) - 2)):  # the two segments
            p0, seg = self.xy[a], self.xy[a + 1] - self.xy[a]
            t = np.clip(np.einsum("ij,ij->i", p - p0, seg) / np.einsum("ij,ij->i", seg, seg), 0, 1)
            foot = p0 + t[:, None] * seg
            d = np.hypot(*(p - foot).T)
            cand = (d, foot, seg)
            best = cand if best is None else tuple(
                np.where((d < best[0]).reshape((-1,) + (1,) * (c.ndim - 1)), c, b)
                for c, b in zip(cand, best, strict=True))
        d, foot, seg = best
        if near_only:
            d[far] = np.inf
        tan = seg / np.hypot(*seg.T)[:, None]
        shape = np.shape(x)
        return (d.reshape(shape), foot[:, 0].reshape(shape), foot[:, 1].reshape(shape),
                tan[:, 0].reshape(shape), tan[:, 1].reshape(shape))


def channel_line() -> np.ndarray:
    x = np.arange(-60.0, LX + 60.0 + 0.1, 0.2)
    return np.column_stack([x, centreline_y(x)])


def ditch_line() -> np.ndarray:
    """Tributary ditch: down the south valley side into the river."""
    xe = 470.0
    return np.array([[300.0, -10.0], [345.0, 160.0], [400.0, 300.0], [xe, centreline_y(xe)]])


def smoothstep(t: np.ndarray) -> np.ndarray:
    t = np.clip(t, 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def valley_floor(x: np.ndarray) -> np.ndarray:
    return VALLEY_TOP - VALLEY_SLOPE * x


def terrace(x: np.ndarray, off: np.ndarray) -> np.ndarray:
    """Low river terrace: a 1.6 m scarp about 300 m either side of the valley axis."""
    edge = 290.0 + 25.0 * np.sin(x / 170.0 + 1.0)
    return TERRACE_RISE * smoothstep((off - edge) / 50.0)


def smooth_noise(rng: np.random.Generator, shape: tuple[int, int], sigma: float,
                 std: float) -> np.ndarray:
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="wrap")
    return field * (std / field.std())


# ----------------------------------------------------------------------------- terrain


def make_terrain(rng: np.random.Generator, chan: LineDistance) -> np.ndarray:
    """Elevation (HEIGHT, WIDTH) in metres, NaN in the data gap."""
    x = (np.arange(WIDTH) + 0.5) * PIXEL
    y = LY - (np.arange(HEIGHT) + 0.5) * PIXEL
    X, Y = np.meshgrid(x, y)
    dc, fx, fy, tx, ty = chan.query(X, Y)
    off = np.abs(Y - AXIS_Y)

    # Floodplain: valley fall, gentle cross-fall, natural levees, a low river terrace,
    # valley sides, small-scale relief.
    z = valley_floor(X) + 0.0015 * off + terrace(X, off)
    z += 0.35 * np.exp(-np.maximum(dc - CHANNEL_HALF_TOP, 0.0) / 45.0)
    wall = np.maximum(off - 470.0, 0.0)
    z += 0.03 * wall + 0.00025 * wall**2
    z += smooth_noise(rng, X.shape, 6.0, 0.12) + smooth_noise(rng, X.shape, 40.0, 0.20)

    # Old meander cut-off (oxbow) on the south floodplain: a shallow arc-shaped hollow.
    r = np.hypot(X - 1500.0, Y - 270.0)
    ang = np.arctan2(Y - 270.0, X - 1500.0)
    arc = smoothstep((np.sin(ang - 0.3) + 0.55) / 0.5)
    z -= 0.7 * np.exp(-(((r - 80.0) / 11.0) ** 2)) * arc

    # Town platform: made ground 0.3 m above the terrace, graded at 1:6 at its edges.
    tx0, ty0, tx1, ty1 = TOWN
    out = np.hypot(np.maximum(np.maximum(tx0 - X, X - tx1), 0.0),
                   np.maximum(np.maximum(ty0 - Y, Y - ty1), 0.0))
    z = np.maximum(z, valley_floor(X) + 0.0015 * off + TERRACE_RISE + 0.3 - out / 6.0)

    # Road embankment across the valley: crest 2.3 m above the floodplain, 10 m wide,
    # 2:1 side slopes, broken by an 80 m bridge opening over the river.
    d_road = np.abs(X - (ROAD_X + 0.12 * (Y - AXIS_Y))) / np.hypot(1.0, 0.12)
    crest = valley_floor(np.float64(ROAD_X)) + 2.3
    emb = crest - 0.5 * np.maximum(d_road - 5.0, 0.0) - 0.5 * np.maximum(45.0 - dc, 0.0)
    z = np.maximum(z, emb)

    # Tributary ditch: 6 m top width, 1.2 m deep.
    dd = LineDistance(ditch_line(), 2.0).query(X, Y, near_only=True)[0]
    z -= 1.2 * (1.0 - smoothstep((dd - 0.8) / 2.2))

    # Main channel: trapezoid-ish section, deeper in bends, pool at the outer bank.
    kappa = centreline_curvature(fx)
    kn = np.clip(np.abs(kappa) / 0.015, 0.0, 1.0)
    depth = 2.6 + 0.8 * kn
    side = np.sign(tx * (Y - fy) - ty * (X - fx))  # +1 on the left (north) bank
    outer = np.clip(-side * np.sign(kappa) * kn * dc / CHANNEL_HALF_TOP, -1.0, 1.0)
    shape = 1.0 - smoothstep((dc - CHANNEL_HALF_BOTTOM) / (CHANNEL_HALF_TOP - CHANNEL_HALF_BOTTOM))
    z -= depth * shape * (1.0 + 0.15 * outer)

    # Buildings: flat roofs 3 m above the town platform.
    z += 3.0 * buildings_mask(rng)

    # Data gap in the south-east corner (irregular quarter ellipse).
    edge = 1.0 + 0.08 * np.sin(Y / 9.0) + 0.05 * np.cos(X / 7.0)
    z[((X - LX) / 110.0) ** 2 + (Y / 70.0) ** 2 < edge] = np.nan
    return z


def building_boxes(rng: np.random.Generator) -> list[shapely.Polygon]:
    """Rectangular building footprints on a street grid inside the town block (local m)."""
    tx0, ty0, tx1, ty1 = TOWN
    boxes = []
    for bx in np.arange(tx0 + 10.0, tx1 - 50.0, 60.0):  # loop over ~7 x 4 street blocks
        for by in np.arange(ty0 + 8.0, ty1 - 37.0, 45.0):
            n_x = int(rng.integers(2, 4))
            widths = rng.uniform(10.0, 16.0, n_x)
            xs = bx + np.concatenate([[0.0], np.cumsum(widths + 3.0)[:-1]])
            for xi, wi in zip(xs, widths, strict=True):
                for yi, dy in ((by, rng.uniform(12.0, 16.0)), (by + 20.0, rng.uniform(10.0, 16.0))):
                    if xi + wi <= bx + 50.0:
                        boxes.append(shapely.box(xi, yi, xi + wi, yi + dy))
    return boxes


def buildings_mask(rng: np.random.Generator) -> np.ndarray:
    local = Affine(PIXEL, 0.0, 0.0, 0.0, -PIXEL, LY)
    return rasterize(building_boxes(rng), out_shape=(HEIGHT, WIDTH), transform=local,
                     fill=0, default_value=1, dtype="uint8").astype(np.float64)


def make_water_surface(z: np.ndarray, chan: LineDistance) -> np.ndarray:
    """Invented flood-event water surface on the 4 m grid, NaN where dry."""
    f = int(WS_PIXEL / PIXEL)
    ground = z.reshape(HEIGHT // f, f, WIDTH // f, f).mean(axis=(1, 3))  # NaN if any gap
    x = (np.arange(WIDTH // f) + 0.5) * WS_PIXEL
    y = LY - (np.arange(HEIGHT // f) + 0.5) * WS_PIXEL
    X, Y = np.meshgrid(x, y)
    dc = chan.query(X, Y)[0]
    # Bank level relative to the valley floor, from the terrain itself.
    bank = ground - valley_floor(X)
    bank_level = np.nanmedian(bank[(dc > CHANNEL_HALF_TOP) & (dc < CHANNEL_HALF_TOP + 4.0)])
    backwater = 0.15 / (1.0 + np.exp((X - ROAD_X) / 25.0))  # afflux upstream of the road
    eta = valley_floor(X) + bank_level + 1.25 + backwater
    wet = eta - ground > 0.01
    labels, _ = ndimage.label(wet)
    linked = np.unique(labels[(dc < CHANNEL_HALF_BOTTOM) & wet])
    wet &= np.isin(labels, linked[linked > 0])
    return np.where(wet, eta, np.nan)


# ----------------------------------------------------------------------------- mesh


def make_mesh(rng: np.random.Generator, chan: LineDistance) -> np.ndarray:
    """Voronoi cells (local m), finer along the channel; array of Polygons."""
    domain = shapely.box(MARGIN, MARGIN, LX - MARGIN, LY - MARGIN)
    inner = shapely.box(MARGIN + 2.0, MARGIN + 2.0, LX - MARGIN - 2.0, LY - MARGIN - 2.0)

    # Channel-aligned rows: 10 m along, offsets -20..20 m across (cell edges near the banks).
    p = dense_line(channel_line(), 10.0)
    t = np.gradient(p, axis=0)
    normal = np.column_stack([-t[:, 1], t[:, 0]]) / np.hypot(*t.T)[:, None]
    fixed = np.concatenate([p + o * normal for o in (-20.0, -10.0, 0.0, 10.0, 20.0)])
    fixed = fixed[shapely.contains_xy(inner, *fixed.T)]

    # Floodplain: thinned jittered grid, target spacing 12 m at the banks to 45 m far out,
    # at most 20 m in town and along the road.
    g = 6.0
    gx, gy = np.meshgrid(np.arange(MARGIN + 3.0, LX - MARGIN, g), np.arange(MARGIN + 3.0, LY - MARGIN, g))
    cand = np.column_stack([gx.ravel(), gy.ravel()]) + rng.uniform(-0.4 * g, 0.4 * g, (gx.size, 2))
    dc = chan.query(cand[:, 0], cand[:, 1])[0]
    h = np.clip(12.0 + 0.2 * (dc - 25.0), 12.0, 45.0)
    tx0, ty0, tx1, ty1 = TOWN
    in_town = (cand[:, 0] > tx0 - 10) & (cand[:, 0] < tx1 + 10) & (cand[:, 1] > ty0 - 10) & (cand[:, 1] < ty1 + 10)
    h = np.where(in_town, np.minimum(h, 20.0), h)
    d_road = np.abs(cand[:, 0] - (ROAD_X + 0.12 * (cand[:, 1] - AXIS_Y))) / np.hypot(1.0, 0.12)
    h = np.minimum(h, 20.0 + 0.5 * d_road)
    keep = (dc > 27.0) & (rng.random(len(cand)) < (g / h) ** 2)
    free = cand[keep & shapely.contains_xy(inner, *cand.T)]

    # A few Lloyd steps on the floodplain points (channel rows stay put).
    for _ in range(4):
        cells = voronoi_cells(np.concatenate([fixed, free]), domain)
        cen = shapely.get_coordinates(shapely.centroid(cells[len(fixed):]))
        dnew = chan.query(cen[:, 0], cen[:, 1])[0]
        free = np.where((dnew > 25.0)[:, None], cen, free)
    return voronoi_cells(np.concatenate([fixed, free]), domain)


def voronoi_cells(points: np.ndarray, domain: shapely.Polygon) -> np.ndarray:
    vor = shapely.voronoi_polygons(shapely.multipoints(points), extend_to=domain, ordered=True)
    return shapely.intersection(shapely.get_parts(vor), domain)


# ----------------------------------------------------------------------------- land cover


def make_landcover(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Land-cover polygons (UTM m) and their class names; together they tile the DEM.

    All outlines are noded together on a 1 mm grid and polygonised, so the pieces tile the
    extent exactly; each piece then takes the class of the first outline (channel, town,
    riparian wood, field parcel) that holds it, and pieces of one outline are merged.
    """
    extent = shapely.box(0.0, 0.0, LX, LY)
    line = shapely.LineString(dense_line(channel_line(), 2.0))
    channel = shapely.union(
        shapely.buffer(line, CHANNEL_HALF_TOP, cap_style="flat"),
        shapely.buffer(shapely.LineString(ditch_line()), 3.0, cap_style="flat"),
    )
    coords = shapely.get_coordinates(line)
    reach = shapely.LineString(coords[(coords[:, 0] > 1250.0) & (coords[:, 0] < 1700.0)])
    riparian = shapely.buffer(reach, 50.0)
    seeds = rng.uniform([0.0, 0.0], [LX, LY], (40, 2))
    parcels = shapely.get_parts(shapely.voronoi_polygons(
        shapely.multipoints(seeds), extend_to=extent, ordered=True))
    cy = shapely.get_coordinates(shapely.centroid(parcels))[:, 1]
    kind = np.where(np.abs(cy - AXIS_Y) > 420.0, "woods",
                    np.where(rng.random(len(parcels)) < 0.55, "crops", "grass"))

    outlines = to_world(np.concatenate([[channel, shapely.box(*TOWN), riparian], parcels]))
    names = np.concatenate([["channel", "urban", "woods"], kind])
    world = to_world(extent)
    noded = shapely.union_all(shapely.boundary(np.append(outlines, world)), grid_size=0.001)
    pieces = shapely.get_parts(shapely.polygonize(shapely.get_parts(noded)))
    pieces = pieces[shapely.within(shapely.point_on_surface(pieces), world)]
    inside = shapely.contains(outlines[None, :], shapely.point_on_surface(pieces)[:, None])
    owner = np.argmax(inside, axis=1)  # first outline holding the piece

    merged = np.array([shapely.coverage_union_all(pieces[owner == k]) for k in np.unique(owner)])
    parts, idx = shapely.get_parts(merged, return_index=True)
    return parts, names[np.unique(owner)][idx]


# ----------------------------------------------------------------------------- writing


def to_world(geoms: np.ndarray) -> np.ndarray:
    """Local metres -> UTM metres, coordinates rounded to 1 mm."""
    return shapely.transform(geoms, lambda c: np.round(c + [X0, Y0], 3))


@contextlib.contextmanager
def fixed_gpkg_date() -> Iterator[None]:
    """Pin the GeoPackage 'last_change' stamp so repeated runs give identical bytes."""
    key = "OGR_CURRENT_DATE"
    old = pyogrio.get_gdal_config_option(key)
    pyogrio.set_gdal_config_options({key: "2026-01-01T00:00:00.000Z"})
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options({key: old})


def write_raster(path: Path, data: np.ndarray, pixel: float, nodata: float) -> None:
    profile = dict(GTIFF, width=data.shape[1], height=data.shape[0], nodata=nodata,
                   transform=Affine(pixel, 0.0, X0, 0.0, -pixel, Y0 + LY))
    path.unlink(missing_ok=True)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data.astype(np.float32), 1)
        dst.units = ("metre",)


def write_layer(path: Path, layer: str, frame: gpd.GeoDataFrame) -> None:
    path.unlink(missing_ok=True)
    with fixed_gpkg_date():
        frame.to_file(path, layer=layer, driver="GPKG", engine="pyogrio")


def build(out_dir: Path | str) -> dict[str, int]:
    """Write the demo files into ``out_dir``; return a few counts."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)
    chan = LineDistance(channel_line(), 2.0)

    z = np.round(make_terrain(rng, chan), 2)
    write_raster(out / "dem.tif", np.where(np.isnan(z), NODATA, z), PIXEL, NODATA)

    ws = np.round(make_water_surface(z, chan), 2)
    write_raster(out / "water_surface.tif", ws, WS_PIXEL, np.nan)

    cells = to_world(make_mesh(rng, chan))
    cen = shapely.get_coordinates(shapely.centroid(cells))
    cells = cells[np.lexsort((cen[:, 1], np.round(cen[:, 0], 0)))]
    write_layer(out / "cells.gpkg", "cells", gpd.GeoDataFrame(
        {"cell_id": np.arange(1, len(cells) + 1, dtype=np.int32)}, geometry=cells, crs=CRS))

    polys, names = make_landcover(rng)
    write_layer(out / "landcover.gpkg", "landcover", gpd.GeoDataFrame(
        {"landcover": names.astype(object)}, geometry=polys, crs=CRS))

    rows = ["class,n,surface"] + [f"{c},{n:.3f},{s}" for c, n, s in N_TABLE]
    (out / "n_table.csv").write_text("\n".join(rows) + "\n", encoding="utf-8", newline="\n")
    return {"pixels": int(z.size), "nodata_pixels": int(np.isnan(z).sum()),
            "cells": len(cells), "landcover": len(polys),
            "wet_pixels": int(np.isfinite(ws).sum())}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out_dir", nargs="?", default=str(Path(__file__).resolve().parent),
                        help="output folder (default: data_demo/)")
    args = parser.parse_args(argv)
    info = build(args.out_dir)
    print(f"Ornelle demo written to {args.out_dir}: DEM {WIDTH}x{HEIGHT} px "
          f"({info['nodata_pixels']} nodata), {info['cells']} cells, "
          f"{info['landcover']} land-cover polygons, {info['wet_pixels']} wet 4 m pixels")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
