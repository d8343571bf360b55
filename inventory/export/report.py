"""The one-page close report ``report-<period>.html``: self-contained, images embedded.

Contents: the ledger close it holds (and, once superseded, by which close), the headline
figures as a stock bridge (book at survey + adjustments posted = adjusted book; + net movements
after the survey = closing stock), a shaded-relief map of the survey surface with each pile's
footprint coloured by its variance class in % of book (five classes of a diverging scheme of
our own: deficit in slate blue, surplus in rust, near book in pale stone; its legend is the
colour bar; the classes and colours are :mod:`inventory.model.symbology`'s, which the
GIS styles use too), a bar
chart of variance in tonnes with 2-sigma bars and the tolerance marked, the pile table, the
scale diagnostics, the movements summary, the duplicates and the cautions.

Figures are drawn with matplotlib (Agg) and embedded as base64 PNG, so the file opens with
no network and no companion files.
"""

from __future__ import annotations

import base64
import html
import io
import math
import re
from pathlib import Path
from typing import Any, Iterable

import numpy as np
import pandas as pd

from inventory.export.journal import close_status_text, posting_journal
from inventory.model.results import CloseResult
from inventory.stock.reconcile import LOW_SCAN_FLAG
from inventory.model.symbology import (
    COVERAGE_GAP_COLOR,
    NO_VALUE_COLOR,
    OUTLINE_OTHER,
    OUTLINE_OUT_OF_TOLERANCE,
    OUT_OF_TOLERANCE_COLOR,
    PILE_FILL_OPACITY,
    SIGNIFICANT_COLOR,
    VARIANCE_COLORS,
    variance_classes,
    variance_span,
)
from inventory.model.texts import CAUTIONS, ROW_LEGEND, SIGN_CONVENTION
from inventory.io.atomic import atomic_path

__all__ = ["write_report", "variance_colormap", "VARIANCE_COLORS"]

#: Sun position for the hillshade: the cartographic convention (light from the north-west,
#: 45 degrees up) so relief reads the right way round (common practice).
_AZIMUTH_DEG = 315.0
_ALTITUDE_DEG = 45.0

_DPI = 110
#: Text properties of every text from the user drawn in a chart (pile ids, the CRS, dates):
#: shown as typed, never read as matplotlib mathtext (a pile id ``$x^2$`` stays ``$x^2$``).
_LITERAL = {"parse_math": False}
# PNG metadata left empty so the same close draws byte-identical images
_PNG_META = {"Software": None}


def variance_colormap():
    """The report's classed colour map: one colour per variance class, deficit first
    (matplotlib ``ListedColormap``; below and above the span the outer colours, missing
    values grey)."""
    from matplotlib.colors import ListedColormap

    cmap = ListedColormap(VARIANCE_COLORS, name="inventory_variance")
    return cmap.with_extremes(bad=NO_VALUE_COLOR, under=VARIANCE_COLORS[0], over=VARIANCE_COLORS[-1])


def _variance_norm(piles: pd.DataFrame):
    """The variance classes of this close as a ``BoundaryNorm``: symmetric about zero, wide
    enough for the largest variance and the tolerances (:func:`variance_span`)."""
    from matplotlib.colors import BoundaryNorm

    span = variance_span(piles["variance_pct"], piles["tolerance_pct"])
    edges = [c.lower for c in variance_classes(span)[1:]]
    return BoundaryNorm([-span, *edges, span], ncolors=len(VARIANCE_COLORS))


