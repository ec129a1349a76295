"""Open and validate inputs: the DEM here; vector layers in :mod:`landcheck.inputs.layers`.

Validation happens once, at this edge.  Every refusal raises
:class:`~landcheck.errors.InputDataError` with a message that names the file,
the problem and what to do.
"""

from __future__ import annotations

import logging
import os
import threading
from dataclasses import dataclass, field

import numpy as np

from landcheck.choices import UserChoice
from landcheck.engine.handles import ThreadLocalHandles
from landcheck.errors import InputDataError
from landcheck.geo.grid import GridSpec, Window, grow_window, iter_windows

__all__ = ["ZUnit", "DemSource", "open_dem"]

logger = logging.getLogger(__name__)

#: metres per international foot (exact by definition, 1959 agreement; common practice)
FOOT_M = 0.3048
#: metres per US survey foot (1200/3937 m by definition)
US_SURVEY_FOOT_M = 1200.0 / 3937.0
#: elevations outside this range (metres) are refused as implausible: the land surface spans about
#: -430 m .. 8 849 m (docs/references.md §18); values beyond are fill values or wrong units
PLAUSIBLE_MIN_M = -500.0
PLAUSIBLE_MAX_M = 9000.0


class ZUnit(UserChoice):
    """Unit of the DEM's elevation values."""

    METRE = "m"
    FOOT = "ft"
    US_SURVEY_FOOT = "us-ft"

    @property
    def to_m(self) -> float:
        return {ZUnit.METRE: 1.0, ZUnit.FOOT: FOOT_M, ZUnit.US_SURVEY_FOOT: US_SURVEY_FOOT_M}[self]

    @classmethod
    def _aliases(cls) -> dict:
        return {
            "metre": "m",
            "meter": "m",
            "metres": "m",
            "meters": "m",
            "foot": "ft",
            "feet": "ft",
            "us-survey-foot": "us-ft",
        }

    @classmethod
    def _noun(cls) -> str:
        return "elevation unit"


@dataclass
class DemSource(ThreadLocalHandles):
    """A validated DEM band: where it is, its grid, and how to read windows of it.

    Reading opens one dataset handle per thread (rasterio handles are not
    thread-safe), so one ``DemSource`` can feed several worker threads.  It
    pickles to its path and settings, so Dask workers reopen the file.
    """

    path: str
    band: int
    grid: GridSpec
    nodata: float | None
    z_unit: ZUnit = ZUnit.METRE
    crs_override: str | None = None
    z_unit_source: str = ""
    #: treat elevations outside PLAUSIBLE_MIN_M .. PLAUSIBLE_MAX_M as no data (``--mask-implausible``)
    mask_implausible: bool = False
    _local: threading.local = field(default_factory=threading.local, repr=False, compare=False)

    def _dataset(self):
        ds = getattr(self._local, "ds", None)
        if ds is None or ds.closed:
            import rasterio

            from landcheck.inputs.gdal_cache import cap_gdal_cache

            cap_gdal_cache()  # every DEM block passes GDAL's cache: keep it well below GDAL's 5 %-of-RAM default
            ds = rasterio.open(self.path)
            self._local.ds = ds
        return ds

    def read(self, win: Window, dtype=np.float64) -> np.ndarray:
        """Elevations of ``win`` in metres, NaN where invalid.

        Parameters
        ----------
        win : Window
        dtype : float64 (default) or float32
            float32 is honoured only when it holds every value exactly (a float32 or
            8/16-bit integer band in metres); otherwise float64 is returned.  Either way
            the values are the same numbers, so kernels that widen to float64 give
            identical results from both.
        """
        from rasterio.errors import RasterioError

        ds = self._dataset()
        out_dtype = np.float32 if np.dtype(dtype) == np.float32 and self._float32_exact(ds) else np.float64
        try:
            arr = ds.read(self.band, window=win.to_rasterio(), masked=False).astype(out_dtype, copy=False)
            has_mask = _has_mask_band(ds, self.band)
            mask = ds.read_masks(self.band, window=win.to_rasterio()) if has_mask else None
        except RasterioError as exc:
            raise InputDataError(
                f"{self.path}: cannot read rows {win.row_off}..{win.row_off + win.height - 1} of band {self.band} "
                f"({exc}); the file is truncated or damaged. Copy or download it again "
                "(`gdalinfo -checksum` reads every block and shows where it breaks)."
            ) from None
        invalid = ~np.isfinite(arr)
        if self.nodata is not None and not np.isnan(self.nodata) and out_dtype(self.nodata) == self.nodata:
            invalid |= arr == out_dtype(self.nodata)
        if mask is not None:
            invalid |= mask == 0
        if invalid.any():
            arr = arr.copy() if not arr.flags.writeable else arr
            arr[invalid] = np.nan
        if self.z_unit is not ZUnit.METRE:
            arr = arr * self.z_unit.to_m
        if self.mask_implausible:
            with np.errstate(invalid="ignore"):
                bad = (arr < PLAUSIBLE_MIN_M) | (arr > PLAUSIBLE_MAX_M)
            if bad.any():
                arr = arr.copy() if not arr.flags.writeable else arr
                arr[bad] = np.nan
        return arr

    def _float32_exact(self, ds) -> bool:
        return self.z_unit is ZUnit.METRE and ds.dtypes[self.band - 1] in (
            "float32",
            "int8",
            "uint8",
            "int16",
            "uint16",
        )

    def read_with_halo(self, win: Window, halo: int, dtype=np.float64) -> np.ndarray:
        """``win`` grown by ``halo`` cells on every side; cells outside the raster are NaN (``dtype`` as in :meth:`read`)."""
        inner, pad = grow_window(win, halo, self.grid.height, self.grid.width)
        arr = self.read(inner, dtype)
        if any(p for pair in pad for p in pair):
            arr = np.pad(arr, pad, mode="constant", constant_values=np.nan)
        return arr


