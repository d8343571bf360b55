"""The result of one month close, as plain tables that the exporters and the ledger read.

Every table is a pandas DataFrame with the columns listed here; tonnes are metric tonnes
(wet unless the column says dry), volumes cubic metres, sigmas one standard deviation.
Sign convention everywhere: variance = survey - book; a positive variance means more stock
on the ground than in the books, and a positive adjustment increases book stock.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np

from inventory.model.grid import Surface
from inventory.model.texts import DEFAULT_VERTICAL_REFERENCE

__all__ = ["PILE_COLUMNS", "VOLUME_SIGMA_COLUMNS", "MOVEMENT_COLUMNS", "JOURNAL_COLUMNS", "LINE_COLUMNS",
           "POSTING_COLUMNS", "SCALE_COLUMNS", "CloseResult"]

#: The parts of ``volume_sigma_m3`` (added in quadrature; see docs/uncertainty.md), shown
#: beside it in the Piles sheet and the piles layer.
VOLUME_SIGMA_COLUMNS = ["sigma_random_m3", "sigma_correlated_m3", "sigma_interpolated_m3", "sigma_base_m3"]

#: Columns of ``CloseResult.piles`` (one row per pile), in display order.
PILE_COLUMNS = [
    "pile_id", "material", "base_method", "area_m2", "scanned_fraction",
    "volume_m3", "volume_sigma_m3", *VOLUME_SIGMA_COLUMNS, "volume_tin_m3", "below_base_m3",
    "density_t_m3", "survey_t", "survey_dry_t", "survey_sigma_t", "base_sigma_t",
    "opening_t", "receipts_t", "dispatches_t", "transfers_in_t", "transfers_out_t",
    "book_t", "book_sigma_t",
    "variance_t", "variance_pct", "variance_sigma_t", "significant", "tolerance_pct",
    "out_of_tolerance", "adjustment_t", "after_survey_net_t", "closing_t", "flags",
]

#: Columns of ``CloseResult.movements`` (every record that touched the books this period).
MOVEMENT_COLUMNS = [
    "kind",        # weighbridge | belt | transfer
    "reference",   # ticket id, scale id + interval, or transfer reference
    "time",        # tz-aware UTC timestamp (interval end for belts)
    "pile_id",
    "tonnes",      # signed: + into the pile, - out of it
    "scale_id",
    "counted",     # False for a duplicate ticket that was dropped
    "before_survey",  # True when it falls at or before the survey instant
    "note",
    "source",      # file the record came from
    "line",        # its line in that file
]

#: Columns of ``CloseResult.journal`` (one line per pile adjusted): the posted adjustment per
#: pile, as the ledger keeps it.
JOURNAL_COLUMNS = ["pile_id", "material", "adjustment_t", "reason_code", "reason"]

#: Columns of the journal as lines to post or hold (``Reconciliation.lines``): an adjustment
#: line per pile, or for a suspected transfer one transfer line (``quantity_t`` from
#: ``pile_id`` to ``to_pile_id``) plus a residual line per pile. ``quantity_t`` of an
#: adjustment is signed like the adjustment (+ increases book stock). status: post | hold.
LINE_COLUMNS = ["line", "pile_id", "to_pile_id", "material", "quantity_t", "reason_code", "reason",
                "status"]

#: Columns of the posting journal (workbook sheet "Journal", ``journal-<period>.csv``):
#: the lines with the period, posting date (the period's last day), the ledger's close id,
#: unit, value (quantity x the material's unit cost), account and location codes.
POSTING_COLUMNS = ["period", "posting_date", "close_id", "line", "pile_id", "to_pile_id", "material",
                   "quantity_t", "unit", "unit_cost", "value", "currency", "account", "location",
                   "to_location", "reason_code", "reason", "status"]

#: Columns of ``CloseResult.scale_diagnostics``.
SCALE_COLUMNS = ["scale_id", "piles", "tonnes", "bias_pct", "bias_sigma_pct", "history_bias_pct",
                 "history_bias_sigma_pct", "history_months", "flagged", "message"]


@dataclass
class CloseResult:
    """Everything one close produced, before it is written anywhere."""

    site_name: str
    period: str                      # YYYY-MM
    crs: str
    timezone: str
    survey_date: str                 # YYYY-MM-DD
    survey_instant: datetime         # UTC
    previous_survey_date: str | None
    piles: Any                       # DataFrame, PILE_COLUMNS
    footprints: Any                  # GeoDataFrame: pile_id, geometry
    movements: Any                   # DataFrame, MOVEMENT_COLUMNS
    journal: Any                     # DataFrame, JOURNAL_COLUMNS
    scale_diagnostics: Any           # DataFrame, SCALE_COLUMNS
    duplicates: Any                  # DataFrame: reference, kind (exact|suspected), detail
    surface: Surface
    thickness: np.ndarray            # surface - base on the survey grid (NaN outside piles)
    change: np.ndarray | None        # surface - previous surface, same grid
    coverage_gaps: Any               # GeoDataFrame: pile_id, area_m2, geometry
    survey_extent: Any               # GeoDataFrame: survey_date, points, geometry
    run: dict = field(default_factory=dict)  # inputs (path -> sha256), parameters, versions, timings
    #: Further tables a controller reads beside the main ones, by sheet title: e.g.
    #: "Belt split" (belt totals cut at routing changes and the survey instant),
    #: "Measured change" (change between two surveys vs net movement), "Materials".
    tables: dict = field(default_factory=dict)
    #: Reason codes of the adjustment journal: code -> what it means.
    reason_codes: dict = field(default_factory=dict)
    #: This month's rows of the belt-scale bias fit (``inventory.stock.reconcile.BIAS_ROW_COLUMNS``),
    #: kept by the ledger so that later months can pool them; None = none to keep.
    bias_rows: Any = None
    #: The ledger's id of this close and the UTC time it was recorded (ISO 8601, "Z"),
    #: set when the ledger reserves the close, before any output is written; None for a
    #: result that is not being recorded (tests, previews).
    close_id: int | None = None
    closed_utc: str | None = None
    #: What the survey heights are referred to (``site.toml`` ``vertical_reference``):
    #: written in the raster metadata and the GeoPackage layer descriptions.
    vertical_reference: str = DEFAULT_VERTICAL_REFERENCE
    #: Stock outside every footprint (``inventory.volume.unassigned.UNASSIGNED_COLUMNS`` and
    #: the region polygons, a GeoDataFrame); None when the close did not look for it.
    unassigned_stock: Any = None
    #: The journal as lines to post or hold, valued and coded (:data:`POSTING_COLUMNS` less
    #: period, posting_date and close_id); None = derived from ``journal`` (every line posted).
    posting: Any = None
