"""The rulebook: TOML schema -> frozen dataclasses, with every rule validated here.

See docs/rules-file.md for the schema and a worked example.  Every problem
raises :class:`~landcheck.errors.RuleFileError` naming the file, the line,
the key, what was found and what is allowed.
"""

from __future__ import annotations

import enum
import hashlib
import math
import os
import re
import sys
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from landcheck.errors import RuleFileError
from landcheck.terrain.slope import SlopeMethod

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

__all__ = [
    "rules_from_mapping",
    "Rulebook",
    "ClassRule",
    "ZoneRule",
    "ZoneKind",
    "LandContext",
    "UncertaintySettings",
    "load_rules",
    "parse_rules",
    "NO_RULE",
]

#: class name given to parcels whose class value matches no rule
NO_RULE = "no_rule"

_NAME_RE = re.compile(r"^[a-z][a-z0-9_]{0,39}$")


class LandContext(str, enum.Enum):
    """Land-use context of a class; easement widths can depend on it."""

    URBAN = "urban"
    AGRICULTURAL = "agricultural"
    FOREST = "forest"


class ZoneKind(str, enum.Enum):
    EASEMENT = "easement"
    FLOOD_POLYGONS = "flood_polygons"
    HAND = "hand"
    SEA_RISE = "sea_rise"


@dataclass(frozen=True)
class ClassRule:
    """What one land class may contain.

    Attributes
    ----------
    name : str
        Key of the class in the rulebook (``[classes.<name>]``).
    values : tuple of str
        Raw attribute values that map to this class.
    development : bool
        True when the class releases land for settlement or development.
    max_slope_pct : float or None
        Slope limit; ``None`` when the class has no slope rule.
    tolerance_share : float
        Share (0-1) of the evaluated area allowed over the limit before it is a conflict.
    min_breach_m2 : float
        A breach smaller than this (m²) is not a conflict.
    review_band_pct : float
        Slope points below the limit within which a parcel is flagged for review.
    forbidden_zones : tuple of str
        Hazard zones this class may not contain.
    """

    name: str
    label: str
    values: tuple[str, ...]
    development: bool = True
    context: LandContext | None = None
    max_slope_pct: float | None = None
    tolerance_share: float = 0.0
    min_breach_m2: float = 0.0
    review_band_pct: float = 0.0
    forbidden_zones: tuple[str, ...] = ()
    designated_class: str | None = None


@dataclass(frozen=True)
class ZoneRule:
    """A hazard zone: how it is made (kind, layer, parameters)."""

    name: str
    kind: ZoneKind
    label: str
    params: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class UncertaintySettings:
    rmse_m: float
    corr_length_m: float
    realizations: int
    seed: int


@dataclass(frozen=True)
class Rulebook:
    path: str
    sha256: str
    text: str
    title: str
    class_field: str
    id_field: str | None
    min_evaluated_share: float
    slope_method: SlopeMethod
    classes: tuple[ClassRule, ...]
    zones: tuple[ZoneRule, ...] = ()
    layers: Mapping[str, str] = field(default_factory=dict)
    reference_limit_pct: float | None = None
    uncertainty: UncertaintySettings | None = None

    def class_of_value(self) -> dict[str, str]:
        """Raw attribute value -> class name."""
        return {v: c.name for c in self.classes for v in c.values}

    def class_by_name(self, name: str) -> ClassRule:
        for c in self.classes:
            if c.name == name:
                return c
        raise KeyError(name)

    def zone_by_name(self, name: str) -> ZoneRule:
        for z in self.zones:
            if z.name == name:
                return z
        raise KeyError(name)

    @property
    def capability_limit_pct(self) -> float | None:
        """Slope limit used for the whole-area capability figure."""
        if self.reference_limit_pct is not None:
            return self.reference_limit_pct
        limits = [c.max_slope_pct for c in self.classes if c.development and c.max_slope_pct is not None]
        return min(limits) if limits else None


