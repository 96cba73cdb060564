"""``calib hedge policies``, replay only: 3 policies x 3 years of sale days every 5 trading days
(about 150 sales of one calendar-spread call each, hedged daily to a common expiry), the
policies' study runs already stored (target <= 10 s).

The history is the generated scenario (4 years, 48 monthly futures so that a spread three years
out is listed from the first day); the study runs are stored directly, one a trading day per
policy, with the scenario's parameters at a policy's own yield volatility and one day in seven
failing its gates (so that sets are carried), keyed exactly as the comparison's backfill keys
them, so it finds every day stored and fits none.

Peer in the same run: the naive replay, each sale valued day by day on its own (what a loop of
``calib hedge replay`` does), on a subsample of sales scaled to all of them.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import pickle
import tempfile
import time
from collections.abc import Callable, Generator, Iterable
from dataclasses import replace
from pathlib import Path
from typing import TypeVar

from bench.serve_seed import seeded_fit
from calib.compute.executor import InlineExecutor
from calib.policy.settings import load_settings
from calib.record.fit import Gate
from calib.store.engine import Store, create_store_engine, make_store
from calib.store.migrate import upgrade
from calib.store.quotes import require_commodity, trade_dates
from calib.store.runs import add_run, append_event
from calib.workflows.demo.scenario import ScenarioSpec, generate, write_csv
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import choose_estimate, study_settings
from calib.workflows.hedge import Trade
from calib.workflows.hedge_policies import Policy, ReplayUnit, compare_policies, replay_unit
from calib.workflows.ingest import NewCommodity, ingest_file
from calib.workflows.provenance import inputs_sha256

T = TypeVar("T")
R = TypeVar("R")

SPEC = ScenarioSpec(years=4, n_contracts=48, n_expiries=1, n_strikes=3)
YIELD_SHARES = {"free": 0.6, "floor50": 0.8, "floor100": 1.0}
"""Each policy's stored yield volatility as a share of the scenario's."""
EVERY = 5
NAIVE_SAMPLE = 6


def _load(store: Store, folder: Path) -> tuple[str, list[dt.date]]:
    scenario = generate(SPEC)
    paths = write_csv(scenario, folder)
    new = NewCommodity(unit="tonne", currency="USD", calendar_rule="monthly")
    for kind in ("futures", "rates", "options"):
        ingest_file(store.sessions, paths[kind], kind, by="bench", create=new)
    code = str(scenario.commodity["code"])
    estimate = folder / "estimate.json"
    estimate.write_text(
        json.dumps(
            {**scenario.params.to_dict(), "window_start": "2030-01-02", "window_end": "2030-12-30"}
        ),
        encoding="utf-8",
    )
    import_estimate(store.sessions, code, estimate, by="bench")
    with store.sessions.begin() as session:
        days = trade_dates(session=session, commodity=code)
    return code, days


def _store_studies(
    store: Store, code: str, policies: list[Policy], days: list[dt.date], estimate_id: int
) -> None:
    """One study run a trading day per policy, keyed as the comparison's backfill keys it."""
    true = generate(replace(SPEC, years=1, n_contracts=2, n_expiries=1, n_strikes=1)).params
    for p in policies:
        settings = study_settings(load_settings(p.path, code), p.name)
        params = replace(true, sigma_yield=true.sigma_yield * YIELD_SHARES[p.name])
        with store.sessions.begin() as session:
            cid = require_commodity(session=session, code=code).id
            for k, day in enumerate(days):
                passed = k % 7 != 3
                gate = Gate("rmse_vol", 0.4 if passed else 1.4, 1.0, passed, "")
                fit = replace(seeded_fit(params), gates=(gate,))
                run_id = add_run(
                    session=session,
                    commodity_id=cid,
                    trade_date=day,
                    created_at=dt.datetime.now(dt.UTC),
                    created_by="bench",
                    estimate_id=estimate_id,
                    mode="constant",
                    settings=settings,
                    inputs={},
                    inputs_sha256=inputs_sha256({}),
                    failure_reason=None,
                    fit=fit,
                    code_version="bench",
                    study=p.name,
                )
                append_event(session=session, run_id=run_id, to_status="candidate", by="b", note="")


