"""String options as enums: one ``from_user`` that accepts values and aliases and lists the choices on failure."""

from __future__ import annotations

import enum
from typing import TypeVar

__all__ = ["UserChoice"]

_C = TypeVar("_C", bound="UserChoice")


class UserChoice(str, enum.Enum):
    """Base for string-valued options.  Subclasses may override :meth:`_aliases` (not an enum member)."""

    @classmethod
    def _aliases(cls) -> dict:
        return {}

    @classmethod
    def _noun(cls) -> str:
        return "value"

    @classmethod
    def from_user(cls: type[_C], value: object) -> _C:
        if isinstance(value, cls):
            return value
        key = str(value).strip().lower()
        aliases = cls._aliases()
        if key in aliases:
            return cls(aliases[key])
        for m in cls:
            if m.value == key:
                return m
        raise ValueError(f"unknown {cls._noun()} {value!r}; choose one of: {', '.join(m.value for m in cls)}")
