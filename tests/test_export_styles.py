"""Styles beside the layers and rasters: SLD files and the legend PNG agree with the report.

No XML Schema of SLD 1.0.0 ships in a Python package we could install offline, so the
documents are parsed with the standard library and their structure is checked against the
element order of the SLD 1.0.0 schema (OGC 02-070, StyledLayerDescriptor.xsd; orders from
memory: Rule = Name, Title, Abstract, LegendGraphic, Filter | ElseFilter, Min/MaxScale,
symbolizers; RasterSymbolizer = Geometry, Opacity, ChannelSelection, OverlapBehavior,
ColorMap, ...).
"""

from __future__ import annotations

import math
import shutil
import subprocess
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from inventory.export.layers import LAYER_NAMES, write_layers
from inventory.export.rasters import write_change, write_thickness
from inventory.export.report import _variance_norm, variance_colormap
from inventory.export.styles import (
    LEGEND_SIZE_PX,
    OGC_NS,
    SLD_NS,
    change_stops,
    thickness_stops,
    write_legend,
    write_styles,
)
from inventory.model.symbology import (
    CHANGE_COLORS,
    NO_VALUE_COLOR,
    THICKNESS_COLORS,
    VARIANCE_COLORS,
    class_of,
    variance_classes,
    variance_span,
)

S = f"{{{SLD_NS}}}"
F = f"{{{OGC_NS}}}"

#: Order of a Rule's children in SLD 1.0.0 (StyledLayerDescriptor.xsd, from memory).
RULE_ORDER = ["Name", "Title", "Abstract", "LegendGraphic", "Filter", "ElseFilter",
              "MinScaleDenominator", "MaxScaleDenominator", "Symbolizer"]
SYMBOLIZERS = {"LineSymbolizer", "PolygonSymbolizer", "PointSymbolizer", "TextSymbolizer",
               "RasterSymbolizer"}


@pytest.fixture
def result(make_close_result):
    # the second month: it has a change raster
    r = make_close_result("2026-02", period_index=1)
    assert r.change is not None
    return r


@pytest.fixture
def styled(result, tmp_path):
    gpkg = write_layers(result, tmp_path / "piles-2026-02.gpkg")
    thick = write_thickness(result, tmp_path / "thickness-2026-02-28.tif")
    change = write_change(result, tmp_path / "change-2026-01-28_2026-02-28.tif")
    return gpkg, write_styles(result, gpkg, thick, change)


def _local(tag: str) -> str:
    return tag.split("}", 1)[1]


def _check_structure(root: ET.Element, name: str) -> ET.Element:
    """Root, namespace and order checks every SLD must pass; returns its UserStyle."""
    assert root.tag == S + "StyledLayerDescriptor" and root.get("version") == "1.0.0"
    named = root.findall(S + "NamedLayer")
    assert len(named) == 1
    assert [_local(c.tag) for c in named[0]] == ["Name", "UserStyle"]
    assert named[0].find(S + "Name").text == name
    style = named[0].find(S + "UserStyle")
    kids = [_local(c.tag) for c in style]
    assert kids[:3] == ["Name", "Title", "Abstract"] and set(kids[3:]) == {"FeatureTypeStyle"}
    for rule in style.iter(S + "Rule"):
        order = [RULE_ORDER.index("Symbolizer" if _local(c.tag) in SYMBOLIZERS else _local(c.tag))
                 for c in rule]
        assert order == sorted(order), [_local(c.tag) for c in rule]
        assert any(_local(c.tag) in SYMBOLIZERS for c in rule)
        assert rule.find(S + "Title").text
    # every element is in the SLD or the Filter namespace
    assert {el.tag.split("}")[0][1:] for el in root.iter()} <= {SLD_NS, OGC_NS}
    return style


