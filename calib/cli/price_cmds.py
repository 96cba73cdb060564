"""Pricing from a stored parameter set: ``calib price spread COMMODITY ...``.

Exit codes: 0 priced; 2 a user mistake (no approved set, delivery not quoted that day, expiry
after the near delivery, unknown run, ...), nothing priced.
"""

from __future__ import annotations

from datetime import datetime
from typing import TYPE_CHECKING, Annotated, Literal

import typer

from calib.cli.common import DbOption, JsonOption, echo_json, open_store
from calib.cli.stability_cmds import (
    DrawsOption,
    PricingDayOption,
    PricingRunOption,
    SeriesOption,
    UncertaintyOption,
    print_uncertainty,
    vanilla_cmd,
    with_uncertainty,
)
from calib.output import text

if TYPE_CHECKING:
    from calib.workflows import pricing as flow

price_app = typer.Typer(
    name="price",
    help="Price options from the approved parameter set (or a named run).",
    no_args_is_help=True,
    rich_markup_mode=None,
)
MC_PATHS = 200_000
"""Default of ``--paths``: ``calib.workflows.pricing.MC_PATHS`` (a test keeps them equal)."""
MC_SEED = 20310106
"""Default of ``--seed``: ``calib.workflows.pricing.MC_SEED`` (a test keeps them equal)."""

Day = Annotated[datetime, typer.Option(formats=["%Y-%m-%d"])]


def register(app: typer.Typer) -> None:
    """Add the ``price`` group to ``app``."""
    app.add_typer(price_app, name="price")
    price_app.command("vanilla")(vanilla_cmd)


def _print(result: flow.SpreadPrice) -> None:
    r = result
    run = r.run
    typer.echo(
        f"{run.commodity} {r.kind} on far - near ({r.far} - {r.near}), strike {r.strike:g}, "
        f"expiry {r.expiry}; priced on {r.pricing_date}"
    )
    typer.echo(
        f"  parameters: run {run.run_id} ({run.status}, fitted {run.trade_date}, "
        f"{'forward buckets' if r.to_dict()['vols'] == 'forward' else 'constant volatilities'})"
    )
    typer.echo(
        f"  futures: near {r.near_price:g}, far {r.far_price:g}; discount {r.discount:.6f}; "
        f"t = {r.years[0]:.4f} y"
    )
    typer.echo(f"  price        {r.price:.6f}   (exact, {r.nodes} Gauss-Hermite nodes)")
    typer.echo(f"  delta near   {r.delta_near:+.6f}   futures per option")
    typer.echo(f"  delta far    {r.delta_far:+.6f}   futures per option")
    typer.echo("\n".join(text.sensitivity_lines(r.vol_sensitivities)))
    kirk = f"{r.kirk:.6f}   (diff {r.kirk - r.price:+.2e})" if r.kirk is not None else r.kirk_note
    typer.echo(f"  Kirk         {kirk}")
    z = (r.mc - r.price) / r.mc_stderr if r.mc_stderr > 0 else 0.0
    typer.echo(
        f"  Monte Carlo  {r.mc:.6f} +- {r.mc_stderr:.6f}   ({r.mc_paths} paths, seed "
        f"{r.mc_seed}; {z:+.2f} standard errors from exact)"
    )


@price_app.command("spread")
def spread_cmd(
    commodity: Annotated[str, typer.Argument(help="Commodity code.")],
    near: Annotated[datetime, typer.Option("--near", formats=["%Y-%m-%d"], help="Near delivery.")],
    far: Annotated[datetime, typer.Option("--far", formats=["%Y-%m-%d"], help="Far delivery.")],
    expiry: Annotated[
        datetime, typer.Option("--expiry", formats=["%Y-%m-%d"], help="Option expiry.")
    ],
    strike: Annotated[float, typer.Option("--strike", help="Strike of far minus near.")],
    kind: Annotated[
        Literal["call", "put"],
        typer.Option("--kind", help="call: max(S - K, 0); put: max(K - S, 0)."),
    ] = "call",
    run_id: PricingRunOption = None,
    on: PricingDayOption = None,
    paths: Annotated[int, typer.Option("--paths", min=4, help="Monte Carlo paths.")] = MC_PATHS,
    seed: Annotated[int, typer.Option("--seed", help="Monte Carlo seed.")] = MC_SEED,
    uncertainty: UncertaintyOption = False,
    draws: DrawsOption = 200,
    series_id: SeriesOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Price a calendar-spread option on F(far) - F(near): price, hedge ratios in both futures,
    sensitivities to the calibrated volatilities, and the Kirk and Monte Carlo cross-checks.
    With --uncertainty: the price's standard error from the historical estimate."""
    from calib.workflows import pricing as flow

    with open_store(db, read_only=True) as (store, _):
        result = flow.price_spread(
            store.sessions,
            commodity,
            near=near.date(),
            far=far.date(),
            expiry=expiry.date(),
            strike=strike,
            kind=kind,
            run_id=run_id,
            on=None if on is None else on.date(),
            mc_paths=paths,
            mc_seed=seed,
        )
        extra = with_uncertainty(store.sessions, result, draws, series_id) if uncertainty else None
    if as_json:
        echo_json({**result.to_dict(), **({"uncertainty": extra.to_dict()} if extra else {})})
    else:
        _print(result)
        if extra is not None:
            print_uncertainty(extra)
