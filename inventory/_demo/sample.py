"""Write the invented demo site: inputs a user would have, plus the truth only tests read.

``write_sample_site(dest, seed)`` builds, deterministically from ``seed``::

    site.toml  materials.csv  piles.gpkg  opening.csv  base/floor.tif
    surveys/2026-09-30/ST1.laz ... stations.csv      (and the same for 2026-10-31)
    surveys/2026-10-15/machine_scan.laz trajectory.csv   (scanner on the stacker boom)
    movements/2026-09/{weighbridge,belt_scales,routing,transfers}.csv   (and 2026-10)
    overview.png   README.md
    truth.json  truth/surface-<date>.tif  truth/labels-<date>.npz       (tests only)

Every byte is reproducible: fixed seeds, fixed LAS creation dates, a fixed GeoPackage
timestamp, fixed PNG metadata, fixed zip entry dates and ``\\n`` line endings.

The truth (for tests; the tool never reads it)
-----------------------------------------------
``truth.json`` keys:

* ``site``: name, crs, timezone, ``local_origin_in_site_crs`` (site = local + origin), ``pad``.
* ``materials``: per material ``density_t_m3`` (true), ``table_density_t_m3`` (materials.csv),
  ``repose_deg``, ``reflectivity``, ``max_range_m``.
* ``piles``: list of ``index`` (1-based, as in the labels), ``pile_id``, ``material``, ``base``,
  ``description``, ``density_t_m3`` (true).
* ``surveys``: list per survey of ``date``, ``instant`` (ISO with offset), ``piles`` (per pile
  ``volume_m3`` analytic above its base, ``volume_fine_m3`` 0.05 m integration, ``tonnes`` true,
  ``tonnes_at_table_density``, ``shape`` parameters), ``files`` (per LAZ: ``station_id``,
  ``points``, ``georeferenced``, ``pose_site`` [x, y, z, roll, pitch, yaw] or null,
  ``origin_site``, angular steps, ``counts`` per label kind), ``counts`` (per kind, all files),
  ``machine_points`` (structure + machine + vehicle), ``noise_points`` (dust + bird + ghost),
  ``objects`` (solid ids, names, kinds), ``dust_clouds``, ``birds``, ``surface`` and ``labels``
  (paths below).
* ``label_codes``: the ``kind`` codes (0 pad, 1 pile, 2 structure, 3 machine, 4 vehicle,
  5 dust, 6 bird, 7 ghost) and what ``pile`` and ``object`` hold.
* ``books``: ``opening``, ``true_net_t`` per pile (before the first survey, between the surveys,
  after the second), ``book_at_survey_t`` per survey (``book_t`` from the records with a repeated
  ticket counted once, no adjustment posted; ``true_t``, ``book_minus_true_t``,
  ``variance_at_table_density_t``), ``between_surveys`` (``recorded_net_t``, ``true_net_t``,
  ``variance_if_adjusted_to_first_survey_t``), ``counts`` of rows per period.
* ``faults``: ``belt_bias``, ``duplicate_ticket``, ``missing_transfer``, ``density_low`` with
  their exact values and their effect on book or survey tonnes.
* ``scanner``, ``volume_method``, ``generator`` (seed, truth_format).
* ``machine_survey``: the machine-mounted survey of part of the yard (``surveys/2026-10-15``):
  ``date``, ``terrain_of_survey`` (the pile shapes scanned: those of that survey date),
  ``machine`` (geometry, lever arm, boresight), ``motion`` (true axes), ``head`` (scan
  pattern), ``logged_samples`` (columns ``gps_time``, ``travel_m``, ``slew_deg``,
  ``luff_deg`` as logged; the true pose between samples is the cosine ramp of ``motion``),
  ``counts`` (``points`` written, ``outside_span`` before the first logged sample,
  ``in_gap``, ``pile`` and ``pad`` hits), ``surface`` (path below).

``truth/surface-<date>.tif``: the true surface (pad and piles, no machines) as the mean over
each 0.5 m tool cell of a 0.05 m sampling, float32, on the same grid as ``base/floor.tif``.
``truth/surface-2026-10-15.tif`` (the machine survey): the same true surface, only on the cells
holding at least one true hit of the machine scan (nodata elsewhere).
``truth/labels-<date>.npz``: ``<station>_kind``, ``<station>_pile``, ``<station>_object``
(uint8), one entry per point in LAZ file order.
"""

from __future__ import annotations

import io
import json
import math
import os
import shutil
import tempfile
import zipfile
from collections.abc import Callable
from datetime import date, datetime, timedelta, timezone
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np

from inventory._demo import books as _books
from inventory._demo.scenario import (
    MATERIALS,
    PAD_BOUNDS,
    PILES,
    SITE_CRS,
    SITE_NAME,
    SITE_ORIGIN,
    SITE_TIMEZONE,
    SURVEYS,
    Terminal,
    pad_height,
    terminal_at,
)
from inventory._demo.shapes import BayPile, Cone, Windrow
from inventory._demo.simulate import (
    KIND_NAMES,
    ScannerModel,
    ScanResult,
    max_range_for,
    scan,
    to_station_frame,
)
from inventory.errors import InputError
from inventory.io.atomic import publishable

__all__ = ["DEFAULT_SEED", "write_sample_site", "TOOL_CELL_M", "FINE_CELL_M"]

