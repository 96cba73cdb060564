"""``calib hedge policies``: study runs fitted per policy (resumable), the same sales replayed
under each policy, the table against a slow independent loop over the stored runs.

The history is the small generated scenario of the run workflows. Two policies: ``loose``
(gates wide enough that nearly every day passes) and ``strict`` (a yield-volatility floor at the
historical level and an RMSE gate that about half the days fail), so that sets are carried and
some sales cannot be made. The slow loop re-does each sale day by day with the store's own
reads (``load_day``, ``list_runs``) and the per-option pricer of calib.model.spread.
"""

from __future__ import annotations

import datetime as dt
import json
import math
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TypeVar

import numpy as np
import pytest

from bench.bench_hedge_policies import Recording
from calib.model.spread import SpreadOption, spread_greeks, spread_law
from calib.output.hedge import CSV_KEYS, policy_lines
from calib.record.run import RunRecord
from calib.store.engine import Store
from calib.store.quotes import DayQuotes, ZeroCurve, load_day
from calib.store.runs import list_runs
from calib.workflows import hedge_policies as flow
from calib.workflows.backfill import FitTask
from calib.workflows.hedge import Trade
from tests.cli.test_store_cmds import run
from tests.workflows.small_day import Loaded, load_with_estimate

T = TypeVar("T")
R = TypeVar("R")

REL = 1e-9  # the same formulas by two routes; only summation order differs
LOOSE = """[calibration]
refit_costs = false
[gates]
max_rmse_vol_points = 5.0
max_error_vol_points = 10.0
max_jump_sigma_spot = 10.0
max_jump_sigma_yield = 10.0
max_jump_rho = 2.0
"""
STRICT = """[calibration]
refit_costs = false
yield_floor = 1.0
[gates]
max_rmse_vol_points = 1.3
max_error_vol_points = 4.0
max_jump_sigma_spot = 10.0
max_jump_sigma_yield = 10.0
max_jump_rho = 2.0
"""
ROW_KEYS = set(CSV_KEYS) | {
    "fitted",
    "fit_failed",
    "no_quotes",
    "skipped",
    "trade_list",
    "instrument",
    "kind",
    "strike",
    "expiry",
    "future",
    "near",
    "far",
    "from",
    "to",
    "every",
}
"""The stable keys of one policy's object in ``--json``."""


class Setup:
    def __init__(self, loaded: Loaded, folder: Path) -> None:
        self.loaded = loaded
        days = loaded.days
        self.start = days[158]
        f = loaded.scenario.futures
        on_start = sorted(
            d.date() for d in f[f["trade_date"] == np.datetime64(self.start)]["delivery"]
        )
        near, far = on_start[1], on_start[2]
        expiry = max(d for d in days if d <= near - dt.timedelta(days=7))
        self.trade = Trade(expiry, 2.0, "call", near=near, far=far)
        (folder / "loose.toml").write_text(LOOSE, encoding="utf-8")
        (folder / "strict.toml").write_text(STRICT, encoding="utf-8")
        self.policies = [
            flow.Policy.parse(str(folder / "loose.toml")),
            flow.Policy.parse(f"strict={folder / 'strict.toml'}"),
        ]


@pytest.fixture
def setup(store: Store, tmp_path: Path) -> Setup:
    return Setup(load_with_estimate(store, tmp_path), tmp_path)


def _compare(store: Store, s: Setup, executor: object = None) -> flow.PolicyComparison:
    return flow.compare_policies(
        store,
        [s.loaded.code],
        s.policies,
        s.trade,
        start=s.start,
        end=s.trade.expiry,
        every=3,
        by="tester",
        executor=executor,  # type: ignore[arg-type]
    )


# --- the slow loop -----------------------------------------------------------------------------


def _discount(curve: ZeroCurve, day: dt.date, to: dt.date) -> float:
    d = curve.discount(np.array([day, to], dtype="datetime64[D]"))
    return float(d[1] / d[0])


def _set_on(runs: Sequence[RunRecord], day: dt.date) -> RunRecord | None:
    """The newest study run fitted on or before ``day`` whose gates all passed."""
    ok = [r for r in runs if r.trade_date <= day and r.fit is not None and r.fit.all_gates_pass]
    return max(ok, key=lambda r: (r.trade_date, r.run_id)) if ok else None


