"""Point cloud pipelines written as PDAL pipeline JSON, run by PDAL or by our own runner.

A pipeline is a list of stages (``{"pipeline": [...]}`` or a bare list), exactly as PDAL
reads it. :meth:`Pipeline.run` uses PDAL's Python bindings (``import pdal``) when they are
importable and ``engine="auto"``; otherwise our runner executes the stages below with
PDAL's option names and semantics. An unknown stage or option is a
:class:`~inventory.errors.PipelineError`, never ignored.

Stages of the built-in runner (options; PDAL defaults unless noted)
-------------------------------------------------------------------
``readers.las``, ``readers.copc``
    filename (required), override_srs, default_srs, spatialreference (= override_srs); the
    standard dimensions only (extra bytes dimensions are carried by the survey step's own
    reading, not by a pipeline's reader).
``filters.range``
    limits (required): ``"Z[0:50],Classification![7:7]"``; OR within a dimension, AND
    across dimensions; ``StationRange`` (ours) is the distance from the scanner in metres,
    NaN for clouds with no station, which passes only negated ranges.
``filters.outlier``
    method (statistical | radius), mean_k 8, multiplier 2.0, radius 1.0, min_k 2, class 7,
    threads (accepted, the runner uses all cores).
``filters.elm``
    cell 10.0, threshold 1.0, class 7.
``filters.csf``
    resolution 1.0, rigidness 3, step 0.65, threshold 0.5, smooth true, iterations 500,
    ignore (ranges), returns ["last", "only"], ground_class 2, other_class 1, only_ground
    false; hdiff only at its default 0.3 (the cloth-simulation-filter package has no such
    setting).
``filters.assign``
    assignment (``"Classification[:]=0"``, list allowed), condition (one range), value
    (only the ``"Dim = number"`` form, no WHERE clause).
``filters.crop``
    polygon (WKT, list allowed), bounds (``"([xmin, xmax], [ymin, ymax])"``), outside
    false, a_srs (CRS of polygon/bounds, default the cloud's).
``filters.reprojection``
    out_srs (required), in_srs (default the cloud's CRS).
``writers.las``
    filename (required), a_srs, minor_version 4, dataformat_id 6, compression,
    scale_x/y/z (0.001 here, not PDAL's 0.01), offset_x/y/z; the standard dimensions only.

A stage function ``_stage(stage, pts, ctx)`` returns the points after the stage; it may change
``pts`` in place (:meth:`Pipeline.run` works on its own copy of the caller's points).

Every stage also takes PDAL's ``tag`` and ``user_data``; ``inputs`` may only name the
stage just before (pipelines here are linear).

Our own stages (not PDAL stages)
--------------------------------
``inventory.voxel_thin``
    cell 0.05, max_points 4: at most ``max_points`` points per voxel of ``cell`` metres,
    the lowest and the highest always kept (:func:`~inventory.survey.clean.voxel_thin`);
    the points dropped leave the cloud and are counted in the survey's summary line. Off
    unless a pipeline names it (``pipelines/stockpile-thin.json``); see
    docs/classifier.md for when to use it.
``inventory.slope_ground``
    The stockyard ground classifier of :mod:`inventory.survey.ground`; options
    max_slope_deg 50, tolerance 0.1, cell 0.25, window 12, overhead_gap 2.0,
    face_slope_deg 70, face_attached 0.5, max_top_area 400, wall_reach 5 (0: no wall
    rule), ignore ``"Classification[7:7],Classification[18:18]"``. Its ``inventory.`` prefix
    marks it as ours: with the PDAL engine the pipeline is cut around it, the PDAL stages
    run in PDAL and this one in our runner.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from typing import Any, Callable

import numpy as np
from pyproj import CRS

from inventory.errors import PipelineError, Problem
from inventory.model.classes import GROUND, LOW_NOISE, UNCLASSIFIED
from inventory.survey.clean import (
    DimRange,
    elm_low_points,
    find_dimension,
    limits_mask,
    parse_limits,
    statistical_outliers,
    voxel_thin,
)
from inventory.io.crs import TransformerCache, parse_crs
from inventory.survey.ground import PlanTable, SlopeGroundParams, csf_ground, plan_table, slope_ground
from inventory.io.clouds import conform_points, empty_points, read_cloud, write_cloud

__all__ = ["Pipeline", "Stage", "STAGES", "load_pipeline", "pdal_available", "pipeline_problems", "OUR_PREFIX"]

#: Stages whose type starts with this are ours and never handed to PDAL.
OUR_PREFIX = "inventory."
_COMMON = {"type", "tag", "user_data", "inputs"}


def pdal_available() -> bool:
    """True when PDAL's Python bindings import."""
    try:
        import pdal  # noqa: F401
    except Exception:  # ImportError, or a broken libpdal raising OSError
        return False
    return True


