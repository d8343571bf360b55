"""``run.json``: what a close read, with which settings and software, and how long it took.

The manifest lists every input file with its SHA-256, the parameters, the versions of the
libraries that made the numbers (and of GDAL and PROJ under them) and the time of each step.
Keys are written in sorted order so two manifests of the same close differ only where the
run did (timings, the moment it was written).
"""

from __future__ import annotations

import hashlib
import json
import math
import platform
from datetime import date, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np

from inventory.model.results import CloseResult
from inventory.io.atomic import atomic_path

__all__ = ["write_manifest", "sha256_file", "library_versions", "MANIFEST_VERSION"]

#: Layout version of run.json, bumped when keys change meaning.
MANIFEST_VERSION = 1

#: Distributions whose versions can change the numbers (name on PyPI -> key in run.json).
_DISTRIBUTIONS = {
    "numpy": "numpy", "scipy": "scipy", "pandas": "pandas", "laspy": "laspy",
    "lazrs": "lazrs", "rasterio": "rasterio", "geopandas": "geopandas", "pyogrio": "pyogrio",
    "shapely": "shapely", "pyproj": "pyproj", "XlsxWriter": "XlsxWriter",
    "cloth-simulation-filter": "CSF", "dask": "dask", "distributed": "distributed",
    "matplotlib": "matplotlib", "jsonschema": "jsonschema",
}

_CHUNK = 1 << 20


def sha256_file(path: str | Path) -> str:
    """SHA-256 hex digest of a file, read in 1 MiB chunks.

    Examples
    --------
    >>> import tempfile, os
    >>> with tempfile.NamedTemporaryFile(delete=False) as f:
    ...     _ = f.write(b"abc")
    >>> sha256_file(f.name)[:16]   # FIPS 180-2 example "abc"
    'ba7816bf8f01cfea'
    >>> os.unlink(f.name)
    """
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(_CHUNK), b""):
            h.update(chunk)
    return h.hexdigest()


def library_versions() -> dict[str, str]:
    """Versions of Python, the numeric/GIS libraries, GDAL and PROJ ("not installed" if absent)."""
    out: dict[str, str] = {"python": platform.python_version()}
    for dist, key in _DISTRIBUTIONS.items():
        try:
            out[key] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[key] = "not installed"
    try:
        import rasterio

        out["GDAL (rasterio)"] = rasterio.__gdal_version__
    except ImportError:
        out["GDAL (rasterio)"] = "not installed"
    try:
        import pyogrio

        out["GDAL (pyogrio)"] = pyogrio.__gdal_version_string__
    except ImportError:
        out["GDAL (pyogrio)"] = "not installed"
    try:
        import pyproj

        out["PROJ"] = pyproj.proj_version_str
    except ImportError:
        out["PROJ"] = "not installed"
    try:
        from inventory._version import __version__

        out["inventory"] = __version__
    except ImportError:  # pragma: no cover - we are inside the package
        out["inventory"] = "unknown"
    return out


def _jsonable(value: Any) -> Any:
    """Plain JSON types for what a run dict may hold (numpy scalars, paths, dates, NaN)."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set)):
        items = [_jsonable(v) for v in value]
        return sorted(items, key=str) if isinstance(value, set) else items
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return f if math.isfinite(f) else None  # JSON has no NaN
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, Path):
        return value.as_posix()
    if isinstance(value, (datetime, date)):
        return value.isoformat()
    if value is None or isinstance(value, (str, int)):
        return value
    return str(value)


def manifest_dict(result: CloseResult) -> dict[str, Any]:
    """The content of run.json for ``result`` (see :func:`write_manifest`)."""
    run = dict(result.run or {})
    versions = library_versions()
    versions.update({str(k): str(v) for k, v in (run.pop("versions", None) or {}).items()})
    inputs = run.pop("inputs", {}) or {}
    return _jsonable({
        "manifest_version": MANIFEST_VERSION,
        "site": result.site_name,
        "period": result.period,
        "close_id": result.close_id,
        "closed_utc": result.closed_utc,
        "crs": result.crs,
        "timezone": result.timezone,
        "survey_date": result.survey_date,
        "survey_instant_utc": result.survey_instant,
        "previous_survey_date": result.previous_survey_date,
        "inputs": {str(k): v for k, v in sorted(inputs.items(), key=lambda kv: str(kv[0]))},
        "parameters": run.pop("parameters", {}) or {},
        "versions": versions,
        "timings_s": run.pop("timings", {}) or {},
        "other": run,
    })


def write_manifest(result: CloseResult, path: str | Path) -> Path:
    """Write ``run.json`` for one close.

    ``result.run`` may hold ``inputs`` (path -> SHA-256), ``parameters``, ``timings``
    (step -> seconds) and ``versions`` (extra or overriding version strings); any other
    key is kept under ``other``. Library versions are read here.

    Returns
    -------
    Path
    """
    dest = Path(path)
    text = json.dumps(manifest_dict(result), indent=2, sort_keys=True, ensure_ascii=False,
                      allow_nan=False)
    with atomic_path(dest) as tmp:
        tmp.write_text(text + "\n", encoding="utf-8")
    return dest
