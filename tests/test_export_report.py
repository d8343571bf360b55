"""The HTML report: self-contained, images embedded, cautions present, Chromium renders it."""

from __future__ import annotations

import base64
import html
import re
import shutil
import subprocess
from html.parser import HTMLParser

import pytest

from inventory.export.report import report_html, variance_colormap, write_report

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG spec (ISO/IEC 15948), section 5.2


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.refs: list[str] = []
        self.imgs: list[str] = []
        self.tags: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href") and v is not None:
                self.refs.append(v)
                if tag == "img":
                    self.imgs.append(v)


@pytest.fixture
def result(make_close_result):
    return make_close_result("2026-02", period_index=1)


def test_self_contained_with_embedded_images(result, tmp_path):
    path = write_report(result, tmp_path / "report-2026-02.html")
    text = path.read_text(encoding="utf-8")
    p = _Collect()
    p.feed(text)
    assert len(p.imgs) == 2  # the map and the variance chart
    for src in p.imgs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1]).startswith(PNG_SIGNATURE)
    # nothing fetched from anywhere: every reference is inline data
    assert all(r.startswith("data:") for r in p.refs)
    assert "<link" not in text and "<script" not in text
    assert not re.search(r"url\((?!data:)", text)


def test_content(result):
    text = report_html(result)
    for pid in result.piles.pile_id:
        assert pid in text
    assert "variance = survey - book" in text
    assert "legal metrology rules" in text and "licensed surveyors" in text
    assert "Never walk on stockpiles or under reclaim faces" in text
    assert "Scale diagnostics" in text and "BS-IN" in text
    assert text.count('class="oot"') >= int(result.piles.out_of_tolerance.sum())
    # an out-of-tolerance pile row is marked
    assert re.search(r'<tr class="oot"><td>P-LIME-1</td>', text)


def test_text_from_inputs_is_escaped(result):
    result.duplicates.loc[0, "detail"] = "<script>alert(1)</script>"
    text = report_html(result)
    assert "<script>" not in text and "&lt;script&gt;" in text


def test_same_close_same_report(result):
    assert report_html(result) == report_html(result)


def test_colour_scheme_is_diverging_and_our_own():
    cmap = variance_colormap()
    lo, mid, hi = cmap(0.0), cmap(0.5), cmap(1.0)
    assert lo[2] > lo[0] and hi[0] > hi[2]  # blue deficit, red surplus
    assert min(mid[:3]) > 0.85  # a pale neutral at zero
    assert cmap.name == "inventory_variance"


@pytest.mark.tools
def test_chromium_renders_the_report(result, tmp_path):
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if not exe:
        pytest.skip("Chromium not installed; `make tools` installs Debian's chromium when root")
    page = write_report(result, tmp_path / "report.html")
    shot = tmp_path / "report.png"
    # flags: headless as root in a closed network (no sandbox, no background fetches),
    # with a fresh profile so no earlier state is read
    cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
           "--no-first-run", "--disable-background-networking", "--disable-component-update",
           "--disable-sync", f"--user-data-dir={tmp_path / 'profile'}",
           "--window-size=1200,2400", f"--screenshot={shot}", page.as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert shot.read_bytes().startswith(PNG_SIGNATURE)
    import matplotlib.image as mpimg

    img = mpimg.imread(shot)
    assert img.shape[0] == 2400 and img.shape[1] == 1200
    # the page drew something: many distinct colours (relief, piles, tables), not a blank page
    rgb = (img[..., :3] * 255).astype("uint8").reshape(-1, 3)
    assert len({tuple(c) for c in rgb[:: 37]}) > 50
    dom = subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                          "--disable-background-networking", "--disable-component-update",
                          "--disable-sync", f"--user-data-dir={tmp_path / 'profile2'}",
                          "--dump-dom", page.as_uri()], capture_output=True, text=True,
                         timeout=120)
    assert dom.returncode == 0
    assert "Stock close 2026-02" in dom.stdout and dom.stdout.count("<img") == 2


def test_quiet_month_and_a_pile_without_book(make_close_result, tmp_path):
    import pandas as pd

    res = make_close_result("2026-01")
    res.movements = res.movements.iloc[0:0]
    res.journal = res.journal.iloc[0:0]
    res.scale_diagnostics = res.scale_diagnostics.iloc[0:0]
    res.duplicates = pd.DataFrame()
    res.coverage_gaps = res.coverage_gaps.iloc[0:0]
    res.piles.loc[1, ["variance_pct", "variance_sigma_t"]] = float("nan")  # book of 0 t
    text = write_report(res, tmp_path / "r.html").read_text(encoding="utf-8")
    assert "No movements this period." in text
    assert "No adjustments this period." in text
    assert "No scale diagnostics" in text
    cells = re.findall(r"<td>([^<]*)</td>", text)
    assert cells and not any("nan" in c.lower() for c in cells)  # a missing figure is blank


