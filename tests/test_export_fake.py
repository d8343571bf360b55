"""A small synthetic close (three cones on a flat yard, EPSG:25832) for the ledger and exporters.

The exporters only copy and present the figures of a close, so their tests need a
CloseResult whose tables are consistent with each other (variance = survey - book, the
footprints cover the piles, the surface shows the piles), not real survey numbers.
The ``make_close_result`` fixture (tests/conftest.py) builds one; the tests here check that the fake itself is consistent,
so that the exporter tests compare against something sound.
"""

from __future__ import annotations

import numpy as np
import pytest


def test_fake_is_consistent(close_result):
    p = close_result.piles
    # the identities the results module states
    np.testing.assert_allclose(p.variance_t, p.survey_t - p.book_t, rtol=0, atol=1e-9)
    book = p.opening_t + p.receipts_t - p.dispatches_t + p.transfers_in_t - p.transfers_out_t
    np.testing.assert_allclose(p.book_t, book, atol=1e-9)
    # one pile in each of the three cases the exporters colour
    assert list(p.out_of_tolerance) == [False, False, True]
    assert list(p.significant) == [False, True, True]


def test_fake_volumes_near_the_cone_formula(close_result, fake_cones):
    # cone V = pi r^2 h / 3 (handbook formula); the grid sum is within a few percent at 0.5 m
    for (_, _, _, _, r, h, _, _), v in zip(fake_cones, close_result.piles.volume_m3):
        assert v == pytest.approx(np.pi * r * r * h / 3.0, rel=0.03)