DEFAULT_SEED = 20261031
#: The tool's default grid cell (site.toml [grid] cell_size_m) and the truth integration cell.
TOOL_CELL_M = 0.5
FINE_CELL_M = 0.05
_SUB = int(round(TOOL_CELL_M / FINE_CELL_M))
#: Minutes between the starts of two station set-ups (scan 5 min, move and level the tripod).
STATION_INTERVAL_MIN = 10
#: Footprints reach this far beyond the largest toe outline of the two surveys.
FOOTPRINT_MARGIN_M = 1.0
#: The machine-mounted survey (issue 9): the stacker's boom scanner, mid-October, scanning the
#: terrain (pad and piles) as modelled for survey MACHINE_TERRAIN (the scenario has no
#: mid-month state; the books do not refer to this survey and no close uses it, as the close of
#: 2026-10 takes the month's last survey). Its log starts MACHINE_LOG_DELAY_S after the first
#: ray, so the points before it are rejected when placed (the counts are in the truth).
MACHINE_SURVEY_DATE = "2026-10-15"
MACHINE_SURVEY_START_LOCAL = "10:00"
MACHINE_TERRAIN = 1
MACHINE_LOG_DELAY_S = 0.5
#: Timestamp GDAL writes into the GeoPackage (gpkg_contents.last_change).
_GPKG_DATE = "2026-11-02T08:00:00Z"
_ZIP_DATE = (2026, 11, 2, 8, 0, 0)
_UTC = timezone.utc
# GPS time = UTC + 18 s (leap seconds since 1980, unchanged since 2017); LAS "adjusted standard
# GPS time" subtracts 1e9 s (ASPRS LAS 1.4 R15, global encoding bit 0).
_GPS_EPOCH = datetime(1980, 1, 6, tzinfo=_UTC)
_GPS_LEAP_S = 18


# ----------------------------------------------------------------------------- small writers

#: Stock value per tonne of the sample's materials, EUR: invented round figures, there only so
#: the sample journal carries values.
_UNIT_COST = {"coal": 95.0, "iron ore": 110.0, "crushed limestone": 14.0, "rock salt": 60.0}
#: Stock account codes of the sample's materials (invented).
_ACCOUNTS = {"coal": "1410", "iron ore": "1420", "crushed limestone": "1430", "rock salt": "1440"}

def _write_text(path: Path, text: str) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "w", encoding="utf-8", newline="\n") as fh:
        fh.write(text)


def _csv(path: Path, header: list[str], rows: list[list]) -> None:
    def cell(v) -> str:
        if v is None:
            return ""
        s = str(v)
        return '"' + s.replace('"', '""') + '"' if ("," in s or '"' in s) else s

    lines = [",".join(header)] + [",".join(cell(v) for v in r) for r in rows]
    _write_text(path, "\n".join(lines) + "\n")


def _iso(t: datetime, tz: ZoneInfo) -> str:
    return t.astimezone(tz).isoformat(timespec="seconds")


def _write_npz(path: Path, arrays: dict[str, np.ndarray]) -> None:
    """An .npz (numpy.load reads it) with fixed zip entry dates, for byte-for-byte output."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for name in sorted(arrays):
            buf = io.BytesIO()
            np.lib.format.write_array(buf, np.ascontiguousarray(arrays[name]), allow_pickle=False)
            info = zipfile.ZipInfo(name + ".npy", date_time=_ZIP_DATE)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            zf.writestr(info, buf.getvalue())


def _write_tif(path: Path, z: np.ndarray, west: float, north: float, cell: float, crs: str = SITE_CRS) -> None:
    import rasterio
    from affine import Affine

    path.parent.mkdir(parents=True, exist_ok=True)
    profile = dict(
        driver="GTiff", width=z.shape[1], height=z.shape[0], count=1, dtype="float32", crs=crs,
        transform=Affine(cell, 0.0, west, 0.0, -cell, north), nodata=-9999.0, compress="deflate", predictor=3,
        tiled=True, blockxsize=256, blockysize=256,
    )
    with rasterio.Env(GDAL_PAM_ENABLED="NO"):
        with rasterio.open(path, "w", **profile) as dst:
            dst.write(z.astype("float32"), 1)


def _write_laz(path: Path, xyz: np.ndarray, res: ScanResult, gps0: float, station_no: int,
               georeferenced: bool, survey_day: date, crs: str = SITE_CRS,
               origin: tuple[float, float, float] = SITE_ORIGIN) -> None:
    import laspy

    header = laspy.LasHeader(point_format=6, version="1.4")
    header.creation_date = survey_day
    header.generating_software = "inventory sample (simulated)"
    header.system_identifier = "simulated static laser scanner"
    header.global_encoding.gps_time_type = laspy.header.GpsTimeType.STANDARD
    header.scales = np.array([0.001, 0.001, 0.001])
    if georeferenced:
        header.offsets = np.array([math.floor(origin[0] / 1000) * 1000.0, math.floor(origin[1] / 1000) * 1000.0, 0.0])
        from pyproj import CRS

        header.add_crs(CRS.from_user_input(crs))
    else:
        header.offsets = np.array([0.0, 0.0, 0.0])
    las = laspy.LasData(header)
    las.x = xyz[:, 0]
    las.y = xyz[:, 1]
    las.z = xyz[:, 2]
    las.intensity = res.intensity
    las.return_number = np.ones(len(res), np.uint8)
    las.number_of_returns = np.ones(len(res), np.uint8)
    las.point_source_id = np.full(len(res), station_no, np.uint16)
    las.gps_time = gps0 + res.time_s
    path.parent.mkdir(parents=True, exist_ok=True)
    las.write(str(path), laz_backend=laspy.LazBackend.Lazrs)


# ----------------------------------------------------------------------------- truth surfaces
def _truth_grid():
    """The tool grid over the pad, in local coordinates: (west, north, nrows, ncols)."""
    x0, y0, x1, y1 = PAD_BOUNDS
    return x0, y1, int(round((y1 - y0) / TOOL_CELL_M)), int(round((x1 - x0) / TOOL_CELL_M))


def _fine_integrals(terminal: Terminal) -> tuple[np.ndarray, dict[str, float]]:
    """Cell-mean true surface on the tool grid and each pile's volume, both from a 0.05 m grid.

    Midpoint rule on cells ten times finer than the tool's default cell (the issue's bar).
    """
    zmean, vol = _cell_means(terminal.thicknesses, pad_height, len(PILES), *_truth_grid())
    return zmean, {p.pile_id: float(v) for p, v in zip(PILES, vol)}


def _cell_means(thicknesses, ground, n_piles: int, west: float, north: float, nrows: int,
                ncols: int) -> tuple[np.ndarray, np.ndarray]:
    """Cell-mean true surface ``ground + sum(thicknesses)`` on a tool grid of ``TOOL_CELL_M``
    cells (outer corner ``west``, ``north``) and the volume of each of ``n_piles`` piles, by the
    midpoint rule on ``FINE_CELL_M`` sub-cells; ``thicknesses(x, y)`` gives shape
    ``(n_piles, *x.shape)``."""
    zmean = np.empty((nrows, ncols))
    vol = np.zeros(n_piles)
    xs = west + (np.arange(ncols * _SUB) + 0.5) * FINE_CELL_M
    rows_per = 10
    for r0 in range(0, nrows, rows_per):
        r1 = min(r0 + rows_per, nrows)
        ys = north - (np.arange(r0 * _SUB, r1 * _SUB) + 0.5) * FINE_CELL_M
        X, Y = np.meshgrid(xs, ys)
        t = thicknesses(X, Y)
        vol += t.sum(axis=(1, 2)) * FINE_CELL_M**2
        z = ground(X, Y) + t.sum(axis=0)
        zmean[r0:r1] = z.reshape(r1 - r0, _SUB, ncols, _SUB).mean(axis=(1, 3))
    return zmean, vol


def _shape_record(shape) -> dict:
    if isinstance(shape, Cone):
        return {"type": "cone", "centre_local": [shape.cx, shape.cy], "toe_radius_m": shape.r,
                "repose_deg": shape.repose_deg, "height_m": round(shape.height, 6)}
    if isinstance(shape, Windrow):
        return {"type": "windrow_with_reclaim_face" if shape.face_s is not None else "windrow_conical_ends",
                "ridge_start_local": [shape.x0, shape.y0], "azimuth_deg": shape.azimuth_deg,
                "ridge_length_m": shape.length, "toe_half_width_m": shape.w, "repose_deg": shape.repose_deg,
                "height_m": round(shape.height, 6), "face_toe_along_ridge_m": shape.face_s,
                "face_deg": shape.face_deg if shape.face_s is not None else None}
    if isinstance(shape, BayPile):
        return {"type": "bay_pile", "bay_inner_x_local": [shape.x0, shape.x0 + shape.width],
                "back_wall_inner_y_local": shape.y_back, "toe_distance_from_back_m": shape.depth,
                "flat_top_m": shape.top, "repose_deg": shape.repose_deg}
    raise TypeError(type(shape))


def _footprints(terminals: list[Terminal]):
    """Pile footprints: union of both surveys' toe outlines plus a margin, split where piles touch."""
    from shapely.geometry import box

    out = {}
    for p in PILES:
        geom = terminals[0].shapes[p.pile_id].outline().union(terminals[1].shapes[p.pile_id].outline())
        if p.pile_id == "S1":
            # The bay pile fills the bay wall to wall: its footprint is the bay floor.
            x0, y0, x1, _ = geom.bounds
            geom = box(x0, y0, x1, geom.bounds[3] + FOOTPRINT_MARGIN_M)
        else:
            geom = geom.buffer(FOOTPRINT_MARGIN_M, quad_segs=32)
        out[p.pile_id] = geom
    # L1 and L2 touch at x = 100: split the margins there.
    out["L1"] = out["L1"].intersection(box(-1e3, -1e3, 100.0, 1e3))
    out["L2"] = out["L2"].intersection(box(100.0, -1e3, 1e3, 1e3))
    return out


