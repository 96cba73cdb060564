"""Backfill: ``calib backfill COMMODITY --from D1 --to D2 [--workers N | --cluster ADDRESS]``;
several commodities with ``--commodity`` repeated or ``--all``.

Exit codes: 0 every day fitted; 1 some days failed (stored as rejected runs, or had no
options); 2 a user mistake, nothing stored.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from contextlib import closing, nullcontext
from datetime import datetime
from functools import partial
from typing import TYPE_CHECKING, Annotated

import typer

from calib.cli.common import (
    AllCommoditiesOption,
    ClusterOption,
    CommoditiesOption,
    DbOption,
    EstimateOption,
    JsonOption,
    SettingsOption,
    WorkersOption,
    chosen_commodities,
    echo_json,
    open_store,
)

if TYPE_CHECKING:
    from rich.progress import Progress

    from calib.workflows import backfill as flow

EXIT_SOME_FAILED = 1
FAILURES_LISTED = 20


def register(app: typer.Typer) -> None:
    """Add the backfill command to ``app``."""
    app.command("backfill")(backfill_cmd)


def rate_text(days: int, seconds: float) -> str:
    """Days stored per second so far: the average since the start, never a burst estimate."""
    return "-- days/s" if days < 1 or seconds <= 0 else f"{days / seconds:.1f} days/s"


class _Bar:
    """A progress bar on stderr: days done, rate, elapsed and remaining time.

    ``clock`` (seconds, monotonic) is the bar's time source; tests pass a fake one.
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic) -> None:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            MofNCompleteColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
            TimeRemainingColumn,
        )

        self.clock = clock
        self.started = clock()
        self.done = 0
        self.bar: Progress = Progress(
            TextColumn("backfill"),
            BarColumn(),
            MofNCompleteColumn(),
            TextColumn("{task.fields[rate]}"),
            TimeElapsedColumn(),
            TextColumn("eta"),
            TimeRemainingColumn(),
            console=Console(stderr=True),
            transient=False,
            get_time=clock,
        )
        self.task = self.bar.add_task("backfill", total=None, rate=rate_text(0, 0.0))

    def start(self, total: int, skipped: int) -> None:
        if skipped:
            self.bar.console.print(f"{skipped} day(s) already fitted with these settings: skipped")
        self.started = self.clock()
        self.bar.update(self.task, total=total)

    def advance(self, day: flow.BackfillDay) -> None:
        self.done += 1
        rate = rate_text(self.done, self.clock() - self.started)
        self.bar.update(self.task, advance=1, rate=rate)


def _print_report(report: flow.BackfillReport) -> None:
    typer.echo(
        f"{report.commodity} {report.start}..{report.end}: {report.trade_dates} trading day(s), "
        f"{len(report.skipped)} skipped (already fitted), {report.count('fitted')} fitted, "
        f"{report.count('failed')} failed, {report.count('no_quotes')} without options"
    )
    typer.echo(
        f"  estimate {report.estimate_id}, settings {report.settings_sha256[:12]}, "
        f"{report.workers} worker(s) on {report.where}, {report.seconds:.1f} s"
    )
    if report.approved:
        typer.echo(f"  auto-approved: {report.approved} (in date order, each superseding the last)")
    failures = report.failures
    if not failures:
        return
    typer.echo("failures by kind:")
    for kind, n in report.failure_kinds().items():
        typer.echo(f"  {n:>5}  {kind}")
    for d in failures[:FAILURES_LISTED]:
        run = "not stored" if d.run_id is None else f"run {d.run_id}"
        typer.echo(f"  {d.trade_date}  {run}: {d.reason}")
    if len(failures) > FAILURES_LISTED:
        typer.echo(f"  ... and {len(failures) - FAILURES_LISTED} more (--json lists them all)")


def backfill_cmd(
    start: Annotated[datetime, typer.Option("--from", formats=["%Y-%m-%d"], help="First day.")],
    end: Annotated[datetime, typer.Option("--to", formats=["%Y-%m-%d"], help="Last day.")],
    commodity: Annotated[
        str | None, typer.Argument(help="Commodity code.", show_default=False)
    ] = None,
    commodities: CommoditiesOption = None,
    every: AllCommoditiesOption = False,
    workers: WorkersOption = None,
    cluster: ClusterOption = None,
    settings_file: SettingsOption = None,
    estimate_id: EstimateOption = None,
    auto_approve: Annotated[
        bool,
        typer.Option("--auto-approve", help="Approve each day whose gates all pass, in order."),
    ] = False,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Fit every trading day from --from to --to and store the runs as candidates.

    Days already fitted with the same estimate and settings are skipped, so an interrupted
    backfill resumes where it stopped. With several commodities (--commodity repeated, or
    --all) their days are scheduled together; --json then prints {"commodities": [...]}, one
    report each. Exit code 1 if any day failed.
    """
    from calib.compute.executor import open_executor
    from calib.policy.settings import load_settings
    from calib.workflows import backfill as flow

    with open_store(db) as (store, program):
        codes = chosen_commodities(store, [commodity, *(commodities or [])], every)
        jobs = [flow.BackfillJob(c, load_settings(settings_file, c), estimate_id) for c in codes]
        with closing(open_executor(workers, cluster)) as executor:
            bar = None if as_json else _Bar()
            with bar.bar if bar is not None else nullcontext():
                run = partial(flow.backfill_many, store, jobs, by=program.user, progress=bar)
                reports = run(
                    start.date(), end.date(), executor=executor, auto_approve=auto_approve
                )
    if as_json:
        if len(reports) == 1 and not commodities and not every:
            echo_json(reports[0].to_dict())
        else:
            echo_json({"commodities": [r.to_dict() for r in reports]})
    else:
        for report in reports:
            _print_report(report)
    if any(r.failures for r in reports):
        raise typer.Exit(EXIT_SOME_FAILED)