def _has_mask_band(ds, band: int) -> bool:
    """True when the band carries an internal mask (not nodata, not alpha, not all-valid)."""
    from rasterio.enums import MaskFlags

    flags = ds.mask_flag_enums[band - 1]
    return MaskFlags.per_dataset in flags and MaskFlags.alpha not in flags


#: smallest DEM side in cells: a 3 x 3 kernel needs a cell with all 8 neighbours
MIN_DEM_CELLS = 3


def _check_coordinates(t, width: int, height: int, pcrs, path: str) -> None:
    """Refuse a DEM whose corner coordinates are impossible in its CRS (e.g. UTM metres tagged EPSG:4326)."""
    import pyproj

    xs = [t.c, t.c + t.a * width]
    ys = [t.f, t.f + t.e * height]
    if pcrs.is_geographic:
        lat_ok = all(-90.0 - 1e-9 <= y <= 90.0 + 1e-9 for y in ys)
        lon_ok = all(-360.0 - 1e-9 <= x <= 360.0 + 1e-9 for x in xs)
        if not (lat_ok and lon_ok):
            raise InputDataError(
                f"{path}: the DEM's CRS {pcrs.name!r} is geographic (degrees), but its corners lie at "
                f"x {xs[0]:.6g} .. {xs[1]:.6g}, y {ys[1]:.6g} .. {ys[0]:.6g}, outside longitude/latitude range; "
                "the file is probably tagged with the wrong CRS (metres of a projected CRS tagged as degrees). "
                "Fix the tag on a copy (e.g. `gdal_edit.py -a_srs EPSG:326NN dem.tif`) or give --dem-crs."
            )
        return
    try:
        tr = pyproj.Transformer.from_crs(pcrs, pcrs.geodetic_crs, always_xy=True)
        lon, lat = tr.transform(
            [xs[0], xs[1], xs[0], xs[1], (xs[0] + xs[1]) / 2],
            [ys[0], ys[0], ys[1], ys[1], (ys[0] + ys[1]) / 2],
            errcheck=True,
        )
        ok = np.all(np.isfinite(lon)) and np.all(np.isfinite(lat)) and np.all(np.abs(lat) <= 90.0)
    except Exception:  # pyproj.exceptions.ProjError and friends: the point cannot be projected back
        ok = False
    if not ok:
        raise InputDataError(
            f"{path}: the DEM's corners (x {xs[0]:.6g} .. {xs[1]:.6g}, y {ys[1]:.6g} .. {ys[0]:.6g}) lie outside "
            f"the valid range of its CRS {pcrs.name!r}; the file is probably tagged with the wrong CRS. Fix the "
            "tag on a copy (`gdal_edit.py -a_srs ...`) or give --dem-crs."
        )


