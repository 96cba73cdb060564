"""The morning run on a day of American quotes: fit, residuals, report inputs, show and a
bit-identical rerun (SQLite and PostgreSQL).

The day's premiums are rewritten as American ones (a correction file with ``exercise``
``american``) by calib's own pricer at each quote's Black-76 implied volatility: the test is
of the workflow, the pricer has its outside checks in tests/model/test_american.py.
"""

from __future__ import annotations

import csv
import json
import sys
from pathlib import Path

import numpy as np
import pytest

from calib.cli import main
from calib.model import american, black76
from calib.store.engine import Store
from calib.store.quotes import load_day, year_fractions
from calib.workflows.demo.scenario import OPTIONS_COLUMNS
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import early_exercise, fit_day
from calib.workflows.ingest import ingest_file
from calib.workflows.report import report_inputs
from calib.workflows.rerun import rerun
from tests.workflows.small_day import load_scenario, write_estimate_file


def test_an_american_day_fits_reports_and_reruns_bit_identically(
    store: Store,
    db_url: str,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    data = load_scenario(store, tmp_path)
    import_estimate(
        store.sessions, data.code, write_estimate_file(tmp_path / "e.json", data.scenario),
        by="tester",
    )  # fmt: skip
    day_date = data.days[-1]
    with store.sessions() as s:
        day = load_day(session=s, commodity=data.code, trade_date=day_date)
    o = day.options
    F = day.futures.settle_for(o.delivery)
    T = year_fractions(day_date, o.expiry)
    r = -np.log(day.rates.discount(o.expiry)) / T
    vol = black76.implied_vol(o.premium, F, o.strike, T, r, o.is_call)
    premium = american.price(F, o.strike, T, r, vol, o.is_call)
    path = tmp_path / "american.csv"
    with path.open("w", newline="") as handle:
        out = csv.writer(handle)
        out.writerow([*OPTIONS_COLUMNS[:7], "exercise"])
        for j in range(len(o)):
            out.writerow(
                [day_date, data.code, o.delivery[j], o.expiry[j],
                 "call" if o.is_call[j] else "put", repr(float(o.strike[j])),
                 repr(float(premium[j])), "american"]
            )  # fmt: skip
    report = ingest_file(store.sessions, path, "options", by="tester")
    assert report.rows_accepted == len(o), report.problems

    outcome = fit_day(store.sessions, data.code, day_date, by="quant")
    run = outcome.run
    assert run.fit is not None, run.failure_reason
    inputs, _ = report_inputs(store.sessions, run.run_id)
    q = inputs.quotes
    assert set(q.exercise) == {"american"}
    assert q.early_exercise is not None and np.all(q.early_exercise >= 0.0)
    assert np.any(q.early_exercise > 0.0)
    # the market vols are American implied vols: each is the vol its premium was made at
    # (an implied-vol round trip, 1e-10 where vega is not tiny)
    assert np.isclose(q.market_vol[:, None], vol[None, :], rtol=0.0, atol=1e-8).any(axis=1).all()
    with store.sessions() as s:
        stored = load_day(session=s, commodity=data.code, trade_date=day_date)
    assert stored.options.american.all()
    # the listing's early-exercise premiums are the report's, quote by quote
    by_id = dict(zip(stored.options.row_id.tolist(), early_exercise(stored).tolist(), strict=True))
    np.testing.assert_allclose(
        q.early_exercise, [by_id[int(label)] for label in q.label], rtol=1e-9, atol=1e-12
    )

    again = rerun(store.sessions, run.run_id)
    assert again.identical and not again.differences

    # calib show: each residual names its style and early-exercise premium (text and --json)
    for extra in ((), ("--json",)):
        monkeypatch.setattr(sys, "argv", ["calib", "show", str(run.run_id), "--db", db_url, *extra])
        with pytest.raises(SystemExit) as done:
            main()
            raise SystemExit(0)
        assert (done.value.code or 0) == 0
        out = capsys.readouterr().out
        if extra:
            rows = json.loads(out)["residuals"]
            assert {r["exercise"] for r in rows} == {"american"}
            assert all(r["early_exercise"] >= 0.0 for r in rows)
        else:
            assert "early ex" in out and " am " in out
