"""Counts in plain words, for every message a person reads (logs, warnings, errors, the report)."""

from __future__ import annotations

__all__ = ["count_text"]


def count_text(n: int, singular: str, plural: str | None = None) -> str:
    """``1 parcel``, ``2 parcels``, ``1,234 parcels``.

    >>> count_text(1, "parcel"), count_text(0, "zone"), count_text(12000, "class", "classes")
    ('1 parcel', '0 zones', '12,000 classes')
    """
    word = singular if n == 1 else (plural or singular + "s")
    return f"{n:,d} {word}"