def _round_geom(geom, decimals: int = 3):
    import shapely

    return shapely.set_precision(geom, 10.0 ** -decimals)


# ----------------------------------------------------------------------------- the site
def write_sample_site(dest: str | os.PathLike, seed: int = DEFAULT_SEED, *, overwrite: bool = False) -> Path:
    """Write the invented demo site into ``dest`` and return its path.

    Parameters
    ----------
    dest : path
        Folder to create. Must not exist, or be empty, unless ``overwrite`` is true.
        The site is built in a temporary folder beside it and renamed into place.
    seed : int
        Seed of every random draw; the same seed gives the same bytes.
    overwrite : bool
        Replace an existing folder.

    Returns
    -------
    Path
        ``dest``.

    Raises
    ------
    InputError
        When ``dest`` is a file, or a non-empty folder and ``overwrite`` is false.
    """
    return _write_folder(dest, lambda tmp: _build(tmp, seed), "the sample site", ".sample-", overwrite)


def _write_folder(dest: str | os.PathLike, build: Callable[[Path], None], what: str, prefix: str,
                  overwrite: bool) -> Path:
    """Build a site with ``build`` in a temporary folder beside ``dest`` and rename it into
    place (``what`` names it in the errors of :func:`write_sample_site`)."""
    dest = Path(dest)
    if dest.exists() and not dest.is_dir():
        raise InputError(dest, f"is a file; {what} needs a new folder")
    if dest.exists() and any(dest.iterdir()) and not overwrite:
        raise InputError(dest, "folder exists and is not empty; choose a new folder (nothing was written)")
    parent = dest.resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
    try:
        build(tmp)
        publishable(tmp)
        if dest.exists():
            shutil.rmtree(dest)
        os.replace(tmp, dest)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return dest