@dataclass
class _Context:
    crs: CRS | None
    transformers: TransformerCache = field(default_factory=TransformerCache)
    #: x and y of the points each ``inventory.voxel_thin`` stage dropped
    thinned: list[np.ndarray] = field(default_factory=list)
    #: a later stage is ``inventory.slope_ground`` (an outlier stage then makes its
    #: neighbour table, :func:`~inventory.survey.ground.plan_table`, and uses it too)
    surface_later: bool = False
    #: (x, y, table): that table and the coordinates it was made of
    plan: "tuple[np.ndarray, np.ndarray, PlanTable] | None" = None

    def plan_for(self, pts: np.ndarray) -> "PlanTable | None":
        """The neighbour table of an earlier stage, if it was made of these very x and y."""
        if self.plan is None:
            return None
        x, y, table = self.plan
        if len(x) == len(pts) and np.array_equal(x, pts["X"]) and np.array_equal(y, pts["Y"]):
            return table
        return None


@dataclass(frozen=True)
class _Spec:
    kind: str                       # reader | filter | writer
    options: dict[str, Any]         # name -> default (``_REQUIRED`` when required)
    run: Callable[..., np.ndarray] | None


_REQUIRED = object()


@dataclass
class Stage:
    """One stage of a pipeline: its PDAL type and options (defaults filled in)."""

    type: str
    options: dict[str, Any]
    index: int
    raw: dict[str, Any]

    @property
    def kind(self) -> str:
        return STAGES[self.type].kind

    @property
    def ours(self) -> bool:
        return self.type.startswith(OUR_PREFIX)


# ---------------------------------------------------------------------------- helpers

def _as_bool(v: Any, name: str) -> bool:
    if isinstance(v, bool):
        return v
    if isinstance(v, str) and v.lower() in ("true", "false"):
        return v.lower() == "true"
    raise PipelineError(f"option {name!r} must be true or false, got {v!r}")


def _as_float(v: Any, name: str) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError) as err:
        raise PipelineError(f"option {name!r} must be a number, got {v!r}") from err
    if not math.isfinite(f):
        raise PipelineError(f"option {name!r} must be finite, got {v!r}")
    return f


def _as_int(v: Any, name: str) -> int:
    f = _as_float(v, name)
    if f != int(f):
        raise PipelineError(f"option {name!r} must be a whole number, got {v!r}")
    return int(f)


def _as_list(v: Any) -> list[str]:
    if isinstance(v, list):
        return [str(s) for s in v]
    return [str(v)]


def _ranges(v: Any) -> list[DimRange]:
    out: list[DimRange] = []
    for item in _as_list(v):
        out += parse_limits(item)
    return out


def _class(v: Any, name: str) -> int:
    c = _as_int(v, name)
    if not 0 <= c <= 255:
        raise PipelineError(f"option {name!r} must be a class 0-255, got {v!r}")
    return c


# ---------------------------------------------------------------------------- stages

