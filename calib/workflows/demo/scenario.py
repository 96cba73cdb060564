"""The invented demo scenario: a fictional metal on a fictional exchange, generated from the model.

Everything here is made up for demonstration: the commodity *Quellium* (code ``QLM``), the
*Norrowmere Metals Exchange*, its holidays, its contract calendar and every price. No real
market data is used or imitated. :func:`generate` simulates the data from a
:class:`ScenarioSpec` (seeded, deterministic, well under a second); :func:`write_csv` writes it in
the input layout of calib (one row a quote, ISO dates).

Run ``python -m calib.workflows.demo.scenario --dir DIR`` to regenerate the CSV files.

Notes
-----
**Calendar.** Business days are Monday to Friday except the exchange's invented holidays
(1 January, 17 April "Charter Day", 9 August "Foundry Day", 25 and 26 December; a holiday on a
weekend is not moved). One contract delivers each month, on the second Tuesday of the month,
moved to the next business day when that is a holiday. A contract is listed up to the business
day before its delivery, and each day lists the next ``n_contracts`` deliveries. Options on a
contract expire ``option_lag`` business days before its delivery; each day lists options on the
first ``n_expiries`` contracts whose options have not yet expired. Times are ACT/365.

**States.** ``z = (X, d)`` (log spot, convenience yield) moves between consecutive trade dates
by the exact Gaussian transition of the real-world dynamics,
``z_{n+1} = c_n + Phi_n z_n + L_n e_n`` with ``L_n L_n' = cov_n`` and ``e_n`` standard normal
(:func:`calib.model.simulate.simulate_states`, one path, over the irregular day gaps,
weekends included).

**Rates.** The zero curve of day ``n`` is ``R_n(T) = level_n + slope_n (1 - e^{-T/h}) / (T/h)``
(``h`` = ``rate_shape_years``) with ``level`` and ``slope`` independent Ornstein-Uhlenbeck
processes (exact discretisation); it is published at fixed tenors, rounded to 1e-6, and read
back by linear interpolation in ``T`` with flat ends (:func:`zero_rate_at`). With a
deterministic term structure the ``r tau`` of the futures formula becomes ``R(tau) tau``, so
every futures price uses the published curve at its own maturity.

**Futures.** ``ln F = X - d B(tau) + A(tau)`` (:func:`calib.model.twofactor.log_futures`),
rounded to ``futures_tick``.

**Options.** For an option expiring at ``t_o`` on the future maturing at ``T``, the model Black
volatility ``s_m`` comes from :func:`calib.model.twofactor.implied_black_vol`. The quoted
volatility adds what the model does not have, a mild smile in log-moneyness ``k = ln(K/F)``
and bounded seeded noise:
``s = s_m + smile_skew k + smile_curvature k^2 + noise_vol e``, ``e ~ N(0, 1)`` clipped to
``[-noise_clip, noise_clip]``. The settle is the Black-76 premium at ``s``, discounted at the
zero rate to expiry, rounded to ``premium_tick`` and held inside the no-arbitrage bounds
``D max(+-(F - K), 0) <= premium <= D F`` (call) or ``D K`` (put). Strikes are
``n_strikes`` points on a round step (1, 2, 2.5 or 5 times a power of ten) closest to
``2 strike_span F / (n_strikes - 1)``, centred on the strike nearest ``F``; out of the money
(a call for ``K >= F``, a put below). Options worth less than ``min_premium`` are not listed.
Bid and ask are the settle minus/plus ``max(half_spread_vol * vega, premium_tick)``, rounded
outwards to the tick (bid at least 0).

**Default parameters** are illustrative values in the range usually quoted for base metals,
not a published estimate: ``mu = 0.05``, ``kappa = 1.2``, ``alpha = 0.06``, ``lam = 0.02``,
``sigma_spot = 0.25``, ``sigma_yield = 0.20``, ``rho = 0.7`` (the decay bound
``s2 <= rho kappa s1`` holds, so futures volatility falls with maturity). The yield starts at
``-0.01``, below the short rate (about 2.7 %), so the curve opens in contango and the pull of
``alpha`` turns it to backwardation; the default seed was fixed once and shows that turn
(checked by the tests).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import math
import sys
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from calib.errors import ParameterError
from calib.model import black76, twofactor
from calib.model.simulate import simulate_states
from calib.model.twofactor import TwoFactorParams
from calib.types import BoolArray, FloatArray, IntArray

DateArray = npt.NDArray[np.datetime64]
"""Dates as ``datetime64[D]``."""

DAYS_PER_YEAR = 365.0
"""ACT/365: a year fraction is calendar days over 365."""

FUTURES_COLUMNS: tuple[str, ...] = ("trade_date", "commodity", "delivery", "settle")
OPTIONS_COLUMNS: tuple[str, ...] = (
    "trade_date",
    "commodity",
    "delivery",
    "expiry",
    "kind",
    "strike",
    "premium",
    "bid",
    "ask",
)
RATES_COLUMNS: tuple[str, ...] = ("trade_date", "maturity", "zero_rate")
STATES_COLUMNS: tuple[str, ...] = ("trade_date", "spot", "conv_yield")

COMMODITY: Mapping[str, str] = MappingProxyType(
    {
        "code": "QLM",
        "name": "Quellium",
        "exchange": "Norrowmere Metals Exchange",
        "unit": "tonne",
        "currency": "USD",
        "description": "An invented base metal on an invented exchange (demo data only).",
        "delivery_rule": (
            "monthly; the second Tuesday of the delivery month, moved to the next business "
            "day if that is a holiday"
        ),
        "option_rule": "options expire {lag} business days before delivery",
        "holidays": "1 Jan, 17 Apr (Charter Day), 9 Aug (Foundry Day), 25 Dec, 26 Dec",
    }
)
"""Metadata of the invented commodity (``option_rule`` is filled in by :func:`generate`)."""

DEFAULT_PARAMS = TwoFactorParams(
    mu=0.05, kappa=1.2, alpha=0.06, lam=0.02, sigma_spot=0.25, sigma_yield=0.20, rho=0.7
)
"""Illustrative base-metal parameters (not a published estimate)."""

_HOLIDAYS: tuple[tuple[int, int], ...] = ((1, 1), (4, 17), (8, 9), (12, 25), (12, 26))
_MAX_OPTION_LAG = 15  # below the ~19 business days between two deliveries
_ROUND_STEPS = np.array([1.0, 2.0, 2.5, 5.0, 10.0])


@dataclass(frozen=True, slots=True)
class RateFactor:
    """An Ornstein-Uhlenbeck factor of the zero curve: ``dx = reversion (mean - x) dt + vol dW``.

    ``start`` is its value on the first trade date.
    """

    start: float
    mean: float
    reversion: float
    vol: float

    def __post_init__(self) -> None:
        if not self.reversion > 0.0:
            raise ParameterError("reversion", self.reversion, "must be > 0")
        if not self.vol >= 0.0:
            raise ParameterError("vol", self.vol, "must be >= 0")

    def path(self, h: FloatArray, shocks: FloatArray) -> FloatArray:
        """Exact path over the steps ``h`` (years) driven by standard normal ``shocks``."""
        k = self.reversion
        decay = np.exp(-k * h)
        sd = self.vol * np.sqrt(-np.expm1(-2.0 * k * h) / (2.0 * k))
        out = np.empty(h.size + 1)
        out[0] = self.start
        for n in range(h.size):  # a linear recursion over ~800 dates; nothing to vectorise
            out[n + 1] = self.mean + (out[n] - self.mean) * decay[n] + sd[n] * shocks[n]
        return out


@dataclass(frozen=True, slots=True)
class ScenarioSpec:
    """Everything that determines the scenario; the same spec gives the same data.

    Attributes
    ----------
    seed : seed of ``np.random.default_rng`` (split into independent streams for the states,
        the rates and the option noise).
    start : first calendar day (the first trade date is the first business day from it).
    years : length in years (trade dates run up to, not including, the same day ``years`` on).
    n_contracts : futures listed each day.
    n_expiries : option expiries listed each day.
    n_strikes : strikes per expiry (odd keeps the centre strike at the money).
    strike_span : strikes reach about ``F (1 +- strike_span)``.
    option_lag : business days from option expiry to delivery.
    params : true model parameters (real-world measure drives the states).
    spot0, yield0 : spot price and convenience yield on the first trade date.
    futures_tick, premium_tick : price increments of futures settles and option premiums.
    min_premium : options worth less are not listed.
    smile_skew, smile_curvature : smile ``skew k + curvature k^2`` added to the model vol.
    noise_vol, noise_clip : noise added to each quoted vol: ``noise_vol`` times a standard
        normal clipped to ``+-noise_clip``.
    half_spread_vol : half bid/ask spread in volatility (converted to price by vega).
    rate_tenor_days : tenors of the published zero curve (calendar days).
    rate_level, rate_slope : the curve's level and its slope (short end minus long end).
    rate_shape_years : decay length ``h`` of the slope loading.
    """

    seed: int = 20310106
    start: dt.date = dt.date(2031, 1, 6)
    years: int = 3
    n_contracts: int = 24
    n_expiries: int = 12
    n_strikes: int = 13
    strike_span: float = 0.2
    option_lag: int = 5
    params: TwoFactorParams = field(default=DEFAULT_PARAMS)
    spot0: float = 2400.0
    yield0: float = -0.01
    futures_tick: float = 0.5
    premium_tick: float = 0.05
    min_premium: float = 0.5
    smile_skew: float = 0.03
    smile_curvature: float = 0.5
    noise_vol: float = 0.004
    noise_clip: float = 3.0
    half_spread_vol: float = 0.005
    rate_tenor_days: tuple[int, ...] = (30, 91, 182, 365, 730, 1095)
    rate_level: RateFactor = field(default=RateFactor(0.032, 0.035, 0.5, 0.004))
    rate_slope: RateFactor = field(default=RateFactor(-0.005, -0.004, 1.0, 0.003))
    rate_shape_years: float = 1.5

    def __post_init__(self) -> None:
        for name in ("years", "n_contracts", "n_expiries", "n_strikes"):
            if getattr(self, name) < 1:
                raise ParameterError(name, getattr(self, name), "must be at least 1")
        if self.n_expiries > self.n_contracts - 1:
            raise ParameterError(
                "n_expiries", self.n_expiries, f"must be below n_contracts = {self.n_contracts}"
            )
        if not 0 <= self.option_lag <= _MAX_OPTION_LAG:
            raise ParameterError(
                "option_lag",
                self.option_lag,
                f"must lie in [0, {_MAX_OPTION_LAG}] business days (within one delivery month)",
            )
        if not 0.0 < self.strike_span < 1.0:
            raise ParameterError("strike_span", self.strike_span, "must lie in (0, 1)")
        for name in ("spot0", "futures_tick", "premium_tick", "rate_shape_years"):
            if not getattr(self, name) > 0.0:
                raise ParameterError(name, getattr(self, name), "must be > 0")
        for name in ("min_premium", "noise_vol", "noise_clip", "half_spread_vol"):
            if not getattr(self, name) >= 0.0:
                raise ParameterError(name, getattr(self, name), "must be >= 0")
        tenors = np.asarray(self.rate_tenor_days)
        if tenors.size < 2 or np.any(np.diff(tenors) <= 0) or tenors[0] <= 0:
            raise ParameterError(
                "rate_tenor_days", self.rate_tenor_days, "need two or more increasing tenors > 0"
            )


@dataclass(frozen=True, slots=True)
class Scenario:
    """A generated scenario: metadata, the three input tables and the truth behind them.

    ``futures``, ``options`` and ``rates`` have exactly the input columns (see
    :data:`FUTURES_COLUMNS` and friends): dates as ``datetime64`` (midnight), ``commodity`` and
    ``kind`` as strings, prices and rates as float64. ``states`` holds the true spot and
    convenience yield of each trade date. Each call of :func:`generate` builds fresh frames.
    """

    spec: ScenarioSpec
    commodity: Mapping[str, str]
    params: TwoFactorParams
    trade_dates: DateArray
    futures: pd.DataFrame
    options: pd.DataFrame
    rates: pd.DataFrame
    states: pd.DataFrame


# --- calendar ----------------------------------------------------------------------------------


def holidays(first_year: int, last_year: int) -> DateArray:
    """The exchange's holidays from ``first_year`` to ``last_year`` (weekend ones included)."""
    days = [
        np.datetime64(dt.date(y, m, d), "D")
        for y in range(first_year, last_year + 1)
        for m, d in _HOLIDAYS
    ]
    return np.array(days, dtype="datetime64[D]")


