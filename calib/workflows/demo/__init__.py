"""The demo: the whole morning job on the invented scenario, in one call.

:func:`run_demo` generates the scenario (:mod:`calib.workflows.demo.scenario`, invented
commodity and exchange), writes its CSV files into ``DIR/inputs``, creates a fresh SQLite store
``DIR/calib.sqlite``, registers the commodity, ingests futures, rates and options (in that
order: the options' checks need the day's futures and zero curve), estimates the model on the
first :attr:`DemoPlan.estimate_months` (Kalman-filter maximum likelihood), fits and gates each
morning of the last :attr:`DemoPlan.fit_months` with auto-approval, compares calibrated against
historical over those mornings (``DIR/compare.csv``, ``DIR/compare.png``), renders the report
of the latest approved run (``DIR/report/index.html``) and returns a :class:`DemoSummary`
(also written to ``DIR/summary.json``).

The mornings are fitted one after another with :func:`calib.workflows.fit.fit_day`, each
gated against the set approved the morning before, exactly as the morning job would.

The demo writes only into a directory that is new, empty, or its own: it marks a directory
with :data:`MARKER` before it creates anything there, and a directory that is not empty and
has no marker is refused (``--fresh`` does not change that). The marker lists every file the
demo wrote; running the demo again deletes exactly those files (and the folders they leave
empty), never anything else in the directory.
"""

from __future__ import annotations

import json
import math
import statistics
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Any

from calib.errors import DemoFolderError, ParameterError, RunNotFittedError
from calib.inputs.files import FileKind
from calib.output import compare as compare_out
from calib.output.hedge import policy_table
from calib.output.report import CAUTIONS
from calib.policy.settings import RunSettings, load_settings
from calib.store.engine import Store, begin_write, store_for
from calib.store.estimates import EstimateRecord
from calib.store.migrate import upgrade
from calib.store.quotes import add_commodity
from calib.workflows.compare import Selection, compare_runs
from calib.workflows.demo.policies import compare_demo_policies
from calib.workflows.demo.scenario import Scenario, ScenarioSpec, generate, write_csv
from calib.workflows.estimates import MIN_DAYS, estimate
from calib.workflows.fit import FitOutcome, fit_day
from calib.workflows.ingest import ingest_file
from calib.workflows.report import write_report

Progress = Callable[[str], None]

DB_FILE = "calib.sqlite"
MARKER = ".calib-demo"
"""The file that marks a directory as the demo's own (a later demo may replace its files)."""
USER = "demo"
"""Who the demo records on its batches, estimate, runs and approvals."""

DEMO_CAUTIONS = (
    "Every number here comes from invented data: a fictional metal on a fictional exchange, "
    "simulated from the very model that is then fitted, so the fit is far better than any "
    "real market would allow. " + CAUTIONS
)


def _quiet(_: str) -> None:
    return None


@dataclass(frozen=True, slots=True)
class DemoPlan:
    """What the demo generates and fits.

    Attributes
    ----------
    spec : the scenario (default: three years, 24 futures, 12 expiries x 13 strikes a day).
    estimate_months : the historical estimate uses the first so many months of trade dates.
    fit_months : the last so many months of trade dates are fitted, one morning at a time.
    min_days : fewest trading days the estimate accepts.
    settings : calibration settings and gate limits of the mornings.
    policy_days, policy_every : trading days of the policy comparison's window (the option
        is sold on every ``policy_every``-th of them; :mod:`calib.workflows.demo.policies`).
    """

    spec: ScenarioSpec = field(default_factory=ScenarioSpec)
    estimate_months: int = 24
    fit_months: int = 3
    min_days: int = MIN_DAYS
    settings: RunSettings = field(default_factory=lambda: load_settings(None, "QLM"))
    policy_days: int = 40
    policy_every: int = 5

    def __post_init__(self) -> None:
        for name in ("estimate_months", "fit_months"):
            if getattr(self, name) < 1:
                raise ParameterError(name, getattr(self, name), "must be at least 1")
        if self.estimate_months + self.fit_months > 12 * self.spec.years:
            raise ParameterError(
                "estimate_months",
                self.estimate_months,
                f"with fit_months = {self.fit_months} it must fit in the scenario's "
                f"{self.spec.years} year(s), estimate window first",
            )


