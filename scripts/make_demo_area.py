#!/usr/bin/env python
"""Generate the landcheck demo area: the invented coastal town of Alderwane.

Alderwane sits on Corrin Bay and is crossed by the Tamsel River.  Everything
here is made up: the terrain is synthetic, the parcels, owners and zoning codes
are invented, and no real place is modelled.

Usage::

    python scripts/make_demo_area.py --seed 7 --out demo_area

Outputs (all in ``--out``):

``dem.tif``
    Synthetic DEM, float32 metres, EPSG:32651, nodata -9999, tiled GeoTIFF
    (deflate, floating-point predictor), values rounded to 0.01 m.
``parcels.gpkg``
    Layer ``parcels``: ``parcel_id``, ``zoning``, ``owner_ref``.
``shoreline.gpkg``, ``rivers.gpkg``, ``flood_hazard.gpkg``
    Shoreline (0 m contour on the sea side), river centreline, flood polygons.
``rulebook.toml``
    Copied from the text in this script (the worked example rulebook).

The layout is fixed in metres on a 10 km x 10 km square; ``--size`` only sets
the number of cells per side (1000 gives 10 m cells).  The same seed and size
give equal arrays and byte-identical attributes.  Only numpy, shapely,
geopandas and rasterio are used.

Terrain recipe (all distances in metres, ``u`` east and ``v`` north from the
south-west corner):

* sea to the south of a wavy coastline that bends inland into Corrin Bay;
  depth grows smoothly offshore (negative elevations);
* a coastal plain rising from 0 m at the shore to about 8 m, with a dune
  ridge in the west, an enclosed basin behind it whose floor is below +1 m but
  which does not connect to the sea, a smaller enclosed hollow in the east, and
  low tidal flats (below +1 m, open to the sea) around the river mouth;
* hills to the north rising to 300-450 m, shaped by band-limited fractal
  noise (spectral synthesis) so slopes range from gentle to well over 40 %;
* the Tamsel River valley cut from the northern hills to the bay: a valley
  floor that only falls downstream, a flat floodplain, walls whose steepness
  grows with the hills, and a parabolic channel;
* one small void (nodata) in the hills, as real DEMs have.

Parcel recipe (parcels never overlap: each group is clipped against everything
placed before it):

* the town: a street grid rotated by -7 degrees around the bay head, small lots
  in the centre and larger ones outwards, a riverside park strip, a waterfront
  of shops, a port-side industrial area;
* farm fields on the plain in a second rotated grid, cut back from the river
  and the shore; two fields crossed by the river are multipolygons;
* irregular hill lots from a Voronoi tessellation, mostly forest, farmland on
  gentler ground;
* a rotated hillside subdivision placed where about a fifth of the ground is
  18 % or steeper, five small lots (< 0.5 ha) on steep ground, riverside
  lodges in the hills, a beach resort on the eastern shore, and a hamlet in the
  enclosed basin (below +1 m, but cut off from the sea);
* one farm hanging over the west edge of the DEM, one parcel made of two lots
  across a street (multipolygon), and two parcels whose rings self-intersect
  ("bowtie") so that geometry repair is exercised.

Planted conflicts (against the rulebook written alongside): development lots
above the slope limit (subdivision, small steep lots, hill farms, lodges),
lots reaching into the shore and river easement strips, housing kept inside
the high flood-hazard strip, and lots on low ground open to the sea.  The tests
count them independently (tests/demo_oracle.py).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path

import geopandas as gpd
import numpy as np
import rasterio
import shapely
from rasterio import features
from rasterio.transform import Affine
from shapely import affinity
from shapely.geometry import LineString, MultiPolygon, Point, Polygon, box
from shapely.ops import unary_union

# --------------------------------------------------------------------------
# fixed layout (metres)
# --------------------------------------------------------------------------

#: side of the square demo area in metres
EXTENT_M = 10_000.0
#: projected CRS of every output (a UTM zone; coordinates below are plausible for it)
CRS = "EPSG:32651"
#: easting / northing of the upper-left corner of the DEM
ORIGIN_X_M = 400_000.0
ORIGIN_Y_M = 1_600_000.0
#: nodata value written to the DEM
NODATA = -9999.0
#: DEM values are rounded to this step (metres) so the file compresses well
ROUND_M = 0.01

#: river mouth position along the coast (u, metres from the west edge)
MOUTH_U_M = 5200.0
#: where the river enters the area at the north edge
SOURCE_U_M = 3500.0
#: search radius for the river distance field; beyond it the valley cut never binds
RIVER_REACH_M = 800.0
#: vertex spacing of the river centreline (the same line is carved and written)
RIVER_STEP_M = 20.0
#: highest summit of the hills before the valley is cut
HILL_TOP_M = 420.0
#: river widths (metres) for the hill reach and the plain reach
WIDTH_UPPER_M = 14.0
WIDTH_LOWER_M = 30.0


def coast_v(u: np.ndarray) -> np.ndarray:
    """Northing (m from the south edge) of the 0 m shoreline at easting ``u``."""
    u = np.asarray(u, dtype=np.float64)
    return (
        1800.0
        + 700.0 * np.exp(-(((u - MOUTH_U_M) / 1800.0) ** 2))
        + 60.0 * np.sin(2 * np.pi * u / 2300.0 + 1.0)
        + 40.0 * np.sin(2 * np.pi * u / 900.0 + 2.0)
    )


def hill_foot_v(u: np.ndarray) -> np.ndarray:
    """Northing where the hills start to rise out of the plain."""
    u = np.asarray(u, dtype=np.float64)
    return 5300.0 + 350.0 * np.sin(2 * np.pi * u / 6500.0 + 0.7) - 1300.0 * np.exp(-(((u - 8900.0) / 800.0) ** 2))


def _smoothstep(x: np.ndarray, lo: float, hi: float) -> np.ndarray:
    t = np.clip((x - lo) / (hi - lo), 0.0, 1.0)
    return t * t * (3.0 - 2.0 * t)


def _fractal_noise(
    rng: np.random.Generator, n: int, cell_m: float, beta: float, min_wave_m: float, max_wave_m: float
) -> np.ndarray:
    """Band-limited fractal noise by spectral synthesis, zero mean, unit std.

    Complex Gaussian white noise in the Fourier domain is shaped by an
    amplitude spectrum ``k**(-beta/2)`` between the wavenumbers of
    ``max_wave_m`` and ``min_wave_m`` (with soft roll-offs) and transformed to
    a real field.
    """
    half = n // 2 + 1
    spec = rng.standard_normal((n, half)) + 1j * rng.standard_normal((n, half))
    ky = np.fft.fftfreq(n, d=cell_m)[:, None]
    kx = np.fft.rfftfreq(n, d=cell_m)[None, :]
    k = np.hypot(kx, ky)
    k[0, 0] = 1.0
    amp = k ** (-beta / 2.0)
    amp *= 1.0 - np.exp(-((k * max_wave_m) ** 4))  # high-pass: drop waves longer than max_wave_m
    amp *= np.exp(-((k * min_wave_m) ** 2))  # low-pass: soften waves shorter than min_wave_m
    amp[0, 0] = 0.0
    field_ = np.fft.irfft2(spec * amp, s=(n, n))
    return (field_ - field_.mean()) / field_.std()


# --------------------------------------------------------------------------
# river
# --------------------------------------------------------------------------


def river_centreline() -> np.ndarray:
    """Vertices (u, v) of the Tamsel River from the north edge to the shoreline.

    The river is a function of northing: a straight trend from the source to the
    mouth plus meanders whose wavelength and amplitude shrink on the plain and
    fade out just before the mouth, so it meets the coast head on.
    """
    step = 2.0
    v = np.arange(EXTENT_M, 0.0, -step)
    foot = float(hill_foot_v(np.array([SOURCE_U_M]))[0])
    hill = _smoothstep(v, foot - 400.0, foot + 600.0)  # 0 on the plain, 1 in the hills
    wave = 650.0 + (2300.0 - 650.0) * hill
    amp = 110.0 + (230.0 - 110.0) * hill
    phase = np.cumsum(2 * np.pi * step / wave)
    v_mouth = float(coast_v(np.array([MOUTH_U_M]))[0])
    fade = _smoothstep(v, v_mouth + 50.0, v_mouth + 450.0)
    trend = SOURCE_U_M + (MOUTH_U_M - SOURCE_U_M) * (EXTENT_M - v) / (EXTENT_M - v_mouth)
    u = trend + amp * fade * np.sin(phase + 0.4)
    inland = v >= coast_v(u)
    # keep everything north of the coast plus the first point in the sea, then
    # cut the last segment exactly at the shoreline
    last = int(np.argmin(inland))
    pts = np.column_stack([u[: last + 1], v[: last + 1]])
    a, b = pts[-2], pts[-1]
    fa = a[1] - coast_v(a[:1])[0]
    fb = b[1] - coast_v(b[:1])[0]
    t = fa / (fa - fb)
    pts[-1] = a + t * (b - a)
    # thin to RIVER_STEP_M vertex spacing
    seg = np.hypot(*np.diff(pts, axis=0).T)
    s = np.concatenate([[0.0], np.cumsum(seg)])
    keep = np.unique(np.concatenate([np.searchsorted(s, np.arange(0.0, s[-1], RIVER_STEP_M)), [len(s) - 1]]))
    return pts[keep]


def _distance_to_polyline(
    uu: np.ndarray, vv: np.ndarray, line: np.ndarray, reach_m: float
) -> tuple[np.ndarray, np.ndarray]:
    """Distance from every cell centre to a polyline and the arc length of the nearest point.

    Segments only update cells inside their bounding box grown by ``reach_m``;
    farther cells keep distance ``inf`` and arc length NaN.
    """
    n = uu.shape[0]
    cell = uu[0, 1] - uu[0, 0]
    u0, vtop = uu[0, 0], vv[0, 0]
    dist = np.full(uu.shape, np.inf)
    arc = np.full(uu.shape, np.nan)
    seg_len = np.hypot(*np.diff(line, axis=0).T)
    s0 = np.concatenate([[0.0], np.cumsum(seg_len)])
    for i in range(len(line) - 1):
        (ax, ay), (bx, by) = line[i], line[i + 1]
        c0 = max(int((min(ax, bx) - reach_m - u0) / cell), 0)
        c1 = min(int((max(ax, bx) + reach_m - u0) / cell) + 2, n)
        r0 = max(int((vtop - max(ay, by) - reach_m) / cell), 0)
        r1 = min(int((vtop - min(ay, by) + reach_m) / cell) + 2, n)
        if c0 >= c1 or r0 >= r1:
            continue
        pu = uu[r0:r1, c0:c1]
        pv = vv[r0:r1, c0:c1]
        dx, dy = bx - ax, by - ay
        L2 = dx * dx + dy * dy
        t = np.clip(((pu - ax) * dx + (pv - ay) * dy) / L2, 0.0, 1.0)
        d = np.hypot(pu - (ax + t * dx), pv - (ay + t * dy))
        sub_d = dist[r0:r1, c0:c1]
        better = d < sub_d
        sub_d[better] = d[better]
        arc[r0:r1, c0:c1][better] = s0[i] + t[better] * seg_len[i]
    dist[dist > reach_m] = np.inf
    arc[~np.isfinite(dist)] = np.nan
    return dist, arc


# --------------------------------------------------------------------------
# DEM
# --------------------------------------------------------------------------


@dataclass
class Terrain:
    """The DEM and the intermediate fields the vector layers are derived from."""

    elev_m: np.ndarray  # float32, rounded, NODATA in the void
    cell_m: float
    uu: np.ndarray
    vv: np.ndarray
    river: np.ndarray  # centreline vertices (u, v), source first
    river_dist_m: np.ndarray
    height_above_floor_m: np.ndarray  # elevation above the valley floor at the nearest river point
    hill_weight: np.ndarray  # 0 on the plain, 1 in the hills
    void: np.ndarray  # bool mask of the nodata void


def make_terrain(seed: int, size: int) -> Terrain:
    """Build the synthetic DEM (see the module docstring for the recipe)."""
    rng = np.random.default_rng(seed)
    cell = EXTENT_M / size
    centres = (np.arange(size) + 0.5) * cell
    uu, vv = np.meshgrid(centres, EXTENT_M - centres)  # row 0 is the north edge

    # noise fields, drawn in a fixed order so the seed fixes all of them
    n_hill = _fractal_noise(rng, size, cell, beta=4.0, min_wave_m=150.0, max_wave_m=4000.0)
    n_plain = _fractal_noise(rng, size, cell, beta=3.0, min_wave_m=250.0, max_wave_m=3000.0)
    n_fine = _fractal_noise(rng, size, cell, beta=2.6, min_wave_m=40.0, max_wave_m=600.0)
    n_sea = _fractal_noise(rng, size, cell, beta=3.0, min_wave_m=200.0, max_wave_m=4000.0)
    n_wall = _fractal_noise(rng, size, cell, beta=3.0, min_wave_m=80.0, max_wave_m=1500.0)

    d = vv - coast_v(centres)[None, :]  # metres inland of the shoreline (north-south)
    e = vv - hill_foot_v(centres)[None, :]  # metres beyond the hill foot

    # --- coastal plain: 0 m at the shore to ~8 m at the hill foot
    dp = np.maximum(d, 0.0)
    plain = 1.2 * (1.0 - np.exp(-dp / 35.0)) + 8.0 * (1.0 - np.exp(-dp / 1800.0))  # beach berm + plain
    inland_taper = _smoothstep(d, 150.0, 500.0)
    plain += 0.6 * n_plain * inland_taper + 0.08 * n_fine * _smoothstep(d, 30.0, 150.0)
    # dune ridge along the western shore
    ridge_window = _smoothstep(uu, 500.0, 900.0) * (1.0 - _smoothstep(uu, 3100.0, 3500.0))
    plain += 3.0 * ridge_window * np.exp(-(((d - 120.0) / 60.0) ** 2))

    # --- hills: a rising envelope modulated by fractal relief, scaled to a 420 m summit
    hill_env = _smoothstep(e, -300.0, 4300.0)
    hill_w = _smoothstep(e, -200.0, 1200.0)
    crest = 330.0 + 60.0 * np.sin(2 * np.pi * centres[None, :] / 5200.0 + 1.3)
    hills = crest * hill_env**1.2 * (1.0 + 0.45 * np.tanh(n_hill)) + 4.0 * hill_w * hill_env * n_fine
    hills = np.maximum(hills, 0.0)
    hills *= HILL_TOP_M / hills.max()
    z = plain + hills

    # --- enclosed basin behind the dune ridge (floor below +1 m, not open to the sea)
    rb = np.hypot((uu - 2000.0) / 520.0, (d - 720.0) / 260.0)
    bowl = np.where(rb < 0.55, 1.0, 0.5 + 0.5 * np.cos(np.pi * np.clip((rb - 0.55) / 0.45, 0, 1)))
    z = np.where(rb < 1.0, z - (z - 0.45) * bowl, z)
    # smaller enclosed hollow on the eastern plain
    rh = np.hypot((uu - 7900.0) / 180.0, (d - 650.0) / 140.0)
    hol = np.where(rh < 0.4, 1.0, 0.5 + 0.5 * np.cos(np.pi * np.clip((rh - 0.4) / 0.6, 0, 1)))
    z = np.where(rh < 1.0, z - (z - 0.7) * hol, z)

    # --- Tamsel valley
    line = river_centreline()
    seg = np.hypot(*np.diff(line, axis=0).T)
    s_line = np.concatenate([[0.0], np.cumsum(seg)])  # arc length from the source
    total = s_line[-1]
    dist, arc = _distance_to_polyline(uu, vv, line, RIVER_REACH_M)
    # valley floor along the river, as distance from the mouth
    from_mouth = total - s_line
    rows = np.clip(((EXTENT_M - line[:, 1]) / cell).astype(int), 0, size - 1)
    cols = np.clip((line[:, 0] / cell).astype(int), 0, size - 1)
    # lowest ground within 250 m of each vertex, so the river never sits above its surroundings
    reach = max(int(250.0 / cell), 1)
    base_on_line = np.array(
        [z[max(r - reach, 0) : r + reach + 1, max(c - reach, 0) : c + reach + 1].min() for r, c in zip(rows, cols)]
    )
    e_line = line[:, 1] - hill_foot_v(line[:, 0])
    hill_line = _smoothstep(e_line, -500.0, 2500.0)
    floor_design = 0.6 + 0.0011 * from_mouth + 120.0 * hill_line**1.6
    floor = np.minimum(floor_design, base_on_line - 2.5)
    floor = np.maximum(floor, 0.6)
    # the floor must never rise downstream: running minimum from the source
    floor = np.minimum.accumulate(floor)
    near = np.isfinite(dist)
    floor_at = np.full(z.shape, np.nan)
    floor_at[near] = np.interp(arc[near], s_line, floor)
    hw_line = np.where(hill_line > 0.5, WIDTH_UPPER_M, WIDTH_LOWER_M) / 2.0
    half_w = np.full(z.shape, np.nan)
    half_w[near] = np.interp(arc[near], s_line, hw_line)
    fp_half = 100.0 * (1.0 - hill_w) + 35.0 * hill_w  # floodplain half-width
    wall_grad = 0.02 * (1.0 - hill_w) + 0.55 * hill_w
    side = np.maximum(np.where(near, dist, 0.0) - fp_half, 0.0) * wall_grad
    side *= 1.0 + 0.35 * np.clip(n_wall, -1.8, 2.5)
    valley = floor_at + side
    z = np.where(near, np.minimum(z, valley), z)

    # --- tidal flats around the mouth: below +1 m and open to the sea
    mouth_v = line[-1, 1]
    rm = np.hypot((uu - MOUTH_U_M) / 480.0, (vv - mouth_v) / 320.0)
    w_flat = 1.0 - _smoothstep(rm, 0.45, 1.0)
    flat = 0.5 + 0.25 * np.clip(n_plain, -1.5, 1.5)
    z = z * (1.0 - w_flat) + np.minimum(z, flat) * w_flat

    # --- channel
    in_ch = near & (dist < half_w)
    depth = 1.0 + 0.5 * (1.0 - hill_w)
    bed = floor_at - depth * (1.0 - (dist / half_w) ** 2)
    bed_min = 0.1 + 0.0005 * np.where(near, total - arc, 0.0)  # stays above 0 m on land
    bed = np.maximum(bed, bed_min)
    z = np.where(in_ch, np.minimum(z, bed), z)

    # --- sea
    bay = np.exp(-(((uu - MOUTH_U_M) / 2200.0) ** 2))
    depth_scale = 38.0 - 22.0 * bay
    sea = -depth_scale * (1.0 - np.exp(np.minimum(d, 0.0) / 900.0))
    sea *= 1.0 + 0.25 * np.clip(n_sea, -2.0, 2.0)
    sea = np.minimum(sea, -0.02)
    z = np.where(d < 0.0, sea, z)

    # --- small void in the hills
    void = (np.abs(uu - 7300.0) < 60.0) & (np.abs(vv - 8400.0) < 45.0)

    out = np.round(z / ROUND_M) * ROUND_M
    out = out.astype(np.float32)
    out[void] = NODATA

    hafl = np.where(near, z - floor_at, np.inf)
    return Terrain(
        elev_m=out,
        cell_m=cell,
        uu=uu,
        vv=vv,
        river=line,
        river_dist_m=dist,
        height_above_floor_m=hafl,
        hill_weight=hill_w,
        void=void,
    )


# --------------------------------------------------------------------------
# helpers shared by the vector layers
# --------------------------------------------------------------------------


def horn_slope_pct(elev_m: np.ndarray, cell_m: float) -> np.ndarray:
    """Slope in percent by Horn's 3x3 method; NaN on the outer ring and next to NaN.

    Only used here to place lots; the package computes its own slope.
    """
    z = np.pad(elev_m.astype(np.float64), 1, constant_values=np.nan)
    z1, z2, z3 = z[:-2, :-2], z[:-2, 1:-1], z[:-2, 2:]
    z4, z6 = z[1:-1, :-2], z[1:-1, 2:]
    z7, z8, z9 = z[2:, :-2], z[2:, 1:-1], z[2:, 2:]
    p = ((z3 + 2 * z6 + z9) - (z1 + 2 * z4 + z7)) / (8 * cell_m)
    q = ((z1 + 2 * z2 + z3) - (z7 + 2 * z8 + z9)) / (8 * cell_m)
    return 100.0 * np.hypot(p, q)


def _to_world(geom):
    """Shift a geometry from local (u, v) metres to the projected CRS."""
    return affinity.translate(geom, xoff=ORIGIN_X_M, yoff=ORIGIN_Y_M - EXTENT_M)


def _local_transform(cell_m: float) -> Affine:
    """Raster transform in local (u, v) metres (row 0 at the north edge)."""
    return Affine(cell_m, 0.0, 0.0, 0.0, -cell_m, EXTENT_M)


def _rect(cx: float, cy: float, w: float, h: float, angle_deg: float) -> Polygon:
    """Rectangle of size w x h centred on (cx, cy), rotated anticlockwise by angle_deg."""
    a = math.radians(angle_deg)
    ca, sa = math.cos(a), math.sin(a)
    corners = [(-w / 2, -h / 2), (w / 2, -h / 2), (w / 2, h / 2), (-w / 2, h / 2)]
    return Polygon([(cx + x * ca - y * sa, cy + x * sa + y * ca) for x, y in corners])


def _largest_part(geom):
    if geom.is_empty:
        return geom
    if isinstance(geom, Polygon):
        return geom
    parts = [g for g in getattr(geom, "geoms", []) if isinstance(g, Polygon)]
    if not parts:
        return Polygon()
    return max(parts, key=lambda g: g.area)


def _polygonal(geom):
    """Keep only the polygonal parts of a geometry (drops stray lines and points)."""
    if geom.is_empty or isinstance(geom, (Polygon, MultiPolygon)):
        return geom
    parts = []
    for g in getattr(geom, "geoms", []):
        if isinstance(g, Polygon):
            parts.append(g)
        elif isinstance(g, MultiPolygon):
            parts.extend(g.geoms)
    return MultiPolygon(parts) if parts else Polygon()


@dataclass
class Layers:
    """Vector layers in local (u, v) metres."""

    shoreline: LineString
    land: Polygon
    river_upper: LineString
    river_lower: LineString
    river: LineString
    flood: list  # (polygon, level)


def make_layers(terrain: Terrain) -> Layers:
    """Shoreline, river centreline split into two reaches, and flood polygons."""
    u = np.arange(0.0, EXTENT_M + 1e-9, 10.0)
    shore = LineString(np.column_stack([u, coast_v(u)]))
    land = Polygon(list(shore.coords) + [(EXTENT_M, EXTENT_M), (0.0, EXTENT_M)])

    line = terrain.river
    e_line = line[:, 1] - hill_foot_v(line[:, 0])
    hill_line = _smoothstep(e_line, -500.0, 2500.0)
    split = int(np.argmax(hill_line <= 0.5))  # first vertex of the plain reach
    upper = LineString(line[: split + 1])
    lower = LineString(line[split:])

    # flood hazard: height above the Tamsel's valley floor on the plain, and
    # ground below +2 m that is open to the sea
    cell = terrain.cell_m
    plain = terrain.hill_weight < 0.5
    h = terrain.height_above_floor_m
    dist = terrain.river_dist_m
    level = np.zeros(h.shape, dtype=np.uint8)
    level[plain & (h < 3.5) & (dist < 700)] = 1
    level[plain & (h < 2.0) & (dist < 500)] = 2
    level[plain & (h < 0.6) & (dist < 160)] = 3
    elev = terrain.elev_m
    sea = elev < 0
    low1 = _open_to_sea(elev < 2.0, sea, cell) & ~sea
    low2 = _open_to_sea(elev < 1.2, sea, cell) & ~sea
    level[low1 & (level < 1)] = 1
    level[low2 & (level < 2)] = 2
    level[sea] = 0
    level = features.sieve(level, size=40, connectivity=4)
    level[sea] = 0
    flood = []
    for geom, val in features.shapes(level, mask=level > 0, transform=_local_transform(cell), connectivity=4):
        fixed = _polygonal(shapely.make_valid(shapely.geometry.shape(geom)))
        for part in getattr(fixed, "geoms", [fixed]):
            if not part.is_empty:
                flood.append((part, int(val)))
    flood.sort(key=lambda gv: (gv[1], -gv[0].area))
    return Layers(shore, land, upper, lower, LineString(line), flood)


def _open_to_sea(mask: np.ndarray, sea: np.ndarray, cell_m: float) -> np.ndarray:
    """Cells of ``mask`` in an 8-connected region that contains sea cells."""
    tr = _local_transform(cell_m)
    shapes = features.shapes(mask.astype(np.uint8), mask=mask, transform=tr, connectivity=8)
    labelled = [(geom, k) for k, (geom, _) in enumerate(shapes, start=1)]
    labels = features.rasterize(labelled, out_shape=mask.shape, transform=tr, dtype=np.int32)
    touching = np.unique(labels[sea & mask])
    return np.isin(labels, touching[touching > 0]) & mask


# --------------------------------------------------------------------------
# parcels
# --------------------------------------------------------------------------

#: zoning code -> rulebook class (kept in step with RULEBOOK_TOML below)
ZONING_CLASSES = {
    "RES-1": "residential",
    "RES-2": "residential",
    "COM": "commercial",
    "MIX": "commercial",
    "IND": "industrial",
    "AGR": "agricultural",
    "TOU": "tourism",
    "PRK": "parks",
    "FOR": "forest",
}


@dataclass
class Parcel:
    geom: object  # Polygon or MultiPolygon in local (u, v) metres
    zoning: str
    tags: set = field(default_factory=set)  # design intent, reported by the summary only


class _Sampler:
    """Nearest-cell lookups into the terrain rasters (local coordinates)."""

    def __init__(self, terrain: Terrain, slope_pct: np.ndarray):
        self.t = terrain
        self.slope = slope_pct
        self.n = terrain.elev_m.shape[0]

    def _rc(self, u, v):
        c = np.clip((np.asarray(u) / self.t.cell_m).astype(int), 0, self.n - 1)
        r = np.clip(((EXTENT_M - np.asarray(v)) / self.t.cell_m).astype(int), 0, self.n - 1)
        return r, c

    def slope_at(self, u, v):
        return self.slope[self._rc(u, v)]

    def void_at(self, u, v):
        return self.t.void[self._rc(u, v)]

    def grid_points(self, geom, step_m: float = 10.0):
        minx, miny, maxx, maxy = geom.bounds
        xs = np.arange(minx + step_m / 2, maxx, step_m)
        ys = np.arange(miny + step_m / 2, maxy, step_m)
        gx, gy = np.meshgrid(xs, ys)
        inside = shapely.contains_xy(geom, gx, gy)
        return gx[inside], gy[inside]


def _place(cands, occupied, min_keep: float):
    """Clip candidates against the occupied area; keep those that retain ``min_keep`` of their area."""
    out = []
    occ = occupied if not occupied.is_empty else None
    if occ is not None:
        shapely.prepare(occ)
    for geom, zoning, tags in cands:
        g = geom
        if occ is not None and occ.intersects(g):
            g = _polygonal(g.difference(occ))
        if g.is_empty or g.area < min_keep * geom.area:
            continue
        out.append(Parcel(g, zoning, set(tags)))
    return out


def make_parcels(terrain: Terrain, layers: Layers, seed: int) -> list[Parcel]:
    """Lay out the parcels (see the module docstring for the recipe and the planted conflicts)."""
    rng = np.random.default_rng([seed, 1])
    slope = horn_slope_pct(np.where(terrain.void, np.nan, terrain.elev_m), terrain.cell_m)
    smp = _Sampler(terrain, slope)
    river = layers.river
    upper, lower = layers.river_upper, layers.river_lower
    land = layers.land
    shore = layers.shoreline
    inner = box(20.0, 20.0, EXTENT_M - 20.0, EXTENT_M - 20.0)
    u_line = np.arange(0.0, EXTENT_M + 1e-9, 50.0)
    hill_line = np.column_stack([u_line, hill_foot_v(u_line) + 200.0])
    below_hills = Polygon(
        [
            (-500.0, -500.0),
            (EXTENT_M + 500.0, -500.0),
            (EXTENT_M + 500.0, hill_line[-1, 1]),
            *hill_line[::-1].tolist(),
            (-500.0, hill_line[0, 1]),
        ]
    )
    above_hills = inner.difference(below_hills)

    corridors: dict = {}

    def corridor(buffer_from_bank_m: float):
        """River strip reaching ``buffer_from_bank_m`` beyond either bank."""
        if buffer_from_bank_m not in corridors:
            corridors[buffer_from_bank_m] = unary_union(
                [
                    upper.buffer(WIDTH_UPPER_M / 2 + buffer_from_bank_m),
                    lower.buffer(WIDTH_LOWER_M / 2 + buffer_from_bank_m),
                ]
            )
            shapely.prepare(corridors[buffer_from_bank_m])
        return corridors[buffer_from_bank_m]

    parcels: list[Parcel] = []
    occupied = Polygon()

    def commit(new, exclusion=None):
        """Add a group of parcels (clipped against everything placed so far) and grow the occupied area."""
        nonlocal occupied
        new = _place([(p.geom, p.zoning, p.tags) for p in new], occupied, 0.5)
        parcels.extend(new)
        parts = [occupied] + [p.geom for p in new]
        if exclusion is not None:
            parts.append(exclusion)
        occupied = unary_union(parts)

    # 1. a farm that hangs over the west edge of the DEM (about 43 % outside)
    commit([Parcel(box(-170.0, 3300.0, 230.0, 3600.0), "AGR", {"edge"})])

    # 2. small lots (< 0.5 ha) on steep ground
    steep_r, steep_c = np.nonzero((slope >= 32.0) & (terrain.hill_weight > 0.9) & (terrain.river_dist_m > 120.0))
    order = rng.permutation(len(steep_r))
    small, centres = [], []
    small_zoning = ["RES-1", "RES-1", "RES-2", "COM", "TOU"]
    for k in order:
        if len(small) == len(small_zoning):
            break
        cu = (steep_c[k] + 0.5) * terrain.cell_m
        cv = EXTENT_M - (steep_r[k] + 0.5) * terrain.cell_m
        if any(math.hypot(cu - a, cv - b) < 700.0 for a, b in centres):
            continue
        g = _rect(cu, cv, 70.0, 55.0, float(rng.uniform(0, 180)))
        if not inner.contains(g):
            continue
        gu, gv = smp.grid_points(g, 10.0)
        sl = smp.slope_at(gu, gv)
        if np.isnan(sl).any() or np.mean(sl >= 18.0) < 0.8:
            continue
        centres.append((cu, cv))
        small.append(Parcel(g, small_zoning[len(small)], {"small_steep", "slope"}))
    commit(small)

    # 3. hillside subdivision on the foothills: lots straddle the 18 % line
    lot_w, lot_h, street = 55.0, 42.0, 10.0
    nx, ny, angle = 4, 5, 35.0
    site_w, site_h = nx * (lot_w + street), ny * (lot_h + street)
    # pick the site by window shares of steep cells (integral images over a square
    # window of the site's area), on a 100 m lattice of candidate centres
    half = int(round(math.sqrt(site_w * site_h) / 2 / terrain.cell_m))
    valid = np.isfinite(slope)
    with np.errstate(invalid="ignore"):
        steep18 = valid & (slope >= 18.0)
        steep30 = valid & (slope >= 30.0)

    def window_sum(a):
        ii = np.pad(np.cumsum(np.cumsum(a.astype(np.int64), axis=0), axis=1), ((1, 0), (1, 0)))
        return lambda r, c: (
            ii[r + half + 1, c + half + 1]
            - ii[r - half, c + half + 1]
            - ii[r + half + 1, c - half]
            + ii[r - half, c - half]
        )

    s_valid, s18, s30 = window_sum(valid), window_sum(steep18), window_sum(steep30)
    cu_grid, cv_grid = np.meshgrid(np.arange(700.0, 9300.0, 100.0), np.arange(5200.0, 8500.0, 100.0))
    rr, cc = smp._rc(cu_grid.ravel(), cv_grid.ravel())
    n_win = (2 * half + 1) ** 2
    ok = (s_valid(rr, cc) == n_win) & (terrain.river_dist_m[rr, cc] > 300.0 + half * terrain.cell_m * 1.5)
    score = np.abs(s18(rr, cc) / n_win - 0.2) + 0.5 * s30(rr, cc) / n_win
    score[~ok] = np.inf
    best = None
    for k in np.argsort(score, kind="stable"):
        if not np.isfinite(score[k]):
            break
        site = _rect(float(cu_grid.ravel()[k]), float(cv_grid.ravel()[k]), site_w, site_h, angle)
        if inner.contains(site) and not site.intersects(occupied) and site.distance(river) >= 300.0:
            best = (float(score[k]), float(cu_grid.ravel()[k]), float(cv_grid.ravel()[k]))
            break
    _, cu, cv = best
    subdivision = []
    rot = math.radians(angle)
    for i in range(nx):
        for j in range(ny):
            lx = (i - (nx - 1) / 2) * (lot_w + street)
            ly = (j - (ny - 1) / 2) * (lot_h + street)
            px = cu + lx * math.cos(rot) - ly * math.sin(rot)
            py = cv + lx * math.sin(rot) + ly * math.cos(rot)
            zoning = "COM" if (i, j) in ((0, 0), (1, 0)) else "RES-2"
            subdivision.append(Parcel(_rect(px, py, lot_w, lot_h, angle), zoning, {"hillside_subdivision"}))
    commit(subdivision, exclusion=_rect(cu, cv, site_w + 20, site_h + 20, angle))

    # 4. riverside lodges in the hills (forest-context tourism inside the 40 m strip)
    lodges = []
    for frac in (0.35, 0.6):
        p = upper.interpolate(frac, normalized=True)
        q = upper.interpolate(min(frac + 0.01, 1.0), normalized=True)
        tx, ty = q.x - p.x, q.y - p.y
        nrm = math.hypot(tx, ty)
        nxv, nyv = -ty / nrm, tx / nrm
        off = WIDTH_UPPER_M / 2 + 12.0 + 30.0
        g = _rect(p.x + nxv * off, p.y + nyv * off, 90.0, 60.0, math.degrees(math.atan2(ty, tx)))
        g = _polygonal(g.difference(corridor(12.0)))
        lodges.append(Parcel(_largest_part(g), "TOU", {"river"}))
    commit(lodges)

    # 5. the town: a street grid rotated by -7 degrees around the bay head
    town_c = (5250.0, 3150.0)
    town_zone = box(4500.0, 0.0, 6100.0, 3650.0).intersection(land)
    setback_town = land.difference(shore.buffer(45.0))
    corridor_town = corridor(12.0)
    block_w, block_h, street_w = 140.0, 100.0, 14.0
    theta = math.radians(-7.0)
    mouth = Point(layers.river.coords[-1])
    town = []
    for bi in range(-9, 10):
        for bj in range(-9, 8):
            bx = bi * (block_w + street_w)
            by = bj * (block_h + street_w)
            bcx = town_c[0] + bx * math.cos(theta) - by * math.sin(theta)
            bcy = town_c[1] + bx * math.sin(theta) + by * math.cos(theta)
            _rect(bcx, bcy, block_w, block_h, -7.0)
            if not town_zone.contains(Point(bcx, bcy)):
                continue
            r = math.hypot(bcx - town_c[0], bcy - town_c[1])
            split = (2, 2) if r < 300 else ((2, 1) if r < 560 else (1, 1))
            lw, lh = block_w / split[0], block_h / split[1]
            for i in range(split[0]):
                for j in range(split[1]):
                    lx = -block_w / 2 + (i + 0.5) * lw
                    ly = -block_h / 2 + (j + 0.5) * lh
                    cx = bcx + lx * math.cos(theta) - ly * math.sin(theta)
                    cy = bcy + lx * math.sin(theta) + ly * math.cos(theta)
                    town.append((_rect(cx, cy, lw, lh, -7.0), r))
    town_hull = unary_union([t[0] for t in town]).convex_hull.buffer(street_w)

    # choose the planted shore and river conflicts among the candidate rectangles:
    # whole-block waterfront lots (long frontage, so their share of a 3 m strip is
    # well above min_breach_m2) and lots laid across the river channel
    shore45 = shore.buffer(45.0)
    near_shore = [k for k, (g, _) in enumerate(town) if g.intersects(shore45) and not g.intersects(corridor(60.0))]
    widest = max((town[k][0].area for k in near_shore), default=0.0)
    near_shore = [k for k in near_shore if town[k][0].area > 0.9 * widest]
    shore_pick = set(near_shore[:: max(len(near_shore) // 3, 1)][:3])
    near_river = [k for k, (g, _) in enumerate(town) if g.intersects(river) and k not in shore_pick]
    river_pick = set(near_river[1 :: max(len(near_river) // 3, 1)][:3])
    flood_pool = []
    cands = []
    for k, (g, r) in enumerate(town):
        tags = set()
        if k in shore_pick:
            # run the lot down to the shoreline across its whole width
            seaward = affinity.translate(g, 80.0 * math.sin(theta), -80.0 * math.cos(theta))
            others = unary_union([t[0] for j, t in enumerate(town) if j != k])
            geom = _largest_part(_polygonal(g.union(seaward).intersection(land).difference(others)))
            tags.add("shore")
        elif k in river_pick:
            geom = _largest_part(_polygonal(g.intersection(setback_town)))
            tags.add("river")
        else:
            geom = g.intersection(setback_town)
            if geom.intersects(corridor_town):
                geom = geom.difference(corridor_town)
            geom = _largest_part(_polygonal(geom))
        if geom.is_empty or geom.area < 0.5 * g.area:
            continue
        c = geom.centroid
        d_river = geom.distance(river)
        d_shore = c.distance(shore)
        if tags:
            zoning = "RES-2" if r > 300 else "COM"
        elif d_river < 90.0:
            zoning = "PRK"
            flood_pool.append(len(cands))
        elif c.x > 5750.0 and d_shore < 450.0:
            zoning = "IND"
        elif d_shore < 220.0 and abs(c.x - mouth.x) < 650.0:
            zoning = "COM" if rng.random() < 0.6 else "MIX"
        elif r < 300.0:
            zoning = ["RES-2", "MIX", "COM", "RES-2"][int(rng.integers(0, 4))]
        elif r < 560.0:
            zoning = "RES-2" if rng.random() < 0.8 else "RES-1"
        else:
            zoning = "RES-1"
        cands.append((geom, zoning, tags))
    # a town square, and a few riverside lots kept for housing inside the flood-prone strip
    square = min(range(len(cands)), key=lambda i: cands[i][0].centroid.distance(Point(5350.0, 3250.0)))
    cands[square] = (cands[square][0], "PRK", set())
    for i in sorted(rng.choice(flood_pool, size=min(5, len(flood_pool)), replace=False).tolist()):
        cands[i] = (cands[i][0], "RES-2", {"flood"})
    commit(_place(cands, occupied, 0.5), exclusion=town_hull)

    # 6. beach resort on the eastern shore (tourism uses the forest-context widths)
    resort = []
    for k, cu in enumerate((7450.0, 7620.0, 7790.0, 7960.0)):
        setback = 8.0 if k % 2 == 0 else 60.0
        v0 = float(coast_v(np.array([cu - 80.0, cu + 80.0])).max())
        g = box(cu - 80.0, v0 - 30.0, cu + 80.0, v0 + 150.0).intersection(land.difference(shore.buffer(setback)))
        resort.append(Parcel(_largest_part(_polygonal(g)), "TOU", {"shore"} if setback < 40 else set()))
    commit(resort)

    # 7. a hamlet inside the enclosed basin: below +1 m but not open to the sea
    hamlet = []
    bv = float(coast_v(np.array([2000.0]))[0]) + 720.0
    for i in range(3):
        for j in range(2):
            hamlet.append(
                Parcel(_rect(2000.0 + (i - 1) * 85.0, bv + (j - 0.5) * 65.0, 75.0, 55.0, 0.0), "RES-1", {"basin"})
            )
    commit(hamlet, exclusion=box(1850.0, bv - 80.0, 2150.0, bv + 80.0))

    # 8. farm fields on the plain west and east of the town
    setback_farm = land.difference(shore.buffer(45.0))
    farm_region = below_hills.intersection(inner).intersection(setback_farm)
    corridor_farm = corridor(25.0)
    fields = []
    fw, fh, road = 620.0, 450.0, 12.0
    fang = math.radians(10.0)
    for fi in range(-16, 17):
        for fj in range(-14, 14):
            fx = fi * (fw + road)
            fy = fj * (fh + road)
            cx = 5000.0 + fx * math.cos(fang) - fy * math.sin(fang)
            cy = 3500.0 + fx * math.sin(fang) + fy * math.cos(fang)
            if not (-200.0 < cx < EXTENT_M + 200.0 and 0.0 < cy < EXTENT_M):
                continue
            g = _rect(cx, cy, fw, fh, 10.0)
            if g.intersection(farm_region).area > 0.3 * g.area:
                fields.append(g)
    fields.sort(key=lambda g: (round(g.centroid.y, 3), round(g.centroid.x, 3)))
    river_fields = [k for k, g in enumerate(fields) if g.intersects(corridor_farm) and not g.intersects(town_hull)]
    farm_river_pick = set(river_fields[1::3][:3])
    shore46 = shore.buffer(46.0)
    east_shore = [k for k, g in enumerate(fields) if g.centroid.x > 8300.0 and g.intersects(shore46)]
    farm_shore_pick = set(east_shore[:2])
    cands = []
    n_multi = 0
    for k, g in enumerate(fields):
        tags = set()
        if k in farm_shore_pick:
            region = below_hills.intersection(inner).intersection(land.difference(shore.buffer(5.0)))
            tags.add("shore")
        else:
            region = farm_region
        geom = _polygonal(g.intersection(region))
        if geom.is_empty:
            continue
        if k in farm_river_pick:
            geom = _polygonal(geom.difference(corridor(2.0)))
            tags.add("river")
        elif geom.intersects(corridor_farm):
            geom = _polygonal(geom.difference(corridor_farm))
            parts = sorted(getattr(geom, "geoms", [geom]), key=lambda p: -p.area)
            if n_multi < 2 and len(parts) >= 2 and parts[1].area > 0.25 * g.area and not g.intersects(town_hull):
                geom = MultiPolygon(parts[:2])
                tags.add("multipolygon")
                n_multi += 1
        if "multipolygon" not in tags:
            geom = _largest_part(geom)
        cands.append((geom, "AGR", tags))
    # a mill yard and a depot next to the town's east side
    for i, (geom, _zoning, tags) in enumerate(cands):
        c = geom.centroid
        if 6150.0 < c.x < 6900.0 and c.distance(shore) < 900.0 and not tags:
            cands[i] = (geom, "IND", tags)
    commit(_place(cands, occupied, 0.45))

    # 9. hill country: irregular Voronoi lots above the plain
    region = above_hills.difference(occupied).difference(corridor(5.0))
    seeds = []
    tries = 0
    while len(seeds) < 120 and tries < 20000:
        tries += 1
        pu, pv = rng.uniform(0, EXTENT_M, size=2)
        if not region.contains(Point(pu, pv)):
            continue
        if any((pu - a) ** 2 + (pv - b) ** 2 < 430.0**2 for a, b in seeds):
            continue
        seeds.append((float(pu), float(pv)))
    cells = shapely.voronoi_polygons(shapely.MultiPoint(seeds), extend_to=box(-1e4, -1e4, 2e4, 2e4))
    by_seed = {}
    for cell in cells.geoms:
        for k, (a, b) in enumerate(seeds):
            if k not in by_seed and cell.contains(Point(a, b)):
                by_seed[k] = cell
                break
    cands = []
    n_multi_hill = 0
    for k in range(len(seeds)):
        geom = _polygonal(by_seed[k].intersection(region))
        if geom.is_empty:
            continue
        parts = sorted(getattr(geom, "geoms", [geom]), key=lambda p: -p.area)
        if n_multi_hill < 1 and len(parts) >= 2 and parts[1].area > 8_000.0 and geom.intersects(corridor(8.0)):
            geom = MultiPolygon(parts[:2])
            tags = {"multipolygon"}
            n_multi_hill += 1
        else:
            geom = parts[0]
            tags = set()
        if geom.area < 5000.0:
            continue
        gu, gv = smp.grid_points(geom, 20.0)
        sl = smp.slope_at(gu, gv)
        mean_sl = float(np.nanmean(sl)) if len(sl) else 99.0
        over = float(np.nanmean(sl >= 18.0)) if len(sl) else 1.0
        if mean_sl < 12.0 and rng.random() < 0.8:
            zoning = "AGR"
        elif over > 0.25 and mean_sl < 22.0 and rng.random() < 0.35:
            zoning = "AGR"  # farmland creeping onto steep ground
            tags.add("slope")
        elif rng.random() < 0.03:
            zoning = "TOU"
        else:
            zoning = "FOR"
        cands.append((geom, zoning, tags))
    commit(_place(cands, occupied, 0.3))

    # 10. two lots held by one owner across a street become one multipolygon parcel
    singles = [
        i
        for i, p in enumerate(parcels)
        if p.zoning == "RES-1" and isinstance(p.geom, Polygon) and not p.tags and len(p.geom.exterior.coords) == 5
    ]
    merged = False
    for a in singles:
        for b in singles:
            if b <= a or merged:
                continue
            gap = parcels[a].geom.distance(parcels[b].geom)
            if 10.0 < gap < 20.0:
                parcels[a] = Parcel(MultiPolygon([parcels[a].geom, parcels[b].geom]), "RES-1", {"multipolygon"})
                del parcels[b]
                merged = True
        if merged:
            break

    # 11. self-intersecting ("bowtie") rings: corners in the order a, b, d, c
    rect_idx = [
        i
        for i, p in enumerate(parcels)
        if isinstance(p.geom, Polygon) and not p.tags and len(p.geom.exterior.coords) == 5 and not p.geom.interiors
    ]
    for zoning in ("RES-1", "AGR"):
        pick = next(i for i in rect_idx if parcels[i].zoning == zoning)
        a, b, c, d = list(parcels[pick].geom.exterior.coords)[:4]
        parcels[pick] = Parcel(Polygon([a, b, d, c]), zoning, {"bowtie"})
    return parcels


# --------------------------------------------------------------------------
# rulebook (written verbatim to rulebook.toml)
# --------------------------------------------------------------------------

RULEBOOK_TOML = """\
# Alderwane demo rulebook
# =======================
#
# A worked example of a landcheck rulebook for the invented town of Alderwane
# on Corrin Bay.  The town, its zoning codes and every figure below are part of
# the demo; nothing here describes a real place.
#
# IMPORTANT: the legal figures in this file (an 18 % slope limit for land
# released for disposition; bank and shore easements 3 m wide in urban areas,
# 20 m in agricultural areas and 40 m in forest areas) are a PRESET taken from
# one jurisdiction's rules.  They are not universal.  Before you use landcheck
# anywhere, replace them with the figures that apply in your own jurisdiction
# (docs/ lists where this preset comes from).  landcheck is a screening aid,
# not a survey or a legal determination.
#
# Units are in the key names: *_pct is percent slope (100 x rise / run, so
# 18 % is about 10.2 degrees, not 18 degrees), *_m is metres, *_m2 is square
# metres.  Relative paths are resolved against the folder of this file.

