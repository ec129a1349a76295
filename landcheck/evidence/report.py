"""One self-contained HTML report from an audit output folder.

:func:`build_report` reads only the folder written by ``landcheck audit``
(docs/outputs.md), draws the maps and charts of :mod:`landcheck.evidence.maps`, and
writes ``report.html``: every image inlined as a base64 PNG, CSS and a small
table-sorting script inline, and a Content-Security-Policy that forbids any
network fetch.  The page opens from disk with no network at all.

The report is deterministic apart from one element, the build time
(``<time id="report-built">``): rebuilding from the same folder gives the same
figures and the same text otherwise.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import json
import logging
import math
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np

from landcheck.about import CAUTION, __version__
from landcheck.engine.interrupt import raise_if_interrupted
from landcheck.engine.windows import progress_bar
from landcheck.evidence.figure_worker import (
    FigureJob,
    closeup_folder,
    closeup_subset,
    draw_charts,
    draw_closeups,
    draw_overview,
)
from landcheck.evidence.folder import AuditFolder, load_audit_folder
from landcheck.evidence.maps import (
    VERDICTS,
    FigureFiles,
    FigureItem,
    closeup_rank,
    load_map_data,
    remove_closeups,
)
from landcheck.evidence.style import CONFIDENCE_SHORT, DEFAULT_SLOPE_BREAKS_PCT, VERDICT_TEXT, count_text, yes_no
from landcheck.evidence.webmap import WEBMAP_CSS, webmap_section
from landcheck.hashing import sha256_file
from landcheck.inputs.gdal_cache import cap_gdal_cache
from landcheck.outputs.folder import source_date_utc
from landcheck.outputs.writers import atomic_file
from landcheck.verdicts.labels import verdict_badge_css

__all__ = ["PAGE_SIZES", "build_report", "sha256_file"]

logger = logging.getLogger(__name__)

#: files of the output contract whose SHA-256 the report lists (docs/outputs.md)
_OUTPUT_FILES = (
    "parcels.gpkg",
    "parcels.csv",
    "classes.csv",
    "summary.json",
    "slope_pct.tif",
    "conflict.tif",
    "confidence.csv",
    "confidence_classes.csv",
    "capability.tif",
    "capability_by_class.csv",
    "capability_legend.csv",
    "reclassification.gpkg",
    "reclassification_moves.csv",
)
_CSP = (
    "default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'unsafe-inline'; "
    "base-uri 'none'; form-action 'none'"
)
#: progress-bar steps besides the close-ups: tables, rasters, overview, interactive map,
#: charts, parcel table, hashes, writing
_FIXED_STEPS = 8
#: printed sheet sizes (ISO 216 A4, ANSI Letter)
PAGE_SIZES = {"a4": "A4", "letter": "Letter"}
_M2_PER_HA = 10_000.0

# per-parcel table: (column, header, kind) ; kind: text | m2 | share | pct
_PARCEL_COLUMNS = [
    ("parcel_id", "Parcel", "text"),
    ("class_value", "Class value", "text"),
    ("class_name", "Class", "text"),
    ("verdict", "Verdict", "verdict"),
    ("area_m2", "Area (m\u00b2)", "m2"),
    ("evaluated_share", "Evaluated", "share"),
    ("slope_mean_pct", "Mean slope (%)", "pct"),
    ("slope_max_pct", "Max slope (%)", "pct"),
    ("max_slope_pct", "Limit (%)", "pct"),
    ("over_limit_share", "Over limit", "share"),
    ("near_limit_m2", "Near limit (m\u00b2)", "m2"),
    ("conflict_m2", "Conflict (m\u00b2)", "m2"),
    ("conflict_share", "Conflict share", "share"),
    ("p_conflict", "Chance of conflict", "share"),
    ("confidence", "Confidence", "text"),
]
_PARCEL_TAIL = [("reasons", "Reasons", "text"), ("geometry_note", "Geometry", "text")]
_CLASS_COLUMNS = [
    ("class_name", "Class", "text"),
    ("label", "Label", "text"),
    ("development", "Development", "flag"),
    ("limit_pct", "Slope limit (%)", "pct"),
    ("parcels", "Parcels", "int"),
    ("area_m2", "Area (m\u00b2)", "m2"),
    ("evaluated_m2", "Evaluated (m\u00b2)", "m2"),
    ("compliant_m2", "Compliant (m\u00b2)", "m2"),
    ("over_limit_m2", "Over limit (m\u00b2)", "m2"),
    ("conflict_m2", "Conflict (m\u00b2)", "m2"),
    ("conflict_share", "Conflict share", "share"),
    ("n_consistent", "Consistent", "int"),
    ("n_conflict", "Conflict", "int"),
    ("n_review", "Review", "int"),
    ("n_no_data", "No data", "int"),
]


# --------------------------------------------------------------------------- formatting


def _e(text) -> str:
    return html.escape("" if text is None else str(text), quote=True)


def _num(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return math.nan
    return f


def _fmt(v, kind: str) -> str:
    f = _num(v)
    if kind in ("text", "verdict"):
        return "" if v is None or (isinstance(v, float) and math.isnan(v)) else str(v)
    if kind == "flag":
        return "" if v is None or (isinstance(v, float) and math.isnan(v)) else yes_no(v)
    if math.isnan(f):
        return "\u2013"
    if kind == "m2":
        return f"{f:,.0f}"
    if kind == "ha":
        return f"{f / _M2_PER_HA:,.2f}"
    if kind == "share":
        return f"{100.0 * f:.1f} %"
    if kind == "pct":
        return f"{f:.1f}"
    if kind == "int":
        return f"{int(round(f)):,d}"
    return str(v)


def _data_value(v, kind: str) -> str:
    """Raw sort key: full-precision number for numeric columns, '' for missing."""
    if kind in ("text", "verdict", "flag"):
        return _fmt(v, kind)
    f = _num(v)
    return "" if math.isnan(f) or math.isinf(f) else repr(f)


def _area_text(m2) -> str:
    f = _num(m2)
    if math.isnan(f):
        return "\u2013"
    return f'{f / _M2_PER_HA:,.2f} ha <span class="muted">({f:,.0f} m\u00b2)</span>'


def _verdict_badge(v: str) -> str:
    cls = v if v in VERDICTS else "other"
    return f'<span class="badge v-{cls}">{_e(VERDICT_TEXT.get(v, v.replace("_", " ")))}</span>'


def _table(
    table_id: str,
    columns: Sequence[tuple[str, str, str]],
    rows: Iterable[dict],
    caption: str,
    numeric_text_cols: set[str] = frozenset(),
    row_key: str | None = None,
) -> str:
    """A sortable table: every header is a button; cells carry data-value sort keys.

    With ``row_key``, every row carries ``data-pid`` (that column's text) and is focusable,
    so the interactive map can find it and a click on it can find the map feature.
    """
    out = [
        f'<div class="table-wrap"><table id="{_e(table_id)}" class="sortable">',
        f"<caption>{caption}</caption><thead><tr>",
    ]
    for key, head, kind in columns:
        dtype = "num" if (kind not in ("text", "verdict", "flag") or key in numeric_text_cols) else "text"
        out.append(
            f'<th scope="col" data-type="{dtype}" data-col="{_e(key)}" aria-sort="none">'
            f'<button type="button" data-col="{_e(key)}">{_e(head)}<span class="arrow" aria-hidden="true">'
            "</span></button></th>"
        )
    out.append("</tr></thead><tbody>")
    for i, row in enumerate(rows):
        if row_key is not None:
            out.append(f'<tr data-row="{i}" data-pid="{_e(row.get(row_key, ""))}" tabindex="0">')
        else:
            out.append(f'<tr data-row="{i}">')
        for key, _, kind in columns:
            v = row.get(key)
            if key in numeric_text_cols:
                dv = _data_value(v, "pct") if not math.isnan(_num(v)) else ""
            else:
                dv = _data_value(v, kind)
            shown = _verdict_badge(str(v)) if kind == "verdict" else _e(_fmt(v, kind))
            align = (
                ' class="wide"' if key == "reasons" else ("" if kind in ("text", "verdict", "flag") else ' class="n"')
            )
            out.append(f'<td{align} data-value="{_e(dv)}">{shown}</td>')
        out.append("</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


# --------------------------------------------------------------------------- sections


def _figure_html(item: FigureItem, alt: str, css_class: str = "") -> str:
    png = item.png
    if png is None or not png.exists():
        return ""
    data = base64.b64encode(png.read_bytes()).decode("ascii")
    cls = f' class="{css_class}"' if css_class else ""
    return (
        f'<figure{cls} id="fig-{_e(item.stem)}"><img src="data:image/png;base64,{data}" alt="{_e(alt)}">'
        f"<figcaption>{_e(item.caption)}</figcaption></figure>"
    )


def _summary_section(folder: AuditFolder) -> str:
    t = folder.section("totals", default={}) or {}
    cards = [
        ("Parcels", _e(_fmt(t.get("parcels"), "int"))),
        ("Parcel area", _area_text(t.get("area_m2"))),
        ("Evaluated area", _area_text(t.get("evaluated_m2"))),
        ("Conflict area", _area_text(t.get("conflict_m2"))),
        ("Conflict share of evaluated area", _e(_fmt(t.get("conflict_share"), "share"))),
    ]
    parts = ['<section id="summary"><h2>Summary</h2><div class="cards">']
    for head, val in cards:
        parts.append(f'<div class="card"><div class="card-h">{_e(head)}</div><div class="card-v">{val}</div></div>')
    parts.append("</div>")
    counts = t.get("verdict_counts") or {}
    if counts:
        parts.append(
            '<table class="plain" id="verdict-counts"><caption>Parcels by verdict</caption>'
            '<thead><tr><th scope="col">Verdict</th><th scope="col">Parcels</th></tr></thead><tbody>'
        )
        keys = [v for v in VERDICTS if v in counts] + sorted(set(counts) - set(VERDICTS))
        for k in keys:
            parts.append(f'<tr><td>{_verdict_badge(k)}</td><td class="n">{_e(_fmt(counts[k], "int"))}</td></tr>')
        parts.append("</tbody></table>")
    parts.append(
        '<p class="muted">Verdicts: <b>conflict</b> - part of the parcel breaks a rule of its class; '
        "<b>review</b> - close to a limit, look closer; <b>consistent</b> - no rule broken; "
        "<b>no data</b> - outside the DEM or without slope; <b>no rule</b> - the class value has no rule "
        "in the rulebook.</p></section>"
    )
    return "".join(parts)


def _reference_limit_choice(folder: AuditFolder, ref: float) -> str:
    """How the reference limit was chosen, in words."""
    text = str(folder.section("manifest", "rulebook", "text", default="") or "")
    if "reference_limit_pct" in text:
        return f"{ref:g} %, set in the rulebook (<code>reference_limit_pct</code>)"
    return (
        f"{ref:g} %, the lowest slope limit of the development classes (the rulebook sets no "
        "<code>reference_limit_pct</code>; set it to compare against another limit)"
    )


def _capability_section(folder: AuditFolder) -> str:
    c = folder.section("capability", default={}) or {}
    if not c:
        return (
            '<section id="capability"><h2>Terrain capability and classification</h2>'
            "<p>summary.json has no capability figures.</p></section>"
        )
    ref = _num(c.get("reference_limit_pct"))
    dem = _num(c.get("dem_land_m2"))
    cap, cap_sh = _num(c.get("land_within_limit_m2")), _num(c.get("land_within_limit_share"))
    dev, dev_sh = _num(c.get("classified_development_m2")), _num(c.get("classified_development_share"))
    rows = [
        ("Land with a slope (DEM land)", dem, 1.0 if dem > 0 else math.nan),
        (f"Land under the reference slope limit of {ref:g} %", cap, cap_sh),
        ("Land classified for development", dev, dev_sh),
    ]
    parts = [
        '<section id="capability"><h2>Terrain capability and classification</h2>',
        f"<p>Reference limit: {_reference_limit_choice(folder, ref)}.</p>",
        '<table class="plain" id="capability-table"><caption>What the terrain allows vs what is classified'
        '</caption><thead><tr><th scope="col"></th><th scope="col">Area</th>'
        '<th scope="col">Share of DEM land</th></tr></thead><tbody>',
    ]
    for head, area, share in rows:
        parts.append(
            f'<tr><th scope="row">{_e(head)}</th><td class="n">{_area_text(area)}</td>'
            f'<td class="n">{_e(_fmt(share, "share"))}</td></tr>'
        )
    parts.append("</tbody></table>")
    if not (math.isnan(dev) or math.isnan(cap)):
        gap = abs(dev - cap)
        if dev > cap:
            parts.append(
                f'<p class="flag" id="capability-verdict">More land is classified for development than the '
                f"terrain offers under {ref:g} % slope: {_area_text(gap)} more. At least that much of the "
                "development land must lie on steeper ground or outside the DEM.</p>"
            )
        else:
            parts.append(
                f'<p id="capability-verdict">Land classified for development is {_area_text(gap)} less than the '
                f"land under {ref:g} % slope, so the totals alone show no shortfall. They do not show where the "
                "development land lies; the rows below give, for each class, the land on ground at or over "
                "its own limit.</p>"
            )
    # the figure per class limit: each development class against its own limit
    limits = folder.class_limits_pct
    labels = _class_labels(folder)
    per = []
    for rec in folder.classes.to_dict("records"):
        name = str(rec["class_name"])
        lim = limits.get(name, math.nan)
        if str(rec.get("development", "")).strip().lower() not in ("true", "1", "yes") or math.isnan(lim):
            continue
        ev, over = _num(rec.get("evaluated_m2")), _num(rec.get("over_limit_m2"))
        per.append(
            f'<tr><th scope="row">{_e(labels.get(name, name))}</th><td class="n">{lim:g} %</td>'
            f'<td class="n">{_area_text(ev)}</td><td class="n">{_area_text(over)}</td>'
            f'<td class="n">{_e(_fmt(over / ev if ev > 0 else math.nan, "share"))}</td></tr>'
        )
    if per:
        parts.append(
            '<table class="plain" id="capability-per-limit"><caption>Each development class against its own '
            'slope limit</caption><thead><tr><th scope="col">Class</th><th scope="col">Slope limit</th>'
            '<th scope="col">Evaluated land</th><th scope="col">At or over the limit</th>'
            '<th scope="col">Share</th></tr></thead><tbody>' + "".join(per) + "</tbody></table>"
        )
    parts.append("</section>")
    return "".join(parts)


def _class_labels(folder: AuditFolder) -> dict[str, str]:
    """Rulebook label per class key (classes.csv), the key in plain words when there is none."""
    df = folder.classes
    out = {}
    for rec in df.to_dict("records"):
        name = str(rec["class_name"])
        label = str(rec.get("label") or "").strip()
        out[name] = label if label and label.lower() != "nan" else name.replace("_", " ")
    return out


def _classes_section(folder: AuditFolder) -> str:
    df = folder.classes
    limits = folder.class_limits_pct
    rows = []
    for rec in df.to_dict("records"):
        rec = dict(rec)
        rec["limit_pct"] = limits.get(rec["class_name"], math.nan)
        rows.append(rec)
    cols = [c for c in _CLASS_COLUMNS if c[0] in df.columns or c[0] == "limit_pct"]
    return (
        '<section id="classes" class="wide-table"><h2>Per class</h2>'
        + _table("class-table", cols, rows, "One row per rulebook class (classes.csv); click a header to sort.")
        + "</section>"
    )


_CONFIDENCE_COLUMNS = [
    ("class_name", "Class", "text"),
    ("parcels_evaluated", "Parcels", "int"),
    ("expected_conflicts", "Expected conflicts", "pct"),
    ("n_robust_conflict", "Robust conflict", "int"),
    ("n_uncertain", "Uncertain", "int"),
    ("n_robust_clear", "Robust clear", "int"),
    ("conflict_share_p05", "Conflict share p5", "share"),
    ("conflict_share_p50", "p50", "share"),
    ("conflict_share_p95", "p95", "share"),
]
_MOVES_COLUMNS = [
    ("from_class", "From class", "text"),
    ("to_class", "To class", "text"),
    ("parcels", "Parcels", "int"),
    ("area_m2", "Area (m\u00b2)", "m2"),
]


def html_head(title: str, css: str, csp: str) -> str:
    """Opening of a self-contained page: a Content-Security-Policy that forbids every fetch, inline CSS."""
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">\n'
        f'<meta http-equiv="Content-Security-Policy" content="{csp}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        '<meta name="generator" content="landcheck">\n'
        '<link rel="icon" href="data:,">\n'
        f"<title>{_e(title)}</title>\n"
        f"<style>{css}</style></head><body>"
    )


def _final_name(out_dir: Path) -> str:
    """The folder's name once the audit renames its staging folder (``.NAME.partial-XXXX`` -> ``NAME``)."""
    name = out_dir.name
    if name.startswith(".") and ".partial-" in name:
        return name[1:].split(".partial-")[0]
    return name


def _optional_csv(folder: AuditFolder, name: str):
    import pandas as pd

    p = folder.out_dir / name
    return pd.read_csv(p) if p.exists() else None


def _extras_section(folder: AuditFolder) -> str:
    """Verdict confidence, land capability and drafted reclassification, when the audit produced them."""
    parts = []
    labels = _class_labels(folder)
    conf = _optional_csv(folder, "confidence_classes.csv")
    if conf is not None:
        c = folder.section("confidence", default={}) or {}
        model = (c.get("settings") or c) if isinstance(c, dict) else {}
        rmse = model.get("rmse_m", "?")
        corr = model.get("corr_length_m", "?")
        n = model.get("realizations", "?")
        parts.append(
            '<section id="confidence"><h2>Confidence under DEM error</h2>'
            f"<p>{_e(n)} seeded realizations of a correlated DEM error field (RMSE {_e(rmse)} m, "
            f"correlation length {_e(corr)} m) were added to the DEM and every slope, share and verdict "
            "recomputed. <b>Robust conflict</b>: in conflict in at least 95 % of realizations; "
            "<b>robust clear</b>: in at most 5 %; otherwise <b>uncertain</b>. Per-parcel probabilities "
            "are in the parcel table (chance of conflict) and confidence.csv.</p>"
            + _table(
                "confidence-table",
                _CONFIDENCE_COLUMNS,
                [
                    {**r, "class_name": labels.get(str(r["class_name"]), r["class_name"])}
                    for r in conf.to_dict("records")
                ],
                "Per class: verdict stability and the 5-50-95 % range of the conflict share.",
            )
            + "</section>"
        )
    cap = _optional_csv(folder, "capability_by_class.csv")
    if cap is not None:
        piv = cap.pivot_table(index="capability", columns="class_name", values="area_m2", aggfunc="sum", fill_value=0.0)
        # rows flat to steep, then the same in hazard zones, then sea and cells without slope;
        # columns in rulebook order
        code = cap.groupby("capability")["code"].first() if "code" in cap.columns else None

        def row_order(name):
            c = int(code[name]) if code is not None else 0
            return (1 if c == 0 else 0, c, str(name))

        order = sorted(piv.index, key=row_order)
        class_order = [c for c in folder.classes["class_name"] if c in piv.columns]
        class_order += sorted(set(piv.columns) - set(class_order))
        cols = [("capability", "Capability class", "text")] + [
            (c, f"{labels.get(c, c)} (ha)", "ha") for c in class_order
        ]
        rows = [{"capability": idx, **{c: piv.loc[idx, c] for c in class_order}} for idx in order]
        parts.append(
            '<section id="capability-map"><h2>Land capability inside each class</h2>'
            "<p>Every cell is classed by slope (published planning classes) and downgraded where it lies "
            "in a hazard zone (capability.tif, legend in capability_legend.csv); areas are exact "
            "coverage-weighted areas inside the parcels of each class.</p>"
            + _table("capability-class-table", cols, rows, "Area of each capability class by zoning class.")
            + "</section>"
        )
    moves = _optional_csv(folder, "reclassification_moves.csv")
    if moves is not None:
        parts.append(
            '<section id="reclassification"><h2>Drafted reclassification</h2>'
            "<p>Each conflicting parcel split along the cells that break its rule; the non-compliant part "
            "is proposed for the class the rulebook designates (reclassification.gpkg). A draft for "
            "discussion, not a decision.</p>"
            + _table(
                "moves-table",
                _MOVES_COLUMNS,
                [
                    {
                        **r,
                        "from_class": labels.get(str(r["from_class"]), r["from_class"]),
                        "to_class": labels.get(str(r["to_class"]), r["to_class"]),
                    }
                    for r in moves.to_dict("records")
                ],
                "Area that would move between classes.",
            )
            + "</section>"
        )
    return "".join(parts)


def _warnings_section(recorded: Sequence[str], extra: Sequence[str]) -> str:
    parts = ['<section id="warnings"><h2>Warnings</h2>']
    if not recorded and not extra:
        parts.append("<p>No warnings were recorded.</p></section>")
        return "".join(parts)
    parts.append('<ul class="warnings">')
    for w in recorded:
        parts.append(f"<li>{_e(w)}</li>")
    for w in extra:
        parts.append(f'<li class="report-warning">{_e(w)}</li>')
    parts.append("</ul></section>")
    return "".join(parts)


def _parcels_section(folder: AuditFolder, max_rows: int) -> tuple[str, list[str]]:
    df = folder.parcels
    zone_cols = sorted(c for c in df.columns if c.startswith("zone_") and c.endswith("_share"))
    cols = [c for c in _PARCEL_COLUMNS if c[0] in df.columns]
    cols += [(z, f"In {folder.zone_label(z[5:-6])}", "share") for z in zone_cols]
    cols += [c for c in _PARCEL_TAIL if c[0] in df.columns and (c[0] == "reasons" or (df[c[0]] != "").any())]
    labels = _class_labels(folder)
    notes = []
    if len(df) > max_rows:
        # the largest conflict areas, largest first (ties in file order: stable sort)
        key = -df["conflict_m2"].fillna(0.0).to_numpy()
        keep = np.argsort(key, kind="stable")[:max_rows]
        notes.append(
            f"The per-parcel table shows the {max_rows:,d} parcels with the largest conflict area of "
            f"{len(df):,d}; parcels.csv holds all of them."
        )
        df = df.iloc[keep]
    records = df.to_dict("records")
    for r in records:
        r["class_name"] = labels.get(str(r["class_name"]), r["class_name"])
        if "confidence" in r:
            r["confidence"] = CONFIDENCE_SHORT.get(str(r["confidence"] or ""), str(r["confidence"]).replace("_", " "))
    ids = [str(r.get("parcel_id", "")) for r in records]
    numeric_ids = bool(ids) and all(_is_number(i) for i in ids)
    html_table = _table(
        "parcel-table",
        cols,
        records,
        f"{len(records):,d} parcels (parcels.csv); click a header to sort, click again to reverse.",
        numeric_text_cols={"parcel_id"} if numeric_ids else set(),
        row_key="parcel_id",
    )
    return f'<section id="parcels" class="wide-table"><h2>Per parcel</h2>{html_table}</section>', notes


def _is_number(text: str) -> bool:
    try:
        return not math.isnan(float(text))
    except ValueError:
        return False


def _manifest_section(folder: AuditFolder, verify_inputs: bool, built_utc: str) -> tuple[str, list[str]]:
    m = folder.section("manifest", default={}) or {}
    warnings: list[str] = []
    parts = [
        '<section id="manifest"><h2>Run manifest</h2>',
        "<p>Everything needed to rerun this audit and check the result: the inputs and their SHA-256, the "
        "full rulebook, the parameters, the CRS and the software versions. Rerun <code>landcheck audit</code> "
        "with the same inputs, rulebook and parameters, then compare the output hashes below.</p>",
        '<table class="plain kv"><tbody>',
        f'<tr><th scope="row">Audit started (UTC)</th><td>{_e(m.get("started_utc", "not recorded"))}</td></tr>',
        f'<tr><th scope="row">Report built (UTC)</th><td><time id="report-built">{_e(built_utc)}</time></td></tr>',
        f'<tr><th scope="row">Audit tool</th><td>{_e(folder.summary.get("tool", "landcheck"))} '
        f"{_e(folder.summary.get('version', ''))}</td></tr>",
        f'<tr><th scope="row">Report tool</th><td>landcheck {_e(__version__)}</td></tr>',
        "</tbody></table>",
    ]

    def check(path_text: str, recorded: str, what: str) -> str:
        if not verify_inputs:
            return '<span class="muted">not checked</span>'
        p = Path(path_text) if path_text else None
        if p is None or not p.is_file():
            warnings.append(f"{what} {path_text}: not found on this machine; its SHA-256 could not be checked.")
            return '<span class="st-missing">file not found here</span>'
        now = sha256_file(p)
        if now.lower() == str(recorded).lower():
            return '<span class="st-ok">matches the file</span>'
        warnings.append(
            f"{what} {path_text}: the file changed since the audit (SHA-256 now {now}); "
            "the report describes the earlier file."
        )
        return f'<span class="st-bad">changed: now <code class="sha256-now">{_e(now)}</code></span>'

    parts.append(
        '<h3>Inputs</h3><table class="plain" id="manifest-inputs"><thead><tr><th scope="col">Role</th>'
        '<th scope="col">Path</th><th scope="col">SHA-256 at audit time</th><th scope="col">Check now</th>'
        "</tr></thead><tbody>"
    )
    for item in m.get("inputs", []) or []:
        if not isinstance(item, dict):
            continue
        role, path, digest = item.get("role", ""), item.get("path", ""), item.get("sha256", "")
        parts.append(
            f'<tr data-role="{_e(role)}" data-path="{_e(path)}"><td>{_e(role)}</td><td><code>{_e(path)}'
            f'</code></td><td><code class="sha256">{_e(digest)}</code></td>'
            f"<td>{check(path, digest, f'input ({role})')}</td></tr>"
        )
    parts.append("</tbody></table>")

    rb = m.get("rulebook") or {}
    if rb:
        text = str(rb.get("text", ""))
        b64 = base64.b64encode(text.encode("utf-8")).decode("ascii")
        parts.append(
            '<h3>Rulebook</h3><table class="plain" id="manifest-rulebook"><tbody>'
            f'<tr data-role="rulebook" data-path="{_e(rb.get("path", ""))}"><th scope="row">Path</th>'
            f"<td><code>{_e(rb.get('path', ''))}</code></td></tr>"
            f'<tr><th scope="row">SHA-256 at audit time</th><td><code class="sha256">{_e(rb.get("sha256", ""))}'
            f"</code> {check(str(rb.get('path', '')), str(rb.get('sha256', '')), 'rulebook')}</td></tr>"
            f'<tr><th scope="row">Text</th><td><a download="rulebook.toml" href="data:text/plain;charset=utf-8;'
            f'base64,{b64}">save the rulebook text</a></td></tr></tbody></table>'
            f'<pre id="rulebook-text" class="code">{_e(text)}</pre>'
        )

    params = m.get("parameters") or {}
    parts.append('<h3>Parameters</h3><table class="plain kv" id="manifest-parameters"><tbody>')
    for k in sorted(params):
        parts.append(
            f'<tr><th scope="row"><code>{_e(k)}</code></th>'
            f"<td><code>{_e(json.dumps(params[k], sort_keys=True))}</code></td></tr>"
        )
    parts.append("</tbody></table>")

    wkt = m.get("crs_wkt", "")
    parts.append(
        f"<h3>Coordinate reference system</h3><p>{_e(_crs_name(wkt))}</p>"
        f'<details><summary>WKT</summary><pre class="code" id="crs-wkt">{_e(wkt)}</pre></details>'
    )

    sw = m.get("software") or {}
    parts.append('<h3>Software</h3><table class="plain kv" id="manifest-software"><tbody>')
    for k in sorted(sw):
        parts.append(f'<tr><th scope="row">{_e(k)}</th><td>{_e(sw[k])}</td></tr>')
    parts.append("</tbody></table>")

    parts.append(
        '<h3>Outputs</h3><table class="plain" id="manifest-outputs"><thead><tr><th scope="col">File</th>'
        '<th scope="col">Bytes</th><th scope="col">SHA-256</th></tr></thead><tbody>'
    )
    outs = [folder.out_dir / n for n in _OUTPUT_FILES]
    zdir = folder.out_dir / "zones"
    if zdir.is_dir():
        outs += sorted(zdir.glob("*.gpkg"))
    for p in outs:
        if p.is_file():
            rel = p.relative_to(folder.out_dir).as_posix()
            parts.append(
                f'<tr data-file="{_e(rel)}"><td><code>{_e(rel)}</code></td>'
                f'<td class="n">{p.stat().st_size:,d}</td>'
                f'<td><code class="sha256">{sha256_file(p, written=True)}</code></td></tr>'
            )
    parts.append("</tbody></table>")
    manifest_b64 = base64.b64encode(json.dumps(m, indent=2, sort_keys=True).encode("utf-8")).decode("ascii")
    parts.append(
        f'<p><a download="manifest.json" href="data:application/json;base64,{manifest_b64}">'
        "save the manifest as JSON</a></p></section>"
    )
    return "".join(parts), warnings


def _crs_name(wkt: str) -> str:
    if not wkt:
        return "not recorded"
    try:
        from pyproj import CRS

        crs = CRS.from_wkt(wkt)
    except Exception as exc:  # pyproj raises CRSError and others; the name is informative only
        logger.debug("CRS WKT not parsed: %s", exc)
        return "WKT recorded (not parsed)"
    epsg = crs.to_epsg()
    return crs.name + (f" (EPSG:{epsg})" if epsg else "")


# --------------------------------------------------------------------------- page


_CSS = """
:root{--ink:#1b1b1b;--muted:#5b5b5b;--line:#c9c9c9;--bg:#ffffff;--band:#f3f1ec;--warn:#7a2a00;--warnbg:#fff1dc}
*{box-sizing:border-box}
body{margin:0;font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;color:var(--ink);
background:var(--bg)}
header,main,footer{max-width:1180px;margin:0 auto;padding:0 20px}
header{padding-top:18px}
h1{font-size:1.7em;margin:.2em 0}
h2{font-size:1.3em;border-bottom:2px solid var(--ink);padding-bottom:.15em;margin-top:1.8em}
h3{font-size:1.05em;margin-top:1.3em}
.sub,.muted{color:var(--muted)}
.caution{border:3px solid var(--warn);background:var(--warnbg);color:var(--warn);padding:12px 16px;margin:14px 0;
font-size:1.08em;font-weight:600}
nav ul{list-style:none;padding:0;display:flex;flex-wrap:wrap;gap:6px 18px}
nav a{color:#1d4f91}
.cards{display:flex;flex-wrap:wrap;gap:12px}
.card{border:1px solid var(--line);border-radius:6px;padding:10px 14px;min-width:170px;background:var(--band)}
.card-h{font-size:.85em;color:var(--muted)}
.card-v{font-size:1.25em;font-weight:600}
table{border-collapse:collapse;margin:10px 0;font-size:.9em}
caption{text-align:left;color:var(--muted);padding:4px 0;caption-side:top}
th,td{border-bottom:1px solid var(--line);padding:4px 8px;text-align:left;vertical-align:top}
td.wide{min-width:18em}
td.n{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
thead th{background:var(--band);position:sticky;top:0}
.table-wrap{max-height:640px;overflow:auto;border:1px solid var(--line)}
.table-wrap table{margin:0;width:100%}
th button{font:inherit;font-weight:600;background:none;border:0;padding:0;cursor:pointer;color:inherit;text-align:left}
th button:focus-visible{outline:2px solid #1d4f91;outline-offset:2px}
th[aria-sort=ascending] .arrow::after{content:" \\25B2"}
th[aria-sort=descending] .arrow::after{content:" \\25BC"}
.badge{display:inline-block;padding:0 6px;border-radius:3px;font-size:.85em;border:1.5px solid;white-space:nowrap}
.flag{border-left:5px solid var(--warn);padding:6px 10px;background:var(--warnbg)}
ul.warnings li{margin:4px 0}
li.report-warning{color:var(--warn)}
figure{margin:16px 0;border:1px solid var(--line);padding:8px;background:#fff}
figure img{max-width:100%;height:auto;display:block;margin:0 auto}
figcaption{color:var(--muted);font-size:.9em;margin-top:6px}
.grid{display:grid;grid-template-columns:repeat(auto-fill,minmax(480px,1fr));gap:12px}
pre.code{background:var(--band);border:1px solid var(--line);padding:10px;overflow:auto;font-size:.85em}
code{font-family:ui-monospace,"DejaVu Sans Mono",monospace;font-size:.92em;word-break:break-all}
.st-ok{color:#1c5e2a}.st-bad{color:var(--warn);font-weight:600}.st-missing{color:var(--muted)}
footer{margin-top:40px;padding-bottom:30px;border-top:1px solid var(--line)}
.print-only{display:none}
@media print{
body{font-size:9.5pt;line-height:1.35}
header,main,footer{max-width:none;padding:0}
nav,.no-print{display:none}
.print-only{display:block}
.caution{padding:6px 10px;margin:8px 0;font-size:10pt}
h2{break-after:avoid;margin-top:1.2em}
h3{break-after:avoid}
.cards{gap:6px}
.card{min-width:0;padding:4px 8px;background:none}
.table-wrap{max-height:none;overflow:visible;border:0}
.table-wrap table{width:100%}
table{font-size:7.5pt;width:100%;table-layout:auto}
caption{padding:2px 0}
thead{display:table-header-group}
thead th{position:static;background:none;border-bottom:1.5px solid var(--ink);vertical-align:bottom}
th,td{padding:2px 4px;overflow-wrap:break-word;hyphens:auto}
td.n{white-space:nowrap}
td.wide{min-width:0;width:26%}
tr{break-inside:avoid}
th[aria-sort] .arrow::after{content:none}
figure{break-inside:avoid;border:0;padding:0;margin:8px 0}
figure img{max-height:220mm;width:auto;max-width:100%}
figcaption{break-before:avoid}
.grid{display:block}
.grid figure img{max-height:118mm}
pre.code{white-space:pre-wrap;overflow-wrap:anywhere;overflow:visible;font-size:7pt}
code{overflow-wrap:anywhere}
details>pre{display:block}
section.wide-table{page:landscape}
section.wide-table table{font-size:6.6pt}
section.wide-table th,section.wide-table td{padding:1px 2px}
.badge{white-space:normal;padding:0 3px}
footer{margin-top:12px}
}
""" + verdict_badge_css()


def _page_css(page_size: str) -> str:
    """@page rules: the chosen sheet, the caution in every page's foot, landscape pages for wide tables."""
    size = {"a4": "A4", "letter": "letter"}[page_size.lower()]
    caution = CAUTION.replace("\\", "\\\\").replace('"', '\\"')
    foot = (
        f'@bottom-left{{content:"{caution}";font:600 7pt system-ui,"DejaVu Sans",sans-serif;color:#7a2a00;'
        "vertical-align:top;padding-top:3mm}"
        '@bottom-right{content:"page " counter(page) " of " counter(pages);font:7pt system-ui,"DejaVu Sans",'
        "sans-serif;color:#5b5b5b;vertical-align:top;padding-top:3mm;width:22mm}"
    )
    return (
        f"@page{{size:{size};margin:12mm 11mm 17mm 11mm;{foot}}}"
        f"@page landscape{{size:{size} landscape;margin:11mm 11mm 16mm 11mm;{foot}}}"
    )


# Table sorting: click a header to sort ascending, again for descending.  Numbers
# compare numerically from data-value; text compares by UTF-16 code units.  Empty
# cells go last either way; ties keep the original row order.
_JS = """
(function () {
  'use strict';
  function key(cell, numeric) {
    var v = cell.getAttribute('data-value');
    if (v === null) { v = cell.textContent; }
    if (v === '') { return null; }
    if (numeric) { var n = Number(v); return isNaN(n) ? null : n; }
    return v;
  }
  function sortTable(table, col, th) {
    var numeric = th.getAttribute('data-type') === 'num';
    var dir = th.getAttribute('aria-sort') === 'ascending' ? -1 : 1;
    var heads = table.tHead.rows[0].cells;
    for (var h = 0; h < heads.length; h++) { heads[h].setAttribute('aria-sort', 'none'); }
    var body = table.tBodies[0];
    var items = Array.prototype.map.call(body.rows, function (row) {
      return {row: row, k: key(row.cells[col], numeric), i: Number(row.getAttribute('data-row'))};
    });
    items.sort(function (a, b) {
      if (a.k === null || b.k === null) {
        if (a.k === null && b.k === null) { return a.i - b.i; }
        return a.k === null ? 1 : -1;
      }
      var c = a.k < b.k ? -1 : (a.k > b.k ? 1 : 0);
      return c !== 0 ? c * dir : a.i - b.i;
    });
    var frag = document.createDocumentFragment();
    items.forEach(function (it) { frag.appendChild(it.row); });
    body.appendChild(frag);
    th.setAttribute('aria-sort', dir === 1 ? 'ascending' : 'descending');
  }
  var tables = document.querySelectorAll('table.sortable');
  Array.prototype.forEach.call(tables, function (table) {
    var heads = table.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function (th, col) {
      var btn = th.querySelector('button');
      if (btn) { btn.addEventListener('click', function () { sortTable(table, col, th); }); }
    });
  });
})();
"""


def build_report(
    out_dir,
    *,
    report_path=None,
    figures_dir=None,
    slope_breaks_pct: Sequence[float] = DEFAULT_SLOPE_BREAKS_PCT,
    max_closeups: int = 12,
    max_table_rows: int = 5000,
    dpi: int = 200,
    figure_formats: Sequence[str] = ("png", "svg"),
    closeup_formats: Sequence[str] = ("png",),
    verify_inputs: bool = True,
    page_size: str = "A4",
    show_progress: bool | None = None,
    parcel_shapes=None,
    raster_files=None,
    before_output_hashes=None,
    figure_worker=None,
) -> Path:
    """Write a self-contained HTML report of an audit output folder.

    Parameters
    ----------
    out_dir : path
        Output folder of ``landcheck audit`` (docs/outputs.md).
    report_path : path, optional
        Where to write; default ``out_dir/report.html``.  Written to a
        temporary file beside it and renamed into place.
    figures_dir : path, optional
        Where the PNG/SVG figures go; default ``out_dir/figures``.
    slope_breaks_pct : sequence of float
        Slope-class breaks for the maps (%), default 0, 3, 8, 18, 30, 50, inf.
    max_closeups : int
        Close-up maps of the parcels with the largest conflict area.
    max_table_rows : int
        Most rows in the per-parcel table (largest conflict first when cut).
    dpi : int
        Resolution of the figures (200-300 for print).
    closeup_formats : sequence of {"png", "svg"}
        Formats of the per-parcel close-ups (PNG always; default PNG only).
    figure_formats : sequence of {"png", "svg"}
        Files written per figure; PNG is always written (it is inlined).
    verify_inputs : bool
        Recompute the SHA-256 of every input in the manifest that exists here
        and flag files that changed since the audit.
    page_size : {"A4", "Letter"}
        Printed sheet; wide tables print on landscape sheets of the same size and the
        caution stands at the foot of every page.
    show_progress : bool, optional
        A progress bar on stderr (default: when stderr is a terminal).
    parcel_shapes : GeoDataFrame, optional
        The rows of ``parcels.gpkg`` already in memory (the audit passes its own, just written),
        so the file is not read a second time; see :meth:`AuditFolder.use_parcel_shapes`.
    raster_files : mapping, optional
        Folder-relative raster name -> a file with the same values to read instead (the audit's
        finished scratch files while their Cloud-Optimized copies are made on another thread);
        see :meth:`AuditFolder.use_raster_files`.
    before_output_hashes : callable, optional
        Called before the output files are hashed for the manifest (the audit waits there for
        those copies).
    figure_worker : FigureWorker, optional
        A process from :func:`landcheck.evidence.figure_worker.start` that draws the close-ups and
        charts while this one draws the rest (the same files as drawn here; that module says when
        it may be started).  Default: everything is drawn in this process.

    Returns
    -------
    Path
        The report file.

    Raises
    ------
    InputDataError
        A file of the output folder is missing or unreadable.
    OutputWriteError
        The report or a figure cannot be written.
    """
    if str(page_size).lower() not in PAGE_SIZES:
        raise ValueError(f"page_size: got {page_size!r}; expected one of {', '.join(PAGE_SIZES.values())}")
    folder = load_audit_folder(out_dir)
    if parcel_shapes is not None:
        folder.use_parcel_shapes(parcel_shapes)
    if raster_files:
        folder.use_raster_files(raster_files)
    report_path = Path(report_path) if report_path is not None else folder.out_dir / "report.html"
    figures_dir = Path(figures_dir) if figures_dir is not None else folder.out_dir / "figures"
    # no wall-clock time inside a reproducible output (docs/outputs.md): SOURCE_DATE_EPOCH or nothing
    built_utc = source_date_utc() or "not recorded (run times: run_times.json)"

    cap_gdal_cache()  # the rasters are read once through GDAL; its default cache would keep them all
    bar = progress_bar(_FIXED_STEPS + max(0, int(max_closeups)), "report", enabled=show_progress, unit="step")

    def done(what: str) -> None:
        raise_if_interrupted()
        bar.set_postfix_str(what, refresh=False)
        bar.update(1)

    # validate the tables before drawing anything
    _ = folder.parcels, folder.classes, folder.parcels_gdf
    done("tables read")
    job = FigureJob(
        folder.out_dir,
        figures_dir,
        tuple(float(b) for b in slope_breaks_pct),
        int(max_closeups),
        int(dpi),
        tuple(figure_formats),
        tuple(closeup_formats),
        dict(raster_files) if raster_files else None,
    )
    breaks = np.asarray([float(b) for b in slope_breaks_pct])
    if figure_worker is not None:
        # the second process draws the charts and close-ups while this one draws the overview and builds
        # the interactive map; then both draw the close-ups that are left
        remove_closeups(figures_dir)
        rows, shapes = closeup_subset(folder, max_closeups)
        job = dataclasses.replace(job, parcel_rows=rows, parcel_shapes=shapes)
        figure_worker.submit(job)
    map_data = load_map_data(folder)
    done("rasters read")
    overview = draw_overview(folder, job, map_data)
    done("overview map")
    webmap_html = webmap_section(folder, map_data, breaks, _class_labels(folder))
    done("interactive map")
    del map_data
    n_places = max(0, int(max_closeups))
    if figure_worker is None:
        closeups = draw_closeups(folder, job, on_drawn=lambda: done("close-ups"))
        charts = draw_charts(folder, job)
    else:
        places = figure_worker.closeup_places(n_places)
        mine = draw_closeups(closeup_folder(job), job, on_drawn=lambda: done("close-ups"), places=places)
        shown = [0]

        def worker_progress(n: int) -> None:
            raise_if_interrupted()
            bar.update(n - shown[0])
            shown[0] = n

        drawn = figure_worker.collect(worker_progress)
        closeups = FigureFiles(sorted([*mine.items, *drawn.closeups], key=closeup_rank))
        charts = [FigureFiles(c) for c in drawn.charts]
    bar.update(n_places - len(closeups.items))  # parcels without a shape get no close-up
    done("charts")

    extra_warnings: list[str] = []
    relief = [e for e in overview.legend_entries if e.group == "relief" and e.key == "relief"]
    if relief and "slope shading" in relief[0].label:
        extra_warnings.append(
            "Maps: the DEM named in the manifest could not be used for relief, so the slope "
            f"raster is shaded instead ({relief[0].label.split('(', 1)[-1].rstrip(')')})."
        )
    n_any_area = int((folder.parcels["conflict_m2"].fillna(0) > 0).sum())
    n_conflict = int((folder.parcels["verdict"] == "conflict").sum())
    if n_any_area > len(closeups.items):
        under = n_any_area - n_conflict
        extra_warnings.append(
            f"Maps: close-ups show the {len(closeups.items)} largest conflict areas of the "
            f"{count_text(n_any_area, 'parcel')} with any conflict area ({n_conflict:,d} with the verdict "
            f"conflict" + (f", {under:,d} with conflict area under their class tolerance" if under > 0 else "") + ")."
        )
    parcels_html, notes = _parcels_section(folder, max_table_rows)
    extra_warnings += notes
    done("parcel table")
    if before_output_hashes is not None:
        before_output_hashes()
    manifest_html, manifest_warnings = _manifest_section(folder, verify_inputs, built_utc)
    done("hashes")
    extra_warnings = manifest_warnings + extra_warnings
    recorded = [str(w) for w in (folder.section("warnings", default=[]) or [])]

    title = "landcheck screening report"
    parts = [
        html_head(f"{title} - audit run {folder.run_date_text}", _CSS + WEBMAP_CSS + _page_css(page_size), _CSP),
        f"<header><h1>{_e(title)}</h1>",
        f'<p class="sub">Audit run {_e(folder.run_date_text)}</p>',
        f'<div class="caution" role="note" id="caution"><span aria-hidden="true">\u26a0 </span>{_e(CAUTION)}</div>',
        '<nav aria-label="Sections"><ul><li><a href="#summary">Summary</a></li>'
        '<li><a href="#capability">Capability</a></li><li><a href="#classes">Per class</a></li>'
        '<li><a href="#warnings">Warnings</a></li><li><a href="#charts">Charts</a></li>'
        '<li><a href="#maps">Maps</a></li><li><a href="#parcels">Per parcel</a></li>'
        '<li><a href="#manifest">Run manifest</a></li></ul></nav></header><main>',
        _summary_section(folder),
        _warnings_section(recorded, extra_warnings),
        _capability_section(folder),
        _classes_section(folder),
        _extras_section(folder),
        '<section id="charts"><h2>Charts</h2>',
    ]
    for ff in charts:
        for it in ff.items:
            parts.append(_figure_html(it, it.caption))
    parts.append('</section><section id="maps"><h2>Maps</h2><h3 id="interactive-map">Interactive map</h3>')
    parts.append(webmap_html)
    parts.append("<h3>Overview map</h3>")
    for it in overview.items:
        parts.append(_figure_html(it, "Overview map: " + it.caption))
    if closeups.items:
        parts.append('<h3>Close-ups, largest conflict first</h3><div class="grid">')
        for it in closeups.items:
            parts.append(_figure_html(it, "Close-up map. " + it.caption, "closeup"))
        parts.append("</div>")
    else:
        parts.append("<p>No parcel has conflict area, so there are no close-ups.</p>")
    parts.append(
        f'<p class="muted">Figure files are in <code>{_e(figures_dir.name)}/</code> (overview and charts as PNG '
        "and SVG, close-ups as PNG) next to this report.</p></section>"
    )
    parts.append(parcels_html)
    parts.append(manifest_html)
    parts.append(
        f'</main><footer><p class="caution-foot"><strong>{_e(CAUTION)}</strong></p>'
        f'<p class="muted">Written by landcheck {_e(__version__)} from the files of one audit output '
        "folder; no network resource is used.</p></footer>"
    )
    parts.append(f"<script>{_JS}</script></body></html>\n")
    # part by part: at 100 000 parcels the page is tens of MB, and one joined copy plus its
    # encoded copy would add that twice to the peak memory
    with atomic_file(report_path, overwrite=True) as tmp, open(tmp, "wb") as fh:
        for i, part in enumerate(parts):
            if i:
                fh.write(b"\n")
            fh.write(part.encode("utf-8"))
    done("written")
    bar.close()
    logger.info("report written: %s (%d close-ups)", report_path, len(closeups.items))
    return report_path
