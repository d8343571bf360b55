"""Month-end stockpile inventory close from laser scans and weighed movements.

The public API, for a notebook that wants to do step by step what ``inventory close`` does:

>>> from inventory import load_site, measure_survey, measure_piles, book_stock
>>> from inventory import reconcile
>>> site = load_site("sample_site")                                  # doctest: +SKIP
>>> survey = measure_survey(site, "2026-10-31")                      # doctest: +SKIP
>>> piles = measure_piles(survey.surface, site.piles, site.materials)  # doctest: +SKIP

or all of it at once with :func:`close_period`. Heavy modules load on first use, so
``import inventory`` stays quick.
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from inventory._version import __version__

#: public name -> module that defines it
_API = {
    "load_site": "site",
    "check_site": "site",
    "Site": "site",
    "measure_survey": "survey",
    "measure_surveys": "survey",
    "SurveyResult": "survey",
    "measure_piles": "volume",
    "BaseSurfaces": "volume",
    "find_unassigned": "volume.unassigned",
    "report_volumes": "volume_report",
    "book_stock": "stock",
    "reconcile": "stock.reconcile",
    "close_period": "close",
    "reopen_period": "close",
    "period_history": "close",
    "Ledger": "ledger",
    "PgLedger": "ledger",
    "open_ledger": "close",
    "Grid": "model",
    "Surface": "model",
    "CloseResult": "model",
    "Period": "model",
}

__all__ = ["__version__", *_API]


def __getattr__(name: str) -> Any:
    if name in _API:
        module = import_module(f".{_API[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'inventory' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
