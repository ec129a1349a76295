"""The rulebook form's model: a dict shaped like the TOML file, written to TOML text and checked by parse_rules.

The browser keeps the form as that dict; the server turns it into TOML (:func:`to_toml`), reads a TOML
file back into it (:func:`from_toml`), and validates the text with the CLI's own
:func:`landcheck.inputs.rulebook.parse_rules`, so messages carry the same line and key.
"""

from __future__ import annotations

import json
import math
import re
import sys
from pathlib import Path

from landcheck.errors import RuleFileError
from landcheck.inputs.rulebook import parse_rules

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = ["to_toml", "from_toml", "check_text", "RULEBOOK_NAME"]

#: the name the rulebook text goes by in messages and downloads
RULEBOOK_NAME = "rulebook.toml"
_BARE = re.compile(r"^[A-Za-z0-9_-]+$")
_ORDER = ("rulebook", "slope", "layers", "classes", "zones", "uncertainty")


def _key(k: str) -> str:
    return k if _BARE.match(k) else json.dumps(k, ensure_ascii=False)


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"{v!r} is not a finite number")
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)  # a JSON string is a valid TOML basic string
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + " }"
    raise ValueError(f"cannot write {type(v).__name__} values to TOML")


def _table(lines: list[str], header: str, body: dict) -> None:
    lines.append(f"[{header}]")
    for k, v in body.items():
        if v is None or v == "":
            continue
        lines.append(f"{_key(k)} = {_value(v)}")
    lines.append("")


def to_toml(state: dict) -> str:
    """Write the form's dict as TOML: sections in the documented order, empty values left out."""
    lines = ["# written by the landcheck app (docs/rules-file.md)", ""]
    keys = [k for k in _ORDER if k in state] + [k for k in state if k not in _ORDER]
    for top in keys:
        body = state[top]
        if top in ("classes", "zones") and isinstance(body, dict):
            for name, sec in body.items():
                _table(lines, f"{top}.{_key(name)}", sec if isinstance(sec, dict) else {})
        elif isinstance(body, dict):
            if body:
                _table(lines, _key(top), body)
        else:
            lines.insert(2, f"{_key(top)} = {_value(body)}")
    return "\n".join(lines).rstrip("\n") + "\n"


def from_toml(text: str) -> dict:
    """Read TOML text into the form's dict (raises RuleFileError with the CLI's wording on bad TOML)."""
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RuleFileError(
            f"{RULEBOOK_NAME}: not valid TOML: {exc}. Check quotes, brackets and '=' signs on that line."
        ) from None


def check_text(text: str, inputs_dir: Path, layer_files: dict[str, str] | None = None):
    """Validate rulebook text as the CLI does; returns (Rulebook, None) or (None, message).

    The text is checked as if it were ``inputs_dir/rulebook.toml`` so that ``[layers]`` paths resolve
    against the project's uploaded files; a layer path outside that folder, or not uploaded, is refused.
    """
    where = str(inputs_dir / RULEBOOK_NAME)
    try:
        rules = parse_rules(text, path=where)
    except RuleFileError as exc:
        return None, str(exc).replace(where, RULEBOOK_NAME)
    base = inputs_dir.resolve()
    for name, p in rules.layers.items():
        full = Path(p).resolve()
        if base not in full.parents or not full.exists():
            line = next(
                (i + 1 for i, ln in enumerate(text.splitlines()) if re.match(r"^\s*" + re.escape(name) + r"\s*=", ln)),
                None,
            )
            known = ", ".join(sorted((layer_files or {}).values())) or "none yet"
            return None, (
                f"{RULEBOOK_NAME}{f', line {line}' if line else ''}, [layers].{name}: "
                f"{Path(p).name!r} is not a layer uploaded to this project (uploaded: {known}); "
                "upload it under Inputs first."
            )
    return rules, None
