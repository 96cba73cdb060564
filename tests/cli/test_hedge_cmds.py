"""``calib hedge sim`` end to end on a generated, ingested, fitted and approved day."""

from __future__ import annotations

import csv
import datetime as dt
import json
import math
from pathlib import Path

import numpy as np
import pytest

from calib.model import black76
from calib.model.twofactor import total_variance
from calib.policy.settings import RunSettings
from calib.store.engine import Store
from calib.workflows.approve import approve
from calib.workflows.fit import fit_day
from calib.workflows.fit import fit_day as fit_one_day
from tests.conftest import Cli
from tests.workflows.small_day import Loaded, load_with_estimate

FAST = RunSettings.from_dict({"calibration": {"refit_costs": False}})
STABLE = {"premium", "mean_pct", "sd_pct", "es95_pct", "quantiles_pct", "paths", "steps"}


@pytest.fixture
def loaded(store: Store, tmp_path: Path) -> Loaded:
    return load_with_estimate(store, tmp_path)


def _legs(loaded: Loaded, day: dt.date) -> list[dt.date]:
    f = loaded.scenario.futures
    rows = f[f["trade_date"] == np.datetime64(day)]
    return sorted(d.date() for d in rows["delivery"])


def test_hedge_sim_end_to_end(store: Store, loaded: Loaded, tmp_path: Path, cli: Cli) -> None:
    day = loaded.days[-5]
    legs = _legs(loaded, day)
    near, far = legs[1], legs[3]
    expiry = near - dt.timedelta(days=7)
    option = ["--near", str(near), "--far", str(far), "--expiry", str(expiry), "--strike", "10"]
    spread = ["hedge", "sim", loaded.code, *option]
    small = ["--paths", "400", "--steps-per-year", "52", "--seed", "5"]

    code, _, err = cli(*spread, *small)
    assert code == 2 and err.count("\n") == 1 and "no approved parameter set" in err

    fitted = fit_day(store.sessions, loaded.code, day, by="q", settings=FAST)
    approve(store.sessions, fitted.run.run_id, by="risk", note="ok")
    png, paths_csv = tmp_path / "h.png", tmp_path / "paths.csv"
    code, out, _ = cli(*spread, *small, "--json", "--png", str(png), "--csv", str(paths_csv))
    assert code == 0
    payload = json.loads(out)
    assert set(payload) >= STABLE
    assert set(payload["quantiles_pct"]) == {"1", "5", "50", "95", "99"}
    assert payload["paths"] == 400 and payload["run_id"] == fitted.run.run_id
    # the premium is what `calib price spread` prints for the same option and set
    code, priced, _ = cli("price", "spread", loaded.code, *option, "--json", "--paths", "4")
    assert code == 0
    assert payload["premium"] == pytest.approx(json.loads(priced)["price"], rel=1e-12)
    # the per-path file holds the sample the statistics describe
    with paths_csv.open() as fh:
        pct = np.array([float(row["pnl_pct"]) for row in csv.DictReader(fh)])
    assert pct.size == 400
    assert payload["mean_pct"] == pytest.approx(pct.mean(), rel=1e-8)
    assert payload["mean_pct_se"] == pytest.approx(pct.std(ddof=1) / math.sqrt(400), rel=1e-6)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the same seed gives the same result
    code, again, _ = cli(*spread, *small, "--json")
    assert json.loads(again)["mean_pct"] == payload["mean_pct"]

    # a world whose yield volatility is twice the pricing set's: the seller loses on average
    assert fitted.run.params is not None
    world = fitted.run.params.to_dict()
    world["sigma_yield"] *= 2.0
    world_file = tmp_path / "world.json"
    world_file.write_text(json.dumps(world))
    code, out, _ = cli(*spread, *small, "--json", "--world", str(world_file))
    wrong = json.loads(out)
    assert code == 0 and wrong["world"] == f"file {world_file}"
    assert wrong["mean_pct"] < payload["mean_pct"]

    # vanilla on the near future: premium = Black-76 on the model's total variance
    vanilla = ["hedge", "sim", loaded.code, "--future", str(near), "--expiry", str(expiry)]
    code, out, _ = cli(*vanilla, "--strike", "500", *small)
    assert code == 0 and "premium" in out and "95 % ES" in out
    code, out, _ = cli(*vanilla, "--strike", "500", *small, "--json")
    got = json.loads(out)
    t, T = (expiry - day).days / 365.0, (near - day).days / 365.0
    var = float(total_variance(t, T, fitted.run.params))
    want = black76.price(got["futures"][0], 500.0, t, got["rate"], math.sqrt(var / t), "call")
    assert got["premium"] == pytest.approx(float(want), rel=1e-12)
    assert got["instrument"] == "vanilla" and got["steps"] == round(52 * t)


