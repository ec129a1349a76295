"""Atomic writers: rasters (Cloud-Optimized or tiled GeoTIFF), tables (CSV, GeoPackage), JSON.

Every writer puts its bytes in a temporary file beside the target and renames
it into place only when complete, so a crash, a full disk or a permission
error never leaves a half-written result.  The audit's output folder is built
the same way: a hidden sibling folder, renamed when every file is in it.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np

from landcheck.choices import UserChoice
from landcheck.errors import OutputExistsError, OutputWriteError
from landcheck.geo.grid import GridSpec, Window
from landcheck.hashing import remember_written
from landcheck.inputs.gdal_cache import cap_gdal_cache
from landcheck.outputs.folder import check_output_path, staged_folder

__all__ = [
    "atomic_file",
    "staged_folder",
    "check_output_path",
    "write_json",
    "write_csv",
    "csv_rows",
    "RasterSink",
    "RasterFormat",
    "cap_gdal_cache",
]

logger = logging.getLogger(__name__)


@contextlib.contextmanager
def atomic_file(final: str | os.PathLike, *, overwrite: bool = False, suffix: str = "") -> Iterator[Path]:
    """Yield a temporary path next to ``final``; rename it to ``final`` on success only."""
    final = Path(final)
    if final.exists() and not overwrite:
        raise OutputExistsError(f"{final}: already exists; pass --overwrite to replace it.")
    try:
        final.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{final.name}.", suffix=suffix or final.suffix + ".tmp", dir=final.parent)
        os.close(fd)
    except OSError as exc:
        raise OutputWriteError(
            f"{final}: cannot write here ({exc.strerror or exc}); choose another output path."
        ) from exc
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        if tmp_path.exists():
            os.chmod(tmp_path, 0o666 & ~_umask())  # mkstemp makes 0600; give the file normal permissions
        os.replace(tmp_path, final)
    except OSError as exc:
        tmp_path.unlink(missing_ok=True)
        if isinstance(exc, (OutputExistsError, OutputWriteError)):
            raise
        raise OutputWriteError(f"{final}: writing failed ({exc.strerror or exc}); nothing was left behind.") from exc
    except BaseException:
        tmp_path.unlink(missing_ok=True)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def _json_default(o):
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def _clean_floats(o):
    """Replace NaN/inf by None so the JSON is standard."""
    if isinstance(o, float) or isinstance(o, np.floating):
        return None if not np.isfinite(o) else float(o)
    if isinstance(o, dict):
        return {k: _clean_floats(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_clean_floats(v) for v in o]
    return o


def write_json(path: str | os.PathLike, data, *, overwrite: bool = True) -> Path:
    with atomic_file(path, overwrite=overwrite) as tmp:
        tmp.write_text(
            json.dumps(_clean_floats(data), indent=2, default=_json_default, allow_nan=False) + "\n", encoding="utf-8"
        )
    return Path(path)


def write_csv(path: str | os.PathLike, frame, *, overwrite: bool = True) -> Path:
    """``frame`` as CSV: :func:`csv_rows` with the whole frame as its one slice."""
    with csv_rows(path, overwrite=overwrite) as add:
        add(frame)
    return Path(path)


@contextlib.contextmanager
def csv_rows(path: str | os.PathLike, *, overwrite: bool = True) -> Iterator[Callable[[object], None]]:
    """Yield ``add(frame)``: the rows of each frame appended to one CSV (the header from the first).

    Every CSV table goes through here, whole (:func:`write_csv`) or slice by slice (the region run's
    ``parcels.csv``): a value's text depends only on the value and its column's type, so the slices of a
    table give the bytes of the whole table.  The file is renamed into place when the block ends.

    >>> import pandas as pd, tempfile
    >>> d = Path(tempfile.mkdtemp())
    >>> f = pd.DataFrame({"a": [1, 2, 3], "b": [0.1, None, 1 / 3], "c": ["x", "y,z", None]})
    >>> with csv_rows(d / "parts.csv") as add:
    ...     add(f.iloc[:1])
    ...     add(f.iloc[1:])
    >>> _ = write_csv(d / "whole.csv", f)
    >>> (d / "parts.csv").read_bytes() == (d / "whole.csv").read_bytes()
    True
    >>> print((d / "parts.csv").read_text(), end="")
    a,b,c
    1,0.1,x
    2,,"y,z"
    3,0.3333333333,
    """
    with atomic_file(path, overwrite=overwrite) as tmp, open(tmp, "w", encoding="utf-8", newline="") as f:
        first = [True]

        def add(frame) -> None:
            _write_csv_slice(f, frame, header=first[0])
            first[0] = False

        yield add


#: how every float of a CSV table is written: ten significant digits (sub-micrometre for areas in m²)
CSV_FLOAT_FORMAT = "%.10g"


def _csv_column_text(col) -> list[str] | None:
    """The CSV text of each value of one column, as pandas' ``to_csv`` writes it; None if not handled here.

    Floats (NumPy or Arrow-backed, NaN/NA empty) by :data:`CSV_FLOAT_FORMAT`, integers and booleans
    by ``str``, text as is (missing empty).  Other kinds (dates, categories, mixed objects) are left
    to pandas.  Formatting a column at once is several times faster than pandas' per-cell path
    at 100 000 parcels (docs/scale.md); tests/test_writers.py checks the bytes against pandas.
    """
    import pandas as pd

    dt = col.dtype
    kind: str | None
    if isinstance(dt, pd.StringDtype) or (isinstance(dt, pd.ArrowDtype) and dt.pyarrow_dtype in _arrow_text()):
        kind = "U"
    elif isinstance(dt, np.dtype):
        kind = dt.kind
    else:  # pandas' nullable and Arrow-backed numbers
        kind = getattr(getattr(dt, "numpy_dtype", None), "kind", None)
    if kind not in ("f", "i", "u", "b", "U", "O"):
        return None
    if kind == "f":
        values = col.to_numpy(dtype="float64", na_value=np.nan).tolist()
    elif isinstance(dt, np.dtype):
        values = col.to_numpy().tolist()
    else:
        values = col.to_numpy(dtype=object, na_value=None).tolist()
    fmt = CSV_FLOAT_FORMAT
    if kind == "f":
        return ["" if (v is None or v != v) else fmt % v for v in values]
    if kind in ("i", "u", "b"):
        return ["" if v is None else str(v) for v in values]
    if kind == "U":
        return ["" if v is None else v for v in values]
    # object columns: text and missing values only
    out = []
    for v in values:
        if v is None or (isinstance(v, float) and v != v):
            out.append("")
        elif isinstance(v, str):
            out.append(v)
        else:
            return None
    return out


def _arrow_text():
    import pyarrow as pa

    return (pa.string(), pa.large_string())


def _write_csv_slice(f, frame, *, header: bool) -> None:
    """Append ``frame`` to the open text file ``f`` as CSV rows (the header row first when ``header``)."""
    import csv

    texts = []
    for name in frame.columns:
        t = _csv_column_text(frame[name])
        if t is None:  # a kind of column this path does not handle: pandas writes the whole slice
            frame.to_csv(f, index=False, header=header, float_format=CSV_FLOAT_FORMAT)
            return
        texts.append(t)
    w = csv.writer(f, lineterminator="\n")
    if header:
        w.writerow([str(c) for c in frame.columns])
    w.writerows(zip(*texts))


def write_gpkg(path: str | os.PathLike, gdf, layer: str, *, overwrite: bool = True) -> Path:
    with atomic_file(path, overwrite=overwrite, suffix=".gpkg") as tmp:
        tmp.unlink()  # GDAL wants to create the file itself
        with fixed_gpkg_date():
            gdf.to_file(tmp, layer=layer, driver="GPKG")
    return Path(path)


#: the time GeoPackages carry in gpkg_contents.last_change: fixed so a rerun writes the same bytes
#: (GDAL's OGR_CURRENT_DATE; the run's own times are in run_times.json)
GPKG_FIXED_DATE = "2000-01-01T00:00:00.000Z"


@contextlib.contextmanager
def fixed_gpkg_date():
    """Within: GeoPackages written through GDAL carry :data:`GPKG_FIXED_DATE` instead of the wall clock."""
    import pyogrio

    before = pyogrio.get_gdal_config_option("OGR_CURRENT_DATE")
    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": GPKG_FIXED_DATE})
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": before})


class RasterFormat(UserChoice):
    """How a streamed raster is written (see docs/scale.md for the measured costs).

    * ``cog`` (default): Cloud-Optimized GeoTIFF, ZSTD level 1 with a predictor, 512-cell tiles
      and overviews; windows go to an uncompressed scratch file first, then one GDAL copy lays
      the COG out.  ZSTD makes the same size as DEFLATE level 1 here in about half the time
      (docs/scale.md); GDAL 2.3+ and libtiff 4.0.10+ read it.
    * ``cog-deflate``: the same COG with DEFLATE level 1, for readers whose TIFF library
      predates ZSTD.
    * ``gtiff``: a tiled GeoTIFF (512-cell tiles, no overviews) written straight from the
      window stream: no scratch file and no second pass.  Integer rasters are ZSTD level 1
      (compressed on all cores); float rasters are uncompressed, because full-precision slopes
      hardly compress (measured in docs/scale.md).  For large batch runs.
    * ``none``: no raster file at all (only the tables); the audit's HTML report needs the rasters.
    """

    COG = "cog"
    COG_DEFLATE = "cog-deflate"
    GTIFF = "gtiff"
    NONE = "none"

    @classmethod
    def _aliases(cls) -> dict:
        return {"geotiff": "gtiff", "tif": "gtiff", "tiff": "gtiff", "cog_deflate": "cog-deflate"}

    @property
    def is_cog(self) -> bool:
        """A Cloud-Optimized GeoTIFF, laid out from a scratch file when the window stream ends."""
        return self in (RasterFormat.COG, RasterFormat.COG_DEFLATE)

    @classmethod
    def _noun(cls) -> str:
        return "raster format"


class RasterSink:
    """Streamed writer for one raster: windows in, a GeoTIFF out (:class:`RasterFormat`).

    ``cog``: windows are written to an uncompressed tiled scratch GeoTIFF as they arrive;
    :meth:`close` converts it to a COG (with overviews) beside the target and renames it into
    place.  ``gtiff``: windows go straight into a compressed tiled GeoTIFF beside the target,
    renamed into place on close.  ``none``: writes are ignored.  Memory use is bounded by
    one window plus GDAL's capped block cache, whatever the raster size.

    ``categorical=True`` builds COG overviews by nearest neighbour (class codes, bit flags);
    otherwise by averaging.
    """

    def __init__(
        self,
        final: str | os.PathLike,
        grid: GridSpec,
        *,
        dtype: str,
        nodata,
        overwrite: bool = False,
        block: int = 512,
        band_names: list[str] | None = None,
        count: int = 1,
        fmt: RasterFormat | str = RasterFormat.COG,
        categorical: bool = False,
    ):
        import rasterio

        self.final = Path(final)
        self.fmt = RasterFormat.from_user(fmt)
        self._count = count
        self._band_names = band_names
        self._categorical = categorical
        self._float = np.dtype(dtype).kind == "f"
        self._ds = None
        self._scratch = None
        if self.final.exists() and not overwrite:
            raise OutputExistsError(f"{self.final}: already exists; pass --overwrite to replace it.")
        if self.fmt is RasterFormat.NONE:
            return
        cap_gdal_cache()
        self.final.parent.mkdir(parents=True, exist_ok=True)
        suffix = ".scratch.tif" if self.fmt.is_cog else ".part.tif"
        fd, scratch = tempfile.mkstemp(prefix=f".{self.final.name}.", suffix=suffix, dir=self.final.parent)
        os.close(fd)
        self._scratch = Path(scratch)
        if self.fmt.is_cog:
            options = {}  # scratch: uncompressed, fast
        else:
            # Integer rasters (bit flags, classes) compress ~50:1 with ZSTD level 1, cheaply, on all cores as
            # tiles fill.  Full-precision float slopes hardly compress (ZSTD 1: 84 % of the size for ~25 % more
            # time in the slope stage; with the floating-point predictor 74 % for ~45 % more; docs/scale.md),
            # so float rasters are written uncompressed here; the COG format compresses them.
            options = {} if self._float else {"COMPRESS": "ZSTD", "ZSTD_LEVEL": 1, "NUM_THREADS": "ALL_CPUS"}
        try:
            self._ds = rasterio.open(
                self._scratch,
                "w",
                driver="GTiff",
                width=grid.width,
                height=grid.height,
                count=count,
                dtype=dtype,
                crs=grid.crs_wkt,
                transform=grid.transform,
                nodata=nodata,
                tiled=True,
                blockxsize=block,
                blockysize=block,
                BIGTIFF="IF_SAFER",
                **options,
            )
        except Exception as exc:
            self._scratch.unlink(missing_ok=True)
            raise OutputWriteError(f"{self.final}: cannot create raster ({exc}).") from exc

    def write(self, win: Window, data: np.ndarray) -> None:
        if self._ds is None:
            return
        if data.ndim == 2:
            self._ds.write(data, 1, window=win.to_rasterio())
        else:
            self._ds.write(data, window=win.to_rasterio())

    def abort(self) -> None:
        if self._ds is not None:
            with contextlib.suppress(Exception):
                self._ds.close()
            self._ds = None
        self.discard_scratch()

    def close(self) -> Path | None:
        """Finish the file and rename it into place; returns its path (None for ``none``)."""
        self.finish()
        return self.publish(keep_scratch=False)

    def finish(self) -> None:
        """End the window stream (``gtiff``: the file goes into place now; ``cog``: the scratch is complete).

        Between :meth:`finish` and :meth:`publish`, :attr:`readable` holds every value written.
        """
        if self.fmt is RasterFormat.NONE or self._ds is None:
            return
        try:
            if self._band_names:
                for i, name in enumerate(self._band_names, start=1):
                    self._ds.set_band_description(i, name)
            self._ds.close()
            self._ds = None
            if self.fmt is RasterFormat.GTIFF:
                if self.final.exists():
                    self.final.unlink()
                os.chmod(self._scratch, 0o666 & ~_umask())
                os.replace(self._scratch, self.final)
                self._scratch = None
        except Exception as exc:
            self.abort()
            raise OutputWriteError(
                f"{self.final}: writing the raster failed ({exc}); nothing was left behind."
            ) from exc

    @property
    def readable(self) -> Path | None:
        """A finished file with the raster's values: the scratch (``cog``, until discarded) or the file."""
        if self.fmt is RasterFormat.NONE:
            return None
        return self._scratch if self._scratch is not None else self.final

    def publish(self, *, keep_scratch: bool = False, threads: int | None = None, hash_it: bool = False) -> Path | None:
        """``cog``: lay the COG out from the finished scratch and rename it into place.

        With ``keep_scratch`` the scratch stays readable until :meth:`discard_scratch` (the report
        reads it while the copy runs on another thread).  ``threads``: GDAL's compression threads
        (default all cores; one leaves a core to work running beside the copy).  ``hash_it``: hash
        the finished file here (:func:`landcheck.hashing.remember_written`), for a folder whose
        manifests list it.  Returns the final path (None for ``none``).
        """
        import rasterio.shutil

        if self.fmt is RasterFormat.NONE:
            return None
        if self.fmt is RasterFormat.GTIFF:
            if hash_it:
                remember_written(self.final)
            return self.final
        try:
            with atomic_file(self.final, overwrite=True, suffix=".tif") as tmp:
                rasterio.shutil.copy(
                    self._scratch,
                    tmp,
                    driver="COG",
                    COMPRESS="DEFLATE" if self.fmt is RasterFormat.COG_DEFLATE else "ZSTD",
                    LEVEL=1,
                    PREDICTOR="YES",
                    BLOCKSIZE=512,
                    OVERVIEWS="AUTO",
                    BIGTIFF="IF_SAFER",
                    NUM_THREADS=str(threads) if threads else "ALL_CPUS",
                    RESAMPLING="NEAREST" if self._categorical else "AVERAGE",
                )
        except Exception as exc:
            self.abort()
            if isinstance(exc, OutputWriteError):
                raise
            raise OutputWriteError(
                f"{self.final}: writing the raster failed ({exc}); nothing was left behind."
            ) from exc
        if not keep_scratch:
            self.discard_scratch()
        if hash_it:  # hashed here, beside other work, not again for the manifests
            remember_written(self.final)
        return self.final

    def discard_scratch(self) -> None:
        if self._scratch is not None:
            self._scratch.unlink(missing_ok=True)
            self._scratch = None

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.close()
        else:
            self.abort()
        return False


def write_with(path: str | os.PathLike, writer: Callable[[Path], None], *, overwrite: bool = True) -> Path:
    """Run ``writer(tmp_path)`` and rename the result to ``path`` atomically."""
    with atomic_file(path, overwrite=overwrite) as tmp:
        writer(tmp)
    return Path(path)


def write_bytes(path: str | os.PathLike, data: bytes, *, overwrite: bool = True) -> Path:
    """Write ``data`` to ``path`` atomically (temporary sibling, then rename)."""
    with atomic_file(path, overwrite=overwrite) as tmp:
        tmp.write_bytes(data)
    return Path(path)