def _slow_sale(
    quotes: Callable[[dt.date], DayQuotes], runs: Sequence[RunRecord], trade: Trade, sale: dt.date
) -> tuple[float, float] | None:
    """Premium and final P&L of the option sold on ``sale`` (``None``: no set that day)."""
    assert trade.near is not None and trade.far is not None
    legs = np.array([trade.near, trade.far], dtype="datetime64[D]")
    weekdays = [
        sale + dt.timedelta(days=i)
        for i in range((trade.expiry - sale).days)
        if (sale + dt.timedelta(days=i)).weekday() < 5
    ]
    cash = premium = 0.0
    held = np.zeros(2)
    last_price = np.full(2, np.nan)
    curve: ZeroCurve | None = None
    prev, rate = None, 0.0
    for day in [*weekdays, trade.expiry]:
        q = quotes(day)
        F = q.futures.settle_for(legs)
        if prev is not None:
            cash *= math.exp(rate * (day - prev).days / 365.0)
            if np.all(np.isfinite(F)):
                cash += float(held @ (F - last_price))
        if day == trade.expiry:
            return premium, cash - max(F[1] - F[0] - trade.strike, 0.0)
        if len(q.rates):
            curve = q.rates
        if np.all(np.isfinite(F)):
            last_price = F
        chosen = _set_on(runs, day)
        if chosen is not None and np.all(np.isfinite(F)):
            assert curve is not None and chosen.params is not None
            disc = _discount(curve, day, trade.expiry)
            option = SpreadOption(
                t_near=np.array([(trade.near - day).days / 365.0]),
                t_far=np.array([(trade.far - day).days / 365.0]),
                t_expiry=np.array([(trade.expiry - day).days / 365.0]),
                strike=np.array([trade.strike]),
                is_call=np.array([True]),
                near_price=F[:1],
                far_price=F[1:],
                discount=np.array([disc]),
            )
            g = spread_greeks(spread_law(option, chosen.params), trade.strike, "call", disc)
            held = np.array([g.delta_near[0], g.delta_far[0]])
            if prev is None:
                premium = cash = float(g.price[0])
        elif prev is None:
            return None
        nxt = weekdays[weekdays.index(day) + 1] if day != weekdays[-1] else trade.expiry
        assert curve is not None
        rate = -math.log(_discount(curve, day, nxt)) / ((nxt - day).days / 365.0)
        prev = day
    raise AssertionError("the loop ends at expiry")


