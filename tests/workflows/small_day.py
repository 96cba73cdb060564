"""A small generated scenario ingested into a store: the test data of the run workflows."""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass
from pathlib import Path

from calib.store.engine import Store
from calib.workflows.demo.scenario import Scenario, ScenarioSpec, generate, write_csv
from calib.workflows.ingest import NewCommodity, ingest_file

SPEC = ScenarioSpec(
    seed=20310106, years=1, n_contracts=8, n_expiries=3, n_strikes=5, start=dt.date(2031, 1, 6)
)
"""About 250 trading days, 8 futures and 15 options a day: quick to generate and ingest."""


@dataclass(frozen=True)
class Loaded:
    scenario: Scenario
    folder: Path
    days: list[dt.date]
    code: str


def load_scenario(store: Store, folder: Path, spec: ScenarioSpec = SPEC) -> Loaded:
    """Generate ``spec``, write its CSV files under ``folder`` and ingest them."""
    scenario = generate(spec)
    paths = write_csv(scenario, folder)
    new = NewCommodity(unit="tonne", currency="USD", calendar_rule="monthly")
    for kind in ("futures", "rates", "options"):
        ingest_file(store.sessions, paths[kind], kind, by="tester", create=new)  # type: ignore[arg-type]
    days = [dt.date.fromisoformat(str(d)) for d in scenario.trade_dates.astype("datetime64[D]")]
    return Loaded(scenario, folder, days, scenario.commodity["code"])


def write_estimate_file(path: Path, scenario: Scenario, **extra: object) -> Path:
    """An importable estimate file holding the scenario's true parameters."""
    data = {
        **scenario.params.to_dict(),
        "window_start": "2031-01-06",
        "window_end": "2031-12-31",
        **extra,
    }
    path.write_text(json.dumps(data), encoding="utf-8")
    return path


def load_with_estimate(store: Store, folder: Path, spec: ScenarioSpec = SPEC) -> Loaded:
    """:func:`load_scenario`, plus the scenario's true parameters imported as the estimate."""
    from calib.workflows.estimates import import_estimate

    data = load_scenario(store, folder, spec)
    path = write_estimate_file(folder / "estimate.json", data.scenario)
    import_estimate(store.sessions, data.code, path, by="tester")
    return data
