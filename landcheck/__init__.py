"""landcheck: screen land classification against terrain with exact area shares.

A screening aid, not a survey or legal determination: local codes, the mandated
agency and licensed practitioners decide.

The public API (docs/api.md)::

    import landcheck
    run = landcheck.run_audit("dem.tif", parcels_gdf, "rulebook.toml")   # in memory, no folder
    run.parcels            # GeoDataFrame: every column of parcels.gpkg
    landcheck.audit("dem.tif", "parcels.gpkg", "rulebook.toml", "out/")  # the output folder

Only :mod:`landcheck.about` and :mod:`landcheck.errors` are imported with the
package; every other public name is loaded on first use (PEP 562), so any
submodule may import ``landcheck.errors`` without an import cycle and
``import landcheck`` stays cheap.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

from landcheck.about import CAUTION, __version__
from landcheck.errors import (
    InputDataError,
    LandcheckError,
    LandcheckWarning,
    OutputExistsError,
    OutputWriteError,
    RegionError,
    RuleFileError,
)

if TYPE_CHECKING:  # what the lazy names are, for readers and type checkers
    from landcheck.core.audit import AuditResult, audit
    from landcheck.core.regions import audit_regions
    from landcheck.core.run import AuditRun, run_audit
    from landcheck.core.settings import AuditSettings, CapabilityOptions, ConfidenceOptions
    from landcheck.core.slope_raster import SlopeRunInfo, derive_slope
    from landcheck.engine.backends import Engine, EngineKind
    from landcheck.evidence.prescreen import PrescreenResult, prescreen
    from landcheck.evidence.report import build_report
    from landcheck.hashing import sha256_file
    from landcheck.inputs.dem import DemSource, open_dem
    from landcheck.inputs.dem_crop import crop_dem
    from landcheck.inputs.layers import ParcelSet, read_parcels, validate_parcels
    from landcheck.inputs.rulebook import Rulebook, load_rules, parse_rules, rules_from_mapping

#: public name -> module that defines it (loaded on first access)
_LAZY = {
    "run_audit": "landcheck.core.run",
    "AuditRun": "landcheck.core.run",
    "audit": "landcheck.core.audit",
    "audit_regions": "landcheck.core.regions",
    "AuditResult": "landcheck.core.audit",
    "AuditSettings": "landcheck.core.settings",
    "CapabilityOptions": "landcheck.core.settings",
    "ConfidenceOptions": "landcheck.core.settings",
    "derive_slope": "landcheck.core.slope_raster",
    "SlopeRunInfo": "landcheck.core.slope_raster",
    "Engine": "landcheck.engine.backends",
    "EngineKind": "landcheck.engine.backends",
    "prescreen": "landcheck.evidence.prescreen",
    "PrescreenResult": "landcheck.evidence.prescreen",
    "build_report": "landcheck.evidence.report",
    "load_rules": "landcheck.inputs.rulebook",
    "parse_rules": "landcheck.inputs.rulebook",
    "rules_from_mapping": "landcheck.inputs.rulebook",
    "Rulebook": "landcheck.inputs.rulebook",
    "open_dem": "landcheck.inputs.dem",
    "DemSource": "landcheck.inputs.dem",
    "crop_dem": "landcheck.inputs.dem_crop",
    "read_parcels": "landcheck.inputs.layers",
    "validate_parcels": "landcheck.inputs.layers",
    "ParcelSet": "landcheck.inputs.layers",
    "sha256_file": "landcheck.hashing",
}

__all__ = [
    "CAUTION",
    "__version__",
    # errors and warnings
    "InputDataError",
    "LandcheckError",
    "LandcheckWarning",
    "OutputExistsError",
    "OutputWriteError",
    "RegionError",
    "RuleFileError",
    # the audit
    "run_audit",
    "AuditRun",
    "audit",
    "AuditResult",
    "audit_regions",
    "AuditSettings",
    "CapabilityOptions",
    "ConfidenceOptions",
    "Engine",
    "EngineKind",
    # other jobs
    "derive_slope",
    "SlopeRunInfo",
    "prescreen",
    "PrescreenResult",
    "build_report",
    # inputs
    "load_rules",
    "parse_rules",
    "rules_from_mapping",
    "Rulebook",
    "open_dem",
    "DemSource",
    "crop_dem",
    "read_parcels",
    "validate_parcels",
    "ParcelSet",
    "sha256_file",
]


def __getattr__(name: str):
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'landcheck' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
