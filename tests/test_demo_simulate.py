"""The scan simulator against handbook geometry: a cone, flat ground, a box, range limits.

The reference values here are computed independently of the simulator's ray caster: the cone
by the closed-form ray-cone intersection (a quadratic; any analytic-geometry handbook), flat
ground by ``r = h / tan(-elevation)``, the box by sampling the segment in front of each point.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from inventory._demo.simulate import (
    KIND_MACHINE,
    KIND_PAD,
    KIND_PILE,
    Box,
    Scene,
    ScannerModel,
    Station,
    max_range_for,
    scan,
    station_rotation,
    to_station_frame,
)

SIGMA = 0.01
NOISY = ScannerModel(range_sd_near_m=SIGMA, range_sd_far_m=SIGMA, limit_range=False, ghost_rate=0.0)
EXACT = ScannerModel(range_sd_near_m=0.0, range_sd_far_m=0.0, limit_range=False, ghost_rate=0.0)


def _cone_scene(R: float, H: float, refl: float = 0.5) -> Scene:
    def height(x, y):
        return np.clip(H * (1.0 - np.hypot(x, y) / R), 0.0, None)

    def info(x, y):
        on = height(x, y) > 1e-9
        return on.astype(int), np.full(np.shape(x), refl)

    return Scene(height, info)


def _flat_scene(refl: float) -> Scene:
    return Scene(lambda x, y: np.zeros(np.shape(x)), lambda x, y: (np.zeros(np.shape(x), int), np.full(np.shape(x), refl)))


def _first_hit_cone_or_ground(o: np.ndarray, d: np.ndarray, R: float, H: float) -> tuple[np.ndarray, np.ndarray]:
    """Closed-form first hit of rays with a cone (apex (0,0,H), toe radius R) standing on z = 0.

    The cone's mantle is (H - z)^2 = k^2 (x^2 + y^2), k = H/R, 0 <= z <= H; substituting the ray
    o + t d gives a quadratic in t. Returns the range and whether the hit is on the cone.
    """
    k2 = (H / R) ** 2
    a = d[:, 2] ** 2 - k2 * (d[:, 0] ** 2 + d[:, 1] ** 2)
    b = -2.0 * (H - o[2]) * d[:, 2] - 2.0 * k2 * (o[0] * d[:, 0] + o[1] * d[:, 1])
    c = (H - o[2]) ** 2 - k2 * (o[0] ** 2 + o[1] ** 2)
    disc = b * b - 4 * a * c
    root = np.sqrt(np.where(disc >= 0, disc, np.nan))
    best = np.full(len(d), np.inf)
    for sign in (-1.0, 1.0):
        with np.errstate(invalid="ignore", divide="ignore"):
            t = (-b + sign * root) / (2 * a)
        z = o[2] + t * d[:, 2]
        ok = np.isfinite(t) & (t > 1e-9) & (z >= -1e-9) & (z <= H + 1e-9)
        best = np.where(ok & (t < best), t, best)
    with np.errstate(divide="ignore"):
        t_ground = np.where(d[:, 2] < 0, -o[2] / d[:, 2], np.inf)
    on_cone = best < t_ground
    return np.minimum(best, t_ground), on_cone


def _ray_grid(st: Station, refine: int = 1, az_window: tuple[float, float] | None = None,
              el_max_deg: float | None = None) -> np.ndarray:
    """The station's ray directions (optionally ``refine`` x finer, within an azimuth window)."""
    az_deg = st.yaw_deg + np.arange(int(round(360 / st.az_step_deg)) * refine) * st.az_step_deg / refine
    if az_window is not None:
        lo, hi = az_window
        az_deg = az_deg[((az_deg - lo) % 360.0) <= ((hi - lo) % 360.0)]
    n_el = int(math.floor((st.el_max_deg - st.el_min_deg) / st.el_step_deg + 1e-9)) * refine + 1
    el_deg = st.el_min_deg + np.arange(n_el) * st.el_step_deg / refine
    if el_max_deg is not None:
        el_deg = el_deg[el_deg <= el_max_deg]
    az, el = np.radians(az_deg), np.radians(el_deg)
    A, E = np.meshgrid(az, el, indexing="ij")
    A, E = A.ravel(), E.ravel()
    return np.stack([np.cos(E) * np.cos(A), np.cos(E) * np.sin(A), np.sin(E)], axis=1)


