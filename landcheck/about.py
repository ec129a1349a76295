"""The package's version (its one source) and the caution every output carries."""

__version__ = "0.2.0.dev0"

CAUTION = (
    "Screening aid only - not a survey or legal determination. Local codes, "
    "the mandated agency and licensed practitioners decide."
)
