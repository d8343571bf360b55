"""Outputs of a close: workbook, GeoPackage layers, GeoTIFFs, HTML report, run manifest.

Every writer builds its file beside the destination under a temporary name and renames it
into place, so a reader sees either the previous file or the complete new one.
"""

from .layers import write_layers
from .manifest import sha256_file, write_manifest
from .rasters import write_raster
from .report import write_report
from .workbook import write_history_workbook, write_workbook

__all__ = [
    "write_workbook", "write_history_workbook", "write_layers", "write_raster",
    "write_report", "write_manifest", "sha256_file",
]
