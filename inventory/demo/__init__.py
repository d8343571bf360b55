"""The invented demo terminal and the laser-scan simulator that makes ``sample_site/``.

``write_sample_site(dest, seed)`` writes the whole site; :mod:`inventory.demo.simulate` holds
the scanner simulator (``scan``) that tests may use on their own heightfields and solids.
"""

from __future__ import annotations

from .sample import DEFAULT_SEED, write_sample_site

__all__ = ["DEFAULT_SEED", "write_sample_site"]