class _Ctx:
    """Locates keys in the TOML text so messages can give line numbers."""

    def __init__(self, path: str, text: str):
        self.path = path
        self.lines = text.splitlines()

    def line_of(self, section: str | None, key: str | None = None) -> int | None:
        start = 0
        if section is not None:
            pat = re.compile(r"^\s*\[\s*" + r"\s*\.\s*".join(re.escape(p) for p in section.split(".")) + r"\s*\]")
            for i, ln in enumerate(self.lines):
                if pat.match(ln):
                    start = i
                    break
            else:
                return None
            if key is None:
                return start + 1
        if key is None:
            return None
        kpat = re.compile(r"^\s*" + re.escape(key) + r"\s*=")
        for i in range(start + (1 if section else 0), len(self.lines)):
            ln = self.lines[i]
            if section is not None and i > start and re.match(r"^\s*\[", ln):
                break
            if kpat.match(ln):
                return i + 1
        return start + 1 if section else None

    def error(self, section: str | None, key: str | None, msg: str) -> RuleFileError:
        line = self.line_of(section, key)
        where = f"[{section}]" if section else ""
        if key:
            where = f"{where}.{key}" if where else key
        loc = f"{self.path}, line {line}" if line else self.path
        return RuleFileError(f"{loc}, {where}: {msg}" if where else f"{loc}: {msg}")


_TOP_KEYS = {"rulebook", "slope", "layers", "classes", "zones", "uncertainty"}
_RULEBOOK_KEYS = {"title", "class_field", "id_field", "min_evaluated_share", "reference_limit_pct"}
_SLOPE_KEYS = {"method"}
_CLASS_KEYS = {
    "label",
    "values",
    "development",
    "context",
    "max_slope_pct",
    "max_slope_deg",
    "tolerance_pct",
    "min_breach_m2",
    "review_band_pct",
    "forbidden_zones",
    "designated_class",
}
_ZONE_KEYS = {
    ZoneKind.EASEMENT: {
        "kind",
        "label",
        "layer",
        "width_m",
        "derive",
        "channel_area_m2",
        "datum_m",
        "sea_point",
        "nodata_is_sea",
        "channel_width_field",
    },
    ZoneKind.FLOOD_POLYGONS: {"kind", "label", "layer", "level_field", "min_level"},
    ZoneKind.HAND: {"kind", "label", "max_hand_m", "channel_area_m2"},
    ZoneKind.SEA_RISE: {"kind", "label", "datum_m", "rise_m", "surge_m", "sea_point", "nodata_is_sea", "scenarios_m"},
}
_UNC_KEYS = {"rmse_m", "corr_length_m", "realizations", "seed"}
MAX_REALIZATIONS = 10_000
MIN_REALIZATIONS = 10


def _unknown(ctx: _Ctx, section: str | None, got: Mapping, allowed: set[str]) -> None:
    extra = sorted(set(got) - allowed)
    if extra:
        raise ctx.error(
            section, extra[0], f"unknown key {extra[0]!r}; allowed keys here: {', '.join(sorted(allowed))}."
        )


def _number(ctx, section, key, value, *, lo=None, hi=None, lo_open=False, hi_open=False, unit="") -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ctx.error(
            section, key, f"got {value!r}; expected a number{(' in ' + unit) if unit else ''}, e.g. {key} = 18.0."
        )
    v = float(value)
    bad = (lo is not None and (v < lo or (lo_open and v == lo))) or (
        hi is not None and (v > hi or (hi_open and v == hi))
    )
    if bad:
        lb = "(" if lo_open else "["
        rb = ")" if hi_open else "]"
        raise ctx.error(
            section,
            key,
            f"got {value!r}; allowed range is {lb}{lo if lo is not None else '-inf'}, "
            f"{hi if hi is not None else 'inf'}{rb}{(' ' + unit) if unit else ''}.",
        )
    return v


def _string(ctx, section, key, value) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ctx.error(section, key, f"got {value!r}; expected a non-empty text value in quotes.")
    return value


def _str_list(ctx, section, key, value) -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, (str, int)) and not isinstance(v, bool) for v in value):
        raise ctx.error(section, key, f'got {value!r}; expected a list of values, e.g. {key} = ["RES-1", "RES-2"].')
    return tuple(str(v) for v in value)