def test_policy_table_equals_a_slow_loop_over_stored_runs(
    store: Store,
    db_url: str,
    setup: Setup,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    if not db_url.startswith("sqlite"):
        pytest.skip("the arithmetic does not depend on the engine (resume runs on both)")
    s = setup
    shipped = Recording(ship=True)
    rows = _compare(store, s, shipped).to_list()
    assert {type(u) for u in shipped.items} == {FitTask, flow.ReplayUnit}
    assert [r["policy"] for r in rows] == ["loose", "strict"]
    with store.sessions.begin() as session:
        runs = list_runs(session=session, commodity=s.loaded.code, limit=10_000)
    cache: dict[dt.date, DayQuotes] = {}

    def quotes(day: dt.date) -> DayQuotes:
        if day not in cache:
            with store.sessions.begin() as session:
                cache[day] = load_day(session=session, commodity=s.loaded.code, trade_date=day)
        return cache[day]

    trading = [d for d in s.loaded.days if s.start <= d < s.trade.expiry]
    sales = trading[::3]
    for row in rows:
        mine = [r for r in runs if r.study == row["policy"]]
        assert len(mine) == len(trading) == row["fitted"] + row["fit_failed"]
        assert all(r.status in ("candidate", "rejected") for r in mine)  # never approved
        assert [t["start"] for t in row["trade_list"]] == [d.isoformat() for d in sales]
        pnl = []
        for sale, got in zip(sales, row["trade_list"], strict=True):
            slow = _slow_sale(quotes, mine, s.trade, sale)
            if slow is None:
                assert got["not_sold"] is not None and "no study run" in got["not_sold"]
                continue
            premium, final = slow
            assert got["not_sold"] is None
            assert got["premium"] == pytest.approx(premium, rel=REL)
            assert got["pnl"] == pytest.approx(final, rel=REL, abs=1e-9 * premium)
            pnl.append(100.0 * final / premium)
        p = np.array(pnl)
        assert row["trades"] == p.size >= 2
        assert row["mean_pct"] == pytest.approx(p.mean(), rel=1e-7, abs=1e-7)
        assert row["sd_pct"] == pytest.approx(p.std(ddof=1), rel=1e-7, abs=1e-7)
        assert row["worst_pct"] == pytest.approx(p.min(), rel=1e-7, abs=1e-7)
        assert row["q5_pct"] == pytest.approx(np.quantile(p, 0.05), rel=1e-7, abs=1e-7)
        failed = [r for r in mine if r.fit is None or not r.fit.all_gates_pass]
        assert row["gate_failed_share"] == pytest.approx(len(failed) / len(mine), rel=1e-12)
        assert math.isfinite(row["hedge_error_rms"]) and row["hedge_error_rms"] > 0.0
        assert set(row) == ROW_KEYS
    strict = rows[1]
    assert 0.0 < strict["gate_failed_share"] < 1.0  # both verdicts occur: sets are carried
    assert any(t["not_sold"] is None for t in strict["trade_list"]), (
        "the strict policy should sell at least once"
    )
    text = "\n".join(policy_lines(rows))
    assert "loose" in text and "strict" in text
    _check_cli(s, db_url, tmp_path, capsys, monkeypatch)


def test_a_study_resumes_without_refitting(store: Store, setup: Setup) -> None:
    """A comparison stopped after its later days were stored (a shorter window) fits only
    the missing days; once all are stored, nothing is fitted again."""
    s = setup
    trading = [d for d in s.loaded.days if s.start <= d < s.trade.expiry]
    later = trading[len(trading) // 2]
    part = flow.compare_policies(
        store,
        [s.loaded.code],
        s.policies[:1],
        s.trade,
        start=later,
        end=s.trade.expiry,
        every=3,
        by="tester",
    ).to_list()
    done = len([d for d in trading if d >= later])
    assert part[0]["fitted"] + part[0]["fit_failed"] == done and part[0]["skipped"] == 0
    rows = _compare(store, s).to_list()
    assert rows[0]["skipped"] == done
    assert rows[0]["fitted"] + rows[0]["fit_failed"] == len(trading) - done
    assert rows[1]["skipped"] == 0
    again = _compare(store, s).to_list()
    assert [r["skipped"] for r in again] == [len(trading)] * 2
    assert [r["fitted"] + r["fit_failed"] for r in again] == [0, 0]
    assert [r["mean_pct"] for r in again] == [r["mean_pct"] for r in rows]
    with store.sessions.begin() as session:
        runs = list_runs(session=session, commodity=s.loaded.code, limit=10_000)
    keys = [(r.study, r.trade_date) for r in runs if r.study]
    assert len(keys) == len(set(keys)) == 2 * len(trading)  # no day stored twice
    assert not [r for r in runs if r.study is None]  # no production run was made


def _check_cli(
    s: Setup,
    db_url: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """``calib hedge policies`` on the studies just fitted: JSON keys, files, one-line errors."""
    assert s.trade.near is not None and s.trade.far is not None
    args = ["hedge", "policies", "--near", str(s.trade.near), "--far", str(s.trade.far)]
    args += ["--expiry", str(s.trade.expiry), "--strike", "2", "--from", str(s.start)]
    args += ["--to", str(s.trade.expiry), "--every", "3", "--db", db_url]
    args += [f"--policy={p.name}={p.path}" for p in s.policies]
    code, _, err = run(capsys, monkeypatch, *args)
    assert code == 2 and err.count("\n") == 1 and "or give --all" in err
    out_dir = tmp_path / "page"
    files = ["--csv", str(tmp_path / "p.csv"), "--png", str(tmp_path / "p.png")]
    code, out, _ = run(
        capsys, monkeypatch, *args, "--all", "--json", *files, "--html", str(out_dir)
    )
    assert code == 0
    rows = json.loads(out)
    assert len(rows) == 2 and all(set(r) == ROW_KEYS for r in rows)
    assert set(rows[0]["trade_list"][0]) == {
        "start",
        "premium",
        "pnl",
        "pnl_pct",
        "hedge_error_rms",
        "carried_days",
        "not_sold",
    }
    header = (tmp_path / "p.csv").read_text(encoding="utf-8").splitlines()[0]
    assert header.split(",") == list(CSV_KEYS)
    assert (tmp_path / "p.png").read_bytes()[:4] == b"\x89PNG"
    page = (out_dir / "index.html").read_text(encoding="utf-8")
    assert "strict" in page and "one path" in page and (out_dir / "policies.png").exists()
    code, out, _ = run(capsys, monkeypatch, *args, "--commodity", s.loaded.code)
    assert code == 0 and "already stored" in out and "gates failed" in out
    bad = tmp_path / "bad.toml"
    bad.write_text("[calibration]\nyield_floor = -1\n", encoding="utf-8")
    code, _, err = run(capsys, monkeypatch, *args, "--all", f"--policy=bad={bad}")
    assert code == 2 and err.count("\n") == 1 and "bad.toml" in err
