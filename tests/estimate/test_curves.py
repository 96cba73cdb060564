"""Curves from quotes (rolling slots) and every bad-data error with its message."""

from __future__ import annotations

import numpy as np
import pytest

from calib.errors import (
    BadPriceError,
    CurveGapError,
    CurveShapeError,
    EmptySlotError,
    FirstCurveError,
    QuoteTableError,
    TooFewContractsError,
    TooFewDaysError,
)
from calib.estimate import Curves, curves_from_quotes, fit
from tests.estimate.conftest import RATE, business_days, simulate_panel

D = np.datetime64


def test_slots_roll_to_the_nearest_eligible_deliveries() -> None:
    days = np.array(["2031-03-03", "2031-03-12", "2031-03-13"], dtype="datetime64[D]")
    dels = np.array(["2031-03-20", "2031-05-20", "2031-07-20"], dtype="datetime64[D]")
    td, dl = (a.ravel() for a in np.meshgrid(days, dels, indexing="ij"))
    settle = np.arange(1.0, 10.0)
    keep = ~((td == D("2031-03-12")) & (dl == D("2031-05-20")))  # one quote missing
    c = curves_from_quotes(td[keep], dl[keep], settle[keep], n_contracts=2, min_days_to_delivery=8)
    # 03-03: Mar and May; 03-12: Mar is 8 days ahead (eligible), May missing -> NaN;
    # 03-13: Mar is 7 days ahead (skipped), so the slots hold May and Jul
    np.testing.assert_array_equal(c.delivery[0], dels[:2])
    np.testing.assert_array_equal(c.delivery[1], dels[:2])
    np.testing.assert_array_equal(c.delivery[2], dels[1:])
    assert np.isnan(c.log_price[1, 1]) and np.isnan(c.tau[1, 1])
    assert c.tau[0, 0] == 17 / 365  # ACT/365 (common practice)
    np.testing.assert_allclose(np.exp(c.log_price[2]), [8.0, 9.0])


def test_quote_table_errors() -> None:
    td = np.array(["2031-03-03", "2031-03-03"], dtype="datetime64[D]")
    dl = np.array(["2031-05-20", "2031-05-20"], dtype="datetime64[D]")
    with pytest.raises(QuoteTableError, match="more than one settle for trade date 2031-03-03"):
        curves_from_quotes(td, dl, [1.0, 2.0])
    with pytest.raises(QuoteTableError, match=r"settle -1\.0 on row 1 .* positive finite"):
        curves_from_quotes(td, dl, [1.0, -1.0])
    with pytest.raises(QuoteTableError, match=r"settle inf on row 0"):
        curves_from_quotes(td, dl, [np.inf, 1.0])
    with pytest.raises(QuoteTableError, match="1-d of one length"):
        curves_from_quotes(td, dl[:1], [1.0, 2.0])


DAYS = np.array(["2031-03-03", "2031-03-04", "2031-03-05"], dtype="datetime64[D]")
TAU = np.array([[0.1, 0.2], [0.1, 0.2], [0.1, 0.2]])
PRICE = np.full((3, 2), 50.0)


def test_bad_prices_and_shapes() -> None:
    bad = PRICE.copy()
    bad[1, 1] = -2.0
    with pytest.raises(BadPriceError, match=r"price -2\.0 on day 1 \(2031-03-04\), slot 1"):
        Curves.from_prices(DAYS, TAU, bad)
    bad[1, 1] = np.inf
    with pytest.raises(BadPriceError, match="price inf on day 1"):
        Curves.from_prices(DAYS, TAU, bad)
    y = np.log(PRICE)
    y[2, 0] = -np.inf
    with pytest.raises(BadPriceError, match=r"log price -inf on day 2 .* not a finite number"):
        Curves(DAYS, TAU, y)
    tau = TAU.copy()
    tau[2, 1] = 0.0
    with pytest.raises(BadPriceError, match=r"time to maturity 0\.0 on day 2 .* must be > 0"):
        Curves(DAYS, tau, np.log(PRICE))
    with pytest.raises(CurveShapeError, match="dates must increase strictly"):
        Curves(DAYS[[0, 2, 1]], TAU, np.log(PRICE))
    with pytest.raises(CurveShapeError, match=r"need dates \(n_days,\)"):
        Curves(DAYS[:2], TAU, np.log(PRICE))


def test_empty_slot_and_first_curve() -> None:
    y = np.log(PRICE)
    y[:, 1] = np.nan
    with pytest.raises(EmptySlotError, match="contract slot 1 has no price on any day"):
        Curves(DAYS, TAU, y)
    y = np.log(PRICE)
    y[0, 0] = np.nan
    with pytest.raises(FirstCurveError, match=r"first day \(2031-03-03\) needs at least two"):
        Curves(DAYS, TAU, y)


def test_too_few_days_contracts_and_gaps() -> None:
    panel = simulate_panel(business_days(60), seed=3)
    with pytest.raises(TooFewDaysError, match="need at least 250 observation days, got 60"):
        fit(panel, RATE)
    two = Curves(panel.dates, panel.tau[:, :2], panel.log_price[:, :2])
    with pytest.raises(TooFewContractsError, match="need at least 3 contracts per day, got 2"):
        fit(two, RATE, min_days=10)
    # 2031-01-03 (Fri) to 2031-01-06 (Mon) is 3 days; allow at most 2
    with pytest.raises(
        CurveGapError,
        match="gap of 3 days between 2031-01-03 and 2031-01-06 exceeds the maximum of 2 days",
    ):
        fit(panel, RATE, min_days=10, max_gap_days=2)