def _read_las(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    override = o["override_srs"] or o["spatialreference"]
    data, crs = read_cloud(o["filename"], default_crs=o["default_srs"] or None)
    data = conform_points(data, ())    # the standard dimensions: files may differ in extra ones
    if override:
        crs = parse_crs(override, where=o["filename"], field="override_srs")
    if ctx.crs is None:
        ctx.crs = crs
    elif crs is not None and not crs.equals(ctx.crs):
        data["X"], data["Y"], data["Z"] = ctx.transformers.get(crs, ctx.crs)(data["X"], data["Y"], data["Z"])
    return np.concatenate([pts, data]) if len(pts) else data


def _range(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    keep = limits_mask(pts, _ranges(stage.options["limits"]))
    return pts if keep.all() else pts[keep]   # no copy of the points when the gate drops none


def _outlier(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    method = str(o["method"]).lower()
    xyz = np.column_stack([pts["X"], pts["Y"], pts["Z"]])
    if method == "statistical":
        table = None
        if ctx.surface_later:   # the surface stage's neighbours serve this stage too
            table = ctx.plan_for(pts)
            if table is None:
                table = plan_table(pts["X"], pts["Y"])
                ctx.plan = (pts["X"].copy(), pts["Y"].copy(), table)
        bad = statistical_outliers(xyz, _as_int(o["mean_k"], "mean_k"), _as_float(o["multiplier"], "multiplier"),
                                   plan=table.plan.nb if table is not None else None,
                                   plan_index=table.plan.index if table is not None else None,
                                   order=table.order if table is not None else None)
    elif method == "radius":
        from scipy.spatial import cKDTree

        from inventory.parallel import job_threads
        n = cKDTree(xyz).query_ball_point(xyz, _as_float(o["radius"], "radius"), return_length=True, workers=job_threads())
        bad = n <= _as_int(o["min_k"], "min_k")
    else:
        raise PipelineError(f"filters.outlier method must be 'statistical' or 'radius', got {o['method']!r}")
    if bad.all():  # PDAL leaves the view unchanged rather than mark every point
        return pts
    pts["Classification"][bad] = _class(o["class"], "class")
    return pts


def _elm(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    low = elm_low_points(pts["X"], pts["Y"], pts["Z"], _as_float(o["cell"], "cell"),
                         _as_float(o["threshold"], "threshold"))
    pts["Classification"][low] = _class(o["class"], "class")
    return pts


def _returns_mask(pts: np.ndarray, wanted: list[str]) -> np.ndarray:
    rn, nr = pts["ReturnNumber"].astype(int), pts["NumberOfReturns"].astype(int)
    if not wanted or ((rn == 0).all() and (nr == 0).all()):
        return np.ones(len(pts), bool)
    if ((rn == 0) | (nr == 0)).any():
        raise PipelineError("filters.csf: some NumberOfReturns or ReturnNumber values are 0, but not all")
    sel = np.zeros(len(pts), bool)
    for w in wanted:
        w = w.strip()
        if w == "only":
            sel |= nr == 1
        elif w == "first":
            sel |= (rn == 1) & (nr > 1)
        elif w == "last":
            sel |= (rn == nr) & (nr > 1)
        elif w == "intermediate":
            sel |= (rn > 1) & (rn < nr)
        else:
            raise PipelineError(f"filters.csf: unrecognised 'returns' value {w!r}")
    return sel


def _csf(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    if _as_float(o["hdiff"], "hdiff") != 0.3:
        raise PipelineError("filters.csf option 'hdiff' can only take its default 0.3 here: the "
                            "cloth-simulation-filter package does not expose it")
    keep = np.ones(len(pts), bool)
    if o["ignore"]:
        keep &= ~limits_mask(pts, _ranges(o["ignore"]))
    keep &= _returns_mask(pts, _as_list(o["returns"]) if o["returns"] else [])
    if not keep.any():
        raise PipelineError("filters.csf: no returns to process")
    idx = np.flatnonzero(keep)
    g = csf_ground(np.column_stack([pts["X"][idx], pts["Y"][idx], pts["Z"][idx]]),
                   resolution=_as_float(o["resolution"], "resolution"),
                   rigidness=_as_int(o["rigidness"], "rigidness"), step=_as_float(o["step"], "step"),
                   threshold=_as_float(o["threshold"], "threshold"),
                   smooth=_as_bool(o["smooth"], "smooth"), iterations=_as_int(o["iterations"], "iterations"))
    gc, oc = _class(o["ground_class"], "ground_class"), _class(o["other_class"], "other_class")
    only = _as_bool(o["only_ground"], "only_ground")
    if gc == oc and not only:
        raise PipelineError("filters.csf: ground and non-ground class cannot be equal when only_ground is false")
    cls = pts["Classification"]
    cls[idx[g]] = gc
    if not only:
        cls[idx[~g]] = oc
    return pts


_ASSIGN_RE = re.compile(r"^\s*(?P<range>.+?)\s*=\s*(?P<val>[^=]+?)\s*$")
_VALUE_RE = re.compile(r"^\s*(?P<dim>[A-Za-z_][A-Za-z0-9_]*)\s*=\s*(?P<val>[-+0-9.eE]+)\s*$")


def _assign(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    cond = np.ones(len(pts), bool)
    if o["condition"]:
        cond = limits_mask(pts, _ranges(o["condition"]))
    for a in _as_list(o["assignment"]) if o["assignment"] else []:
        m = _ASSIGN_RE.match(a)
        if not m:
            raise PipelineError(f"filters.assign: assignment {a!r} is not of the form Dim[lower:upper]=value")
        r = parse_limits(m["range"])
        if len(r) != 1:
            raise PipelineError(f"filters.assign: assignment {a!r} must hold exactly one range")
        f = find_dimension(pts, r[0].name)
        sel = cond & r[0].passes(pts[f])
        pts[f][sel] = _as_float(m["val"], "assignment")
    for v in _as_list(o["value"]) if o["value"] else []:
        m = _VALUE_RE.match(v)
        if not m:
            raise PipelineError(f"filters.assign: value {v!r} is outside our subset; only 'Dim = number' "
                                "(no expressions, no WHERE) is supported by the built-in runner")
        f = find_dimension(pts, m["dim"])
        pts[f][cond] = float(m["val"])
    return pts


_BOUNDS_RE = re.compile(r"^\s*\(\s*\[\s*([^,\]]+),\s*([^\]]+)\]\s*,\s*\[\s*([^,\]]+),\s*([^\]]+)\]"
                        r"(?:\s*,\s*\[[^\]]*\])?\s*\)\s*$")


def _crop(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    import shapely
    from shapely import wkt as _wkt
    from shapely.ops import transform as _transform

    o = stage.options
    geoms = []
    for p in _as_list(o["polygon"]) if o["polygon"] else []:
        try:
            geoms.append(_wkt.loads(p))
        except Exception as err:  # shapely raises GEOSException / WKTReadingError
            raise PipelineError(f"filters.crop: polygon is not WKT ({err})") from err
    for b in _as_list(o["bounds"]) if o["bounds"] else []:
        m = _BOUNDS_RE.match(b)
        if not m:
            raise PipelineError(f"filters.crop: bounds {b!r} is not '([xmin, xmax], [ymin, ymax])'")
        x0, x1, y0, y1 = (float(v) for v in m.groups())
        geoms.append(shapely.box(x0, y0, x1, y1))
    if not geoms:
        raise PipelineError("filters.crop needs 'polygon' or 'bounds'")
    if o["a_srs"]:
        src = parse_crs(o["a_srs"], field="a_srs")
        if ctx.crs is not None and not src.equals(ctx.crs):
            from pyproj import Transformer
            tr = Transformer.from_crs(src, ctx.crs, always_xy=True)
            geoms = [_transform(tr.transform, g) for g in geoms]
    inside = np.zeros(len(pts), bool)
    for g in geoms:
        inside |= shapely.contains_xy(g, pts["X"], pts["Y"]) | shapely.intersects_xy(g.boundary, pts["X"], pts["Y"])
    keep = ~inside if _as_bool(o["outside"], "outside") else inside
    return pts[keep]


def _reproject(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    src = parse_crs(o["in_srs"], field="in_srs") if o["in_srs"] else ctx.crs
    if src is None:
        raise PipelineError("filters.reprojection: the cloud has no CRS; give 'in_srs'")
    dst = parse_crs(o["out_srs"], field="out_srs")
    pts["X"], pts["Y"], pts["Z"] = ctx.transformers.get(src, dst)(pts["X"], pts["Y"], pts["Z"])
    ctx.crs = dst
    return pts


def _write_las(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    if _as_int(o["minor_version"], "minor_version") != 4:
        raise PipelineError("writers.las: only minor_version 4 (LAS 1.4) is written here")
    if _as_int(o["dataformat_id"], "dataformat_id") != 6:
        raise PipelineError("writers.las: only dataformat_id 6 is written here")
    for axis in "xyz":
        s = o[f"scale_{axis}"]
        if str(s) not in ("0.001", "auto") and _as_float(s, f"scale_{axis}") != 0.001:
            raise PipelineError(f"writers.las: scale_{axis} must be 0.001 here")
    name = str(o["filename"])
    comp = str(o["compression"]).lower()
    if comp not in ("", "laszip", "lazperf", "true", "false", "none"):
        raise PipelineError(f"writers.las: unknown compression {o['compression']!r}")
    wants_laz = comp in ("laszip", "lazperf", "true") or (comp == "" and name.lower().endswith(".laz"))
    if wants_laz != name.lower().endswith(".laz"):
        raise PipelineError("writers.las: compression must match the file name (.laz compressed, .las not)")
    crs = parse_crs(o["a_srs"], field="a_srs") if o["a_srs"] else ctx.crs
    offset = None
    if any(o[f"offset_{a}"] not in ("", "auto") for a in "xyz"):
        offset = tuple(_as_float(o[f"offset_{a}"] or 0, f"offset_{a}") for a in "xyz")
    write_cloud(name, pts, crs, offset=offset)
    return pts


def _slope_ground(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    params = SlopeGroundParams(**{k: _as_float(o[k], k) for k in
                                  ("max_slope_deg", "tolerance", "cell", "window", "overhead_gap",
                                   "face_slope_deg", "face_attached", "max_top_area", "wall_reach")})
    ignore = limits_mask(pts, _ranges(o["ignore"])) if o["ignore"] else np.zeros(len(pts), bool)
    cls, _ = slope_ground(pts["X"], pts["Y"], pts["Z"], pts["Classification"], ignore, params,
                          neighbours=ctx.plan_for(pts))
    ctx.plan = None
    pts["Classification"] = cls
    return pts


def _voxel_thin(stage: Stage, pts: np.ndarray, ctx: _Context) -> np.ndarray:
    o = stage.options
    keep = voxel_thin(pts["X"], pts["Y"], pts["Z"], _as_float(o["cell"], "cell"), _as_int(o["max_points"], "max_points"))
    if keep.all():
        return pts
    ctx.thinned.append(np.column_stack([pts["X"][~keep], pts["Y"][~keep]]))
    return pts[keep]


_READER_OPTS = {"filename": _REQUIRED, "override_srs": "", "default_srs": "", "spatialreference": ""}

#: Every stage the built-in runner knows, with its options and their defaults.
STAGES: dict[str, _Spec] = {
    "readers.las": _Spec("reader", _READER_OPTS, _read_las),
    "readers.copc": _Spec("reader", _READER_OPTS, _read_las),
    "filters.range": _Spec("filter", {"limits": _REQUIRED}, _range),
    "filters.outlier": _Spec("filter", {"method": "statistical", "mean_k": 8, "multiplier": 2.0,
                                        "radius": 1.0, "min_k": 2, "class": LOW_NOISE, "threads": 1},
                             _outlier),
    "filters.elm": _Spec("filter", {"cell": 10.0, "threshold": 1.0, "class": LOW_NOISE}, _elm),
    "filters.csf": _Spec("filter", {"resolution": 1.0, "rigidness": 3, "step": 0.65, "threshold": 0.5,
                                    "hdiff": 0.3, "smooth": True, "iterations": 500, "ignore": "",
                                    "returns": ["last", "only"], "ground_class": GROUND,
                                    "other_class": UNCLASSIFIED, "only_ground": False}, _csf),
    "filters.assign": _Spec("filter", {"assignment": "", "condition": "", "value": ""}, _assign),
    "filters.crop": _Spec("filter", {"polygon": "", "bounds": "", "outside": False, "a_srs": ""}, _crop),
    "filters.reprojection": _Spec("filter", {"out_srs": _REQUIRED, "in_srs": ""}, _reproject),
    "writers.las": _Spec("writer", {"filename": _REQUIRED, "a_srs": "", "minor_version": 4,
                                    "dataformat_id": 6, "compression": "", "scale_x": 0.001,
                                    "scale_y": 0.001, "scale_z": 0.001, "offset_x": "",
                                    "offset_y": "", "offset_z": ""}, _write_las),
    "inventory.slope_ground": _Spec("filter", {"max_slope_deg": 50.0, "tolerance": 0.1, "cell": 0.25,
                                               "window": 12.0, "overhead_gap": 2.0,
                                               "face_slope_deg": 70.0, "face_attached": 0.5,
                                               "max_top_area": 400.0, "wall_reach": 5.0,
                                               "ignore": "Classification[7:7],Classification[18:18]"},
                                    _slope_ground),
    "inventory.voxel_thin": _Spec("filter", {"cell": 0.05, "max_points": 4}, _voxel_thin),
}


#: Options whose stage takes a value of any kind (PDAL's thread count, accepted and unused
#: here) or a word beside a number (``"auto"`` scales): their defaults say nothing of them.
_UNTYPED = frozenset({"threads", "scale_x", "scale_y", "scale_z"})
#: Options holding dimension ranges, read by :func:`parse_limits`.
_RANGES = frozenset({"limits", "ignore", "condition"})


def _check_value(name: str, default: Any, value: Any) -> None:
    """Refuse, when the pipeline is read, a value its stage would refuse when it runs: of
    the kind of the option's default (true/false, whole number, class, number), or ranges."""
    if name in _RANGES:
        if value or name == "limits":   # the stages skip an empty 'ignore' or 'condition'
            _ranges(value)
    elif name in _UNTYPED or default is _REQUIRED:
        return
    elif isinstance(default, bool):
        _as_bool(value, name)
    elif isinstance(default, int):
        (_class if name.endswith("class") else _as_int)(value, name)
    elif isinstance(default, float):
        _as_float(value, name)


def _stage_from_raw(raw: Any, index: int, n: int, where: str) -> Stage:
    if isinstance(raw, str):  # PDAL infers reader/writer from a bare file name
        raw = {"type": "readers.las" if index == 0 else "writers.las", "filename": raw}
        if index not in (0, n - 1):
            raise PipelineError(f"{where}: stage {index + 1}: a bare file name must be first or last")
    if not isinstance(raw, dict):
        raise PipelineError(f"{where}: stage {index + 1} must be an object or a file name, got {raw!r}")
    typ = raw.get("type")
    if typ is None and "filename" in raw:
        typ = "readers.las" if index == 0 else "writers.las"
    if typ not in STAGES:
        known = ", ".join(sorted(STAGES))
        raise PipelineError(f"{where}: stage {index + 1}: unknown stage type {typ!r}; "
                            f"this runner knows: {known}")
    spec = STAGES[typ]
    unknown = sorted(set(raw) - set(spec.options) - _COMMON)
    if unknown:
        raise PipelineError(f"{where}: stage {index + 1} ({typ}): unknown option(s) {', '.join(unknown)}; "
                            f"known: {', '.join(sorted(spec.options))}")
    opts = {}
    for k, default in spec.options.items():
        if k in raw:
            try:
                _check_value(k, default, raw[k])
            except PipelineError as err:
                raise PipelineError(f"{where}: stage {index + 1} ({typ}): {err}") from err
            opts[k] = raw[k]
        elif default is _REQUIRED:
            raise PipelineError(f"{where}: stage {index + 1} ({typ}): option {k!r} is required")
        else:
            opts[k] = default
    return Stage(typ, opts, index, dict(raw, type=typ))


class Pipeline:
    """A validated linear pipeline.

    Examples
    --------
    >>> p = Pipeline.from_json('[{"type": "filters.range", "limits": "Z[0:10]"}]')
    >>> [s.type for s in p.stages]
    ['filters.range']
    """

    def __init__(self, stages: list[Stage], source: str = "<pipeline>") -> None:
        self.stages = stages
        self.source = source
        for i, s in enumerate(stages):
            inputs = s.raw.get("inputs")
            if inputs is None:
                continue
            inputs = [inputs] if isinstance(inputs, str) else inputs
            prev = stages[i - 1].raw.get("tag") if i else None
            if not (prev is not None and inputs == [prev]):
                raise PipelineError(f"{source}: stage {i + 1}: only linear pipelines are supported "
                                    "('inputs' may name the previous stage's tag only)")

    @classmethod
    def from_json(cls, text: "str | list | dict", source: str = "<pipeline>") -> "Pipeline":
        if isinstance(text, str):
            try:
                doc = json.loads(text)
            except json.JSONDecodeError as err:
                raise PipelineError(f"{source}: not valid JSON at line {err.lineno}, column {err.colno}: "
                                    f"{err.msg}") from err
        else:
            doc = text
        if isinstance(doc, dict):
            if "pipeline" not in doc:
                raise PipelineError(f"{source}: a pipeline object needs a 'pipeline' list")
            doc = doc["pipeline"]
        if not isinstance(doc, list) or not doc:
            raise PipelineError(f"{source}: the pipeline must be a non-empty list of stages")
        stages = [_stage_from_raw(raw, i, len(doc), source) for i, raw in enumerate(doc)]
        return cls(stages, source)

    @classmethod
    def from_file(cls, path: "str | Path") -> "Pipeline":
        path = Path(path)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as err:
            raise PipelineError(f"{path}: cannot read pipeline ({err.strerror})") from err
        return cls.from_json(text, str(path))

    @property
    def filters_only(self) -> bool:
        return all(s.kind == "filter" for s in self.stages)

    def run(self, points: np.ndarray | None = None, crs: "CRS | str | None" = None, *,
            engine: str = "auto", stats: "dict | None" = None, consume: bool = False
            ) -> tuple[np.ndarray, CRS | None]:
        """Run the stages on ``points`` (after any readers) and return points and CRS.

        Parameters
        ----------
        points : structured array of :data:`~inventory.io.clouds.POINT_DTYPE`, optional
        crs : CRS of ``points``
        engine : "auto" | "pdal" | "builtin"
        stats : dict, optional
            Filled with ``thinned_xy``: an (n, 2) array of x and y of the points that
            ``inventory.voxel_thin`` stages dropped.
        consume : bool
            The caller gives ``points`` away: the stages work on that array itself (its
            classes and coordinates change) instead of on a copy. Default False: the
            caller's array is never changed.
        """
        if engine not in ("auto", "pdal", "builtin"):
            raise PipelineError(f"engine must be 'auto', 'pdal' or 'builtin', got {engine!r}")
        use_pdal = engine == "pdal" or (engine == "auto" and pdal_available())
        if engine == "pdal" and not pdal_available():
            raise PipelineError("engine 'pdal' asked for, but PDAL's Python bindings do not import")
        ctx = _Context(parse_crs(crs) if crs is not None else None)
        # One copy for the whole run (none when the caller gives its array away): stages
        # change the points they are given in place (classes, coordinates).
        pts = empty_points() if points is None else points if consume else points.copy()
        i = 0
        while i < len(self.stages):
            s = self.stages[i]
            if use_pdal and not s.ours and s.kind == "filter":
                j = i
                while j < len(self.stages) and not self.stages[j].ours and self.stages[j].kind == "filter":
                    j += 1
                pts = _run_pdal(self.stages[i:j], pts, ctx)
                i = j
                continue
            ctx.surface_later = any(t.type == "inventory.slope_ground" for t in self.stages[i + 1:])
            try:
                pts = STAGES[s.type].run(s, pts, ctx)
            except PipelineError as err:
                raise PipelineError(f"{self.source}: stage {s.index + 1} ({s.type}): {err}") from err
            i += 1
        if stats is not None:
            stats["thinned_xy"] = np.concatenate(ctx.thinned) if ctx.thinned else np.zeros((0, 2))
        return pts, ctx.crs


def _run_pdal(stages: list[Stage], pts: np.ndarray, ctx: _Context) -> np.ndarray:
    """Run PDAL-native filter stages through PDAL's Python bindings."""
    import pdal

    spec = []
    for s in stages:
        raw = {k: v for k, v in s.raw.items() if k != "inputs"}
        if s.type == "filters.reprojection" and "in_srs" not in raw and ctx.crs is not None:
            raw["in_srs"] = ctx.crs.to_wkt()
        spec.append(raw)
    try:
        p = pdal.Pipeline(json.dumps(spec), arrays=[np.ascontiguousarray(pts)])
        p.execute()
        arr = p.arrays[0]
    except RuntimeError as err:
        raise PipelineError(f"PDAL failed: {err}") from err
    # the points' own columns (with any extra bytes dimensions) come back as they went in
    out = np.zeros(len(arr), dtype=pts.dtype)
    out["StationRange"] = np.nan
    for name in pts.dtype.names:
        if name in arr.dtype.names:
            out[name] = arr[name]
    for s in stages:
        if s.type == "filters.reprojection":
            ctx.crs = parse_crs(s.options["out_srs"])
    return out


def pipeline_problems(path: "str | Path", display: str) -> list[Problem]:
    """What ``inventory check`` reports of a pipeline file, shown as ``display``: a file that
    cannot be read, is not JSON, names an unknown stage or option, misses a required one, or
    gives an option a value of the wrong kind (an empty list when it parses)."""
    try:
        Pipeline.from_file(path)
    except PipelineError as err:
        text, prefix = str(err), f"{Path(path)}: "
        return [Problem(display, None, None, text[len(prefix):] if text.startswith(prefix) else text)]
    return []


def load_pipeline(path: "str | Path | None" = None) -> Pipeline:
    """A pipeline file, or the stockyard default shipped in ``inventory/survey/pipelines/stockpile.json``."""
    if path is None:
        with resources.as_file(resources.files("inventory").joinpath("survey", "pipelines", "stockpile.json")) as default:
            return Pipeline.from_file(default)
    return Pipeline.from_file(path)