def grid_from_dataset(ds, path: str, crs=None) -> GridSpec:
    """Build and validate a :class:`GridSpec` from an open rasterio dataset."""
    import pyproj

    t = ds.transform
    if t.b != 0 or t.d != 0:
        raise InputDataError(
            f"{path}: the raster is rotated or sheared (geotransform terms b={t.b}, d={t.d}); "
            "landcheck needs a north-up grid. Warp it first, e.g. `gdalwarp in.tif north_up.tif`."
        )
    if ds.transform.is_identity and ds.crs is None:
        raise InputDataError(
            f"{path}: the raster has no georeferencing (no geotransform and no CRS); "
            "give it both, e.g. with `gdal_translate -a_srs EPSG:xxxx -a_ullr ...`."
        )
    if t.e > 0:
        raise InputDataError(
            f"{path}: rows run south to north (positive pixel height {t.e}); flip it to north-up first."
        )
    the_crs = crs if crs is not None else ds.crs
    if the_crs is None:
        raise InputDataError(
            f"{path}: the raster has no coordinate reference system; "
            "give one with --dem-crs (e.g. --dem-crs EPSG:32651) or fix the file."
        )
    pcrs = pyproj.CRS.from_user_input(the_crs.to_wkt() if hasattr(the_crs, "to_wkt") else the_crs)
    ell = pcrs.ellipsoid
    a_m = ell.semi_major_metre if ell is not None else 6_378_137.0
    inv_f = ell.inverse_flattening if ell is not None and ell.inverse_flattening else 0.0
    f = 1.0 / inv_f if inv_f else 0.0
    e2 = f * (2.0 - f)
    if ds.width < MIN_DEM_CELLS or ds.height < MIN_DEM_CELLS:
        raise InputDataError(
            f"{path}: the DEM has {ds.width} x {ds.height} cells; slope needs each cell's 8 neighbours, so a DEM "
            f"smaller than {MIN_DEM_CELLS} x {MIN_DEM_CELLS} cells has no slope anywhere. Give a DEM that covers "
            "the parcels with several cells across each."
        )
    _check_coordinates(t, ds.width, ds.height, pcrs, path)
    if pcrs.is_geographic:
        unit_name = pcrs.axis_info[0].unit_name if pcrs.axis_info else "degree"
        if "degree" not in unit_name.lower():
            raise InputDataError(f"{path}: geographic CRS with angular unit {unit_name!r}; only degrees are supported.")
        return GridSpec(t, pcrs.to_wkt(), ds.width, ds.height, True, 1.0, a_m, e2)
    if not pcrs.is_projected:
        raise InputDataError(
            f"{path}: CRS {pcrs.name!r} is neither projected nor geographic; give a projected CRS in metres or feet."
        )
    axis = pcrs.axis_info[0] if pcrs.axis_info else None
    unit_m = axis.unit_conversion_factor if axis is not None else None
    if not unit_m or unit_m <= 0:
        raise InputDataError(f"{path}: cannot read the linear unit of CRS {pcrs.name!r}; give a CRS in metres or feet.")
    return GridSpec(t, pcrs.to_wkt(), ds.width, ds.height, False, float(unit_m), a_m, e2)


_UNIT_WORDS = {
    ZUnit.METRE: ("m", "metre", "meter", "metres", "meters", "metre (m)"),
    ZUnit.FOOT: ("ft", "foot", "feet", "international foot", "international feet", "foot (international)"),
    ZUnit.US_SURVEY_FOOT: (
        "us-ft",
        "us_ft",
        "ftus",
        "us ft",
        "us survey foot",
        "us survey feet",
        "us_survey_foot",
        "us-survey-foot",
        "foot_us",
        "us foot",
        "us feet",
        "survey foot",
        "survey feet",
    ),
}


def _unit_from_text(text: str) -> ZUnit | None:
    t = " ".join(text.strip().lower().replace("u.s.", "us").split())
    for unit, words in _UNIT_WORDS.items():
        if t in words:
            return unit
    return None


def _unit_from_factor(factor: float) -> ZUnit | None:
    for unit in ZUnit:
        if abs(factor - unit.to_m) <= 1e-9 * unit.to_m:
            return unit
    return None


def _declared_z_unit(ds, band: int, crs_wkt: str, path: str) -> tuple[ZUnit | None, str]:
    """The elevation unit the file declares: the band's unit, else the vertical axis of a compound CRS."""
    import pyproj

    text = (ds.units[band - 1] or "").strip() if ds.units else ""
    if text:
        unit = _unit_from_text(text)
        if unit is None:
            raise InputDataError(
                f"{path}: band {band} declares its elevation unit as {text!r}, which landcheck does not know; "
                "give the unit with --z-unit m|ft|us-ft (converting the DEM to metres first if it is none of these)."
            )
        return unit, f"band {band} unit {text!r}"
    pcrs = pyproj.CRS.from_user_input(crs_wkt)
    for sub in pcrs.sub_crs_list if pcrs.is_compound else []:
        if sub.is_vertical and sub.axis_info:
            ax = sub.axis_info[0]
            unit = _unit_from_factor(float(ax.unit_conversion_factor or 0.0))
            if unit is None:
                raise InputDataError(
                    f"{path}: the vertical CRS {sub.name!r} has unit {ax.unit_name!r}, which landcheck does not "
                    "know; give the unit with --z-unit m|ft|us-ft."
                )
            return unit, f"vertical CRS {sub.name!r} ({ax.unit_name})"
    return None, ""