def _figure(width: float, height: float):
    """A figure drawn by Agg without pyplot: no global backend switch, nothing to close."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    return fig, fig.subplots()


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=_DPI, metadata=_PNG_META, bbox_inches="tight")
    return base64.b64encode(buf.getvalue()).decode("ascii")


#: Margin around the piles on the map: a share of the piles' extent, at least some metres,
#: so the toe and the ground around it show.
_MAP_MARGIN_SHARE = 0.12
_MAP_MARGIN_MIN_M = 10.0


def _map_window(result: CloseResult) -> tuple[float, float, float, float]:
    """The piles' extent plus a margin, within the grid (the survey may reach far beyond)."""
    grid = result.surface.grid
    foot = result.footprints
    if foot is None or not len(foot) or foot.geometry.is_empty.all():
        return grid.bounds
    x0, y0, x1, y1 = (float(v) for v in foot.total_bounds)
    m = max(_MAP_MARGIN_SHARE * max(x1 - x0, y1 - y0), _MAP_MARGIN_MIN_M)
    return (max(x0 - m, grid.west), max(y0 - m, grid.south),
            min(x1 + m, grid.east), min(y1 + m, grid.north))


def _map_figure(result: CloseResult) -> str:
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import LightSource
    from matplotlib.patches import PathPatch
    from matplotlib.path import Path as MplPath

    surface = result.surface
    grid = surface.grid
    z = np.asarray(surface.z, dtype=float)
    valid = np.isfinite(z)
    wx0, wy0, wx1, wy1 = _map_window(result)
    fig, ax = _figure(8.0, min(8.0 * (wy1 - wy0) / max(wx1 - wx0, 1e-9), 12.0) + 0.8)
    # shade only the cells in view (a survey grid can be much larger than the yard)
    rows, cols = grid.window(wx0, wy0, wx1, wy1)
    z = z[rows, cols]
    valid = valid[rows, cols]
    r0 = rows.start or 0
    c0 = cols.start or 0
    extent = (grid.west + c0 * grid.cell, grid.west + (c0 + z.shape[1]) * grid.cell,
              grid.north - (r0 + z.shape[0]) * grid.cell, grid.north - r0 * grid.cell)
    if valid.any():
        zf = np.where(valid, z, np.nanmin(z))
        ls = LightSource(azdeg=_AZIMUTH_DEG, altdeg=_ALTITUDE_DEG)
        # hill-shading takes slopes by differences along rows and columns: a surface one
        # cell high or wide (a survey that kept a single surface cell) has none, so its edge
        # is repeated to two cells for them (a flat shade) and cut off again
        pad = ((0, max(0, 2 - zf.shape[0])), (0, max(0, 2 - zf.shape[1])))
        shade = ls.hillshade(np.pad(zf, pad, mode="edge"), vert_exag=2.0, dx=grid.cell,
                             dy=grid.cell)[:zf.shape[0], :zf.shape[1]]
        shade = np.ma.masked_where(~valid, shade)
        ax.imshow(shade, cmap="gray", extent=extent, origin="upper", vmin=0, vmax=1,
                  interpolation="nearest")
    cmap = variance_colormap()
    norm = _variance_norm(result.piles)
    piles = result.piles.set_index("pile_id")
    for pid, geom in zip(result.footprints["pile_id"], result.footprints.geometry):
        pct = piles["variance_pct"].get(pid, np.nan) if pid in piles.index else np.nan
        colour = cmap(norm(pct)) if pct is not None and np.isfinite(pct) else cmap(np.nan)
        oot = _flag(piles["out_of_tolerance"].get(pid, False)) if pid in piles.index else False
        for poly in getattr(geom, "geoms", [geom]):
            verts, codes = [], []
            for ring in [poly.exterior, *poly.interiors]:
                xy = np.asarray(ring.coords)
                verts.extend(xy.tolist())
                codes.extend([MplPath.MOVETO] + [MplPath.LINETO] * (len(xy) - 2)
                             + [MplPath.CLOSEPOLY])
            width, dashes = OUTLINE_OUT_OF_TOLERANCE if oot else OUTLINE_OTHER
            patch = PathPatch(MplPath(verts, codes), facecolor=colour, alpha=PILE_FILL_OPACITY,
                              edgecolor="black", linewidth=width,
                              linestyle="-" if dashes is None else (0, dashes))
            ax.add_patch(patch)
        c = geom.representative_point()
        ax.annotate(str(pid), (c.x, c.y), ha="center", va="center", fontsize=8,
                    bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none", alpha=0.8),
                    **_LITERAL)
    if result.coverage_gaps is not None and len(result.coverage_gaps):
        for geom in result.coverage_gaps.geometry:
            for poly in getattr(geom, "geoms", [geom]):
                xy = np.asarray(poly.exterior.coords)
                ax.plot(xy[:, 0], xy[:, 1], color=COVERAGE_GAP_COLOR, linewidth=1.0)
    sm = ScalarMappable(norm=norm, cmap=cmap)
    cbar = fig.colorbar(sm, ax=ax, shrink=0.7, pad=0.02, ticks=norm.boundaries)
    cbar.set_label("variance class, % of book (survey - book)")
    xmin, ymin, xmax, ymax = _map_window(result)
    ax.set_xlim(xmin, xmax)
    ax.set_ylim(ymin, ymax)
    ax.set_aspect("equal")
    ax.set_xlabel(f"easting (m, {result.crs})", **_LITERAL)
    ax.set_ylabel(f"northing (m, {result.crs})", **_LITERAL)
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.tick_params(labelsize=7)
    ax.set_title(f"Survey {result.survey_date}: piles by variance "
                 "(thick outline = out of tolerance, purple = unscanned area)", fontsize=9, **_LITERAL)
    return _png(fig)


