"""run.json: inputs with SHA-256, parameters, versions, timings; sorted keys."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

from inventory.export.manifest import library_versions, sha256_file, write_manifest


def test_sha256_of_known_vectors(tmp_path):
    f = tmp_path / "abc.txt"
    f.write_bytes(b"abc")
    # FIPS 180-2, appendix B.1: SHA-256("abc")
    assert sha256_file(f) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    big = tmp_path / "big.bin"
    data = np.random.default_rng(1).bytes(3 * (1 << 20) + 17)  # spans several read chunks
    big.write_bytes(data)
    assert sha256_file(big) == hashlib.sha256(data).hexdigest()


def test_manifest_content(make_close_result, tmp_path):
    import numpy
    import rasterio

    res = make_close_result("2026-01")
    res.run["parameters"]["nan_value"] = float("nan")
    path = write_manifest(res, tmp_path / "run.json")
    text = path.read_text(encoding="utf-8")
    doc = json.loads(text)
    assert doc["inputs"] == res.run["inputs"]
    assert doc["parameters"]["grid"]["cell_size_m"] == 0.5
    assert doc["parameters"]["nan_value"] is None  # JSON has no NaN
    assert doc["timings_s"] == res.run["timings"]
    assert doc["versions"]["numpy"] == numpy.__version__
    assert doc["versions"]["GDAL (rasterio)"] == rasterio.__gdal_version__
    for key in ("scipy", "laspy", "lazrs", "rasterio", "geopandas", "pyogrio", "shapely",
                "pyproj", "XlsxWriter", "CSF", "dask", "matplotlib", "PROJ", "python",
                "inventory"):
        assert key in doc["versions"], key
    assert doc["period"] == "2026-01" and doc["survey_instant_utc"] == "2026-01-28T11:00:00+00:00"
    # deterministic key order: the text is what sorted dumping gives
    assert text == json.dumps(doc, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def test_same_close_same_manifest(make_close_result, tmp_path):
    res = make_close_result("2026-01")
    a = write_manifest(res, tmp_path / "a.json").read_bytes()
    b = write_manifest(res, tmp_path / "b.json").read_bytes()
    assert a == b


def test_versions_of_absent_packages(monkeypatch):
    from importlib import metadata

    real = metadata.version

    def fake(name):
        if name == "lazrs":
            raise metadata.PackageNotFoundError(name)
        return real(name)

    monkeypatch.setattr(metadata, "version", fake)
    assert library_versions()["lazrs"] == "not installed"


def test_manifest_is_written_atomically(make_close_result, tmp_path, monkeypatch):
    from pathlib import Path

    res = make_close_result("2026-01")
    path = write_manifest(res, tmp_path / "run.json")
    before = path.read_bytes()

    def fail(self, *a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(Path, "write_text", fail)
    res.run["parameters"]["changed"] = 1
    with pytest.raises(OSError, match="disk full"):
        write_manifest(res, path)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["run.json"]