[rulebook]
title = "Alderwane demo rulebook"
class_field = "zoning"             # attribute of parcels.gpkg holding the raw zoning code
id_field = "parcel_id"             # attribute with a unique id per parcel
min_evaluated_share = 0.8          # below this share of evaluated area -> no_data verdict
                                   # (e.g. a parcel hanging over the DEM edge, or over a DEM void)

[slope]
method = "horn"                    # or "zevenbergen-thorne"

[layers]                           # paths relative to this file
shoreline = "shoreline.gpkg"       # line(s) along the 0 m contour of the sea side
rivers = "rivers.gpkg"             # river centreline(s) with a width_m attribute
flood = "flood_hazard.gpkg"        # flood polygons with an integer hazard_level 1..3

# ---------------------------------------------------------------------------
# Classes.  Each class lists the raw zoning codes (values) it covers.  Every
# code that appears in the parcels must be listed in exactly one class.
#
#   development      true if the class puts buildings, fields or roads on the
#                    land; only development classes carry a slope limit.
#   context          land-use context used to pick the easement width from a
#                    zone's width_m table: "urban", "agricultural" or "forest".
#   max_slope_pct    slope at or above which land counts as too steep
#                    ("or over": exactly 18.0 % is over the limit).
#   tolerance_pct    share of the parcel's evaluated area that may be over the
#                    limit before the parcel is a conflict.
#   min_breach_m2    a breach smaller than this area is not a conflict, so a
#                    few cells of DEM noise do not condemn a parcel.
#   review_band_pct  slopes within this many percentage points below the limit
#                    (here 15 % to 18 %) make the parcel "review" instead of
#                    "consistent".
#   forbidden_zones  names of [zones.*] sections this class must stay out of.
# ---------------------------------------------------------------------------

