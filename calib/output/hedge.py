"""What the hedge studies show: the files of ``calib hedge sim`` and ``calib hedge replay``
(CSV, figure), and the policy comparison of ``calib hedge policies`` (table, CSV, figure, page).

Plain values in: a study's JSON object (the stable keys of ``--json``) and, for the simulation,
its per-path :class:`~calib.hedge.engine.HedgeResult`; the policy rows are the JSON objects of
the comparison (one per commodity and policy), each with its ``trade_list`` of sales.
"""

from __future__ import annotations

import csv
import html
import math
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from calib.output.text import g, table
from calib.types import FloatArray

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from calib.hedge.engine import HedgeResult


def _figure(width: float, height: float) -> Figure:
    """A figure (inches) drawn by Agg: no display, no pyplot state."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig: Figure, path: Path) -> Path:
    """Write ``fig`` as PNG to ``path`` (its folder made if need be)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=110)
    return path


def _titled(ax: Axes, title: str) -> None:
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=8)


def _cell(x: Any) -> str:
    if x is None:
        return ""
    if isinstance(x, float):
        return "" if math.isnan(x) else f"{x:.10g}"
    return str(x)


# --- calib hedge sim ---------------------------------------------------------------------------


def write_paths_csv(result: HedgeResult, path: Path) -> Path:
    """One row a path: P&L in currency and % of premium, payoff, RMS step hedge error."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    rms = np.sqrt(np.mean(result.hedge_error**2, axis=1))
    columns = (result.pnl, result.pnl_pct, result.payoff, rms)
    with path.open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(["path", "pnl", "pnl_pct", "payoff", "hedge_error_rms"])
        for i in range(result.n_paths):
            out.writerow([i, *(f"{c[i]:.10g}" for c in columns)])
    return path


def plot_histogram(sim: Mapping[str, Any], pnl_pct: FloatArray, trade: str, path: Path) -> Path:
    """PNG histogram of the P&L in % of premium (central 99 % of paths drawn, the rest counted),
    with the mean and the 5 % quantile marked.

    ``sim`` is the simulation's JSON object, ``pnl_pct`` its P&L per path, ``trade`` the
    option described in words."""
    fig = _figure(8.0, 4.5)
    ax = fig.subplots()
    lo, hi = np.quantile(pnl_pct, [0.005, 0.995])
    pad = 0.05 * max(hi - lo, 1e-12)
    shown = (pnl_pct >= lo - pad) & (pnl_pct <= hi + pad)
    outside = int(pnl_pct.size - shown.sum())
    ax.hist(
        pnl_pct[shown],
        bins=80,
        color="#6baed6",
        edgecolor="#2171b5",
        lw=0.4,
        label=f"{outside} paths beyond the 0.5-99.5 % range not drawn" if outside else None,
    )
    mean, q5 = sim["mean_pct"], sim["quantiles_pct"]["5"]
    ax.axvline(mean, color="#08306b", lw=1.5, label=f"mean {mean:+.2f} %")
    ax.axvline(q5, color="#cb181d", lw=1.2, ls="--", label=f"5 % quantile {q5:+.2f} %")
    ax.set_xlabel("P&L at expiry, % of premium (seller, hedged)")
    ax.set_ylabel("paths")
    _titled(
        ax,
        f"{sim['commodity']} {trade}\nrun {sim['run_id']}, world: {sim['world']}; "
        f"{sim['paths']} paths x {sim['steps']} rebalancings",
    )
    return _save(fig, path)


# --- calib hedge replay ------------------------------------------------------------------------


def write_replay_csv(replay: Mapping[str, Any], path: Path) -> Path:
    """One row a day of the replay's JSON object: set, settlements, value, positions, margin,
    cash, P&L, error, notes."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    days: Sequence[Mapping[str, Any]] = replay["days"]
    n_legs = len(days[0]["futures"]) if days else 0
    with path.open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(
            ["day", "run_id"]
            + [f"future_{i + 1}" for i in range(n_legs)]
            + ["value"]
            + [f"position_{i + 1}" for i in range(n_legs)]
            + ["carried", "margin", "cash", "pnl_marked", "hedge_error", "notes"]
        )
        for d in days:
            out.writerow(
                [d["day"], _cell(d["run_id"])]
                + [_cell(f) for f in d["futures"]]
                + [_cell(d["value"])]
                + [_cell(p) for p in d["positions"]]
                + [int(d["carried"])]
                + [_cell(d[k]) for k in ("margin", "cash", "pnl_marked", "hedge_error")]
                + ["; ".join(d["notes"])]
            )
    return path