def resolve_z_unit(ds, band: int, grid: GridSpec, path: str, given: ZUnit | None) -> tuple[ZUnit, str]:
    """Elevation unit from the data, or the one given; refuse rather than guess (docs/cli.md, --z-unit).

    * declared by the file (band unit or vertical CRS axis) and not given: the declared unit;
    * given and declared differently: refused, naming both;
    * given: the given unit;
    * neither, horizontal unit the metre (or a geographic CRS, whose global DEMs are in metres): metres,
      said in a warning;
    * neither, horizontal unit not the metre (feet, ...): refused, asking for --z-unit.
    """
    declared, source = _declared_z_unit(ds, band, grid.crs_wkt, path)
    if given is not None:
        if declared is not None and declared is not given:
            raise InputDataError(
                f"{path}: --z-unit {given.value} given, but the file declares {declared.value} ({source}); "
                "fix the file's unit or drop --z-unit."
            )
        return given, "--z-unit" if declared is None else f"--z-unit, agreeing with {source}"
    if declared is not None:
        return declared, source
    if grid.geographic or abs(grid.unit_m - 1.0) < 1e-12:
        kind = "geographic (degrees)" if grid.geographic else "in metres"
        # the common case (a metric DEM without a unit tag): said in the log and recorded in the
        # manifest (parameters.z_unit_source), not warned on every run
        logger.info(
            "%s: the DEM declares no elevation unit; taken as metres because its CRS is %s. "
            "Give --z-unit ft or us-ft if the elevations are in feet.",
            path,
            kind,
        )
        return ZUnit.METRE, f"not declared; metres assumed for a CRS {kind}"
    raise InputDataError(
        f"{path}: the DEM declares no elevation unit and its horizontal unit is not the metre "
        f"({grid.unit_m:g} m per CRS unit); landcheck will not guess. Give the elevation unit with "
        "--z-unit m, --z-unit ft or --z-unit us-ft (or set the band's unit, e.g. "
        "`gdal_edit.py -units ft dem.tif` on a copy)."
    )


def open_dem(
    path: str | os.PathLike,
    *,
    band: int | None = None,
    crs: str | None = None,
    z_unit: ZUnit | str | None = None,
    check_data: bool = True,
    mask_implausible: bool = False,
) -> DemSource:
    """Open and validate a DEM.

    Parameters
    ----------
    path : path
        Any single- or multi-band raster GDAL reads.
    band : int, optional
        1-based band number; required when the raster has more than one band.
    crs : str, optional
        CRS to assume when the file has none (e.g. ``"EPSG:32651"``).
    z_unit : ZUnit or str, optional
        Unit of the elevation values (``m``, ``ft``, ``us-ft``); converted to metres on read.  Default:
        read from the data (:func:`resolve_z_unit`); a file whose unit cannot be known and whose
        horizontal unit is not the metre is refused.
    check_data : bool
        Scan the band once, window by window (memory bounded): at least one valid cell, and no
        elevation outside :data:`PLAUSIBLE_MIN_M` .. :data:`PLAUSIBLE_MAX_M`.
    mask_implausible : bool
        Treat elevations outside that range as no data (with a warning) instead of refusing the DEM.

    Raises
    ------
    InputDataError
        Missing file, not a raster, no CRS, rotated grid, ambiguous band, all-nodata raster.
    """
    import rasterio
    from rasterio.errors import RasterioIOError

    path = os.fspath(path)
    z_unit = ZUnit.from_user(z_unit) if z_unit is not None else None
    if not os.path.exists(path) and "://" not in path and not path.startswith("/vsi"):
        raise InputDataError(f"{path}: DEM file not found.")
    try:
        ds = rasterio.open(path)
    except RasterioIOError as exc:
        raise InputDataError(
            f"{path}: not a raster GDAL can open ({exc}). Give a GeoTIFF or another GDAL raster."
        ) from exc
    with ds:
        if ds.count < 1:
            raise InputDataError(f"{path}: the raster has no bands.")
        if band is None:
            if ds.count > 1:
                raise InputDataError(
                    f"{path}: the raster has {ds.count} bands; choose the elevation band with --dem-band N (1..{ds.count})."
                )
            band = 1
        if not 1 <= band <= ds.count:
            raise InputDataError(f"{path}: band {band} asked for, but the raster has bands 1..{ds.count}.")
        from rasterio.crs import CRS as RioCRS

        crs_obj = RioCRS.from_user_input(crs) if crs else None
        grid = grid_from_dataset(ds, path, crs_obj)
        nodata = ds.nodatavals[band - 1]
        z_unit, z_source = resolve_z_unit(ds, band, grid, path, z_unit)
    src = DemSource(path, band, grid, nodata, z_unit, crs, z_source)
    if check_data:
        _check_values(src, mask_implausible)
    src.mask_implausible = mask_implausible
    logger.info(
        "DEM %s: %d x %d cells, %s, band %d, nodata=%s",
        path,
        grid.width,
        grid.height,
        "geographic" if grid.geographic else f"projected ({grid.unit_m} m/unit)",
        band,
        nodata,
    )
    return src


