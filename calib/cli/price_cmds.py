"""Pricing from a stored parameter set: ``calib price spread COMMODITY ...`` and ``calib price
vanilla COMMODITY ...``, each with its uncertainty on request (``--uncertainty``).

Exit codes: 0 priced; 2 a user mistake (no approved set, delivery not quoted that day, expiry
after the near delivery, unknown run, ...), nothing priced.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import date, datetime
from typing import TYPE_CHECKING, Annotated, Literal, TypeVar

import typer

from calib.cli.common import DbOption, JsonOption, echo_json, open_store
from calib.output import text

if TYPE_CHECKING:
    from sqlalchemy.orm import Session, sessionmaker

    from calib.workflows.price_uncertainty import PriceUncertainty, VanillaPrice
    from calib.workflows.pricing import SpreadPrice

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
UncertaintyOption = Annotated[
    bool,
    typer.Option(
        "--uncertainty",
        help="Also the price's standard error from the historical estimate (delta method, "
        "checked by sampling) and its range under the rolling windows of the last year.",
    ),
]
PricingRunOption = Annotated[
    int | None,
    typer.Option("--run", help="Run id (default: latest approved set).", show_default=False),
]
PricingDayOption = Annotated[
    datetime | None,
    typer.Option(
        "--date",
        formats=["%Y-%m-%d"],
        help="Pricing day (default: the run's trade date).",
        show_default=False,
    ),
]
DrawsOption = Annotated[
    int, typer.Option("--draws", min=2, help="With --uncertainty: draws of the sampling check.")
]
SeriesOption = Annotated[
    int | None,
    typer.Option(
        "--series",
        help="With --uncertainty: the rolling series (default: newest).",
        show_default=False,
    ),
]

P = TypeVar("P", "SpreadPrice", "VanillaPrice")


def register(app: typer.Typer) -> None:
    """Add the ``price`` group to ``app``."""
    app.add_typer(price_app, name="price")


def _day(value: datetime | None) -> date | None:
    return None if value is None else value.date()


def _parameters_line(result: SpreadPrice | VanillaPrice) -> str:
    run = result.run
    vols = "forward buckets" if result.to_dict()["vols"] == "forward" else "constant volatilities"
    return f"  parameters: run {run.run_id} ({run.status}, fitted {run.trade_date}, {vols})"


def _spread_lines(r: SpreadPrice) -> list[str]:
    kirk = f"{r.kirk:.6f}   (diff {r.kirk - r.price:+.2e})" if r.kirk is not None else r.kirk_note
    z = (r.mc - r.price) / r.mc_stderr if r.mc_stderr > 0 else 0.0
    return [
        f"{r.run.commodity} {r.kind} on far - near ({r.far} - {r.near}), strike {r.strike:g}, "
        f"expiry {r.expiry}; priced on {r.pricing_date}",
        _parameters_line(r),
        f"  futures: near {r.near_price:g}, far {r.far_price:g}; discount {r.discount:.6f}; "
        f"t = {r.years[0]:.4f} y",
        f"  price        {r.price:.6f}   (exact, {r.nodes} Gauss-Hermite nodes)",
        f"  delta near   {r.delta_near:+.6f}   futures per option",
        f"  delta far    {r.delta_far:+.6f}   futures per option",
        *text.sensitivity_lines(r.vol_sensitivities),
        f"  Kirk         {kirk}",
        f"  Monte Carlo  {r.mc:.6f} +- {r.mc_stderr:.6f}   ({r.mc_paths} paths, seed "
        f"{r.mc_seed}; {z:+.2f} standard errors from exact)",
    ]


def _vanilla_lines(r: VanillaPrice) -> list[str]:
    return [
        f"{r.run.commodity} {r.kind} on the {r.future} future, strike {r.strike:g}, expiry "
        f"{r.expiry}; priced on {r.pricing_date}",
        _parameters_line(r),
        f"  future {r.future_price:g}; discount {r.discount:.6f}; t = {r.years[0]:.4f} y; "
        f"model vol {r.to_dict()['implied_vol']:.4%}",
        f"  price        {r.price:.6f}",
    ]


def _show_price(
    db: str | None,
    price: Callable[[sessionmaker[Session]], P],
    lines: Callable[[P], list[str]],
    uncertainty: Callable[..., PriceUncertainty] | None,
    *,
    draws: int,
    series_id: int | None,
    as_json: bool,
) -> None:
    """Price from the store (read-only), and its ``uncertainty`` if given (``spread_`` or
    ``vanilla_uncertainty`` of :mod:`calib.workflows.price_uncertainty`); print the JSON
    object (the uncertainty under its key), or the price's lines and the uncertainty's."""
    with open_store(db, read_only=True) as (store, _):
        result = price(store.sessions)
        extra = (
            None
            if uncertainty is None
            else uncertainty(store.sessions, result, draws=draws, series_id=series_id)
        )
    if as_json:
        echo_json({**result.to_dict(), **({"uncertainty": extra.to_dict()} if extra else {})})
        return
    typer.echo("\n".join(lines(result)))
    if extra is not None:
        print_uncertainty(extra)


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

    if uncertainty:  # its modules (the fitter's) load only when asked
        from calib.workflows.price_uncertainty import spread_uncertainty
    _show_price(
        db,
        lambda sessions: flow.price_spread(
            sessions,
            commodity,
            near=near.date(),
            far=far.date(),
            expiry=expiry.date(),
            strike=strike,
            kind=kind,
            run_id=run_id,
            on=_day(on),
            mc_paths=paths,
            mc_seed=seed,
        ),
        _spread_lines,
        spread_uncertainty if uncertainty else None,
        draws=draws,
        series_id=series_id,
        as_json=as_json,
    )


def print_uncertainty(u: PriceUncertainty) -> None:
    """The uncertainty lines under a price."""
    e, s, d = u.estimate, u.sampled, u.delta
    typer.echo(
        f"  historical estimate {e.estimate_id} ({e.window_start}..{e.window_end}) held fixed; "
        f"refitted at it: {u.refit_price:.6f}"
    )
    ratio = f"{s.sd / d.se:.3f}" if d.se > 0 else "-"
    typer.echo(
        f"  standard error {d.se:.6f} (delta method); sampling {s.sd:.6f} from "
        f"{s.values.size} of {s.n_draws} draws (ratio {ratio}, seed {s.seed}; "
        f"{s.outside_domain} outside the domain, {s.failed} refits failed)"
    )
    if u.note:
        typer.echo(f"  NOTE: {u.note}")
    shares = sorted(d.contribution.items(), key=lambda kv: -abs(kv[1]))[:3]
    typer.echo("  variance from   " + ", ".join(f"{n} {v:.0%}" for n, v in shares))
    window = u.window_range
    if u.series_id is None:
        typer.echo("  rolling windows: no rolling series stored")
    elif window is None:
        typer.echo(f"  rolling windows: none of series {u.series_id} ended in the last year")
    else:
        typer.echo(
            f"  rolling windows: {len(u.windows)} of series {u.series_id} in the last year: "
            f"min {window[0]:.6f}, max {window[1]:.6f}"
        )
    from calib.workflows.price_uncertainty import CAUTION

    typer.echo(f"  caution: {CAUTION}")


@price_app.command("vanilla")
def vanilla_cmd(
    commodity: Annotated[str, typer.Argument(help="Commodity code.")],
    future: Annotated[
        datetime, typer.Option("--future", formats=["%Y-%m-%d"], help="Delivery of the future.")
    ],
    expiry: Annotated[
        datetime, typer.Option("--expiry", formats=["%Y-%m-%d"], help="Option expiry.")
    ],
    strike: Annotated[float, typer.Option("--strike", help="Strike.")],
    kind: Annotated[Literal["call", "put"], typer.Option("--kind", help="call or put.")] = "call",
    run_id: PricingRunOption = None,
    on: PricingDayOption = None,
    uncertainty: UncertaintyOption = False,
    draws: DrawsOption = 200,
    series_id: SeriesOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Price a European option on one future: Black-76 with the model's total variance."""
    from calib.workflows import price_uncertainty as flow

    _show_price(
        db,
        lambda sessions: flow.price_vanilla(
            sessions,
            commodity,
            future=future.date(),
            expiry=expiry.date(),
            strike=strike,
            kind=kind,
            run_id=run_id,
            on=_day(on),
        ),
        _vanilla_lines,
        flow.vanilla_uncertainty if uncertainty else None,
        draws=draws,
        series_id=series_id,
        as_json=as_json,
    )
