"""Texts shown to people by more than one module, kept in one place so they say the same thing.

The workbook, the HTML report and the reconciliation all explain the sign of a variance and
carry the same cautions; each imports the text from here rather than writing its own.
"""

from __future__ import annotations

__all__ = ["CAUTIONS", "DEFAULT_VERTICAL_REFERENCE", "REASON_CODES", "ROW_LEGEND", "SIGN_CONVENTION"]

#: What the outputs say about heights when ``site.toml`` states no vertical reference
#: (``vertical_reference`` or ``vertical_crs``): the heights are those of the survey files.
DEFAULT_VERTICAL_REFERENCE = "as surveyed, metres"

#: How the figures of a close are signed (workbook Summary, Variance and Notes sheets, report).
SIGN_CONVENTION = (
    "Sign convention: variance = survey - book. A positive variance means more stock on the "
    "ground than in the books (a gain), a negative one less (a loss). An adjustment is posted "
    "to book stock: positive increases it, negative decreases it. Movements are signed + into "
    "a pile, - out of it."
)

#: Safety and legal-metrology cautions (workbook Summary and Notes sheets, report).
CAUTIONS = (
    "Survey volumes are estimates with the uncertainty shown; they are not weighings.",
    ("Where a figure feeds trade, tax or safety decisions, legal-for-trade weighing rules, "
     "local legal metrology rules, codes and licensed surveyors take precedence."),
    "Never walk on stockpiles or under reclaim faces to improve a scan.",
)

#: Reason codes of the adjustment journal (our own naming) -> meaning, in the order the
#: reconciliation checks them.
REASON_CODES: dict[str, str] = {
    "NOT_SURVEYED": "no survey figure for the pile: book carried forward unadjusted",
    "SCALE_BIAS": "at least half of it explained by the estimated bias of a named belt scale, the rest "
                  "within k sigma: have the scale checked",
    "TRANSFER_SUSPECT": "mirrors an opposite variance on another pile of the same material (one of "
                        "the two significant, the pair's transfer estimate beyond k sigma): suspected "
                        "unrecorded transfer",
    "WITHIN_SIGMA": "variance within k sigma of zero: inside the combined uncertainty of survey and book",
    "WITHIN_TOL": "significant but within the material's tolerance: routine stock adjustment",
    "UNEXPLAINED": "significant and out of tolerance with no explanation found: investigate before posting",
    # codes of journal lines, not of piles
    "TRANSFER": "proposed transfer line of a suspected unrecorded transfer, from the pile short to the "
                "pile over: book it as a transfer once confirmed",
    "TRANSFER_RESIDUAL": "what is left of a pile's variance once the proposed transfer is taken off",
}

#: Legend of the row colours, by the flag column that sets them (an out-of-tolerance row
#: takes that colour even when it is also significant).
ROW_LEGEND: dict[str, str] = {
    "out_of_tolerance": "Out of tolerance: |variance %| exceeds the material's tolerance",
    "significant": "Significant: |variance| exceeds k x its combined sigma (within tolerance)",
}