def _build(root: Path, seed: int) -> None:
    tz = ZoneInfo(SITE_TIMEZONE)
    model = ScannerModel()
    terminals = [terminal_at(k, np.random.default_rng([seed, 1, k])) for k in range(len(SURVEYS))]
    truth: dict = {
        "about": "True answers of the invented demo site; read by tests only, never by the tool.",
        "generator": {"function": "inventory._demo.write_sample_site", "seed": seed, "truth_format": 1},
        "site": {
            "name": SITE_NAME, "crs": SITE_CRS, "timezone": SITE_TIMEZONE,
            "local_origin_in_site_crs": list(SITE_ORIGIN),
            "pad": {"bounds_local": list(PAD_BOUNDS), "z_at_local_120_75": 3.60, "slope_x": 0.004, "slope_y": 0.011,
                    "reflectivity": 0.30},
        },
        "volume_method": {
            "volume_m3": "analytic formula of the pile shape (thickness above the pad = above its base)",
            "volume_fine_m3": f"midpoint integration of the true thickness on a {FINE_CELL_M} m grid",
            "tool_cell_m": TOOL_CELL_M,
        },
    }

    # -- materials, piles, scanner model
    truth["materials"] = {
        m.name: {"density_t_m3": m.density_t_m3, "table_density_t_m3": m.table_density_t_m3,
                 "repose_deg": m.repose_deg, "reflectivity": m.reflectivity,
                 "max_range_m": round(float(max_range_for(m.reflectivity, model)), 2)}
        for m in MATERIALS.values()
    }
    truth["scanner"] = {
        "range_sd_m": [model.range_sd_near_m, model.range_sd_far_m],
        "max_range_m_at_reflectivity": [model.max_range_m, model.reference_reflectivity],
        "incidence_exponent": model.incidence_exponent, "ghost_rate_per_empty_ray": model.ghost_rate,
        "ghost_range_m": list(model.ghost_range_m),
    }
    truth["piles"] = [
        {"index": i + 1, "pile_id": p.pile_id, "material": p.material, "base": p.base,
         "description": p.description, "density_t_m3": MATERIALS[p.material].density_t_m3}
        for i, p in enumerate(PILES)
    ]
    truth["label_codes"] = {
        "kind": {str(k): v for k, v in KIND_NAMES.items()},
        "pile": "1-based index into 'piles' (0 = not a pile point)",
        "object": "id into the survey's 'objects' for solids, 1-based dust cloud / bird number for dust / bird",
        "arrays": "truth/labels-<date>.npz holds <station>_kind, <station>_pile, <station>_object (uint8), "
                  "one entry per point in the order of the LAZ file",
    }

    _write_site_toml(root)
    _csv(root / "materials.csv", ["material", "bulk_density_t_m3", "density_sd_t_m3", "moisture_pct", "tolerance_pct",
                                  "unit_cost"],
         [[m.name, f"{m.table_density_t_m3:.3f}", f"{m.density_sd_t_m3:.3f}", f"{m.moisture_pct:.1f}", f"{m.tolerance_pct:.1f}",
           f"{_UNIT_COST[m.name]:.2f}"]
          for m in MATERIALS.values()])
    footprints = _footprints(terminals)
    _write_piles(root / "piles.gpkg", footprints)

    # -- floor raster: the surveyed pad before any stock, on the tool grid
    west, north, nrows, ncols = _truth_grid()
    xc = west + (np.arange(ncols) + 0.5) * TOOL_CELL_M
    yc = north - (np.arange(nrows) + 0.5) * TOOL_CELL_M
    floor = pad_height(*np.meshgrid(xc, yc))
    _write_tif(root / "base" / "floor.tif", floor, west + SITE_ORIGIN[0], north + SITE_ORIGIN[1], TOOL_CELL_M)

    # -- surveys
    survey_truth = []
    instants = []
    tonnes = []
    zmeans = []
    for k, (spec, term) in enumerate(zip(SURVEYS, terminals)):
        day = date.fromisoformat(spec.date)
        h, m = map(int, spec.start_local.split(":"))
        t0 = datetime(day.year, day.month, day.day, h, m, tzinfo=tz)
        folder = root / "surveys" / spec.date
        station_rows = []
        labels: dict[str, np.ndarray] = {}
        files: dict[str, dict] = {}
        totals = np.zeros(len(KIND_NAMES), np.int64)
        scene = term.scene()
        last = t0
        for i, st in enumerate(spec.stations):
            start = t0 + timedelta(minutes=STATION_INTERVAL_MIN * i)
            last = start
            res = scan(scene, st, model, np.random.default_rng([seed, 2, k, i]))
            geo = st.station_id == spec.georeferenced
            if geo:
                xyz = res.xyz + np.array(SITE_ORIGIN)
            else:
                xyz = to_station_frame(res.xyz, st)
            gps0 = (start.astimezone(_UTC) - _GPS_EPOCH).total_seconds() + _GPS_LEAP_S - 1e9
            name = f"{st.station_id}.laz"
            _write_laz(folder / name, xyz, res, gps0, i + 1, geo, day)
            labels[f"{st.station_id}_kind"] = res.kind.astype(np.uint8)
            labels[f"{st.station_id}_pile"] = res.pile.astype(np.uint8)
            labels[f"{st.station_id}_object"] = res.object_id.astype(np.uint8)
            counts = np.bincount(res.kind, minlength=len(KIND_NAMES))
            totals += counts
            files[name] = {
                "station_id": st.station_id, "points": int(len(res)), "georeferenced": geo,
                "pose_site": None if geo else [st.x + SITE_ORIGIN[0], st.y + SITE_ORIGIN[1], st.z,
                                               st.roll_deg, st.pitch_deg, st.yaw_deg],
                "origin_site": [st.x + SITE_ORIGIN[0], st.y + SITE_ORIGIN[1], st.z],
                "az_step_deg": st.az_step_deg, "el_step_deg": st.el_step_deg,
                "el_range_deg": [st.el_min_deg, st.el_max_deg],
                "counts": {KIND_NAMES[c]: int(n) for c, n in enumerate(counts)},
            }
            if geo:
                station_rows.append([name, st.station_id, _iso(start, tz), None, None, None, None, None, None])
            else:
                station_rows.append([name, st.station_id, _iso(start, tz), f"{st.x + SITE_ORIGIN[0]:.3f}",
                                     f"{st.y + SITE_ORIGIN[1]:.3f}", f"{st.z:.3f}", f"{st.roll_deg:g}",
                                     f"{st.pitch_deg:g}", f"{st.yaw_deg:g}"])
        _csv(folder / "stations.csv", ["file", "station_id", "time", "x", "y", "z", "roll_deg", "pitch_deg", "yaw_deg"],
             station_rows)
        _write_npz(root / "truth" / f"labels-{spec.date}.npz", labels)
        instant = last.astimezone(_UTC)
        instants.append(instant)

        zmean, vfine = _fine_integrals(term)
        zmeans.append(zmean)
        _write_tif(root / "truth" / f"surface-{spec.date}.tif", zmean, west + SITE_ORIGIN[0], north + SITE_ORIGIN[1],
                   TOOL_CELL_M)
        piles_t = {}
        tonnes_k = {}
        for p in PILES:
            shape = term.shapes[p.pile_id]
            v = shape.volume()
            mat = MATERIALS[p.material]
            tonnes_k[p.pile_id] = v * mat.density_t_m3
            piles_t[p.pile_id] = {
                "volume_m3": round(v, 4), "volume_fine_m3": round(vfine[p.pile_id], 4),
                "tonnes": round(v * mat.density_t_m3, 4),
                "tonnes_at_table_density": round(v * mat.table_density_t_m3, 4),
                "shape": _shape_record(shape),
            }
        tonnes.append(tonnes_k)
        names = KIND_NAMES
        survey_truth.append({
            "date": spec.date, "instant": _iso(instant, tz), "piles": piles_t, "files": files,
            "counts": {names[c]: int(n) for c, n in enumerate(totals)},
            "machine_points": int(totals[2] + totals[3] + totals[4]),
            "noise_points": int(totals[5] + totals[6] + totals[7]),
            "objects": term.objects,
            "dust_clouds": [{"centre_site": [c.center[0] + SITE_ORIGIN[0], c.center[1] + SITE_ORIGIN[1], c.center[2]],
                             "radius_m": c.radius} for c in term.dust],
            "birds": len(term.birds),
            "surface": f"truth/surface-{spec.date}.tif", "labels": f"truth/labels-{spec.date}.npz",
        })
    truth["surveys"] = survey_truth

    # -- books
    materials = {p.pile_id: p.material for p in PILES}
    bk = _books.make_books(tonnes, instants, materials, tz, np.random.default_rng([seed, 3]))
    truth["books"] = _write_books(root, bk, tz, instants, tonnes)
    truth["faults"] = _fault_truth(bk, tz, instants, terminals)
    truth["machine_survey"] = _machine_survey(root, terminals[MACHINE_TERRAIN], zmeans[MACHINE_TERRAIN], seed, tz)

    _write_overview(root / "overview.png", terminals, footprints)
    _write_readme(root, truth)
    _write_text(root / "truth.json", json.dumps(truth, indent=1, sort_keys=False, ensure_ascii=True) + "\n")


