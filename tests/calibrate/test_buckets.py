"""Forward-mode bucket edges cover every option (regression: rounding below the last expiry)."""

from __future__ import annotations

import numpy as np

from calib.calibrate import bucket_edges
from calib.model.twofactor import bucket_coefficients, variance_coefficients


def test_last_edge_reaches_expiries_that_round_down() -> None:
    # ACT/365 year fractions d/365 whose 12-decimal rounding falls below them (d = 1, 3, 6, ...)
    expiry = np.array([1, 3, 6, 8, 11, 13]) / 365.0
    assert np.any(np.round(expiry, 12) < expiry)
    edges = bucket_edges(expiry)
    assert edges[0] == 0.0 and edges[-1] == expiry.max()
    a, b, c = bucket_coefficients(expiry, expiry + 0.1, edges, 1.2)
    whole = variance_coefficients(expiry, expiry + 0.1, 1.2)
    for split, total in zip((a, b, c), whole, strict=True):
        np.testing.assert_allclose(split.sum(axis=1), total, rtol=1e-12, atol=0.0)


def test_equal_expiries_share_one_edge() -> None:
    expiry = np.array([0.5, 0.5 + 1e-14, 1.0])
    assert bucket_edges(expiry).tolist() == [0.0, 0.5, 1.0]
