"""The open LiDAR samples of the laspy source distribution, fetched once per machine.

``laspy_data`` (session fixture) runs
``pip download --no-binary :all: --no-deps laspy==<installed version>`` into
``tests/.cache/`` (git-ignored), unpacks the sdist's ``tests/data/`` files next to it and
returns that folder. It skips, saying why, only when the download fails (offline). Import
the fixture into a test module with ``from _laspy_samples import laspy_data``.

Source: laspy on PyPI (BSD-2-Clause); the sample files are those its own tests use, e.g.
``autzen_trim.laz`` (airborne, provider classes 1 and 2, Oregon Lambert in feet).
"""

from __future__ import annotations

import subprocess
import sys
import tarfile
from pathlib import Path

import laspy
import pytest

CACHE = Path(__file__).resolve().parent / ".cache"


def fetch_laspy_samples() -> Path:
    """Download and unpack the laspy sdist's test data; returns the data folder."""
    version = laspy.__version__
    dest = CACHE / f"laspy-{version}-data"
    if (dest / "autzen_trim.laz").is_file():
        return dest
    sdist_dir = CACHE / "laspy-sdist"
    sdist_dir.mkdir(parents=True, exist_ok=True)
    tarball = sdist_dir / f"laspy-{version}.tar.gz"
    if not tarball.is_file():
        proc = subprocess.run(
            [sys.executable, "-m", "pip", "download", "--no-binary", ":all:", "--no-deps",
             f"laspy=={version}", "-d", str(sdist_dir)],
            capture_output=True, text=True, timeout=300)
        if proc.returncode != 0 or not tarball.is_file():
            tail = (proc.stderr or proc.stdout).strip().splitlines()[-1:] or ["no output"]
            raise RuntimeError(f"pip download of the laspy {version} sdist failed: {tail[0]}")
    tmp = dest.with_name(dest.name + ".part")
    tmp.mkdir(parents=True, exist_ok=True)
    prefix = f"laspy-{version}/tests/data/"
    with tarfile.open(tarball) as tar:
        for member in tar.getmembers():
            if member.isfile() and member.name.startswith(prefix) and "/" not in member.name[len(prefix):]:
                member.name = member.name[len(prefix):]
                tar.extract(member, tmp, filter="data")
    tmp.replace(dest)
    return dest


@pytest.fixture(scope="session")
def laspy_data() -> Path:
    """Folder with the laspy sdist's sample files (skips when the sdist cannot be fetched)."""
    try:
        return fetch_laspy_samples()
    except (RuntimeError, OSError, subprocess.TimeoutExpired) as err:
        pytest.skip(f"laspy sample data unavailable (offline?): {err}")