# A small cone (toe radius 4 m, 35 degree repose) seen from four stations at growing distance;
# the far-field approximations below are good to O((R/d)^2) <= 6 %.
R_CONE, H_CONE = 4.0, 4.0 * math.tan(math.radians(35.0))
H_SCANNER = 1.8
DISTANCES = (16.0, 24.0, 36.0, 54.0)


def _stations(step: float = 0.2) -> list[Station]:
    out = []
    for i, dist in enumerate(DISTANCES):
        a = math.radians(90.0 * i + 10.0)
        out.append(Station(f"S{i}", dist * math.cos(a), dist * math.sin(a), H_SCANNER, yaw_deg=37.0 * i,
                           az_step_deg=step, el_step_deg=step, el_min_deg=-30.0, el_max_deg=20.0,
                           profile_range_m=80.0))
    return out


@pytest.fixture(scope="module")
def cone_scans():
    scene = _cone_scene(R_CONE, H_CONE)
    sts = _stations()
    noisy = [scan(scene, st, NOISY, np.random.default_rng(i)) for i, st in enumerate(sts)]
    exact = [scan(scene, st, EXACT, np.random.default_rng(i)) for i, st in enumerate(sts)]
    return sts, noisy, exact


def test_cone_points_lie_on_the_analytic_cone_within_the_noise(cone_scans):
    sts, noisy, exact = cone_scans
    for st, res, ex in zip(sts, noisy, exact):
        o = st.origin
        for r, tol_max in ((ex, 1e-4), (res, 6 * SIGMA)):
            on = r.kind == KIND_PILE
            assert on.sum() > 200
            v = r.xyz[on] - o
            rng_meas = np.linalg.norm(v, axis=1)
            t_ref, on_cone = _first_hit_cone_or_ground(o, v / rng_meas[:, None], R_CONE, H_CONE)
            assert on_cone.mean() > 0.995  # a few grazing toe rays may tip onto the ground
            resid = (rng_meas - t_ref)[on_cone]
            assert np.abs(resid).max() < tol_max
        resid_noisy = np.linalg.norm(res.xyz[res.kind == KIND_PILE] - o, axis=1)
        dirs = (res.xyz[res.kind == KIND_PILE] - o) / resid_noisy[:, None]
        t_ref, on_cone = _first_hit_cone_or_ground(o, dirs, R_CONE, H_CONE)
        sd = np.std((resid_noisy - t_ref)[on_cone])
        assert 0.9 * SIGMA < sd < 1.1 * SIGMA


def test_cone_hit_count_per_station_matches_ray_geometry(cone_scans):
    sts, _, exact = cone_scans
    counts = []
    for st, ex in zip(sts, exact):
        n_sim = int((ex.kind == KIND_PILE).sum())
        # Exact: which of the station's own rays meet the cone before the ground (closed form).
        _, on_cone = _first_hit_cone_or_ground(st.origin, _ray_grid(st), R_CONE, H_CONE)
        n_exact = int(on_cone.sum())
        assert abs(n_sim - n_exact) <= max(3, 0.002 * n_exact)
        # Expected: the cone's silhouette area in the (azimuth, elevation) plane divided by the
        # area of one ray cell, measured on a grid 8 x finer in each direction.
        # Only the directions that can see the cone: its azimuth sector and below its apex.
        dist = math.hypot(st.x, st.y)
        centre = math.degrees(math.atan2(-st.y, -st.x))
        half = math.degrees(math.asin(R_CONE / dist)) + 1.0
        top = math.degrees(math.atan2(H_CONE - st.z, dist - R_CONE)) + 1.0
        window = _ray_grid(st, refine=8, az_window=(centre - half, centre + half), el_max_deg=top)
        _, fine = _first_hit_cone_or_ground(st.origin, window, R_CONE, H_CONE)
        n_expected = fine.sum() / 64.0
        assert abs(n_sim - n_expected) < 0.03 * n_expected + 10
        counts.append(n_sim)
    # Far field: the silhouette is the triangle R x H plus the front half of the toe ellipse,
    # solid angle ~ (R H + pi R^2 h / (2 d)) / d^2; one ray covers (step in radians)^2.
    step = math.radians(sts[0].az_step_deg)
    for dist, n in zip(DISTANCES, counts):
        predicted = (R_CONE * H_CONE + math.pi * R_CONE**2 * H_SCANNER / (2 * dist)) / dist**2 / step**2
        print(f"d={dist:.0f} m: {n} hits, far-field prediction {predicted:.0f}")
        assert abs(n / predicted - 1.0) < 0.12, (dist, n, predicted)
    assert all(a > b for a, b in zip(counts, counts[1:]))  # hits fall with range
    assert counts[0] / counts[-1] > 0.6 * (DISTANCES[-1] / DISTANCES[0]) ** 2


