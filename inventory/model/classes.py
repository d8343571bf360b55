"""ASPRS point classes that the survey step reads and writes.

Values from the ASPRS LAS Specification 1.4 R15 (2019), Table 17 "ASPRS Standard Point
Classes (Point Data Record Formats 6-10)". Formats 0-5 hold only classes 0-31, which is why
everything we write uses point format 6 or above (class 18 and 19 need the full byte only
from 32 on, but one writer format for every survey keeps the files alike).
"""

from __future__ import annotations

__all__ = [
    "NEVER_CLASSIFIED",
    "UNCLASSIFIED",
    "GROUND",
    "LOW_NOISE",
    "HIGH_NOISE",
    "OVERHEAD_STRUCTURE",
    "CLASS_NAMES",
    "SURFACE_CLASS",
]

#: Created, never classified (LAS 1.4 R15, Table 17, value 0).
NEVER_CLASSIFIED = 0
#: Unclassified (Table 17, value 1); we write it for "other": vehicles, people, stacks of parts.
UNCLASSIFIED = 1
#: Ground (Table 17, value 2); for a stockyard this is the terrain with the piles on it.
GROUND = 2
#: Low point (noise) (Table 17, value 7).
LOW_NOISE = 7
#: High noise (Table 17, value 18).
HIGH_NOISE = 18
#: Overhead structure (Table 17, value 19; "e.g. conveyors, mining equipment, traffic lights").
OVERHEAD_STRUCTURE = 19

#: The class the surface grid is built from.
SURFACE_CLASS = GROUND

#: Short names for summaries and reports.
CLASS_NAMES = {
    NEVER_CLASSIFIED: "never classified",
    UNCLASSIFIED: "other",
    GROUND: "surface",
    LOW_NOISE: "low noise",
    HIGH_NOISE: "high noise",
    OVERHEAD_STRUCTURE: "overhead structure",
}
