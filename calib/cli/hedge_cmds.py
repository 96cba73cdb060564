"""Hedge studies: ``calib hedge sim`` (model-world simulation) and ``calib hedge replay``
(stored history).

Exit codes: 0 done; 2 a user mistake (no set in force, a leg not quoted on the start day, a
bad world file, ...), nothing simulated.
"""

from __future__ import annotations

from collections.abc import Callable
from contextlib import closing
from datetime import date, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

import typer

from calib.cli.common import (
    AllCommoditiesOption,
    AsOfOption,
    ClusterOption,
    CommoditiesOption,
    DbOption,
    JsonOption,
    WorkersOption,
    chosen_commodities,
    echo_json,
    open_store,
    output_file,
)

if TYPE_CHECKING:
    from calib.workflows.hedge import Trade

hedge_app = typer.Typer(
    name="hedge",
    help="Sell an option at its model price and hedge it in its futures: P&L studies.",
    no_args_is_help=True,
)

_DAY = ["%Y-%m-%d"]

Commodity = Annotated[str, typer.Argument(help="Commodity code.")]
Expiry = Annotated[datetime, typer.Option("--expiry", formats=_DAY, help="Option expiry.")]
Strike = Annotated[float, typer.Option("--strike", help="Strike (of far - near for a spread).")]
Future = Annotated[
    datetime | None, typer.Option("--future", formats=_DAY, help="Vanilla: its future's delivery.")
]
Near = Annotated[
    datetime | None, typer.Option("--near", formats=_DAY, help="Spread: near delivery.")
]
Far = Annotated[datetime | None, typer.Option("--far", formats=_DAY, help="Spread: far delivery.")]
KindOpt = Annotated[Literal["call", "put"], typer.Option("--kind", help="call or put.")]


def _files(outputs: list[tuple[Path | None, Callable[[Path], Path]]]) -> list[str]:
    """Call each writer whose path was given with its path; the paths written."""
    return [str(write(path)) for path, write in outputs if path is not None]


def _finish(as_json: bool, data: Any, summary: str, written: list[str]) -> None:
    """Print ``data`` as JSON, or ``summary`` and the files written."""
    if as_json:
        echo_json(data)
        return
    typer.echo(summary)
    for path in written:
        typer.echo(f"  wrote {path}")


def _trade(
    expiry: datetime,
    strike: float,
    kind: Literal["call", "put"],
    future: datetime | None,
    near: datetime | None,
    far: datetime | None,
) -> Trade:
    from calib.workflows.hedge import Trade

    def day(x: datetime | None) -> date | None:
        return None if x is None else x.date()

    return Trade(expiry.date(), strike, kind, day(future), day(near), day(far))


def register(app: typer.Typer) -> None:
    """Add the ``hedge`` group to ``app``."""
    app.add_typer(hedge_app, name="hedge")


