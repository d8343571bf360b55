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


# ----------------------------------------------------------------------------- case: writability, output names
@pytest.fixture
def read_only():
    """``read_only(folder)``: make ``folder`` unwritable for this process (``chmod``; and the
    immutable attribute when running as root, who ignores permissions); undone at teardown."""
    import os
    import shutil
    import subprocess

    done: list[tuple[Path, int, bool]] = []

    def make(folder: Path) -> None:
        mode = folder.stat().st_mode
        folder.chmod(0o555)
        immutable = False
        if os.access(folder, os.W_OK):
            if shutil.which("chattr") is None:
                pytest.skip("running as root without chattr: cannot make a folder read-only")
            proc = subprocess.run(["chattr", "+i", str(folder)], capture_output=True, text=True, check=False)
            immutable = proc.returncode == 0
            if not immutable or os.access(folder, os.W_OK):
                pytest.skip(f"cannot make a folder read-only here: {proc.stderr.strip()}")
        done.append((folder, mode, immutable))

    yield make
    for folder, mode, immutable in done:
        if immutable:
            subprocess.run(["chattr", "-i", str(folder)], check=True)
        folder.chmod(mode)


def test_read_only_site_folder_is_refused_before_any_work(good_site, read_only, capsys, monkeypatch):
    from inventory import close

    surveyed = []
    monkeypatch.setattr(close, "_survey", lambda *a, **k: surveyed.append(a))
    before = snapshot(good_site)
    read_only(good_site)
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {good_site}: the site folder is not writable (the close writes ledger.sqlite and closes/ "
        "there); give write permission or close a writable copy")]
    assert surveyed == []
    assert snapshot(good_site) == before


def test_read_only_closes_folder_is_refused(good_site, read_only, capsys):
    (good_site / "closes").mkdir()
    read_only(good_site / "closes")
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {good_site / 'closes'}: the outputs folder is not writable; give write permission")]
    assert not (good_site / "ledger.sqlite").exists()


def test_read_only_earlier_outputs_are_refused_before_any_work(good_site, read_only, capsys, monkeypatch):
    """Found by a damage audit: the earlier outputs are kept aside by renaming their folder;
    one that cannot be renamed failed the close at the end, after the survey, as 'the run
    failed: PermissionError'."""
    from inventory import close

    surveyed = []
    monkeypatch.setattr(close, "_survey", lambda *a, **k: surveyed.append(a))
    folder = good_site / "closes" / "2026-10"
    folder.mkdir(parents=True)
    (folder / "run.json").write_text("{}")
    read_only(folder)
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {folder}: the earlier outputs of 2026-10 are not writable, so they cannot be kept aside as "
        "superseded; give write permission")]
    assert surveyed == []
    assert not (good_site / "ledger.sqlite").exists()


def test_file_in_place_of_the_period_folder_is_refused(good_site, capsys):
    (good_site / "closes").mkdir()
    (good_site / "closes" / "2026-10").write_text("notes\n")
    before = snapshot(good_site)
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {good_site / 'closes' / '2026-10'}: is not a folder; the outputs of 2026-10 go into a folder "
        "of this name: move it away")]
    assert snapshot(good_site) == before


def test_stray_superseded_folder_is_refused_before_any_work(good_site, capsys, monkeypatch):
    from inventory import close

    assert main(["close", str(good_site), "--period", "2026-10"]) == 0
    assert main(["reopen", str(good_site), "--period", "2026-10", "--reason", "rescan"]) == 0
    stray = good_site / "closes" / "2026-10.superseded-close-1"   # the name close 1's outputs get
    stray.mkdir()
    (stray / "note.txt").write_text("kept by hand\n")
    capsys.readouterr()
    before = snapshot(good_site)
    surveyed = []
    monkeypatch.setattr(close, "_survey", lambda *a, **k: surveyed.append(a))
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {stray}: already exists: this close keeps the current 2026-10/ (outputs of ledger close 1) "
        "under this name; move it out of closes/ first")]
    assert surveyed == []
    assert snapshot(good_site) == before


# ----------------------------------------------------------------------------- case: what killed closes left
def test_staging_folders_of_killed_closes_are_cleared(good_site, capsys):
    import os

    from inventory.close import _host

    closes = good_site / "closes"
    closes.mkdir()
    dead = closes / f".2026-10.partial-{_host()}-999999999-k1ll3d00"   # no such process
    old = closes / ".2026-09.partial-x7_q2abc"                          # an earlier version's name
    alive = closes / f".2026-10.partial-{_host()}-{os.getpid()}-running"  # a close still running here
    remote = closes / ".2026-10.partial-otherhost-4242-elsewhere"        # a close on another machine
    for folder in (dead, old, alive, remote):
        folder.mkdir()
        (folder / ".variance-2026-10.abc.xlsx").write_text("half written")
    mine = closes / ".2026-10.notes"                                      # not a staging name
    mine.mkdir()
    (closes / "readme.partial-1.txt").write_text("not ours\n")
    assert main(["close", str(good_site), "--period", "2026-10"]) == 0
    warns = [line for line in capsys.readouterr().err.splitlines() if "staging" in line]
    assert warns == [(f"warning: removed 2 staging folder(s) left in {closes} by interrupted closes: "
                      f"{old.name}, {dead.name}")]
    assert not dead.exists() and not old.exists()
    assert alive.is_dir() and remote.is_dir() and mine.is_dir() and (closes / "readme.partial-1.txt").is_file()
    assert (closes / "2026-10" / "run.json").is_file()