def business_days(start: dt.date, end: dt.date, hol: DateArray) -> DateArray:
    """Business days in ``[start, end)``: weekdays that are not holidays."""
    days = np.arange(np.datetime64(start, "D"), np.datetime64(end, "D"), dtype="datetime64[D]")
    return days[np.is_busday(days, holidays=hol)]


def delivery_dates(first_month: dt.date, n_months: int, hol: DateArray) -> DateArray:
    """Second Tuesday of each of ``n_months`` months, rolled forward past holidays."""
    month0 = np.datetime64(first_month.replace(day=1), "M")
    firsts = (month0 + np.arange(n_months)).astype("datetime64[D]")
    second_tuesday = np.busday_offset(firsts, 1, roll="forward", weekmask="0100000")
    return np.busday_offset(second_tuesday, 0, roll="forward", holidays=hol)


def _years_between(later: DateArray, earlier: DateArray) -> FloatArray:
    return np.asarray((later - earlier).astype(np.int64) / DAYS_PER_YEAR, dtype=np.float64)


# --- rates -------------------------------------------------------------------------------------


def zero_rate_at(node_years: FloatArray, node_rates: FloatArray, years: FloatArray) -> FloatArray:
    """Zero rates read off published curves: linear in maturity, flat beyond the ends.

    ``node_years`` is ``(m,)`` (the same tenors every day), ``node_rates`` is ``(n, m)``
    (one curve a row) and ``years`` is ``(n, k)``; the result is ``(n, k)``.
    """
    idx = np.clip(np.searchsorted(node_years, years), 1, node_years.size - 1)
    lo, hi = node_years[idx - 1], node_years[idx]
    w = np.clip((years - lo) / (hi - lo), 0.0, 1.0)
    rows = np.arange(node_rates.shape[0])[:, None]
    return np.asarray(node_rates[rows, idx - 1] * (1.0 - w) + node_rates[rows, idx] * w)


