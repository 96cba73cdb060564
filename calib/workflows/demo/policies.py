"""The demo's policy comparison: calendar spreads sold and hedged under three calibration
policies of the yield volatility, on the invented scenario.

The policies (settings files written to ``DIR/policies/``): ``free`` (no floor on the yield
volatility, no pull towards its historical level: the vanilla quotes alone decide it),
``floor-50`` and ``floor-100`` (the yield volatility at least 50 % and 100 % of its historical
level, the default pull towards it). The option: a call on the calendar spread of the first two
futures delivering after the scenario's last trade date less :data:`BEFORE_END` days, at the
money on the first sale day, expiring a week before the near delivery; sold every ``every``
trading days of the last ``window`` trading days before its expiry, hedged daily.
"""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import numpy as np

from calib.compute.executor import InlineExecutor
from calib.output.hedge import render_policy_page, write_policy_csv
from calib.store.engine import Store
from calib.store.quotes import load_day
from calib.workflows.hedge import Trade
from calib.workflows.hedge_policies import Policy, PolicyComparison, compare_policies

POLICIES: dict[str, str] = {
    "free": "[calibration]\nyield_floor = 0.0\nanchor_weight = 0.0\n",
    "floor-50": "[calibration]\nyield_floor = 0.5\n",
    "floor-100": "[calibration]\nyield_floor = 1.0\n",
}
"""The policies compared: name -> settings file."""

BEFORE_END = 10
"""The option expires about this many calendar days before the scenario's last trade date."""


def demo_trade(store: Store, code: str, days: list[date], window: int) -> tuple[Trade, date]:
    """The demo's spread call and its first sale day (module notes)."""
    last = days[-1] - timedelta(days=BEFORE_END)
    guess = [d for d in days if d <= last][-window]
    with store.sessions.begin() as session:
        quotes = load_day(session=session, commodity=code, trade_date=guess)
    listed = [d.astype(date) for d in quotes.futures.delivery]
    near, far = [d for d in listed if d >= last + timedelta(days=7)][:2]
    expiry = max(d for d in days if d <= near - timedelta(days=7))
    start = [d for d in days if d < expiry][-window]
    with store.sessions.begin() as session:
        quotes = load_day(session=session, commodity=code, trade_date=start)
    legs = quotes.futures.settle_for(np.array([near, far], dtype="datetime64[D]"))
    strike = round(float(legs[1] - legs[0]), 1)
    return Trade(expiry, strike, "call", near=near, far=far), start


def compare_demo_policies(
    store: Store,
    code: str,
    days: list[date],
    window: tuple[int, int],
    directory: Path,
    by: str,
) -> PolicyComparison:
    """Write the policies, compare them (their study runs fitted into the demo's store), and
    write ``policies.csv`` and the page (``index.html``, ``policies.png``) into ``directory``."""
    directory.mkdir(parents=True, exist_ok=True)
    policies = []
    for name, text in POLICIES.items():
        path = directory / f"{name}.toml"
        path.write_text(text, encoding="utf-8")
        policies.append(Policy(name, path))
    trade, start = demo_trade(store, code, days, window[0])
    every = window[1]
    result = compare_policies(
        store,
        [code],
        policies,
        trade,
        start=start,
        end=trade.expiry,
        every=every,
        by=by,
        executor=InlineExecutor(),
    )
    rows = result.to_list()
    write_policy_csv(rows, directory / "policies.csv")
    title = f"{code} {trade.describe()}; sold every {every} trading days from {start}"
    render_policy_page(rows, title, directory)
    return result