def plot_replay(replay: Mapping[str, Any], trade: str, path: Path) -> Path:
    """PNG of the marked P&L (cash less the option's model value) day by day, carried days
    marked, and the final P&L (``replay``: the replay's JSON object; ``trade``: the option in
    words)."""
    fig = _figure(9.0, 4.5)
    ax = fig.subplots()
    days = np.array([d["day"] for d in replay["days"]], dtype="datetime64[D]")
    marked = np.array(
        [np.nan if d["pnl_marked"] is None else d["pnl_marked"] for d in replay["days"]]
    )
    ax.plot(days, marked, color="#08519c", marker=".", ms=4, lw=1.2, label="P&L marked to model")
    carried = np.array([d["carried"] for d in replay["days"]], dtype=bool)
    known = ~np.isnan(marked)
    if carried.any():  # drawn on the line between the neighbouring marked days
        x = days.astype(np.float64)
        on_line = np.interp(x[carried], x[known], marked[known])
        ax.plot(
            days[carried],
            on_line,
            ls="none",
            marker="x",
            color="#cb181d",
            label="hedge carried (no set or no price)",
        )
    ax.axhline(0.0, color="#777777", lw=0.8)
    ax.tick_params(axis="x", labelrotation=30)
    ax.set_ylabel(f"{replay['commodity']} per option")
    _titled(
        ax,
        f"{replay['commodity']} {trade}\nsold {replay['start']}, sets {replay['sets']}; "
        f"final P&L {replay['pnl']:+.4f} ({replay['pnl_pct']:+.2f} % of premium)",
    )
    return _save(fig, path)


# --- calib hedge policies ----------------------------------------------------------------------

COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("trades", "trades", "d"),
    ("mean_pct", "mean %", "+.2f"),
    ("sd_pct", "sd %", ".2f"),
    ("worst_pct", "worst %", "+.2f"),
    ("q5_pct", "5 % q %", "+.2f"),
    ("hedge_error_rms", "rms hedge err", ".4g"),
    ("fit_rmse_vol_points", "fit rmse vp", ".3g"),
    ("gate_failed_share", "gates failed", ".1%"),
)
"""The numeric columns of the table: key, heading, format."""

CSV_KEYS = (
    "commodity",
    "policy",
    "settings_file",
    "settings_sha256",
    "trades",
    "not_sold",
    "mean_pct",
    "sd_pct",
    "worst_pct",
    "q5_pct",
    "hedge_error_rms",
    "fit_rmse_vol_points",
    "gate_failed_share",
    "days",
    "gate_failed_days",
)
"""The columns of the CSV file, one row per commodity and policy."""

CAUTIONS = (
    "A backtest on one history is one path of the market: its P&L distribution says how these "
    "sales went on this history, not how the next ones will go. The sales overlap in time, so "
    "they are not independent draws. Simulated P&L shows only the model risk the simulation "
    "includes. Parameters drive real money: validate a policy before use; the firm's "
    "model-validation policy prevails over anything on this page."
)
"""The cautions that go with every comparison."""

MEANINGS = (
    "P&L: the seller's final P&L of each sale (premium, daily futures margin and cash interest, "
    "less the payoff), in % of the premium it was sold for; mean, sd, worst and 5 % quantile "
    "over the sales. rms hedge err: the root mean square of the daily hedge errors (change of "
    "cash less change of the option's model value), currency per option. fit rmse vp: mean RMSE "
    "of the policy's fits, vol points. gates failed: share of the fitted days whose fit failed "
    "or failed a gate (the set of the last passing day was used instead)."
)
"""What the columns mean (the page and the README say the same)."""


def _num(value: Any, fmt: str) -> str:
    if fmt == "d":
        return str(value)
    return g(None if value is None else float(value), fmt)


