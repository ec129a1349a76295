"""Run settings as frozen dataclasses, validated when they are made (before any pass starts).

Everything that shapes an audit besides the three inputs lives in
:class:`AuditSettings`: slope method, tiling, DEM and parcel reading options,
the engine, the rasters, the optional extras (confidence, capability map,
drafted reclassification) and the report.  Construction normalises every
string option to its enum and refuses a bad value with a message naming the
option (:class:`~landcheck.errors.InputDataError` or
:class:`~landcheck.errors.RuleFileError`), so a typo in the capability scheme
is refused before the DEM is even opened.  What can only be checked against
the rulebook or the DEM grid (a hazard zone name, the DEM error model) is
checked by :func:`landcheck.core.run.run_audit` right after the inputs are
read, still before the window pass.

>>> AuditSettings(tile_cells=512, engine="threads").tile_cells
512
>>> AuditSettings(capability=CapabilityOptions("planning-7"))
Traceback (most recent call last):
...
landcheck.errors.RuleFileError: capability map: unknown slope-class scheme 'planning-7'; choose one of: planning-6, fao-2006.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

from landcheck.engine.backends import Engine, EngineKind
from landcheck.errors import InputDataError, RuleFileError
from landcheck.inputs.dem import ZUnit
from landcheck.outputs.writers import RasterFormat
from landcheck.terrain.slope import SlopeMethod
from landcheck.terrain.slope_classes import SlopeClassScheme

__all__ = ["AuditSettings", "CapabilityOptions", "ConfidenceOptions", "MIN_TILE_CELLS", "DEFAULT_TILE_CELLS"]

#: smallest window side accepted (cells); results do not depend on it, but below ~256 the halo is mostly overhead
MIN_TILE_CELLS = 1
DEFAULT_TILE_CELLS = 1024


def _set(obj, name, value) -> None:
    object.__setattr__(obj, name, value)


def _choice(enum_cls, value, option: str):
    try:
        return enum_cls.from_user(value)
    except ValueError as exc:
        raise InputDataError(f"{option}: {exc}.") from None


def _optional_number(value, option: str, *, minimum: float | None = None, whole: bool = False):
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not math.isfinite(float(value)):
        raise InputDataError(f"{option}: got {value!r}; expected a finite number.")
    if whole and (not isinstance(value, numbers.Integral)):
        raise InputDataError(f"{option}: got {value!r}; expected a whole number.")
    if minimum is not None and value < minimum:
        raise InputDataError(f"{option}: got {value!r}; expected a value >= {minimum:g}.")
    return int(value) if whole else float(value)


@dataclass(frozen=True)
class ConfidenceOptions:
    """Verdict confidence under DEM error (docs/confidence.md).

    ``enabled=False`` skips it even when the rulebook has an ``[uncertainty]`` table.  The other
    fields override that table; without an RMSE from either, no confidence run is made.  The
    ranges (RMSE > 0, 10..10 000 realizations, seed >= 0, correlation length vs the cell size)
    are checked against the DEM grid by :func:`landcheck.verdicts.confidence.confidence_settings`
    before the window pass.
    """

    enabled: bool = True
    rmse_m: float | None = None
    corr_length_m: float | None = None
    realizations: int | None = None
    seed: int | None = None

    def __post_init__(self):
        if not isinstance(self.enabled, bool):
            raise InputDataError(f"confidence enabled: got {self.enabled!r}; expected True or False.")
        _set(self, "rmse_m", _optional_number(self.rmse_m, "DEM RMSE (m)"))
        _set(self, "corr_length_m", _optional_number(self.corr_length_m, "correlation length (m)"))
        for name in ("realizations", "seed"):
            v = getattr(self, name)
            if v is not None and (isinstance(v, bool) or not isinstance(v, numbers.Integral)):
                raise RuleFileError(f"confidence options: {name} = {v!r}; expected a whole number.")


@dataclass(frozen=True)
class CapabilityOptions:
    """The land-capability map: a slope-class scheme and the zones counted as hazard (docs/confidence.md).

    ``scheme`` is a built-in key (``planning-6``, ``fao-2006``), a :class:`SlopeClassScheme`, or inner
    breaks in percent (``(8, 18, 30)``); it is resolved here, so a bad scheme is refused up front.
    ``hazard_zones`` (default: all rulebook zones) is checked against the rulebook before the pass.
    """

    scheme: str | SlopeClassScheme | tuple = "planning-6"
    hazard_zones: tuple[str, ...] | None = None

    def __post_init__(self):
        _set(self, "scheme", _resolve_scheme(self.scheme))
        if self.hazard_zones is not None:
            if isinstance(self.hazard_zones, str):
                _set(self, "hazard_zones", (self.hazard_zones,))
            else:
                _set(self, "hazard_zones", tuple(str(z) for z in self.hazard_zones))


def _resolve_scheme(scheme) -> SlopeClassScheme:
    from landcheck.verdicts.capability import resolve_capability_scheme

    return resolve_capability_scheme(scheme)


@dataclass(frozen=True)
class AuditSettings:
    """Everything that shapes an audit besides its three inputs (recorded in the manifest).

    Attributes
    ----------
    method : SlopeMethod or str or None
        ``horn`` or ``zevenbergen-thorne``; None takes the rulebook's (``slope_method``), else Horn.
    tile_cells : int
        Window side in cells (>= 1; the command line asks for >= 16).  Memory is bounded by a few windows per worker.
    dem_band, dem_crs, z_unit
        How to read the DEM when it is given as a path (:func:`landcheck.inputs.dem.open_dem`).
    parcels_layer, parcels_crs
        How to read the parcels when given as a path; ``parcels_crs`` is also assumed for a
        GeoDataFrame without a CRS.
    engine, workers, scheduler_address
        Where every window pass runs (:class:`landcheck.engine.backends.Engine`).
    rasters : RasterFormat or str
        ``cog``, ``cog-deflate``, ``gtiff`` or ``none``: the slope and conflict rasters :func:`landcheck.core.audit.audit`
        writes (``run_audit`` writes no file and ignores this; see :class:`landcheck.core.run.AuditRun`).
    report : bool
        Whether :func:`landcheck.core.audit.audit` writes ``report.html`` (needs rasters; default True;
        ignored by ``run_audit``).
    confidence : ConfidenceOptions
    capability : CapabilityOptions or None
    draft_mmu_m2 : float or None
        Draft the reclassification of conflicting parcels with this minimum mapping unit (m², >= 0).
    zone_polygons : bool
        Also write polygons of the cell-based hazard zones (HAND, sea-level rise, derived strips) to ``zones/*.gpkg``.
    show_progress : bool or None
        Progress bars on stderr (None: when stderr is a terminal).
    """

    method: SlopeMethod | str | None = None
    tile_cells: int = DEFAULT_TILE_CELLS
    dem_band: int | None = None
    dem_crs: str | None = None
    z_unit: ZUnit | str | None = None  # None: the unit the DEM declares (inputs.dem.open_dem)
    mask_implausible: bool = False  # implausible elevations as no data, with a warning, instead of refusing
    parcels_layer: str | None = None
    parcels_crs: str | None = None
    engine: Engine | EngineKind | str = EngineKind.THREADS
    workers: int | None = None
    scheduler_address: str | None = None
    rasters: RasterFormat | str = RasterFormat.COG
    report: bool = True
    confidence: ConfidenceOptions = field(default_factory=ConfidenceOptions)
    capability: CapabilityOptions | None = None
    draft_mmu_m2: float | None = None
    show_progress: bool | None = False
    zone_polygons: bool = False  # also write polygons of the cell-based zones to zones/*.gpkg

    def __post_init__(self):
        if self.method is not None:
            _set(self, "method", _choice(SlopeMethod, self.method, "slope method"))
        t = self.tile_cells
        if isinstance(t, bool) or not isinstance(t, numbers.Integral) or t < MIN_TILE_CELLS:
            raise InputDataError(f"tile size: got {t!r}; expected a whole number of cells >= {MIN_TILE_CELLS}.")
        _set(self, "tile_cells", int(t))
        if self.dem_band is not None and (
            isinstance(self.dem_band, bool) or not isinstance(self.dem_band, numbers.Integral) or self.dem_band < 1
        ):
            raise InputDataError(f"DEM band: got {self.dem_band!r}; expected a band number >= 1.")
        if self.z_unit is not None:
            _set(self, "z_unit", _choice(ZUnit, self.z_unit, "elevation unit"))
        if not isinstance(self.mask_implausible, bool):
            raise InputDataError(f"mask_implausible: got {self.mask_implausible!r}; expected True or False.")
        eng = self.engine
        if not isinstance(eng, Engine):
            eng = Engine.from_user(eng, self.workers, self.scheduler_address)
        elif self.workers is not None or self.scheduler_address is not None:
            eng = Engine.from_user(
                eng.kind, self.workers if self.workers is not None else eng.workers, self.scheduler_address
            )
        _set(self, "engine", eng)
        _set(self, "workers", eng.workers)
        _set(self, "scheduler_address", eng.scheduler_address)
        _set(self, "rasters", _choice(RasterFormat, self.rasters, "rasters"))
        if not isinstance(self.report, bool):
            raise InputDataError(f"report: got {self.report!r}; expected True or False.")
        if self.report and self.rasters is RasterFormat.NONE:
            raise InputDataError(
                "rasters='none' writes no slope or conflict raster, and the report maps need them; "
                "turn the report off (--no-report) or choose rasters 'cog', 'cog-deflate' or 'gtiff'."
            )
        if not isinstance(self.confidence, ConfidenceOptions):
            raise InputDataError(f"confidence: expected ConfidenceOptions, got {type(self.confidence).__name__}.")
        if self.capability is not None and not isinstance(self.capability, CapabilityOptions):
            _set(self, "capability", CapabilityOptions(self.capability))
        if self.draft_mmu_m2 is not None:
            v = self.draft_mmu_m2
            if isinstance(v, bool) or not isinstance(v, numbers.Real) or not math.isfinite(float(v)) or v < 0:
                raise InputDataError(
                    f"drafted reclassification: minimum mapping unit {v!r}; expected an area in m² >= 0 (e.g. 500)."
                )
            _set(self, "draft_mmu_m2", float(v))
        if not isinstance(self.zone_polygons, bool):
            raise InputDataError(f"zone_polygons: got {self.zone_polygons!r}; expected True or False.")
        if self.show_progress is not None and not isinstance(self.show_progress, bool):
            raise InputDataError(f"show_progress: got {self.show_progress!r}; expected True, False or None.")
