"""What every output column means: a title, a description and the unit its name carries.

One dictionary for every exporter (GeoPackage ``gpkg_data_columns``, the workbook), so a
column is described once. A column's unit comes from the ending of its name (``_t`` tonnes,
``_m3`` cubic metres, ...): see :func:`unit_of`.
"""

from __future__ import annotations

__all__ = ["FIELDS", "unit_of"]

#: Units by the ending of a column name: (symbol, words). ``density_t_m3`` is matched first.
_UNITS = (
    ("_t_m3", ("t/m3", "tonnes per cubic metre")),
    ("_m3", ("m3", "cubic metres")),
    ("_m2", ("m2", "square metres")),
    ("_pct", ("%", "percent")),
    ("_t", ("t", "tonnes")),
    ("_m", ("m", "metres")),
)

#: Column -> (title, description) for every column an output table or layer carries; the
#: unit is added from the column name (:func:`unit_of`). One dictionary for the GeoPackage's
#: ``gpkg_data_columns`` and the workbook's column list.
FIELDS: dict[str, tuple[str, str]] = {
    "pile_id": ("Pile", "Identifier of the pile in the site's pile register (piles.gpkg)."),
    "material": ("Material", "Material held in the pile (materials.csv)."),
    "base_method": ("Base method", ("How the base surface was taken: floor, level:<z> or toe; for stock outside the "
                                     "footprints also ground (the yard fitted around it).")),
    "area_m2": ("Area", "Horizontal area of the polygon."),
    "scanned_fraction": ("Scanned fraction",
                         ("Share of the footprint's cells hit by the scan (0 to 1); the rest "
                          "is interpolated.")),
    "volume_m3": ("Volume", "Volume between the surveyed surface and the base, from the grid."),
    "volume_sigma_m3": ("Volume uncertainty", "Standard uncertainty (1 sigma) of the volume."),
    "sigma_random_m3": ("Volume uncertainty, random",
                        "Part of the volume uncertainty from the scatter of the points in each cell."),
    "sigma_correlated_m3": ("Volume uncertainty, correlated",
                            ("Part of the volume uncertainty from surface errors shared by "
                             "neighbouring cells (registration, range bias).")),
    "sigma_interpolated_m3": ("Volume uncertainty, interpolated",
                              "Part of the volume uncertainty from unscanned cells filled by interpolation."),
    "sigma_base_m3": ("Volume uncertainty, base",
                      "Part of the volume uncertainty from the base surface (floor, level or toe plane)."),
    "volume_ci95_m3": ("Volume, 95 % half-width",
                       "Half-width of the 95 % interval of the volume (1.96 sigma)."),
    "volume_low95_m3": ("Volume, 95 % low", "Lower end of the 95 % interval of the volume."),
    "volume_high95_m3": ("Volume, 95 % high", "Upper end of the 95 % interval of the volume."),
    "volume_tin_m3": ("Volume (TIN)", "Volume from the triangulated surface, as a cross-check."),
    "below_base_m3": ("Volume below base", "Volume where the surface lies below the base."),
    "density_t_m3": ("Bulk density", "Bulk density used to turn volume into tonnes."),
    "survey_t": ("Survey stock", "Stock measured by the survey (volume times density)."),
    "survey_dry_t": ("Survey stock, dry", "Survey stock less the material's moisture."),
    "survey_sigma_t": ("Survey uncertainty", "Standard uncertainty (1 sigma) of the survey stock."),
    "base_sigma_t": ("Base uncertainty", "Part of the survey uncertainty due to the base surface."),
    "opening_t": ("Opening stock", "Book stock at the start of the period."),
    "receipts_t": ("Receipts", "Tonnes received into the pile up to the survey instant."),
    "dispatches_t": ("Dispatches", "Tonnes dispatched from the pile up to the survey instant."),
    "transfers_in_t": ("Transfers in", "Tonnes moved into the pile from other piles."),
    "transfers_out_t": ("Transfers out", "Tonnes moved out of the pile to other piles."),
    "book_t": ("Book stock", "Book stock at the survey instant."),
    "book_sigma_t": ("Book uncertainty", "Standard uncertainty (1 sigma) of the book stock."),
    "variance_t": ("Variance", "Survey stock minus book stock: positive is a gain, negative a loss."),
    "variance_pct": ("Variance share", "Variance as a percentage of the book stock."),
    "variance_sigma_t": ("Variance uncertainty",
                         "Standard uncertainty (1 sigma) of the variance, survey and book combined."),
    "significant": ("Significant",
                    "1 when the variance exceeds k sigma, 0 when not, empty when undecided."),
    "tolerance_pct": ("Tolerance", "The material's variance tolerance."),
    "out_of_tolerance": ("Out of tolerance",
                         ("1 when the variance is outside the tolerance, 0 when not, empty "
                          "when undecided.")),
    "adjustment_t": ("Adjustment", "Adjustment posted to book stock: positive increases it."),
    "after_survey_net_t": ("Net after survey",
                           "Net movements between the survey instant and the end of the period."),
    "closing_t": ("Closing stock", "Book stock at the end of the period, after the adjustment."),
    "flags": ("Flags", "Warnings on the pile from the volume step and the reconciliation."),
    "points": ("Points", "Number of survey points read."),
    "density_sd_t_m3": ("Density uncertainty", "Standard uncertainty (1 sigma) of the bulk density."),
    "moisture_pct": ("Moisture", "The material's moisture content, share of the wet mass."),
    "tin_disagrees": ("TIN disagrees",
                      "1 when the grid and TIN volumes differ by more than the 95 % interval."),
    "base_residual_m": ("Base residual",
                        "Fit residual of the base: RMS of a toe plane, the floor sigma, 0 for a level."),
    "base_note": ("Base note", "How the base was found, or why it could not be."),
    "region_id": ("Region", "Identifier of a region of stock outside every footprint (this run only)."),
    "max_thickness_m": ("Greatest thickness", "Greatest thickness of the material above the base."),
    "centre_x_m": ("Centre easting", "Easting of the volume's centre, site CRS."),
    "centre_y_m": ("Centre northing", "Northing of the volume's centre, site CRS."),
    "next_to": ("Next to", "Footprints the region touches (a pile grown past its polygon)."),
    "edge_cut_length_m": ("Edge through material",
                          "Length of the footprint edge beyond which material is still thicker than the threshold."),
    "edge_max_thickness_m": ("Thickness at edge",
                             "Greatest thickness just outside the footprint edge."),
    "period": ("Period", "The month closed (YYYY-MM)."),
    "survey_date": ("Survey date", "Date of the survey the figures rest on (YYYY-MM-DD)."),
    "close_id": ("Close id", "The ledger's id of the close that wrote this file (run.json close_id)."),
    "closed_utc": ("Closed (UTC)", "When that close was recorded in the ledger: UTC, ISO 8601."),

    # inventory history (ledger rows and their totals)
    "reason_code": ("Reason code", "Code of the pile's adjustment journal line (see the reason codes)."),
    "reason": ("Reason", "Why the pile was adjusted, in words."),
    "first_period": ("First period", "First month of the span (YYYY-MM)."),
    "last_period": ("Last period", "Last month of the span (YYYY-MM)."),
    "months": ("Months", "Number of months in the span."),
    "piles": ("Piles", "Number of piles counted."),
    "start_t": ("Start stock",
                "Survey stock at the start of the span (the survey of the month before it; "
                "the opening balance when there is none)."),
    "end_t": ("End stock", "Survey stock at the last survey of the span."),
    "net_movement_t": ("Net movement",
                       "Every movement booked between the start and the end survey: receipts "
                       "and transfers in less dispatches and transfers out."),
    "monthly_variance_t": ("Sum of monthly variances",
                           ("The months' variances added up; equal to the span's variance when "
                            "every variance was adjusted to the survey.")),
    "significant_count": ("Significant", "Number of pile-months with a significant variance."),
    "out_of_tolerance_count": ("Out of tolerance", "Number of pile-months out of tolerance."),
    "reason_codes": ("Reason codes", "Reason codes of the adjustments, each with how often it occurs."),
}

def unit_of(column: str) -> tuple[str, str] | None:
    """The unit a column name carries, as (symbol, words), or ``None``.

    >>> unit_of("variance_t")
    ('t', 'tonnes')
    >>> unit_of("density_t_m3")
    ('t/m3', 'tonnes per cubic metre')
    >>> unit_of("pile_id") is None
    True
    """
    for ending, unit in _UNITS:
        if column.endswith(ending):
            return unit
    return None
