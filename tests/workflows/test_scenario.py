"""The invented demo scenario: determinism, layout, calendar, no-arbitrage and the planted smile."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq

from calib.errors import ParameterError
from calib.model import black76, twofactor
from calib.workflows.demo import scenario as sc

FIXTURES = Path(__file__).resolve().parents[2] / "fixtures" / "demo"
# The exchange's invented holidays as documented in fixtures/demo/README.md (month, day).
HOLIDAYS = {(1, 1), (4, 17), (8, 9), (12, 25), (12, 26)}
PRICE_TOL = 1e-9  # premiums, settles and strikes are rounded to 6 decimals on ticks >= 0.05


@pytest.fixture(scope="module")
def scen() -> sc.Scenario:
    return sc.generate()


def _small(**kw: object) -> sc.ScenarioSpec:
    return sc.ScenarioSpec(years=1, **kw)  # type: ignore[arg-type]


def _day_rates(scen: sc.Scenario, day: pd.Timestamp, maturity_years: np.ndarray) -> np.ndarray:
    """Zero rates of one day by numpy's interp (reference), linear with flat ends."""
    curve = scen.rates[scen.rates.trade_date == day]
    x = (curve.maturity - curve.trade_date).dt.days.to_numpy() / 365.0
    return np.interp(maturity_years, x, curve.zero_rate.to_numpy())


def _implied_vol(premium: float, F: float, K: float, t: float, r: float, kind: str) -> float:
    """Reference: scipy.optimize.brentq inverting the Black-76 price in the volatility."""
    return float(
        brentq(lambda v: float(black76.price(F, K, t, r, v, kind)) - premium, 1e-6, 5.0, xtol=1e-12)
    )


# --- determinism and layout --------------------------------------------------------------------


def test_same_spec_gives_identical_frames_and_seed_matters() -> None:
    a, b, c = sc.generate(_small()), sc.generate(_small()), sc.generate(_small(seed=7))
    for name in ("futures", "options", "rates", "states"):
        pd.testing.assert_frame_equal(getattr(a, name), getattr(b, name), check_exact=True)
    assert not np.array_equal(a.futures.settle, c.futures.settle)
    assert not np.array_equal(a.rates.zero_rate, c.rates.zero_rate)


def test_columns_and_types_follow_the_input_layout(scen: sc.Scenario) -> None:
    # DESIGN section 7: futures, options (with bid/ask), rates; ISO dates in the files.
    assert tuple(scen.futures.columns) == ("trade_date", "commodity", "delivery", "settle")
    assert tuple(scen.options.columns) == (
        "trade_date", "commodity", "delivery", "expiry", "kind", "strike", "premium", "bid", "ask"
    )  # fmt: skip
    assert tuple(scen.rates.columns) == ("trade_date", "maturity", "zero_rate")
    for frame, dates, floats in (
        (scen.futures, ["trade_date", "delivery"], ["settle"]),
        (scen.options, ["trade_date", "delivery", "expiry"], ["strike", "premium", "bid", "ask"]),
        (scen.rates, ["trade_date", "maturity"], ["zero_rate"]),
    ):
        for col in dates:
            assert pd.api.types.is_datetime64_any_dtype(frame[col]), col
            assert (frame[col] == frame[col].dt.normalize()).all(), col
        for col in floats:
            assert frame[col].dtype == np.float64, col
            assert np.isfinite(frame[col]).all(), col
    for frame in (scen.futures, scen.options):
        assert pd.api.types.is_string_dtype(frame.commodity)
        assert set(frame.commodity) == {scen.commodity["code"]}
    assert set(scen.options.kind) == {"call", "put"}


