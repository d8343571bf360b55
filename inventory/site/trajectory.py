"""Reading a moving scanner's trajectory and the machines of ``site.toml``.

``surveys/<date>/trajectory.csv`` gives the pose of the scanner's body (or a rail-mounted
machine's axes) as a time series; :func:`read_trajectories` checks it row by row and builds one
:class:`~inventory.model.pose.Trajectory` per cloud file. The pose conventions and the time
base are documented in docs/surveys.md; placing the points is
:func:`inventory.survey.placement.georeference`.
"""

from __future__ import annotations

import math
import warnings
from pathlib import Path
from typing import Any, Mapping

import numpy as np
import pandas as pd

from inventory.errors import InputError, InputErrors, InputWarning, Problem
from inventory.io.tables import is_blank, read_table, table_schema
from inventory.model.pose import (
    ADJUSTED_GPS_OFFSET_S,
    AXIS_FIELDS,
    GPS_EPOCH,
    GPS_UTC_LEAP_S,
    GPS_WEEK_S,
    LEAP_VALID_FROM,
    MACHINE_AXES_KEYS,
    MAX_TURN_PER_SAMPLE_DEG,
    POSE_FIELDS,
    Machine,
    Trajectory,
    adjusted_gps_time,
)

__all__ = ["TIME_MATCH_S", "load_trajectory", "machines_from_config", "read_trajectories", "trajectory_from_frame"]


_MACHINE_KEYS = {
    "rail_origin": 3, "rail_azimuth_deg": 0, "pivot_height_m": 0, "pivot_offset_m": 0,
    "boom_length_m": 0, "scanner_lever_arm_m": 3, "boresight_deg": 3,
}


