"""landcheck: screen land classification against terrain with exact area shares.

A screening aid, not a survey or legal determination: local codes, the mandated
agency and licensed practitioners decide.
"""

from .errors import InputDataError, LandcheckError, LandcheckWarning, OutputExistsError, RuleFileError

__version__ = "0.1.0"

CAUTION = (
    "Screening aid only - not a survey or legal determination. Local codes, "
    "the mandated agency and licensed practitioners decide."
)

__all__ = [
    "CAUTION",
    "InputDataError",
    "LandcheckError",
    "LandcheckWarning",
    "OutputExistsError",
    "RuleFileError",
    "__version__",
]