QUICK_PLAN = DemoPlan(
    spec=ScenarioSpec(years=1, n_contracts=8, n_expiries=4, n_strikes=5),
    estimate_months=10,
    fit_months=1,
    min_days=150,
    policy_days=12,
    policy_every=3,
)
"""A reduced demo that runs in seconds (the tests' and ``calib demo --quick``'s)."""


def add_months(day: date, months: int) -> date:
    """``day`` moved by ``months`` calendar months (day of month clipped to the month's end)."""
    index = day.year * 12 + day.month - 1 + months
    year, month = divmod(index, 12)
    for dom in range(day.day, 0, -1):
        try:
            return date(year, month + 1, dom)
        except ValueError:
            continue
    raise AssertionError("unreachable: day 1 exists in every month")


@dataclass(frozen=True, slots=True)
class DemoSummary:
    """Where the demo put everything and what it found."""

    directory: Path
    db_url: str
    inputs: dict[str, Path]
    report: Path
    report_run_id: int
    compare_csv: Path
    compare_png: Path
    compare_rule: str
    estimate: EstimateRecord
    truth: dict[str, float]
    estimate_window: tuple[date, date]
    fit_window: tuple[date, date]
    days_fitted: int
    days_approved: int
    days_failed: int
    gates_failed: dict[str, int]
    """Per gate name, the mornings it failed (those mornings stay candidates)."""
    rmse_vol_points: tuple[float, ...]
    """Per fitted morning, the RMSE of model minus market Black vol in vol points."""
    quotes_per_day: float
    flagged_days: int
    seconds: float
    cautions: str = DEMO_CAUTIONS
    policy_table: tuple[str, ...] = ()
    """The policy comparison's table (:func:`calib.output.hedge.policy_table`)."""
    policy_rows: tuple[dict[str, Any], ...] = ()
    """Its rows (the keys of ``calib hedge policies --json``, without the sales)."""
    policy_page: Path | None = None

    def to_dict(self) -> dict[str, Any]:
        rmse = self.rmse_vol_points
        return {
            "directory": str(self.directory),
            "db_url": self.db_url,
            "inputs": {k: str(v) for k, v in self.inputs.items()},
            "report": str(self.report),
            "report_run_id": self.report_run_id,
            "compare_csv": str(self.compare_csv),
            "compare_png": str(self.compare_png),
            "compare_rule": self.compare_rule,
            "estimate": self.estimate.to_dict(),
            "truth": dict(self.truth),
            "estimate_window": [d.isoformat() for d in self.estimate_window],
            "fit_window": [d.isoformat() for d in self.fit_window],
            "days_fitted": self.days_fitted,
            "days_approved": self.days_approved,
            "days_failed": self.days_failed,
            "gates_failed": dict(self.gates_failed),
            "rmse_vol_points": {
                "median": statistics.median(rmse) if rmse else None,
                "max": max(rmse) if rmse else None,
            },
            "quotes_per_day": self.quotes_per_day,
            "flagged_days": self.flagged_days,
            "seconds": self.seconds,
            "cautions": self.cautions,
            "policies": list(self.policy_rows),
            "policy_page": None if self.policy_page is None else str(self.policy_page),
        }


LEGACY_FILES = (
    DB_FILE,
    f"{DB_FILE}-wal",
    f"{DB_FILE}-shm",
    "compare.csv",
    "compare.png",
    "summary.json",
)
"""What a marker written before the marker listed its files stood for (the tree ``inputs/``
and ``report/`` aside, which such a demo also wrote)."""


def _ours(directory: Path) -> list[Path]:
    """The files the demo's marker in ``directory`` says it wrote."""
    text = (directory / MARKER).read_text(encoding="utf-8")
    try:
        names = json.loads(text)["files"]
    except (ValueError, KeyError, TypeError):  # a marker of an earlier version: plain text
        older = [
            *LEGACY_FILES,
            *(
                str(p.relative_to(directory))
                for sub in ("inputs", "report")
                for p in (directory / sub).rglob("*")
                if p.is_file()
            ),
        ]
        names = older
    return [directory / str(n) for n in names]