def load_rules(path: str | os.PathLike) -> Rulebook:
    """Read and validate a rulebook file.

    Raises
    ------
    RuleFileError
        Missing file, invalid TOML, unknown keys, values out of range, dangling references.
    """
    path = os.fspath(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise RuleFileError(f"{path}: rulebook file not found.") from None
    except OSError as exc:
        raise RuleFileError(f"{path}: cannot read the rulebook ({exc.strerror}).") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise RuleFileError(f"{path}: the rulebook is not UTF-8 text (byte {exc.start}).") from None
    return parse_rules(text, path=path, sha256=hashlib.sha256(raw).hexdigest())


def parse_rules(text: str, *, path: str = "<rulebook>", sha256: str | None = None) -> Rulebook:
    """Validate rulebook text (see :func:`load_rules`)."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise RuleFileError(
            f"{path}: not valid TOML: {exc}. Check quotes, brackets and '=' signs on that line."
        ) from None
    return rules_from_mapping(data, path=path, text=text, sha256=sha256)


def rules_from_mapping(
    data: Mapping, *, path: str = "<rulebook mapping>", text: str | None = None, sha256: str | None = None
) -> Rulebook:
    """Validate a rulebook given as a mapping shaped like the parsed TOML (same rules as :func:`load_rules`).

    ``text`` is the record kept in the manifest; by default the mapping as sorted JSON.
    """
    if not isinstance(data, Mapping):
        raise RuleFileError(
            f"{path}: a rulebook mapping must be a dict shaped like the TOML file, got {type(data).__name__}."
        )
    if text is None:
        import json

        text = json.dumps(data, sort_keys=True, indent=1, default=str)
    ctx = _Ctx(path, text)
    _unknown(ctx, None, data, _TOP_KEYS)
    base = Path(path).parent if path and not path.startswith("<") else Path(".")

    rb = data.get("rulebook")
    if not isinstance(rb, dict):
        raise ctx.error(
            None, None, 'missing the [rulebook] section (it names the parcel attribute: class_field = "zoning").'
        )
    _unknown(ctx, "rulebook", rb, _RULEBOOK_KEYS)
    if "class_field" not in rb:
        raise ctx.error(
            "rulebook",
            None,
            'missing class_field, the parcel attribute that holds the class (e.g. class_field = "zoning").',
        )
    class_field = _string(ctx, "rulebook", "class_field", rb["class_field"])
    id_field = _string(ctx, "rulebook", "id_field", rb["id_field"]) if "id_field" in rb else None
    min_eval = _number(
        ctx, "rulebook", "min_evaluated_share", rb.get("min_evaluated_share", 0.8), lo=0, hi=1, unit="(share 0-1)"
    )
    ref_limit = None
    if "reference_limit_pct" in rb:
        ref_limit = _number(
            ctx, "rulebook", "reference_limit_pct", rb["reference_limit_pct"], lo=0, hi=100, lo_open=True, unit="%"
        )
    title = str(rb.get("title", Path(path).stem))

    slope = data.get("slope", {})
    if not isinstance(slope, dict):
        raise ctx.error(None, "slope", "expected a [slope] section.")
    _unknown(ctx, "slope", slope, _SLOPE_KEYS)
    try:
        method = SlopeMethod.from_user(slope.get("method", "horn"))
    except ValueError as exc:
        raise ctx.error("slope", "method", str(exc)) from None

    layers_raw = data.get("layers", {})
    if not isinstance(layers_raw, dict):
        raise ctx.error(None, "layers", 'expected a [layers] section of name = "path" entries.')
    layers = {}
    for name, p in layers_raw.items():
        p = _string(ctx, "layers", name, p)
        layers[name] = str((base / p) if not os.path.isabs(p) else Path(p))

    zones_raw = data.get("zones", {})
    if not isinstance(zones_raw, dict):
        raise ctx.error(None, "zones", "expected [zones.<name>] sections.")
    zones = []
    for zname, z in zones_raw.items():
        sec = f"zones.{zname}"
        if not _NAME_RE.match(zname):
            raise ctx.error(
                sec,
                None,
                f"zone name {zname!r} must be lower-case letters, digits and _ (max 40), starting with a letter.",
            )
        if not isinstance(z, dict) or "kind" not in z:
            raise ctx.error(sec, None, f"missing kind; choose one of: {', '.join(k.value for k in ZoneKind)}.")
        try:
            kind = ZoneKind(z["kind"])
        except ValueError:
            raise ctx.error(
                sec, "kind", f"got {z['kind']!r}; choose one of: {', '.join(k.value for k in ZoneKind)}."
            ) from None
        _unknown(ctx, sec, z, _ZONE_KEYS[kind])
        params = _zone_params(ctx, sec, kind, z, layers)
        zones.append(ZoneRule(zname, kind, str(z.get("label", zname.replace("_", " "))), params))
    zone_names = {z.name for z in zones}

    classes_raw = data.get("classes")
    if not isinstance(classes_raw, dict) or not classes_raw:
        raise ctx.error(None, "classes", "no [classes.<name>] sections; define at least one class with its values.")
    classes = []
    seen_values: dict[str, str] = {}
    for cname, c in classes_raw.items():
        sec = f"classes.{cname}"
        if not _NAME_RE.match(cname) or cname == NO_RULE:
            raise ctx.error(
                sec,
                None,
                f"class name {cname!r} must be lower-case letters, digits and _ (max 40) and not {NO_RULE!r}.",
            )
        if not isinstance(c, dict):
            raise ctx.error(sec, None, "expected a table of keys.")
        _unknown(ctx, sec, c, _CLASS_KEYS)
        if "values" not in c:
            raise ctx.error(
                sec, None, 'missing values, the raw attribute values of this class (e.g. values = ["RES-1"]).'
            )
        values = _str_list(ctx, sec, "values", c["values"])
        if not values:
            raise ctx.error(sec, "values", "the list is empty; give at least one attribute value.")
        for v in values:
            if v in seen_values:
                raise ctx.error(
                    sec,
                    "values",
                    f"value {v!r} is already mapped to class {seen_values[v]!r}; each value belongs to one class.",
                )
            seen_values[v] = cname
        development = c.get("development", True)
        if not isinstance(development, bool):
            raise ctx.error(sec, "development", f"got {development!r}; expected true or false.")
        context = None
        if "context" in c:
            try:
                context = LandContext(c["context"])
            except ValueError:
                raise ctx.error(
                    sec, "context", f"got {c['context']!r}; choose one of: {', '.join(x.value for x in LandContext)}."
                ) from None
        if "max_slope_pct" in c and "max_slope_deg" in c:
            raise ctx.error(sec, "max_slope_deg", "give max_slope_pct or max_slope_deg, not both.")
        limit = None
        if "max_slope_pct" in c:
            limit = _number(ctx, sec, "max_slope_pct", c["max_slope_pct"], lo=0, hi=100, lo_open=True, unit="%")
        elif "max_slope_deg" in c:
            deg = _number(ctx, sec, "max_slope_deg", c["max_slope_deg"], lo=0, hi=45, lo_open=True, unit="degrees")
            limit = 100.0 * math.tan(math.radians(deg))
        tol = _number(ctx, sec, "tolerance_pct", c.get("tolerance_pct", 0.0), lo=0, hi=100, hi_open=True, unit="%")
        min_breach = _number(ctx, sec, "min_breach_m2", c.get("min_breach_m2", 0.0), lo=0, unit="m²")
        band = _number(
            ctx, sec, "review_band_pct", c.get("review_band_pct", 0.0), lo=0, hi=100, unit="percentage points"
        )
        if limit is not None and band >= limit:
            raise ctx.error(
                sec, "review_band_pct", f"got {band:g}; the review band must be smaller than the limit ({limit:g} %)."
            )
        if limit is None and any(k in c for k in ("tolerance_pct", "review_band_pct")) and "forbidden_zones" not in c:
            raise ctx.error(
                sec,
                "tolerance_pct",
                "this class has no max_slope_pct and no forbidden_zones, so a tolerance means nothing.",
            )
        forbidden = _str_list(ctx, sec, "forbidden_zones", c.get("forbidden_zones", []))
        for zn in forbidden:
            if zn not in zone_names:
                raise ctx.error(
                    sec,
                    "forbidden_zones",
                    f"zone {zn!r} is not defined; defined zones: {', '.join(sorted(zone_names)) or 'none'} (add a [zones.{zn}] section).",
                )
        designated = None
        if "designated_class" in c:
            designated = _string(ctx, sec, "designated_class", c["designated_class"])
        classes.append(
            ClassRule(
                cname,
                str(c.get("label", cname.replace("_", " ").title())),
                values,
                development,
                context,
                limit,
                tol / 100.0,
                min_breach,
                band,
                forbidden,
                designated,
            )
        )
    names = {c.name for c in classes}
    for c in classes:
        if c.designated_class is not None and c.designated_class not in names:
            raise ctx.error(
                f"classes.{c.name}",
                "designated_class",
                f"class {c.designated_class!r} is not defined; choose one of: {', '.join(sorted(names))}.",
            )
    for z in zones:
        if z.kind is ZoneKind.EASEMENT and isinstance(z.params.get("width_m"), dict):
            for c in classes:
                if z.name in c.forbidden_zones and c.context is None:
                    raise ctx.error(
                        f"classes.{c.name}",
                        "context",
                        f"zone {z.name!r} sets widths per land-use context, so this class needs context = "
                        f'"urban", "agricultural" or "forest".',
                    )

    unc = None
    if "uncertainty" in data:
        u = data["uncertainty"]
        _unknown(ctx, "uncertainty", u, _UNC_KEYS)
        rmse = _number(ctx, "uncertainty", "rmse_m", u.get("rmse_m"), lo=0, lo_open=True, unit="m")
        corr = _number(ctx, "uncertainty", "corr_length_m", u.get("corr_length_m", 0.0), lo=0, unit="m")
        n = u.get("realizations", 100)
        if isinstance(n, bool) or not isinstance(n, int) or not MIN_REALIZATIONS <= n <= MAX_REALIZATIONS:
            raise ctx.error(
                "uncertainty",
                "realizations",
                f"got {n!r}; expected a whole number from {MIN_REALIZATIONS} to {MAX_REALIZATIONS}.",
            )
        seed = u.get("seed", 0)
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise ctx.error("uncertainty", "seed", f"got {seed!r}; expected a whole number >= 0.")
        unc = UncertaintySettings(rmse, corr, n, seed)

    return Rulebook(
        path=path,
        sha256=sha256 or hashlib.sha256(text.encode()).hexdigest(),
        text=text,
        title=title,
        class_field=class_field,
        id_field=id_field,
        min_evaluated_share=min_eval,
        slope_method=method,
        classes=tuple(classes),
        zones=tuple(zones),
        layers=layers,
        reference_limit_pct=ref_limit,
        uncertainty=unc,
    )


def _zone_params(ctx: _Ctx, sec: str, kind: ZoneKind, z: Mapping, layers: Mapping[str, str]) -> dict:
    p: dict[str, Any] = {}
    if kind in (ZoneKind.EASEMENT, ZoneKind.FLOOD_POLYGONS) and "layer" in z:
        lay = _string(ctx, sec, "layer", z["layer"])
        if lay not in layers:
            raise ctx.error(
                sec, "layer", f"layer {lay!r} is not listed in [layers]; listed: {', '.join(sorted(layers)) or 'none'}."
            )
        p["layer"] = lay
    if kind is ZoneKind.EASEMENT:
        if "layer" not in z and "derive" not in z:
            raise ctx.error(
                sec, None, 'an easement needs layer = "<name in [layers]>" or derive = "shoreline" / "streams".'
            )
        if "channel_width_field" in z:
            if "layer" not in z:
                raise ctx.error(
                    sec, "channel_width_field", "only a line layer can carry channel widths; add layer = ..."
                )
            p["channel_width_field"] = _string(ctx, sec, "channel_width_field", z["channel_width_field"])
        if "derive" in z:
            if z["derive"] not in ("shoreline", "streams"):
                raise ctx.error(sec, "derive", f'got {z["derive"]!r}; choose "shoreline" or "streams".')
            if "layer" in z:
                raise ctx.error(sec, "derive", "give layer or derive, not both.")
            p["derive"] = z["derive"]
            if z["derive"] == "streams":
                p["channel_area_m2"] = _number(
                    ctx, sec, "channel_area_m2", z.get("channel_area_m2", 1_000_000.0), lo=0, lo_open=True, unit="m²"
                )
            else:
                p.update(_sea_params(ctx, sec, z))
        w = z.get("width_m")
        if isinstance(w, dict):
            _unknown(ctx, sec, w, {x.value for x in LandContext})
            if not w:
                raise ctx.error(sec, "width_m", "the table is empty; give urban, agricultural and/or forest widths.")
            p["width_m"] = {
                LandContext(k): _number(ctx, sec, "width_m", v, lo=0, hi=10_000, lo_open=True, unit="m")
                for k, v in w.items()
            }
        else:
            p["width_m"] = _number(ctx, sec, "width_m", w, lo=0, hi=10_000, lo_open=True, unit="m")
    elif kind is ZoneKind.FLOOD_POLYGONS:
        if "layer" not in z:
            raise ctx.error(sec, None, 'flood_polygons needs layer = "<name in [layers]>".')
        p["level_field"] = _string(ctx, sec, "level_field", z.get("level_field", ""))
        p["min_level"] = _number(ctx, sec, "min_level", z.get("min_level"))
    elif kind is ZoneKind.HAND:
        p["max_hand_m"] = _number(ctx, sec, "max_hand_m", z.get("max_hand_m"), lo=0, hi=1000, lo_open=True, unit="m")
        p["channel_area_m2"] = _number(
            ctx, sec, "channel_area_m2", z.get("channel_area_m2", 1_000_000.0), lo=0, lo_open=True, unit="m²"
        )
    elif kind is ZoneKind.SEA_RISE:
        p.update(_sea_params(ctx, sec, z))
        p["rise_m"] = _number(ctx, sec, "rise_m", z.get("rise_m"), lo=0, hi=100, unit="m")
        p["surge_m"] = _number(ctx, sec, "surge_m", z.get("surge_m", 0.0), lo=0, hi=100, unit="m")
        if "scenarios_m" in z:
            sc = z["scenarios_m"]
            if not isinstance(sc, list) or not sc:
                raise ctx.error(
                    sec, "scenarios_m", f"got {sc!r}; expected a list of rises in metres, e.g. [0.5, 1.0, 2.0]."
                )
            vals = [_number(ctx, sec, "scenarios_m", v, lo=0, hi=100, unit="m") for v in sc]
            for a, b in zip(vals, vals[1:]):
                if b <= a:
                    raise ctx.error(
                        sec,
                        "scenarios_m",
                        f"the scenario list {sc} is not increasing ({b:g} m after {a:g} m); "
                        "list the rises from lowest to highest, each once.",
                    )
            p["scenarios_m"] = tuple(vals)
    return p


def _sea_params(ctx: _Ctx, sec: str, z: Mapping) -> dict:
    p: dict[str, Any] = {"datum_m": _number(ctx, sec, "datum_m", z.get("datum_m", 0.0), unit="m")}
    if "sea_point" in z:
        sp = z["sea_point"]
        if not (
            isinstance(sp, list)
            and len(sp) == 2
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in sp)
        ):
            raise ctx.error(sec, "sea_point", f"got {sp!r}; expected [x, y] in the DEM's CRS.")
        p["sea_point"] = (float(sp[0]), float(sp[1]))
    nis = z.get("nodata_is_sea", False)
    if not isinstance(nis, bool):
        raise ctx.error(sec, "nodata_is_sea", f"got {nis!r}; expected true or false.")
    p["nodata_is_sea"] = nis
    return p
