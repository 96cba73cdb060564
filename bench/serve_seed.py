"""Approved runs written straight through the store functions: the data of
`bench/bench_serve.py` and of the serving tests (which import it from here)."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from typing import Any

from sqlalchemy.orm import Session

from calib.model.twofactor import TwoFactorParams
from calib.record.fit import BucketVols, FitRecord
from calib.store.engine import Store
from calib.store.estimates import add_estimate
from calib.store.quotes import add_commodity
from calib.store.runs import add_run, append_event

CODE = "QLM"
PARAMS = TwoFactorParams(
    mu=0.05, kappa=1.2, alpha=0.06, lam=0.02, sigma_spot=0.3, sigma_yield=0.2, rho=0.7
)
T0 = datetime(2031, 1, 6, 7, tzinfo=UTC)


def commodity(store: Store, code: str = CODE) -> tuple[int, int]:
    """Register ``code`` with an imported estimate; its id and the estimate's id."""
    with store.sessions.begin() as s:
        cid = add_commodity(
            session=s, code=code, name="Quellium", unit="t", currency="USD", calendar_rule="m"
        ).id
        eid = seeded_estimate(s, cid)
    return cid, eid


IMPORTED: dict[str, Any] = {
    "created_at": T0,
    "created_by": "tester",
    "source": "imported",
    "window_start": date(2030, 1, 2),
    "window_end": date(2030, 12, 30),
    "params": PARAMS,
    "converged": True,
    "message": "imported",
    "std_errors": {},
    "noise_sd": [],
    "inputs": {"file": "e.json"},
    "inputs_sha256": "0" * 64,
    "settings": {},
    "code_version": "test",
}
"""The columns of a made-up imported estimate (:func:`seeded_estimate`)."""


def seeded_estimate(session: Session, commodity_id: int, **changes: Any) -> int:
    """Store :data:`IMPORTED` for the commodity, with ``changes``; the estimate's id."""
    return add_estimate(session=session, commodity_id=commodity_id, **{**IMPORTED, **changes})


def seeded_fit(params: TwoFactorParams, buckets: tuple[BucketVols, ...] = ()) -> FitRecord:
    """A stored-fit record of ``params`` with small made-up fit figures (one bucket if none)."""
    return FitRecord(
        params=params,
        buckets=buckets or (BucketVols(0.0, 1.0, params),),
        rmse=0.001,
        max_error=0.002,
        error_measure="price",
        objective=1e-6,
        fit=1e-6,
        solver="seeded",
        status="optimal",
        iterations=1,
        converged=True,
    )


def candidate(store: Store, cid: int, eid: int, k: int, *, mode: str = "constant") -> int:
    """A fitted candidate run whose ``sigma_spot`` is ``0.3 + k / 100`` (two buckets if forward)."""
    params = PARAMS.with_vols(0.3 + k / 100, 0.2, 0.7)
    buckets = [BucketVols(0.0, 0.5, params)]
    if mode == "forward":
        buckets.append(BucketVols(0.5, 2.0, PARAMS))
    fit = seeded_fit(params, tuple(buckets))
    with store.sessions.begin() as s:
        run_id = add_run(
            session=s,
            commodity_id=cid,
            trade_date=date(2031, 1, 6) + timedelta(days=k),
            created_at=T0,
            created_by="tester",
            estimate_id=eid,
            mode=mode,
            settings={},
            inputs={"option_rows": []},
            inputs_sha256="1" * 64,
            failure_reason=None,
            fit=fit,
            code_version="test",
        )
        append_event(session=s, run_id=run_id, to_status="candidate", by="tester", note="fit")
    return run_id
