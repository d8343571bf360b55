"""``python -m inventory._demo.run_demo DIR`` (``make demo``) on a copy of the sample site."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
SITE = REPO / "sample_site"


@pytest.mark.skipif(not (SITE / "site.toml").is_file(), reason="sample_site/ not generated yet")
def test_run_demo_checks_an_existing_site(tmp_path: Path, capsys):
    from inventory._demo.run_demo import main

    copy = tmp_path / "demo_site"
    shutil.copytree(SITE, copy, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*"))
    assert main([str(copy), "--check-only"]) == 0
    out = capsys.readouterr().out
    assert f"using the site already in {copy}" in out
    assert "check: ok" in out


@pytest.mark.skipif(not (SITE / "site.toml").is_file(), reason="sample_site/ not generated yet")
def test_run_demo_rejects_a_broken_site(tmp_path: Path, capsys):
    from inventory._demo.run_demo import main

    copy = tmp_path / "demo_site"
    shutil.copytree(SITE, copy, ignore=shutil.ignore_patterns("closes", "ledger.sqlite*", "surveys"))
    (copy / "materials.csv").write_text("material,bulk_density_t_m3\ncoal,abc\n")
    assert main([str(copy)]) == 2
    assert "materials.csv" in capsys.readouterr().err
