"""The committed sample site run through the real survey chain, once per test session.

``load_site`` -> :func:`inventory.survey.measure.measure_survey` -> :func:`inventory.volume.measure.measure_piles`
for both surveys of ``sample_site/``. The survey step takes a minute or two per survey, so
the results are cached in this module (a process-wide cache: every test file that imports
it shares one run). Nothing is cached on disk, so a change to the code is always measured.
"""

from __future__ import annotations

import json
import warnings
from functools import lru_cache
from pathlib import Path
from typing import Any

import pandas as pd

# bound at import, before any test patches inventory.survey.measure.measure_survey with a cache
from inventory.survey.measure import measure_survey as _measure_survey

SAMPLE = Path(__file__).resolve().parents[1] / "sample_site"
TRUTH = SAMPLE / "truth.json"


def have_sample() -> bool:
    """True when the committed sample site and its truth are present."""
    return TRUTH.is_file()


@lru_cache(maxsize=None)
def truth() -> dict:
    """``sample_site/truth.json``."""
    return json.loads(TRUTH.read_text())


@lru_cache(maxsize=None)
def site() -> Any:
    """The loaded sample site (the loader's warnings about the planted repeated ticket muted)."""
    from inventory.site.load import load_site

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return load_site(SAMPLE)


@lru_cache(maxsize=None)
def _out_root() -> Path:
    import atexit
    import shutil
    import tempfile

    root = Path(tempfile.mkdtemp(prefix="inventory-sample-chain-"))
    atexit.register(shutil.rmtree, root, ignore_errors=True)
    return root


@lru_cache(maxsize=None)
def survey(date: str) -> Any:
    """:class:`inventory.survey.measure.SurveyResult` of one survey, run once per session.

    Its files (surface and coverage GeoTIFFs, classified LAZ) are written to a temporary
    folder removed at exit, so tests that need them share the one run too.
    """
    out = _out_root() / date
    out.mkdir(exist_ok=True)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return _measure_survey(site(), date, out_dir=out)


@lru_cache(maxsize=None)
def volumes(date: str) -> pd.DataFrame:
    """``measure_piles`` table of one survey, as ``inventory close`` computes it."""
    from inventory.errors import CoverageWarning
    from inventory.volume.measure import BaseSurfaces, measure_piles

    surface = survey(date).surface
    base = BaseSurfaces.from_site(site(), surface.grid)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", CoverageWarning)
        return measure_piles(surface, site().piles, site().materials, base)
