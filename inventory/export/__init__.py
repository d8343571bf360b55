"""Outputs of a close: workbook, GeoPackage layers, GeoTIFFs, their SLD styles and legend,
HTML report, run manifest.

Every writer builds its file beside the destination under a temporary name and renames it
into place, so a reader sees either the previous file or the complete new one.
"""

from inventory.export.cells import write_csv
from inventory.export.journal import mark_superseded, posting_journal, write_journal_csv
from inventory.export.layers import write_layers
from inventory.export.manifest import sha256_file, write_manifest
from inventory.export.rasters import write_change, write_thickness
from inventory.export.report import write_report
from inventory.export.styles import write_legend, write_styles
from inventory.export.workbook import write_history_workbook, write_workbook

__all__ = [
    "write_workbook", "write_history_workbook", "write_layers", "write_thickness", "write_change",
    "write_report", "write_manifest", "sha256_file", "write_csv", "write_styles", "write_legend",
    "write_journal_csv", "posting_journal", "mark_superseded",
]