def test_csv_files_round_trip_and_committed_fixtures_are_current(
    scen: sc.Scenario, tmp_path: Path
) -> None:
    paths = sc.write_csv(scen, tmp_path)
    assert set(paths) == {"futures", "options", "rates", "states", "commodity"}
    header = paths["options"].read_text().split("\n", 1)[0]
    assert header == "trade_date,commodity,delivery,expiry,kind,strike,premium,bid,ask"
    assert paths["futures"].read_text().split("\n", 2)[1].startswith("2031-01-06,QLM,")
    for name in ("futures", "options", "rates", "states"):
        frame = getattr(scen, name)
        dates = [c for c in frame.columns if pd.api.types.is_datetime64_any_dtype(frame[c])]
        back = pd.read_csv(paths[name], parse_dates=dates)
        for c in dates:
            back[c] = back[c].astype(frame[c].dtype)
        pd.testing.assert_frame_equal(back, frame, check_dtype=False, rtol=1e-12)
        committed = FIXTURES / f"{name}.csv"
        stale = f"{committed} is stale: python -m calib.workflows.demo.scenario --dir fixtures/demo"
        if name == "states":  # unrounded floats: allow for the last digit of exp/log
            kept = pd.read_csv(committed, parse_dates=dates)
            pd.testing.assert_frame_equal(kept, back, check_dtype=False, rtol=1e-12, obj=stale)
        else:  # quotes on their ticks: the files must be identical
            assert committed.read_bytes() == paths[name].read_bytes(), stale


def test_spec_rejects_values_outside_their_domain() -> None:
    with pytest.raises(ParameterError, match="n_expiries = 24 is invalid: must be below"):
        sc.ScenarioSpec(n_expiries=24)
    with pytest.raises(ParameterError, match="option_lag = 16 is invalid"):
        sc.ScenarioSpec(option_lag=16)
    with pytest.raises(ParameterError, match=r"strike_span = 1\.0 is invalid"):
        sc.ScenarioSpec(strike_span=1.0)
    with pytest.raises(ParameterError, match=r"reversion = 0\.0 is invalid: must be > 0"):
        sc.RateFactor(0.03, 0.03, 0.0, 0.01)
    with pytest.raises(ParameterError, match="rate_tenor_days"):
        sc.ScenarioSpec(rate_tenor_days=(30, 30))


# --- calendar ----------------------------------------------------------------------------------


def test_trade_dates_are_every_weekday_but_the_holidays(scen: sc.Scenario) -> None:
    start = scen.spec.start
    end = start.replace(year=start.year + scen.spec.years)
    expected = []
    day = start
    while day < end:  # plain datetime walk, independent of numpy's business-day functions
        if day.weekday() < 5 and (day.month, day.day) not in HOLIDAYS:
            expected.append(day)
        day += dt.timedelta(days=1)
    got = [d.date() for d in pd.to_datetime(scen.states.trade_date)]
    assert got == expected
    assert len(got) > 3 * 250
    assert pd.Series(got).map(dt.date.weekday).max() <= 4


def test_contracts_roll_and_follow_the_delivery_rule(scen: sc.Scenario) -> None:
    f = scen.futures
    per_day = f.groupby("trade_date").delivery
    assert (per_day.size() == scen.spec.n_contracts).all()
    assert per_day.apply(lambda s: s.is_monotonic_increasing and s.is_unique).all()
    assert (f.delivery > f.trade_date).all()
    # the front contract is the first delivery after the trade date: the day before it is listed
    deliveries = np.sort(f.delivery.unique())
    front = per_day.first()
    nxt = deliveries[np.searchsorted(deliveries, front.index.to_numpy(), side="right")]
    np.testing.assert_array_equal(front.to_numpy(), nxt)
    # second Tuesday of the month, or the next business day when that is a holiday
    for d in pd.to_datetime(deliveries):
        first = d.replace(day=1)
        second_tue = first + pd.Timedelta(days=(1 - first.weekday()) % 7 + 7)
        rolled = second_tue
        while (rolled.month, rolled.day) in HOLIDAYS or rolled.weekday() > 4:
            rolled += pd.Timedelta(days=1)
        assert d == rolled


def test_option_dates_and_listing(scen: sc.Scenario) -> None:
    o = scen.options
    assert (o.expiry <= o.delivery).all()
    assert (o.expiry > o.trade_date).all()
    hol = sc.holidays(2031, 2037)
    lag = np.busday_count(
        o.expiry.to_numpy().astype("datetime64[D]"),
        o.delivery.to_numpy().astype("datetime64[D]"),
        holidays=hol,
    )
    assert (lag == scen.spec.option_lag).all()
    expiries = o.groupby("trade_date").expiry.nunique()
    # the shortest expiry may vanish when every strike is worth under min_premium
    assert expiries.max() == scen.spec.n_expiries
    assert expiries.min() >= scen.spec.n_expiries - 1
    listed = o.merge(scen.futures, on=["trade_date", "delivery"], how="left")
    assert listed.settle.notna().all()
    assert (o.groupby(["trade_date", "expiry"]).size() <= scen.spec.n_strikes).all()


