"""landcheck: screen land classification against terrain with exact area shares.

A screening aid, not a survey or legal determination: local codes, the mandated
agency and licensed practitioners decide.
"""

from landcheck.about import CAUTION, __version__
from landcheck.errors import InputDataError, LandcheckError, LandcheckWarning, OutputExistsError, RuleFileError

__all__ = [
    "CAUTION",
    "InputDataError",
    "LandcheckError",
    "LandcheckWarning",
    "OutputExistsError",
    "RuleFileError",
    "__version__",
]
