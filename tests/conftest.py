"""Shared fixtures: the repository's data, a small valid site to break, the sample site run
once through the survey chain, and the open LiDAR samples of the laspy source distribution.

- ``good_site``: a small, valid two-pile site folder (values invented; they only need to be
  valid); each input-contract test breaks one thing in it. ``write_tiny_cloud`` writes its
  kind of cloud anywhere.
- ``sample_copy``: a writable copy of the committed sample site.
- ``sample_chain``: the committed sample site through the real survey chain
  (``load_site`` -> ``measure_survey`` -> ``measure_piles``), run once per test session and
  shared by every test that asks for it; nothing is cached on disk, so a change to the code
  is always measured.
- ``make_close_result``: a small synthetic close (three cones on a flat yard, EPSG:25832) for
  the ledger and exporter tests, whose tables agree with each other (variance = survey - book,
  the footprints cover the piles, the surface shows the piles); ``close_result`` is one, and
  ``fake_cones`` its cones. ``tests/test_export_fake.py`` checks the fake itself.
- ``laspy_data``: runs ``pip download --no-binary :all: --no-deps laspy==<installed version>``
  into ``tests/.cache/`` (git-ignored), unpacks the sdist's ``tests/data/`` files and returns
  that folder; skips, saying why, only when the download fails (offline). Source: laspy on
  PyPI (BSD-2-Clause); the files are those its own tests use, e.g. ``autzen_trim.laz``.
"""

from __future__ import annotations

import dataclasses
import json
import shutil
import subprocess
import sys
import tarfile
import warnings
from datetime import datetime, timezone
from functools import cached_property, lru_cache
from pathlib import Path

import geopandas as gpd
import laspy
import numpy as np
import pandas as pd
import pyproj
import pytest
from shapely.geometry import Point

from inventory.model.grid import Grid, Surface
from inventory.model.results import (
    JOURNAL_COLUMNS,
    MOVEMENT_COLUMNS,
    PILE_COLUMNS,
    SCALE_COLUMNS,
    CloseResult,
)

# bound at import, before any test patches inventory.survey.measure.measure_survey with a cache
from inventory.survey.measure import measure_survey as _measure_survey

REPO = Path(__file__).resolve().parent.parent
SAMPLE = REPO / "sample_site"
CACHE = Path(__file__).resolve().parent / ".cache"


# ----------------------------------------------------------------------------- a small valid site

SITE_TOML = """\
name = "Test yard"
crs = "EPSG:25832"
timezone = "Europe/Berlin"

[grid]
cell_size_m = 0.5

[[scales]]
id = "WB1"
kind = "weighbridge"
accuracy_class = "III"
scale_interval_kg = 20

[[scales]]
id = "B1"
kind = "belt"
direction = "in"
accuracy_class = "0.5"
"""

MATERIALS = (
    "material,bulk_density_t_m3,density_sd_t_m3,moisture_pct,tolerance_pct\n"
    "coal,0.85,0.03,8,3\n"
    "salt,1.25,0.04,2,2\n"
)
WEIGHBRIDGE = (
    "ticket,time,direction,material,pile_id,gross_t,tare_t,net_t,vehicle\n"
    "T1,2026-10-02T08:00:00+02:00,in,coal,A,40.0,15.0,25.0,XY1\n"
    "T2,2026-10-03T09:30:00+02:00,out,salt,B,38.5,14.5,24.0,XY2\n"
)
BELTS = "scale_id,start,end,tonnes\nB1,2026-10-01T00:00:00+02:00,2026-10-02T00:00:00+02:00,500\n"
ROUTING = "scale_id,pile_id,start,end\nB1,A,2026-10-01T00:00:00+02:00,2026-11-01T00:00:00+01:00\n"
TRANSFERS = "from_pile,to_pile,time,tonnes,reference\nA,B,2026-10-10T10:00:00+02:00,30,WO-1\n"
OPENING = "pile_id,tonnes,as_of\nA,1000,2026-10-01T00:00:00+02:00\nB,500,2026-10-01T00:00:00+02:00\n"
STATIONS = (
    "file,station_id,time,x,y,z,roll_deg,pitch_deg,yaw_deg\n"
    "a.laz,S1,2026-10-31T15:00:00+01:00,,,,,,\n"
)