# --- prices ------------------------------------------------------------------------------------


def test_every_option_respects_the_no_arbitrage_bounds(scen: sc.Scenario) -> None:
    o = scen.options.merge(scen.futures, on=["trade_date", "commodity", "delivery"])
    assert len(o) == len(scen.options)
    t = (o.expiry - o.trade_date).dt.days.to_numpy() / 365.0
    r = np.empty_like(t)
    for day, idx in o.groupby("trade_date").indices.items():
        r[idx] = _day_rates(scen, day, t[idx])
    D = np.exp(-r * t)
    F, K, p = o.settle.to_numpy(), o.strike.to_numpy(), o.premium.to_numpy()
    call = (o.kind == "call").to_numpy()
    # Textbook bounds for European options on a future (common practice):
    # D max(F - K, 0) <= call <= D F and D max(K - F, 0) <= put <= D K.
    intrinsic = np.where(call, np.maximum(F - K, 0.0), np.maximum(K - F, 0.0))
    assert (p >= D * intrinsic - PRICE_TOL).all()
    assert (p <= D * np.where(call, F, K) + PRICE_TOL).all()
    assert (p > 0.0).all()
    np.testing.assert_array_equal(call, K >= F)  # out of the money only
    bid, ask = o.bid.to_numpy(), o.ask.to_numpy()
    assert ((bid >= 0.0) & (bid < p) & (p < ask)).all()
    tick = scen.spec.premium_tick
    for col in (p, bid, ask):
        np.testing.assert_allclose(np.round(col / tick) * tick, col, rtol=0, atol=PRICE_TOL)


def test_strike_grid_is_round_and_centred() -> None:
    K = sc.strike_grid(np.array([2403.0, 987.0, 31.7]), 13, 0.2)
    np.testing.assert_allclose(K[0], 2400.0 + 100.0 * np.arange(-6, 7))  # raw step 80.1
    np.testing.assert_allclose(K[1], 975.0 + 25.0 * np.arange(-6, 7))  # raw 32.9; 39.48 x 25
    np.testing.assert_allclose(K[2], 32.0 + 1.0 * np.arange(-6, 7))  # raw 1.06
    F = np.exp(np.random.default_rng(5).uniform(0.0, 12.0, 2000))
    K = sc.strike_grid(F, 13, 0.2)
    step = K[:, 1] - K[:, 0]
    mantissa = step / 10.0 ** np.floor(np.log10(step) + 1e-12)
    assert np.isin(np.round(mantissa, 9), [1.0, 2.0, 2.5, 5.0]).all()
    # the round step is within a factor sqrt(2) of 0.4 F / 12 and the centre within half a step
    # of F, so the lowest strike lies in [1 - 0.283 - 0.024, 1 - 0.141 + 0.024] F
    assert ((K[:, 0] / F > 0.69) & (K[:, 0] / F < 0.883)).all()
    assert ((K[:, -1] / F > 1.117) & (K[:, -1] / F < 1.31)).all()


def test_zero_rates_match_numpy_interp_and_move_slowly(scen: sc.Scenario) -> None:
    rng = np.random.default_rng(3)
    years = rng.uniform(0.0, 3.5, size=(4, 9))  # includes both flat ends
    nodes = np.array([0.1, 0.5, 1.0, 3.0])
    curves = rng.uniform(0.01, 0.05, size=(4, 4))
    expected = np.array([np.interp(y, nodes, c) for y, c in zip(years, curves, strict=True)])
    np.testing.assert_allclose(sc.zero_rate_at(nodes, curves, years), expected, rtol=1e-14)
    tenor = (scen.rates.maturity - scen.rates.trade_date).dt.days
    assert set(tenor) == set(scen.spec.rate_tenor_days)
    wide = scen.rates.assign(tenor=tenor).pivot(
        index="trade_date", columns="tenor", values="zero_rate"
    )
    assert wide.min().min() > 0.0
    assert wide.diff().abs().max().max() < 0.002  # at most 20 bp a day: "slowly moving"