def test_flat_ground_rings_and_density_fall_off():
    st = Station("G", 0.0, 0.0, 2.0, az_step_deg=0.5, el_step_deg=0.25, el_min_deg=-40.0, el_max_deg=5.0,
                 profile_range_m=90.0)
    res = scan(_flat_scene(0.5), st, EXACT)
    ground = res.kind == KIND_PAD
    r = np.hypot(res.xyz[ground, 0], res.xyz[ground, 1])
    el = np.radians(st.elevations_deg())
    n_az = len(st.azimuths_deg())
    # Each elevation step below the horizon draws one ring at r = h / tan(-e), every column hits it.
    rows = res.row[ground]
    expected_r = st.z / np.tan(-el[rows])
    assert np.allclose(r, expected_r, rtol=1e-6)
    per_row = np.bincount(rows, minlength=len(el))
    below = (el < 0) & (st.z / np.tan(-np.minimum(el, -1e-12)) < st.profile_range_m)
    assert np.all(per_row[below] == n_az)
    # Points per annulus: N_az (atan(h/r1) - atan(h/r2)) / step, to within one ring.
    step = math.radians(st.el_step_deg)
    prev = None
    for r1, r2 in ((2.5, 5.0), (5.0, 10.0), (10.0, 20.0), (20.0, 40.0), (40.0, 80.0)):
        n = int(((r >= r1) & (r < r2)).sum())
        predicted = n_az * (math.atan(st.z / r1) - math.atan(st.z / r2)) / step
        assert abs(n - predicted) <= n_az
        density = n / (math.pi * (r2**2 - r1**2))
        if prev is not None:
            assert density < prev / 4  # density ~ h / (r^3 step): each doubling of r divides it by ~8
        prev = density


def test_range_limit_follows_reflectivity():
    # Common practice (issue brief) for industrial 2D line scanners: ~80 m on bright material,
    # ~30 m on dark coal.
    assert float(max_range_for(0.6)) == pytest.approx(80.0)
    assert float(max_range_for(0.085)) == pytest.approx(30.0, abs=0.5)
    model = ScannerModel(range_sd_near_m=0.0, range_sd_far_m=0.0, ghost_rate=0.0)
    for refl in (0.085, 0.6):
        rmax = float(max_range_for(refl))
        fractions = []
        for dist in (0.85 * rmax, 1.15 * rmax):
            wall = Box((dist + 0.5, 0.0, 0.0), (0.5, 10.0, 10.0), kind=KIND_MACHINE, reflectivity=refl)
            scene = Scene(lambda x, y: np.full(np.shape(x), -100.0),
                          lambda x, y: (np.zeros(np.shape(x), int), np.full(np.shape(x), 0.3)), solids=[wall])
            st = Station("W", 0.0, 0.0, 0.0, az_step_deg=0.1, el_step_deg=0.1, el_min_deg=-3, el_max_deg=3,
                         profile_range_m=5.0)
            res = scan(scene, st, model, np.random.default_rng(3))
            rays = _ray_grid(st)
            t, _ = wall.intersect(st.origin, rays)
            fractions.append((res.kind == KIND_MACHINE).sum() / np.isfinite(t).sum())
        assert fractions[0] > 0.95 and fractions[1] < 0.05, (refl, fractions)


