"""Looking at fits: ``calib report``, ``calib compare``, and ``calib demo`` (the whole job).

Exit codes: 0 done; 2 a user mistake (unknown run or commodity, a failed run, a bad band, no
run in the dates, a demo directory that already holds a store), nothing written.
"""

from __future__ import annotations

import math
import statistics
import time
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from calib.cli.common import DbOption, JsonOption, echo_json, open_store, output_file
from calib.cli.run_cmds import _progress
from calib.errors import BandOptionError
from calib.output import text

if TYPE_CHECKING:  # the workflows are imported by the commands that use them
    from calib.output.compare import Band
    from calib.workflows.demo import DemoPlan, DemoSummary

EXIT_FLAGGED = 1
"""``compare --fail-on-flag``: at least one day outside its band."""
DEFAULT_DEMO_DIR = Path("demo-out")
"""Where ``calib demo`` writes by default (under the working folder; git-ignored)."""


def register(app: typer.Typer) -> None:
    """Add the report, compare and demo commands to ``app``."""
    app.command("report")(report_cmd)
    app.command("compare")(compare_cmd)
    app.command("demo")(demo_cmd)


# --- report ------------------------------------------------------------------------------------


def report_cmd(
    run_id: Annotated[int, typer.Argument(help="Run id.", metavar="RUN")],
    out: Annotated[Path, typer.Option("--out", help="Directory for index.html and the figures.")],
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Write a run's fit report: an HTML page and PNG figures (smiles, residual heat map,
    futures curve and vol term structure, anchor frontier, constraints, gates, inputs)."""
    from calib.workflows.report import write_report

    with open_store(db, read_only=True) as (store, _):
        result = write_report(store.sessions, run_id, out)
    for note in result.warnings:  # one plain line each; the page shows them too
        typer.echo(f"warning: {note}", err=True)
    if as_json:
        echo_json(result.to_dict())
    else:
        typer.echo(str(result.files.index))


# --- compare -----------------------------------------------------------------------------------


def parse_band(option: str, value: str | None, default: Band) -> Band:
    """``LO,HI`` as a :class:`Band` (``default`` when not given).

    Raises
    ------
    BandOptionError
        Not two comma-separated finite numbers with ``LO <= HI``.
    """
    from calib.output.compare import Band

    if value is None:
        return default
    parts = value.split(",")
    if len(parts) != 2:
        raise BandOptionError(option, value, "need exactly two numbers")
    try:
        lo, hi = (float(p) for p in parts)
    except ValueError:
        raise BandOptionError(option, value, "not numbers") from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo > hi:
        raise BandOptionError(option, value, "need finite LO <= HI")
    return Band(lo, hi)


def compare_cmd(
    commodity: Annotated[str, typer.Argument(help="Commodity code.")],
    start: Annotated[
        datetime, typer.Option("--from", formats=["%Y-%m-%d"], help="First trade date.")
    ],
    end: Annotated[datetime, typer.Option("--to", formats=["%Y-%m-%d"], help="Last trade date.")],
    every_fit: Annotated[
        bool,
        typer.Option("--all", help="Every fitted run, not only those ever approved."),
    ] = False,
    band_spot: Annotated[
        str | None,
        typer.Option(
            "--band-spot", metavar="LO,HI", help="Band of sigma_spot cal/hist [0.8,1.25]."
        ),
    ] = None,
    band_yield: Annotated[
        str | None,
        typer.Option(
            "--band-yield", metavar="LO,HI", help="Band of sigma_yield cal/hist [0.8,1.25]."
        ),
    ] = None,
    band_rho: Annotated[
        str | None,
        typer.Option("--band-rho", metavar="LO,HI", help="Band of rho cal - hist [-0.2,0.2]."),
    ] = None,
    csv_file: Annotated[Path | None, output_file("--csv", "Also write the table as CSV.")] = None,
    plot_file: Annotated[Path | None, output_file("--plot", "Also draw the series (PNG).")] = None,
    fail_on_flag: Annotated[
        bool,
        typer.Option(
            "--fail-on-flag", help=f"Exit {EXIT_FLAGGED} if any day is flagged (for schedulers)."
        ),
    ] = False,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Calibrated against historical (the estimate each run held fixed) over trade dates:
    volatility ratios and correlation difference, days outside a band flagged (*).

    By default the runs that were ever approved (superseded ones included); --all for every
    fitted run. Exit code 1 with --fail-on-flag when a day is flagged (the table is printed
    first)."""
    from calib.output import compare as compare_out
    from calib.output.compare import Bands
    from calib.workflows.compare import Selection, compare_runs

    default = Bands()
    bands = Bands(
        sigma_spot=parse_band("--band-spot", band_spot, default.sigma_spot),
        sigma_yield=parse_band("--band-yield", band_yield, default.sigma_yield),
        rho=parse_band("--band-rho", band_rho, default.rho),
    )
    selection = Selection(commodity, start.date(), end.date(), every_fit)
    with open_store(db, read_only=True) as (store, _):
        table = compare_runs(store.sessions, selection, bands)
    written: dict[str, str] = {}
    if csv_file is not None:
        written["csv"] = str(compare_out.write_csv(table, csv_file))
    if plot_file is not None:
        title = f"{commodity}: calibrated against historical ({selection.rule})"
        written["plot"] = str(
            compare_out.plot(table, plot_file, title=title, span=(selection.start, selection.end))
        )
    if as_json:
        echo_json(
            {
                "commodity": commodity,
                "from": selection.start,
                "to": selection.end,
                "runs": selection.rule,
                "rows": [
                    {
                        "trade_date": table.trade_date[i],
                        "run_id": table.run_id[i],
                        "status": table.status[i],
                        **{
                            f"{q}{suffix}": _finite(series[q][i])
                            for q in compare_out.QUANTITIES
                            for suffix, series in (
                                ("", table.calibrated),
                                ("_hist", table.historical),
                                (f"_{compare_out.MEASURE_KIND[q]}", table.measure),
                            )
                        },
                        "flags": list(table.flags_of(i)),
                    }
                    for i in range(len(table))
                ],
                "flagged_days": int(table.any_flag.sum()),
                "files": written,
            }
        )
    else:
        typer.echo(f"{commodity} {selection.start}..{selection.end}, {selection.rule}")
        typer.echo(compare_out.format_table(table))
        for what, path in written.items():
            typer.echo(f"{what}: {path}")
    flagged = int(table.any_flag.sum())
    if fail_on_flag and flagged:
        typer.echo(f"{flagged} day(s) flagged: exit {EXIT_FLAGGED}", err=True)
        raise SystemExit(EXIT_FLAGGED)


