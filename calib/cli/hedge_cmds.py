"""Hedge studies: ``calib hedge sim COMMODITY ...`` (model-world simulation).

Exit codes: 0 done; 2 a user mistake (no set in force, a leg not quoted on the start day, a
bad world file, ...), nothing simulated.
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import Annotated, Literal

import typer

from calib.cli.common import AsOfOption, DbOption, JsonOption, echo_json, open_store

hedge_app = typer.Typer(
    name="hedge",
    help="Sell an option at its model price and hedge it in its futures: P&L studies.",
    no_args_is_help=True,
)

_DAY = ["%Y-%m-%d"]


def register(app: typer.Typer) -> None:
    """Add the ``hedge`` group to ``app``."""
    app.add_typer(hedge_app, name="hedge")


@hedge_app.command("sim")
def sim_cmd(
    commodity: Annotated[str, typer.Argument(help="Commodity code.")],
    expiry: Annotated[datetime, typer.Option("--expiry", formats=_DAY, help="Option expiry.")],
    strike: Annotated[float, typer.Option("--strike", help="Strike (of far - near for a spread).")],
    future: Annotated[
        datetime | None,
        typer.Option("--future", formats=_DAY, help="Vanilla: delivery of its future."),
    ] = None,
    near: Annotated[
        datetime | None, typer.Option("--near", formats=_DAY, help="Spread: near delivery.")
    ] = None,
    far: Annotated[
        datetime | None, typer.Option("--far", formats=_DAY, help="Spread: far delivery.")
    ] = None,
    kind: Annotated[Literal["call", "put"], typer.Option("--kind", help="call or put.")] = "call",
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
    png: Annotated[
        Path | None, typer.Option("--png", help="Write the P&L histogram here.", show_default=False)
    ] = None,
    csv_path: Annotated[
        Path | None,
        typer.Option(
            "--csv", help="Write one row a path (P&L, payoff, hedge error).", show_default=False
        ),
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Simulate the P&L of a sold option hedged in its futures with a stored parameter set, in
    the model's own world (or one moved by other parameters: --world)."""
    from calib.workflows import hedge as flow

    trade = flow.Trade(
        expiry=expiry.date(),
        strike=strike,
        kind=kind,
        future=None if future is None else future.date(),
        near=None if near is None else near.date(),
        far=None if far is None else far.date(),
    )
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
    written = []
    if png is not None:
        written.append(str(flow.plot_histogram(result, png)))
    if csv_path is not None:
        written.append(str(flow.write_paths_csv(result, csv_path)))
    if as_json:
        echo_json(result.to_dict())
    else:
        typer.echo(result.summary())
        for path in written:
            typer.echo(f"  wrote {path}")
