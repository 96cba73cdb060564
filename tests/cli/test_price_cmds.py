"""``calib price spread`` end to end on a generated, ingested, fitted and approved day."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import pytest

from calib.model.spread import ForwardVols, SpreadOption, price_exact, spread_law
from calib.policy.settings import RunSettings
from calib.store.engine import Store
from calib.workflows.approve import approve
from calib.workflows.fit import fit_day
from tests.conftest import Cli
from tests.workflows.small_day import Loaded, load_with_estimate

FAST = RunSettings.from_dict({"calibration": {"refit_costs": False}})
KEYS = {
    "run_id",
    "commodity",
    "run_trade_date",
    "run_status",
    "pricing_date",
    "near",
    "far",
    "expiry",
    "kind",
    "strike",
    "near_price",
    "far_price",
    "discount",
    "t_expiry",
    "t_near",
    "t_far",
    "vols",
    "bucket_edges",
    "price",
    "delta_near",
    "delta_far",
    "vol_sensitivities",
    "kirk",
    "kirk_note",
    "mc",
    "mc_stderr",
    "mc_paths",
    "mc_seed",
    "nodes",
}


@pytest.fixture
def loaded(store: Store, tmp_path: Path) -> Loaded:
    return load_with_estimate(store, tmp_path)


def _day_futures(loaded: Loaded, day: dt.date) -> dict[dt.date, float]:
    f = loaded.scenario.futures
    rows = f[f["trade_date"] == np.datetime64(day)]
    return {d.date(): float(s) for d, s in zip(rows["delivery"], rows["settle"], strict=True)}


def _years(a: dt.date, b: dt.date) -> float:
    return (b - a).days / 365.0


def test_price_spread_end_to_end(store: Store, loaded: Loaded, cli: Cli) -> None:
    day = loaded.days[-5]
    futures = _day_futures(loaded, day)
    near, far = sorted(futures)[1], sorted(futures)[3]
    expiry = near - dt.timedelta(days=7)
    args = ["price", "spread", loaded.code, "--near", str(near), "--far", str(far)]
    args += ["--expiry", str(expiry), "--strike", "10"]

    code, _, err = cli(*args)
    assert code == 2 and err.count("\n") == 1 and "no approved parameter set" in err

    fitted = fit_day(store.sessions, loaded.code, day, by="q", settings=FAST)
    approve(store.sessions, fitted.run.run_id, by="risk", note="ok")
    code, out, _ = cli(*args, "--json")
    assert code == 0
    payload = json.loads(out)
    assert set(payload) == KEYS
    assert payload["run_id"] == fitted.run.run_id and payload["vols"] == "constant"
    assert set(payload["vol_sensitivities"]) == {"sigma_spot", "sigma_yield", "rho"}
    assert payload["near_price"] == futures[near] and payload["far_price"] == futures[far]

    # the printed price is calib.model.spread.price_exact on the run's parameters, the day's
    # futures and the zero curve's discount factor (reproduced here from the scenario's rates)
    rates = loaded.scenario.rates
    curve = rates[rates["trade_date"] == np.datetime64(day)]
    nodes = np.array([_years(day, m.date()) for m in curve["maturity"]])
    t = _years(day, expiry)
    discount = float(np.exp(-np.interp(t, nodes, curve["zero_rate"].to_numpy()) * t))
    assert payload["discount"] == pytest.approx(discount, rel=1e-15)
    option = SpreadOption(
        t_near=np.array([_years(day, near)]),
        t_far=np.array([_years(day, far)]),
        t_expiry=np.array([t]),
        strike=np.array([10.0]),
        is_call=np.array([True]),
        near_price=np.array([futures[near]]),
        far_price=np.array([futures[far]]),
        discount=np.array([discount]),
    )
    assert fitted.run.params is not None
    law = spread_law(option, fitted.run.params)
    exact = float(price_exact(law, 10.0, "call", discount)[0])
    assert payload["price"] == exact
    # cross-checks: Monte Carlo within 4 standard errors (seeded, so fixed); Kirk is an
    # approximation: within 1 % of the price for this near-the-money calendar spread
    assert abs(payload["mc"] - exact) <= 4 * payload["mc_stderr"]
    assert payload["kirk"] == pytest.approx(exact, rel=1e-2)
    # a call on far - near: long the far future, short the near one
    assert payload["delta_far"] > 0 > payload["delta_near"]

    code, out, _ = cli(*args)
    assert code == 0 and f"price        {exact:.6f}" in out and "Monte Carlo" in out


def _forward_fit_works(loaded: Loaded, day: dt.date) -> bool:
    """Forward mode rounds its bucket edges to 12 decimals and then refuses an expiry more
    than 1e-12 relative beyond the last edge (calib.calibrate.bucket_edges against
    calib.model.twofactor.check of the edges); pick a day whose latest expiry it accepts."""
    o = loaded.scenario.options
    last = max(o[o["trade_date"] == np.datetime64(day)]["expiry"]).date()
    t = _years(day, last)
    return bool(round(t, 12) * (1.0 + 1e-12) >= t)


def test_forward_buckets_and_clear_errors(store: Store, loaded: Loaded, cli: Cli) -> None:
    day = next(d for d in reversed(loaded.days[:-4]) if _forward_fit_works(loaded, d))
    futures = _day_futures(loaded, day)
    near, far = sorted(futures)[0], sorted(futures)[2]
    expiry = near - dt.timedelta(days=7)
    forward = RunSettings.from_dict({"calibration": {"mode": "forward", "refit_costs": False}})
    fitted = fit_day(store.sessions, loaded.code, day, by="q", settings=forward)
    rid = str(fitted.run.run_id)
    base = ["price", "spread", loaded.code, "--run", rid, "--strike", "5"]
    legs = ["--near", str(near), "--far", str(far), "--expiry", str(expiry)]
    ok = [*base, *legs]
    code, out, _ = cli(*ok, "--kind", "put", "--json")
    assert code == 0
    payload = json.loads(out)
    assert payload["vols"] == "forward" and payload["run_status"] == "candidate"
    buckets = fitted.run.buckets
    assert len(payload["vol_sensitivities"]["rho"]) == len(buckets) > 1
    vols = ForwardVols(
        kappa=fitted.run.params.kappa,  # type: ignore[union-attr]
        edges=np.array([0.0] + [b.end for b in buckets]),
        sigma_spot=np.array([b.params.sigma_spot for b in buckets]),
        sigma_yield=np.array([b.params.sigma_yield for b in buckets]),
        rho=np.array([b.params.rho for b in buckets]),
    )
    option = SpreadOption(
        t_near=np.array([payload["t_near"]]),
        t_far=np.array([payload["t_far"]]),
        t_expiry=np.array([payload["t_expiry"]]),
        strike=np.array([5.0]),
        is_call=np.array([False]),
        near_price=np.array([futures[near]]),
        far_price=np.array([futures[far]]),
        discount=np.array([payload["discount"]]),
    )
    law = spread_law(option, vols)
    assert payload["price"] == float(price_exact(law, 5.0, "put", payload["discount"])[0])

    missing = dt.date(2040, 1, 10)
    cases = [
        (["--near", str(near), "--far", str(missing), "--expiry", str(expiry)], "no futures"),
        (
            ["--near", str(near), "--far", str(far), "--expiry", str(near + dt.timedelta(1))],
            "after",
        ),
        (["--near", str(far), "--far", str(near), "--expiry", str(expiry)], "must come before"),
        ([*legs, "--date", "2031-01-01"], "no futures"),
    ]
    for extra, message in cases:
        code, _, err = cli(*base, *extra)
        assert code == 2 and err.count("\n") == 1 and message in err, (extra, err)
    code, _, err = cli(*ok[:4], "999", *ok[5:])
    assert code == 2 and "999" in err