def _zero_curves(spec: ScenarioSpec, h: FloatArray, rng: np.random.Generator) -> FloatArray:
    """Published zero curves, ``(n_days, n_tenors)``, rounded to 1e-6."""
    shocks = rng.standard_normal((2, h.size))
    level = spec.rate_level.path(h, shocks[0])
    slope = spec.rate_slope.path(h, shocks[1])
    x = np.asarray(spec.rate_tenor_days, dtype=np.float64) / DAYS_PER_YEAR / spec.rate_shape_years
    loading = -np.expm1(-x) / x
    return np.asarray(np.round(level[:, None] + slope[:, None] * loading[None, :], 6))


# --- states ------------------------------------------------------------------------------------


def _states(spec: ScenarioSpec, h: FloatArray, rng: np.random.Generator) -> FloatArray:
    """True ``(X, d)`` on each trade date, ``(n_days, 2)``: one path of the exact simulation
    :func:`calib.model.simulate.simulate_states` under the real-world measure."""
    times = np.concatenate([[0.0], np.cumsum(h)])
    path = simulate_states(
        spec.params, times, math.log(spec.spot0), spec.yield0, 1, rng=rng, measure="real"
    )
    return np.stack([path.log_spot[0], path.conv_yield[0]], axis=1)


# --- options -----------------------------------------------------------------------------------


