"""The invented demo terminal and the laser-scan simulator that makes ``sample_site/``.

``write_sample_site(dest, seed)`` writes the whole site; :mod:`inventory._demo.simulate` holds
the scanner simulator (``scan``) that tests may use on their own heightfields and solids.
"""

from __future__ import annotations

from inventory._demo.sample import DEFAULT_SEED, write_sample_site

__all__ = ["DEFAULT_SEED", "write_sample_site"]
