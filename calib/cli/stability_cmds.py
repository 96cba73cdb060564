"""Rolling estimates and their stability: ``calib estimate CODE --rolling 2y --step 1m ...``
(the estimate command hands over to :func:`rolling_estimate`) and ``calib stability CODE``.

Exit codes: 0 done; 2 a user mistake (bad period, unknown series or estimate), nothing stored.
"""

from __future__ import annotations

import sys
from contextlib import closing
from datetime import date, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

import typer

from calib.cli.common import DbOption, JsonOption, echo_json, open_store, output_file

if TYPE_CHECKING:
    from sqlalchemy.orm import Session, sessionmaker

    from calib.workflows.price_uncertainty import PriceUncertainty, VanillaPrice
    from calib.workflows.pricing import SpreadPrice

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
                by=settings.user,
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


# --- price uncertainty and the vanilla price ---------------------------------------------------


def with_uncertainty(
    sessions: sessionmaker[Session],
    result: SpreadPrice | VanillaPrice,
    draws: int,
    series_id: int | None,
) -> PriceUncertainty:
    """The uncertainty of a priced spread or vanilla (see calib.workflows.price_uncertainty)."""
    from calib.workflows import price_uncertainty as flow

    if isinstance(result, flow.VanillaPrice):
        return flow.vanilla_uncertainty(sessions, result, draws=draws, series_id=series_id)
    return flow.spread_uncertainty(sessions, result, draws=draws, series_id=series_id)


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

    with open_store(db, read_only=True) as (store, _):
        result = flow.price_vanilla(
            store.sessions,
            commodity,
            future=future.date(),
            expiry=expiry.date(),
            strike=strike,
            kind=kind,
            run_id=run_id,
            on=None if on is None else on.date(),
        )
        extra = with_uncertainty(store.sessions, result, draws, series_id) if uncertainty else None
    if as_json:
        echo_json({**result.to_dict(), **({"uncertainty": extra.to_dict()} if extra else {})})
        return
    r, run = result, result.run
    out = r.to_dict()
    typer.echo(
        f"{run.commodity} {r.kind} on the {r.future} future, strike {r.strike:g}, expiry "
        f"{r.expiry}; priced on {r.pricing_date}"
    )
    typer.echo(
        f"  parameters: run {run.run_id} ({run.status}, fitted {run.trade_date}, "
        f"{'forward buckets' if out['vols'] == 'forward' else 'constant volatilities'})"
    )
    typer.echo(
        f"  future {r.future_price:g}; discount {r.discount:.6f}; t = {r.years[0]:.4f} y; "
        f"model vol {out['implied_vol']:.4%}"
    )
    typer.echo(f"  price        {r.price:.6f}")
    if extra is not None:
        print_uncertainty(extra)
