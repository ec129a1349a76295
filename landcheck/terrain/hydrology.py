"""Hydrology kernels for the hazard zones: sea, sea-level-rise inundation, flow routing, HAND.

Unlike the slope kernels these are *global* operations: whether a cell is
flooded or where its water goes depends on cells far away.  The functions here
take the whole raster as one array: the reference forms for small rasters and
tests.  The audit runs the same steps by tiles (:mod:`~landcheck.terrain.tiled_components`,
:mod:`~landcheck.terrain.tiled_routing`), tested equal to these.  They are pure: arrays
and scalars in, new arrays out; inputs are never modified; nothing is logged.

Conventions
-----------
* ``elev_m`` is a 2-D float array of elevations in metres, NaN for nodata.
  Infinite values are refused.
* Rows run from the top of the raster down, as in the GeoTIFF; ``transform``
  is the raster's affine pixel-to-CRS transform.
* Connectivity is 8-neighbour unless stated (a cell touches the sea through a
  shared corner as well as a shared side).

What is computed
----------------
``sea_mask``
    Cells at or below a datum that are connected to the raster edge (or to
    seed cells given by the user).
``inundation_masks``
    "Bathtub with hydrological connectivity": for each water level, the cells
    at or below it that are connected to the sea (Poulter & Halpin 2008).
``flow_directions``
    Priority-Flood depression filling (Barnes et al. 2014) followed by
    steepest-descent D8 directions (O'Callaghan & Mark 1984) on the filled
    surface, flats towards their exits: the kernels of
    :mod:`landcheck.terrain.tiled_routing` on one tile.
``upstream_area_m2``, ``stream_mask``
    Contributing area and a drainage network by an area threshold.
``hand_m``
    Height Above the Nearest Drainage (Renno et al. 2008).
``streams_to_lines``, ``mask_to_polygons``, ``mask_boundary_lines``
    Vector versions of the derived features so users can inspect them.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from affine import Affine
from scipy import ndimage

from landcheck.errors import InputDataError
from landcheck.geo.grid import GridSpec
from landcheck.geo.shapes import mask_parts

_IDENTITY = Affine.identity()

__all__ = [
    "FlowRouting",
    "sea_mask",
    "inundation_masks",
    "flow_directions",
    "upstream_area_m2",
    "stream_mask",
    "hand_m",
    "streams_to_lines",
    "mask_to_polygons",
    "mask_boundary_lines",
]

#: pyflwdir D8 codes: the cell drains to the neighbour at (row + dr, col + dc)
_D8_PIT = np.uint8(0)
_D8_NODATA = np.uint8(247)
#: (dr, dc, code); cardinal neighbours first, so that when two neighbours give the
#: very same descent the cardinal one wins, then N-E-S-W order (documented tie rule)
_D8_NEIGHBOURS = (
    (-1, 0, 64),
    (0, 1, 1),
    (1, 0, 4),
    (0, -1, 16),
    (-1, 1, 128),
    (1, 1, 2),
    (1, -1, 8),
    (-1, -1, 32),
)


# --------------------------------------------------------------------------- checks


def _elevation(elev_m, name: str = "elev_m") -> np.ndarray:
    """Return ``elev_m`` as a new float64 2-D array, refusing unusable input."""
    z = np.array(elev_m, dtype=np.float64, copy=True)
    if z.ndim != 2 or z.shape[0] < 1 or z.shape[1] < 1:
        raise InputDataError(f"{name}: expected a 2-D elevation array, got shape {z.shape}.")
    if np.isinf(z).any():
        n = int(np.isinf(z).sum())
        raise InputDataError(f"{name}: {n} cells hold infinite elevations; mark missing cells as nodata (NaN) instead.")
    if np.isnan(z).all():
        raise InputDataError(
            f"{name}: every cell of the {z.shape[0]} x {z.shape[1]} DEM is nodata; "
            "check the nodata value and that the DEM covers the area of interest."
        )
    return z


def _mask(mask, shape: tuple[int, int], name: str) -> np.ndarray:
    m = np.asarray(mask)
    if m.shape != shape:
        raise InputDataError(f"{name}: shape {m.shape} does not match the DEM shape {shape}.")
    if m.dtype != bool:
        raise InputDataError(f"{name}: expected a boolean mask, got dtype {m.dtype}.")
    return m


def _structure(connectivity: int) -> np.ndarray:
    if connectivity == 8:
        return np.ones((3, 3), dtype=bool)
    if connectivity == 4:
        return ndimage.generate_binary_structure(2, 1)
    raise InputDataError(f"connectivity: got {connectivity!r}; choose 8 (corner contact counts) or 4.")


def _finite_number(value, name: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise InputDataError(f"{name}: got {value!r}; expected a number of metres.") from None
    if not np.isfinite(v):
        raise InputDataError(f"{name}: got {value!r}; expected a finite number of metres.")
    return v


# --------------------------------------------------------------------------- sea and sea-level rise


def sea_mask(
    elev_m: np.ndarray,
    datum_m: float = 0.0,
    *,
    seed_cells: Iterable[tuple[int, int]] | None = None,
    nodata_is_sea: bool = False,
    connectivity: int = 8,
) -> np.ndarray:
    """Cells of the sea: at or below the datum and connected to the open sea.

    A cell is sea when its elevation is ``<= datum_m`` and it is connected,
    through such cells, to a seed.  By default the seeds are every such cell on
    the outer edge of the raster, so an inland basin below the datum that does
    not reach the edge is *not* sea.  Give ``seed_cells`` when the open sea
    does not reach the raster edge, or when only part of the edge is sea.

    Parameters
    ----------
    elev_m : ndarray, shape (rows, cols)
        Elevations in metres relative to the same vertical datum as
        ``datum_m``; NaN for nodata.
    datum_m : float, default 0.0
        Still-water level in metres that defines the present sea (for example
        mean sea level or mean higher high water expressed in the DEM's datum).
    seed_cells : iterable of (row, col), optional
        Cells known to be open sea (0-based row and column).  Each must lie
        inside the raster and be a candidate sea cell (at or below the datum,
        or nodata when ``nodata_is_sea``).
    nodata_is_sea : bool, default False
        Treat nodata cells as candidate sea cells (DEMs that blank out the
        sea).  Otherwise nodata is never sea.
    connectivity : {8, 4}, default 8
        Neighbourhood for connectedness.

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        True for sea cells.

    Raises
    ------
    InputDataError
        No valid cells, a seed outside the raster, or a seed that is not at
        or below the datum.

    Examples
    --------
    >>> import numpy as np
    >>> z = np.array([[-1.0, 2.0, 2.0, 2.0],
    ...               [-1.0, 2.0, -3.0, 2.0],
    ...               [-1.0, 2.0, 2.0, 2.0]])
    >>> sea_mask(z).astype(int)
    array([[1, 0, 0, 0],
           [1, 0, 0, 0],
           [1, 0, 0, 0]])
    """
    z = _elevation(elev_m)
    datum = _finite_number(datum_m, "datum_m")
    structure = _structure(connectivity)
    nodata = np.isnan(z)
    with np.errstate(invalid="ignore"):
        candidate = z <= datum
    if nodata_is_sea:
        candidate |= nodata

    if seed_cells is None:
        seeds = np.zeros_like(candidate)
        seeds[0, :] = seeds[-1, :] = True
        seeds[:, 0] = seeds[:, -1] = True
        seeds &= candidate
    else:
        seeds = np.zeros_like(candidate)
        rows, cols = z.shape
        for k, cell in enumerate(seed_cells, start=1):
            try:
                r, c = (int(v) for v in cell)
            except (TypeError, ValueError):
                raise InputDataError(
                    f"sea seed point {k}: got {cell!r}; expected a (row, col) pair of integers."
                ) from None
            if not (0 <= r < rows and 0 <= c < cols):
                raise InputDataError(
                    f"sea seed point {k} at (row {r}, col {c}) lies outside the DEM "
                    f"({rows} rows x {cols} cols); move it onto open water inside the DEM "
                    "or leave the seeds out to use the raster edge."
                )
            if not candidate[r, c]:
                what = "nodata" if nodata[r, c] else f"at {z[r, c]:g} m"
                raise InputDataError(
                    f"sea seed point {k} at (row {r}, col {c}) is {what}, not at or below the "
                    f"datum {datum:g} m; move it onto open water"
                    + (" or set nodata_is_sea" if nodata[r, c] else "")
                    + "."
                )
            seeds[r, c] = True
    return ndimage.binary_propagation(seeds, structure=structure, mask=candidate)


def _scenario_rises(rises_m) -> np.ndarray:
    try:
        rises = np.array(rises_m, dtype=np.float64).ravel()
    except (TypeError, ValueError):
        raise InputDataError(
            f"sea-level scenarios: got {rises_m!r}; expected a list of rises in metres, e.g. [0.5, 1.0, 2.0]."
        ) from None
    if rises.size == 0:
        raise InputDataError("sea-level scenarios: the list of rises is empty; give at least one rise in metres.")
    for k, r in enumerate(rises, start=1):
        if not np.isfinite(r) or r < 0:
            raise InputDataError(
                f"sea-level scenario {k}: rise {r:g} m is not a finite, non-negative number of metres."
            )
        if k > 1 and r <= rises[k - 2]:
            raise InputDataError(
                f"sea-level scenario {k}: rise {r:g} m is not greater than scenario {k - 1} "
                f"({rises[k - 2]:g} m); list the rises once each in increasing order, e.g. [0.5, 1.0, 2.0]."
            )
    return rises


def inundation_masks(
    elev_m: np.ndarray,
    sea: np.ndarray,
    rises_m: Sequence[float],
    *,
    surge_m: float = 0.0,
    datum_m: float = 0.0,
    connectivity: int = 8,
) -> list[np.ndarray]:
    """Water extent for each sea-level-rise scenario, with hydrological connectivity.

    For scenario ``k`` the water level is ``datum_m + rises_m[k] + surge_m``.
    A cell is under water when it belongs to ``sea``, or when its elevation is
    at or below the level *and* it is connected to the sea through cells that
    are themselves under water (Poulter & Halpin 2008, "bathtub with
    connectivity").  A basin below the level that is shut off by ground above
    the level stays dry.

    Parameters
    ----------
    elev_m : ndarray, shape (rows, cols)
        Elevations in metres on the datum of ``datum_m``; NaN for nodata.
        Nodata cells outside ``sea`` never flood (their height is unknown).
    sea : ndarray of bool, shape (rows, cols)
        Present sea, e.g. from :func:`sea_mask`.  Always part of the result.
        When it is empty, nothing floods.
    rises_m : sequence of float
        Sea-level rise of each scenario in metres; non-negative and strictly
        increasing.
    surge_m : float, default 0.0
        Extra water height in metres (storm surge, tide) added to every
        scenario; non-negative.
    datum_m : float, default 0.0
        Present still-water level in metres (the one ``sea`` was made with).
    connectivity : {8, 4}, default 8
        Neighbourhood for connectedness.  8 lets water pass between two cells
        that touch only at a corner.

    Returns
    -------
    list of ndarray of bool
        One mask per scenario, in the order of ``rises_m``, each True for sea
        plus flooded land.  Masks are nested: each contains the previous one.
        Flooded land alone is ``mask & ~sea``.

    Raises
    ------
    InputDataError
        Rises empty, negative, not finite or not strictly increasing (the
        message names the scenario); bad surge or datum; shape mismatch.

    Examples
    --------
    A 1 m rise floods the coastal cell at 0.5 m but not the hollow at -2 m
    behind the 3 m ridge:

    >>> import numpy as np
    >>> z = np.array([[-1.0, 0.5, 3.0, -2.0, 3.0]])
    >>> sea = np.array([[True, False, False, False, False]])
    >>> inundation_masks(z, sea, [1.0])[0].astype(int)
    array([[1, 1, 0, 0, 0]])
    """
    z = _elevation(elev_m)
    sea = _mask(sea, z.shape, "sea")
    rises = _scenario_rises(rises_m)
    surge = _finite_number(surge_m, "surge_m")
    if surge < 0:
        raise InputDataError(f"surge_m: got {surge:g} m; a surge height must be zero or positive.")
    datum = _finite_number(datum_m, "datum_m")
    structure = _structure(connectivity)

    masks: list[np.ndarray] = []
    water = sea.copy()
    for rise in rises:
        level_m = datum + rise + surge
        with np.errstate(invalid="ignore"):
            wet_if_connected = (z <= level_m) | sea
        # grow from the previous (lower) level: it is a subset of this level's
        # candidates, so the result is the same and the masks are nested by construction
        water = ndimage.binary_propagation(water, structure=structure, mask=wet_if_connected)
        masks.append(water.copy())
    return masks


# --------------------------------------------------------------------------- flow routing


@dataclass(frozen=True)
class FlowRouting:
    """D8 flow routing of a DEM and the surface it was derived from.

    Attributes
    ----------
    flw : pyflwdir.FlwdirRaster
        The flow-direction network (D8, pyflwdir's encoding); use its methods
        for anything not wrapped here.
    conditioned_m : ndarray of float64, shape (rows, cols)
        Depression-filled elevation in metres (NaN where the DEM is nodata or
        masked as an outlet).  Values are the DEM's rounded to float32
        (about 0.06 mm at 1000 m) so that filling and direction choice compare
        identical numbers.
    fill_depth_m : ndarray of float64, shape (rows, cols)
        ``conditioned_m`` minus the DEM in metres: depth of each closed
        depression that filling removed (0 elsewhere, NaN on nodata).
    valid : ndarray of bool, shape (rows, cols)
        Cells that take part in the routing.
    """

    flw: object
    conditioned_m: np.ndarray
    elevation32_m: np.ndarray  # the DEM as float32, the values filling started from
    valid: np.ndarray

    @property
    def fill_depth_m(self) -> np.ndarray:
        """Depth of the filled depressions in metres (computed on request, not held)."""
        with np.errstate(invalid="ignore"):
            return np.where(self.valid, self.conditioned_m - self.elevation32_m.astype(np.float64), np.nan)

    @property
    def shape(self) -> tuple[int, int]:
        return self.conditioned_m.shape

    @property
    def transform(self) -> Affine:
        return self.flw.transform


def _row_cell_sizes_m(shape, transform: Affine, latlon: bool, cell_size_m):
    rows = shape[0]
    if cell_size_m is not None:
        try:
            hx, hy = cell_size_m
        except (TypeError, ValueError):
            raise InputDataError("cell_size_m: expected a pair (east-west, north-south) in metres.") from None
        hx = np.broadcast_to(np.asarray(hx, dtype=np.float64), (rows,)).copy()
        hy = np.broadcast_to(np.asarray(hy, dtype=np.float64), (rows,)).copy()
    elif latlon:
        # no CRS here: WGS84; callers with a grid pass its own ellipsoid's sizes as cell_size_m
        grid = GridSpec(transform, "", shape[1], rows, geographic=True)
        hx, hy = grid.cell_size_m(np.arange(rows))
    else:
        # projected: only the ratio matters for choosing a direction, so the CRS unit cancels
        hx = np.full(rows, abs(transform.a))
        hy = np.full(rows, abs(transform.e))
    if not (np.all(np.isfinite(hx)) and np.all(np.isfinite(hy)) and np.all(hx > 0) and np.all(hy > 0)):
        raise InputDataError("cell sizes must be finite and positive; check the DEM transform.")
    return hx, hy


def _steepest_d8_numpy(z: np.ndarray, hx: np.ndarray, hy: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Steepest-descent D8 in NumPy: the reference the compiled :func:`tiled_routing_loops.d8_codes` is tested against."""
    rows, cols = z.shape
    zp = np.pad(z, 1, constant_values=np.nan)
    hx2 = hx[:, None]
    hy2 = hy[:, None]
    hd2 = np.hypot(hx2, hy2)
    best = np.zeros(z.shape, dtype=np.float64)
    code = np.zeros(z.shape, dtype=np.uint8)
    with np.errstate(invalid="ignore"):
        for dr, dc, d8 in _D8_NEIGHBOURS:
            dist = hd2 if (dr and dc) else (hy2 if dr else hx2)
            zn = zp[1 + dr : 1 + dr + rows, 1 + dc : 1 + dc + cols]
            descent = (z - zn) / dist  # NaN where the neighbour is nodata or outside
            steeper = descent > best  # strict: the first of equal descents is kept
            best = np.where(steeper, descent, best)
            code = np.where(steeper, np.uint8(d8), code)
    return code, best > 0


def flow_directions(
    elev_m: np.ndarray,
    transform: Affine = _IDENTITY,
    *,
    latlon: bool = False,
    cell_size_m: tuple | None = None,
    outlet_mask: np.ndarray | None = None,
) -> FlowRouting:
    """Condition a DEM and derive D8 flow directions on it.

    Steps:

    1. Fill every closed depression to its spill level by Priority-Flood
       (:func:`landcheck.terrain.tiled_fill.fill_whole`, tested equal to
       ``pyflwdir.dem.fill_depressions``).  Water may leave
       the area only through *edge cells*: cells on the raster border or next
       to a nodata cell.  Give ``outlet_mask`` (for example the sea mask) to
       turn more cells into nodata so that the coast drains.
    2. Each cell drains to the neighbour with the steepest descent on the
       filled surface, the drop divided by the distance between cell centres
       (cell size for side neighbours, the diagonal for corner neighbours;
       O'Callaghan & Mark 1984).  Ties go to side neighbours, then in the
       order N, E, S, W, NE, SE, SW, NW.
    3. A cell with no strictly lower neighbour is an outlet (pit) when it is
       an edge cell; inside the area it lies on a flat left by filling and
       drains to its first neighbour (same order) of the same height that is
       one step nearer the flat's nearest exit (a cell of that height with a
       lower neighbour, or an edge cell).

    These are the kernels of :mod:`landcheck.terrain.tiled_routing` on one
    tile, so the tiled audit gives the same directions.

    Parameters
    ----------
    elev_m : ndarray, shape (rows, cols)
        Elevations in metres; NaN for nodata.
    transform : affine.Affine
        Pixel-to-CRS transform of the raster (north-up).
    latlon : bool, default False
        True when the CRS is geographic (degrees); cell sizes in metres are
        then taken per row on the WGS84 ellipsoid
        (:meth:`landcheck.geo.grid.GridSpec.cell_size_m`), unless ``cell_size_m`` is given.
    cell_size_m : (hx, hy), optional
        East-west and north-south cell size in metres, scalars or one value
        per row (as :meth:`landcheck.geo.grid.GridSpec.cell_size_m` returns).
    outlet_mask : ndarray of bool, optional
        Cells to leave out of the routing, so that water reaching them leaves
        the area (the sea, a lake mapped from another source).

    Returns
    -------
    FlowRouting
        Directions, the conditioned surface and its fill depths.

    Raises
    ------
    InputDataError
        No valid cells, infinite values, bad cell sizes or mask shape.
    """
    import pyflwdir

    z = _elevation(elev_m)
    if outlet_mask is not None:
        z[_mask(outlet_mask, z.shape, "outlet_mask")] = np.nan
    valid = ~np.isnan(z)
    if not valid.any():
        raise InputDataError("elev_m: no valid cells are left once outlet_mask is removed.")
    hx, hy = _row_cell_sizes_m(z.shape, transform, latlon, cell_size_m)

    # Work on float32 values: filling and the descent test compare identical numbers.  The same
    # kernels as the tiled routing (one tile covering the raster), so both give the same directions.
    from landcheck.terrain import tiled_routing as tr
    from landcheck.terrain import tiled_routing_loops as loops
    from landcheck.terrain.tiled_fill import fill_whole

    z32 = z.astype(np.float32)
    del z
    filled32 = fill_whole(z32)
    conditioned = np.where(valid, filled32.astype(np.float64), np.nan)
    zh = np.pad(filled32, 1, constant_values=np.nan)
    far = np.full(zh.shape, loops.FAR, np.int32)
    dist, _ = loops.flat_distances(zh, far, tr.DRS, tr.DCS)
    pad_rows = np.concatenate([hx[:1], hx, hx[-1:]]), np.concatenate([hy[:1], hy, hy[-1:]])
    d8, stranded = loops.d8_codes(zh, dist, pad_rows[0], pad_rows[1], tr.DRS, tr.DCS, tr.CODES)
    if stranded:  # never on a filled surface
        raise RuntimeError(f"{stranded} flat cells found no exit after filling")
    flw = pyflwdir.from_array(d8, ftype="d8", check_ftype=False, transform=transform, latlon=latlon)
    return FlowRouting(flw=flw, conditioned_m=conditioned, elevation32_m=z32, valid=valid)


def upstream_area_m2(routing: FlowRouting, cell_area_m2) -> np.ndarray:
    """Contributing (upstream) area of every cell, the cell itself included.

    Parameters
    ----------
    routing : FlowRouting
        From :func:`flow_directions`.
    cell_area_m2 : float or ndarray
        Area of one cell in m^2: a scalar (projected grid), one value per row
        (geographic grid, e.g. :meth:`landcheck.geo.grid.GridSpec.cell_area_m2`)
        or a full (rows, cols) array.

    Returns
    -------
    ndarray of float64, shape (rows, cols)
        Upstream area in m^2; NaN outside the routing.
    """
    rows, cols = routing.shape
    a = np.asarray(cell_area_m2, dtype=np.float64)
    if a.ndim == 1:
        if a.shape != (rows,):
            raise InputDataError(f"cell_area_m2: {a.shape[0]} row values for a raster of {rows} rows.")
        a = a[:, None]
    try:
        area = np.broadcast_to(a, (rows, cols)).copy()
    except ValueError:
        raise InputDataError(f"cell_area_m2: shape {a.shape} does not fit the raster {(rows, cols)}.") from None
    if not np.all(np.isfinite(area[routing.valid])) or np.any(area[routing.valid] <= 0):
        raise InputDataError("cell_area_m2: cell areas must be finite and positive.")
    area[~routing.valid] = 0.0
    # summed as integer counts of AREA_UNIT_M2: exact, so the sum does not depend on the order of
    # the terms and the tiled routing gives the same areas (and the same stream cells)
    from landcheck.terrain.tiled_routing import AREA_UNIT_M2, area_units

    acc = routing.flw.accuflux(area_units(area), nodata=-1)
    return np.where(routing.valid, acc * AREA_UNIT_M2, np.nan)


def stream_mask(upstream_area_m2: np.ndarray, threshold_m2: float) -> np.ndarray:
    """Drainage cells: upstream area at or over a channel-initiation threshold.

    Parameters
    ----------
    upstream_area_m2 : ndarray
        From :func:`upstream_area_m2`, NaN outside the routing.
    threshold_m2 : float
        Contributing area in m^2 at which a channel starts (positive).  No
        universal value exists: it depends on climate, soils and the DEM
        (Renno et al. 2008 used area thresholds; choose per region).

    Returns
    -------
    ndarray of bool
        True where ``upstream_area_m2 >= threshold_m2``.
    """
    t = _finite_number(threshold_m2, "threshold_m2")
    if t <= 0:
        raise InputDataError(f"threshold_m2: got {t:g} m2; the channel-initiation area must be positive.")
    from landcheck.terrain.tiled_routing import area_units, threshold_units

    a = np.asarray(upstream_area_m2, dtype=np.float64)
    ok = np.isfinite(a)
    # compared as integer counts of the unit the areas were summed in (as the tiled routing does)
    return ok & (area_units(np.where(ok, a, 0.0)) >= threshold_units(t))


def hand_m(
    elev_m: np.ndarray,
    routing: FlowRouting,
    streams: np.ndarray,
    *,
    outlets_drain: bool = False,
) -> np.ndarray:
    """Height Above the Nearest Drainage (HAND, Renno et al. 2008).

    Follow the D8 path from each cell to the first drainage cell on it; HAND
    is ``elev_m`` of the cell minus ``elev_m`` of that drainage cell.
    Drainage cells have HAND 0.

    Which surface: pass ``routing.conditioned_m`` (recommended).  Renno et
    al. derive HAND from the depression-filled DEM; on it heights never rise
    along a flow path, so HAND is never negative and never decreases going
    upstream.  A cell inside a filled depression then gets the height of the
    depression's spill point above the drain, which is the river stage at
    which water from the drain can first reach it.  Passing the original DEM
    instead gives the ground height of such cells, which can be negative
    (below the drain); ``routing.fill_depth_m`` shows where the two differ.

    Parameters
    ----------
    elev_m : ndarray, shape (rows, cols)
        Heights in metres to difference (see above).
    routing : FlowRouting
        From :func:`flow_directions` on the same DEM.
    streams : ndarray of bool, shape (rows, cols)
        Drainage cells, e.g. from :func:`stream_mask`.
    outlets_drain : bool, default False
        Also count outlets (raster border, coast, nodata edge) as drainage.
        By default a cell whose path leaves the area without meeting a
        drainage cell gets NaN: its drain lies outside the data.

    Returns
    -------
    ndarray of float32, shape (rows, cols)
        HAND in metres; NaN outside the routing and where no drainage is
        reached.
    """
    z = np.asarray(elev_m, dtype=np.float64)
    if z.shape != routing.shape:
        raise InputDataError(f"elev_m: shape {z.shape} does not match the routing shape {routing.shape}.")
    drains = _mask(streams, routing.shape, "streams").ravel() & routing.valid.ravel()

    n = drains.size
    itype = np.int32 if n < 2**31 else np.int64  # half the bytes per cell; same indices
    own = np.arange(n, dtype=itype)
    idxs_ds = np.asarray(routing.flw.idxs_ds).astype(itype, copy=False)
    valid = routing.valid.ravel()
    nxt = np.where(valid, idxs_ds, own)
    stop = drains | (nxt == own)  # drainage cells and outlets end a path
    nxt = np.where(stop, own, nxt)
    # pointer jumping: after k rounds each cell points 2**k steps down its path,
    # or to the path's end; about log2(longest path) rounds in all
    while True:
        jumped = nxt[nxt]
        if np.array_equal(jumped, nxt):
            break
        nxt = jumped
    reached = drains[nxt] | (outlets_drain & valid[nxt])
    zf = z.ravel()
    with np.errstate(invalid="ignore"):
        h = zf - zf[nxt]
    h[~(reached & valid)] = np.nan
    return h.reshape(routing.shape).astype(np.float32)


# --------------------------------------------------------------------------- vector outputs


def _empty_frame(columns: dict, crs):
    import geopandas as gpd

    return gpd.GeoDataFrame({k: np.array([], dtype=v) for k, v in columns.items()}, geometry=[], crs=crs)


def _cell_centres(idxs: np.ndarray, cols: int, transform: Affine) -> np.ndarray:
    r, c = np.divmod(idxs, cols)
    t = transform
    x = t.a * (c + 0.5) + t.b * (r + 0.5) + t.c
    y = t.d * (c + 0.5) + t.e * (r + 0.5) + t.f
    return np.column_stack([x, y])


def streams_to_lines(
    routing: FlowRouting,
    streams: np.ndarray,
    crs,
    *,
    upstream_area_m2: np.ndarray | None = None,
):
    """Drainage network as LineStrings, one per segment between confluences.

    Each line runs downstream through cell centres and ends on the first cell
    of the segment it joins (or on its outlet), so the lines connect.  A
    stream of a single cell has no line.

    Parameters
    ----------
    routing : FlowRouting
        From :func:`flow_directions`.
    streams : ndarray of bool
        Drainage cells, e.g. from :func:`stream_mask`.
    crs : pyproj.CRS, str or int
        CRS of the raster, attached to the result.
    upstream_area_m2 : ndarray, optional
        Adds column ``upstream_area_m2``: the area at the segment's last own
        cell (just above the confluence or at the outlet).

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``segment_id``, ``strahler_order``, ``n_cells`` (cells of the
        segment itself), ``ends_at_outlet``, optionally ``upstream_area_m2``,
        and ``geometry``.
    """
    import geopandas as gpd
    import shapely
    from pyflwdir import streams as pfstreams

    mask = _mask(streams, routing.shape, "streams") & routing.valid
    columns = {"segment_id": np.int64, "strahler_order": np.int64, "n_cells": np.int64, "ends_at_outlet": bool}
    if upstream_area_m2 is not None:
        columns["upstream_area_m2"] = np.float64
    if not mask.any():
        return _empty_frame(columns, crs)

    flw = routing.flw
    idxs_ds = np.asarray(flw.idxs_ds)
    order = np.asarray(flw.stream_order(type="strahler", mask=mask)).ravel()
    paths = pfstreams.streams(idxs_ds=flw.idxs_ds, seq=flw.idxs_seq, mask=mask.ravel())
    rows_out = {k: [] for k in columns}
    geoms = []
    cols = routing.shape[1]
    upa = None if upstream_area_m2 is None else np.asarray(upstream_area_m2, dtype=np.float64).ravel()
    for path in paths:
        path = np.asarray(path)
        if path.size < 2 or path[0] == path[-1]:
            continue  # single-cell stream or pyflwdir's zero-length outlet marker
        last = int(path[-1])
        at_outlet = bool(idxs_ds[last] == last)
        own_last = last if at_outlet else int(path[-2])
        n_own = path.size if at_outlet else path.size - 1
        geoms.append(shapely.LineString(_cell_centres(path, cols, routing.transform)))
        rows_out["segment_id"].append(len(geoms) - 1)
        rows_out["strahler_order"].append(int(order[int(path[0])]))
        rows_out["n_cells"].append(n_own)
        rows_out["ends_at_outlet"].append(at_outlet)
        if upa is not None:
            rows_out["upstream_area_m2"].append(float(upa[own_last]))
    if not geoms:
        return _empty_frame(columns, crs)
    data = {k: np.asarray(v, dtype=columns[k]) for k, v in rows_out.items()}
    return gpd.GeoDataFrame(data, geometry=geoms, crs=crs)


def _to_crs_coords(geoms, transform: Affine):
    import shapely

    t = transform
    return [shapely.affinity.affine_transform(g, [t.a, t.b, t.d, t.e, t.c, t.f]) for g in geoms]


def mask_to_polygons(mask: np.ndarray, transform: Affine, crs):
    """Polygons outlining the True cells of a mask (e.g. sea or an inundation zone).

    Cells are joined through shared sides; parts that touch only at a corner
    become separate polygons (the covered area is the same).  Vertices lie
    exactly on cell corners.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
        Cells to outline.
    transform : affine.Affine
        Pixel-to-CRS transform of the raster.
    crs : pyproj.CRS, str or int
        CRS attached to the result.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``part_id``, ``n_cells`` and ``geometry`` (Polygon, holes
        kept); no rows for an empty mask.
    """
    import geopandas as gpd

    m = np.asarray(mask)
    if m.ndim != 2 or m.dtype != bool:
        raise InputDataError(f"mask: expected a 2-D boolean array, got shape {m.shape} and dtype {m.dtype}.")
    columns = {"part_id": np.int64, "n_cells": np.int64}
    if not m.any():
        return _empty_frame(columns, crs)
    pixel = mask_parts(m)
    n_cells = np.array([round(p.area) for p in pixel], dtype=np.int64)
    geoms = _to_crs_coords(pixel, transform)
    return gpd.GeoDataFrame(
        {"part_id": np.arange(len(geoms), dtype=np.int64), "n_cells": n_cells}, geometry=geoms, crs=crs
    )


def mask_boundary_lines(mask: np.ndarray, transform: Affine, crs):
    """Boundary of a mask as lines, leaving out the raster's own outer edge.

    For a sea mask this is the derived shoreline: every cell side between a
    sea cell and a non-sea cell inside the raster, merged into continuous
    lines.  Sides on the raster border are not part of it.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
        Cells inside the boundary.
    transform : affine.Affine
        Pixel-to-CRS transform of the raster.
    crs : pyproj.CRS, str or int
        CRS attached to the result.

    Returns
    -------
    geopandas.GeoDataFrame
        Columns ``line_id`` and ``geometry`` (LineString); no rows when the
        mask is empty or full.
    """
    import geopandas as gpd
    import shapely

    m = np.asarray(mask)
    if m.ndim != 2 or m.dtype != bool:
        raise InputDataError(f"mask: expected a 2-D boolean array, got shape {m.shape} and dtype {m.dtype}.")
    columns = {"line_id": np.int64}
    if not m.any() or m.all():
        return _empty_frame(columns, crs)
    rows, cols = m.shape
    pixel = mask_parts(m)
    edges = shapely.union_all([p.boundary for p in pixel])
    frame = shapely.box(0, 0, cols, rows).boundary
    inner = shapely.line_merge(shapely.difference(edges, frame))
    parts = [g for g in shapely.get_parts(inner) if not g.is_empty and g.length > 0]
    if not parts:
        return _empty_frame(columns, crs)
    geoms = _to_crs_coords(parts, transform)
    return gpd.GeoDataFrame({"line_id": np.arange(len(geoms), dtype=np.int64)}, geometry=geoms, crs=crs)