def _mark(directory: Path, files: list[str]) -> None:
    (directory / MARKER).write_text(
        json.dumps({"written_by": "calib demo", "files": sorted(files)}, indent=1) + "\n",
        encoding="utf-8",
    )


def _prepare(directory: Path, fresh: bool) -> set[Path]:
    """Make ``directory`` ready: new or empty (marked now), or the demo's own (its earlier
    files deleted). Returns the files present that are not the demo's (left alone).

    ``fresh`` is accepted for compatibility: an earlier run's files are always replaced.

    Raises
    ------
    DemoFolderError
        ``directory`` is a file, or a non-empty folder without the demo's marker.
    """
    del fresh
    marker = directory / MARKER
    if directory.exists() and (
        not directory.is_dir() or (not marker.is_file() and any(directory.iterdir()))
    ):
        raise DemoFolderError(str(directory), MARKER)
    if marker.is_file():
        for path in _ours(directory):
            if path.is_file() and not path.is_symlink():
                path.unlink()
        for folder in sorted(directory.rglob("*"), reverse=True):  # deepest first
            if folder.is_dir() and not any(folder.iterdir()):
                folder.rmdir()
    directory.mkdir(parents=True, exist_ok=True)
    _mark(directory, [])
    return {p for p in directory.rglob("*") if p.is_file()}


def _register(store: Store, scenario: Scenario) -> None:
    meta = scenario.commodity
    with store.sessions.begin() as session:
        begin_write(session)
        add_commodity(
            session=session,
            code=meta["code"],
            name=meta["name"],
            unit=meta["unit"],
            currency=meta["currency"],
            calendar_rule="monthly",
        )


def _days(scenario: Scenario) -> list[date]:
    return [date.fromisoformat(str(d)) for d in scenario.trade_dates.astype("datetime64[D]")]


def _rmse_vol(outcome: FitOutcome) -> float | None:
    for g in outcome.gates:
        if g.name == "rmse_vol" and isinstance(g.value, int | float):
            return float(g.value)
    return None


def _mornings(
    store: Store, code: str, days: list[date], settings: RunSettings, progress: Progress
) -> list[FitOutcome]:
    """Fit, gate and (if every gate passes) approve each morning in turn."""
    outcomes: list[FitOutcome] = []
    for i, day in enumerate(days, start=1):
        outcome = fit_day(store.sessions, code, day, by=USER, settings=settings, auto_approve=True)
        outcomes.append(outcome)
        rmse = _rmse_vol(outcome)
        quality = "" if rmse is None else f", rmse {rmse:.3f} vol points"
        progress(f"morning {i}/{len(days)} {day}: {outcome.run.status}{quality}")
    return outcomes


