"""Styles that travel with the data: OGC Styled Layer Descriptor files and a legend PNG.

Written beside the close's GeoPackage and rasters so that a GIS draws them as the report
does, from the classes and colours of :mod:`inventory.model.symbology` (the report takes
them from there too):

``piles-<period>.<layer>.sld``
    One SLD 1.0.0 document (OGC 02-070) per GeoPackage layer. ``piles``: the five variance
    classes of the close as rules on ``variance_pct`` (OGC Filter Encoding 1.0 comparisons,
    lower bound inclusive, upper exclusive), a grey rule for a pile without a variance, the
    outline thick and solid where ``out_of_tolerance`` is 1, thin and dashed otherwise, and
    the pile id as label. ``coverage_gaps``, ``survey_extent`` and ``unassigned_stock``: outlines.
``<raster>.sld``
    Beside ``thickness-<date>.tif`` and ``change-<a>_<b>.tif``: an SLD 1.0.0
    ``RasterSymbolizer`` whose ``ColorMap`` spreads the thickness ramp from 0 to the thickest
    cell, and the change ramp symmetrically about zero (removed blue, added rust).
``legend-<period>.png``
    The variance classes with their bounds and the two ramps, drawn with matplotlib at a fixed
    size (:data:`LEGEND_SIZE_PX`).

The SLD files name the layer (``NamedLayer/Name``) and each rule has a title for a GIS
legend. In QGIS: Layer Properties, Symbology, Style, Load Style, and pick the ``.sld``.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np

from inventory.io.atomic import atomic_path
from inventory.model.results import CloseResult
from inventory.model.symbology import (
    CHANGE_COLORS,
    COVERAGE_GAP_COLOR,
    NO_VALUE_COLOR,
    OUTLINE_OTHER,
    OUTLINE_OUT_OF_TOLERANCE,
    PILE_FILL_OPACITY,
    SURVEY_EXTENT_COLOR,
    UNASSIGNED_STOCK_COLOR,
    THICKNESS_COLORS,
    ColourClass,
    ramp_stops,
    ramp_top,
    variance_classes,
    variance_span,
)

__all__ = [
    "LEGEND_SIZE_PX",
    "SLD_NS",
    "OGC_NS",
    "change_stops",
    "close_variance_classes",
    "piles_sld",
    "raster_sld",
    "layer_style_name",
    "raster_style_path",
    "thickness_stops",
    "write_legend",
    "write_styles",
]

#: Namespaces of SLD 1.0.0 and of the OGC Filter Encoding 1.0 it uses.
SLD_NS = "http://www.opengis.net/sld"
OGC_NS = "http://www.opengis.net/ogc"
_XSI_NS = "http://www.w3.org/2001/XMLSchema-instance"
_SCHEMA_LOCATION = f"{SLD_NS} http://schemas.opengis.net/sld/1.0.0/StyledLayerDescriptor.xsd"

#: Size of the legend PNG in pixels (width, height): 7 x 5 inches at 100 dots per inch.
LEGEND_SIZE_PX = (700, 500)
_LEGEND_DPI = 100
#: Colours drawn per ramp in the legend: 4 x 64 + 1, so each of the five stops of a ramp is
#: drawn in its own exact colour.
_RAMP_STEPS = 257
#: Steps the ramps' top is rounded up to (metres).
_RAMP_STEP_M = 0.5

# how ElementTree writes these namespaces: SLD as the default namespace (as SLD documents
# are customarily written and read), the filter and schema-instance ones with their
# customary prefixes
for _prefix, _uri in (("", SLD_NS), ("ogc", OGC_NS), ("xsi", _XSI_NS)):
    ET.register_namespace(_prefix, _uri)


def _s(tag: str) -> str:
    return f"{{{SLD_NS}}}{tag}"


def _o(tag: str) -> str:
    return f"{{{OGC_NS}}}{tag}"


def _sub(parent: ET.Element, tag: str, text: str | None = None, **attrib: str) -> ET.Element:
    el = ET.SubElement(parent, tag, attrib)
    if text is not None:
        el.text = text
    return el


def _number(v: float) -> str:
    """A number as a Filter literal or quantity: the shortest text that reads back the same."""
    return repr(float(v))


# ----------------------------------------------------------------------------- classes, ramps
def close_variance_classes(result: CloseResult) -> tuple[ColourClass, ...]:
    """The variance classes of this close (the report's: same span, same colours)."""
    piles = result.piles
    return variance_classes(variance_span(piles["variance_pct"], piles["tolerance_pct"]))


def thickness_stops(result: CloseResult) -> list[tuple[float, str]]:
    """The thickness ramp of this close: 0 m to the thickest cell, rounded up to 0.5 m."""
    return ramp_stops(THICKNESS_COLORS, 0.0, ramp_top(result.thickness, _RAMP_STEP_M))


def change_stops(result: CloseResult) -> list[tuple[float, str]]:
    """The change ramp of this close: symmetric about zero, to the largest change rounded up
    to 0.5 m. Raises ``ValueError`` without a change raster."""
    if result.change is None:
        raise ValueError(f"close {result.period}: no change raster (no earlier surface)")
    top = ramp_top(result.change, _RAMP_STEP_M)
    return ramp_stops(CHANGE_COLORS, -top, top)


# ----------------------------------------------------------------------------- SLD documents
def _document(layer: str, title: str, abstract: str) -> tuple[ET.Element, ET.Element]:
    """An SLD root with one NamedLayer and its UserStyle; returns (root, user style)."""
    root = ET.Element(_s("StyledLayerDescriptor"), {"version": "1.0.0",
                                                    f"{{{_XSI_NS}}}schemaLocation": _SCHEMA_LOCATION})
    named = _sub(root, _s("NamedLayer"))
    _sub(named, _s("Name"), layer)
    style = _sub(named, _s("UserStyle"))
    _sub(style, _s("Name"), layer)
    _sub(style, _s("Title"), title)
    _sub(style, _s("Abstract"), abstract)
    return root, style


def _css(parent: ET.Element, name: str, value: str) -> None:
    _sub(parent, _s("CssParameter"), value, name=name)


def _stroke(parent: ET.Element, colour: str, width: float, dashes: tuple[float, float] | None) -> None:
    stroke = _sub(parent, _s("Stroke"))
    _css(stroke, "stroke", colour)
    _css(stroke, "stroke-width", _number(width))
    if dashes is not None:
        _css(stroke, "stroke-dasharray", " ".join(_number(d) for d in dashes))


def _rule(fts: ET.Element, name: str, title: str) -> ET.Element:
    rule = _sub(fts, _s("Rule"))
    _sub(rule, _s("Name"), name)
    _sub(rule, _s("Title"), title)
    return rule


def _compare(parent: ET.Element, op: str, prop: str, value: str) -> None:
    el = _sub(parent, _o(op))
    _sub(el, _o("PropertyName"), prop)
    _sub(el, _o("Literal"), value)


def _class_filter(rule: ET.Element, prop: str, c: ColourClass) -> None:
    """``lower <= prop < upper`` as an OGC filter (an open end leaves its comparison out)."""
    flt = _sub(rule, _o("Filter"))
    parent = _sub(flt, _o("And")) if c.lower is not None and c.upper is not None else flt
    if c.lower is not None:
        _compare(parent, "PropertyIsGreaterThanOrEqualTo", prop, _number(c.lower))
    if c.upper is not None:
        _compare(parent, "PropertyIsLessThan", prop, _number(c.upper))


def _fill_symbolizer(rule: ET.Element, colour: str) -> None:
    sym = _sub(rule, _s("PolygonSymbolizer"))
    fill = _sub(sym, _s("Fill"))
    _css(fill, "fill", colour)
    _css(fill, "fill-opacity", _number(PILE_FILL_OPACITY))


def piles_sld(result: CloseResult) -> ET.Element:
    """The ``piles`` layer's style: variance classes, tolerance outlines, pile labels."""
    classes = close_variance_classes(result)
    root, style = _document(
        "piles", f"Piles by variance, close of {result.period}",
        "Fill: variance in % of book (survey - book), five classes symmetric about zero, the "
        "same classes and colours as the close report; grey where no variance is known. "
        "Outline: thick and solid where the variance is out of the material's tolerance, thin "
        "and dashed otherwise.")
    fills = _sub(style, _s("FeatureTypeStyle"))
    for i, c in enumerate(classes, start=1):
        rule = _rule(fills, f"variance_class_{i}", f"variance {c.label}")
        _class_filter(rule, "variance_pct", c)
        _fill_symbolizer(rule, c.colour)
    rule = _rule(fills, "variance_unknown", "variance not known")
    null = _sub(_sub(rule, _o("Filter")), _o("PropertyIsNull"))
    _sub(null, _o("PropertyName"), "variance_pct")
    _fill_symbolizer(rule, NO_VALUE_COLOR)

    outlines = _sub(style, _s("FeatureTypeStyle"))
    rule = _rule(outlines, "out_of_tolerance", "out of tolerance")
    _compare(_sub(rule, _o("Filter")), "PropertyIsEqualTo", "out_of_tolerance", "1")
    _stroke(_sub(rule, _s("PolygonSymbolizer")), "#000000", *OUTLINE_OUT_OF_TOLERANCE)
    rule = _rule(outlines, "within_tolerance", "within tolerance or undecided")
    _sub(rule, _s("ElseFilter"))
    _stroke(_sub(rule, _s("PolygonSymbolizer")), "#000000", *OUTLINE_OTHER)

    labels = _sub(style, _s("FeatureTypeStyle"))
    rule = _rule(labels, "pile_label", "pile id")
    text = _sub(rule, _s("TextSymbolizer"))
    _sub(_sub(text, _s("Label")), _o("PropertyName"), "pile_id")
    font = _sub(text, _s("Font"))
    _css(font, "font-size", "10")
    halo = _sub(text, _s("Halo"))
    _sub(halo, _s("Radius"), "1.5")
    _css(_sub(halo, _s("Fill")), "fill", "#ffffff")
    _css(_sub(text, _s("Fill")), "fill", "#000000")
    return root


def _outline_sld(layer: str, title: str, abstract: str, colour: str, width: float) -> ET.Element:
    root, style = _document(layer, title, abstract)
    rule = _rule(_sub(style, _s("FeatureTypeStyle")), layer, title)
    _stroke(_sub(rule, _s("PolygonSymbolizer")), colour, width, None)
    return root


def raster_sld(name: str, title: str, abstract: str, stops: list[tuple[float, str]], unit: str) -> ET.Element:
    """An SLD 1.0.0 ``RasterSymbolizer`` with a ``ColorMap`` ramp through ``stops``."""
    root, style = _document(name, title, abstract)
    rule = _rule(_sub(style, _s("FeatureTypeStyle")), name, title)
    sym = _sub(rule, _s("RasterSymbolizer"))
    _sub(sym, _s("Opacity"), "1.0")
    cmap = _sub(sym, _s("ColorMap"))
    for value, colour in stops:
        _sub(cmap, _s("ColorMapEntry"), color=colour, quantity=_number(value),
             label=f"{value:+.2f} {unit}".replace("+0.00", "0.00"))
    return root


def _write_xml(root: ET.Element, path: Path) -> Path:
    ET.indent(root)
    data = ET.tostring(root, encoding="UTF-8", xml_declaration=True)
    with atomic_path(path) as tmp:
        tmp.write_bytes(data + b"\n")
    return path


def layer_style_name(gpkg: str | Path, layer: str) -> Path:
    """The SLD file of one GeoPackage layer: ``piles-2026-10.gpkg`` -> ``piles-2026-10.piles.sld``."""
    gpkg = Path(gpkg)
    return gpkg.with_name(f"{gpkg.stem}.{layer}.sld")


def raster_style_path(raster: str | Path) -> Path:
    """The SLD file beside a raster: ``thickness-2026-10-31.tif`` -> ``thickness-2026-10-31.sld``."""
    return Path(raster).with_suffix(".sld")


def write_styles(result: CloseResult, gpkg: str | Path, thickness: str | Path | None = None,
                 change: str | Path | None = None) -> dict[str, Path]:
    """Write the SLD files of the close's layers and rasters.

    Parameters
    ----------
    result : CloseResult
    gpkg : str or Path
        The close's GeoPackage; one SLD per layer is written beside it.
    thickness, change : str or Path, optional
        The thickness and change rasters; an SLD with the same stem is written beside each
        given.

    Returns
    -------
    dict
        Layer or raster name (``piles``, ``coverage_gaps``, ``survey_extent``, ``unassigned_stock``, ``thickness``,
        ``change``) -> the SLD written.
    """
    written = {
        "piles": _write_xml(piles_sld(result), layer_style_name(gpkg, "piles")),
        "coverage_gaps": _write_xml(_outline_sld(
            "coverage_gaps", f"Unscanned areas, close of {result.period}",
            "Outline of the areas inside the pile footprints the scan did not reach.",
            COVERAGE_GAP_COLOR, 1.0), layer_style_name(gpkg, "coverage_gaps")),
        "survey_extent": _write_xml(_outline_sld(
            "survey_extent", f"Survey extent {result.survey_date}",
            "Outline of the area the survey covered.", SURVEY_EXTENT_COLOR, 1.2),
            layer_style_name(gpkg, "survey_extent")),
        "unassigned_stock": _write_xml(_outline_sld(
            "unassigned_stock", f"Stock outside the footprints, survey {result.survey_date}",
            "Outline of material above the base outside every pile footprint: in no pile's stock.",
            UNASSIGNED_STOCK_COLOR, 2.0), layer_style_name(gpkg, "unassigned_stock")),
    }
    if thickness is not None:
        written["thickness"] = _write_xml(raster_sld(
            Path(thickness).stem, f"Thickness above base {result.survey_date}",
            "Material thickness above each pile's base, metres; pale thin, dark thick.",
            thickness_stops(result), "m"), raster_style_path(thickness))
    if change is not None:
        written["change"] = _write_xml(raster_sld(
            Path(change).stem, f"Surface change {result.previous_survey_date} to {result.survey_date}",
            "Later minus earlier surface, metres: blue where material was removed, rust where "
            "it was added, pale stone where the surface stayed.", change_stops(result), "m"),
            raster_style_path(change))
    return written


# ----------------------------------------------------------------------------- legend
def _ramp_axis(fig, rect, stops: list[tuple[float, str]], title: str) -> None:
    from matplotlib.colors import LinearSegmentedColormap

    ax = fig.add_axes(rect)
    low, high = stops[0][0], stops[-1][0]
    cmap = LinearSegmentedColormap.from_list(
        "ramp", [((v - low) / (high - low), c) for v, c in stops], N=_RAMP_STEPS)
    ax.imshow(np.arange(_RAMP_STEPS)[None, :], cmap=cmap, vmin=0, vmax=_RAMP_STEPS - 1,
              aspect="auto", interpolation="nearest", extent=(low, high, 0, 1))
    ax.set_yticks([])
    for spine in ax.spines.values():  # no frame over the end colours
        spine.set_visible(False)
    ax.set_xticks([v for v, _ in stops], [f"{v:g}" for v, _ in stops], fontsize=8)
    ax.set_title(title, fontsize=9, loc="left")


def write_legend(result: CloseResult, path: str | Path) -> Path:
    """The legend PNG of the close's styles: variance classes, thickness and change ramps.

    The image is :data:`LEGEND_SIZE_PX` pixels; swatches and ramps are drawn without
    smoothing, so each class colour and ramp stop appears in it exactly.
    """
    from matplotlib.figure import Figure
    from matplotlib.patches import Rectangle

    classes = close_variance_classes(result)
    w, h = LEGEND_SIZE_PX
    fig = Figure(figsize=(w / _LEGEND_DPI, h / _LEGEND_DPI), dpi=_LEGEND_DPI)
    ax = fig.add_axes((0.03, 0.42, 0.94, 0.55))
    ax.set_axis_off()
    ax.set_xlim(0, 1)
    ax.set_ylim(0, len(classes) + 2)
    ax.text(0.0, len(classes) + 1.5, f"Piles by variance, % of book (survey - book), close of {result.period}",
            fontsize=9, va="center", parse_math=False)
    entries = [(c.colour, c.label) for c in reversed(classes)] + [(NO_VALUE_COLOR, "variance not known")]
    for i, (colour, label) in enumerate(entries):
        y = len(classes) - i + 0.1
        ax.add_patch(Rectangle((0.0, y), 0.08, 0.8, facecolor=colour, edgecolor="none",
                               antialiased=False))
        ax.text(0.1, y + 0.4, label, fontsize=8, va="center", parse_math=False)
    _ramp_axis(fig, (0.05, 0.24, 0.9, 0.07), thickness_stops(result),
               f"Thickness above base, m (survey {result.survey_date})")
    if result.change is not None:
        _ramp_axis(fig, (0.05, 0.06, 0.9, 0.07), change_stops(result),
                   f"Surface change, m (later minus earlier, {result.previous_survey_date} to "
                   f"{result.survey_date})")
    dest = Path(path)
    with atomic_path(dest) as tmp:
        fig.savefig(tmp, format="png", dpi=_LEGEND_DPI, metadata={"Software": None})
    return dest


