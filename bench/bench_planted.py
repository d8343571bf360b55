"""Analytic piles planted in real airborne LiDAR: volumes and classes per pipeline.

Usage::

    python bench/bench_planted.py                       # every packaged pipeline, 1 m and 0.5 m cells
    python bench/bench_planted.py --pipeline stockpile.json --cell 1.0

Builds the site of ``tests/test_planted_autzen.py`` (a cone, a frustum and a windrow at a
35 degree repose planted on the open lot of the laspy sample ``autzen_trim.laz``, feet in the
file, a metric site CRS; the sample is fetched into ``tests/.cache`` as the test fixture does)
with that module's own builder, then for each pipeline and grid cell runs ``inventory survey``
(classified cloud) and ``inventory volumes`` through the command line and prints, per pile:
the handbook volume, the measured grid and TIN volumes and their relative errors, whether the
95 % interval holds the handbook volume, the flags; and what the classifier did to the pile's
returns (share classed surface, 2) and the RMS of the surface grid against the analytic surface
on the pile's base (scanned cells; "n/a" where none is left). The bare-earth pipelines
(``terrain.json``, ``terrain-csf.json``) strip stockpiles as objects, so their volumes miss
by design: they are printed to show how far they go, not as errors. Numbers only; nothing is
asserted.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib.util
import io
import shutil
import sys
import tempfile
import time
import warnings
from pathlib import Path

import laspy
import numpy as np
import rasterio
import shapely

REPO = Path(__file__).resolve().parent.parent


def _load(name: str, path: Path):
    spec = importlib.util.spec_from_file_location(name, path)
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pipeline", action="append", default=None,
                    help="packaged pipeline file name (default: all of them)")
    ap.add_argument("--cell", action="append", type=float, default=None, help="grid cell (default 1.0 and 0.5)")
    args = ap.parse_args()
    conftest = _load("planted_conftest", REPO / "tests" / "conftest.py")
    planted_mod = _load("planted_autzen", REPO / "tests" / "test_planted_autzen.py")
    from inventory.cli import main as cli

    src = conftest.fetch_laspy_samples() / "autzen_trim.laz"
    pipes = args.pipeline or ["stockpile.json", "terrain.json", "terrain-csf.json"]
    cells = args.cell or [1.0, 0.5]
    with tempfile.TemporaryDirectory() as tmp:
        base = planted_mod.build_planted_site(src, Path(tmp) / "base")
        print(f"lot scatter {base.noise_m:.3f} m; returns replaced per pile {base.planted}")
        x0, y0 = base.origin
        for pipe in pipes:
            for cell in cells:
                site = Path(tmp) / f"{pipe}-{cell}"
                shutil.copytree(base.site, site)
                planted_mod.configure(site, cell=cell, pipeline=REPO / "inventory" / "survey" / "pipelines" / pipe)
                t0 = time.perf_counter()
                with warnings.catch_warnings(), contextlib.redirect_stdout(io.StringIO()):
                    warnings.simplefilter("ignore")
                    assert cli(["survey", str(site), "--date", planted_mod.DATE, "--out", str(site / "survey"), "-q"]) == 0
                    t1 = time.perf_counter()
                    table, _ = planted_mod.run_volumes(site)
                t2 = time.perf_counter()
                las = laspy.read(next((site / "survey").rglob("classified-*.laz")))
                cx, cy, cz = np.asarray(las.x), np.asarray(las.y), np.asarray(las.z)
                cls = np.asarray(las.classification)
                with rasterio.open(site / "volumes" / planted_mod.DATE / f"surface-{planted_mod.DATE}.tif") as r:
                    surf = r.read(1, masked=True).filled(np.nan)
                    cov = rasterio.open(site / "volumes" / planted_mod.DATE / f"coverage-{planted_mod.DATE}.tif").read(1)
                    rows, cols = np.indices(surf.shape)
                    gx, gy = rasterio.transform.xy(r.transform, rows.ravel(), cols.ravel())
                    gx, gy = np.asarray(gx).reshape(surf.shape), np.asarray(gy).reshape(surf.shape)
                print(f"\n{pipe}, {cell} m cells: survey {t1 - t0:.1f} s, volumes {t2 - t1:.1f} s; "
                      f"classified cloud z {cz.min():.1f}-{cz.max():.1f} (site CRS {las.header.parse_crs().name})")
                for p in planted_mod.PILES:
                    row = table.loc[p.pile_id]
                    truth = p.volume()
                    toe = p.toe(x0, y0)
                    inside = shapely.contains_xy(toe, cx, cy)
                    ground = float(np.mean(cls[inside] == 2)) if inside.any() else float("nan")
                    on = shapely.contains_xy(toe.buffer(-1.0), gx, gy) & (cov > 0) & np.isfinite(surf)
                    ring = toe.buffer(2 * planted_mod.FOOTPRINT_MARGIN_M).difference(toe)  # the lot around it
                    plane = planted_mod._lot_plane(ring, cx, cy, cz, np.ones(len(cx), bool))
                    model = plane(gx[on], gy[on]) + p.thickness(gx[on], gy[on], x0, y0)
                    # no scanned cell 1 m inside the toe (a terrain pipeline takes the pile out)
                    rms = float(np.sqrt(np.mean((surf[on] - model) ** 2))) if on.any() else float("nan")
                    held = row.volume_low95_m3 <= truth <= row.volume_high95_m3
                    print(f"  {p.pile_id:<8} V {truth:8.1f} m3  grid {row.volume_m3:8.1f} ({100 * (row.volume_m3 / truth - 1):+6.2f} %)"
                          f"  TIN {row.volume_tin_m3:8.1f} ({100 * (row.volume_tin_m3 / truth - 1):+6.2f} %)"
                          f"  95 % [{row.volume_low95_m3:.1f}, {row.volume_high95_m3:.1f}] {'holds' if held else 'MISSES'}"
                          f"  ground {100 * ground:5.1f} %  surface RMS {'n/a' if rms != rms else f'{rms:.3f} m'}  flags {row['flags'] if isinstance(row['flags'], str) else ''}")


if __name__ == "__main__":
    main()