def _flags(v: Any) -> list[str]:
    """A pile's ``;``-separated flags as a list (missing: none)."""
    return [f for f in v.split(";") if f] if isinstance(v, str) else []


def _low_scan(v: Any) -> bool:
    """True for a pile the volume step flagged as mostly unscanned."""
    return LOW_SCAN_FLAG in _flags(v)


def _bar_figure(result: CloseResult) -> str:
    p = result.piles
    n = len(p)
    fig, ax = _figure(8.0, 1.2 + 0.45 * max(n, 1))
    cmap = variance_colormap()
    norm = _variance_norm(p)
    y = np.arange(n)
    var = pd.to_numeric(p["variance_t"], errors="coerce").to_numpy(float)
    sig2 = 2.0 * pd.to_numeric(p["variance_sigma_t"], errors="coerce").to_numpy(float)
    pct = pd.to_numeric(p["variance_pct"], errors="coerce").to_numpy(float)
    colours = [cmap(norm(v)) if np.isfinite(v) else cmap(np.nan) for v in pct]
    bars = ax.barh(y, np.nan_to_num(var), color=colours, edgecolor="black", linewidth=0.5)
    low = [_low_scan(v) for v in p["flags"]]
    for bar, is_low in zip(bars, low):
        if is_low:  # the figure rests on interpolation: hatched, and said in the label
            bar.set_hatch("///")
    ax.errorbar(np.nan_to_num(var), y, xerr=np.nan_to_num(sig2), fmt="none", ecolor="black",
                capsize=3, linewidth=1.0, label="2 sigma")
    tol_t = (pd.to_numeric(p["tolerance_pct"], errors="coerce").to_numpy(float) / 100.0
             * np.abs(pd.to_numeric(p["book_t"], errors="coerce").to_numpy(float)))
    ax.scatter(np.concatenate([tol_t, -tol_t]), np.concatenate([y, y]), marker="|", s=180,
               color="#444444", label="tolerance")
    ax.axvline(0.0, color="black", linewidth=0.8)
    ax.set_yticks(y, [f"{v} (low scan)" if is_low else str(v) for v, is_low in zip(p["pile_id"], low)],
                  fontsize=8, **_LITERAL)
    ax.invert_yaxis()
    ax.set_xlabel("variance, t (survey - book)")
    ax.legend(loc="lower right", fontsize=7, frameon=False)
    ax.set_title("Variance per pile with its 2-sigma uncertainty"
                 + (" (hatched = low scan: mostly interpolated)" if any(low) else ""), fontsize=9)
    ax.grid(axis="x", linewidth=0.3)
    return _png(fig)


def _flag(v: Any) -> bool:
    """A yes/no figure; missing (None, NaN, NA) counts as no."""
    if v is None or v is pd.NA:
        return False
    if isinstance(v, (float, np.floating)) and not math.isfinite(float(v)):
        return False
    return bool(v)


