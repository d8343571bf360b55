"""A close refuses, before any work, what would fail late or leave things behind: a surface
grid too large for memory, a survey that covers no pile, an unwritable site folder or output
name, a month closed before the month it follows; it clears what a killed close left; every
command answers bad input with exit 2. The site folder is byte-identical after a refusal."""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path

import laspy
import pytest

from inventory.cli import main
from inventory.errors import InputError

SURVEY = Path("surveys") / "2026-10-31"


def snapshot(root: Path) -> dict[str, str]:
    """Every file under ``root`` by relative path, with the SHA-256 of its bytes."""
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def shift_cloud(path: Path, dx: float, dy: float = 0.0) -> None:
    las = laspy.read(path)
    las.x = las.x + dx
    las.y = las.y + dy
    las.write(path)


def error_lines(err: str) -> list[str]:
    return [line for line in err.splitlines() if line.startswith("error: ")]


# ----------------------------------------------------------------------------- case: grid size, extent
def test_tiny_cell_size_is_refused_by_check_and_close(good_site, capsys):
    toml = good_site / "site.toml"
    toml.write_text(toml.read_text().replace("cell_size_m = 0.5", "cell_size_m = 0.001"))
    before = snapshot(good_site)
    assert main(["check", str(good_site)]) == 2
    lines = error_lines(capsys.readouterr().err)
    assert len(lines) == 1
    line = lines[0]
    assert line.startswith("error: site/surveys/2026-10-31: extent: the surface grid over this survey's extent")
    assert "at 0.001 m cells would be" in line
    assert "GB of memory, above the limit of 8.0 GB (inventory.site.extent.MAX_GRID_BYTES)" in line
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert "above the limit of 8.0 GB" in capsys.readouterr().err
    assert snapshot(good_site) == before


def test_cloud_far_from_the_others_is_refused_by_its_grid_size(good_site, write_tiny_cloud, capsys):
    far = good_site / SURVEY / "far.laz"
    write_tiny_cloud(far)
    shift_cloud(far, 100_000.0, 100_000.0)
    before = snapshot(good_site)
    assert main(["check", str(good_site)]) == 2
    line = error_lines(capsys.readouterr().err)[0]
    assert line.startswith("error: site/surveys/2026-10-31: extent: the surface grid over this survey's extent (100,0")
    # 100 km x 100 km at 0.5 m: about 200,000 x 200,000 cells
    assert "at 0.5 m cells would be 200,1" in line
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert snapshot(good_site) == before


def test_survey_that_covers_no_pile(good_site, capsys):
    shift_cloud(good_site / SURVEY / "a.laz", 100_000.0)
    before = snapshot(good_site)
    assert main(["check", str(good_site)]) == 2
    lines = error_lines(capsys.readouterr().err)
    assert len(lines) == 1
    assert lines[0].startswith("error: site/surveys/2026-10-31: extent: survey 2026-10-31 covers no pile: "
                               "its files span x 599,9")
    assert "m from the nearest pile footprint; check the clouds' CRS, station poses or trajectory" in lines[0]
    # pile B's footprint ends at x 500,040; the shifted cloud starts near x 599,985
    gap = float(lines[0].split("in the site CRS, ")[1].split(" m from")[0].replace(",", ""))
    assert 99_900 < gap < 99_960
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert snapshot(good_site) == before


def test_grid_estimate_matches_the_survey_grid(good_site):
    """The check's estimate is the grid the survey step would build (same snapping)."""
    from inventory.model.grid import Grid
    from inventory.site.extent import BYTES_PER_CELL, grid_bytes
    from inventory.site.load import load_site

    site = load_site(good_site)
    extent = site.surveys["2026-10-31"].extent
    grid, need = grid_bytes(extent, 0.5)
    same = Grid.snapped(*extent, cell=0.5)
    assert (grid.nrows, grid.ncols) == (same.nrows, same.ncols)
    assert need == same.nrows * same.ncols * BYTES_PER_CELL
    assert 110 <= grid.ncols <= 125 and 55 <= grid.nrows <= 65  # the cloud spans about 60 m x 30 m


def test_measure_survey_refuses_a_huge_grid_before_reading(good_site, monkeypatch):
    """Called directly with a site whose configuration asks for a huge grid, the survey step
    refuses before reading a point."""
    from inventory.site.load import load_site
    from inventory.survey import measure

    site = load_site(good_site)
    grid = dataclasses.replace(site.config.grid, cell_size_m=0.001)
    site = dataclasses.replace(site, config=dataclasses.replace(site.config, grid=grid))
    read = []
    monkeypatch.setattr(measure, "_read_into_spill", lambda *a, **k: read.append(a))
    with pytest.raises(InputError) as caught:
        measure.measure_survey(site, "2026-10-31", out_dir=good_site.parent / "out")
    assert caught.value.path == str(good_site / SURVEY)
    assert caught.value.field == "extent"
    assert "above the limit of 8.0 GB" in caught.value.why
    assert read == []
    assert not (good_site.parent / "out").exists()