def _write_cloud(path: Path, crs: str | None = "EPSG:25832", n: int = 50) -> None:
    """A tiny LAS 1.4 cloud over both piles, optionally with a CRS."""
    header = laspy.LasHeader(point_format=6, version="1.4")
    if crs is not None:
        header.add_crs(pyproj.CRS(crs))
    header.scales = [0.001] * 3
    header.offsets = [500000.0, 5700000.0, 0.0]
    las = laspy.LasData(header)
    rng = np.random.default_rng(1)
    las.x = 499985.0 + rng.uniform(0, 60, n)
    las.y = 5699985.0 + rng.uniform(0, 30, n)
    las.z = 10.0 + rng.uniform(0, 5, n)
    las.write(path)


def _build_site(root: Path) -> Path:
    """Write the valid site into ``root`` and return it."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "site.toml").write_text(SITE_TOML)
    (root / "materials.csv").write_text(MATERIALS)
    piles = gpd.GeoDataFrame(
        {"pile_id": ["A", "B"], "material": ["coal", "salt"], "base": ["toe", "level:10"],
         "density_t_m3": [np.nan, np.nan]},
        geometry=[Point(500000, 5700000).buffer(10), Point(500030, 5700000).buffer(10)],
        crs="EPSG:25832",
    )
    piles.to_file(root / "piles.gpkg", layer="piles", engine="pyogrio")
    survey = root / "surveys" / "2026-10-31"
    survey.mkdir(parents=True, exist_ok=True)
    _write_cloud(survey / "a.laz")
    (survey / "stations.csv").write_text(STATIONS)
    mv = root / "movements" / "2026-10"
    mv.mkdir(parents=True, exist_ok=True)
    (mv / "weighbridge.csv").write_text(WEIGHBRIDGE)
    (mv / "belt_scales.csv").write_text(BELTS)
    (mv / "routing.csv").write_text(ROUTING)
    (mv / "transfers.csv").write_text(TRANSFERS)
    (root / "opening.csv").write_text(OPENING)
    return root


@pytest.fixture
def good_site(tmp_path: Path) -> Path:
    """A small valid site folder in a temporary directory; tests break one thing each."""
    return _build_site(tmp_path / "site")


def _file_digests(root: Path) -> dict[str, str]:
    import hashlib

    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def _brute_knn(x, y, z, members, qx, qy, qz, k, skip=None):
    idx = np.flatnonzero(members)
    d = np.full((len(qx), k), np.inf)
    nb = np.full((len(qx), k), -1, np.int64)
    for i in range(len(qx)):
        dx = x[idx] - qx[i]
        dy = y[idx] - qy[i]
        d2 = dx * dx + dy * dy
        if z is not None:
            dz = z[idx] - qz[i]
            d2 += dz * dz
        ok = np.isfinite(d2)
        if skip is not None:
            ok &= idx != skip[i]
        d2, q = d2[ok], idx[ok]
        o = np.lexsort((q, d2))[:k]
        d[i, :len(o)] = np.sqrt(d2[o])
        nb[i, :len(o)] = q[o]
    return d, nb


@pytest.fixture(scope="session")
def brute_knn():
    """``brute_knn(x, y, z, members, qx, qy, qz, k, skip=None)``: distances and numbers of
    the k nearest ``members`` of each query point, by the squared distance worked out with
    the neighbour kernels' operations (dx*dx + dy*dy, then + dz*dz when ``z`` is given),
    equal ones by point number, ``skip[i]`` (the query's own number) left out: the one exact
    answer of inventory.survey.kernels' searches. Members without a finite height are never
    found in 3D, nor is anything for a query without one (the distance is not a number)."""
    return _brute_knn


@pytest.fixture
def snapshot():
    """``snapshot(root)``: every file under ``root`` by relative path, with the SHA-256 of its
    bytes; compare one taken before and one after to show nothing was written."""
    return _file_digests


@pytest.fixture
def refused_once():
    """``refused_once(site, capsys, argv=None)``: run the command (default ``check SITE``);
    assert exit 2, no traceback, nothing changed under ``site``, and return the one error line."""
    from inventory.cli import main

    def run(site: Path, capsys, argv: list[str] | None = None) -> str:
        before = _file_digests(site)
        assert main(argv or ["check", str(site)]) == 2
        err = capsys.readouterr().err
        assert "Traceback" not in err
        lines = [line for line in err.splitlines() if line.startswith("error: ")]
        assert len(lines) == 1, lines
        assert _file_digests(site) == before
        return lines[0]

    return run


@pytest.fixture(scope="session")
def write_tiny_cloud():
    """``write_tiny_cloud(path, crs="EPSG:25832", n=50)``: the small site's kind of LAS 1.4 cloud."""
    return _write_cloud


# ----------------------------------------------------------------------------- the sample site


@pytest.fixture(scope="session")
def repo_root() -> Path:
    return REPO


@pytest.fixture(scope="session")
def sample_site_path() -> Path:
    """The committed sample site (read-only: copy it before closing)."""
    return SAMPLE


@pytest.fixture
def sample_copy(tmp_path: Path, sample_site_path: Path) -> Path:
    """A writable copy of the sample site (skips while it has not been generated)."""
    if not (sample_site_path / "site.toml").is_file():
        pytest.skip("sample_site/ has not been generated yet (inventory sample sample_site)")
    dest = tmp_path / "sample_site"
    shutil.copytree(sample_site_path, dest, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*"))
    return dest


class SampleChain:
    """The committed sample site run through the real survey chain, each step once.

    The survey step takes a minute or two per survey, so results are kept on this object,
    which the session fixture ``sample_chain`` shares; its files (surface and coverage
    GeoTIFFs, classified LAZ) go to a temporary folder removed at the end of the session.
    """

    def __init__(self, root: Path, out: Path) -> None:
        self.root = root
        self.out = out

    @cached_property
    def truth(self) -> dict:
        """``sample_site/truth.json``."""
        return json.loads((self.root / "truth.json").read_text())

    @cached_property
    def site(self):
        """The loaded sample site (the loader's warnings about the planted repeated ticket muted)."""
        from inventory.site.load import load_site

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return load_site(self.root)

    @lru_cache(maxsize=None)
    def survey(self, date: str):
        """:class:`inventory.survey.measure.SurveyResult` of one survey, run once per session."""
        out = self.out / date
        out.mkdir(exist_ok=True)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return _measure_survey(self.site, date, out_dir=out)

    @lru_cache(maxsize=None)
    def volumes(self, date: str) -> pd.DataFrame:
        """``measure_piles`` table of one survey, as ``inventory close`` computes it."""
        from inventory.errors import CoverageWarning
        from inventory.volume.measure import BaseSurfaces, measure_piles

        surface = self.survey(date).surface
        base = BaseSurfaces.from_site(self.site, surface.grid)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", CoverageWarning)
            return measure_piles(surface, self.site.piles, self.site.materials, base)


@pytest.fixture(scope="session")
def survey_cache(sample_chain):
    """A stand-in for ``measure_survey``: the sample site's survey from the session's one run
    (``sample_chain``), its files copied into ``out_dir`` as the real step writes them. Closes
    that differ only in their books use it; the survey step itself is tested on its own."""
    def cached_survey(site, date, out_dir=None, progress=None, **kw):
        res = sample_chain.survey(date)
        moved = {}
        for name in ("classified_path", "surface_path", "coverage_path"):
            src = getattr(res, name)
            if src is not None and out_dir is not None:
                dst = Path(out_dir) / Path(src).name
                shutil.copy2(src, dst)
                moved[name] = dst
        return dataclasses.replace(res, **moved)

    return cached_survey


@pytest.fixture(scope="session")
def sample_chain(tmp_path_factory) -> SampleChain:
    """The sample site through survey and volumes, shared by the whole session."""
    if not (SAMPLE / "truth.json").is_file():
        pytest.skip("sample_site/truth.json is missing: write the demo site first (inventory sample)")
    return SampleChain(SAMPLE, tmp_path_factory.mktemp("sample-chain"))


# ----------------------------------------------------------------------------- laspy's open samples

CACHE = Path(__file__).resolve().parent / ".cache"


def fetch_laspy_samples() -> Path:
    """Download and unpack the laspy sdist's test data; returns the data folder."""
    version = laspy.__version__
    dest = CACHE / f"laspy-{version}-data"
    if (dest / "autzen_trim.laz").is_file():
        return dest
    sdist_dir = CACHE / "laspy-sdist"
    sdist_dir.mkdir(parents=True, exist_ok=True)
    tarball = sdist_dir / f"laspy-{version}.tar.gz"
    if not tarball.is_file():
        proc = subprocess.run(
            [sys.executable, "-m", "pip", "download", "--no-binary", ":all:", "--no-deps",
             f"laspy=={version}", "-d", str(sdist_dir)],
            capture_output=True, text=True, timeout=300)
        if proc.returncode != 0 or not tarball.is_file():
            tail = (proc.stderr or proc.stdout).strip().splitlines()[-1:] or ["no output"]
            raise RuntimeError(f"pip download of the laspy {version} sdist failed: {tail[0]}")
    tmp = dest.with_name(dest.name + ".part")
    tmp.mkdir(parents=True, exist_ok=True)
    prefix = f"laspy-{version}/tests/data/"
    with tarfile.open(tarball) as tar:
        for member in tar.getmembers():
            if member.isfile() and member.name.startswith(prefix) and "/" not in member.name[len(prefix):]:
                member.name = member.name[len(prefix):]
                tar.extract(member, tmp, filter="data")
    tmp.replace(dest)
    return dest


@pytest.fixture(scope="session")
def laspy_data() -> Path:
    """Folder with the laspy sdist's sample files (skips when the sdist cannot be fetched)."""
    try:
        return fetch_laspy_samples()
    except (RuntimeError, OSError, subprocess.TimeoutExpired) as err:
        pytest.skip(f"laspy sample data unavailable (offline?): {err}")


# ----------------------------------------------------------------------------- a synthetic close

CRS = "EPSG:25832"  # ETRS89 / UTM 32N, metres
X0, Y0 = 500000.0, 5700000.0
CELL = 0.5
YARD_Z = 100.0
# (pile_id, material, centre dx, centre dy, radius m, height m, density t/m3, moisture)
_CONES = [
    ("P-COAL-1", "coal", 14.0, 20.0, 9.0, 4.0, 0.80, 0.08),
    ("P-COAL-2", "coal", 36.0, 20.0, 8.0, 3.5, 0.80, 0.08),
    ("P-LIME-1", "limestone", 56.0, 18.0, 6.0, 3.0, 1.45, 0.02),
]
_TOLERANCE_PCT = {"coal": 3.0, "limestone": 2.0}  # common practice (2-5 %)
K_SIGNIFICANCE = 2.0


def _surface(period_index: int) -> tuple[Surface, np.ndarray, np.ndarray]:
    grid = Grid.snapped(X0, Y0, X0 + 66.0, Y0 + 40.0, cell=CELL, crs=CRS)
    x, y = grid.centers()
    z = np.full(grid.shape, YARD_Z)
    grow = 1.0 + 0.05 * period_index  # the piles grow a little from month to month
    for _, _, dx, dy, r, h, _, _ in _CONES:
        d = np.hypot(x - (X0 + dx), y - (Y0 + dy))
        z = z + np.clip(h * grow * (1.0 - d / r), 0.0, None)
    count = np.full(grid.shape, 4, dtype=np.int32)
    sd = np.full(grid.shape, 0.02)
    filled = np.zeros(grid.shape, dtype=bool)
    # an unscanned patch on the second pile, filled by interpolation
    r0, c0 = grid.index(np.array([X0 + 38.0]), np.array([Y0 + 22.0]))[:2]
    count[r0[0]:r0[0] + 4, c0[0]:c0[0] + 4] = 0
    sd[r0[0]:r0[0] + 4, c0[0]:c0[0] + 4] = np.nan
    filled[r0[0]:r0[0] + 4, c0[0]:c0[0] + 4] = True
    # a corner the scanner never saw and nothing filled
    z[:6, :8] = np.nan
    count[:6, :8] = 0
    sd[:6, :8] = np.nan
    surface = Surface(grid, z, count, sd, filled, date=f"2026-0{period_index + 1}-28")
    thickness = z - YARD_Z
    thickness[~(thickness > 0)] = np.nan
    return surface, thickness, (r0[0], c0[0])


def _make_close_result(period: str = "2026-01", opening: dict[str, float] | None = None,
                      period_index: int = 0) -> CloseResult:
    """A consistent three-pile close; ``opening`` overrides the opening tonnes per pile."""
    import geopandas as gpd
    from shapely.geometry import Point, box

    surface, thickness, (r0, c0) = _surface(period_index)
    grid = surface.grid
    x, y = grid.centers()
    rows, foots = [], []
    rng = np.random.default_rng(7 + period_index)
    for i, (pid, mat, dx, dy, r, h, dens, moist) in enumerate(_CONES):
        foot = Point(X0 + dx, Y0 + dy).buffer(r + 1.0, quad_segs=16)
        foots.append(foot)
        inside = np.hypot(x - (X0 + dx), y - (Y0 + dy)) <= r + 1.0
        vol = float(np.nansum(np.where(inside, thickness, 0.0)) * grid.cell_area)
        vol_sigma = 0.005 * vol
        survey_t = vol * dens
        survey_sigma = float(np.hypot(vol_sigma * dens, vol * 0.01 * dens))
        open_t = (opening or {}).get(pid, round(survey_t * 0.9, 1))
        receipts = round(float(rng.uniform(200, 400)), 2)
        dispatches = round(float(rng.uniform(100, 300)), 2)
        t_in = 25.0 if i == 1 else 0.0
        t_out = 25.0 if i == 0 else 0.0
        # book chosen so the three piles land in three cases: within, significant, out
        target_pct = [0.8, -2.8, 6.5][i] * (1 if period_index == 0 else -0.5)
        book = survey_t / (1.0 + target_pct / 100.0)
        dispatches = open_t + receipts + t_in - t_out - book
        book = open_t + receipts - dispatches + t_in - t_out
        book_sigma = 0.002 * (receipts + abs(dispatches))
        var = survey_t - book
        var_sigma = float(np.hypot(survey_sigma, book_sigma))
        pct = 100.0 * var / book
        tol = _TOLERANCE_PCT[mat]
        oot = abs(pct) > tol
        adj = var if oot else 0.0
        after = -12.5 if i == 2 else 0.0
        scanned = float(np.mean((surface.count[inside] > 0)))
        rows.append({
            "pile_id": pid, "material": mat, "base_method": "level:100.0",
            "area_m2": foot.area, "scanned_fraction": scanned,
            "volume_m3": vol, "volume_sigma_m3": vol_sigma,
            "volume_tin_m3": np.nan if i == 1 else vol * 1.002, "below_base_m3": 0.0,
            "density_t_m3": dens, "survey_t": survey_t, "survey_dry_t": survey_t * (1 - moist),
            "survey_sigma_t": survey_sigma, "opening_t": open_t, "receipts_t": receipts,
            "dispatches_t": dispatches, "transfers_in_t": t_in, "transfers_out_t": t_out,
            "book_t": book, "book_sigma_t": book_sigma, "variance_t": var,
            "variance_pct": pct, "variance_sigma_t": var_sigma,
            "significant": bool(abs(var) > K_SIGNIFICANCE * var_sigma),
            "tolerance_pct": tol, "out_of_tolerance": bool(oot), "adjustment_t": adj,
            "after_survey_net_t": after, "closing_t": book + adj + after,
            "flags": "coverage_filled" if i == 1 else "",
        })
    piles = pd.DataFrame(rows, columns=PILE_COLUMNS)
    footprints = gpd.GeoDataFrame({"pile_id": [r["pile_id"] for r in rows]},
                                  geometry=foots, crs=CRS)
    t0 = pd.Timestamp(f"{period}-03T06:30:00Z")
    mv = []
    for k in range(6):
        pid = _CONES[k % 3][0]
        mv.append({
            "kind": "weighbridge", "reference": f"T{1000 + k}",
            "time": t0 + pd.Timedelta(days=3 * k, hours=k), "pile_id": pid,
            "tonnes": (1 if k % 2 == 0 else -1) * (30.0 + k), "scale_id": "WB1",
            "counted": k != 5, "before_survey": k < 5,
            "note": "=duplicate of T1004" if k == 5 else "", "source": "weighbridge.csv",
            "line": k + 2,
        })
    mv.append({"kind": "belt", "reference": "BS-IN 2026-01-10/2026-01-11",
               "time": t0 + pd.Timedelta(days=7), "pile_id": "P-COAL-1", "tonnes": 412.75,
               "scale_id": "BS-IN", "counted": True, "before_survey": True, "note": "",
               "source": "belt_scales.csv", "line": 2})
    mv.append({"kind": "transfer", "reference": "TR-1", "time": t0 + pd.Timedelta(days=9),
               "pile_id": "P-COAL-1", "tonnes": -25.0, "scale_id": None, "counted": True,
               "before_survey": True, "note": "", "source": "transfers.csv", "line": 2})
    movements = pd.DataFrame(mv, columns=MOVEMENT_COLUMNS)
    journal = pd.DataFrame(
        [{"pile_id": r["pile_id"], "material": r["material"], "adjustment_t": r["adjustment_t"],
          "reason_code": "SV-OOT", "reason": "survey variance out of tolerance"}
         for r in rows if r["out_of_tolerance"]], columns=JOURNAL_COLUMNS)
    scales = pd.DataFrame([
        {"scale_id": "BS-IN", "piles": "P-COAL-1, P-COAL-2", "tonnes": 812.5, "bias_pct": 1.1,
         "bias_sigma_pct": 0.4, "flagged": True, "message": "shared bias on the piles it fed"},
        {"scale_id": "WB1", "piles": "P-COAL-1, P-COAL-2, P-LIME-1", "tonnes": 190.0,
         "bias_pct": -0.1, "bias_sigma_pct": 0.3, "flagged": False, "message": ""},
    ], columns=SCALE_COLUMNS)
    duplicates = pd.DataFrame([{"reference": "T1005", "kind": "exact",
                                "detail": "same vehicle, tonnes and pile as T1004 within 10 min"}])
    gap_cells = box(grid.west + c0 * CELL, grid.north - (r0 + 4) * CELL,
                    grid.west + (c0 + 4) * CELL, grid.north - r0 * CELL)
    coverage_gaps = gpd.GeoDataFrame({"pile_id": ["P-COAL-2"], "area_m2": [gap_cells.area]},
                                     geometry=[gap_cells], crs=CRS)
    extent = box(grid.west + 8 * CELL, grid.south, grid.east, grid.north).union(
        box(grid.west, grid.south, grid.east, grid.north - 6 * CELL))
    survey_extent = gpd.GeoDataFrame({"survey_date": [surface.date], "points": [123456]},
                                     geometry=[extent], crs=CRS)
    change = None
    prev = None
    if period_index > 0:
        previous, _, _ = _surface(period_index - 1)
        change = surface.z - previous.z
        prev = previous.date
    instant = datetime(2026, period_index + 1, 28, 11, 0, tzinfo=timezone.utc)
    return CloseResult(
        site_name="Test yard", period=period, crs=CRS, timezone="Europe/Berlin",
        survey_date=surface.date, survey_instant=instant, previous_survey_date=prev,
        piles=piles, footprints=footprints, movements=movements, journal=journal,
        scale_diagnostics=scales, duplicates=duplicates, surface=surface,
        thickness=thickness, change=change, coverage_gaps=coverage_gaps,
        survey_extent=survey_extent,
        run={"inputs": {"surveys/2026-01-28/scan.laz": "a" * 64, "piles.gpkg": "b" * 64},
             "parameters": {"grid": {"cell_size_m": CELL}, "significance_k": K_SIGNIFICANCE},
             "timings": {"survey": 1.25, "volumes": 0.5, "book": 0.1, "reconcile": 0.05}},
    )


@pytest.fixture(scope="session")
def make_close_result():
    """``make_close_result(period="2026-01", opening=None, period_index=0)``: a consistent
    three-pile close; ``opening`` overrides the opening tonnes per pile."""
    return _make_close_result


@pytest.fixture
def close_result() -> CloseResult:
    return _make_close_result()


@pytest.fixture(scope="session")
def fake_cones() -> list[tuple]:
    """The synthetic close's piles: (pile_id, material, dx, dy, radius m, height m, density, moisture)."""
    return list(_CONES)


# ----------------------------------------------------------------------------- comparing pile tables

_TEXT_COLUMNS = ("pile_id", "material", "base_method", "flags")


class PileRows:
    """A close's pile table as comparable rows, from a DataFrame (ledger, GeoPackage layer)
    or the workbook's Piles sheet: missing figures (None, NaN, empty text) all become None."""

    @staticmethod
    def norm(col: str, v):
        if v is None or (isinstance(v, float) and np.isnan(v)):
            return None
        if col in _TEXT_COLUMNS:
            return v or None
        if col in ("significant", "out_of_tolerance"):
            return bool(v)
        if col.endswith("_pct"):
            # the workbook stores a percentage as a fraction (v / 100): compared to 12 digits
            return float(f"{float(v):.12g}")
        return float(v)

    def frame(self, df: pd.DataFrame) -> list[list]:
        return [[self.norm(c, v) for c, v in zip(PILE_COLUMNS, row)]
                for row in df[PILE_COLUMNS].itertuples(index=False, name=None)]

    def workbook(self, path: Path, n: int) -> list[list]:
        from openpyxl import load_workbook

        ws = load_workbook(path)["Piles"]
        header = [c.value for c in ws[1]]
        def cell(c: str, i: int):
            v = ws.cell(row=i, column=header.index(c) + 1).value
            return v * 100 if c.endswith("_pct") and isinstance(v, (int, float)) else v

        return [[self.norm(c, cell(c, i)) for c in PILE_COLUMNS] for i in range(2, 2 + n)]


@pytest.fixture(scope="session")
def pile_rows() -> PileRows:
    """Pile tables as comparable rows (``pile_rows.frame(df)``, ``pile_rows.workbook(path, n)``)."""
    return PileRows()


# ----------------------------------------------------------------------------- a plane of points


@pytest.fixture
def plane_points():
    """20,000 points (by default) on a 30 x 20 m plane rising 0.1 m per metre east from z = 50,
    with 5 cm of Gaussian noise: ``x, y, z = plane_points(n=20000, seed=0)``."""
    def make(n: int = 20000, seed: int = 0):
        rng = np.random.default_rng(seed)
        x = 1000 + rng.random(n) * 30
        y = 2000 + rng.random(n) * 20
        z = 50 + 0.1 * (x - 1000) + rng.normal(0, 0.05, n)
        return x, y, z
    return make


@pytest.fixture(scope="session")
def cell_mean_surface():
    """Exact cell means (4 x 4 samples a cell) of a pile on a level pad at 10 m, cells of 10
    points: ``cell_mean_surface(thickness, grid, hidden, objects=None)``. ``hidden`` cells
    have no points; ``objects`` cells hold object returns (as the survey's gridding marks
    them, ``meta["object_seen"]``)."""
    def make(thickness, grid: Grid, hidden, objects=None) -> Surface:
        x, y = grid.centers()
        k = (np.arange(4) + 0.5) / 4 - 0.5
        z = 10.0 + np.mean([thickness(x + a * grid.cell, y + b * grid.cell) for a in k for b in k], axis=0)
        m = hidden(x, y)
        z[m] = np.nan
        count = np.where(m, 0, 10).astype(np.int32)
        sd = np.where(m, np.nan, 0.005)
        meta = {} if objects is None else {"object_seen": objects(x, y)}
        return Surface(grid, z, count, sd, np.zeros(grid.shape, bool), "", meta)
    return make


# ----------------------------------------------------------------------------- E57 files


def _write_e57(path: Path, scans: list[dict], coordinate_metadata: str = "") -> Path:
    """Write an E57 file through libE57Format (pye57's bindings), an independent writer.

    Each scan is a dict: ``xyz`` (n, 3) cartesian or ``rae`` (n, 3) spherical (range,
    azimuth, elevation in radians), optional ``invalid`` (n,) states, ``intensity`` (n,)
    with ``intensity_limits`` (lo, hi), ``rgb`` (n, 3) 0-255, ``returns`` ((n,), (n,))
    return index and count, ``pose`` ``(quaternion w x y z, translation)`` or ``None`` for
    a scan without pose, ``name``, ``acquisitionStart`` / ``acquisitionEnd`` (GPS seconds)
    and ``time_stamp`` (n,) seconds after the start. Coordinates are stored as doubles.
    """
    import uuid

    from pye57 import libe57

    imf = libe57.ImageFile(str(path), "w")
    imf.extensionsAdd("", libe57.E57_V1_0_URI)
    root = imf.root()
    root.set("formatName", libe57.StringNode(imf, "ASTM E57 3D Imaging Data File"))
    root.set("guid", libe57.StringNode(imf, "{%s}" % uuid.uuid4()))
    root.set("versionMajor", libe57.IntegerNode(imf, libe57.E57_FORMAT_MAJOR))
    root.set("versionMinor", libe57.IntegerNode(imf, libe57.E57_FORMAT_MINOR))
    root.set("coordinateMetadata", libe57.StringNode(imf, coordinate_metadata))
    root.set("data3D", libe57.VectorNode(imf, True))
    root.set("images2D", libe57.VectorNode(imf, True))
    data3d = root["data3D"]
    for k, scan in enumerate(scans):
        node = libe57.StructureNode(imf)
        node.set("guid", libe57.StringNode(imf, "{%s}" % uuid.uuid4()))
        node.set("name", libe57.StringNode(imf, scan.get("name", f"scan{k + 1}")))
        if scan.get("pose") is not None:
            q, t = scan["pose"]
            pose = libe57.StructureNode(imf)
            rot = libe57.StructureNode(imf)
            for key, v in zip("wxyz", q):
                rot.set(key, libe57.FloatNode(imf, float(v)))
            tr = libe57.StructureNode(imf)
            for key, v in zip("xyz", t):
                tr.set(key, libe57.FloatNode(imf, float(v)))
            pose.set("rotation", rot)
            pose.set("translation", tr)
            node.set("pose", pose)
        for key in ("acquisitionStart", "acquisitionEnd"):
            if key in scan:   # GPS seconds since 1980-01-06 (E57 DateTime)
                when = libe57.StructureNode(imf)
                when.set("dateTimeValue", libe57.FloatNode(imf, float(scan[key])))
                when.set("isAtomicClockReferenced", libe57.IntegerNode(imf, 0))
                node.set(key, when)
        arrays: dict[str, np.ndarray] = {}
        proto = libe57.StructureNode(imf)
        if "xyz" in scan:
            for key, col in zip(("cartesianX", "cartesianY", "cartesianZ"), np.asarray(scan["xyz"], float).T):
                proto.set(key, libe57.FloatNode(imf, 0.0, libe57.E57_DOUBLE))
                arrays[key] = np.ascontiguousarray(col)
            state = "cartesianInvalidState"
        else:
            for key, col in zip(("sphericalRange", "sphericalAzimuth", "sphericalElevation"),
                                np.asarray(scan["rae"], float).T):
                proto.set(key, libe57.FloatNode(imf, 0.0, libe57.E57_DOUBLE))
                arrays[key] = np.ascontiguousarray(col)
            state = "sphericalInvalidState"
        n = len(next(iter(arrays.values())))
        if "invalid" in scan:
            proto.set(state, libe57.IntegerNode(imf, 0, 0, 2))
            arrays[state] = np.asarray(scan["invalid"], np.int8)
        if "intensity" in scan:
            lo, hi = scan["intensity_limits"]
            limits = libe57.StructureNode(imf)
            limits.set("intensityMinimum", libe57.FloatNode(imf, float(lo)))
            limits.set("intensityMaximum", libe57.FloatNode(imf, float(hi)))
            node.set("intensityLimits", limits)
            proto.set("intensity", libe57.FloatNode(imf, float(lo), libe57.E57_DOUBLE, float(lo), float(hi)))
            arrays["intensity"] = np.asarray(scan["intensity"], float)
        if "rgb" in scan:
            limits = libe57.StructureNode(imf)
            for key, col in zip(("Red", "Green", "Blue"), np.asarray(scan["rgb"]).T):
                limits.set(f"color{key}Minimum", libe57.IntegerNode(imf, 0))
                limits.set(f"color{key}Maximum", libe57.IntegerNode(imf, 255))
                proto.set(f"color{key}", libe57.IntegerNode(imf, 0, 0, 255))
                arrays[f"color{key}"] = np.asarray(col, np.uint8)
            node.set("colorLimits", limits)
        if "returns" in scan:
            index, count = scan["returns"]
            proto.set("returnIndex", libe57.IntegerNode(imf, 0, 0, 15))
            proto.set("returnCount", libe57.IntegerNode(imf, 1, 0, 15))
            # int16: the bindings take numpy's 'l' as 32-bit, and int64 arrays carry 'l'
            arrays["returnIndex"] = np.asarray(index, np.int16)
            arrays["returnCount"] = np.asarray(count, np.int16)
        if "time_stamp" in scan:
            proto.set("timeStamp", libe57.FloatNode(imf, 0.0, libe57.E57_DOUBLE))
            arrays["timeStamp"] = np.asarray(scan["time_stamp"], float)
        codecs = libe57.VectorNode(imf, True)
        points = libe57.CompressedVectorNode(imf, proto, codecs)
        node.set("points", points)
        data3d.append(node)
        bufs = libe57.VectorSourceDestBuffer()
        for key, arr in arrays.items():
            bufs.append(libe57.SourceDestBuffer(imf, key, arr, n, True, True))
        writer = points.writer(bufs)
        writer.write(n)
        writer.close()
    imf.close()
    return Path(path)


@pytest.fixture(scope="session")
def write_e57():
    """``write_e57(path, scans, coordinate_metadata="")``: an E57 file written by libE57Format."""
    return _write_e57