def test_box_occludes_the_ground_behind_it():
    box = Box.standing(12.0, 0.0, 0.0, (4.0, 3.0, 2.5), 30.0, kind=KIND_MACHINE)
    scene = Scene(lambda x, y: np.zeros(np.shape(x)), lambda x, y: (np.zeros(np.shape(x), int), np.full(np.shape(x), 0.5)),
                  solids=[box])
    st = Station("B", 0.0, 0.0, 1.5, az_step_deg=0.3, el_step_deg=0.3, el_min_deg=-30, el_max_deg=20, profile_range_m=40)
    res = scan(scene, st, EXACT)
    rot = np.asarray(box.rotation)
    half = np.asarray(box.half)
    local = (res.xyz - np.asarray(box.center)) @ rot
    m = res.kind == KIND_MACHINE
    assert m.sum() > 100
    # Machine points on a face: inside the box and on its boundary along one axis.
    assert np.all(np.abs(local[m]) <= half + 1e-6)
    assert np.all(np.min(np.abs(np.abs(local[m]) - half), axis=1) < 1e-6)
    # Ground points: nothing of the segment from the scanner to the point lies inside the box.
    # (only ground points in the box's direction can be behind it)
    g = (res.kind == KIND_PAD) & (np.abs(np.degrees(np.arctan2(res.xyz[:, 1], res.xyz[:, 0]))) < 25.0)
    assert g.sum() > 1000
    f = np.linspace(0.0, 0.999, 300)
    seg = st.origin + f[None, :, None] * (res.xyz[g][:, None, :] - st.origin)
    seg_local = (seg - np.asarray(box.center)) @ rot
    inside = np.all(np.abs(seg_local) < half - 1e-6, axis=2)
    assert not inside.any()
    # And the box casts a shadow: no ground points right behind it.
    behind = (np.abs(res.xyz[g, 1]) < 0.5) & (res.xyz[g, 0] > 14.5) & (res.xyz[g, 0] < 20.0)
    assert behind.sum() == 0


def test_station_frame_round_trips_with_the_contract_pose():
    # The site contract: p_site = R p_scanner + t with R = Rz(yaw) Ry(pitch) Rx(roll), which is
    # scipy's Rotation.from_euler("ZYX", [yaw, pitch, roll], degrees=True).
    from scipy.spatial.transform import Rotation

    st = Station("P", 10.0, -4.0, 2.2, yaw_deg=123.4, pitch_deg=0.7, roll_deg=-1.3)
    rot = Rotation.from_euler("ZYX", [st.yaw_deg, st.pitch_deg, st.roll_deg], degrees=True).as_matrix()
    assert np.allclose(station_rotation(st.yaw_deg, st.pitch_deg, st.roll_deg), rot)
    pts = np.random.default_rng(1).normal(size=(50, 3)) * 20
    back = to_station_frame(pts, st) @ rot.T + st.origin
    assert np.allclose(back, pts)


def test_raster_scene_reproduces_a_plane_exactly():
    from inventory._demo.simulate import raster_scene

    # Bilinear interpolation reproduces any plane exactly, so the scan must land on it.
    cell, west, north = 0.5, -40.0, 40.0
    xs = west + (np.arange(160) + 0.5) * cell
    ys = north - (np.arange(160) + 0.5) * cell
    X, Y = np.meshgrid(xs, ys)
    plane = 2.0 + 0.02 * X - 0.015 * Y
    pile = (np.hypot(X - 10, Y) < 5).astype(int)
    scene = raster_scene(plane, west, north, cell, pile=pile, reflectivity=0.4)
    st = Station("R", 0.0, 0.0, 4.0, az_step_deg=1.0, el_step_deg=0.5, el_min_deg=-40, el_max_deg=0,
                 profile_range_m=35.0)
    res = scan(scene, st, EXACT)
    inside = (np.abs(res.xyz[:, 0]) < 39.5) & (np.abs(res.xyz[:, 1]) < 39.5)
    assert inside.sum() > 5000
    p = res.xyz[inside]
    assert np.allclose(p[:, 2], 2.0 + 0.02 * p[:, 0] - 0.015 * p[:, 1], atol=1e-6)
    labelled = res.kind[inside] == KIND_PILE
    assert np.all(np.hypot(p[labelled, 0] - 10, p[labelled, 1]) < 5 + cell)
    assert labelled.sum() > 50