def test_hedge_sim_refuses_bad_requests_in_one_line(
    store: Store, loaded: Loaded, tmp_path: Path, cli: Cli
) -> None:
    day = loaded.days[-5]
    legs = _legs(loaded, day)
    fitted = fit_day(store.sessions, loaded.code, day, by="q", settings=FAST)
    approve(store.sessions, fitted.run.run_id, by="risk", note="ok")
    expiry = str(legs[1] - dt.timedelta(days=7))
    base = ["hedge", "sim", loaded.code, "--expiry", expiry, "--strike", "5"]
    bad_json = tmp_path / "bad.json"
    bad_json.write_text("[1, 2]")
    cases = [
        (["--future", str(legs[1]), "--near", str(legs[1]), "--far", str(legs[2])], "name the"),
        (["--near", str(legs[1])], "name the"),
        (["--near", str(legs[2]), "--far", str(legs[1])], "must come before"),
        (["--future", str(dt.date(2040, 1, 10))], "no futures settlement"),
        (["--future", str(legs[0])], "not after the near delivery"),
        (["--future", str(legs[1]), "--world", str(tmp_path / "none.json")], "no such file"),
        (["--future", str(legs[1]), "--world", str(bad_json)], "bad.json"),
        (["--future", str(legs[1]), "--as-of", "2001-01-01"], "as of 2001-01-01"),
        (["--future", str(legs[1]), "--run", "999"], "999"),
    ]
    for extra, needle in cases:
        code, _, err = cli(*base, *extra, "--paths", "10")
        assert code == 2, (extra, err)
        assert err.count("\n") == 1 and needle in err, (extra, err)


def test_hedge_replay_end_to_end(store: Store, loaded: Loaded, tmp_path: Path, cli: Cli) -> None:
    fit_day, start = loaded.days[-30], loaded.days[-29]
    legs = _legs(loaded, start)
    near, far = legs[1], legs[2]
    expiry = max(d for d in loaded.days if d <= near - dt.timedelta(days=7))
    base = ["hedge", "replay", loaded.code, "--start", str(start), "--near", str(near)]
    base += ["--far", str(far), "--expiry", str(expiry), "--strike", "5"]
    code, _, err = cli(*base)
    assert code == 2 and err.count("\n") == 1 and f"cannot sell on {start}" in err

    fitted = fit_one_day(store.sessions, loaded.code, fit_day, by="q", settings=FAST)
    approve(store.sessions, fitted.run.run_id, by="risk", note="ok")
    out_csv, out_png = tmp_path / "replay.csv", tmp_path / "replay.png"
    code, out, _ = cli(
        *base, "--sets", "by-trade-date", "--json", "--csv", str(out_csv), "--png", str(out_png)
    )
    assert code == 0
    payload = json.loads(out)
    assert {"premium", "payoff", "pnl", "pnl_pct", "days", "counts"} <= set(payload)
    assert payload["days"][0]["run_id"] == fitted.run.run_id
    assert payload["pnl_pct"] == pytest.approx(100 * payload["pnl"] / payload["premium"])
    with out_csv.open() as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == len(payload["days"]) and rows[0]["day"] == str(start)
    assert out_png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    code, out, _ = cli(*base, "--sets", "by-trade-date")
    assert code == 0 and "% of premium" in out and str(expiry) in out

    # one approved set, fitted before the start and stamped before every morning of this
    # (invented, later-dated) history: both ways of choosing sets use it every day
    code, out, _ = cli(*base, "--json")
    assert code == 0 and json.loads(out)["pnl"] == payload["pnl"]
    code, _, err = cli(*base, "--morning", "7am")
    assert code == 2 and "HH:MM" in err