def _passes(flt: ET.Element, props: dict) -> bool:
    """Evaluate the OGC Filter Encoding 1.0 subset the styles use on one feature."""
    tag = _local(flt.tag)
    if tag == "Filter":
        return _passes(flt[0], props)
    if tag == "And":
        return all(_passes(c, props) for c in flt)
    value = props.get(flt.find(F + "PropertyName").text)
    if tag == "PropertyIsNull":
        return value is None or (isinstance(value, float) and math.isnan(value))
    literal = float(flt.find(F + "Literal").text)
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return False
    return {"PropertyIsLessThan": value < literal,
            "PropertyIsGreaterThanOrEqualTo": value >= literal,
            "PropertyIsEqualTo": value == literal}[tag]


def _fill_of(fts: ET.Element, props: dict) -> str | None:
    """The fill colour the first matching rule of a FeatureTypeStyle gives a feature."""
    for rule in fts.findall(S + "Rule"):
        flt = rule.find(F + "Filter")
        if rule.find(S + "ElseFilter") is not None or flt is None or _passes(flt, props):
            return rule.find(f"{S}PolygonSymbolizer/{S}Fill/{S}CssParameter[@name='fill']").text
    return None


def _hex(rgba) -> str:
    return "#" + "".join(f"{round(c * 255):02x}" for c in rgba[:3])


def test_every_sld_parses_and_names_its_layer(styled):
    gpkg, written = styled
    assert set(written) == {*LAYER_NAMES, "thickness", "change"}
    for layer in LAYER_NAMES:
        path = written[layer]
        assert path.name == f"piles-2026-02.{layer}.sld" and path.parent == gpkg.parent
        assert path.read_bytes().startswith(b"<?xml version='1.0' encoding='UTF-8'?>")
        _check_structure(ET.parse(path).getroot(), layer)
    for key, stem in (("thickness", "thickness-2026-02-28"), ("change", "change-2026-01-28_2026-02-28")):
        assert written[key].name == f"{stem}.sld"
        _check_structure(ET.parse(written[key]).getroot(), stem)


def test_pile_classes_are_the_reports_bounds_and_colours(styled, result):
    _, written = styled
    style = _check_structure(ET.parse(written["piles"]).getroot(), "piles")
    fills = style.findall(S + "FeatureTypeStyle")[0]
    rules = fills.findall(S + "Rule")
    # five classes and one for an unknown variance
    assert len(rules) == 6
    colours = [r.find(f".//{S}CssParameter[@name='fill']").text for r in rules]
    assert colours == [*VARIANCE_COLORS, NO_VALUE_COLOR]
    # the class bounds in the filters are the report's BoundaryNorm edges, in order
    norm = _variance_norm(result.piles)
    literals = sorted({float(lit.text) for lit in fills.iter(F + "Literal")})
    assert literals == [float(b) for b in norm.boundaries[1:-1]]
    # fixture: variance -0.40, 1.40, -3.25 %, tolerances 3 and 2 % -> span 4 %, edges +-0.8, +-2.4
    assert norm.boundaries.tolist() == [-4.0, -2.4, -0.8, 0.8, 2.4, 4.0]
    # every value, on and between the edges and beyond the span, gets the report's colour
    cmap = variance_colormap()
    probes = [-9.0, -4.0, -2.4, -2.41, -1.0, -0.8, -0.81, 0.0, 0.79, 0.8, 2.39, 2.4, 4.0, 12.0]
    for v in probes:
        report_colour = _hex(cmap(norm(v)))
        assert _fill_of(fills, {"variance_pct": v}) == report_colour, v
    assert _fill_of(fills, {"variance_pct": None}) == NO_VALUE_COLOR == _hex(cmap(np.nan))
    # and the report's map draws each pile of this close in the colour the SLD gives it
    for pid, pct in zip(result.piles["pile_id"], result.piles["variance_pct"]):
        assert _fill_of(fills, {"variance_pct": pct}) == _hex(cmap(norm(pct))), pid