[classes.residential]
label = "Residential"
values = ["RES-1", "RES-2"]        # RES-1 low density, RES-2 medium density
development = true
context = "urban"                  # land-use context for easement widths: urban / agricultural / forest
max_slope_pct = 18.0               # 18 % "or over" limit for land released for disposition (one jurisdiction's rule; see docs)
tolerance_pct = 5.0                # share of evaluated area allowed over the limit before it is a conflict
min_breach_m2 = 200.0              # smaller breaches are not a conflict
review_band_pct = 3.0              # slopes within this many percentage points below the limit flag review
forbidden_zones = ["shore_easement", "river_easement", "flood_high", "sea_rise_1m"]
designated_class = "parks"  # proposed class for the part that breaks the rule (drafted reclassification)

[classes.commercial]
label = "Commercial and mixed use"
values = ["COM", "MIX"]            # COM shops and offices, MIX shops below flats
development = true
context = "urban"
max_slope_pct = 18.0
tolerance_pct = 5.0
min_breach_m2 = 200.0
review_band_pct = 3.0
forbidden_zones = ["shore_easement", "river_easement", "flood_high", "sea_rise_1m"]
designated_class = "parks"

[classes.industrial]
label = "Industrial"
values = ["IND"]
development = true
context = "urban"
max_slope_pct = 18.0
tolerance_pct = 5.0
min_breach_m2 = 200.0
review_band_pct = 3.0
# industry also stays off ground that lies close above the drainage network
# (flood_hand), because stored goods and chemicals must not be reached by floods
forbidden_zones = ["shore_easement", "river_easement", "flood_high", "flood_hand", "sea_rise_1m"]
designated_class = "parks"

