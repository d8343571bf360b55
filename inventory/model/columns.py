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
    "survey_sigma_quadrature_t": ("Survey uncertainty, piles in quadrature",
                                  "The piles' survey uncertainties added in quadrature, as if no error "
                                  "were shared between piles: for comparison with survey_sigma_t of a total."),
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
    "variance_z": ("Variance in sigmas",
                   "The variance divided by its standard uncertainty (z): how many sigmas it lies from "
                   "zero; beyond k (site.toml [reconcile] significance_k) it is significant."),
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
    "close_id": ("Ledger close", "The ledger's id of the close that wrote this row or file (run.json close_id; empty when not recorded)."),
    "closed_utc": ("Closed (UTC)", "When that close was recorded in the ledger: UTC, ISO 8601."),

    # inventory history (ledger rows and their totals)
    "first_period": ("First period", "First month of the span (YYYY-MM)."),
    "last_period": ("Last period", "Last month of the span (YYYY-MM)."),
    "months": ("Months", "Number of months in the span."),
    "start_t": ("Start stock",
                "Survey stock at the start of the span (the survey of the month before it; "
                "the opening balance when there is none)."),
    "end_t": ("End stock", "Survey stock at the last survey of the span."),
    "monthly_variance_t": ("Sum of monthly variances",
                           ("The months' variances added up; equal to the span's variance when "
                            "every variance was adjusted to the survey.")),
    "significant_count": ("Significant", "Number of pile-months with a significant variance."),
    "out_of_tolerance_count": ("Out of tolerance", "Number of pile-months out of tolerance."),
    "reason_codes": ("Reason codes", "Reason codes of the adjustments, each with how often it occurs."),
    # the Variance sheet's own columns (formulas over the pile figures)
    "quadrature_sigma_t": ("Independent sigma",
                           "Square root of book sigma squared plus survey sigma squared: the "
                           "variance sigma if book and survey erred independently."),
    "shared_sigma_t": ("Shared terms removed",
                       ("What the errors common to survey and opening (same bulk density, same "
                        "fixed base) take off: variance sigma squared = book sigma squared + "
                        "survey sigma squared - this squared.")),
    "variance_2sigma_t": ("Variance 2 sigma", "Twice the variance uncertainty."),
    "tolerance_t": ("Tolerance in tonnes", "The tolerance times the absolute book stock."),
    "survey_minus_book_t": ("Survey minus book", "Survey stock minus book stock, recomputed by formula."),
    # movements
    "kind": ("Kind", "Kind of record: weighbridge, belt or transfer; for duplicates exact or suspected."),
    "reference": ("Reference", "Ticket id, belt scale and interval, or transfer reference."),
    "time_utc": ("Time (UTC)", "When the movement happened, in UTC (a belt interval's end)."),
    "time_local": ("Time (local)", "The same time in the site's time zone."),
    "tonnes": ("Tonnes", "Tonnes of the record: for a movement + into the pile, - out of it."),
    "scale_id": ("Scale", "Weighing instrument that weighed it (site.toml [[scales]])."),
    "counted": ("Counted", "TRUE when the record counts in the books (FALSE: a dropped duplicate)."),
    "before_survey": ("Before survey", "TRUE when it falls at or before the survey instant."),
    "note": ("Note", "Note from the input file or the checks."),
    "source": ("Source file", "Input file the record came from."),
    "line": ("Line", "Line number in the source file, or the journal line number."),
    # the posting journal
    "posting_date": ("Posting date", "Date to post the line on: the last day of the period."),
    "to_pile_id": ("To pile", "For a transfer line, the pile the quantity moves to."),
    "quantity_t": ("Quantity",
                   ("Tonnes of the line: an adjustment + increases the pile's book stock, - "
                    "decreases it; a transfer moves it from the pile to the other pile.")),
    "unit": ("Unit", "Unit of the quantity (t, metric tonnes)."),
    "unit_cost": ("Unit cost", "Stock value per tonne of the material (materials.csv unit_cost)."),
    "value": ("Value", "Quantity times unit cost, in the journal's currency."),
    "currency": ("Currency", "Currency of the unit cost and the value (site.toml [journal] currency)."),
    "account": ("Account", "Stock account code of the material (site.toml [journal.accounts])."),
    "location": ("Location", "Storage location code of the pile (site.toml [journal.locations])."),
    "to_location": ("To location", "Storage location code of the pile a transfer moves to."),
    "reason_code": ("Reason code", "Why the line is proposed (see the reason codes under the journal)."),
    "reason": ("Reason", "The reason in a sentence, with the figures behind it."),
    "status": ("Status",
               ("post: posted to book stock by this close; hold: listed, not posted (the "
                "adjustment policy or an unexplained variance).")),
    # scale diagnostics
    "piles": ("Piles", ("The piles concerned: in Scales the piles the scale fed; in Materials "
                        "and other totals how many piles were counted.")),
    "bias_pct": ("Scale bias", "Estimated reading error of the scale this month (+ reads high)."),
    "bias_sigma_pct": ("Scale bias uncertainty", "Standard uncertainty (1 sigma) of the bias."),
    "history_bias_pct": ("Scale bias over months", "Bias estimated over this and earlier months pooled."),
    "history_bias_sigma_pct": ("Pooled bias uncertainty", "Standard uncertainty (1 sigma) of the pooled bias."),
    "history_months": ("Months pooled", "Number of months in the pooled fit."),
    "flagged": ("Flagged", "TRUE when the scale should be checked: bias beyond k sigma and beyond its MPE."),
    "message": ("Message", "The diagnosis in a sentence."),
    "detail": ("Detail", "Why the record is taken for a duplicate."),
    # measured change between surveys
    "previous_survey_t": ("Previous survey stock", "Survey stock of the previous survey."),
    "measured_change_t": ("Measured change", "This survey's stock minus the previous survey's."),
    "net_movement_t": ("Net movement",
                       ("Every movement booked between the two surveys: receipts and transfers "
                        "in less dispatches and transfers out.")),
    "difference_t": ("Difference", "Measured change minus net movement."),
    "difference_sigma_t": ("Difference uncertainty", "Standard uncertainty (1 sigma) of the difference."),
    "opening_gap_t": ("Opening gap", "Variance minus difference: the opening balance's own error."),
    # belt split
    "interval": ("Interval", "Belt-scale reading interval (start/end)."),
    "interval_t": ("Interval tonnes", "Tonnes the belt scale read over the whole interval."),
    "start": ("Start", "Start of the part of the interval (UTC)."),
    "end": ("End", "End of the part of the interval (UTC)."),
    "share": ("Share", "Part of the interval's tonnes given to this row (0 to 1)."),
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
