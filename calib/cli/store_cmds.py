"""``calib init``, ``calib ingest`` and ``calib quotes``: the quote store's commands.

Exit codes of ``calib ingest``: 0 every row of every file accepted (or the file was already
loaded with every row accepted); 1 some rows were quarantined, the others landed (also when the
file was already loaded and its first ingest quarantined rows), or options came before their
day's zero curve (checked with r = 0, said in a note); 2 a file was refused as a whole
(unreadable, no rows, missing columns, unknown commodity in a futures file, or ``--strict``
with a bad row).
"""

from __future__ import annotations

import math
from datetime import datetime
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from calib.cli.common import AsOfOption, DbOption, JsonOption, echo_json, open_store
from calib.errors import IngestFileError

if TYPE_CHECKING:  # the store and the workflows are imported by the commands that use them
    from calib.store.quotes import DayQuotes
    from calib.workflows.ingest import IngestReport

EXIT_ROWS_REJECTED = 1
EXIT_FILE_REFUSED = 2
SHOWN_PROBLEMS = 5
"""Row problems printed per file (all are in the quarantine table and in ``--json``)."""


class Exercise(StrEnum):
    """An option's exercise style."""

    european = "european"
    american = "american"


class QuoteKind(StrEnum):
    """What an ingested file holds."""

    futures = "futures"
    options = "options"
    rates = "rates"


def register(app: typer.Typer) -> None:
    """Add the store's commands to ``app``."""
    app.command("init")(init_cmd)
    app.command("ingest")(ingest_cmd)
    app.command("quotes")(quotes_cmd)


def init_cmd(db: DbOption = None, as_json: JsonOption = False) -> None:
    """Create the database, or upgrade it to this program's schema."""
    from calib.store.migrate import upgrade

    with open_store(db, check=False) as (store, _):
        result = upgrade(store.engine)
    if as_json:
        echo_json({"database": store.url, "before": result.before, "after": result.after})
        return
    if not result.changed:
        typer.echo(f"{store.url}: schema at revision {result.after}, nothing to do")
    else:
        typer.echo(
            f"{store.url}: schema upgraded from {result.before or 'empty'} to {result.after}"
        )


def _print_report(report: IngestReport) -> None:
    if report.status == "duplicate":
        held = (
            f" ({report.rows_quarantined} row(s) of it are in quarantine)"
            if report.rows_quarantined
            else ""
        )
        typer.echo(f"{report.file}: already loaded as batch {report.batch_id}{held}, nothing done")
        return
    verb = "refused (--strict)" if report.status == "rejected" else "loaded"
    typer.echo(
        f"{report.file}: {verb} as batch {report.batch_id}: {report.rows_read} read, "
        f"{report.rows_accepted} accepted, {report.rows_rejected} rejected"
    )
    for code in report.created:
        typer.echo(f"  registered commodity {code}")
    for problem in report.problems[:SHOWN_PROBLEMS]:
        typer.echo(f"  {report.file}:{problem.line}: {problem.field}: {problem.reason}")
    shown = min(len(report.problems), SHOWN_PROBLEMS)
    if report.rows_quarantined > shown:
        typer.echo(f"  ... {report.rows_quarantined - shown} more (see the quarantine)")
    for note in report.notes:
        typer.echo(f"  note: {note}")