@pytest.mark.parametrize("shape", [(1, 1), (1, 7), (6, 1)])
def test_a_surface_one_cell_high_or_wide_is_drawn(make_close_result, tmp_path, shape):
    # A tiny survey can keep a single surface cell (its surface box one cell high or wide);
    # numpy.gradient, under matplotlib's hill-shading, needs two cells along each axis.
    import numpy as np

    from inventory.model.grid import Grid, Surface

    res = make_close_result("2026-01")
    g = res.surface.grid
    x0, y0, x1, y1 = res.footprints.total_bounds
    sub = Grid((x0 + x1) / 2, (y0 + y1) / 2, g.cell, shape[0], shape[1], g.crs)
    z = np.arange(shape[0] * shape[1], dtype=float).reshape(shape) + 3.0
    res.surface = Surface(sub, z, np.ones(shape, np.int32), np.zeros(shape), np.zeros(shape, bool), res.period)
    text = write_report(res, tmp_path / "r.html").read_text(encoding="utf-8")
    assert text.count("data:image/png;base64,") >= 1


@pytest.mark.parametrize("pile_id", ["$x^2$", r"$\alpha$", "C$1", r"$\frac{a}{$"])
def test_pile_ids_are_drawn_as_typed_not_as_mathtext(make_close_result, monkeypatch, pile_id):
    """A pile id matplotlib could read as mathtext is drawn literally (``$x^2$`` used to stop
    the report with mathtext's ValueError; ``$\\alpha$`` would have shown as a Greek letter)."""
    from inventory.export import report

    res = make_close_result("2026-01")
    old = res.piles.loc[0, "pile_id"]
    res.piles.loc[0, "pile_id"] = pile_id
    res.footprints.loc[res.footprints["pile_id"] == old, "pile_id"] = pile_id
    figures = []
    real_png = report._png

    def keep(fig):
        figures.append(fig)
        return real_png(fig)

    monkeypatch.setattr(report, "_png", keep)
    text = report_html(res)
    assert len(figures) == 2
    drawn = [t for fig in figures for t in fig.findobj(lambda a: hasattr(a, "get_parse_math"))
             if t.get_text() == pile_id]
    # on the map (its label) and in the bar chart (its tick label), both taken literally
    assert len(drawn) >= 2
    assert not any(t.get_parse_math() for t in drawn)
    assert f"<td>{html.escape(pile_id)}</td>" in text


def test_low_scan_pile_is_marked_next_to_its_variance(make_close_result, monkeypatch):
    """A pile the volume step flagged low_scan (most of its footprint interpolated) says so
    beside its variance in the pile table and on its bar, and keeps all its flags."""
    from inventory.export import report

    res = make_close_result("2026-01")
    res.piles.loc[2, "scanned_fraction"] = 0.31
    res.piles.loc[2, "flags"] = "out_of_tolerance;significant;low_scan;unfilled_gap"
    figures = []
    real_png = report._png
    monkeypatch.setattr(report, "_png", lambda fig: figures.append(fig) or real_png(fig))
    text = report_html(res)
    table = re.search(r"<h2>Piles</h2>.*?(<table>.*?</table>)", text, flags=re.DOTALL).group(1)
    headers = re.findall(r"<th>([^<]*)</th>", table)
    rows = {cells[0]: cells for cells in (
        re.findall(r"<td[^>]*>(.*?)</td>", row) for row in re.findall(r"<tr[^>]*>(.*?)</tr>", table))
        if cells}
    assert len(rows) == 3
    low = rows["P-LIME-1"]
    at = headers.index("variance (%)")
    assert headers[at + 1] == "scanned"
    assert low[at + 1] == '<span class="low">31 %, low scan: mostly interpolated</span>'
    assert rows["P-COAL-1"][at + 1] == "{:.0f} %".format(100 * res.piles.loc[0, "scanned_fraction"])
    assert low[headers.index("flags")] == "out_of_tolerance; significant; low_scan; unfilled_gap"
    ticks = [t.get_text() for t in figures[1].axes[0].get_yticklabels()]
    assert ticks == ["P-COAL-1", "P-COAL-2", "P-LIME-1 (low scan)"]
    assert [bool(b.get_hatch()) for b in figures[1].axes[0].patches[:3]] == [False, False, True]
