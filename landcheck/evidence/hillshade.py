"""Relief shading of a gridded surface (Lambertian hillshade) for the maps."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["SUN_ALTITUDE_DEG", "SUN_AZIMUTH_DEG", "hillshade"]

#: sun position for relief shading: azimuth clockwise from north, altitude above horizon (degrees)
SUN_AZIMUTH_DEG = 315.0

SUN_ALTITUDE_DEG = 45.0


def hillshade(
    elev: np.ndarray,
    dx_m: float,
    dy_m: float,
    *,
    azimuth_deg: float = SUN_AZIMUTH_DEG,
    altitude_deg: float = SUN_ALTITUDE_DEG,
    north_up: bool = True,
) -> np.ndarray:
    """Lambertian illumination of a gridded surface (relief shading).

    The surface normal is (-p, -q, 1)/sqrt(1 + p^2 + q^2) with p = dz/dx (east)
    and q = dz/dy (north) from central differences; the sun vector is
    (sin A cos h, cos A cos h, sin h).  Their dot product, clipped at 0, is the
    brightness (Horn 1981, "Hill shading and the reflectance map").

    Parameters
    ----------
    elev : ndarray, 2-D
        Elevations; NaN gives NaN.  Same linear unit as ``dx_m`` and ``dy_m``.
    dx_m, dy_m : float
        Cell width and height (m), positive.
    azimuth_deg, altitude_deg : float
        Sun direction, clockwise from north, and height above the horizon (degrees).
    north_up : bool
        True when row 0 is the northern edge (the usual GeoTIFF layout).

    Returns
    -------
    ndarray, float32
        Brightness 0-1; flat ground gives sin(altitude).
    """
    z = np.asarray(elev, dtype=np.float64)
    alt, az = math.radians(altitude_deg), math.radians(azimuth_deg)
    if z.ndim != 2 or min(z.shape) < 2:
        return np.where(np.isnan(z), np.nan, math.sin(alt)).astype(np.float32)
    d_row, d_col = np.gradient(z)
    p = d_col / dx_m
    q = (-d_row if north_up else d_row) / dy_m
    num = math.sin(alt) - math.cos(alt) * (p * math.sin(az) + q * math.cos(az))
    return np.clip(num / np.sqrt(1.0 + p * p + q * q), 0.0, 1.0).astype(np.float32)