[classes.agricultural]
label = "Agricultural"
values = ["AGR"]
development = true                 # farmland is land released for disposition too
context = "agricultural"           # 20 m bank and shore strips in this preset
max_slope_pct = 18.0
tolerance_pct = 5.0
min_breach_m2 = 200.0
review_band_pct = 3.0
# fields may flood and may lie low; they must keep the easement strips open
forbidden_zones = ["shore_easement", "river_easement"]
designated_class = "forest"

[classes.tourism]
label = "Tourism"
values = ["TOU"]
development = true
# Alderwane's tourism zone lies outside the town, on the wooded eastern shore
# and along the upper Tamsel, so the forest-area widths (40 m) apply
context = "forest"
max_slope_pct = 18.0
tolerance_pct = 5.0
min_breach_m2 = 200.0
review_band_pct = 3.0
forbidden_zones = ["shore_easement", "river_easement", "flood_high", "sea_rise_1m"]
designated_class = "parks"

[classes.parks]
label = "Parks and open space"
values = ["PRK"]
development = false                # no slope limit: parks may be steep, wet or in the strips
context = "urban"
forbidden_zones = []

[classes.forest]
label = "Forest"
values = ["FOR"]
development = false                # land that stays forest; no slope limit
context = "forest"
forbidden_zones = []

