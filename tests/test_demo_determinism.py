"""``inventory sample`` reproduces the committed ``sample_site/`` byte for byte from its seed."""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from inventory._demo import DEFAULT_SEED, write_sample_site

REPO = Path(__file__).resolve().parent.parent
SITE = REPO / "sample_site"
#: Files the tool writes into a site; they are not part of the sample.
TOOL_OUTPUTS = ("closes", "ledger.sqlite")


def _digests(root: Path) -> dict[str, str]:
    out = {}
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root)
        if p.is_file() and not rel.parts[0].startswith(TOOL_OUTPUTS):
            out[rel.as_posix()] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.mark.slow
@pytest.mark.skipif(not (SITE / "site.toml").is_file(), reason="sample_site/ not generated yet")
def test_sample_regenerates_byte_for_byte(tmp_path: Path):
    """`inventory sample DIR --seed <default>` (the command line) writes the committed bytes."""
    from inventory.cli import main

    fresh = tmp_path / "site"
    assert main(["sample", str(fresh), "--seed", str(DEFAULT_SEED)]) == 0
    got, want = _digests(fresh), _digests(SITE)
    assert sorted(got) == sorted(want)
    differ = [name for name in want if got[name] != want[name]]
    assert not differ, f"regenerated files differ: {differ}"
    # built under a private temporary name, the site gets ordinary permissions when published
    import os
    mask = os.umask(0)
    os.umask(mask)
    assert fresh.stat().st_mode & 0o777 == 0o777 & ~mask
    assert (fresh / "materials.csv").stat().st_mode & 0o777 == 0o666 & ~mask


def test_sample_refuses_a_non_empty_folder(tmp_path: Path):
    from inventory.errors import InputError

    (tmp_path / "keep.txt").write_text("mine")
    with pytest.raises(InputError, match="not empty"):
        write_sample_site(tmp_path)
    assert [p.name for p in tmp_path.iterdir()] == ["keep.txt"]


def test_a_different_seed_gives_a_different_scan(tmp_path: Path):
    """The seed reaches the simulator (a cheap check on one station, not the whole site)."""
    import numpy as np

    from inventory._demo.scenario import SURVEYS, terminal_at
    from inventory._demo.simulate import scan

    st = SURVEYS[0].stations[0]
    scene = terminal_at(0, np.random.default_rng(1)).scene()
    a = scan(scene, st, rng=np.random.default_rng([1, 2]))
    b = scan(scene, st, rng=np.random.default_rng([1, 2]))
    c = scan(scene, st, rng=np.random.default_rng([2, 2]))
    assert np.array_equal(a.xyz, b.xyz)
    assert len(a) != len(c) or not np.array_equal(a.xyz, c.xyz)
