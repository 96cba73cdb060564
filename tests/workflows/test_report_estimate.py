"""The fit report's section on the historical estimate a run held fixed: its standard errors,
and the rolling windows that had ended by the trade date set against it (no hindsight), with
the same numbers as ``calib stability`` gives for that estimate."""

from __future__ import annotations

import dataclasses
from datetime import UTC, date, datetime
from pathlib import Path

from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.output.report import render_report
from calib.store.engine import Store
from calib.store.estimates import add_estimate, add_series
from calib.store.quotes import require_commodity
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import fit_day
from calib.workflows.report import report_inputs
from calib.workflows.stability import stability
from tests.workflows.small_day import load_scenario, write_estimate_file

DAY = date(2031, 8, 15)
ENDS = (date(2031, 7, 1), date(2031, 8, 1), date(2031, 9, 1))  # the last one after DAY
STD_ERRORS = {n: 0.01 for n in PARAM_NAMES}


def _series(store: Store, code: str, truth: TwoFactorParams, shifts: dict[date, float]) -> int:
    """A rolling series whose windows are the truth with ``sigma_spot`` moved by a shift."""
    stamp = {"created_at": datetime(2031, 12, 1, tzinfo=UTC), "created_by": "q", "settings": {}}
    window = {"source": "kalman", "converged": True, "message": "", "inputs": {}}
    with store.sessions.begin() as s:
        cid = require_commodity(session=s, code=code).id
        series = {"window_length": "6m", "step": "1m", "first_end": ENDS[0], "last_end": ENDS[-1]}
        series_id = add_series(session=s, commodity_id=cid, settings_sha256="s", **series, **stamp)
        for end in ENDS:
            add_estimate(
                session=s,
                commodity_id=cid,
                window_start=date(end.year - 1, end.month, end.day),
                window_end=end,
                params=dataclasses.replace(truth, sigma_spot=truth.sigma_spot + shifts[end]),
                std_errors=STD_ERRORS,
                noise_sd=[0.001],
                inputs_sha256=end.isoformat(),
                code_version="test",
                series_id=series_id,
                **window,
                **stamp,
            )
    return series_id


def test_the_report_sets_the_held_estimate_against_the_windows_known_that_morning(
    store: Store, tmp_path: Path
) -> None:
    data = load_scenario(store, tmp_path)
    held = write_estimate_file(tmp_path / "e.json", data.scenario, std_errors=STD_ERRORS)
    import_estimate(store.sessions, data.code, held, by="q")
    run = fit_day(store.sessions, data.code, DAY, by="q").run

    # no series: the section shows the estimate and says how to get its stability
    inputs, _ = report_inputs(store.sessions, run.run_id)
    used = inputs.estimate
    assert used is not None and used.estimate_id == run.estimate_id
    assert used.series is None and not used.windows
    page = render_report(inputs, tmp_path / "plain").index.read_text(encoding="utf-8")
    assert "Historical estimate held by this run" in page and "--rolling" in page

    # a series whose second window moved sigma_spot by 10 s.e. of the difference
    shift = 10 * (2 * 0.01**2) ** 0.5
    truth = data.scenario.params
    series_id = _series(store, data.code, truth, {ENDS[0]: 0.0, ENDS[1]: shift, ENDS[2]: 0.0})
    inputs, _ = report_inputs(store.sessions, run.run_id)
    used = inputs.estimate
    assert used is not None and used.series is not None and f"series {series_id}" in used.series
    assert [w.window_end for w in used.windows] == list(ENDS[:2])  # 09-01 is after the day
    view = stability(store.sessions, data.code, estimate_id=run.estimate_id, k=used.k)
    expected = {w.estimate_id: w for w in view.windows}
    for w in used.windows:
        assert dict(w.z) == expected[w.estimate_id].z and w.flags == expected[w.estimate_id].flags
    first, second = used.windows
    assert first.flags == () and second.flags == ("sigma_spot",)
    assert abs(second.z["sigma_spot"] - 10.0) < 1e-9  # the shift, in s.e. of the difference

    page = render_report(inputs, tmp_path / "series").index.read_text(encoding="utf-8")
    assert "2 window(s) ended on or before the trade date; 1 differ" in page
    assert f"newest window (to {ENDS[1]})" in page and "Recommendation:" in page