def test_pile_outline_follows_tolerance(styled):
    _, written = styled
    style = ET.parse(written["piles"]).getroot().find(f"{S}NamedLayer/{S}UserStyle")
    outlines = style.findall(S + "FeatureTypeStyle")[1]
    oot, other = outlines.findall(S + "Rule")
    assert _passes(oot.find(F + "Filter"), {"out_of_tolerance": 1})
    assert not _passes(oot.find(F + "Filter"), {"out_of_tolerance": 0})
    assert other.find(S + "ElseFilter") is not None

    def width(rule):
        return float(rule.find(f".//{S}CssParameter[@name='stroke-width']").text)

    assert width(oot) > width(other)
    assert rule_dashes(oot) is None and rule_dashes(other) is not None


def rule_dashes(rule):
    el = rule.find(f".//{S}CssParameter[@name='stroke-dasharray']")
    return None if el is None else el.text


def test_raster_colour_maps_cover_the_data(styled, result):
    _, written = styled
    for key, colours in (("thickness", THICKNESS_COLORS), ("change", CHANGE_COLORS)):
        cmap = ET.parse(written[key]).getroot().find(f".//{S}RasterSymbolizer/{S}ColorMap")
        sym = [_local(c.tag) for c in ET.parse(written[key]).getroot().find(f".//{S}RasterSymbolizer")]
        assert sym == ["Opacity", "ColorMap"]
        entries = cmap.findall(S + "ColorMapEntry")
        q = [float(e.get("quantity")) for e in entries]
        assert [e.get("color") for e in entries] == list(colours)
        assert q == sorted(q) and len(set(q)) == len(q)
        data = result.thickness if key == "thickness" else result.change
        finite = data[np.isfinite(data)]
        assert q[0] <= finite.min() and q[-1] >= finite.max()
    thick = [v for v, _ in thickness_stops(result)]
    assert thick[0] == 0.0 and thick[-1] == math.ceil(np.nanmax(result.thickness) / 0.5) * 0.5
    change = [v for v, _ in change_stops(result)]
    assert change[0] == -change[-1] and change[2] == 0.0


def test_legend_png_size_and_colours(result, tmp_path):
    from PIL import Image

    path = write_legend(result, tmp_path / "legend-2026-02.png")
    img = Image.open(path)
    assert img.format == "PNG" and img.size == LEGEND_SIZE_PX
    rgb = np.asarray(img.convert("RGB")).reshape(-1, 3)
    pixels = {"#%02x%02x%02x" % tuple(p) for p in np.unique(rgb, axis=0)}
    span = variance_span(result.piles["variance_pct"], result.piles["tolerance_pct"])
    for c in variance_classes(span):
        assert c.colour in pixels, c.label
    assert NO_VALUE_COLOR in pixels
    for _, colour in thickness_stops(result) + change_stops(result):
        assert colour in pixels, colour
    # and the same close draws the same image
    again = write_legend(result, tmp_path / "again.png")
    assert again.read_bytes() == path.read_bytes()


def test_class_of_agrees_with_the_classes():
    classes = variance_classes(5.0)
    assert [(c.lower, c.upper) for c in classes] == [
        (None, -3.0), (-3.0, -1.0), (-1.0, 1.0), (1.0, 3.0), (3.0, None)]
    assert class_of(-3.0, classes) is classes[1]  # lower bound inclusive
    assert class_of(1.0, classes) is classes[3]
    assert class_of(-50.0, classes) is classes[0] and class_of(50.0, classes) is classes[4]
    assert class_of(float("nan"), classes) is None
    with pytest.raises(ValueError):
        variance_classes(0.0)


@pytest.mark.tools
def test_gdal_still_reads_the_styled_layers(styled):
    # GDAL's ogrinfo (Debian gdal-bin) reads the GeoPackage with the SLD files beside it
    if shutil.which("ogrinfo") is None:
        pytest.skip("gdal-bin (ogrinfo) is not installed; make test installs it as root")
    gpkg, _ = styled
    out = subprocess.run(["ogrinfo", "-so", "-al", str(gpkg)], capture_output=True, text=True,
                         check=True).stdout
    for layer in LAYER_NAMES:
        assert f"Layer name: {layer}" in out