# ---------------------------------------------------------------------------
# Zones: hazard or protection areas derived from the layers and the DEM.
# ---------------------------------------------------------------------------

# Public easement strip along the shore.  The width depends on the context of
# the class being checked (see [classes.*].context), so one parcel zoned
# residential and a neighbour zoned agricultural are held to different widths.
[zones.shore_easement]
kind = "easement"
layer = "shoreline"
width_m = { urban = 3.0, agricultural = 20.0, forest = 40.0 }   # per land-use context (3/20/40 m preset)

# The same strip along both banks of the rivers.
[zones.river_easement]
kind = "easement"
layer = "rivers"
channel_width_field = "width_m"    # the layer holds centrelines: measure the strip from the banks
width_m = { urban = 3.0, agricultural = 20.0, forest = 40.0 }

# Mapped flood hazard: polygons whose hazard_level is at least min_level.
# Alderwane's map uses 1 = low, 2 = moderate, 3 = high.
[zones.flood_high]
kind = "flood_polygons"
layer = "flood"
level_field = "hazard_level"
min_level = 3

# Flood-prone ground from the terrain itself: cells less than max_hand_m above
# the nearest drainage cell (HAND, height above the nearest drainage).  The
# drainage network starts where the contributing area reaches channel_area_m2.
# Both figures are screening values to calibrate locally, not standards.
[zones.flood_hand]
kind = "hand"
max_hand_m = 3.0
channel_area_m2 = 250000.0         # 0.25 km2

