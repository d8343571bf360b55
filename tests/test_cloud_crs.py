"""CRS handling: one transformer per input CRS, explicit axis order, vertical units."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import CRS, Transformer

from inventory.io.crs import (
    INTERNATIONAL_FOOT_M,
    US_SURVEY_FOOT_M,
    TransformerCache,
    parse_crs,
    vertical_unit_factor,
)
from inventory.errors import CRSError


def test_us_survey_feet_come_out_in_metres():
    # EPSG:2264 (NAD83 / North Carolina, ftUS) and EPSG:32119 (the same zone in metres).
    # The US survey foot is exactly 1200/3937 m (US Federal Register 1959; NIST SP 811).
    assert US_SURVEY_FOOT_M == pytest.approx(0.3048006096012192, abs=1e-15)
    r = TransformerCache().get("EPSG:2264", "EPSG:32119")
    x_ft = np.array([2_000_000.0, 2_100_000.0])
    y_ft = np.array([600_000.0, 700_000.0])
    z_ft = np.array([100.0, 3937.0])
    x, y, z = r(x_ft, y_ft, z_ft)
    ref = Transformer.from_crs("EPSG:2264", "EPSG:32119", always_xy=True)  # reference: pyproj
    rx, ry = ref.transform(x_ft, y_ft)
    np.testing.assert_allclose(x, rx, atol=1e-6)
    np.testing.assert_allclose(y, ry, atol=1e-6)
    np.testing.assert_allclose(z, z_ft * 1200 / 3937, rtol=1e-12)
    assert z[1] == pytest.approx(1200.0)
    # Same projection in both: plan coordinates also scale by the foot.
    np.testing.assert_allclose(x - 609_601.22, (x_ft - 2_000_000.0) * US_SURVEY_FOOT_M, atol=1e-3)


def test_vertical_unit_rules():
    assert vertical_unit_factor(CRS.from_epsg(2264)) == pytest.approx(US_SURVEY_FOOT_M)
    assert vertical_unit_factor(CRS.from_epsg(2994)) == pytest.approx(INTERNATIONAL_FOOT_M)  # Oregon Lambert ft
    assert vertical_unit_factor(CRS.from_epsg(25832)) == 1.0
    assert vertical_unit_factor(CRS.from_epsg(4326)) == 1.0
    # A compound CRS gives z its own unit: UTM 32N (m) + NAVD88 height (ftUS), EPSG:6360.
    assert vertical_unit_factor(CRS.from_user_input("EPSG:25832+6360")) == pytest.approx(US_SURVEY_FOOT_M)


def test_axis_order_is_easting_first():
    # EPSG:4326 declares latitude first; our transformer takes longitude first (always_xy).
    r = TransformerCache().get("EPSG:4326", "EPSG:32632")
    x, y, _ = r(np.array([9.0]), np.array([0.0]), np.array([0.0]))
    # Central meridian of UTM zone 32 is 9 E: easting 500,000 m, northing 0 at the equator.
    assert x[0] == pytest.approx(500_000.0, abs=1e-6)
    assert y[0] == pytest.approx(0.0, abs=1e-6)


def test_one_transformer_per_input_crs():
    cache = TransformerCache()
    a = cache.get("EPSG:2264", "EPSG:32119")
    assert cache.get(CRS.from_epsg(2264), "EPSG:32119") is a
    cache.get("EPSG:6543", "EPSG:32119")
    assert len(cache) == 2
    assert cache.get("EPSG:32119", "EPSG:32119").is_identity


def test_vertical_datum_change_refused():
    with pytest.raises(CRSError, match="vertical datum"):
        TransformerCache().get("EPSG:25832+5783", "EPSG:25832+3855")


def test_unknown_crs_names_where():
    with pytest.raises(CRSError, match="site.toml"):
        parse_crs("EPSG:999999", where="site.toml")