def policy_table(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    """One line per commodity and policy under a header."""
    headers = ["commodity", "policy", *(h for _, h, _ in COLUMNS)]
    body = [
        [str(r["commodity"]), str(r["policy"]), *(_num(r[k], f) for k, _, f in COLUMNS)]
        for r in rows
    ]
    return table(headers, body, "<<" + ">" * len(COLUMNS))


def policy_lines(rows: Sequence[Mapping[str, Any]]) -> list[str]:
    """The table, then per row what the fitting did and the sales that could not be made."""
    lines = policy_table(rows)
    for r in rows:
        lines.append(
            f"  {r['commodity']} {r['policy']}: {r['fitted']} fitted, {r['fit_failed']} failed, "
            f"{r['no_quotes']} without options, {r['skipped']} already stored; "
            f"{r['gate_failed_days']} of {r['days']} days failed their gates"
        )
        for t in r["trade_list"]:
            if t["not_sold"] is not None:
                lines.append(f"    not sold on {t['start']}: {t['not_sold']}")
    return lines


def write_policy_csv(rows: Sequence[Mapping[str, Any]], path: Path) -> Path:
    """One row per commodity and policy (:data:`CSV_KEYS`)."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", newline="", encoding="utf-8") as fh:
        out = csv.writer(fh)
        out.writerow(CSV_KEYS)
        for r in rows:
            out.writerow([_cell(r[k]) for k in CSV_KEYS])
    return path


def plot_policies(rows: Sequence[Mapping[str, Any]], title: str, path: Path) -> Path:
    """PNG: the final P&L (% of premium) of every sale, one box and its points per policy,
    side by side; one panel per commodity."""
    commodities = list(dict.fromkeys(str(r["commodity"]) for r in rows))
    fig = _figure(max(6.0, 2.2 * len(rows) / len(commodities) + 3.0), 4.8)
    axes = fig.subplots(1, len(commodities), squeeze=False)[0]
    rng = np.random.default_rng(0)  # horizontal jitter of the points only
    for ax, code in zip(axes, commodities, strict=True):
        mine = [r for r in rows if r["commodity"] == code]
        samples = [
            np.array([t["pnl_pct"] for t in r["trade_list"] if t["not_sold"] is None], dtype=float)
            for r in mine
        ]
        shown = [s if s.size else np.array([np.nan]) for s in samples]
        ax.boxplot(shown, showfliers=False, widths=0.5)
        for i, s in enumerate(samples, start=1):
            ax.plot(i + rng.uniform(-0.15, 0.15, s.size), s, ls="none", marker=".", ms=4, alpha=0.6)
            if s.size:
                ax.plot([i], [s.mean()], ls="none", marker="D", color="#cb181d", ms=5)
        ax.set_xticks(range(1, len(mine) + 1), [str(r["policy"]) for r in mine])
        ax.axhline(0.0, color="#777777", lw=0.8)
        ax.set_title(f"{code}: final P&L by policy (diamond: mean)", fontsize=9)
        ax.set_ylabel("P&L at expiry, % of premium (seller, hedged)")
    fig.suptitle(title, fontsize=9)
    return _save(fig, path)


def render_policy_page(
    rows: Sequence[Mapping[str, Any]], title: str, out_dir: Path
) -> tuple[Path, Path]:
    """``out_dir/index.html`` (the table, the figure, what the columns mean, the cautions) and
    ``out_dir/policies.png``; returns both paths."""
    out_dir = Path(out_dir)
    figure = plot_policies(rows, title, out_dir / "policies.png")
    head = "".join(f"<th>{html.escape(h)}</th>" for h in ["commodity", "policy"])
    head += "".join(f'<th class="n">{html.escape(h)}</th>' for _, h, _ in COLUMNS)
    body = "\n".join(
        "<tr>"
        + f"<td>{html.escape(str(r['commodity']))}</td>"
        + f'<td title="{html.escape(str(r["settings_file"]))}">{html.escape(str(r["policy"]))}</td>'
        + "".join(f'<td class="n">{html.escape(_num(r[k], f))}</td>' for k, _, f in COLUMNS)
        + "</tr>"
        for r in rows
    )
    page = f"""<!doctype html>
<html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>
<style>
body{{font-family:system-ui,sans-serif;margin:24px;max-width:1100px;color:#222}}
table{{border-collapse:collapse;margin:12px 0}}
th,td{{border-bottom:1px solid #ddd;padding:4px 10px;text-align:left}}
.n{{text-align:right;font-variant-numeric:tabular-nums}}
.caution{{background:#fff8e1;border-left:4px solid #e0a800;padding:10px 14px;margin:14px 0}}
img{{max-width:100%}}
</style></head><body>
<h1>Calibration policies compared by hedge P&amp;L</h1>
<p id="trade">{html.escape(title)}</p>
<table id="policies"><thead><tr>{head}</tr></thead>
<tbody>
{body}
</tbody></table>
<p>{html.escape(MEANINGS)}</p>
<figure><img id="figure" src="policies.png" alt="final P&amp;L of each sale by policy">
<figcaption>Final P&amp;L of every sale in % of its premium, by policy.</figcaption></figure>
<p class="caution"><b>Caution.</b> {html.escape(CAUTIONS)}</p>
</body></html>
"""
    index = out_dir / "index.html"
    index.write_text(page, encoding="utf-8")
    return index, figure
