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
- ``laspy_data``: runs ``pip download --no-binary :all: --no-deps laspy==<installed version>``
  into ``tests/.cache/`` (git-ignored), unpacks the sdist's ``tests/data/`` files and returns
  that folder; skips, saying why, only when the download fails (offline). Source: laspy on
  PyPI (BSD-2-Clause); the files are those its own tests use, e.g. ``autzen_trim.laz``.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
import tarfile
import warnings
from functools import cached_property, lru_cache
from pathlib import Path

import geopandas as gpd
import laspy
import numpy as np
import pandas as pd
import pyproj
import pytest
from shapely.geometry import Point

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