class Recording(InlineExecutor):
    """This process, keeping the units it was given; with ``ship`` each goes through pickle
    first, as any backend ships it (the policy tests use that)."""

    def __init__(self, *, ship: bool = False) -> None:
        self.items: list[object] = []
        self.ship = ship

    def map(
        self, fn: Callable[[T], R], items: Iterable[T], *, ahead: int | None = None
    ) -> Generator[R, None, None]:
        for item in items:
            self.items.append(item)
            yield fn(pickle.loads(pickle.dumps(item)) if self.ship else item)


def _naive(unit: ReplayUnit, sample: list[int]) -> float:
    """Seconds per sale when each sale is valued and booked on its own days only."""
    t0 = time.perf_counter()
    for k in sample:
        single = replace(
            unit,
            days=unit.days[k:],
            futures=unit.futures[k:],
            starts=(0,),
        )
        replay_unit(single)
    return (time.perf_counter() - t0) / len(sample)


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        url = f"sqlite:///{folder / 'bench.db'}"
        engine = create_store_engine(url)
        upgrade(engine)
        engine.dispose()
        store = make_store(url)
        t0 = time.perf_counter()
        code, days = _load(store, folder)
        first = days[0]
        end = first + dt.timedelta(days=3 * 365)
        for name, floor in (("free", 0.0), ("floor50", 0.5), ("floor100", 1.0)):
            (folder / f"{name}.toml").write_text(
                f"[calibration]\nyield_floor = {floor}\n", encoding="utf-8"
            )
        policies = [Policy.parse(str(folder / f"{n}.toml")) for n in YIELD_SHARES]
        deliveries = sorted(
            d for d in generate_deliveries(store, code, first) if d > end + dt.timedelta(days=40)
        )
        near, far = deliveries[0], deliveries[1]
        expiry = max(d for d in days if d <= near - dt.timedelta(days=7))
        trade = Trade(expiry, 0.0, "call", near=near, far=far)
        with store.sessions.begin() as session:
            estimate_id = choose_estimate(session, code, None).estimate_id
        window = [d for d in days if first <= d < expiry]
        _store_studies(store, code, policies, window, estimate_id)
        setup = time.perf_counter() - t0
        load = os.getloadavg()[0]
        recorded = Recording()
        c0 = time.process_time()
        t0 = time.perf_counter()
        result = compare_policies(
            store,
            [code],
            policies,
            trade,
            start=first,
            end=end,
            every=EVERY,
            by="bench",
            executor=recorded,
        )
        wall = time.perf_counter() - t0
        cpu = time.process_time() - c0
        rows = result.to_list()
        assert all(r["fitted"] + r["fit_failed"] == 0 for r in rows), "replay only"
        sales = sum(len(r["trade_list"]) for r in rows)
        print(
            f"hedge policies, replay only: {len(rows)} policies x {sales // len(rows)} sales "
            f"every {EVERY} trading days over 3 years, {trade.describe()} "
            f"({len(window)} hedged days): {wall:.2f} s wall (target <= 10 s), {cpu:.2f} s CPU; "
            f"load average {load:.1f} on {os.cpu_count()} cores (set-up {setup:.0f} s)"
        )
        for r in rows:
            print(
                f"  {r['policy']:<9} trades {r['trades']:>4}  mean {r['mean_pct']:+8.2f} %  "
                f"sd {r['sd_pct']:7.2f} %  gates failed {r['gate_failed_share']:.1%}"
            )
        unit = next(u for u in recorded.items if isinstance(u, ReplayUnit))
        sample = list(unit.starts[:: max(1, len(unit.starts) // NAIVE_SAMPLE)])[:NAIVE_SAMPLE]
        per_sale = _naive(unit, sample)
        naive = per_sale * sales
        print(
            f"naive per-sale replay (each sale valued on its own days; {len(sample)} sales "
            f"timed, scaled to {sales}): {naive:.1f} s; ratio {naive / wall:.1f}x"
        )
        store.engine.dispose()


def generate_deliveries(store: Store, code: str, day: dt.date) -> list[dt.date]:
    """The deliveries listed on ``day``."""
    from calib.store.quotes import load_day

    with store.sessions.begin() as session:
        quotes = load_day(session=session, commodity=code, trade_date=day)
    return [d.astype(dt.date) for d in quotes.futures.delivery]


if __name__ == "__main__":
    main()