def _machine_survey(root: Path, term: Terminal, zmean: np.ndarray, seed: int, tz: ZoneInfo) -> dict:
    """Write the machine-mounted survey and its true surface; return its truth record.

    Its random draws come from their own stream (``[seed, 9, k]``, see
    :func:`inventory._demo.machine_scan.write_demo_machine_survey`), so adding it changed no
    byte of the static surveys or the books.
    """
    from inventory._demo.machine_scan import (
        ScannerHead,
        demo_motion,
        write_demo_machine_survey,
    )

    day = date.fromisoformat(MACHINE_SURVEY_DATE)
    h, m = map(int, MACHINE_SURVEY_START_LOCAL.split(":"))
    start = datetime(day.year, day.month, day.day, h, m, tzinfo=tz).astimezone(_UTC)
    k = MACHINE_TERRAIN
    scan = write_demo_machine_survey(root / "surveys" / MACHINE_SURVEY_DATE, term, k, start, seed=seed,
                                     log_delay_s=MACHINE_LOG_DELAY_S)
    local = scan.true_xyz[:, :2] - np.array(SITE_ORIGIN[:2])
    thick = term.thicknesses(local[:, 0], local[:, 1]).sum(axis=0)
    pile = int((thick > 1e-6).sum())
    # As trajectory.csv states it (6 decimals), which is what the survey compares with.
    logged0 = round(float(scan.samples["gps_time"].iloc[0]), 6)
    # The true surface on the cells the scan reached (a true hit inside the cell).
    west, north, nrows, ncols = _truth_grid()
    col = np.floor((local[:, 0] - west) / TOOL_CELL_M).astype(int)
    row = np.floor((north - local[:, 1]) / TOOL_CELL_M).astype(int)
    ok = (row >= 0) & (row < nrows) & (col >= 0) & (col < ncols)
    hit = np.zeros((nrows, ncols), bool)
    hit[row[ok], col[ok]] = True
    _write_tif(root / "truth" / f"surface-{MACHINE_SURVEY_DATE}.tif", np.where(hit, zmean, -9999.0),
               west + SITE_ORIGIN[0], north + SITE_ORIGIN[1], TOOL_CELL_M)
    mach, motion, head = scan.machine, demo_motion(k), ScannerHead(el_min_deg=-85.0, el_max_deg=-12.0)
    s = scan.samples
    return {
        "date": MACHINE_SURVEY_DATE, "start": _iso(start, tz), "terrain_of_survey": SURVEYS[k].date,
        "files": ["machine_scan.laz", "trajectory.csv"], "trajectory_variant": "pose",
        "note": "the cloud is in the scanner frame with adjusted standard GPS times; trajectory.csv gives the "
                "scanner's own pose (lever arm and boresight folded in) at 10 Hz; the log starts "
                f"{MACHINE_LOG_DELAY_S} s after the first ray. The terrain is that of survey "
                f"{SURVEYS[k].date} (the scenario has no mid-month state); no close uses this survey.",
        "machine": {"id": mach.id, "rail_origin_site": [float(v) for v in mach.rail_origin],
                    "rail_azimuth_deg": mach.rail_azimuth_deg, "pivot_height_m": mach.pivot_height_m,
                    "pivot_offset_m": mach.pivot_offset_m, "boom_length_m": mach.boom_length_m,
                    "scanner_lever_arm_m": [float(v) for v in mach.scanner_lever_arm_m],
                    "boresight_deg": [round(float(v), 6) for v in mach.boresight_deg]},
        "motion": {"duration_s": motion.duration_s, "travel_m": list(motion.travel_m), "slew_deg": list(motion.slew_deg),
                   "luff_deg": list(motion.luff_deg), "profile": "cosine ramp from start to end value"},
        "head": {"turn_deg": head.turn_deg, "az_step_deg": head.az_step_deg,
                 "el_range_deg": [head.el_min_deg, head.el_max_deg], "el_step_deg": head.el_step_deg,
                 "range_sd_m": 0.012, "max_range_m": 45.0},
        "first_ray_gps_time": round(float(scan.gps_time.min()), 6),
        "logged_samples": {c: [round(float(v), 6) for v in s[c]] for c in ("gps_time", "travel_m", "slew_deg", "luff_deg")},
        "counts": {"points": int(len(scan.points)), "outside_span": int((scan.gps_time < logged0).sum()),
                   "in_gap": 0, "pile": pile, "pad": int(len(scan.points)) - pile},
        "surface": f"truth/surface-{MACHINE_SURVEY_DATE}.tif",
    }