def run_demo(
    directory: Path,
    *,
    plan: DemoPlan | None = None,
    fresh: bool = False,
    progress: Progress = _quiet,
) -> DemoSummary:
    """Run the whole job on the invented scenario into ``directory`` (see the module notes).

    Raises
    ------
    DemoFolderError
        ``directory`` is not empty and was not made by the demo.
    """
    plan = plan or DemoPlan()
    started = time.monotonic()
    directory = Path(directory)
    theirs = _prepare(directory, fresh)

    scenario = generate(plan.spec)
    code = scenario.commodity["code"]
    paths = write_csv(scenario, directory / "inputs")
    progress(
        f"generated {scenario.commodity['name']} ({code}): {len(scenario.trade_dates)} trade "
        f"dates, {len(scenario.futures):,} futures, {len(scenario.options):,} options; CSV in "
        f"{directory / 'inputs'}"
    )
    db_url = f"sqlite:///{(directory / DB_FILE).as_posix()}"
    with store_for(db_url) as store:
        upgrade(store.engine)
        _register(store, scenario)
        order: tuple[FileKind, ...] = ("futures", "rates", "options")  # options check both others
        for kind in order:
            report = ingest_file(store.sessions, paths[kind], kind, by=USER)
            progress(
                f"ingested {kind}: {report.rows_accepted:,} rows accepted, "
                f"{report.rows_rejected} rejected"
            )

        days = _days(scenario)
        est_end = add_months(plan.spec.start, plan.estimate_months)
        est_days = [d for d in days if d < est_end]
        fit_start = add_months(plan.spec.start, 12 * plan.spec.years - plan.fit_months)
        fit_days = [d for d in days if d >= fit_start]
        progress(
            f"estimating on {est_days[0]}..{est_days[-1]} ({len(est_days)} days; the first run "
            "on a machine also compiles the Kalman filter, up to a minute)"
        )
        record = estimate(
            store.sessions,
            code,
            est_days[0],
            est_days[-1],
            by=USER,
            min_days=plan.min_days,
            progress=progress,
        )
        progress(f"estimate {record.estimate_id}: {record.message}")

        outcomes = _mornings(store, code, fit_days, plan.settings, progress)

        approved = [o for o in outcomes if o.auto_approved]
        fitted = [o for o in outcomes if o.run.params is not None]
        if not fitted:
            last = outcomes[-1].run
            raise RunNotFittedError(last.run_id, last.failure_reason or "every morning failed")
        every_fit = not approved  # nothing approved: compare every fitted run instead
        selection = Selection(code, fit_days[0], fit_days[-1], every_fit)
        table = compare_runs(store.sessions, selection)
        csv_path = compare_out.write_csv(table, directory / "compare.csv")
        png_path = compare_out.plot(
            table,
            directory / "compare.png",
            title=f"{code}: calibrated against historical, {fit_days[0]} to {fit_days[-1]}",
            span=(fit_days[0], fit_days[-1]),
        )
        progress(f"compared {len(table)} run(s) ({selection.rule}): {csv_path}, {png_path}")

        shown = (approved or fitted)[-1].run.run_id
        rep = write_report(store.sessions, shown, directory / "report")
        progress(f"report of run {shown}: {rep.files.index}")

        progress("policy comparison: fitting each policy's study runs, then replaying")
        policies = compare_demo_policies(
            store, code, days, (plan.policy_days, plan.policy_every), directory / "policies", USER
        )
        rows = policies.to_list()
        progress(f"policy comparison: {directory / 'policies' / 'index.html'}")

    gates_failed: Counter[str] = Counter(g.name for o in fitted for g in o.gates if not g.passed)
    rmse_all = tuple(
        r for r in (_rmse_vol(o) for o in fitted) if r is not None and math.isfinite(r)
    )
    summary = DemoSummary(
        directory=directory,
        db_url=db_url,
        inputs=paths,
        report=rep.files.index,
        report_run_id=shown,
        compare_csv=csv_path,
        compare_png=png_path,
        compare_rule=selection.rule,
        estimate=record,
        truth=scenario.params.to_dict(),
        estimate_window=(est_days[0], est_days[-1]),
        fit_window=(fit_days[0], fit_days[-1]),
        days_fitted=len(fitted),
        days_approved=len(approved),
        days_failed=len(outcomes) - len(fitted),
        gates_failed=dict(sorted(gates_failed.items())),
        rmse_vol_points=rmse_all,
        quotes_per_day=statistics.fmean(o.run.fit.n_quotes for o in fitted if o.run.fit)
        if fitted
        else 0.0,
        flagged_days=int(table.any_flag.sum()),
        seconds=time.monotonic() - started,
        policy_table=tuple(policy_table(rows)),
        policy_rows=tuple({k: v for k, v in r.items() if k != "trade_list"} for r in rows),
        policy_page=directory / "policies" / "index.html",
    )
    (directory / "summary.json").write_text(
        json.dumps(summary.to_dict(), indent=2, default=str) + "\n", encoding="utf-8"
    )
    marker = directory / MARKER
    written = [p for p in directory.rglob("*") if p.is_file() and p not in theirs | {marker}]
    _mark(directory, [str(p.relative_to(directory)) for p in written])
    return summary