def test_staging_folders_are_kept_when_the_close_is_refused(good_site, capsys):
    closes = good_site / "closes"
    closes.mkdir()
    (closes / ".2026-10.partial-x7_q2abc").mkdir()
    (good_site / "opening.csv").write_text((good_site / "opening.csv").read_text().replace("2026-10-01", "2026-09-01"))
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert (closes / ".2026-10.partial-x7_q2abc").is_dir()


# ----------------------------------------------------------------------------- case: months out of order
def test_october_before_september_is_refused(sample_copy, capsys, monkeypatch):
    from inventory import close

    surveyed = []
    monkeypatch.setattr(close, "_survey", lambda *a, **k: surveyed.append(a))
    before = snapshot(sample_copy)
    assert main(["close", str(sample_copy), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {sample_copy / 'opening.csv'} line 2: as_of: the opening is dated 2026-09-01 00:00, before the "
        "start of 2026-10 (2026-10-01 00:00), and the ledger has no close of 2026-09: the movements from "
        "2026-09-01 00:00 to 2026-10-01 00:00 would be skipped; close 2026-09 first, or give an opening dated "
        "at the start of 2026-10")]
    assert surveyed == []
    assert snapshot(sample_copy) == before


def test_opening_dated_after_the_period_is_refused(good_site, capsys):
    opening = good_site / "opening.csv"
    opening.write_text(opening.read_text().replace("B,500,2026-10-01T00:00:00+02:00", "B,500,2026-11-01T00:00:00+01:00"))
    assert main(["close", str(good_site), "--period", "2026-10"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {opening} line 3: as_of: the opening is dated 2026-11-01 00:00, after the end of 2026-10; "
        "give an opening dated at the start of 2026-10")]


def test_opening_inside_the_period_is_accepted(good_site, monkeypatch):
    """An opening dated within the month loses nothing: book stock counts from its instant."""
    from inventory import close
    from inventory.ledger.store import Ledger
    from inventory.site.load import load_site

    opening = good_site / "opening.csv"
    opening.write_text(opening.read_text().replace("2026-10-01T00:00:00", "2026-10-02T12:00:00"))
    site = load_site(good_site)
    with Ledger(good_site / "ledger.sqlite") as ledger:
        frame, source = close._opening(site, ledger, "2026-10")
    assert source == "opening.csv"
    assert sorted(frame["pile_id"]) == ["A", "B"]
    assert not (good_site / "ledger.sqlite").exists()


# ----------------------------------------------------------------------------- case: exit codes
@pytest.mark.parametrize("reason", ["", "   ", "\t"])
def test_blank_reopen_reason_is_bad_input(good_site, capsys, reason):
    assert main(["reopen", str(good_site), "--period", "2026-10", "--reason", reason]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        "error: --reason: a reason is required (it is kept in the ledger for good); say why the period is reopened")]


def test_reopen_bad_input_exits_2(good_site, capsys):
    # no ledger yet
    assert main(["reopen", str(good_site), "--period", "2026-10", "--reason", "rescan"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {good_site / 'ledger.sqlite'}: period: no ledger: period 2026-10 was never closed")]


def test_reopen_of_an_open_or_earlier_month_exits_2(good_site, capsys):
    assert main(["close", str(good_site), "--period", "2026-10"]) == 0
    capsys.readouterr()
    ledger = good_site / "ledger.sqlite"
    assert main(["reopen", str(good_site), "--period", "2026-11", "--reason", "rescan"]) == 2
    assert error_lines(capsys.readouterr().err) == [(
        f"error: {ledger}: period: period 2026-11 is not closed; nothing to reopen")]
    before = snapshot(good_site)
    assert main(["reopen", str(good_site), "--period", "2026-10", "--reason", "rescan"]) == 0
    assert main(["reopen", str(good_site), "--period", "2026-10", "--reason", "again"]) == 2
    assert snapshot(good_site) != before  # the first reopening is recorded


@pytest.mark.parametrize("argv, text", [
    (["check", "{missing}"], "the site folder does not exist"),
    (["survey", "{site}", "--date", "2026-10-30"], "no survey folder for 2026-10-30"),
    (["close", "{site}", "--period", "2026-11"], "no survey dated in 2026-11"),
    (["history", "{site}", "--format", "xlsx"], "--format xlsx needs --output"),
])
def test_bad_input_exits_2_on_every_command(good_site, capsys, argv, text):
    args = [a.format(site=good_site, missing=good_site.parent / "nowhere") for a in argv]
    before = snapshot(good_site)
    assert main(args) == 2
    assert text in capsys.readouterr().err
    assert snapshot(good_site) == before


@pytest.mark.parametrize("argv", [
    ["close", "{site}", "--period", "2026-13"],
    ["reopen", "{site}", "--period", "26-10", "--reason", "x"],
    ["history", "{site}", "--from", "2026-00"],
    ["survey", "{site}"],
])
def test_argument_errors_exit_2(good_site, argv):
    with pytest.raises(SystemExit) as caught:
        main([a.format(site=good_site) for a in argv])
    assert caught.value.code == 2
