"""One trade date of the invented demo chain (``fixtures/demo``) as calibration input.

Read straight from the CSV files with pandas (no store): forwards are the day's futures
settlements of each option's delivery, discount factors from the day's zero curve interpolated
linearly in maturity, times ACT/365 from the trade date (as the workflows build them).
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path

import numpy as np
import pandas as pd

from calib.calibrate import OptionQuotes
from calib.model.twofactor import TwoFactorParams

DEMO = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
FIRST_DAY = "2031-01-06"


@cache
def _tables() -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    opts = pd.read_csv(DEMO / "options.csv", parse_dates=["trade_date", "delivery", "expiry"])
    fut = pd.read_csv(DEMO / "futures.csv", parse_dates=["trade_date", "delivery"])
    rates = pd.read_csv(DEMO / "rates.csv", parse_dates=["trade_date", "maturity"])
    return opts, fut, rates


def demo_params() -> TwoFactorParams:
    """The scenario's generating parameters (``commodity.json``)."""
    data = json.loads((DEMO / "commodity.json").read_text())["true_parameters"]
    return TwoFactorParams(**data)


def demo_day(trade_date: str = FIRST_DAY) -> OptionQuotes:
    opts, fut, rates = _tables()
    day = pd.Timestamp(trade_date)
    o = opts[opts.trade_date == day].reset_index(drop=True)
    f = fut[fut.trade_date == day].set_index("delivery")["settle"]
    r = rates[rates.trade_date == day].sort_values("maturity")
    t = (o.expiry - day).dt.days.to_numpy() / 365.0
    T = (o.delivery - day).dt.days.to_numpy() / 365.0
    r_years = (r.maturity - day).dt.days.to_numpy() / 365.0
    zero = np.interp(t, r_years, r.zero_rate.to_numpy())
    return OptionQuotes(
        t_expiry=t,
        t_delivery=T,
        is_call=(o.kind == "call").to_numpy(),
        strike=o.strike.to_numpy(dtype=float),
        forward=f.loc[o.delivery].to_numpy(dtype=float),
        discount=np.exp(-zero * t),
        premium=o.premium.to_numpy(dtype=float),
        labels=tuple(str(i) for i in range(len(o))),
    )