@hedge_app.command("sim")
def sim_cmd(
    commodity: Commodity,
    expiry: Expiry,
    strike: Strike,
    future: Future = None,
    near: Near = None,
    far: Far = None,
    kind: KindOpt = "call",
    run_id: Annotated[
        int | None,
        typer.Option(
            "--run", help="Pricing set's run (default: approved set in force).", show_default=False
        ),
    ] = None,
    as_of: AsOfOption = None,
    on: Annotated[
        datetime | None,
        typer.Option(
            "--date",
            formats=_DAY,
            help="Start day (default: the set's trade date).",
            show_default=False,
        ),
    ] = None,
    world: Annotated[
        str | None,
        typer.Option(
            "--world",
            metavar="RUN|FILE.json",
            help="Parameters that move the world (default: the pricing set).",
            show_default=False,
        ),
    ] = None,
    steps_per_year: Annotated[
        int, typer.Option("--steps-per-year", min=1, help="Rebalancings per year.")
    ] = 252,
    paths: Annotated[int, typer.Option("--paths", min=2, help="Simulated paths.")] = 10_000,
    seed: Annotated[int, typer.Option("--seed", help="Random seed.")] = 20261202,
    png: Annotated[Path | None, output_file("--png", "Write the P&L histogram here.")] = None,
    csv_path: Annotated[
        Path | None, output_file("--csv", "Write one row a path (P&L, payoff, hedge error).")
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Simulate the P&L of a sold option hedged in its futures with a stored parameter set, in
    the model's own world (or one moved by other parameters: --world)."""
    from calib.output import hedge as show
    from calib.workflows import hedge as flow

    trade = _trade(expiry, strike, kind, future, near, far)
    with open_store(db) as (store, _):
        result = flow.simulate(
            store.sessions,
            commodity,
            trade,
            run_id=run_id,
            as_of=as_of,
            on=None if on is None else on.date(),
            world=world,
            steps_per_year=steps_per_year,
            paths=paths,
            seed=seed,
        )
    data = result.to_dict()
    written = _files(
        [
            (png, lambda p: show.plot_histogram(data, result.result.pnl_pct, trade.describe(), p)),
            (csv_path, lambda p: show.write_paths_csv(result.result, p)),
        ]
    )
    _finish(as_json, data, result.summary(), written)


@hedge_app.command("replay")
def replay_cmd(
    commodity: Commodity,
    start: Annotated[
        datetime, typer.Option("--start", formats=_DAY, help="Day the option is sold.")
    ],
    expiry: Expiry,
    strike: Strike,
    future: Future = None,
    near: Near = None,
    far: Far = None,
    kind: KindOpt = "call",
    sets: Annotated[
        Literal["in-force", "by-trade-date"],
        typer.Option(
            "--sets",
            help="in-force: the approved set in force each morning by the approval log; "
            "by-trade-date: the newest approved run fitted on an earlier day (backfills).",
        ),
    ] = "in-force",
    morning: Annotated[
        str, typer.Option("--morning", metavar="HH:MM", help="The morning's time (UTC).")
    ] = "07:00",
    png: Annotated[Path | None, output_file("--png", "Write the P&L path here.")] = None,
    csv_path: Annotated[Path | None, output_file("--csv", "Write one row a day.")] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Replay a sold option hedged in its futures on the stored history: each day's set and
    settlements, gaps carried and reported, settled at expiry on the stored settlements."""
    from calib.output import hedge as show
    from calib.workflows import hedge as flow

    trade = _trade(expiry, strike, kind, future, near, far)
    try:
        at = datetime.strptime(morning, "%H:%M").time()
    except ValueError:
        from calib.errors import HEDGE_MORNING, HedgeRequestError

        raise HedgeRequestError(commodity, HEDGE_MORNING.format(value=morning)) from None
    with open_store(db) as (store, _):
        result = flow.replay(
            store.sessions, commodity, trade, start=start.date(), sets=sets, morning=at
        )
    data = result.to_dict()
    written = _files(
        [
            (png, lambda p: show.plot_replay(data, trade.describe(), p)),
            (csv_path, lambda p: show.write_replay_csv(data, p)),
        ]
    )
    _finish(as_json, data, result.summary(), written)


@hedge_app.command("policies")
def policies_cmd(
    expiry: Expiry,
    strike: Strike,
    start: Annotated[
        datetime, typer.Option("--from", formats=_DAY, help="First possible sale day.")
    ],
    end: Annotated[datetime, typer.Option("--to", formats=_DAY, help="Last possible sale day.")],
    policy: Annotated[
        list[str],
        typer.Option(
            "--policy",
            metavar="NAME=FILE",
            help="A calibration settings file to compare (repeat; NAME defaults to the file name).",
        ),
    ],
    commodity: CommoditiesOption = None,
    every_commodity: AllCommoditiesOption = False,
    future: Future = None,
    near: Near = None,
    far: Far = None,
    kind: KindOpt = "call",
    every: Annotated[
        int, typer.Option("--every", min=1, help="Trading days between two sales.")
    ] = 5,
    workers: WorkersOption = None,
    cluster: ClusterOption = None,
    png: Annotated[
        Path | None, output_file("--png", "Write the P&L figure by policy here.")
    ] = None,
    csv_path: Annotated[Path | None, output_file("--csv", "Write one row per policy here.")] = None,
    html_dir: Annotated[
        Path | None, output_file("--html", "Write the page (index.html and its figure) here.")
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Compare calibration policies by hedge P&L on the stored history: fit each policy's
    study runs (never approved or served; resumable), then replay the same option sold every
    --every trading days under each policy."""
    from calib.compute.executor import open_executor
    from calib.output import hedge as show
    from calib.workflows import hedge_policies as flow

    trade = _trade(expiry, strike, kind, future, near, far)
    policies = [flow.Policy.parse(p) for p in policy]
    with open_store(db) as (store, program):
        codes = chosen_commodities(store, commodity or [], every_commodity)
        local = workers if cluster is not None else (workers or 1)
        with closing(open_executor(local, cluster)) as run:
            result = flow.compare_policies(
                store,
                codes,
                policies,
                trade,
                start=start.date(),
                end=end.date(),
                every=every,
                by=program.user,
                executor=run,
            )
    rows = result.to_list()
    title = (
        f"{trade.describe()}; sold every {every} trading days, {start:%Y-%m-%d} to {end:%Y-%m-%d}"
    )
    written = _files(
        [
            (png, lambda p: show.plot_policies(rows, title, p)),
            (csv_path, lambda p: show.write_policy_csv(rows, p)),
            (html_dir, lambda p: show.render_policy_page(rows, title, p)[0]),
        ]
    )
    _finish(as_json, rows, "\n".join([title, *show.policy_lines(rows)]), written)
