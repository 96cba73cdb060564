"""``calib.workflows.hedge.replay`` on a stored history, against a slow day-by-day loop.

The history: a generated scenario with one leg's settlement removed on one day and every
settlement removed on another (a missing day), fits approved at chosen times so that the set in
force changes, one morning has a set fitted too late to have been known (refused), and a stretch
has none. The loop below re-does the replay with the store's own queries and the per-option
pricer of calib.model.spread, one day at a time.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from pathlib import Path

import numpy as np
import pytest

from calib.model.spread import SpreadOption, spread_greeks, spread_law
from calib.policy.settings import RunSettings
from calib.store.engine import Store
from calib.store.quotes import ZeroCurve, load_day
from calib.store.runs import latest_approved
from calib.workflows import approve as approve_flow
from calib.workflows import hedge as hedge_flow
from calib.workflows.demo.scenario import generate, write_csv
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import fit_day as fit_one_day
from calib.workflows.ingest import NewCommodity, ingest_file
from tests.workflows.small_day import SPEC, write_estimate_file

FAST = RunSettings.from_dict({"calibration": {"refit_costs": False}})
UTC = dt.UTC
REL = 1e-9  # the same formulas by two routes; only summation order differs


def _at(day: dt.date, hour: int) -> dt.datetime:
    return dt.datetime.combine(day, dt.time(hour), UTC)


@dataclasses.dataclass
class History:
    code: str
    days: list[dt.date]
    start: dt.date
    near: dt.date
    far: dt.date
    expiry: dt.date
    gap_leg_day: dt.date
    missing_day: dt.date


def _history(store: Store, folder: Path, monkeypatch: pytest.MonkeyPatch) -> History:
    scenario = generate(SPEC)
    days = [dt.date.fromisoformat(str(d)) for d in scenario.trade_dates.astype("datetime64[D]")]
    start = days[100]
    f = scenario.futures
    on_start = sorted(d.date() for d in f[f["trade_date"] == np.datetime64(start)]["delivery"])
    near, far = on_start[1], on_start[2]
    expiry = max(d for d in days if d <= near - dt.timedelta(days=7))  # a trading day
    gap_leg_day, missing_day = days[103], days[106]
    drop = (f["trade_date"] == np.datetime64(gap_leg_day)) & (f["delivery"] == np.datetime64(far))
    drop |= f["trade_date"] == np.datetime64(missing_day)
    rates = scenario.rates
    no_curve = rates["trade_date"] == np.datetime64(days[102])  # a day without a zero curve
    scenario = dataclasses.replace(
        scenario,
        futures=f[~drop].reset_index(drop=True),
        rates=rates[~no_curve].reset_index(drop=True),
    )
    paths = write_csv(scenario, folder)
    new = NewCommodity(unit="tonne", currency="USD", calendar_rule="monthly")
    for kind in ("futures", "rates", "options"):
        ingest_file(store.sessions, paths[kind], kind, by="t", create=new)  # type: ignore[arg-type]
    code = scenario.commodity["code"]
    import_estimate(store.sessions, code, write_estimate_file(folder / "e.json", scenario), by="t")

    def fit_and_approve(fit_day: dt.date, when: dt.datetime) -> None:
        run = fit_one_day(store.sessions, code, fit_day, by="q", settings=FAST).run
        monkeypatch.setattr(approve_flow, "utc_now", lambda: when)
        approve_flow.approve(store.sessions, run.run_id, by="risk", note="ok")
        monkeypatch.undo()

    fit_and_approve(days[99], _at(days[100], 6))  # in force from the start's morning
    fit_and_approve(days[104], _at(days[105], 6))  # a new set from day 105
    fit_and_approve(days[109], _at(days[108], 6))  # stamped before its own day: refused
    fit_and_approve(days[110], _at(days[111], 9))  # after the 07:00 morning: used from 112
    return History(code, days, start, near, far, expiry, gap_leg_day, missing_day)


def _discount(curve: ZeroCurve, day: dt.date, to: dt.date) -> float:
    """Discount factor from ``day`` to ``to`` on a (possibly earlier) day's curve."""
    d = curve.discount(np.array([day, to], dtype="datetime64[D]"))
    return float(d[1] / d[0])