def _finite(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


# --- demo --------------------------------------------------------------------------------------


def _summary_lines(s: DemoSummary) -> list[str]:
    from calib.model.twofactor import PARAM_NAMES

    db = f"--db {s.db_url}"
    e = s.estimate
    rmse = s.rmse_vol_points
    lines = [
        "",
        f"Demo done in {s.seconds:.0f} s. Everything is in {s.directory}/:",
        f"  store        {s.db_url}",
        f"  inputs       {s.directory / 'inputs'}/ (futures, options, rates CSV; the true "
        "states and parameters)",
        f"  report       {s.report}  (run {s.report_run_id})",
        f"  compare      {s.compare_csv}, {s.compare_png}",
        "",
        f"Historical estimate {e.estimate_id} on {s.estimate_window[0]}..{s.estimate_window[1]} "
        f"({e.n_days} days x {e.n_contracts} contracts): "
        f"{'converged' if e.converged else 'NOT converged'}",
        f"  {'parameter':<12} {'true':>10} {'estimate':>10} {'s.e.':>10}",
    ]
    for n in PARAM_NAMES:
        se = e.std_errors.get(n)
        lines.append(
            f"  {n:<12} {s.truth[n]:>10.4f} {getattr(e.params, n):>10.4f} "
            f"{'-' if se is None else format(se, '.4f'):>10}"
        )
    lines += [
        "",
        f"Mornings {s.fit_window[0]}..{s.fit_window[1]}: {s.days_fitted} fitted "
        f"({s.quotes_per_day:.0f} quotes a day), {s.days_approved} passed every gate and were "
        f"approved, {s.days_fitted - s.days_approved} left as candidates, {s.days_failed} failed",
    ]
    if rmse:
        lines.append(
            f"  fit: RMSE model - market vol {statistics.median(rmse):.3f} vol points "
            f"(median over the mornings), worst {max(rmse):.3f}"
        )
    if s.gates_failed:
        lines.append(
            "  gates failed: "
            + ", ".join(f"{k} on {v} morning(s)" for k, v in s.gates_failed.items())
        )
    lines.append(f"  compare ({s.compare_rule}): {s.flagged_days} day(s) outside the default bands")
    first, last = s.fit_window
    lines += [
        "",
        "Next, from this folder (calib is .venv/bin/calib after `make demo`):",
        f"  calib runs QLM {db}",
        f"  calib show {s.report_run_id} {db}",
        f"  calib latest QLM --history {db}",
        f"  calib compare QLM --from {first} --to {last} --all {db}",
        f"  calib report {s.report_run_id} --out {s.directory}/report-{s.report_run_id} {db}",
        f"  calib rerun {s.report_run_id} {db}",
        f"  calib quotes QLM --date {last} {db}",
        f"  calib estimates QLM {db}",
        "",
        "Calibration policies compared by hedge P&L (calendar-spread calls sold and hedged "
        "daily; % of premium):",
        *(f"  {line}" for line in s.policy_table),
        f"  page: {s.policy_page}",
        "",
        f"Caution. {text.DEMO_CAUTION}",
    ]
    return lines


def demo_cmd(
    directory: Annotated[
        Path, typer.Option("--dir", help="Where the demo writes its store and files.")
    ] = DEFAULT_DEMO_DIR,
    fresh: Annotated[
        bool, typer.Option("--fresh", help="Replace the demo files of an earlier run in DIR.")
    ] = False,
    quick: Annotated[bool, typer.Option("--quick", hidden=True)] = False,
    as_json: JsonOption = False,
) -> None:
    """Run the whole job on an invented metal: generate three years of quotes, ingest,
    estimate on two years, fit, gate and approve each morning of the last quarter, compare,
    report, and say where everything is."""
    from calib.workflows.demo import QUICK_PLAN, DemoPlan, run_demo

    plan: DemoPlan = QUICK_PLAN if quick else DemoPlan()
    summary = run_demo(directory, plan=plan, fresh=fresh, progress=_progress(time.monotonic()))
    if as_json:
        echo_json(summary.to_dict())
    else:
        typer.echo("\n".join(_summary_lines(summary)))