def refuse_if_nothing_evaluated(src: DemSource, evaluated_m2, area_m2, parcels_where: str) -> None:
    """Refuse a DEM too small or too coarse for the parcels: no parcel got a single cell with a slope."""
    evaluated_m2 = np.asarray(evaluated_m2, dtype=float)
    area_m2 = np.asarray(area_m2, dtype=float)
    if len(evaluated_m2) == 0 or np.any(evaluated_m2 > 0):
        return
    g = src.grid
    hx, hy = g.cell_size_m(np.array([g.height // 2]))
    cell_m2 = float(hx[0] * hy[0])
    positive = area_m2[area_m2 > 0]
    median = float(np.median(positive)) if len(positive) else 0.0
    raise InputDataError(
        f"{src.path}: no parcel of {parcels_where} has any area with a slope: the DEM ({g.width} x {g.height} "
        f"cells of about {float(hx[0]):.4g} m x {float(hy[0]):.4g} m, {cell_m2:.4g} m² each) is too small or too "
        f"coarse for parcels of median area {median:.4g} m² (slope needs a cell with all 8 neighbours valid). "
        "Give a DEM covering the parcels with several cells across each."
    )


def _check_values(src: DemSource, mask_implausible: bool) -> None:
    """One streamed pass over the band: refuse an empty band, and implausible elevations unless masked."""
    import warnings

    from landcheck.errors import LandcheckWarning

    n_valid = n_bad = 0
    lo, hi = np.inf, -np.inf
    for win in iter_windows(src.grid.height, src.grid.width, 1024):
        arr = src.read(win)
        finite = np.isfinite(arr)
        bad = finite & ((arr < PLAUSIBLE_MIN_M) | (arr > PLAUSIBLE_MAX_M))
        n_valid += int(np.count_nonzero(finite))
        k = int(np.count_nonzero(bad))
        if k:
            n_bad += k
            lo = min(lo, float(arr[bad].min()))
            hi = max(hi, float(arr[bad].max()))
    path, band = src.path, src.band
    if n_valid == 0:
        raise InputDataError(f"{path}: every cell of band {band} is nodata or NaN; there is no elevation to work with.")
    if not n_bad:
        return
    unit = src.z_unit.value
    scale = src.z_unit.to_m
    values = f"{lo / scale:g}" if lo == hi else f"{lo / scale:g} .. {hi / scale:g}"
    what = (
        f"{n_bad} of {n_valid} cells of band {band} hold elevations outside the plausible range "
        f"{PLAUSIBLE_MIN_M:g} m .. {PLAUSIBLE_MAX_M:g} m (values {values} {unit})"
    )
    if n_bad == n_valid:
        raise InputDataError(
            f"{path}: {what}: every elevation is implausible. Check --z-unit and the file's no-data value."
        )
    if not mask_implausible:
        raise InputDataError(
            f"{path}: {what}, probably an undeclared no-data (fill) value. Declare it as no-data "
            f"(e.g. `gdal_translate -a_nodata {hi / scale if hi > PLAUSIBLE_MAX_M else lo / scale:g} in.tif fixed.tif`), "
            "or pass --mask-implausible to treat these cells as no data."
        )
    warnings.warn(f"{path}: {what}; treated as no data (--mask-implausible).", LandcheckWarning, stacklevel=3)


def _has_valid_cell(src: DemSource) -> bool:
    for win in iter_windows(src.grid.height, src.grid.width, 1024):
        if np.isfinite(src.read(win)).any():
            return True
    return False