def _slow_loop(store: Store, h: History) -> tuple[list[dict[str, float]], float, float]:
    """Day by day: the set in force at 07:00 (refused if fitted that day or later), the
    day's settlements and curve, the per-option pricer; carry what cannot be recomputed."""
    legs = np.array([h.near, h.far], dtype="datetime64[D]")
    rows: list[dict[str, float]] = []
    weekdays = [
        h.start + dt.timedelta(days=i)
        for i in range((h.expiry - h.start).days)
        if (h.start + dt.timedelta(days=i)).weekday() < 5
    ]
    cash = 0.0
    held = np.zeros(2)
    last_price = np.full(2, np.nan)
    curve = None
    premium = math.nan
    prev_day = None
    rate = 0.0
    for day in [*weekdays, h.expiry]:
        with store.sessions.begin() as session:
            quotes = load_day(session=session, commodity=h.code, trade_date=day)
            run = latest_approved(session=session, commodity=h.code, as_of=_at(day, 7))
        F = quotes.futures.settle_for(legs)
        if prev_day is not None:
            cash *= math.exp(rate * (day - prev_day).days / 365.0)
        if np.all(np.isfinite(F)) and prev_day is not None:
            cash += float(held @ (F - last_price))
        if day == h.expiry:
            rows.append({"cash": cash})
            return rows, premium, max(F[1] - F[0] - 5.0, 0.0)
        if len(quotes.rates):
            curve = quotes.rates
        if np.all(np.isfinite(F)):
            last_price = F
        value = math.nan
        if run is not None and run.trade_date < day and np.all(np.isfinite(F)):
            assert curve is not None and run.params is not None
            t = (h.expiry - day).days / 365.0
            disc = _discount(curve, day, h.expiry)
            option = SpreadOption(
                t_near=np.array([(h.near - day).days / 365.0]),
                t_far=np.array([(h.far - day).days / 365.0]),
                t_expiry=np.array([t]),
                strike=np.array([5.0]),
                is_call=np.array([True]),
                near_price=F[:1],
                far_price=F[1:],
                discount=np.array([disc]),
            )
            g = spread_greeks(spread_law(option, run.params), 5.0, "call", disc)
            value = float(g.price[0])
            held = np.array([g.delta_near[0], g.delta_far[0]])
            if prev_day is None:
                premium = cash = value
        next_day = weekdays[weekdays.index(day) + 1] if day != weekdays[-1] else h.expiry
        assert curve is not None
        step = _discount(curve, day, next_day)
        rate = -math.log(step) / ((next_day - day).days / 365.0)
        rows.append({"cash": cash, "value": value, "d_near": held[0], "d_far": held[1]})
        prev_day = day
    raise AssertionError("the loop ends at expiry")


def test_replay_equals_a_slow_day_by_day_loop(
    store: Store, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    h = _history(store, tmp_path, monkeypatch)
    trade = hedge_flow.Trade(expiry=h.expiry, strike=5.0, near=h.near, far=h.far)
    result = hedge_flow.replay(store.sessions, h.code, trade, start=h.start)
    rows, premium, payoff = _slow_loop(store, h)
    assert len(result.days) == len(rows)
    assert result.premium == pytest.approx(premium, rel=REL)
    assert result.payoff == pytest.approx(payoff, rel=REL, abs=1e-12)
    for got, want in zip(result.days, rows, strict=True):
        assert got.cash == pytest.approx(want["cash"], rel=REL), got.day
        if "value" in want:
            if math.isnan(want["value"]):
                assert got.carried and math.isnan(got.value), got.day
            else:
                assert got.value == pytest.approx(want["value"], rel=REL), got.day
            assert got.positions == pytest.approx((want["d_near"], want["d_far"]), rel=REL)
    assert result.pnl == pytest.approx(rows[-1]["cash"] - payoff, rel=REL, abs=1e-9)

    # every gap is reported, none skipped
    by_day = {d.day: d for d in result.days}
    assert any("no settlement of" in n for n in by_day[h.gap_leg_day].notes)
    assert any("missing day" in n for n in by_day[h.missing_day].notes)
    assert f"zero curve of {h.days[101]} used" in by_day[h.days[102]].notes
    refused = [d for d in result.days if any("not before the day" in n for n in d.notes)]
    assert [d.day for d in refused] == [h.days[108], h.days[109]]
    run_of = {d.day: d.run_id for d in result.days}
    early, later, late_stamped, after_nine = sorted({r for r in run_of.values() if r})
    assert run_of[h.days[105]] == early + 1 == later
    assert run_of[h.days[109]] is None  # the refused set is not used: the hedge is carried
    assert run_of[h.days[110]] == run_of[h.days[111]] == late_stamped  # 09:00: not by 07:00
    assert run_of[h.days[112]] == after_nine
    counts = result.to_dict()["counts"]
    assert counts["carried"] == sum(d.carried for d in result.days) >= 4
    assert counts["missing_day"] >= 1 and counts["no_price"] >= 1 and counts["no_set"] == 2

    # the same history by trade date: each day takes the newest run fitted before it
    by_trade = hedge_flow.replay(
        store.sessions, h.code, trade, start=h.start, sets=hedge_flow.SETS_BY_TRADE_DATE
    )
    runs = {d.day: d.run_id for d in by_trade.days}
    assert runs[h.days[109]] == later
    assert runs[h.days[110]] == late_stamped and runs[h.days[111]] == after_nine
