"""Exception and warning classes.

Every error the library raises on purpose derives from :class:`LandcheckError`.
The children are named for what the user must fix.  This module imports nothing
from the rest of the package so that any layer may use it.
"""

from __future__ import annotations

__all__ = [
    "LandcheckError",
    "InputDataError",
    "RuleFileError",
    "OutputExistsError",
    "OutputWriteError",
    "RegionError",
    "LandcheckWarning",
]


class LandcheckError(Exception):
    """Root of every error landcheck raises on purpose."""

    #: exit status the command line maps this error to (see docs/cli.md)
    exit_code = 3


class InputDataError(LandcheckError, ValueError):
    """An input file (DEM, parcels, line or hazard layer) is missing or unusable."""


class RuleFileError(LandcheckError, ValueError):
    """The rulebook (TOML) is malformed or holds a value outside what is allowed."""


class OutputExistsError(LandcheckError, FileExistsError):
    """An output already exists and overwriting was not asked for."""


class OutputWriteError(LandcheckError, OSError):
    """An output could not be written (permission, disk full, path inside an input)."""


class RegionError(LandcheckError):
    """A region job of a region run failed; the message names the region and what it met."""


class LandcheckWarning(UserWarning):
    """Something the caller should act on; the run continued and recorded it."""
