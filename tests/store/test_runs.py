"""Runs and events in the store: the state machine, as-of queries, history, estimates."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pytest
from sqlalchemy import inspect

from bench.serve_seed import seeded_estimate, seeded_fit
from calib.errors import IllegalTransitionError, UnknownRunError
from calib.model.twofactor import TwoFactorParams
from calib.store.engine import Store, begin_write
from calib.store.estimates import (
    StatesIn,
    estimate_states,
    latest_estimate,
    list_estimates,
)
from calib.store.quotes import add_commodity
from calib.store.runs import (
    add_run,
    append_event,
    approved_history,
    get_run,
    latest_approved,
    list_runs,
    run_status,
)

T0 = datetime(2025, 3, 3, 7, 0, tzinfo=UTC)  # event times are wall-clock times, in the past
PARAMS = TwoFactorParams(
    mu=0.05, kappa=1.2, alpha=0.06, lam=0.02, sigma_spot=0.25, sigma_yield=0.2, rho=0.7
)


def _estimate(store: Store, cid: int, converged: bool, at: datetime) -> int:
    with store.sessions.begin() as s:
        return seeded_estimate(
            s,
            cid,
            created_at=at,
            source="kalman",
            params=PARAMS,
            converged=converged,
            message="converged" if converged else "not converged",
            std_errors={"kappa": 0.1, "rho": None},
            noise_sd=[0.01, 0.02],
            inputs={"batch_ids": [1]},
            settings={"n_contracts": 2},
            n_contracts=2,
            n_days=2,
            states=StatesIn(
                trade_date=np.array(["2030-01-02", "2030-12-30"], dtype="datetime64[D]"),
                log_spot_filtered=np.array([7.8, 7.9]),
                yield_filtered=np.array([0.01, 0.02]),
                log_spot_smoothed=np.array([7.81, 7.91]),
                yield_smoothed=np.array([0.011, 0.021]),
            ),
        )


def _run(store: Store, cid: int, eid: int, day: date, *, failed: bool = False) -> int:
    with store.sessions.begin() as s:
        run_id = add_run(
            session=s,
            commodity_id=cid,
            trade_date=day,
            created_at=T0,
            created_by="tester",
            estimate_id=eid,
            mode="constant",
            settings={},
            inputs={"option_rows": []},
            inputs_sha256="1" * 64,
            failure_reason="infeasible" if failed else None,
            fit=None if failed else seeded_fit(PARAMS.with_vols(0.3, 0.2, 0.7 + day.day / 100)),
            code_version="test",
        )
        first = "rejected" if failed else "candidate"
        append_event(session=s, run_id=run_id, to_status=first, by="tester", note="", at=T0)
        return run_id


def _move(store: Store, run_id: int, to: str, at: datetime) -> None:
    with store.sessions.begin() as s:
        begin_write(s)
        append_event(session=s, run_id=run_id, to_status=to, by="risk", note=to, at=at)


@pytest.fixture
def cid(store: Store) -> int:
    with store.sessions.begin() as s:
        return add_commodity(
            session=s, code="QLM", name="Quellium", unit="t", currency="USD", calendar_rule="m"
        ).id


def test_state_machine_refuses_illegal_moves(store: Store, cid: int) -> None:
    eid = _estimate(store, cid, True, T0)
    run = _run(store, cid, eid, date(2031, 3, 3))
    with pytest.raises(IllegalTransitionError, match=r"is candidate: it cannot become superseded"):
        _move(store, run, "superseded", T0 + timedelta(hours=1))
    _move(store, run, "approved", T0 + timedelta(hours=1))
    with pytest.raises(IllegalTransitionError, match=r"is approved: it cannot become rejected"):
        _move(store, run, "rejected", T0 + timedelta(hours=2))
    failed = _run(store, cid, eid, date(2031, 3, 4), failed=True)
    with pytest.raises(IllegalTransitionError, match=r"is rejected.*none, it is final"):
        _move(store, failed, "approved", T0 + timedelta(hours=2))
    with pytest.raises(UnknownRunError, match="no calibration run 999"):
        _move(store, 999, "approved", T0)
    with store.sessions() as s:
        assert run_status(session=s, run_id=run) == "approved"
        assert run_status(session=s, run_id=failed) == "rejected"
        record = get_run(session=s, run_id=failed)
        assert record is not None and record.params is None and record.outcome == "failed"


def test_latest_approved_as_of_and_history(store: Store, cid: int) -> None:
    eid = _estimate(store, cid, True, T0)
    first = _run(store, cid, eid, date(2031, 3, 3))
    second = _run(store, cid, eid, date(2031, 3, 4))
    t1, t2 = T0 + timedelta(hours=1), T0 + timedelta(hours=2)
    _move(store, first, "approved", t1)
    _move(store, first, "superseded", t2)
    _move(store, second, "approved", t2)
    with store.sessions() as s:
        assert latest_approved(session=s, commodity="QLM", as_of=T0) is None
        at_t1 = latest_approved(session=s, commodity="QLM", as_of=t1 + timedelta(seconds=1))
        assert at_t1 is not None and at_t1.run_id == first and at_t1.status == "approved"
        now = latest_approved(session=s, commodity="QLM")
        assert now is not None and now.run_id == second and now.approved_by == "risk"
        assert now.params == PARAMS.with_vols(0.3, 0.2, 0.74)
        assert run_status(session=s, run_id=first, as_of=t1) == "approved"
        assert run_status(session=s, run_id=first) == "superseded"
        history = approved_history(session=s, commodity="QLM")
        assert [(h.run_id, h.superseded_at) for h in history] == [(first, t2), (second, None)]
        assert [r.run_id for r in list_runs(session=s, commodity="QLM")] == [second, first]
        assert [r.run_id for r in list_runs(session=s, commodity="QLM", status="superseded")] == [
            first
        ]


def test_latest_approved_is_one_index_seek(store: Store) -> None:
    with store.engine.connect() as conn:
        indexes = {ix["name"]: ix["column_names"] for ix in inspect(conn).get_indexes("run_events")}
        assert indexes["ix_run_events_commodity_id"] == ["commodity_id", "to_status", "at", "id"]
        if conn.dialect.name == "sqlite":
            plan = conn.exec_driver_sql(
                "EXPLAIN QUERY PLAN SELECT run_id FROM run_events WHERE commodity_id = 1 AND "
                "to_status = 'approved' AND at <= '2031-01-01' ORDER BY at DESC, id DESC LIMIT 1"
            ).all()
            detail = " ".join(str(row[-1]) for row in plan)
            assert "USING INDEX ix_run_events_commodity_id" in detail
            assert "TEMP B-TREE" not in detail  # no sort: the index gives the order


def test_newest_converged_estimate_is_the_default(store: Store, cid: int) -> None:
    good = _estimate(store, cid, True, T0)
    bad = _estimate(store, cid, False, T0 + timedelta(hours=1))
    with store.sessions() as s:
        chosen = latest_estimate(session=s, commodity="QLM")
        assert chosen is not None and chosen.estimate_id == good
        newest = latest_estimate(session=s, commodity="QLM", converged_only=False)
        assert newest is not None and newest.estimate_id == bad
        assert [e.estimate_id for e in list_estimates(session=s, commodity="QLM")] == [bad, good]
        assert chosen.std_errors["rho"] is None
        states = estimate_states(session=s, estimate_id=good)
        assert states["yield_smoothed"].tolist() == [0.011, 0.021]


def test_a_run_stored_in_the_earlier_layout_still_reads(store: Store, cid: int) -> None:
    """Rows written before the stored-fit record (layout version 1) decode to it."""
    from calib.store.run_models import CalibrationRun
    from tests.record.test_fit_record import FRONT, V1_BUCKETS, V1_DIAGNOSTICS, record

    eid = _estimate(store, cid, True, T0)
    with store.sessions.begin() as s:
        row = CalibrationRun(
            commodity_id=cid,
            trade_date=date(2031, 3, 3),
            created_at=T0,
            created_by="tester",
            estimate_id=eid,
            mode="forward",
            settings={},
            inputs={},
            inputs_sha256="1" * 64,
            outcome="fitted",
            failure_reason=None,
            buckets=V1_BUCKETS,
            diagnostics=V1_DIAGNOSTICS,
            code_version="0.1.0",
            **FRONT.to_dict(),
        )
        s.add(row)
        s.flush()
        run_id = row.id
        append_event(session=s, run_id=run_id, to_status="candidate", by="tester", note="", at=T0)
    with store.sessions() as s:
        run = get_run(session=s, run_id=run_id)
    assert run is not None and run.fit == record()
    shown = run.to_dict()
    assert shown["diagnostics"]["n_quotes"] == 42 and shown["diagnostics"]["binding"] == [
        "decay_bound@1"
    ]
    assert [b["end"] for b in shown["buckets"]] == [0.25, 1.5]
