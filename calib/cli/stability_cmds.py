"""Rolling estimates and their stability: ``calib estimate CODE --rolling 2y --step 1m ...``
(the estimate command hands over to :func:`rolling_estimate`) and ``calib stability CODE``.

Exit codes: 0 done; 2 a user mistake (bad period, unknown series or estimate), nothing stored.
"""

from __future__ import annotations

import sys
from contextlib import closing
from datetime import date
from pathlib import Path
from typing import Annotated, Any

import typer

from calib.cli.common import DbOption, JsonOption, echo_json, open_store, output_file


def register(app: typer.Typer) -> None:
    """Add the ``stability`` command to ``app``."""
    app.command("stability")(stability_cmd)


def rolling_estimate(
    commodity: str,
    first: date,
    last: date,
    length: str | None,
    step: str | None,
    workers: int | None,
    *,
    cluster: str | None = None,
    contracts: int,
    min_days: int,
    db: str | None,
    as_json: bool,
) -> None:
    """``calib estimate CODE --rolling LENGTH --step STEP``: store a rolling series."""
    from calib.compute.executor import open_executor
    from calib.errors import ROLLING_ONLY_WITH, RollingRequestError
    from calib.estimate.rolling import parse_period
    from calib.workflows import rolling as flow

    if length is None:
        option = "--step" if step is not None else "--workers"
        option = "--cluster" if step is None and workers is None else option
        raise RollingRequestError(commodity, ROLLING_ONLY_WITH.format(option=option))
    window = parse_period("--rolling", length)
    every = parse_period("--step", step or "1m")
    bar: Any = None

    def start(n: int) -> None:
        nonlocal bar
        if not as_json and n:
            bar = typer.progressbar(length=n, label="estimating windows", file=sys.stderr)
            bar.__enter__()

    def done(w: flow.RollingWindow) -> None:
        if bar is not None and w.status != "held":
            bar.update(1)

    with open_store(db) as (store, settings), closing(open_executor(workers, cluster)) as executor:
        try:
            report = flow.estimate_rolling(
                store.sessions,
                commodity,
                first,
                last,
                window,
                every,
                user=settings.user,
                n_contracts=contracts,
                min_days=min_days,
                executor=executor,
                on_start=start,
                on_window=done,
            )
        finally:
            if bar is not None:
                bar.__exit__(None, None, None)
    if as_json:
        echo_json(report.to_dict())
        return
    typer.echo(
        f"rolling series {report.series_id} of {commodity}: {len(report.windows)} windows of "
        f"{report.window_length} every {report.step}; {report.count('stored')} estimated now, "
        f"{report.count('held')} held from before, {report.count('failed')} failed "
        f"({report.workers} worker(s), {report.seconds:.1f}s)"
    )
    for w in report.windows:
        if w.status == "failed":
            typer.echo(f"  window {w.start}..{w.end}: not estimated: {w.detail}")
        elif w.converged is False:
            typer.echo(f"  window {w.start}..{w.end}: estimate {w.estimate_id} NOT converged")
    typer.echo(f"  cold-start check on {report.cold_checked} window(s)")
    for w in report.local_optima:
        typer.echo(f"  LOCAL OPTIMUM window {w.start}..{w.end}: {w.local_optimum}")
    typer.echo(
        "  these estimates are never the morning fit's default; name one with --estimate; "
        f"see `calib stability {commodity}`"
    )


def stability_cmd(
    commodity: Annotated[str, typer.Argument(help="Commodity code.", metavar="COMMODITY")],
    series_id: Annotated[
        int | None,
        typer.Option("--series", help="Rolling series id (default: newest).", show_default=False),
    ] = None,
    estimate_id: Annotated[
        int | None,
        typer.Option(
            "--estimate",
            help="The estimate in use (default: the latest approved run's, else the default).",
            show_default=False,
        ),
    ] = None,
    k: Annotated[
        float, typer.Option("--k", min=0.0, help="Flag a window beyond this many s.e.")
    ] = 3.0,
    png: Annotated[Path | None, output_file("--png", "Write the chart here.")] = None,
    csv_path: Annotated[Path | None, output_file("--csv", "Write one row per window here.")] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Each parameter of a rolling series over time with its ±2 s.e. band, against the
    estimate in use: flags (beyond --k s.e., decay bound failing) and how often to re-estimate."""
    from calib.output import stability as show
    from calib.workflows import stability as flow

    with open_store(db) as (store, _):
        report = flow.stability(
            store.sessions, commodity, series_id=series_id, estimate_id=estimate_id, k=k
        )
    data = report.to_dict()
    if png is not None:
        show.write_png(data, png)
    if csv_path is not None:
        show.write_csv(data, csv_path)
    if as_json:
        echo_json(data)
        return
    s, use = report.series, report.in_use
    typer.echo(
        f"{commodity}: rolling series {s.series_id}, {len(report.windows)} windows of "
        f"{s.window_length} every {s.step} ({s.first_end}..{s.last_end})"
    )
    typer.echo(
        f"  in use: estimate {use.estimate_id} ({report.in_use_how}), "
        f"{use.window_start}..{use.window_end}"
    )
    names = list(use.params.to_dict())
    typer.echo("  " + f"{'window end':<11}" + "".join(f"{n:>12}" for n in names) + "  flags")
    for w in report.windows:
        mark = "*" if w.in_use else " "
        typer.echo(
            f" {mark}{w.window_end!s:<11}"
            + "".join(f"{w.params[n]:>12.4g}" for n in names)
            + "  "
            + (",".join(w.flags) or "-")
        )
    typer.echo(f"  flagged: {len(report.flagged)} of {len(report.windows)} windows (k = {k:g})")
    typer.echo(f"  recommendation: {report.recommendation}")
    typer.echo(f"  caution: {flow.CAUTION}")
    for path in (png, csv_path):
        if path is not None:
            typer.echo(f"  wrote {path}")