def _write_site_toml(root: Path) -> None:
    lines = [
        f'name = "{SITE_NAME}"',
        f'crs = "{SITE_CRS}"',
        f'timezone = "{SITE_TIMEZONE}"',
        "",
        "[grid]",
        f"cell_size_m = {TOOL_CELL_M}",
        "max_fill_distance_m = 3.0",
        'statistic = "mean"',
        "",
        "[survey]",
        f'default_crs = "{SITE_CRS}"',
        'default_time = "14:00"',
        "",
        "[base]",
        'floor_raster = "base/floor.tif"',
        "floor_sigma_m = 0.03",
        "toe_ring_m = 3.0",
        "",
        "[reconcile]",
        "significance_k = 2.0",
        "default_tolerance_pct = 3.0",
        'adjust_to = "survey"',
        "duplicate_window_min = 10",
        'adjust = "all"',
        "hold_unexplained = true",
        "",
        "[journal]",
        'currency = "EUR"',
        "",
        "[journal.accounts]",
        *[f'"{name}" = "{code}"' for name, code in _ACCOUNTS.items()],
        "",
        "[journal.locations]",
        *[f'{p.pile_id} = "YARD-{p.pile_id}"' for p in PILES],
    ]
    wb = _books.WEIGHBRIDGE
    lines += ["", "[[scales]]", f'id = "{wb["id"]}"', 'kind = "weighbridge"', f'accuracy_class = "{wb["accuracy_class"]}"',
              f"scale_interval_kg = {wb['scale_interval_kg']}", "in_service = true"]
    for sid, b in _books.BELTS.items():
        lines += ["", "[[scales]]", f'id = "{sid}"', 'kind = "belt"', f'direction = "{b["direction"]}"',
                  f'accuracy_class = "{b["accuracy_class"]}"', "in_service = true"]
    _write_text(root / "site.toml", "# The invented demo site written by `inventory sample`.\n" + "\n".join(lines) + "\n")


def _write_piles(path: Path, footprints: dict, piles=PILES, crs: str = SITE_CRS,
                 origin: tuple[float, float, float] = SITE_ORIGIN) -> None:
    """``piles.gpkg``: one row per pile of ``piles`` (``pile_id``, ``material``, ``base``) with
    its local footprint moved by ``origin`` into ``crs``."""
    import geopandas as gpd
    import pyogrio
    from shapely import affinity

    geoms = [_round_geom(affinity.translate(footprints[p.pile_id], origin[0], origin[1])) for p in piles]
    frame = gpd.GeoDataFrame(
        {"pile_id": [p.pile_id for p in piles], "material": [p.material for p in piles],
         "base": [p.base for p in piles], "density_t_m3": [None] * len(piles)},
        geometry=geoms, crs=crs,
    )
    frame["density_t_m3"] = frame["density_t_m3"].astype("float64")
    old = pyogrio.get_gdal_config_option("OGR_CURRENT_DATE")
    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": _GPKG_DATE})
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        frame.to_file(path, layer="piles", driver="GPKG", engine="pyogrio")
    finally:
        pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": old})