def _round_to(x: FloatArray, tick: float, how: str = "nearest") -> FloatArray:
    """``x`` on the tick grid (nearest, down or up), cleaned to 6 decimals for the files."""
    n = x / tick
    if how == "nearest":
        n = np.round(n)
    elif how == "down":
        n = np.floor(n + 1e-9)  # the guard keeps exact multiples of the tick where they are
    else:
        n = np.ceil(n - 1e-9)
    return np.asarray(np.round(n * tick, 6))


def strike_grid(F: FloatArray, n_strikes: int, span: float) -> FloatArray:
    """``n_strikes`` strikes on a round step around each futures price, ``F.shape + (n,)``.

    The step is the one of ``{1, 2, 2.5, 5} x 10^j`` nearest (in ratio) to
    ``2 span F / (n_strikes - 1)``; the centre is the multiple of the step nearest ``F``.
    """
    raw = 2.0 * span * F / max(n_strikes - 1, 1)
    power = 10.0 ** np.floor(np.log10(raw))
    pick = np.argmin(np.abs(np.log(raw[..., None] / power[..., None] / _ROUND_STEPS)), axis=-1)
    step = _ROUND_STEPS[pick] * power
    centre = np.round(F / step) * step
    offsets = np.arange(n_strikes) - n_strikes // 2
    return np.asarray(np.round(centre[..., None] + step[..., None] * offsets, 6))


