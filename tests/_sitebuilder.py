"""Builds a small, valid site folder for the input-contract tests; each test breaks one thing.

The values are invented (a two-pile yard); they only need to be valid.
"""

from __future__ import annotations

from pathlib import Path

import geopandas as gpd
import laspy
import numpy as np
import pyproj
from shapely.geometry import Point

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


def write_cloud(path: Path, crs: str | None = "EPSG:25832", n: int = 50) -> None:
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


def build_site(root: Path) -> Path:
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
    write_cloud(survey / "a.laz")
    (survey / "stations.csv").write_text(STATIONS)
    mv = root / "movements" / "2026-10"
    mv.mkdir(parents=True, exist_ok=True)
    (mv / "weighbridge.csv").write_text(WEIGHBRIDGE)
    (mv / "belt_scales.csv").write_text(BELTS)
    (mv / "routing.csv").write_text(ROUTING)
    (mv / "transfers.csv").write_text(TRANSFERS)
    (root / "opening.csv").write_text(OPENING)
    return root