def _write_books(root: Path, bk, tz: ZoneInfo, instants: list[datetime], tonnes: list[dict]) -> dict:
    periods = ["2026-09", "2026-10"]

    def period(t: datetime) -> str:
        return t.astimezone(tz).strftime("%Y-%m")

    tickets = list(bk.tickets)
    dup = bk.faults["duplicate_index"]
    wb_rows = {p: [] for p in periods}
    for i, t in enumerate(tickets):
        row = [t.ticket, _iso(t.time, tz), t.direction, t.material, t.pile_id, f"{t.gross_t:.2f}", f"{t.tare_t:.2f}",
               f"{t.net_t:.2f}", t.vehicle, _books.WEIGHBRIDGE["id"]]
        wb_rows[period(t.time)].append(row)
        if i == dup:
            dup_row = row
    # The duplicate appears again a few lines further down (an export that ran twice).
    oct_rows = wb_rows["2026-10"]
    pos = oct_rows.index(dup_row)
    oct_rows.insert(min(pos + 4, len(oct_rows)), list(dup_row))
    for p in periods:
        folder = root / "movements" / p
        _csv(folder / "weighbridge.csv",
             ["ticket", "time", "direction", "material", "pile_id", "gross_t", "tare_t", "net_t", "vehicle", "scale_id"],
             wb_rows[p])
        _csv(folder / "belt_scales.csv", ["scale_id", "start", "end", "tonnes"],
             [[b.scale_id, _iso(b.start, tz), _iso(b.end, tz), f"{b.recorded_t:.1f}"] for b in bk.belts
              if period(b.start) == p])
        _csv(folder / "routing.csv", ["scale_id", "pile_id", "start", "end"],
             [[r.scale_id, r.pile_id, _iso(r.start, tz), _iso(r.end, tz)] for r in bk.routes if period(r.start) == p])
        _csv(folder / "transfers.csv", ["from_pile", "to_pile", "time", "tonnes", "reference"],
             [[t.from_pile, t.to_pile, _iso(t.time, tz), f"{t.tonnes:.1f}", t.reference] for t in bk.transfers
              if t.recorded and period(t.time) == p])
    _csv(root / "opening.csv", ["pile_id", "tonnes", "as_of"],
         [[p, f"{v:.1f}", _iso(bk.opening_as_of, tz)] for p, v in bk.opening_t.items()])

    # Book stock as the records say (duplicate counted once), at each survey instant.
    def book_at(inst: datetime) -> dict[str, float]:
        book = dict(bk.opening_t)
        for t in tickets:
            if t.time <= inst:
                book[t.pile_id] += t.net_t if t.direction == "in" else -t.net_t
        for b in bk.belts:
            if b.end <= inst:
                book[b.pile_id] += b.recorded_t * (1 if _books.BELTS[b.scale_id]["direction"] == "in" else -1)
        for t in bk.transfers:
            if t.recorded and t.time <= inst:
                book[t.from_pile] -= t.tonnes
                book[t.to_pile] += t.tonnes
        return book

    def recorded_between(t0: datetime, t1: datetime) -> dict[str, float]:
        net = {p: 0.0 for p in bk.opening_t}
        for t in tickets:
            if t0 < t.time <= t1:
                net[t.pile_id] += t.net_t if t.direction == "in" else -t.net_t
        for b in bk.belts:
            if t0 <= b.start and b.end <= t1:
                net[b.pile_id] += b.recorded_t * (1 if _books.BELTS[b.scale_id]["direction"] == "in" else -1)
        for t in bk.transfers:
            if t.recorded and t0 < t.time <= t1:
                net[t.from_pile] -= t.tonnes
                net[t.to_pile] += t.tonnes
        return net

    out = {
        "opening": {"as_of": _iso(bk.opening_as_of, tz), "tonnes": bk.opening_t,
                    "note": "opening.csv = true stock at as_of rounded to 0.1 t"},
        "true_net_t": {p: {"before_first_survey": round(v[0], 4), "between_surveys": round(v[1], 4),
                           "after_second_survey": round(v[2], 4)} for p, v in bk.true_net_t.items()},
        "note": "true flows between the survey instants equal the true change in tonnes exactly; "
                "movements after the first survey on 2026-09-30 sit in movements/2026-09 but count "
                "towards that change.",
        "book_at_survey_t": [],
        "book_note": "book_t = opening.csv + every record up to the survey instant (a repeated ticket "
                     "counted once), with no adjustment posted; a close that adjusts book to survey "
                     "starts the next period from the adjusted figure instead (see between_surveys)",
        "counts": {p: {"weighbridge_rows": sum(1 for t in tickets if period(t.time) == p) + (p == "2026-10"),
                       "belt_rows": sum(1 for b in bk.belts if period(b.start) == p),
                       "routing_rows": sum(1 for r in bk.routes if period(r.start) == p),
                       "transfer_rows": sum(1 for t in bk.transfers if t.recorded and period(t.time) == p)}
                   for p in periods},
    }
    ratio = {p.pile_id: MATERIALS[p.material].table_density_t_m3 / MATERIALS[p.material].density_t_m3 for p in PILES}
    for k, inst in enumerate(instants):
        book = book_at(inst)
        out["book_at_survey_t"].append({
            "instant": _iso(inst, tz),
            "book_t": {p: round(v, 2) for p, v in book.items()},
            "true_t": {p: round(v, 4) for p, v in tonnes[k].items()},
            "book_minus_true_t": {p: round(book[p] - tonnes[k][p], 2) for p in book},
            # What a perfect survey would report with the material table's densities, minus book.
            "variance_at_table_density_t": {p: round(tonnes[k][p] * ratio[p] - book[p], 2) for p in book},
        })
    rec = recorded_between(instants[0], instants[1])
    out["between_surveys"] = {
        "recorded_net_t": {p: round(v, 2) for p, v in rec.items()},
        "true_net_t": {p: round(tonnes[1][p] - tonnes[0][p], 4) for p in rec},
        # A perfect survey at the table densities, with book set to the first survey's figure.
        "variance_if_adjusted_to_first_survey_t": {
            p: round((tonnes[1][p] - tonnes[0][p]) * ratio[p] - rec[p], 2) for p in rec},
    }
    return out


def _fault_truth(bk, tz: ZoneInfo, instants: list[datetime], terminals: list[Terminal]) -> dict:
    f = _books.FAULTS
    fb = f["belt_bias"]
    belt_effect: dict[str, float] = {}
    for b in bk.belts:
        if b.fault_t and b.end <= instants[1]:
            belt_effect[b.pile_id] = belt_effect.get(b.pile_id, 0.0) + b.fault_t
    dup = bk.tickets[bk.faults["duplicate_index"]]
    miss = next(t for t in bk.transfers if not t.recorded)
    salt = MATERIALS[f["density_low"]["material"]]
    s1 = [terminals[k].shapes[f["density_low"]["pile_id"]].volume() for k in range(2)]
    return {
        "belt_bias": {**fb, "true_in_october_before_survey_t": {p: round(v / (fb["reads_high_pct"] / 100), 2)
                                                                 for p, v in sorted(belt_effect.items())},
                      "book_effect_t": {p: round(v, 2) for p, v in sorted(belt_effect.items())},
                      "note": "recorded = true x (1 + calibration bias + hourly noise + 0.015) for every BC2 "
                              "interval dated 2026-10; book_effect_t is the 1.5 % part up to the second survey"},
        "duplicate_ticket": {**f["duplicate_ticket"], "ticket": dup.ticket, "time": _iso(dup.time, tz),
                             "direction": dup.direction, "net_t": dup.net_t, "vehicle": dup.vehicle,
                             "book_effect_if_counted_twice_t": {dup.pile_id: -dup.net_t if dup.direction == "out" else dup.net_t},
                             "note": "the row is repeated verbatim four lines further down in movements/2026-10/weighbridge.csv"},
        "missing_transfer": {**f["missing_transfer"], "time": _iso(miss.time, tz),
                             "book_effect_t": {miss.from_pile: miss.tonnes, miss.to_pile: -miss.tonnes},
                             "note": "the material moved but no row was written in transfers.csv"},
        "density_low": {**f["density_low"], "true_density_t_m3": salt.density_t_m3,
                        "table_density_t_m3": salt.table_density_t_m3,
                        "survey_tonnes_effect_t": [round(v * (salt.table_density_t_m3 - salt.density_t_m3), 3) for v in s1],
                        "note": "materials.csv states the density 4 % low; it affects both surveys' survey tonnes"},
    }