def _option_table(
    spec: ScenarioSpec,
    td: DateArray,
    deliveries: DateArray,
    expiries: DateArray,
    settle: FloatArray,
    first_contract: IntArray,
    node_years: FloatArray,
    curves: FloatArray,
    rng: np.random.Generator,
) -> dict[str, npt.NDArray[np.generic]]:
    """Option quotes of every trade date as flat column arrays (vectorised, no row loop)."""
    n_days = td.size
    first_option = np.searchsorted(expiries, td, side="right")
    which = first_option[:, None] + np.arange(spec.n_expiries)  # (days, expiries)
    F = np.take_along_axis(settle, which - first_contract[:, None], axis=1)
    t_o = _years_between(expiries[which], td[:, None])
    t_m = _years_between(deliveries[which], td[:, None])
    r_o = zero_rate_at(node_years, curves, t_o)
    model_vol = twofactor.implied_black_vol(t_o, t_m, spec.params)

    shape = (n_days, spec.n_expiries, spec.n_strikes)
    K = strike_grid(F, spec.n_strikes, spec.strike_span)
    Fb, tb, rb = (np.broadcast_to(a[..., None], shape) for a in (F, t_o, r_o))
    call: BoolArray = np.asarray(Fb <= K)
    k = np.log(K / Fb)
    noise = spec.noise_vol * np.clip(rng.standard_normal(shape), -spec.noise_clip, spec.noise_clip)
    vol = model_vol[..., None] + spec.smile_skew * k + spec.smile_curvature * k * k + noise
    g = black76.greeks(Fb, K, tb, rb, vol, call)

    disc = np.exp(-rb * tb)
    intrinsic = np.maximum(np.where(call, Fb - K, K - Fb), 0.0)
    lower = _round_to(disc * intrinsic, spec.premium_tick, "up")
    upper = _round_to(disc * np.where(call, Fb, K), spec.premium_tick, "down")
    premium = np.clip(_round_to(g["price"], spec.premium_tick), lower, upper)
    half = np.maximum(spec.half_spread_vol * g["vega"], spec.premium_tick)
    bid = np.maximum(_round_to(premium - half, spec.premium_tick, "down"), 0.0)
    ask = _round_to(premium + half, spec.premium_tick, "up")

    keep = premium >= max(spec.min_premium, spec.premium_tick)
    day = np.broadcast_to(np.arange(n_days)[:, None, None], shape)[keep]
    contract = np.broadcast_to(which[..., None], shape)[keep]
    return {
        "trade_date": td[day],
        "delivery": deliveries[contract],
        "expiry": expiries[contract],
        "kind": np.where(call[keep], "call", "put"),
        "strike": K[keep],
        "premium": premium[keep],
        "bid": bid[keep],
        "ask": ask[keep],
    }


# --- the scenario ------------------------------------------------------------------------------


def _dates(a: npt.NDArray[Any]) -> pd.Series:
    return pd.Series(a.astype("datetime64[s]"))