def test_curve_turns_from_contango_to_backwardation(scen: sc.Scenario) -> None:
    f = scen.futures.assign(
        tau=(scen.futures.delivery - scen.futures.trade_date).dt.days / 365.0,
        log_f=np.log(scen.futures.settle),
    )
    front = f.groupby("trade_date").head(6)  # the front half-year of the curve
    slope = front.groupby("trade_date")[["tau", "log_f"]].apply(
        lambda g: np.polyfit(g.tau, g.log_f, 1)[0]
    )
    sign = np.sign(slope.to_numpy())
    # runs of one sign lasting at least a month of trade dates
    change = np.flatnonzero(np.diff(sign) != 0) + 1
    starts = np.r_[0, change]
    lengths = np.diff(np.r_[starts, sign.size])
    runs = [(sign[s], n) for s, n in zip(starts, lengths, strict=True) if n >= 20]
    shapes = [s for s, _ in runs]
    assert shapes[0] == 1.0, "the default scenario opens in contango"
    turns = [i for i in range(len(shapes) - 1) if shapes[i] == 1.0 and shapes[i + 1] == -1.0]
    assert turns, f"no contango->backwardation turn in the long runs {runs}"


def test_states_follow_the_exact_transition(scen: sc.Scenario) -> None:
    td = scen.trade_dates
    h = np.diff(td).astype(np.int64) / 365.0
    tr = twofactor.transition(scen.params, h, measure="real")
    z = np.column_stack([np.log(scen.states.spot), scen.states.conv_yield])
    resid = z[1:] - tr.c - np.einsum("nij,nj->ni", tr.Phi, z[:-1])
    L = np.linalg.cholesky(tr.cov)
    e = np.linalg.solve(L, resid[..., None])[..., 0]
    # ~776 standardised innovations: mean 0 within 4 standard errors, variance 1 within 20 %
    assert np.all(np.abs(e.mean(axis=0)) < 4.0 / np.sqrt(len(e)))
    np.testing.assert_allclose(e.var(axis=0), 1.0, atol=0.2)
    assert abs(np.corrcoef(e.T)[0, 1]) < 0.15
    assert z[0, 0] == pytest.approx(np.log(scen.spec.spot0))
    assert z[0, 1] == scen.spec.yield0


def test_implied_vols_carry_the_smile_and_noise_band(scen: sc.Scenario) -> None:
    spec = scen.spec
    o = scen.options.merge(scen.futures, on=["trade_date", "commodity", "delivery"])
    rows = o.iloc[np.random.default_rng(11).choice(len(o), size=150, replace=False)]
    tick, band = spec.premium_tick, spec.noise_vol * spec.noise_clip
    planted, noisy = [], []
    for row in rows.itertuples():
        t = (row.expiry - row.trade_date).days / 365.0
        T = (row.delivery - row.trade_date).days / 365.0
        r = float(_day_rates(scen, row.trade_date, np.array([t]))[0])
        F, K, kind = row.settle, row.strike, row.kind

        def implied(premium: float) -> float:
            return _implied_vol(premium, F, K, t, r, kind)  # noqa: B023 (used at once)

        k = np.log(K / F)
        smile = float(twofactor.implied_black_vol(t, T, scen.params))
        smile += spec.smile_skew * k + spec.smile_curvature * k * k
        # the settle is rounded to the tick: the planted vol lies between the vols of p -+ tick/2
        lo, hi = implied(row.premium - tick / 2), implied(row.premium + tick / 2)
        assert lo - band - 1e-9 <= smile <= hi + band + 1e-9, row
        iv = implied(row.premium)
        if hi - lo < 0.1 * spec.noise_vol:
            noisy.append(iv - smile)
        planted.append(abs(iv - smile))
    # the noise is really there, with about the planted size (clipped normal: sd 0.986 noise_vol)
    assert len(noisy) > 50
    assert 0.7 * spec.noise_vol < np.std(noisy) < 1.3 * spec.noise_vol
    assert max(planted) > spec.noise_vol