def _write_overview(path: Path, terminals: list[Terminal], footprints: dict) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from matplotlib.colors import LightSource

    west, north, nrows, ncols = _truth_grid()
    xc = west + (np.arange(ncols) + 0.5) * TOOL_CELL_M
    yc = north - (np.arange(nrows) + 0.5) * TOOL_CELL_M
    X, Y = np.meshgrid(xc, yc)
    fig, axes = plt.subplots(1, 2, figsize=(15, 5.3), dpi=90, layout="constrained")
    ls = LightSource(azdeg=315, altdeg=40)
    for ax, term in zip(axes, terminals):
        z = term.height(X, Y)
        thick = z - pad_height(X, Y)
        shade = ls.hillshade(z, vert_exag=1.5, dx=TOOL_CELL_M, dy=TOOL_CELL_M)
        extent = (PAD_BOUNDS[0], PAD_BOUNDS[2], PAD_BOUNDS[1], PAD_BOUNDS[3])
        ax.imshow(shade, extent=extent, origin="upper", cmap="gray", vmin=0.0, vmax=1.0)
        im = ax.imshow(np.ma.masked_less(thick, 0.02), extent=extent, origin="upper", cmap="YlOrBr",
                       vmin=0.0, vmax=12.0, alpha=0.55)
        for pid, geom in footprints.items():
            xs, ys = geom.exterior.xy
            ax.plot(xs, ys, color="black", lw=0.8)
            c = geom.representative_point()
            ax.text(c.x, c.y, pid, ha="center", va="center", fontsize=9, color="black", weight="bold")
        from shapely.geometry import MultiPoint

        for solid in term.solids:
            corners = np.array([[sx, sy, sz] for sx in (-1, 1) for sy in (-1, 1) for sz in (-1, 1)]) * np.asarray(solid.half)
            pts = corners @ np.asarray(solid.rotation).T + np.asarray(solid.center)
            hx, hy = MultiPoint(pts[:, :2]).convex_hull.exterior.xy
            ax.fill(hx, hy, color="tab:red", alpha=0.75, lw=0)
        for st in term.survey.stations:
            geo = st.station_id == term.survey.georeferenced
            ax.plot(st.x, st.y, "*" if geo else "^", color="tab:blue", mec="white", ms=10 if geo else 7)
            ax.text(st.x + 2, st.y + 2, st.station_id, fontsize=7, color="navy")
        ax.set_title(f"survey {term.survey.date}", fontsize=10)
        ax.set_xlabel(f"local x, m (EPSG:25832 E = x + {SITE_ORIGIN[0]:.0f})")
        ax.set_ylabel(f"local y, m (N = y + {SITE_ORIGIN[1]:.0f})")
        ax.set_xlim(PAD_BOUNDS[0], PAD_BOUNDS[2])
        ax.set_ylim(PAD_BOUNDS[1], PAD_BOUNDS[3])
    fig.colorbar(im, ax=axes, shrink=0.8, label="pile thickness above the pad, m")
    fig.suptitle(f"{SITE_NAME}: true surface (hillshade), pile thickness, footprints (black), "
                 "machines and structures (red), scanner stations (triangles; star = georeferenced file)", fontsize=10)
    fig.savefig(path, format="png", metadata={"Software": None})
    plt.close(fig)


def _write_readme(root: Path, truth: dict) -> None:
    ms = truth["machine_survey"]
    lines = [
        f"# {SITE_NAME}",
        "",
        "An invented bulk terminal written by `inventory sample` (no real place, company or person).",
        "Everything here is simulated; `truth.json` and `truth/` hold the true answers for the tests",
        "and are never read by the tool. `overview.png` shows the true surfaces.",
        "",
        "| pile | material | base | what it is | volume at 1st / 2nd survey, m3 |",
        "| --- | --- | --- | --- | --- |",
    ]
    for p in PILES:
        v = [s["piles"][p.pile_id]["volume_m3"] for s in truth["surveys"]]
        lines.append(f"| {p.pile_id} | {p.material} | {p.base} | {p.description} | {v[0]:.0f} / {v[1]:.0f} |")
    lines += [
        "",
        "Surveys: " + ", ".join(f"{s['date']} ({len(s['files'])} scanner stations)" for s in truth["surveys"]) + ".",
        "Each station's cloud is in the scanner's own frame with its pose in `stations.csv`, except one",
        "station per survey that is already georeferenced (blank pose).",
        "",
        f"A third survey, {ms['date']}, is a machine-mounted scan of part of the yard: a scanner hung under",
        "the stacker's boom tip turns once while the boom slews 60 degrees, travels 6 m and luffs 2 degrees",
        f"({ms['motion']['duration_s']:g} s). `machine_scan.laz` holds {ms['counts']['points']:,} points in the scanner's own frame with",
        "their GPS times; `trajectory.csv` gives the scanner's pose at 10 Hz, and the survey step places",
        "every point with the pose at its own time. The log starts "
        f"{ms['logged_samples']['gps_time'][0] - ms['first_ray_gps_time']:.1f} s after the first ray, so",
        f"{ms['counts']['outside_span']:,} points cannot be placed and are reported as rejected. The scanned terrain is",
        f"that of the {ms['terrain_of_survey']} survey (the scenario has no mid-month state); no close uses this",
        "survey: the close of 2026-10 takes the month's last survey.",
        "",
        "The books for 2026-10 carry planted faults (see `truth.json`, key `faults`).",
    ]
    _write_text(root / "README.md", "\n".join(lines) + "\n")
