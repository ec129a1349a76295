"""Ellipsoid formulas for cell sizes and cell areas on geographic rasters.

All functions are pure and vectorised.  Latitudes are in degrees.

Sources: Snyder, J.P. 1987, *Map Projections - A Working Manual*, USGS
Professional Paper 1395 (radii of curvature; authalic ``q`` function).
WGS84 constants from NIMA TR8350.2 (2000).
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "WGS84_A_M",
    "WGS84_INV_F",
    "meridian_radius_m",
    "prime_vertical_radius_m",
    "metres_per_degree_lon",
    "metres_per_degree_lat",
    "authalic_area_per_radian_m2",
    "band_area_m2",
]

WGS84_A_M = 6_378_137.0
WGS84_INV_F = 298.257223563
_F = 1.0 / WGS84_INV_F
_E2 = _F * (2.0 - _F)
_E = np.sqrt(_E2)


def meridian_radius_m(lat_deg, a_m: float = WGS84_A_M, e2: float = _E2):
    """Meridian radius of curvature M(phi) = a(1-e^2)/(1-e^2 sin^2 phi)^(3/2)."""
    s = np.sin(np.radians(lat_deg))
    return a_m * (1.0 - e2) / (1.0 - e2 * s * s) ** 1.5


def prime_vertical_radius_m(lat_deg, a_m: float = WGS84_A_M, e2: float = _E2):
    """Prime-vertical radius of curvature N(phi) = a/(1-e^2 sin^2 phi)^(1/2)."""
    s = np.sin(np.radians(lat_deg))
    return a_m / np.sqrt(1.0 - e2 * s * s)


def metres_per_degree_lon(lat_deg, a_m: float = WGS84_A_M, e2: float = _E2):
    """Length of one degree of longitude along the parallel at ``lat_deg``."""
    return np.radians(1.0) * prime_vertical_radius_m(lat_deg, a_m, e2) * np.cos(np.radians(lat_deg))


def metres_per_degree_lat(lat_deg, a_m: float = WGS84_A_M, e2: float = _E2):
    """Local length of one degree of latitude at ``lat_deg`` (pi/180 * M)."""
    return np.radians(1.0) * meridian_radius_m(lat_deg, a_m, e2)


def authalic_area_per_radian_m2(lat_rad, a_m: float = WGS84_A_M, e2: float = _E2):
    """``F(phi)``: ellipsoid area (m^2) between the equator and latitude ``phi`` (radians) per radian of longitude.

    F = (a^2 / 2) q(phi) with Snyder's authalic ``q`` (docs/references.md §12), written with ``arctanh``;
    a sphere (``e2 = 0``) gives a^2 sin(phi).

    >>> f"{4 * 3.141592653589793 * float(authalic_area_per_radian_m2(3.141592653589793 / 2)):.6e}"
    '5.100656e+14'
    """
    s = np.sin(lat_rad)
    if e2 == 0.0:
        return a_m * a_m * s
    e = np.sqrt(e2)
    return a_m * a_m * (1.0 - e2) / 2.0 * (s / (1.0 - e2 * s * s) + np.arctanh(e * s) / e)


def band_area_m2(lat1_deg, lat2_deg, dlon_deg, a_m: float = WGS84_A_M, e2: float = _E2):
    """Exact area of the ellipsoid patch between two parallels and ``dlon_deg`` of longitude.

    A = dlon * |F(lat2) - F(lat1)| with F of :func:`authalic_area_per_radian_m2` (Snyder 1987).

    >>> f"{float(band_area_m2(0.0, 1.0, 1.0)):.3f}"
    '12308463893.975'
    """
    df = np.abs(
        authalic_area_per_radian_m2(np.radians(lat2_deg), a_m, e2)
        - authalic_area_per_radian_m2(np.radians(lat1_deg), a_m, e2)
    )
    return np.radians(np.abs(dlon_deg)) * df
