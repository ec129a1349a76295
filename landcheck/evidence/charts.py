"""Charts of an audit output folder: share of each class over its limit, slope distribution, sensitivity.

Matplotlib figures drawn from the folder written by ``landcheck audit`` (docs/outputs.md), framed,
saved and deterministic like the maps (:mod:`landcheck.evidence.maps`); lines differ in marker and
dash as well as colour, so they read in greyscale.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Sequence

import numpy as np

from landcheck.about import CAUTION
from landcheck.evidence.folder import AuditFolder, _isnan, _parse_float, load_audit_folder
from landcheck.evidence.maps import _LEGEND_WRAP_CHARS, FigureFiles, FigureItem, _class_label, _dest, _new_figure, _save
from landcheck.evidence.style import _fmt_num

__all__ = ["class_share_chart", "slope_distribution_chart", "sensitivity_chart"]

_SERIES_STYLE = [  # (colour, marker, dash) for chart lines; marker + dash separate them in greyscale
    ("#1f4e8c", "o", "solid"),
    ("#c2571a", "s", (0, (5, 2))),
    ("#3a8a55", "^", (0, (1, 1.5))),
    ("#7a3d96", "D", (0, (6, 2, 1, 2))),
    ("#8c6d1f", "v", (0, (3, 1))),
    ("#5c5c5c", "P", (0, (8, 3))),
]


def _finish_chart(fig, folder: AuditFolder, dest_dir, name: str, title: str, caption: str, dpi, formats) -> FigureFiles:
    """Frame a chart (title, run date, caution), save it in each format and describe it for the report."""
    fig.text(0.02, 0.985, title, ha="left", va="top", fontsize=11, fontweight="bold")
    fig.text(0.98, 0.985, f"audit run {folder.run_date_text}", ha="right", va="top", fontsize=7.5, color="#444444")
    fig.text(0.02, 0.008, CAUTION, ha="left", va="bottom", fontsize=6.5, color="#5a1a00")
    return FigureFiles([FigureItem(name, caption, _save(fig, _dest(folder, dest_dir), name, dpi, formats))])


def class_share_chart(
    out_dir, *, dest_dir=None, dpi: int = 200, formats: Sequence[str] = ("png", "svg")
) -> FigureFiles:
    """Horizontal bars per class: share of evaluated area over the slope limit, and in conflict.

    Reads ``classes.csv`` (``over_limit_m2 / evaluated_m2`` and
    ``conflict_share``).  Classes with no evaluated area are left out;
    classes without a slope limit are marked so.  Writes ``chart_class_shares``.
    """
    from matplotlib.patches import Patch

    folder = load_audit_folder(out_dir)
    df = folder.classes
    df = df[df["evaluated_m2"].fillna(0) > 0]
    names = list(df["class_name"])
    n = max(1, len(names))
    fig = _new_figure((8.0, 1.6 + 0.62 * n), dpi)
    ax = fig.add_axes([0.3, 0.9 / (1.6 + 0.62 * n) + 0.04, 0.62, 1 - (1.45 / (1.6 + 0.62 * n)) - 0.04])
    y = np.arange(len(names))[::-1].astype(float)
    limits = folder.class_limits_pct
    over = [float(o) / float(e) for o, e in zip(df["over_limit_m2"].fillna(0), df["evaluated_m2"])]
    conf = [float(c) if not _isnan(c) else 0.0 for c in df["conflict_share"]]
    bh = 0.36
    for yi, name, o, c in zip(y, names, over, conf):
        if name == "no_rule":
            ax.text(1, yi, "no rule: not checked", va="center", fontsize=7.5, color="#555555", style="italic")
            continue
        has_limit = not math.isnan(limits.get(name, math.nan))
        if has_limit:
            ax.barh(yi + bh / 2, 100 * o, height=bh, color="#a9c4e0", edgecolor="#24509a", lw=0.8)
            ax.text(100 * o + 1, yi + bh / 2, f"{o:.1%}", va="center", fontsize=7.5)
        else:
            ax.text(1, yi + bh / 2, "no slope limit", va="center", fontsize=7.5, color="#555555", style="italic")
        ax.barh(yi - bh / 2, 100 * c, height=bh, color="#3b3b3b", edgecolor="#161616", hatch="////", lw=0.8)
        ax.text(100 * c + 1, yi - bh / 2, f"{c:.1%}", va="center", fontsize=7.5)
    ax.set_yticks(y)
    ax.set_yticklabels(
        [
            _class_label(folder, nm)
            + (f"\nlimit {_fmt_num(limits[nm])} %" if not math.isnan(limits.get(nm, math.nan)) else "")
            for nm in names
        ],
        fontsize=8,
    )
    ax.set_xlim(0, 110)
    ax.set_ylim(-0.7, len(names) - 0.3)
    ax.set_xticks([0, 20, 40, 60, 80, 100])
    ax.set_xlabel("share of evaluated area (%)")
    ax.grid(True, axis="x", color="#bbbbbb", lw=0.5)
    ax.set_axisbelow(True)
    ax.legend(
        [
            Patch(facecolor="#a9c4e0", edgecolor="#24509a"),
            Patch(facecolor="#3b3b3b", edgecolor="#161616", hatch="////"),
        ],
        ["slope at or over the class limit", "breaching any rule of the class"],
        loc="lower right",
        fontsize=7.5,
        framealpha=0.9,
    )
    return _finish_chart(
        fig,
        folder,
        dest_dir,
        "chart_class_shares",
        "Share of each class over its limit",
        "Per class: share of the evaluated area with slope at or over the class limit, "
        "and share breaching any rule (slope or forbidden zone).",
        dpi,
        formats,
    )


def slope_distribution_chart(
    out_dir, *, dest_dir=None, dpi: int = 200, formats: Sequence[str] = ("png", "svg"), max_panels: int = 9
) -> FigureFiles:
    """Area of classified land per 1 % slope bin, one panel per class, with the class limit marked.

    Reads ``summary.json`` → ``slope_histogram``.  Bins at or over the limit
    are dark and hatched.  Up to ``max_panels`` classes with the most area are
    shown.  Writes ``chart_slope_distribution``.
    """
    folder = load_audit_folder(out_dir)
    hist = folder.section("slope_histogram", default={}) or {}
    edges = [_parse_float(v) for v in hist.get("bin_edges_pct", [])]
    classes = {
        k: [float(x) for x in v]
        for k, v in (hist.get("classes") or {}).items()
        if len(v) == max(0, len(edges) - 1) and sum(float(x) for x in v) > 0
    }
    order = [c for c in folder.classes["class_name"] if c in classes] + sorted(
        set(classes) - set(folder.classes["class_name"])
    )
    order = sorted(order, key=lambda c: -sum(classes[c]))[:max_panels]
    order = [c for c in folder.classes["class_name"] if c in order] + [
        c for c in order if c not in set(folder.classes["class_name"])
    ]
    n = max(1, len(order))
    ncols = 1 if n <= 3 else 2
    nrows = math.ceil(n / ncols)
    fig = _new_figure((8.0 if ncols == 2 else 7.0, 1.2 + 1.9 * nrows), dpi)
    ref = _parse_float(folder.section("capability", "reference_limit_pct", default=math.nan) or math.nan)
    limits = folder.class_limits_pct
    if not order:
        fig.text(0.5, 0.5, "No slope histogram in summary.json", ha="center", va="center")
    top, bottom = 1 - 0.75 / (1.2 + 1.9 * nrows), 0.55 / (1.2 + 1.9 * nrows) + 0.04
    gs = fig.add_gridspec(nrows, ncols, left=0.09, right=0.97, top=top, bottom=bottom, hspace=0.55, wspace=0.2)
    e = np.array(edges)
    for i, name in enumerate(order):
        ax = fig.add_subplot(gs[i // ncols, i % ncols])
        area_ha = np.array(classes[name]) / 10_000.0
        lo = e[:-1]
        width = np.where(np.isinf(e[1:]), 1.0, e[1:] - e[:-1])
        limit = limits.get(name, math.nan)
        line = limit if not math.isnan(limit) else ref
        over = lo >= line if not math.isnan(line) else np.zeros(lo.shape, bool)
        step_edges = np.append(lo, lo[-1] + width[-1])
        ax.stairs(np.where(over, 0.0, area_ha), step_edges, fill=True, facecolor="#a9c4e0", edgecolor="#24509a", lw=0.6)
        ax.stairs(
            np.where(over, area_ha, 0.0),
            step_edges,
            fill=True,
            facecolor="#3b3b3b",
            edgecolor="#161616",
            hatch="////",
            lw=0.6,
        )
        nz = np.nonzero(area_ha > 0)[0]
        xmax = min(float(lo[nz[-1]] + width[nz[-1]]) + 2, float(lo[-1] + width[-1])) if nz.size else 30.0
        if not math.isnan(line):
            xmax = max(xmax, line + 3)
            ax.axvline(line, color="#161616", lw=1.2, ls=(0, (4, 2)))
            txt = (
                f"limit {_fmt_num(line)} %"
                if not math.isnan(limit)
                else f"reference {_fmt_num(line)} % (no class limit)"
            )
            share = area_ha[over].sum() / area_ha.sum() if area_ha.sum() else 0.0
            right_side = line > 0.55 * xmax  # keep the label inside the panel
            ax.text(
                line,
                0.97,
                f"{txt} \n{share:.1%} at or over " if right_side else f" {txt}\n {share:.1%} at or over",
                transform=ax.get_xaxis_transform(),
                va="top",
                ha="right" if right_side else "left",
                multialignment="right" if right_side else "left",
                fontsize=7,
                clip_on=True,
            )
        ax.set_xlim(0, xmax)
        ax.set_title(_class_label(folder, name), fontsize=8.5, loc="left")
        ax.tick_params(labelsize=7)
        ax.set_ylabel("area (ha)", fontsize=7.5)
        ax.grid(True, axis="y", color="#cccccc", lw=0.4)
        ax.set_axisbelow(True)
        if i // ncols == nrows - 1 or i + ncols >= n:
            ax.set_xlabel("slope (%), 1 % bins", fontsize=7.5)
    return _finish_chart(
        fig,
        folder,
        dest_dir,
        "chart_slope_distribution",
        "Slope distribution of classified land",
        "Evaluated area per 1 % slope bin for each class; dark hatched bars lie at or "
        "over the class limit (dashed line).",
        dpi,
        formats,
    )


def sensitivity_chart(
    out_dir, *, dest_dir=None, dpi: int = 200, formats: Sequence[str] = ("png", "svg")
) -> FigureFiles:
    """Share of evaluated area at or over a trial slope limit (10-30 %), per class and for all development land.

    Reads ``summary.json`` → ``sensitivity``; marks each class's own limit
    with a large marker.  Writes ``chart_sensitivity``.
    """
    from matplotlib.lines import Line2D

    folder = load_audit_folder(out_dir)
    sens = folder.section("sensitivity", default={}) or {}
    lims = np.array([_parse_float(v) for v in sens.get("limits_pct", [])])
    fig = _new_figure((8.0, 5.0), dpi)
    ax = fig.add_axes([0.09, 0.13, 0.6, 0.75])
    handles, labels = [], []
    order = [c for c in folder.classes["class_name"] if c in (sens.get("classes") or {})]
    order += sorted(set(sens.get("classes") or {}) - set(order))
    limits = folder.class_limits_pct
    for i, name in enumerate(order):
        vals = np.array([_parse_float(v) if v is not None else math.nan for v in sens["classes"][name]])
        if vals.shape != lims.shape:
            continue
        colour, marker, ls = _SERIES_STYLE[i % len(_SERIES_STYLE)]
        ax.plot(lims, 100 * vals, color=colour, marker=marker, ms=3.5, lw=1.4, ls=ls)
        lim = limits.get(name, math.nan)
        if not math.isnan(lim) and lims.size and lims.min() <= lim <= lims.max():
            ax.plot(
                [lim],
                [100 * np.interp(lim, lims, vals)],
                marker=marker,
                ms=9,
                color=colour,
                markeredgecolor="white",
                ls="none",
            )
        handles.append(Line2D([0], [0], color=colour, marker=marker, ms=4, lw=1.4, ls=ls))
        labels.append(_class_label(folder, name) + (f", limit {_fmt_num(lim)} %" if not math.isnan(lim) else ""))
    alldev = sens.get("all_development")
    if alldev is not None and len(alldev) == lims.size:
        vals = np.array([_parse_float(v) if v is not None else math.nan for v in alldev])
        ax.plot(lims, 100 * vals, color="#000000", lw=3.0)
        handles.insert(0, Line2D([0], [0], color="#000000", lw=3.0))
        labels.insert(0, "all land classified for development")
    ref = _parse_float(folder.section("capability", "reference_limit_pct", default=math.nan) or math.nan)
    if not math.isnan(ref):
        ax.axvline(ref, color="#666666", lw=1.0, ls=(0, (2, 2)))
        handles.append(Line2D([0], [0], color="#666666", lw=1.0, ls=(0, (2, 2))))
        labels.append(f"reference limit {_fmt_num(ref)} %")
    handles.append(Line2D([0], [0], color="#777777", marker="o", ms=8, ls="none", markeredgecolor="white"))
    labels.append("class's own limit")
    ax.set_xlabel("trial slope limit (%)")
    ax.set_ylabel("share of evaluated area at or over the limit (%)")
    if lims.size:
        ax.set_xlim(lims.min(), lims.max())
    ax.set_ylim(bottom=0)
    ax.grid(True, color="#cccccc", lw=0.5)
    # the legend column is about 2.2 in wide: long class labels wrap instead of running off the figure
    labels = [textwrap.fill(t, _LEGEND_WRAP_CHARS - 4) for t in labels]
    fig.legend(handles, labels, loc="upper left", bbox_to_anchor=(0.71, 0.88), fontsize=7.5, frameon=False)
    return _finish_chart(
        fig,
        folder,
        dest_dir,
        "chart_sensitivity",
        "Sensitivity to the slope limit",
        "How the share of land at or over a slope limit changes as the limit moves from 10 % to 30 %.",
        dpi,
        formats,
    )
