"""Versions of landcheck and of the libraries whose behaviour affects its numbers."""

from __future__ import annotations

from landcheck.about import __version__


def show_versions() -> dict:
    """Versions of landcheck and the libraries whose behaviour affects its numbers."""
    import importlib.metadata as md
    import platform

    out: dict[str, str | None] = {"landcheck": __version__, "python": platform.python_version()}
    for pkg in (
        "numpy",
        "rasterio",
        "geopandas",
        "shapely",
        "pyproj",
        "exactextract",
        "pyflwdir",
        "numba",
        "scipy",
        "matplotlib",
        "dask",
        "distributed",
        "pandas",
        "pyogrio",
    ):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    try:
        import rasterio

        out["gdal"] = rasterio.__gdal_version__
    except ImportError:
        pass
    return out
