"""Terrain kernels: slope from a DEM window that carries a one-cell halo.

Pure functions on arrays.  The input ``elev`` is a float array of shape
``(rows + 2, cols + 2)`` in metres with NaN for invalid cells (nodata, or
outside the raster); ``hx`` and ``hy`` are the east-west and north-south cell
sizes in metres for each of the ``rows`` output rows.

Edge and nodata policy ("strict window"): a cell gets a slope only when the
cell itself and every neighbour the method reads are valid.  Otherwise the
output is NaN; it is never a silent zero.  On the outer ring of the raster the
halo is NaN, so the ring is NaN for Horn's method (which reads all eight
neighbours) and for Zevenbergen-Thorne (which reads the four edge neighbours).

Each formula is written once, in ``_horn_pq`` / ``_zt_pq``, as plain
arithmetic.  The NumPy path calls it on array slices; the compiled path calls
the very same function on scalars inside a numba loop, so the two backends
cannot drift apart (tests check they agree bit for bit).

The gradient magnitude is ``sqrt(p*p + q*q)`` in both backends (correctly rounded
square root; no fused multiply-add), not ``hypot``, which is several times slower and
gives no useful extra range for elevations.

Formulas (z1..z9 row by row from the north-west, p east, q north):
    Horn (1981):   p = ((z3 + 2 z6 + z9) - (z1 + 2 z4 + z7)) / (8 hx)
                   q = ((z1 + 2 z2 + z3) - (z7 + 2 z8 + z9)) / (8 hy)
    Zevenbergen & Thorne (1987):  p = (z6 - z4) / (2 hx),  q = (z2 - z8) / (2 hy)
"""

from __future__ import annotations

import numpy as np

from landcheck.choices import UserChoice

__all__ = [
    "SlopeMethod",
    "SlopeUnit",
    "slope_gradient",
    "gradient_to_unit",
    "HALO_CELLS",
]

#: cells of halo every slope kernel needs on each side
HALO_CELLS = 1


class SlopeMethod(UserChoice):
    """Finite-difference scheme for the surface gradient."""

    HORN = "horn"
    ZEVENBERGEN_THORNE = "zevenbergen-thorne"

    @classmethod
    def _aliases(cls) -> dict:
        return {
            "zt": "zevenbergen-thorne",
            "zevenbergenthorne": "zevenbergen-thorne",
            "zevenbergen_thorne": "zevenbergen-thorne",
        }

    @classmethod
    def _noun(cls) -> str:
        return "slope method"


class SlopeUnit(UserChoice):
    PERCENT = "percent"
    DEGREES = "degrees"

    @classmethod
    def _aliases(cls) -> dict:
        return {"pct": "percent", "%": "percent", "deg": "degrees", "degree": "degrees"}

    @classmethod
    def _noun(cls) -> str:
        return "slope unit"


def _horn_pq(z1, z2, z3, z4, z6, z7, z8, z9, hx, hy):
    p = ((z3 + 2.0 * z6 + z9) - (z1 + 2.0 * z4 + z7)) / (8.0 * hx)
    q = ((z1 + 2.0 * z2 + z3) - (z7 + 2.0 * z8 + z9)) / (8.0 * hy)
    return p, q


def _zt_pq(z1, z2, z3, z4, z6, z7, z8, z9, hx, hy):
    p = (z6 - z4) / (2.0 * hx)
    q = (z2 - z8) / (2.0 * hy)
    return p, q


_FORMULAS = {SlopeMethod.HORN: _horn_pq, SlopeMethod.ZEVENBERGEN_THORNE: _zt_pq}