def _config_number(value: Any, path: str, key: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(path, f"not a finite number: {value!r}", field=key)
    return float(value)


def machines_from_config(machines: Mapping[str, Any] | None, path: str | Path = "site.toml"
                         ) -> dict[str, Machine]:
    """Machines from the parsed ``[machines.<id>]`` tables of ``site.toml``.

    A missing or wrong key is an :class:`~inventory.errors.InputError` whose field names it,
    e.g. ``machines.stacker1.boom_length_m``.
    """
    out: dict[str, Machine] = {}
    path = str(path)
    for mid, table in (machines or {}).items():
        if not isinstance(table, Mapping):
            raise InputError(path, "must be a table", field=f"machines.{mid}")
        for key in table:
            if key not in _MACHINE_KEYS:
                raise InputError(path, "unknown key", field=f"machines.{mid}.{key}")
        if any(key in table for key in MACHINE_AXES_KEYS):
            for key in MACHINE_AXES_KEYS:
                if key not in table:
                    raise InputError(path, "required key is missing (the boom geometry needs all of "
                                     + ", ".join(MACHINE_AXES_KEYS) + ")", field=f"machines.{mid}.{key}")
        vals: dict[str, Any] = {}
        for key, size in _MACHINE_KEYS.items():
            if key not in table:
                continue
            name = f"machines.{mid}.{key}"
            if size:
                seq = table[key]
                if not isinstance(seq, (list, tuple)) or len(seq) != size:
                    raise InputError(path, f"must be a list of {size} numbers", field=name)
                vals[key] = np.array([_config_number(v, path, name) for v in seq])
            else:
                vals[key] = _config_number(table[key], path, name)
        if vals.get("boom_length_m", 0.0) < 0:
            raise InputError(path, "must not be negative", field=f"machines.{mid}.boom_length_m")
        out[str(mid)] = Machine(id=str(mid), **vals)
    return out


# ---------------------------------------------------------------------------------- the table


def _group_trajectory(rows: pd.DataFrame, display: str, key: str | None,
                      machines: Mapping[str, Machine], problems: list[Problem]) -> Trajectory | None:
    """One file's rows as a Trajectory, appending problems instead of raising."""
    n0 = len(problems)
    lines = rows["line"].to_numpy()
    first = int(lines[0])
    if len(rows) < 2:
        problems.append(Problem(display, first, "gps_time",
                                "a trajectory needs at least two samples" + (f" (file {key})" if key else "")))
        return None
    t = rows["gps_time"].to_numpy(float)
    bad = np.nonzero(np.diff(t) <= 0)[0]
    for i in bad[:5]:
        problems.append(Problem(display, int(lines[i + 1]), "gps_time",
                                f"{float(t[i + 1])!r} is not after {float(t[i])!r} on line {int(lines[i])}; "
                                "times must strictly increase"))
    pose_rows = ~rows[list(POSE_FIELDS)].map(is_blank).astype(bool)
    axes_rows = ~rows[list(AXIS_FIELDS)].map(is_blank).astype(bool)
    has_pose = pose_rows.any(axis=1).to_numpy()
    has_axes = axes_rows.any(axis=1).to_numpy()
    variant = "axes" if has_axes[0] and not has_pose[0] else "pose"
    cols, other = (AXIS_FIELDS, POSE_FIELDS) if variant == "axes" else (POSE_FIELDS, AXIS_FIELDS)
    flags = axes_rows if variant == "axes" else pose_rows
    for j, line in enumerate(lines):
        if (has_pose[j] if variant == "axes" else has_axes[j]):
            problems.append(Problem(display, int(line), next(c for c in other if not is_blank(rows.iloc[j][c])),
                                    f"this trajectory gives {'machine axes' if variant == 'axes' else 'poses'} "
                                    "(from its first row); give one kind per file"))
            break
        missing = [c for c in cols if not flags.iloc[j][c]]
        if missing:
            problems.append(Problem(display, int(line), missing[0], "value is missing: give all of "
                                    + ", ".join(cols)))
            break
    mids = {str(m) for m in rows["machine"] if not is_blank(m)}
    machine = None
    if len(mids) > 1:
        problems.append(Problem(display, first, "machine", f"one trajectory names several machines: {sorted(mids)}"))
    elif mids:
        mid = mids.pop()
        blank = [int(l) for l, m in zip(lines, rows["machine"]) if is_blank(m)]
        if blank:
            problems.append(Problem(display, blank[0], "machine", f"value is missing (other rows give {mid!r})"))
        machine = machines.get(mid)
        if machine is None:
            known = ", ".join(sorted(machines)) or "none"
            problems.append(Problem(display, first, "machine",
                                    f"{mid!r} is not a machine of site.toml [machines] (known: {known})"))
    elif variant == "axes":
        problems.append(Problem(display, first, "machine", "machine axes need the machine id"))
    if variant == "axes" and machine is not None and not machine.has_boom:
        problems.append(Problem(display, first, "machine",
                                f"site.toml [machines.{machine.id}] gives no boom geometry for machine axes "
                                f"({', '.join(MACHINE_AXES_KEYS)})"))
    if len(problems) > n0:
        return None
    if variant == "axes":
        traj = Trajectory.from_machine_axes(t, machine, rows["travel_m"].to_numpy(float),
                                            rows["slew_deg"].to_numpy(float),
                                            rows["luff_deg"].to_numpy(float), source=display)
    else:
        kw: dict[str, Any] = {"source": display}
        if machine is not None:
            kw.update(lever_arm=machine.scanner_lever_arm_m, boresight_deg=machine.boresight_deg,
                      machine=machine.id)
        traj = Trajectory.from_poses(t, rows[["x", "y", "z"]].to_numpy(float), rows["roll_deg"].to_numpy(float),
                                     rows["pitch_deg"].to_numpy(float), rows["yaw_deg"].to_numpy(float), **kw)
    turn = (traj.rotation[:-1].inv() * traj.rotation[1:]).magnitude()
    big = np.nonzero(np.degrees(turn) > MAX_TURN_PER_SAMPLE_DEG)[0]
    if len(big):
        i = int(big[0])
        field_name = "slew_deg" if variant == "axes" else "yaw_deg"
        problems.append(Problem(display, int(lines[i + 1]), field_name,
                                f"turns {np.degrees(turn[i]):.1f} degrees since line {int(lines[i])}; more than "
                                f"{MAX_TURN_PER_SAMPLE_DEG:g} between samples cannot be interpolated reliably"))
        return None
    return traj


def _fill_gps_time(frame: pd.DataFrame, display: str, problems: list[Problem]) -> bool:
    """Derive ``gps_time`` from ``time`` (as adjusted standard GPS time) when no row gives it.

    Returns False (with a problem) when some rows give ``gps_time`` and others do not, or a
    needed ``time`` is missing or too early.
    """
    given = ~frame["gps_time"].map(is_blank).to_numpy(dtype=bool)
    if given.all():
        frame["gps_time"] = frame["gps_time"].astype(float)
        return True
    lines = frame["line"].to_numpy()
    if given.any():
        j = int(np.nonzero(~given)[0][0])
        problems.append(Problem(display, int(lines[j]), "gps_time", "value is missing (other rows give gps_time)"))
        return False
    when = pd.to_datetime(frame["time"], utc=True)
    if when.isna().any():
        j = int(np.nonzero(when.isna().to_numpy())[0][0])
        problems.append(Problem(display, int(lines[j]), "gps_time", "value is missing: give gps_time or time"))
        return False
    early = (when < pd.Timestamp(LEAP_VALID_FROM)).to_numpy()
    if early.any():
        j = int(np.nonzero(early)[0][0])
        problems.append(Problem(display, int(lines[j]), "time",
                                "before 2017-01-01: give gps_time (the leap-second count is not known here)"))
        return False
    seconds = (when - pd.Timestamp(GPS_EPOCH)).dt.total_seconds().to_numpy()
    frame["gps_time"] = seconds + GPS_UTC_LEAP_S - ADJUSTED_GPS_OFFSET_S
    return True


def trajectory_from_frame(frame: pd.DataFrame, machines: Mapping[str, Machine] | None = None,
                          *, display: str = "trajectory.csv", problems: list[Problem] | None = None
                          ) -> dict[str | None, Trajectory]:
    """Trajectories from a table with the ``trajectory.csv`` columns, one per ``file``.

    ``frame`` is what :func:`inventory._tables.read_table` returns (columns of the schema plus
    ``line``); missing columns are taken as blank. The key is the cloud file name, or
    ``None`` when the table names no file (it then serves every scanner-frame cloud of the
    survey). Problems are appended to ``problems`` when given, else raised as
    :class:`~inventory.errors.InputErrors`.
    """
    own = problems is None
    problems = [] if problems is None else problems
    frame = frame.copy()
    for name in table_schema("trajectory").names:
        if name not in frame.columns:
            frame[name] = None
    if "line" not in frame.columns:
        frame["line"] = np.arange(len(frame)) + 2
    out: dict[str | None, Trajectory] = {}
    machines = machines or {}
    if len(frame) == 0:
        problems.append(Problem(display, 2, None, "the table has a header but no rows"))
    elif _fill_gps_time(frame, display, problems):
        named = ~frame["file"].map(is_blank).to_numpy(dtype=bool)
        if named.any() and not named.all():
            j = int(np.nonzero(~named)[0][0])
            problems.append(Problem(display, int(frame["line"].iloc[j]), "file",
                                    "value is missing (other rows name a file)"))
        else:
            keys = frame["file"].map(lambda v: str(v).strip()) if named.all() else pd.Series([None] * len(frame))
            for key in dict.fromkeys(keys):
                rows = frame[(keys == key).to_numpy()] if key is not None else frame
                traj = _group_trajectory(rows, display, key, machines, problems)
                if traj is not None:
                    out[key] = traj
    if own and any(p.severity == "error" for p in problems):
        raise InputErrors(problems)
    return out


def read_trajectories(path: str | Path, machines: Mapping[str, Machine] | None = None,
                      *, display: str | None = None, problems: list[Problem] | None = None
                      ) -> dict[str | None, Trajectory]:
    """Read and check ``trajectory.csv``; every problem names file, line and field.

    Without ``problems``, raises :class:`~inventory.errors.InputErrors` listing all problems
    and issues warnings (unknown columns, a ``time`` that does not match ``gps_time``) as
    :class:`~inventory.errors.InputWarning`. With a ``problems`` list (a site check that
    collects everything), appends to it instead and returns what could be read.
    """
    display = display or str(path)
    own = problems is None
    found: list[Problem] = []
    frame = read_table(Path(path), table_schema("trajectory"), found, display=display)
    out: dict[str | None, Trajectory] = {}
    if not any(p.severity == "error" for p in found):
        out = trajectory_from_frame(frame, machines, display=display, problems=found)
        _check_time_column(frame, display, found)
    if not own:
        problems.extend(found)  # type: ignore[union-attr]
        return out
    if any(p.severity == "error" for p in found):
        raise InputErrors(found)
    for p in found:
        warnings.warn(InputWarning(str(p)), stacklevel=2)
    return out


#: How far the ``time`` column may be from ``gps_time`` before it is reported (s): loggers
#: print times to the millisecond; a full second apart means a different clock or time base.
TIME_MATCH_S = 0.5


def _check_time_column(frame: pd.DataFrame, display: str, problems: list[Problem]) -> None:
    """Warn (once) where ``time`` matches ``gps_time`` neither as adjusted standard GPS time
    nor as GPS week seconds: the sign of a trajectory logged in another time base."""
    if "time" not in frame.columns:
        return
    for row in frame.itertuples():
        when, gps = getattr(row, "time"), getattr(row, "gps_time")
        if when is None or pd.isna(when) or gps is None or pd.isna(gps):
            continue
        when = pd.Timestamp(when).to_pydatetime()
        if when < LEAP_VALID_FROM:
            continue
        adjusted = adjusted_gps_time(when)
        week = (adjusted + ADJUSTED_GPS_OFFSET_S) % GPS_WEEK_S
        if min(abs(gps - adjusted), abs(gps - week)) > TIME_MATCH_S:
            problems.append(Problem(
                display, int(row.line), "time",
                f"{when.isoformat()} is {adjusted:.3f} s in adjusted standard GPS time and {week:.3f} s "
                f"of its GPS week, but gps_time is {gps:.3f}; check the logger's clock and time base",
                "warning"))
            return


def load_trajectory(path: str | Path, machines: Mapping[str, Machine] | None = None,
                    file: str | None = None) -> Trajectory:
    """The one trajectory of ``trajectory.csv`` (or the one for cloud ``file``).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> with tempfile.TemporaryDirectory() as d:
    ...     path = pathlib.Path(d) / "trajectory.csv"
    ...     _ = path.write_text("gps_time,x,y,z,roll_deg,pitch_deg,yaw_deg\\n"
    ...                         "100.0,0,0,10,0,0,0\\n100.5,5,0,10,0,0,45\\n101.0,10,0,10,0,0,90\\n")
    ...     traj = load_trajectory(path)
    >>> traj.span
    (100.0, 101.0)

    The points are then placed with :func:`inventory.survey.placement.georeference`.
    """
    found = read_trajectories(path, machines)
    if file is not None and file in found:
        return found[file]
    if None in found:
        return found[None]
    if file is None and len(found) == 1:
        return next(iter(found.values()))
    raise InputError(path, f"no trajectory for {file!r} (the table names {sorted(k for k in found if k)})",
                     field="file")
