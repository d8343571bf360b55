"""Registration by control points: the least-squares similarity fit against PROJ's Helmert
operation, weights, and refusals (too few points, a line of points, points that disagree)."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import Transformer

from inventory.errors import InputError, InputErrors
from inventory.model.similarity import fit_similarity
from inventory.site.control import read_control
from inventory.site.load import check_site, load_site

RNG = np.random.default_rng(18)


def _local_points(n: int = 8) -> np.ndarray:
    return np.column_stack([RNG.uniform(-300, 300, n), RNG.uniform(-300, 300, n), RNG.uniform(-5, 40, n)])


def test_7_parameter_fit_recovers_proj_helmert():
    # Independent implementation: PROJ's Helmert operation through pyproj (position-vector
    # convention, exact rotation matrix); the fit must recover its seven parameters.
    pipeline = ("+proj=helmert +x=486250.25 +y=5734100.5 +z=12.75 +rx=30 +ry=-45 +rz=108000 "
                "+s=150 +convention=position_vector +exact")
    helmert = Transformer.from_pipeline(pipeline)
    p = _local_points()
    q = np.column_stack(helmert.transform(p[:, 0], p[:, 1], p[:, 2]))
    fit = fit_similarity(p, q, model="7-parameter")
    origin = np.array(helmert.transform(0.0, 0.0, 0.0))
    # PROJ's linear part, column by column from the unit vectors
    linear = np.column_stack([np.array(helmert.transform(*e)) - origin for e in np.eye(3)])
    np.testing.assert_allclose(fit.translation, [486250.25, 5734100.5, 12.75], atol=1e-6)
    assert fit.scale == pytest.approx(1 + 150e-6, abs=1e-10)
    np.testing.assert_allclose(fit.scale * fit.rotation, linear, atol=1e-9)
    assert fit.yaw_deg == pytest.approx(30.0, abs=0.01)  # rz = 108000" = 30 degrees
    check = _local_points(20)
    np.testing.assert_allclose(fit.apply_xyz(check), np.column_stack(helmert.transform(*check.T)), atol=1e-6)


def test_4_plus_1_fit_recovers_proj_2d_helmert_and_height_shift():
    # Independent implementation: PROJ's 2-D Helmert (+theta in arc seconds, +s the scale
    # factor as PROJ applies it in the 2-D form) followed by an affine height offset.
    pipeline = ("+proj=pipeline +step +proj=helmert +x=486250.25 +y=5734100.5 +theta=-7200 +s=1.0003 "
                "+step +proj=affine +zoff=-3.25")
    proj = Transformer.from_pipeline(pipeline)
    p = _local_points()
    q = np.column_stack(proj.transform(p[:, 0], p[:, 1], p[:, 2]))
    fit = fit_similarity(p, q, model="4+1")
    assert fit.scale == pytest.approx(1.0003, abs=1e-10)
    # PROJ's positive theta turns clockwise, ours counter-clockwise (checked on the points below)
    assert fit.yaw_deg == pytest.approx(2.0, abs=1e-9)
    assert fit.translation[2] == pytest.approx(-3.25, abs=1e-9)
    check = _local_points(20)
    np.testing.assert_allclose(fit.apply_xyz(check), np.column_stack(proj.transform(*check.T)), atol=1e-6)
    # heights are shifted, never scaled or tilted
    np.testing.assert_allclose(fit.apply_xyz(check)[:, 2], check[:, 2] - 3.25, atol=1e-9)


def test_weights_follow_sigma():
    p = _local_points(6)
    q = p + [500000.0, 5700000.0, 10.0]
    q[0] += [0.05, -0.04, 0.03]          # one poorly measured point
    tight = fit_similarity(p, q, weights=[1 / 0.05 ** 2] + [1 / 0.002 ** 2] * 5)
    equal = fit_similarity(p, q)
    r_tight = q - tight.apply_xyz(p)
    r_equal = q - equal.apply_xyz(p)
    # down-weighted, the bad point keeps its error and the others fit closer
    assert np.linalg.norm(r_tight[1:], axis=1).max() < np.linalg.norm(r_equal[1:], axis=1).max()
    assert np.linalg.norm(r_tight[0]) > np.linalg.norm(r_equal[0])


def test_fit_refuses_lines_and_too_few_points():
    with pytest.raises(ValueError, match="at least 3"):
        fit_similarity(np.eye(3)[:2], np.eye(3)[:2])
    line = np.column_stack([np.arange(5.0), np.zeros(5), np.zeros(5)])
    with pytest.raises(ValueError, match="one line"):
        fit_similarity(line, line + 100)
    # the 4+1 model fixes its rotation from horizontal positions alone: a line will do
    assert fit_similarity(line, line + 100, model="4+1").scale == pytest.approx(1.0)


CONTROL = "point_id,x,y,z,e,n,h,sigma_m\n"


def _control_rows(p, q, sigma=None):
    rows = [CONTROL.strip()]
    for i, (a, b) in enumerate(zip(p, q)):
        s = "" if sigma is None else f"{sigma[i]}"
        rows.append(f"CP{i + 1},{a[0]:.4f},{a[1]:.4f},{a[2]:.4f},{b[0]:.4f},{b[1]:.4f},{b[2]:.4f},{s}")
    return "\n".join(rows) + "\n"


def test_read_control_reports_residuals(tmp_path):
    p = _local_points(5)
    q = p + [500000.0, 5700000.0, 10.0]
    q[2, 0] += 0.02
    path = tmp_path / "control.csv"
    path.write_text(_control_rows(p, q))
    reg = read_control(path)
    assert reg.point_ids == ["CP1", "CP2", "CP3", "CP4", "CP5"]
    assert reg.worst[0] == "CP3"
    assert reg.rms_m == pytest.approx(np.sqrt((reg.residuals ** 2).sum(axis=1).mean()))
    assert 0.005 < reg.rms_m < 0.02
    d = reg.as_dict()
    assert d["model"] == "7-parameter" and len(d["points"]) == 5 and d["points"][2]["point_id"] == "CP3"
    assert reg.summary().startswith("control.csv: 7-parameter fit on 5 points, RMS 0.0")


def _site_with_control(good_site, text: str, toml_extra: str = ""):
    survey = good_site / "surveys" / "2026-10-31"
    (survey / "control.csv").write_text(text)
    if toml_extra:
        with open(good_site / "site.toml", "a") as f:
            f.write(toml_extra)
    return survey / "control.csv"


def test_disagreeing_control_points_are_refused(good_site):
    p = _local_points(4)
    q = p + [500000.0, 5700000.0, 10.0]
    q[3] += [0.4, -0.3, 0.2]
    _site_with_control(good_site, _control_rows(p, q))
    report = check_site(good_site)
    errors = [str(e) for e in report.errors]
    assert len(errors) == 1
    line = errors[0]
    # the line and the coordinates of the worst point (CP3, the third data row)
    assert line.startswith("site/surveys/2026-10-31/control.csv line 4: e, n, h: control points disagree: "
                           "7-parameter fit RMS ")
    assert "exceeds the tolerance 0.050 m" in line and "\n" not in line
    with pytest.raises(InputErrors):
        load_site(good_site)


def test_tolerance_and_model_come_from_site_toml(good_site):
    # the survey's frame is nearly the site's here (its cloud carries site coordinates)
    p = _local_points(4) * 0.1 + [500010.0, 5700000.0, 10.0]
    q = p + [0.25, -0.1, 0.05]
    q[3] += [0.04, -0.03, 0.02]
    _site_with_control(good_site, _control_rows(p, q),
                       '\n[survey]\ncontrol_model = "4+1"\ncontrol_rms_max_m = 0.5\n')
    site = load_site(good_site)
    reg = site.surveys["2026-10-31"].control
    assert reg.transform.model == "4+1" and reg.tolerance_m == 0.5 and reg.rms_m > 0.01


def test_too_few_control_points_are_refused(good_site):
    p = _local_points(2)
    _site_with_control(good_site, _control_rows(p, p + 100))
    errors = [str(e) for e in check_site(good_site).errors]
    assert errors == ["site/surveys/2026-10-31/control.csv: 2 usable control point(s); at least 3 are needed "
                      "to register the survey"]


def test_read_control_raises_without_problem_list(tmp_path):
    path = tmp_path / "control.csv"
    path.write_text(CONTROL + "A,0,0,0,1,1,x,\n")
    with pytest.raises(InputErrors) as err:
        read_control(path)
    assert "line 2: h" in str(err.value)
    line = np.column_stack([np.arange(4.0), np.zeros(4), np.zeros(4)])
    path.write_text(_control_rows(line, line + 10))
    with pytest.raises(InputError, match="cannot fix a 7-parameter transform: the points lie on one line"):
        read_control(path)


def test_multi_scan_e57_registered_only_by_control_points(good_site, write_e57):
    import warnings

    from pyproj import CRS
    from scipy.spatial.transform import Rotation

    from inventory.io.crs import TransformerCache
    from inventory.model.similarity import Similarity
    from inventory.survey.placement import ControlPlacement, survey_placements

    rng = np.random.default_rng(99)
    folder = good_site / "surveys" / "2026-10-31"
    (folder / "a.laz").unlink()
    (folder / "stations.csv").unlink()
    # the truth: the scanner's project frame -> site, a 7-parameter similarity
    truth = Similarity("7-parameter", Rotation.from_euler("ZYX", [35.0, 0.02, -0.01], degrees=True).as_matrix(),
                       1.0002, np.array([500000.0, 5700000.0, 10.0]))
    scans, project = [], []
    for i in range(3):   # three scans, each in its own frame, posed in the project frame
        pts = np.column_stack([rng.uniform(-15, 45, 2000), rng.uniform(-15, 15, 2000), rng.uniform(0, 5, 2000)])
        rot = Rotation.from_euler("ZYX", [120.0 * i + 10, 1.5, -2.0], degrees=True)
        origin = np.array([10.0 * i, 3.0 - 2 * i, 1.6])
        x, y, z, w = rot.as_quat()
        scans.append(dict(xyz=rot.inv().apply(pts - origin), pose=([w, x, y, z], origin), name=f"st{i + 1}"))
        project.append(pts)
    write_e57(folder / "project.e57", scans)      # no coordinateMetadata: a local frame
    # control targets around the scanned area, measured in the site with 4 mm noise
    cp = np.array([[-20.0, -20, 0], [50, -20, 1], [50, 20, 3], [-20, 20, 2], [15, 0, 6]])
    site_cp = truth.apply_xyz(cp) + rng.normal(0, 0.004, cp.shape)
    (folder / "control.csv").write_text(_control_rows(cp, site_cp, sigma=[0.005] * 5))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # no stations.csv times: the default instant
        site = load_site(good_site)
    reg = site.surveys["2026-10-31"].control
    assert reg is not None and 0.001 < reg.rms_m < 0.01
    (placement,) = survey_placements(site, site.surveys["2026-10-31"], CRS(site.crs), TransformerCache())
    assert isinstance(placement, ControlPlacement)
    with placement.open(chunk_size=1000) as cloud:
        placed = np.concatenate([placement.place(c) for c in cloud.chunks()])
    got = np.column_stack([placed["X"], placed["Y"], placed["Z"]])
    want = truth.apply_xyz(np.concatenate(project))
    err = np.linalg.norm(got - want, axis=1)
    # every point within the control fit's own RMS of where it truly lies
    assert np.sqrt((err ** 2).mean()) < reg.rms_m and err.max() < 2 * reg.rms_m
    x0, y0, x1, y1 = placement.extent()
    assert x0 <= got[:, 0].min() and got[:, 0].max() <= x1 and y0 <= got[:, 1].min() and got[:, 1].max() <= y1


def test_survey_summary_names_the_control_fit(good_site, write_e57, tmp_path):
    import warnings

    from inventory.survey.measure import measure_survey

    rng = np.random.default_rng(7)
    folder = good_site / "surveys" / "2026-10-31"
    (folder / "a.laz").unlink()
    (folder / "stations.csv").unlink()
    # a flat yard with a cone, scanned in a frame 1000 m east and 2 m up of the site's
    x, y = rng.uniform(-15, 45, 20000), rng.uniform(-15, 15, 20000)
    z = 10.0 + np.clip(4.0 - 0.5 * np.hypot(x, y), 0, None)
    pts = np.column_stack([x - 1000.0, y, z + 2.0])
    write_e57(folder / "yard.e57", [dict(xyz=pts - [-990.0, 0, 2], pose=([1, 0, 0, 0], [-990.0, 0.0, 2.0]))])
    cp = np.array([[-1020.0, -20, 12], [-950, -20, 12], [-950, 20, 12], [-1020, 20, 12.5]])
    site_cp = cp + [1000.0 + 500000.0, 5700000.0, -2.0]
    site_cp[0, 0] += 0.006
    (folder / "control.csv").write_text(_control_rows(cp, site_cp))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        site = load_site(good_site)
        result = measure_survey(site, "2026-10-31", out_dir=tmp_path / "out")
    assert result.registration is site.surveys["2026-10-31"].control
    assert result.format_summary().endswith(f"; registered by {result.registration.summary()}")
    assert "control.csv: 7-parameter fit on 4 points, RMS 0.00" in result.format_summary()
    # the surface lies where the site is: the cone's top near the site origin
    s = result.surface
    assert s.grid.west < 500000.0 < s.grid.west + s.grid.ncols * s.grid.cell


def test_residuals_reach_the_manifest_and_the_report(close_result, tmp_path):
    import dataclasses
    import json

    from inventory.export.manifest import manifest_dict
    from inventory.export.report import report_html

    p = _local_points(4)
    q = p + [500000.0, 5700000.0, 10.0]
    q[1, 1] += 0.012
    path = tmp_path / "control.csv"
    path.write_text(_control_rows(p, q))
    reg = read_control(path)
    result = dataclasses.replace(close_result, run={**(close_result.run or {}),
                                                    "survey_registration": reg.as_dict()})
    manifest = json.loads(json.dumps(manifest_dict(result)))
    got = manifest["other"]["survey_registration"]
    assert got["rms_m"] == pytest.approx(reg.rms_m) and [pt["point_id"] for pt in got["points"]] == reg.point_ids
    page = report_html(result)
    assert "<h2>Registration by control points</h2>" in page
    assert f"RMS {reg.rms_m:.3f} m (tolerance 0.050 m)" in page
    assert "CP2" in page
    assert "Registration by control points" not in report_html(close_result)


def test_a_close_with_disagreeing_control_writes_nothing(good_site):
    from inventory.close import close_period

    p = _local_points(4) * 0.1 + [500010.0, 5700000.0, 10.0]
    q = p.copy()
    q[2] += [0.3, 0.3, -0.2]
    _site_with_control(good_site, _control_rows(p, q))
    before = sorted(x.relative_to(good_site) for x in good_site.rglob("*"))
    with pytest.raises(InputErrors) as err:
        close_period(good_site, "2026-10")
    assert "site/surveys/2026-10-31/control.csv line 4: e, n, h: control points disagree" in str(err.value)
    assert sorted(x.relative_to(good_site) for x in good_site.rglob("*")) == before
