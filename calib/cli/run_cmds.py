"""Historical estimates and the morning run: estimate, estimates, fit, approve, reject, runs,
show, latest, rerun.

Exit codes: 0 done; 1 the fit failed (a rejected run was stored) or a rerun differs; 2 a user
mistake (unknown commodity or run, bad file, illegal status change), nothing stored.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Sequence
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, NoReturn, cast

import typer

from calib.cli.common import (
    AsOfOption,
    ClusterOption,
    DbOption,
    EstimateOption,
    JsonOption,
    SettingsOption,
    WorkersOption,
    echo_json,
    open_store,
)
from calib.output import text
from calib.settings import get_settings

if TYPE_CHECKING:  # the store and the workflows are imported by the commands that use them
    from calib.record.run import RunRecord
    from calib.workflows import estimates as estimate_flow
    from calib.workflows import fit as fit_flow

MIN_DAYS = 250
"""Default of ``--min-days``: ``calib.workflows.estimates.MIN_DAYS`` (a test keeps them equal)."""
EXIT_FIT_FAILED = 1
EXIT_RERUN_DIFFERS = 1
EXIT_NONE_APPROVED = 2
EXIT_NOT_APPROVED = 3
"""``fit --auto-approve``: a gate failed, the run stays a candidate (the verdict line says why)."""


def _exit(code: int) -> NoReturn:
    # SystemExit, not typer.Exit: in click's non-standalone mode (calib.cli.main) an Exit is
    # turned into a return value and its code would be lost
    raise SystemExit(code)


Commodity = Annotated[str, typer.Argument(help="Commodity code.", metavar="COMMODITY")]
RunId = Annotated[int, typer.Argument(help="Run id.", metavar="RUN")]
ByOpt = Annotated[str, typer.Option("--by", help="Who decides (recorded on the event).")]
NoteOpt = Annotated[str, typer.Option("--note", help="Why (recorded on the event).")]
CreatorOpt = Annotated[
    str | None,
    typer.Option(
        "--by", help="Recorded as the run's creator; default $CALIB_USER, else the login name."
    ),
]


def register(app: typer.Typer) -> None:
    """Add the estimate and run commands to ``app``."""
    app.command("estimate")(estimate_cmd)
    app.command("estimates")(estimates_cmd)
    app.command("fit")(fit_cmd)
    app.command("approve")(approve_cmd)
    app.command("reject")(reject_cmd)
    app.command("runs")(runs_cmd)
    app.command("show")(show_cmd)
    app.command("latest")(latest_cmd)
    app.command("rerun")(rerun_cmd)


def _echo(lines: list[str]) -> None:
    typer.echo("\n".join(lines))


def _echo_list(
    records: Sequence[Any], as_json: bool, table: Callable[[Sequence[Any]], list[str]], empty: str
) -> None:
    """Records as a JSON list, else ``table(records)`` (``empty`` when there are none)."""
    if as_json:
        echo_json([r.to_dict() for r in records])
    else:
        _echo(table(records) if records else [empty])


# --- estimates ---------------------------------------------------------------------------------


def _progress(started: float) -> estimate_flow.Progress:
    """Progress lines on stderr, each with the seconds since ``started``."""

    def show(message: str) -> None:
        typer.echo(f"[{time.monotonic() - started:6.1f}s] {message}", err=True)

    return show


def estimate_cmd(
    commodity: Commodity,
    start: Annotated[datetime, typer.Option("--from", formats=["%Y-%m-%d"], help="First day.")],
    end: Annotated[datetime, typer.Option("--to", formats=["%Y-%m-%d"], help="Last day.")],
    contracts: Annotated[int, typer.Option("--contracts", min=2, help="Contracts a day.")] = 5,
    min_days: Annotated[
        int, typer.Option("--min-days", min=2, help="Fewest trading days accepted.")
    ] = MIN_DAYS,
    rolling: Annotated[
        str | None,
        typer.Option(
            "--rolling",
            metavar="LENGTH",
            help="Rolling series: one estimate per window of this length (2y, 18m) ending on "
            "--from, --from + --step, .. --to.",
            show_default=False,
        ),
    ] = None,
    step: Annotated[
        str | None,
        typer.Option(
            "--step",
            metavar="STEP",
            help="With --rolling: between window ends (1m).",
            show_default=False,
        ),
    ] = None,
    workers: WorkersOption = None,
    cluster: ClusterOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Estimate the model from stored futures (Kalman-filter maximum likelihood) and store it.

    With --rolling: a rolling series (resumable: the same command again estimates only the
    windows not stored yet); its estimates are never the morning fit's default."""
    if rolling is not None or step is not None or workers is not None or cluster is not None:
        from calib.cli.stability_cmds import rolling_estimate

        rolling_estimate(
            commodity,
            start.date(),
            end.date(),
            rolling,
            step,
            workers,
            cluster=cluster,
            contracts=contracts,
            min_days=min_days,
            db=db,
            as_json=as_json,
        )
        return
    from calib.workflows import estimates as estimate_flow

    with open_store(db) as (store, settings):
        record = estimate_flow.estimate(
            store.sessions,
            commodity,
            start.date(),
            end.date(),
            by=settings.user,
            n_contracts=contracts,
            min_days=min_days,
            progress=_progress(time.monotonic()),
        )
    if as_json:
        echo_json(record.to_dict())
    else:
        _echo(text.estimate_lines(record))


