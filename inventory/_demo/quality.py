"""The survey step's results on the sample site against the simulator's truth.

The sample site (:func:`inventory._demo.write_sample_site`) keeps, beside the inputs a user
gets, what the simulator knows: the kind of every scanned point (``truth/labels-<date>.npz``),
the true surface (``truth/surface-<date>.tif``) and every pile's true volume
(``truth.json``). These functions compare a survey's classified cloud, surface and volumes
with them; the tests and ``bench/bench_quality.py`` use them. The tool itself never reads the
truth.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from inventory.model.classes import GROUND

__all__ = ["ObjectQuality", "SurveyQuality", "sample_labels", "surface_rms", "survey_quality", "truth_of"]

#: Code of a point dropped by a range gate (not in the classified cloud).
DROPPED = 255


def truth_of(site_root: "str | Path") -> dict[str, Any]:
    """The sample site's ``truth.json``."""
    return json.loads((Path(site_root) / "truth.json").read_text())


def sample_labels(site: Any, date: str, classified_path: "str | Path") -> tuple[np.ndarray, np.ndarray]:
    """Truth kind of every input point of survey ``date`` and the class it got in the
    classified cloud (:data:`DROPPED` where a range gate dropped it).

    Points are matched file by file: each sample file has its own point source id, and a
    point is found again within 2 mm in 3D after its station pose is applied.
    """
    labels, classes = _labelled(site, date, classified_path, ("kind",))
    return labels["kind"], classes


def _labelled(site: Any, date: str, classified_path: "str | Path",
              fields: tuple[str, ...]) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """The truth arrays ``fields`` (``kind``, ``pile``, ``object``; ``xyz``: the points'
    coordinates in the site CRS) of every input point of survey ``date`` and the class each
    got, as in :func:`sample_labels`."""
    import laspy
    from scipy.spatial import cKDTree

    from inventory.io.clouds import read_cloud
    from inventory.survey.placement import poses_from_stations

    ref = site.surveys[date]
    poses = poses_from_stations(ref.stations, ref.folder / "stations.csv") if ref.stations is not None else {}
    ids = dict(zip(ref.stations["file"], ref.stations["station_id"])) if ref.stations is not None else {}
    npz = np.load(Path(site.root) / "truth" / f"labels-{date}.npz")
    las = laspy.read(classified_path)
    out_xyz = np.column_stack([las.x, las.y, las.z])
    out_src = np.asarray(las.point_source_id)
    out_cls = np.asarray(las.classification)
    labels: dict[str, list] = {f: [] for f in fields}
    classes = []
    xyz = []
    for path in ref.files:
        pts, _ = read_cloud(path, default_crs=site.config.survey.default_crs)
        pose = poses.get(path.name)
        if pose is not None:
            pts["X"], pts["Y"], pts["Z"], _ = pose.apply(pts["X"], pts["Y"], pts["Z"])
        sid = ids.get(path.name, path.stem)
        if "xyz" in fields:
            xyz.append(np.column_stack([pts["X"], pts["Y"], pts["Z"]]))
        for f in fields:
            if f == "xyz":
                continue
            arr = npz[f"{sid}_{f}"]
            if len(arr) != len(pts):
                raise ValueError(f"{path}: {len(pts)} points, truth labels {len(arr)}")
            labels[f].append(arr)
        mine = np.isin(out_src, np.unique(pts["PointSourceId"]))
        got = np.full(len(pts), DROPPED, np.uint8)
        if mine.any():
            d, j = cKDTree(np.column_stack([pts["X"], pts["Y"], pts["Z"]])).query(out_xyz[mine],
                                                                                 distance_upper_bound=0.002)
            ok = np.isfinite(d)
            got[j[ok]] = out_cls[mine][ok]
        classes.append(got)
    out = {f: np.concatenate(v) for f, v in labels.items() if f != "xyz"}
    if "xyz" in fields:
        out["xyz"] = np.concatenate(xyz)
    return out, np.concatenate(classes)


