"""Estimates as units of work: from stored futures (states stored), and imported files."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import func, select

from calib.errors import EstimateFileError, NoQuotesError
from calib.store.engine import Store
from calib.store.estimates import estimate_states, latest_estimate
from calib.store.run_models import HistoricalEstimate
from calib.workflows.estimates import estimate, import_estimate
from tests.workflows.small_day import load_scenario, write_estimate_file


def test_estimate_from_stored_futures_stores_states_and_inputs(
    store: Store, tmp_path: Path
) -> None:
    data = load_scenario(store, tmp_path)
    lines: list[str] = []
    record = estimate(
        store.sessions, data.code, data.days[0], data.days[-1], by="q", progress=lines.append
    )
    assert record.source == "kalman" and record.converged and record.n_days == len(data.days)
    assert len(lines) == 3 and "257 days x 5 contracts" in lines[1]
    # the window's rate is the mean of each day's shortest zero rate (generated, 30-day tenor)
    rates = data.scenario.rates
    shortest = rates.groupby("trade_date")["zero_rate"].first()
    assert record.rate == pytest.approx(float(shortest.mean()), rel=1e-12)
    # one year of data: kappa and the vols near the scenario's truth (loose: a short sample)
    truth = data.scenario.params
    assert record.params.sigma_spot == pytest.approx(truth.sigma_spot, rel=0.15)
    assert record.params.kappa == pytest.approx(truth.kappa, rel=0.3)
    with store.sessions() as s:
        states = estimate_states(session=s, estimate_id=record.estimate_id)
        chosen = latest_estimate(session=s, commodity=data.code)
    assert chosen is not None and chosen.estimate_id == record.estimate_id
    assert len(states) == record.n_days
    # the smoothed log spot tracks the scenario's true spot (simulated states)
    true_x = np.log(data.scenario.states["spot"].to_numpy())
    assert np.max(np.abs(states["log_spot_smoothed"].to_numpy() - true_x)) < 0.05


def test_estimate_of_an_empty_window_is_a_clear_error(store: Store, tmp_path: Path) -> None:
    data = load_scenario(store, tmp_path)
    with pytest.raises(NoQuotesError, match="no futures settlements stored in 1990"):
        estimate(
            store.sessions,
            data.code,
            data.days[0].replace(year=1990),
            data.days[0].replace(year=1990, month=12),
            by="q",
        )


@pytest.mark.parametrize(
    ("content", "match"),
    [
        ("[1, 2]", "not a JSON object"),
        ("{not json", "not a JSON object"),
        ('{"mu": 0.1}', "missing key.*kappa"),
        ("BAD_RHO", "rho = 1.5 is invalid"),
        ("BAD_DATE", "window_end must be an ISO date"),
        ("EXTRA", "unknown key.*colour"),
    ],
)
def test_bad_estimate_files_are_refused(
    store: Store, tmp_path: Path, content: str, match: str
) -> None:
    data = load_scenario(store, tmp_path)
    path = tmp_path / "e.json"
    good = {
        **data.scenario.params.to_dict(),
        "window_start": "2031-01-06",
        "window_end": "2031-12-31",
    }
    special = {
        "BAD_RHO": {**good, "rho": 1.5},
        "BAD_DATE": {**good, "window_end": "31/12/2031"},
        "EXTRA": {**good, "colour": "red"},
    }
    path.write_text(json.dumps(special[content]) if content in special else content)
    with pytest.raises(EstimateFileError, match=match):
        import_estimate(store.sessions, "QLM", path, by="q")
    with store.sessions() as s:
        assert s.scalar(select(func.count()).select_from(HistoricalEstimate)) == 0


def test_imported_estimate_is_marked_imported(store: Store, tmp_path: Path) -> None:
    data = load_scenario(store, tmp_path)
    record = import_estimate(
        store.sessions,
        data.code,
        write_estimate_file(tmp_path / "e.json", data.scenario),
        by="q",
    )
    assert record.source == "imported" and record.params == data.scenario.params
    assert record.converged and record.n_days is None