def generate(spec: ScenarioSpec | None = None) -> Scenario:
    """Simulate the scenario described by ``spec`` (the defaults when ``None``).

    Deterministic: the same spec gives identical frames. See the module notes for the rules
    and the mathematics.
    """
    spec = ScenarioSpec() if spec is None else spec
    states_rng, rates_rng, noise_rng = (
        np.random.default_rng(s) for s in np.random.SeedSequence(spec.seed).spawn(3)
    )
    end = spec.start.replace(year=spec.start.year + spec.years)
    months_needed = 12 * spec.years + spec.n_contracts + 2
    hol = holidays(spec.start.year, spec.start.year + months_needed // 12 + 1)
    td = business_days(spec.start, end, hol)
    h = np.diff(td).astype(np.int64) / DAYS_PER_YEAR

    deliveries = delivery_dates(spec.start, months_needed, hol)
    expiries = np.busday_offset(deliveries, -spec.option_lag, roll="backward", holidays=hol)
    z = _states(spec, h, states_rng)
    node_years = np.asarray(spec.rate_tenor_days, dtype=np.float64) / DAYS_PER_YEAR
    curves = _zero_curves(spec, h, rates_rng)

    first_contract = np.searchsorted(deliveries, td, side="right")
    which = first_contract[:, None] + np.arange(spec.n_contracts)
    tau = _years_between(deliveries[which], td[:, None])
    r_tau = zero_rate_at(node_years, curves, tau)
    log_f = twofactor.log_futures(z[:, :1], z[:, 1:], tau, r_tau, spec.params)
    settle = _round_to(np.exp(log_f), spec.futures_tick)

    code = COMMODITY["code"]
    futures = pd.DataFrame(
        {
            "trade_date": _dates(np.repeat(td, spec.n_contracts)),
            "commodity": code,
            "delivery": _dates(deliveries[which].ravel()),
            "settle": settle.ravel(),
        }
    )
    cols = _option_table(
        spec, td, deliveries, expiries, settle, first_contract, node_years, curves, noise_rng
    )
    options = pd.DataFrame(
        {
            "trade_date": _dates(cols["trade_date"]),
            "commodity": code,
            "delivery": _dates(cols["delivery"]),
            "expiry": _dates(cols["expiry"]),
            "kind": pd.Series(cols["kind"], dtype="str"),
            **{name: cols[name].astype(np.float64) for name in ("strike", "premium", "bid", "ask")},
        }
    )
    tenors = np.asarray(spec.rate_tenor_days).astype("timedelta64[D]")
    rates = pd.DataFrame(
        {
            "trade_date": _dates(np.repeat(td, tenors.size)),
            "maturity": _dates((td[:, None] + tenors[None, :]).ravel()),
            "zero_rate": curves.ravel(),
        }
    )
    states = pd.DataFrame(
        {"trade_date": _dates(td), "spot": np.exp(z[:, 0]), "conv_yield": z[:, 1]}
    )
    meta = dict(COMMODITY)
    meta["option_rule"] = meta["option_rule"].format(lag=spec.option_lag)
    return Scenario(
        spec=spec,
        commodity=MappingProxyType(meta),
        params=spec.params,
        trade_dates=td,
        futures=futures,
        options=options,
        rates=rates,
        states=states,
    )


# --- files -------------------------------------------------------------------------------------


def write_csv(scenario: Scenario, directory: Path | str) -> dict[str, Path]:
    """Write the scenario's tables as CSV (ISO dates) plus ``commodity.json``; return the paths.

    Files: ``futures.csv``, ``options.csv``, ``rates.csv`` (the input layout), ``states.csv``
    (the true spot and yield) and ``commodity.json`` (metadata, true parameters, the seed).
    """
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    tables = {
        "futures": scenario.futures,
        "options": scenario.options,
        "rates": scenario.rates,
        "states": scenario.states,
    }
    for name, frame in tables.items():
        paths[name] = out / f"{name}.csv"
        frame.to_csv(paths[name], index=False, date_format="%Y-%m-%d", lineterminator="\n")
    meta = {
        "commodity": dict(scenario.commodity),
        "true_parameters": scenario.params.to_dict(),
        "seed": scenario.spec.seed,
        "start": scenario.spec.start.isoformat(),
        "years": scenario.spec.years,
        "note": "Invented data for demonstration; no real market, commodity or exchange.",
    }
    paths["commodity"] = out / "commodity.json"
    paths["commodity"].write_text(json.dumps(meta, indent=2) + "\n", encoding="utf-8")
    return paths


def main(argv: Sequence[str] | None = None) -> int:
    """``python -m calib.workflows.demo.scenario --dir DIR [--json]``: the default scenario."""
    parser = argparse.ArgumentParser(
        prog="python -m calib.workflows.demo.scenario",
        description="Write the invented demo scenario (default spec) as CSV files.",
    )
    parser.add_argument("--dir", required=True, type=Path, help="output directory")
    parser.add_argument("--json", action="store_true", help="print the written files as JSON")
    args = parser.parse_args(argv)
    paths = write_csv(generate(), args.dir)
    if args.json:
        report = {name: {"path": str(p), "bytes": p.stat().st_size} for name, p in paths.items()}
        print(json.dumps(report, indent=2))
    else:
        for name, p in paths.items():
            print(f"{name:10s} {p}  ({p.stat().st_size:,} bytes)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
