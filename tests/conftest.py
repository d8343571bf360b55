"""Shared fixtures: paths to the repository's data and a factory for small valid sites."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(Path(__file__).resolve().parent))

from _sitebuilder import build_site  # noqa: E402


@pytest.fixture(scope="session")
def repo_root() -> Path:
    return REPO


@pytest.fixture(scope="session")
def sample_site_path() -> Path:
    """The committed sample site (read-only: copy it before closing)."""
    return REPO / "sample_site"


@pytest.fixture
def good_site(tmp_path: Path) -> Path:
    """A small valid site folder in a temporary directory; tests break one thing each."""
    return build_site(tmp_path / "site")


@pytest.fixture
def sample_copy(tmp_path: Path, sample_site_path: Path) -> Path:
    """A writable copy of the sample site (skips while it has not been generated)."""
    if not (sample_site_path / "site.toml").is_file():
        pytest.skip("sample_site/ has not been generated yet (inventory sample sample_site)")
    dest = tmp_path / "sample_site"
    shutil.copytree(sample_site_path, dest, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*"))
    return dest