# Sea-level rise: ground at or below datum + rise + surge that is connected to
# the sea.  Low ground cut off from the sea (Alderwane's basin behind the dune
# ridge) is not flooded by this rule, even though it lies below +1 m.
[zones.sea_rise_1m]
kind = "sea_rise"
datum_m = 0.0                      # DEM height of mean sea level
rise_m = 1.0                       # scenario: +1 m
surge_m = 0.0                      # add a storm surge here if wanted

# DEM error for verdict confidence (Monte Carlo). The demo DEM is invented; these figures assume a
# DEM of about 1 m vertical RMSE with errors correlated over about 40 m (replace them with the stated
# accuracy of your DEM; global 30 m DEMs are nearer 4-6 m RMSE, which makes an 18 % test on flat
# ground unreliable).
[uncertainty]
rmse_m = 1.0
corr_length_m = 40.0
realizations = 50
seed = 7
"""


# --------------------------------------------------------------------------
# writers
# --------------------------------------------------------------------------


#: fixed timestamp for GeoPackage metadata, so reruns give byte-identical files
GPKG_TIMESTAMP = "2026-01-01T00:00:00.000Z"


def _write_gpkg(gdf: gpd.GeoDataFrame, path: Path, layer: str) -> None:
    if path.exists():
        path.unlink()
    # GDAL reads its configuration options from the environment as a fallback
    previous = os.environ.get("OGR_CURRENT_DATE")
    os.environ["OGR_CURRENT_DATE"] = GPKG_TIMESTAMP
    try:
        gdf.to_file(path, layer=layer, driver="GPKG", engine="pyogrio")
    finally:
        if previous is None:
            del os.environ["OGR_CURRENT_DATE"]
        else:
            os.environ["OGR_CURRENT_DATE"] = previous


def write_outputs(out: Path, terrain: Terrain, layers: Layers, parcels: list[Parcel], seed: int) -> None:
    """Write every demo file into ``out`` (created if missing; files are replaced)."""
    out.mkdir(parents=True, exist_ok=True)
    n = terrain.elev_m.shape[0]
    cell = terrain.cell_m
    profile = {
        "driver": "GTiff",
        "width": n,
        "height": n,
        "count": 1,
        "dtype": "float32",
        "crs": CRS,
        "transform": Affine(cell, 0.0, ORIGIN_X_M, 0.0, -cell, ORIGIN_Y_M),
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
        "compress": "deflate",
        "predictor": 3,
        "zlevel": 9,
    }
    with rasterio.open(out / "dem.tif", "w", **profile) as dst:
        dst.write(terrain.elev_m, 1)
        dst.set_band_description(1, "elevation")
        dst.set_band_unit(1, "metre")
        dst.update_tags(
            TIFFTAG_IMAGEDESCRIPTION="Synthetic DEM of the invented town of Alderwane (landcheck demo)",
            generator=f"scripts/make_demo_area.py --seed {seed} --size {n}",
        )

    pid = np.arange(1001, 1001 + len(parcels), dtype=np.int64)
    owner_rng = np.random.default_rng([seed, 2])
    owners = owner_rng.integers(1, int(len(parcels) * 0.8) + 1, size=len(parcels))
    gdf = gpd.GeoDataFrame(
        {
            "parcel_id": pid,
            "zoning": [p.zoning for p in parcels],
            "owner_ref": [f"AW-{int(o):04d}" for o in owners],
        },
        geometry=[_to_world(p.geom) for p in parcels],
        crs=CRS,
    )
    _write_gpkg(gdf, out / "parcels.gpkg", "parcels")

    shore = gpd.GeoDataFrame({"name": ["Corrin Bay shore"]}, geometry=[_to_world(layers.shoreline)], crs=CRS)
    _write_gpkg(shore, out / "shoreline.gpkg", "shoreline")

    rivers = gpd.GeoDataFrame(
        {
            "name": ["Tamsel River", "Tamsel River"],
            "reach": ["upper", "lower"],
            "width_m": [WIDTH_UPPER_M, WIDTH_LOWER_M],
        },
        geometry=[_to_world(layers.river_upper), _to_world(layers.river_lower)],
        crs=CRS,
    )
    _write_gpkg(rivers, out / "rivers.gpkg", "rivers")

    flood = gpd.GeoDataFrame(
        {"hazard_level": np.array([lvl for _, lvl in layers.flood], dtype=np.int32)},
        geometry=[_to_world(g) for g, _ in layers.flood],
        crs=CRS,
    )
    _write_gpkg(flood, out / "flood_hazard.gpkg", "flood_hazard")

    (out / "rulebook.toml").write_text(RULEBOOK_TOML, encoding="utf-8")


def build(seed: int, size: int):
    """Generate everything in memory: (terrain, layers, parcels)."""
    terrain = make_terrain(seed, size)
    layers = make_layers(terrain)
    parcels = make_parcels(terrain, layers, seed)
    return terrain, layers, parcels


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description="Generate the invented Alderwane demo area (DEM, parcels, layers, rulebook).",
        epilog="Example: python scripts/make_demo_area.py --seed 7 --out demo_area",
    )
    parser.add_argument("--seed", type=int, default=7, help="random seed (default: 7)")
    parser.add_argument("--out", type=Path, default=Path("demo_area"), help="output folder (default: demo_area)")
    parser.add_argument(
        "--size",
        type=int,
        default=1000,
        help="DEM cells per side over the fixed 10 km square (default: 1000 = 10 m cells)",
    )
    args = parser.parse_args(argv)
    if args.size < 100:
        parser.error("--size must be at least 100 cells")
    terrain, layers, parcels = build(args.seed, args.size)
    write_outputs(args.out, terrain, layers, parcels, args.seed)
    print(f"wrote {args.out} ({len(parcels)} parcels, DEM {args.size} x {args.size} cells)", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
