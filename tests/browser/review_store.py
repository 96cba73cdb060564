"""A small store for the review pages: the generated scenario of the run tests, three mornings
fitted, the first two approved by hand, the third left as today's candidate beside a failed
fit of the same day."""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from calib.policy.settings import default_settings
from calib.store.base import utc_now
from calib.store.engine import make_store
from calib.store.estimates import latest_estimate
from calib.store.migrate import upgrade
from calib.store.quotes import load_day
from calib.workflows.approve import approve
from calib.workflows.fit import Attempt, fit_day, store_attempt
from tests.workflows.small_day import load_with_estimate


@dataclass(frozen=True)
class ReviewStore:
    """The template store's file and what it holds."""

    path: Path
    code: str
    approved: tuple[int, int]
    """The two approved runs, oldest first (the second is in force)."""
    between: datetime
    """A moment after the first approval and before the second."""
    candidate: int
    """Today's candidate."""
    failed: int
    """A fit of today that failed (stored rejected, with its reason)."""

    def copy_to(self, folder: Path) -> str:
        """A fresh copy of the store in ``folder``; its URL."""
        target = folder / "review.sqlite"
        shutil.copyfile(self.path, target)
        return f"sqlite:///{target}"


def build(folder: Path) -> ReviewStore:
    """Generate, ingest, estimate and fit the three mornings into ``folder/review.sqlite``."""
    path = folder / "review.sqlite"
    store = make_store(f"sqlite:///{path}")
    try:
        upgrade(store.engine)
        data = load_with_estimate(store, folder)
        first, second, today = data.days[-3:]
        one = fit_day(store.sessions, data.code, first, by="quant.a").run.run_id
        approve(store.sessions, one, by="quant.a", note="first morning, checked by hand")
        between = utc_now()
        two = fit_day(store.sessions, data.code, second, by="quant.a").run.run_id
        approve(store.sessions, two, by="quant.b", note="second morning")
        with store.sessions.begin() as session:
            day = load_day(session=session, commodity=data.code, trade_date=today)
            estimate = latest_estimate(session=session, commodity=data.code)
        assert estimate is not None
        failed = store_attempt(
            store.sessions,
            day,
            estimate.estimate_id,
            default_settings(),
            Attempt(None, "TooFewQuotesError: 3 quotes left after the filters", ()),
            by="quant.a",
            auto_approve=False,
        ).run_id
        three = fit_day(store.sessions, data.code, today, by="quant.a").run.run_id
    finally:
        store.engine.dispose()
    return ReviewStore(path, data.code, (one, two), between, three, failed)