def ingest_cmd(
    kind: Annotated[QuoteKind, typer.Argument(help="What the files hold.")],
    files: Annotated[list[Path], typer.Argument(help="CSV or Parquet files.", show_default=False)],
    strict: Annotated[
        bool, typer.Option("--strict", help="Refuse a file if any row is bad.")
    ] = False,
    create: Annotated[
        bool, typer.Option("--create", help="Register unknown commodity codes.")
    ] = False,
    unit: Annotated[str, typer.Option(help="Unit of a commodity registered by --create.")] = "unit",
    currency: Annotated[str, typer.Option(help="Its quote currency.")] = "USD",
    calendar: Annotated[str, typer.Option(help="Its contract calendar rule.")] = "monthly",
    exercise: Annotated[
        Exercise,
        typer.Option(
            help="Its options' default exercise style (an options file's exercise column, "
            "where given, says per row)."
        ),
    ] = Exercise.european,
    settle_band: Annotated[
        float | None,
        typer.Option(
            help="Day-on-day band of a futures settlement: at most this factor either way"
            " (default 2).",
            show_default=False,
        ),
    ] = None,
    vol_band: Annotated[
        float | None,
        typer.Option(
            help="Day-on-day band of an implied volatility, a factor either way (default 3).",
            show_default=False,
        ),
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Validate and store quote files; bad rows are quarantined with their reasons.

    Exit code 0: all rows accepted; 1: some rows quarantined (now, or when the same file was
    first loaded), or options before their day's zero curve; 2: a file refused as a whole.
    """
    from calib.inputs.rules import Bands
    from calib.workflows.ingest import NewCommodity, ingest_file

    new = (
        NewCommodity(unit=unit, currency=currency, calendar_rule=calendar, exercise=exercise.value)
        if create
        else None
    )
    usual = Bands()
    try:
        bands = Bands(
            settle_move=usual.settle_move if settle_band is None else settle_band,
            vol_move=usual.vol_move if vol_band is None else vol_band,
        )
    except ValueError as exc:
        raise typer.BadParameter(str(exc)) from None
    code = 0
    results: list[dict[str, Any]] = []
    with open_store(db) as (store, settings):
        for path in files:
            try:
                report = ingest_file(
                    store.sessions,
                    path,
                    kind.value,
                    by=settings.user,
                    strict=strict,
                    create=new,
                    bands=bands,
                )
            except IngestFileError as exc:
                code = EXIT_FILE_REFUSED
                results.append({"file": str(path), "status": "refused", "reason": exc.reason})
                if not as_json:
                    typer.echo(f"error: {exc}", err=True)
                continue
            if report.status == "rejected":
                code = EXIT_FILE_REFUSED
            elif report.rows_quarantined or report.curve_missing:
                # rows quarantined now or before (a duplicate says it again), or options
                # checked with r = 0 because their day's zero curve came later
                code = max(code, EXIT_ROWS_REJECTED)
            results.append(report.to_dict())
            if not as_json:
                _print_report(report)
    if as_json:
        echo_json({"files": results, "exit_code": code})
    # SystemExit, not typer.Exit: calib.cli.main runs click with standalone_mode=False, which
    # turns typer.Exit into a return value that main() does not pass on.
    raise SystemExit(code)


def _number(value: float) -> str:
    return "" if math.isnan(value) else f"{value:.6g}"


def _table(headers: list[str], rows: list[list[str]]) -> str:
    widths = [max([len(h)] + [len(r[j]) for r in rows]) for j, h in enumerate(headers)]
    lines = ["  ".join(h.rjust(w) for h, w in zip(headers, widths, strict=True))]
    lines += ["  ".join(c.rjust(w) for c, w in zip(r, widths, strict=True)) for r in rows]
    return "\n".join(lines)


def _nan_none(values: Any) -> list[float | None]:
    return [None if v != v else v for v in values.tolist()]


def _day_json(day: DayQuotes, early: list[float]) -> dict[str, Any]:
    f, o, r = day.futures, day.options, day.rates
    return {
        "commodity": day.commodity,
        "trade_date": day.trade_date,
        "as_of": day.as_of,
        "batch_ids": list(day.batch_ids),
        "futures": [
            {"delivery": str(d), "settle": s, "row_id": i}
            for d, s, i in zip(f.delivery, f.settle.tolist(), f.row_id.tolist(), strict=True)
        ],
        "options": [
            {
                "delivery": str(o.delivery[j]),
                "expiry": str(o.expiry[j]),
                "kind": "call" if o.is_call[j] else "put",
                "strike": float(o.strike[j]),
                "premium": _nan_none(o.premium[j : j + 1])[0],
                "implied_vol": _nan_none(o.implied_vol[j : j + 1])[0],
                "bid": _nan_none(o.bid[j : j + 1])[0],
                "ask": _nan_none(o.ask[j : j + 1])[0],
                "exercise": "american" if o.american[j] else "european",
                "early_exercise": None if math.isnan(early[j]) else early[j],
                "row_id": int(o.row_id[j]),
            }
            for j in range(len(o))
        ],
        "rates": [
            {"maturity": str(m), "zero_rate": z, "row_id": i}
            for m, z, i in zip(r.maturity, r.zero_rate.tolist(), r.row_id.tolist(), strict=True)
        ],
    }


def quotes_cmd(
    commodity: Annotated[str, typer.Argument(help="Commodity code.")],
    trade_date: Annotated[
        datetime, typer.Option("--date", formats=["%Y-%m-%d"], help="Trading day (YYYY-MM-DD).")
    ],
    as_of: AsOfOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Show the futures, options and zero curve stored for a commodity on a day."""
    from calib.store.quotes import load_day
    from calib.workflows.fit import early_exercise

    with open_store(db, read_only=True) as (store, _), store.sessions.begin() as session:
        day = load_day(
            session=session, commodity=commodity, trade_date=trade_date.date(), as_of=as_of
        )
    early = early_exercise(day).tolist()
    if as_json:
        echo_json(_day_json(day, early))
        return
    f, o, r = day.futures, day.options, day.rates
    typer.echo(
        f"{day.commodity} on {day.trade_date} as of {day.as_of:%Y-%m-%d %H:%M:%S} UTC: "
        f"{len(f)} futures, {len(o)} options, {len(r)} rates (batches {list(day.batch_ids)})"
    )
    if len(f):
        rows = [[str(d), _number(s)] for d, s in zip(f.delivery, f.settle, strict=True)]
        typer.echo("\nfutures\n" + _table(["delivery", "settle"], rows))
    if len(o):
        rows = [
            [
                str(o.delivery[j]),
                str(o.expiry[j]),
                "call" if o.is_call[j] else "put",
                _number(o.strike[j]),
                _number(o.premium[j]),
                _number(o.implied_vol[j]),
                _number(o.bid[j]),
                _number(o.ask[j]),
                "american" if o.american[j] else "european",
                _number(early[j]),
            ]
            for j in range(len(o))
        ]
        headers = [
            "delivery",
            "expiry",
            "kind",
            "strike",
            "premium",
            "implied_vol",
            "bid",
            "ask",
            "exercise",
            "early_exercise",
        ]
        typer.echo("\noptions\n" + _table(headers, rows))
    if len(r):
        rows = [[str(m), _number(z)] for m, z in zip(r.maturity, r.zero_rate, strict=True)]
        typer.echo("\nrates\n" + _table(["maturity", "zero_rate"], rows))