def surface_rms(site_root: "str | Path", date: str, surface: Any) -> tuple[float, int, int]:
    """RMS (m) of the survey's surface against the true surface on scanned cells, the
    number of cells compared, and the number left out beside true steps.

    Cells beside a step in the true surface steeper than any face (70 deg over one cell: a
    bay wall's face) hold two true heights; which one a few points near the cell edge pick
    is chance, so they are left out.
    """
    from inventory.io.rasters import read_raster

    true_z, tg = read_raster(Path(site_root) / "truth" / f"surface-{date}.tif")
    if not tg.aligned_with(surface.grid):
        raise ValueError(f"true surface of {date} is not on the survey's grid")
    cx, cy = surface.grid.centers()
    r, c, inside = tg.index(cx, cy)
    ref = np.full(surface.grid.shape, np.nan)
    ref[inside] = true_z[r[inside], c[inside]]
    covered = surface.scanned & np.isfinite(ref)
    step = np.tan(np.radians(70.0)) * surface.grid.cell + 0.3
    beside = np.zeros(surface.grid.shape, bool)
    for a, b in (((slice(None), slice(1, None)), (slice(None), slice(None, -1))),
                 ((slice(1, None), slice(None)), (slice(None, -1), slice(None)))):
        with np.errstate(invalid="ignore"):
            jump = np.abs(ref[a] - ref[b]) > step
        beside[a] |= jump
        beside[b] |= jump
    left_out = int((beside & covered).sum())
    covered &= ~beside
    rms = float(np.sqrt(np.mean((surface.z - ref)[covered] ** 2))) if covered.any() else float("nan")
    return rms, int(covered.sum()), left_out


#: Height above the true surface (m) within which a machine's or vehicle's return classed
#: surface is counted "at the ground" in :class:`SurveyQuality`: the classifier's
#: ``tolerance`` (0.1 m) and a margin for the true raster's 0.5 m cells on a gentle slope.
AT_GROUND_M = 0.15


@dataclass
class ObjectQuality:
    """One solid object of a survey (a machine, vehicle or structure of the truth's
    ``objects``): its points and how many of them were classed surface."""

    name: str
    kind: str
    points: int
    surface: int

    def __str__(self) -> str:
        share = 100 * self.surface / self.points if self.points else 0.0
        return f"{self.name} ({self.kind}): {self.surface} of {self.points} points classed surface ({share:.1f} %)"


@dataclass
class SurveyQuality:
    """Classification and surface of one sample survey against the truth."""

    date: str
    objects_out: float        # share of machine and vehicle points not classed surface
    pile_dropped: float       # share of pile points not classed surface (dropped by a gate too)
    surface_rms_m: float
    cells: int
    cells_left_out: int
    objects: list[ObjectQuality] = field(default_factory=list)  # per solid object
    #: share of machine and vehicle points classed surface that lie within
    #: :data:`AT_GROUND_M` of the true surface (the foot of a face: no height can tell them
    #: from the ground, and they do not lift the surface)
    objects_at_ground: float = float("nan")

    def __str__(self) -> str:
        at = ("none in it" if math.isnan(self.objects_at_ground) else
              f"{100 * self.objects_at_ground:.0f} % of those in it within {100 * AT_GROUND_M:.0f} cm of the "
              "true surface")
        return (f"{self.date}: machines and vehicles out of the surface class {100 * self.objects_out:.2f} % "
                f"({at}), "
                f"pile points not surface {100 * self.pile_dropped:.3f} %, surface RMS "
                f"{100 * self.surface_rms_m:.2f} cm on {self.cells:,} cells ({self.cells_left_out} beside true "
                f"steps left out)")


def survey_quality(site: Any, date: str, result: Any) -> SurveyQuality:
    """:class:`SurveyQuality` of a :func:`~inventory.survey.measure.measure_survey` result
    (with its classified cloud written) of the sample site."""
    truth = truth_of(site.root)
    codes = {v: int(k) for k, v in truth["label_codes"]["kind"].items()}
    labels, cls = _labelled(site, date, result.classified_path, ("kind", "object", "xyz"))
    kind, oid = labels["kind"], labels["object"]
    objects = np.isin(kind, [codes["machine"], codes["vehicle"]])
    pile = kind == codes["pile"]
    rms, cells, left = surface_rms(site.root, date, result.surface)
    solid = np.isin(kind, [codes["structure"], codes["machine"], codes["vehicle"]])
    per_object = []
    for o in next((s.get("objects", []) for s in truth["surveys"] if s["date"] == date), []):
        mine = solid & (oid == o["id"])
        per_object.append(ObjectQuality(o["name"], truth["label_codes"]["kind"][str(o["kind"])], int(mine.sum()),
                                        int((cls[mine] == GROUND).sum())))
    leaked = objects & (cls == GROUND)
    at_ground = float("nan")
    if leaked.any():
        from inventory.io.rasters import read_raster

        true_z, tg = read_raster(Path(site.root) / "truth" / f"surface-{date}.tif")
        p = labels["xyz"][leaked]
        r, c, inside = tg.index(p[:, 0], p[:, 1])
        above = np.full(len(p), np.inf)
        above[inside] = p[inside, 2] - true_z[r[inside], c[inside]]
        at_ground = float((above <= AT_GROUND_M).mean())
    return SurveyQuality(date, float((cls[objects] != GROUND).mean()), float((cls[pile] != GROUND).mean()),
                         rms, cells, left, per_object, at_ground)