def _num(v: Any, digits: int = 2, signed: bool = False) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return ""
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        f = float(v) + 0.0  # no "-0.00"
        if round(f, digits) == 0:
            f = 0.0
        return f"{f:+,.{digits}f}" if signed else f"{f:,.{digits}f}"
    return html.escape(str(v))


_NUMERIC = re.compile(r"^[+\-]?[\d,]+(\.\d+)?$")


def _table(headers: Iterable[str], rows: Iterable[Iterable[str]],
           classes: Iterable[str] | None = None) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in headers)
    body = []
    cls_iter = iter(classes) if classes is not None else None
    for row in rows:
        cls = next(cls_iter, "") if cls_iter is not None else ""
        attr = f' class="{cls}"' if cls else ""
        body.append(f"<tr{attr}>" + "".join(
            f'<td class="n">{c}</td>' if _NUMERIC.match(str(c)) else f"<td>{c}</td>"
            for c in row) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _pile_rows(p: pd.DataFrame) -> tuple[list[list[str]], list[str]]:
    rows, classes = [], []
    for r in p.itertuples(index=False):
        rows.append([
            html.escape(str(r.pile_id)), html.escape(str(r.material)),
            _num(r.volume_m3, 1), _num(r.survey_t), _num(r.book_t),
            _num(r.variance_t, signed=True), _num(r.variance_pct, signed=True),
            _coverage(r.scanned_fraction, r.flags),
            _num(2 * r.variance_sigma_t), _num(r.tolerance_pct),
            _num(_flag(r.significant)), _num(_flag(r.out_of_tolerance)),
            _num(r.adjustment_t, signed=True), _num(r.closing_t),
            html.escape("; ".join(_flags(r.flags))),
        ])
        classes.append("oot" if _flag(r.out_of_tolerance)
                       else ("sig" if _flag(r.significant) else ""))
    return rows, classes


def _coverage(scanned_fraction: Any, flags: Any) -> str:
    """The scanned share of the footprint, marked when the volume step flagged it low."""
    share = _num(100.0 * float(scanned_fraction), 0) if _finite(scanned_fraction) else ""
    if _low_scan(flags):
        return f'<span class="low">{share + " %, " if share else ""}low scan: mostly interpolated</span>'
    return f"{share} %" if share else ""


def _finite(v: Any) -> bool:
    try:
        return math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def _movement_summary(mv: pd.DataFrame) -> str:
    if mv is None or not len(mv):
        return "<p>No movements this period.</p>"
    df = mv.copy()
    df["counted"] = df["counted"].map(_flag).astype(bool)
    df["before_survey"] = df["before_survey"].map(_flag).astype(bool)
    df["tonnes"] = pd.to_numeric(df["tonnes"], errors="coerce")
    rows = []
    for kind, g in df.groupby("kind", sort=True):
        c = g[g["counted"]]
        rows.append([
            html.escape(str(kind)), _num(len(g)), _num(int((~g["counted"]).sum())),
            _num(float(c.loc[c["tonnes"] > 0, "tonnes"].sum())),
            _num(float(-c.loc[c["tonnes"] < 0, "tonnes"].sum())),
            _num(float(c["tonnes"].sum()), signed=True),
            _num(float(c.loc[~c["before_survey"], "tonnes"].sum()), signed=True),
        ])
    return _table(["kind", "records", "not counted", "into piles (t)", "out of piles (t)",
                   "net (t)", "net after the survey (t)"], rows)


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:24px;color:#1d232a;
max-width:1100px}
h1{font-size:1.5em;margin-bottom:0} h2{font-size:1.15em;margin-top:1.6em;
border-bottom:1px solid #c9ced6}
.facts{color:#4b5563;margin-top:4px}
table{border-collapse:collapse;font-size:0.85em;margin:8px 0;display:block;overflow-x:auto;max-width:100%}
th,td{border:1px solid #d5d9df;padding:3px 7px;text-align:left;vertical-align:top}
td.n{text-align:right;white-space:nowrap}
th{background:#e8ecf1} td:first-child{white-space:nowrap}
tr.oot td{background:OOT_COLOR} tr.sig td{background:SIG_COLOR}
tr.hold td{color:#6b7280;font-style:italic}
.status{font-weight:bold;margin-top:2px} .status.superseded{color:#8c3b1c;font-size:1.2em;
border:2px solid #8c3b1c;padding:6px}
.legend span{display:inline-block;width:14px;height:14px;border:1px solid #777;
vertical-align:middle;margin:0 4px 0 14px}
.caution{background:#fff7e0;border-left:4px solid #c98a5a;padding:8px 12px}
img{max-width:100%;height:auto}
.headline td{font-size:1.05em}
span.low{color:#8c3b1c;font-weight:bold}
""".replace("OOT_COLOR", OUT_OF_TOLERANCE_COLOR).replace("SIG_COLOR", SIGNIFICANT_COLOR)


def _registration(result: CloseResult) -> str:
    """The survey's control-point fit (run["survey_registration"]), when it had one."""
    reg = (result.run or {}).get("survey_registration")
    if not reg:
        return ""
    esc = html.escape
    rows = [[esc(str(pt["point_id"])), _num(pt["de_m"], 3, signed=True), _num(pt["dn_m"], 3, signed=True),
             _num(pt["dh_m"], 3, signed=True), _num(pt["residual_m"], 3)] for pt in reg.get("points", [])]
    return (f"<h2>Registration by control points</h2>\n<p>{esc(str(reg['model']))} transform from "
            f"{esc(Path(str(reg['source'])).name)}: scale {reg['scale']:.6f}, rotation about the vertical "
            f"{reg['yaw_deg']:.4f}°; RMS {reg['rms_m']:.3f} m (tolerance {reg['tolerance_m']:.3f} m).</p>\n"
            + _table(["point", "dE (m)", "dN (m)", "dh (m)", "residual (m)"], rows))


def _total_sigma_rows(result: CloseResult) -> list[list[str]]:
    """Headline rows of the site totals' sigmas (shared errors counted once), when the close
    has them (``tables["Site totals"]``)."""
    tot = (result.tables or {}).get("Site totals")
    if tot is None or not len(tot):
        return []
    r = tot.iloc[0]
    return [
        ["Survey stock, 1 sigma (t)", _num(r["survey_sigma_t"])],
        ["Book stock, 1 sigma (t)", _num(r["book_sigma_t"])],
        ["Variance, 1 sigma (t; shared density, floor and scale errors counted once)", _num(r["variance_sigma_t"])],
    ]


def _unassigned_section(result: CloseResult) -> str:
    """Stock outside every footprint and footprints whose edge cuts through material."""
    esc = html.escape
    regions = getattr(result, "unassigned_stock", None)
    if regions is None:
        return "<p>The close did not look for stock outside the footprints.</p>"
    parts = []
    if len(regions):
        parts.append("<p>Material above the base outside every footprint. It is in no pile's "
                     "stock: assign it (redraw a footprint or register a pile) or explain it.</p>")
        parts.append(_table(
            ["region", "centre E", "centre N", "area (m²)", "greatest thickness (m)", "base",
             "volume (m³)", "95 % ± (m³)", "next to", "flags"],
            [[esc(str(r.region_id)), _num(r.centre_x_m, 1), _num(r.centre_y_m, 1), _num(r.area_m2, 1),
              _num(r.max_thickness_m), esc(str(r.base_method)), _num(r.volume_m3, 1),
              _num(r.volume_ci95_m3, 1), esc(str(r.next_to or "")), esc(str(r.flags or ""))]
             for r in regions.itertuples(index=False)]))
    else:
        parts.append("<p>No stock found outside the footprints.</p>")
    table = (result.tables or {}).get("Unassigned stock")
    if table is not None and "edge_cut_length_m" in table.columns:
        cut = table[table["pile_id"].notna()] if "pile_id" in table.columns else table.iloc[0:0]
        if len(cut):
            parts.append("<p>Footprints whose edge cuts through material (still thick just outside "
                         "the edge): their volume misses what lies beyond it.</p>")
            parts.append(_table(["pile", "edge length through material (m)", "thickness at edge (m)"],
                                [[esc(str(r.pile_id)), _num(r.edge_cut_length_m, 1),
                                  _num(r.edge_max_thickness_m)] for r in cut.itertuples(index=False)]))
    return "\n".join(parts)


def report_html(result: CloseResult) -> str:
    """The report page as a string (see :func:`write_report`)."""
    p = result.piles
    book = float(pd.to_numeric(p["book_t"], errors="coerce").sum())
    survey = float(pd.to_numeric(p["survey_t"], errors="coerce").sum())
    var = float(pd.to_numeric(p["variance_t"], errors="coerce").sum())
    adj = float(pd.to_numeric(p["adjustment_t"], errors="coerce").sum())
    after = float(pd.to_numeric(p["after_survey_net_t"], errors="coerce").sum())
    closing = float(pd.to_numeric(p["closing_t"], errors="coerce").sum())
    journal = posting_journal(result)
    held = journal[journal["status"] == "hold"]
    n_oot = sum(_flag(v) for v in p["out_of_tolerance"])
    n_sig = sum(_flag(v) for v in p["significant"])
    pct = 100.0 * var / book if book else float("nan")
    esc = html.escape
    headline = _table(["figure", "value"], [
        ["Book stock at survey (t)", _num(book)],
        ["+ Adjustments posted (t)", _num(adj, signed=True)],
        ["= Book stock after adjustments (t)", _num(book + adj)],
        ["Survey stock (t)", _num(survey)],
        ["Left at book: held lines, midpoint, piles not surveyed (t)", _num(book + adj - survey, signed=True)],
        ["+ Net movements after the survey (t)", _num(after, signed=True)],
        ["= Closing stock (t)", _num(book + adj + after)],
        ["Variance, survey - book (t)", _num(var, signed=True)],
        ["Variance, % of book", _num(pct, signed=True)],
        ["Piles out of tolerance", _num(n_oot)],
        ["Piles with a significant variance", _num(n_sig)],
        ["Journal lines held, not posted", _num(len(held))],
    ] + _total_sigma_rows(result))
    if abs((book + adj + after) - closing) > 1e-6 * max(1.0, abs(closing)):
        # never expected (closing = book + adjustment + after-survey net per pile): shown, not hidden
        headline = headline.replace("</tbody>", "<tr class=\"oot\"><td>Closing stock in the pile table "
                                    f"(does not add up) (t)</td><td class=\"n\">{_num(closing)}</td></tr></tbody>")
    pile_rows, pile_classes = _pile_rows(p)
    piles_table = _table(
        ["pile", "material", "volume (m³)", "survey (t)", "book (t)", "variance (t)",
         "variance (%)", "scanned", "2 sigma (t)", "tolerance (%)", "significant", "out of tolerance",
         "adjustment (t)", "closing (t)", "flags"], pile_rows, pile_classes)
    sd = result.scale_diagnostics
    if sd is not None and len(sd):
        scale_rows = [[esc(str(r.scale_id)),
                       esc(", ".join(map(str, r.piles)) if isinstance(r.piles, (list, tuple))
                           else str(r.piles)),
                       _num(r.tonnes), _num(r.bias_pct, signed=True), _num(r.bias_sigma_pct),
                       _num(getattr(r, "history_bias_pct", float("nan")), signed=True),
                       _num(getattr(r, "history_bias_sigma_pct", float("nan"))),
                       _num(getattr(r, "history_months", float("nan"))),
                       _num(_flag(r.flagged)), esc(str(r.message or ""))]
                      for r in sd.itertuples(index=False)]
        scales = _table(["scale", "piles", "tonnes weighed", "bias this month (%)", "sigma (%)",
                         "bias over months (%)", "sigma (%)", "months", "flagged", "message"], scale_rows,
                        ["oot" if _flag(r.flagged) else "" for r in sd.itertuples(index=False)])
    else:
        scales = "<p>No scale diagnostics for this period.</p>"
    dup = result.duplicates
    if dup is not None and len(dup):
        cols = [c for c in dup.columns]
        dups = _table(cols, [[_num(v) if isinstance(v, (float, np.floating)) else esc(str(v))
                              for v in row] for row in dup.itertuples(index=False, name=None)])
    else:
        dups = "<p>No duplicate records found.</p>"
    if len(journal):
        def text(v: Any) -> str:
            return "" if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA else esc(str(v))

        jt = _table(["line", "pile", "to pile", "material", "quantity (t)", "value", "account",
                     "location", "code", "reason", "status"],
                    [[_num(r.line), text(r.pile_id), text(r.to_pile_id), text(r.material),
                      _num(r.quantity_t, signed=True),
                      (_num(r.value, signed=True) + (f" {esc(str(r.currency))}" if _finite(r.value) and r.currency
                                                     and not pd.isna(r.currency) else "")),
                      text(r.account), text(r.location), text(r.reason_code), text(r.reason),
                      text(r.status)]
                     for r in journal.itertuples(index=False)],
                    ["hold" if r.status == "hold" else "" for r in journal.itertuples(index=False)])
        jt = (f"<p>Posting date {esc(str(journal['posting_date'].iloc[0]))}. Lines with status hold "
              "are listed, not posted; a transfer line moves its quantity from the pile to the "
              f"other pile.</p>{jt}")
    else:
        jt = "<p>No adjustments this period.</p>"
    cautions = "".join(f"<li>{esc(c)}</li>" for c in CAUTIONS)
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>Stock close {esc(result.period)}: {esc(result.site_name)}</title>
<style>{_CSS}</style></head>
<body>
<h1>Stock close {esc(result.period)}: {esc(result.site_name)}</h1>
<p class="status">{esc(close_status_text(result))}</p>
<p class="facts">Survey {esc(result.survey_date)} (instant {esc(_local_time(result))}),
previous survey {esc(result.previous_survey_date or "none")}; CRS {esc(result.crs)};
time zone {esc(result.timezone)}.</p>
<p>{esc(SIGN_CONVENTION)}</p>
{headline}
<h2>Map</h2>
<img alt="Shaded relief of the survey surface with piles coloured by variance"
src="data:image/png;base64,{_map_figure(result)}">
<h2>Variance and its uncertainty</h2>
<img alt="Bar chart of variance per pile with 2-sigma bars"
src="data:image/png;base64,{_bar_figure(result)}">
<h2>Piles</h2>
<p class="legend">Row colours:<span style="background:{OUT_OF_TOLERANCE_COLOR}"></span>{esc(ROW_LEGEND["out_of_tolerance"])}
<span style="background:{SIGNIFICANT_COLOR}"></span>{esc(ROW_LEGEND["significant"])}</p>
{piles_table}
{_registration(result)}
<h2>Stock outside the footprints</h2>
{_unassigned_section(result)}
<h2>Journal</h2>
{jt}
<h2>Scale diagnostics</h2>
{scales}
<h2>Movements</h2>
{_movement_summary(result.movements)}
<h2>Duplicates</h2>
{dups}
<h2>Cautions</h2>
<div class="caution"><ul>{cautions}</ul></div>
</body></html>
"""


def _local_time(result: CloseResult) -> str:
    """The survey instant in the site's time zone, as people on site read clocks."""
    import pandas as pd

    ts = pd.Timestamp(result.survey_instant)
    if ts.tzinfo is None:
        ts = ts.tz_localize("UTC")
    if result.timezone:
        ts = ts.tz_convert(result.timezone)
    return ts.strftime("%Y-%m-%d %H:%M %Z (UTC%z)")


def write_report(result: CloseResult, path: str | Path) -> Path:
    """Write the self-contained HTML report of one close.

    Parameters
    ----------
    result : CloseResult
    path : str or Path
        Destination ``report-<period>.html``; written beside it, then renamed.

    Returns
    -------
    Path
    """
    text = report_html(result)
    dest = Path(path)
    with atomic_path(dest) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return dest