def estimates_cmd(
    what: Annotated[str, typer.Argument(help="COMMODITY to list, or `import`.", metavar="ARG")],
    commodity: Annotated[
        str | None,
        typer.Argument(
            help="With `import`: the commodity.", metavar="[COMMODITY]", show_default=False
        ),
    ] = None,
    file: Annotated[
        Path | None,
        typer.Argument(help="With `import`: the JSON file.", metavar="[FILE]", show_default=False),
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """List a commodity's estimates (`calib estimates QLM`), or register one made elsewhere
    (`calib estimates import QLM FILE.json`: the seven parameter names plus window_start and
    window_end; marked imported)."""
    from calib.store.estimates import list_estimates
    from calib.workflows import estimates as estimate_flow

    if what == "import":
        if commodity is None or file is None:
            raise typer.BadParameter("usage: calib estimates import COMMODITY FILE.json")
        with open_store(db) as (store, settings):
            record = estimate_flow.import_estimate(
                store.sessions, commodity, file, by=settings.user
            )
        if as_json:
            echo_json(record.to_dict())
        else:
            _echo(text.estimate_lines(record))
        return
    if commodity is not None:
        raise typer.BadParameter(f"unexpected argument {commodity!r} (did you mean `import`?)")
    with open_store(db, read_only=True) as (store, _), store.sessions.begin() as session:
        records = list_estimates(session=session, commodity=what)
    _echo_list(records, as_json, text.estimates_table, f"{what}: no estimates stored")


# --- runs --------------------------------------------------------------------------------------


def _fit_lines(outcome: fit_flow.FitOutcome, auto_approve: bool) -> list[str]:
    run = outcome.run
    lines = text.run_lines(run)
    if run.params is None:
        return [*lines, "  status rejected; the approved set is unchanged"]
    change = outcome.change()
    if change is None:
        lines.append("change: no approved set yet")
    else:
        assert outcome.previous is not None
        lines.append(f"change against approved run {outcome.previous.run_id}:")
        for n in text.VOLS:
            c = change[n]
            lines.append(f"  {n:<12} {c['approved']:.6g} -> {c['new']:.6g}  ({c['change']:+.4g})")
    gates = (text.fit_of(run) or {}).get("gates", [])
    lines += text.gate_lines(gates)
    if auto_approve:
        lines.append(text.verdict_line(gates, outcome.auto_approved))
    return lines


def fit_cmd(
    commodity: Commodity,
    trade_date: Annotated[
        datetime, typer.Option("--date", formats=["%Y-%m-%d"], help="Trading day (YYYY-MM-DD).")
    ],
    settings_file: SettingsOption = None,
    estimate_id: EstimateOption = None,
    auto_approve: Annotated[
        bool,
        typer.Option(
            "--auto-approve",
            help="Approve if every gate passes; else say which failed and exit 3.",
        ),
    ] = False,
    by: CreatorOpt = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Calibrate the volatilities to a day's option quotes and store the run as a candidate.

    Exit code 1 when the fit failed (stored as a rejected run with its reason); 3 when
    --auto-approve found a failed gate (the run stays a candidate; the verdict line says why).
    """
    from calib.policy.settings import load_settings
    from calib.workflows import fit as fit_flow

    settings = load_settings(settings_file, commodity)
    with open_store(db) as (store, program):
        outcome = fit_flow.fit_day(
            store.sessions,
            commodity,
            trade_date.date(),
            by=by or program.user,
            settings=settings,
            estimate_id=estimate_id,
            auto_approve=auto_approve,
        )
    if as_json:
        echo_json(outcome.to_dict())
    else:
        _echo(_fit_lines(outcome, auto_approve))
    if outcome.run.outcome == "failed":
        _exit(EXIT_FIT_FAILED)
    if auto_approve and not outcome.auto_approved:
        _exit(EXIT_NOT_APPROVED)


def approve_cmd(
    run_id: RunId, by: ByOpt, note: NoteOpt, db: DbOption = None, as_json: JsonOption = False
) -> None:
    """Approve a candidate run; the commodity's previous approved set becomes superseded."""
    _decide("approved", run_id, by, note, db, as_json)


def reject_cmd(
    run_id: RunId, by: ByOpt, note: NoteOpt, db: DbOption = None, as_json: JsonOption = False
) -> None:
    """Reject a candidate run."""
    _decide("rejected", run_id, by, note, db, as_json)


def _decide(to: str, run_id: int, by: str, note: str, db: str | None, as_json: bool) -> None:
    """Approve or reject (``to``) a candidate run and print what changed."""
    from calib.workflows import approve as approve_flow

    superseded = None
    with open_store(db) as (store, _):
        if to == "approved":
            result = approve_flow.approve(store.sessions, run_id, by=by, note=note)
            run, superseded = result.run, result.superseded
        else:
            run = approve_flow.reject(store.sessions, run_id, by=by, note=note)
    if as_json:
        extra = {"superseded_run_id": superseded} if to == "approved" else {}
        echo_json({**run.to_dict(), **extra})
        return
    typer.echo(f"run {run_id} {to} by {by}")
    if superseded is not None:
        typer.echo(f"run {superseded} superseded")


def runs_cmd(
    commodity: Commodity,
    on: Annotated[
        datetime | None,
        typer.Option(
            "--date", formats=["%Y-%m-%d"], help="Only this trading day.", show_default=False
        ),
    ] = None,
    limit: Annotated[int, typer.Option("--limit", min=1, help="At most this many.")] = 50,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """List a commodity's runs, newest first, with their current status."""
    from calib.store.runs import list_runs

    with open_store(db, read_only=True) as (store, _), store.sessions.begin() as session:
        runs = list_runs(
            session=session,
            commodity=commodity,
            trade_date=None if on is None else on.date(),
            limit=limit,
        )
    _echo_list(runs, as_json, text.runs_table, f"{commodity}: no runs stored")


def show_cmd(run_id: RunId, db: DbOption = None, as_json: JsonOption = False) -> None:
    """Show a run: parameters, fit, gates, events and per-quote residuals."""
    from calib.store.runs import require_run, run_quotes, run_residuals
    from calib.workflows.fit import early_exercise

    with open_store(db, read_only=True) as (store, _), store.sessions.begin() as session:
        run = require_run(session=session, run_id=run_id)
        frame = run_residuals(session=session, run_id=run_id)
        residuals = cast("list[dict[str, Any]]", frame.to_dict(orient="records"))
        day = run_quotes(session=session, run=run) if residuals else None
    contracts = {} if day is None else text.option_contracts(day.options, early_exercise(day))
    rows = [{**r, **contracts.get(int(r["quote_id"]), text.NO_CONTRACT)} for r in residuals]
    if as_json:
        echo_json({**run.to_dict(with_inputs=True), "residuals": rows})
        return
    lines = text.run_lines(run)
    fit = text.fit_of(run)
    if fit is not None:
        lines += text.gate_lines(fit.get("gates", []))
    lines.append("events:")
    lines += [
        f"  {e.at:%Y-%m-%d %H:%M:%S}  {e.to_status:<10} by {e.by}: {e.note}" for e in run.events
    ]
    if residuals:
        lines += text.residual_table(residuals, contracts)
    _echo(lines)


def latest_cmd(
    commodity: Commodity,
    as_of: AsOfOption = None,
    history: Annotated[
        bool, typer.Option("--history", help="Every approval, oldest first.")
    ] = False,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """The approved parameter set in force (exit code 2 if there is none)."""
    if history:
        from calib.store.runs import approved_history

        with open_store(db, read_only=True) as (store, _), store.sessions.begin() as session:
            approvals = approved_history(session=session, commodity=commodity)
        _echo_list(approvals, as_json, text.history_table, f"{commodity}: no approvals")
        return
    run = _read_in_force(db, commodity, as_of)
    if run is None:
        when = "now" if as_of is None else f"at {as_of:%Y-%m-%d %H:%M:%S} UTC"
        typer.echo(f"error: {commodity}: no approved parameter set {when}", err=True)
        _exit(EXIT_NONE_APPROVED)
    if as_json:
        echo_json(run.to_dict())
    else:
        when = "now" if as_of is None else f"at {as_of:%Y-%m-%d %H:%M:%S} UTC"
        typer.echo(f"{commodity}: set in force {when} (trade date {run.trade_date})")
        _echo(text.run_lines(run))


def _read_in_force(db: str | None, commodity: str, as_of: datetime | None) -> RunRecord | None:
    """The set in force: through sqlite3 alone when the store is an ordinary SQLite file (no
    SQLAlchemy, no numpy: :mod:`calib.store.quick`), else through the store."""
    from calib.store import quick

    try:
        return quick.read_in_force(get_settings(db).db_url, commodity, as_of)
    except quick.NotReadError:
        pass
    from calib.store.runs import read_in_force

    with open_store(db, read_only=True) as (store, _):
        return read_in_force(store.sessions, commodity, as_of=as_of)


def rerun_cmd(run_id: RunId, db: DbOption = None, as_json: JsonOption = False) -> None:
    """Fit a run again from its stored quote rows and settings; say if the result is identical.

    Exit code 1 if the parameters differ.
    """
    from calib.workflows import rerun as rerun_flow

    with open_store(db, read_only=True) as (store, _):
        result = rerun_flow.rerun(store.sessions, run_id)
    if as_json:
        echo_json(result.to_dict())
    elif result.identical:
        typer.echo(f"run {run_id}: rerun identical, bit for bit ({result.run.code_version})")
    else:
        typer.echo(f"run {run_id}: rerun DIFFERS")
        for n, d in result.differences.items():
            typer.echo(f"  {n}: {d:+.3e}")
        if result.failure:
            typer.echo(f"  rerun failed: {result.failure}")
        typer.echo(
            f"  stored by {result.run.code_version}, now {result.to_dict()['code_version_now']}"
        )
    if not result.identical:
        _exit(EXIT_RERUN_DIFFERS)