def _gradient_numpy(elev: np.ndarray, hx: np.ndarray, hy: np.ndarray, method: SlopeMethod) -> np.ndarray:
    e = elev
    z1, z2, z3 = e[:-2, :-2], e[:-2, 1:-1], e[:-2, 2:]
    z4, z5, z6 = e[1:-1, :-2], e[1:-1, 1:-1], e[1:-1, 2:]
    z7, z8, z9 = e[2:, :-2], e[2:, 1:-1], e[2:, 2:]
    p, q = _FORMULAS[method](z1, z2, z3, z4, z6, z7, z8, z9, hx[:, None], hy[:, None])
    g = np.sqrt(p * p + q * q)
    # strict-window policy: the centre must be valid too (Horn does not read it; ZT ignores corners)
    g[np.isnan(z5)] = np.nan
    return g.astype(np.float32)


def _compiled_kernel(method: SlopeMethod):
    """The compiled loop for ``method`` (see :mod:`landcheck.terrain.slope_loops`).

    Loops are serial and release the GIL: parallelism comes from running
    several windows at once in worker threads (see :mod:`landcheck.engine.windows`).
    """
    from landcheck.terrain import slope_loops as _compiled

    return _compiled.horn_loop if method is SlopeMethod.HORN else _compiled.zt_loop


def slope_gradient(
    elev: np.ndarray,
    hx: np.ndarray,
    hy: np.ndarray,
    method: SlopeMethod | str = SlopeMethod.HORN,
    *,
    backend: str = "auto",
) -> np.ndarray:
    """Gradient magnitude (rise over run, dimensionless) of a haloed DEM window.

    Parameters
    ----------
    elev : ndarray, shape (rows + 2, cols + 2)
        Elevations in metres with a one-cell halo; NaN marks invalid cells.  float32 input is
        widened to float64 value by value (exact), so it gives the same result as its float64 copy.
    hx, hy : ndarray, shape (rows,)
        East-west and north-south cell size in metres of each output row.
    method : SlopeMethod or str
        ``"horn"`` (default) or ``"zevenbergen-thorne"``.
    backend : {"auto", "numpy", "compiled"}
        ``"compiled"`` runs the same formula in a compiled (numba) loop that releases the GIL.

    Returns
    -------
    ndarray, float32, shape (rows, cols)
        tan(slope angle); NaN where the strict-window policy gives no value.

    Examples
    --------
    A plane rising 1 m per 10 m eastwards has gradient 0.1 (10 %):

    >>> import numpy as np
    >>> x = np.arange(5) * 10.0
    >>> elev = np.tile(0.1 * x, (5, 1))
    >>> g = slope_gradient(elev, np.full(3, 10.0), np.full(3, 10.0))
    >>> float(g[1, 1])
    0.10000000149011612
    """
    method = SlopeMethod.from_user(method)
    elev = np.asarray(elev)
    if elev.dtype != np.float32:
        elev = elev.astype(np.float64, copy=False)
    hx = np.asarray(hx, dtype=np.float64)
    hy = np.asarray(hy, dtype=np.float64)
    rows, cols = elev.shape[0] - 2, elev.shape[1] - 2
    if rows < 1 or cols < 1 or hx.shape != (rows,) or hy.shape != (rows,):
        raise ValueError("elev must carry a one-cell halo and hx, hy one value per output row")
    if backend == "numpy" or (backend == "auto" and rows * cols < 4096):
        return _gradient_numpy(elev.astype(np.float64, copy=False), hx, hy, method)
    if backend not in ("auto", "compiled"):
        raise ValueError(f"unknown backend {backend!r}; choose auto, numpy or compiled")
    out = np.empty((rows, cols), dtype=np.float32)
    _compiled_kernel(method)(np.ascontiguousarray(elev), hx, hy, out)
    return out


def gradient_to_unit(gradient: np.ndarray, unit: SlopeUnit | str) -> np.ndarray:
    """Convert tan(slope) to percent (100 tan) or degrees (atan), keeping NaN and float32."""
    unit = SlopeUnit.from_user(unit)
    g = np.asarray(gradient, dtype=np.float32)
    if unit is SlopeUnit.PERCENT:
        return (g * np.float32(100.0)).astype(np.float32, copy=False)
    return np.degrees(np.arctan(g)).astype(np.float32, copy=False)
