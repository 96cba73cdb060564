"""Terminal text: what the CLI prints, as lines (the commands echo them; tests read them).

Conventions: a list has a header row; fit quality leads with vol points (model minus market
Black volatility, 1 vol point = 0.01) and gives the premium error second, labelled; a moment
called ``as of`` is wall-clock time and is shown beside the trade date it concerns. The
records come in already loaded; nothing here reads the store.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from calib.store.estimates import EstimateRecord
    from calib.store.quotes import OptionChain
    from calib.store.runs import ApprovalRecord, RunRecord
    from calib.types import FloatArray


def parameters() -> tuple[str, ...]:
    """The seven parameter names in the model's order."""
    from calib.model.params import PARAM_NAMES

    return PARAM_NAMES


VOLS = ("sigma_spot", "sigma_yield", "rho")
"""What the morning fit moves (``rho`` only in the ``constant`` and ``forward`` modes)."""

DEMO_CAUTION = (
    "Every number above comes from invented data: a fictional metal on a fictional exchange, "
    "simulated from the very model that is then fitted, so the fit is far better than any real "
    "market would allow. Parameters drive real money: the two-factor model is a simplification "
    "of the market and carries model risk. Validate the parameters before use; the firm's "
    "model-validation policy prevails over anything printed here. A fit says how well the model "
    "reprices the quotes it saw, not that it prices other products right."
)
"""The closing caution of ``calib demo`` in a terminal (the report page has its own)."""


def g(value: float | None, fmt: str = ".6g") -> str:
    """``value`` formatted, ``-`` for none or NaN."""
    return (
        "-"
        if value is None or (isinstance(value, float) and math.isnan(value))
        else (format(value, fmt))
    )


def table(headers: Sequence[str], rows: Iterable[Sequence[str]], align: str = "") -> list[str]:
    """Rows under a header, columns padded to their widest cell and two spaces apart.

    ``align`` has one character per column, ``<`` (text, the default) or ``>`` (numbers).
    """
    body = [list(r) for r in rows]
    widths = [max([len(h)] + [len(r[j]) for r in body]) for j, h in enumerate(headers)]
    sides = align.ljust(len(headers), "<")

    def line(cells: Sequence[str]) -> str:
        padded = [
            c.rjust(w) if s == ">" else c.ljust(w)
            for c, w, s in zip(cells, widths, sides, strict=True)
        ]
        return "  ".join(padded).rstrip()

    return [line(headers), *(line(r) for r in body)]


def params_line(values: Mapping[str, Any], names: Sequence[str] | None = None) -> str:
    """``name=value`` for each of ``names`` (default: the seven parameters)."""
    return "  ".join(f"{n}={g(values.get(n))}" for n in names or parameters())


# --- fit quality -------------------------------------------------------------------------------


def fit_of(run: RunRecord) -> Mapping[str, Any] | None:
    """The run's stored fit as plain values (``rmse``, ``gates``, ``buckets``, ...; ``None``:
    the fit failed): the one place that knows how a run record holds its fit."""
    return None if run.fit is None else run.fit.to_dict()


def vol_points(diagnostics: Mapping[str, Any]) -> tuple[float, float] | None:
    """RMSE and largest error of model minus market Black vol, in vol points (``None``: unknown).

    From the fit itself when it measured errors in vol, else from the ``rmse_vol`` and
    ``max_error_vol`` gates (computed over the same fitted quotes).
    """
    if diagnostics.get("error_measure") == "vol":
        return 100.0 * float(diagnostics["rmse"]), 100.0 * float(diagnostics["max_error"])
    gates = {g["name"]: g["value"] for g in diagnostics.get("gates", [])}
    rmse, worst = gates.get("rmse_vol"), gates.get("max_error_vol")
    if isinstance(rmse, int | float) and isinstance(worst, int | float):
        return float(rmse), float(worst)
    return None


def quality(diagnostics: Mapping[str, Any]) -> str:
    """``rmse 0.734 vol points (max 1.73); premium rmse 2.633 (max 8.559, currency)``."""
    vp = vol_points(diagnostics)
    lead = "vol points unknown" if vp is None else f"rmse {vp[0]:.3g} vol points (max {vp[1]:.3g})"
    if diagnostics.get("error_measure") == "vol":
        return lead
    return (
        f"{lead}; premium rmse {diagnostics['rmse']:.4g} "
        f"(max {diagnostics['max_error']:.4g}, currency)"
    )


def short_quality(run: RunRecord) -> str:
    """The list form: ``0.734 vp`` (vol points), ``failed`` or ``-``."""
    fit = fit_of(run)
    if fit is None:
        return "failed"
    vp = vol_points(fit)
    return "-" if vp is None else f"{vp[0]:.3g} vp"


# --- runs --------------------------------------------------------------------------------------


def bucket_lines(mode: str, buckets: Sequence[Mapping[str, Any]]) -> list[str]:
    """Forward mode: one line per expiry bucket with its volatilities (else nothing)."""
    if mode != "forward" or not buckets:
        return []
    rows = [
        [
            f"{b['start']:.3f}..{b['end']:.3f}",
            *(g(b["params"].get(n), ".6g") for n in VOLS),
        ]
        for b in buckets
    ]
    return ["  " + r for r in table(["bucket (years)", *VOLS], rows, "<>>>")]


def run_lines(run: RunRecord) -> list[str]:
    """Header, fit quality, binding constraints, parameters (every bucket), approval."""
    lines = [
        f"run {run.run_id}: {run.commodity} trade date {run.trade_date}, {run.mode} mode, "
        f"estimate {run.estimate_id}: {run.status.upper()}"
    ]
    d = fit_of(run)
    if d is None or run.params is None:
        return [*lines, f"  fit failed: {run.failure_reason}"]
    flags = f"; flags {', '.join(d['flags'])}" if d["flags"] else ""
    buckets = bucket_lines(run.mode, d["buckets"])
    # forward mode: the slow parameters here, the volatilities of every bucket below
    names = [n for n in parameters() if not buckets or n not in VOLS]
    lines += [
        f"  fit: {quality(d)}",
        f"  {d['n_quotes']} quotes, {len(d['dropped'])} dropped; {d['solver']} {d['status']}, "
        f"{d['iterations']} iterations{flags}",
        f"  binding constraints: {', '.join(d['binding']) or 'none'}",
        "  " + params_line(run.params.to_dict(), names),
        *buckets,
    ]
    if run.approved_at is not None:
        lines.append(f"  approved {run.approved_at:%Y-%m-%d %H:%M:%S} UTC by {run.approved_by}")
    return lines


NO_CONTRACT: Mapping[str, Any] = {
    "delivery": None,
    "expiry": None,
    "kind": None,
    "strike": None,
    "exercise": None,
    "early_exercise": None,
}
"""The contract keys of a residual whose quote row is no longer stored."""


def option_contracts(
    chain: OptionChain, early_exercise: FloatArray | None = None
) -> dict[int, dict[str, Any]]:
    """Quote id -> its ``delivery``, ``expiry`` (ISO dates), ``kind``, ``strike``,
    ``exercise`` (``european``/``american``) and ``early_exercise`` (its early-exercise
    premium, per option of ``chain``; ``None`` where not given or not computable)."""
    early = [math.nan] * len(chain) if early_exercise is None else early_exercise.tolist()
    return {
        int(chain.row_id[j]): {
            "delivery": str(chain.delivery[j]),
            "expiry": str(chain.expiry[j]),
            "kind": "call" if chain.is_call[j] else "put",
            "strike": float(chain.strike[j]),
            "exercise": "american" if chain.american[j] else "european",
            "early_exercise": None if math.isnan(early[j]) else float(early[j]),
        }
        for j in range(len(chain))
    }


def residual_table(
    residuals: Sequence[Mapping[str, Any]], contracts: Mapping[int, Mapping[str, Any]]
) -> list[str]:
    """Per fitted quote, by expiry, strike and kind: premiums, vols (in %) and the residual.

    ``residuals`` are the stored residual rows (``quote_id``, ``market_price``, ...);
    ``contracts`` maps a quote id to its ``delivery``, ``expiry``, ``kind`` and ``strike``
    (``-`` where the quote row is no longer stored).
    """
    none: Mapping[str, Any] = {}

    def key(r: Mapping[str, Any]) -> tuple[bool, str, float, str, Any]:
        c = contracts.get(int(r["quote_id"]), none)  # quotes no longer stored last
        return (
            not c,
            str(c.get("expiry")),
            float(c.get("strike", 0.0)),
            str(c.get("kind")),
            r["quote_id"],
        )

    rows = []
    for r in sorted(residuals, key=key):
        c = contracts.get(int(r["quote_id"]), none)
        rows.append(
            [
                str(r["quote_id"]),
                str(c.get("delivery", "-")),
                str(c.get("expiry", "-")),
                str(c.get("kind", "-")),
                str(c.get("exercise") or "-")[:2],
                g(c.get("strike"), "g"),
                g(r["market_price"], ".4f"),
                g(r["model_price"], ".4f"),
                g(100 * r["market_vol"], ".2f"),
                g(100 * r["model_vol"], ".2f"),
                g(100 * r["vol_residual"], "+.3f"),
                g(c.get("early_exercise"), ".4f"),
            ]
        )
    headers = [
        "quote",
        "delivery",
        "expiry",
        "kind",
        "ex",
        "strike",
        "premium mkt",
        "premium model",
        "vol % mkt",
        "vol % model",
        "resid vp",
        "early ex",
    ]
    title = (
        "residuals, model minus market (vp = vol points, 0.01 of implied vol; ex = exercise "
        "style, eu/am; early ex = early-exercise premium at the market vol):"
    )
    return [title, *("  " + line for line in table(headers, rows, ">>>>>>>>>>>>"))]


def gate_lines(gates: Sequence[Mapping[str, Any]]) -> list[str]:
    """Every gate: pass/FAIL, value, limit and what it measures."""
    rows = []
    for gate in gates:
        value = gate["value"] if isinstance(gate["value"], str) else g(gate["value"], ".4g")
        limit = gate["limit"] if isinstance(gate["limit"], str) else g(gate["limit"], ".4g")
        rows.append(
            ["pass" if gate["passed"] else "FAIL", gate["name"], value, limit, gate["detail"]]
        )
    return ["gates:", *("  " + r for r in table(["", "gate", "value", "limit", ""], rows, "<<>>"))]


def failed_gates(gates: Sequence[Mapping[str, Any]]) -> list[str]:
    """``name value against limit L (what)`` for each gate that failed."""
    out = []
    for x in gates:
        if x["passed"]:
            continue
        value = x["value"] if isinstance(x["value"], str) else g(x["value"], ".4g")
        limit = x["limit"] if isinstance(x["limit"], str) else g(x["limit"], ".4g")
        what = f" ({x['detail']})" if x["detail"] else ""
        out.append(f"{x['name']} {value} against limit {limit}{what}")
    return out


def verdict_line(gates: Sequence[Mapping[str, Any]], approved: bool) -> str:
    """What ``--auto-approve`` decided, and why when it did not approve."""
    if approved:
        return "verdict: approved (every gate passed)"
    why = "; ".join(failed_gates(gates)) or "a gate did not pass"
    return f"verdict: not approved because {why}; the run stays a candidate"


def runs_table(runs: Sequence[RunRecord]) -> list[str]:
    """``calib runs``: one row per run under a header, vol-point RMSE first; a study run's
    status names its study (never approved or served)."""
    rows = []
    for r in runs:
        values = r.params.to_dict() if r.params is not None else {}
        rows.append(
            [
                str(r.run_id),
                str(r.trade_date),
                r.status if r.study is None else f"{r.status} (study {r.study})",
                r.mode,
                short_quality(r),
                *(g(values.get(n), ".4g") for n in VOLS),
            ]
        )
    headers = ["run", "trade date", "status", "mode", "rmse vol", *VOLS]
    return table(headers, rows, "><<<>>>>")


def history_table(approvals: Sequence[ApprovalRecord]) -> list[str]:
    """``calib latest --history``: each approval, oldest first, under a header."""
    rows = [
        [
            str(a.run_id),
            str(a.trade_date),
            f"{a.approved_at:%Y-%m-%d %H:%M}",
            a.approved_by,
            "in force" if a.superseded_at is None else f"{a.superseded_at:%Y-%m-%d %H:%M}",
            *(g(getattr(a.params, n), ".4g") for n in VOLS),
        ]
        for a in approvals
    ]
    headers = ["run", "trade date", "approved (UTC)", "by", "until (UTC)", *VOLS]
    return table(headers, rows, "><<<<>>>")


# --- estimates ---------------------------------------------------------------------------------


def estimate_lines(e: EstimateRecord) -> list[str]:
    """One estimate: window, convergence, parameters with standard errors, noise per slot."""
    flag = "converged" if e.converged else "NOT CONVERGED (never used by default)"
    lines = [
        f"estimate {e.estimate_id} of {e.commodity} ({e.source}), {e.window_start}..{e.window_end}"
        f": {flag}"
    ]
    if e.n_days is not None:
        lines.append(
            f"  {e.n_days} days x {e.n_contracts} contracts, {e.n_obs} prices, "
            f"log-likelihood {g(e.loglik, '.6f')}, r = {g(e.rate, '.4%')}"
        )
    lines.append(f"  {e.message}")
    rows = [[n, g(getattr(e.params, n)), g(e.std_errors.get(n))] for n in parameters()]
    lines += ["  " + r for r in table(["parameter", "value", "s.e."], rows, "<>>")]
    if e.noise_sd:
        rows = [[str(k), f"{x:.4g}"] for k, x in enumerate(e.noise_sd, start=1)]
        lines.append("  measurement noise sd of log futures price, by contract slot (1 = nearest):")
        lines += ["    " + r for r in table(["slot", "noise sd"], rows, ">>")]
    return lines


def estimates_table(records: Sequence[EstimateRecord]) -> list[str]:
    """``calib estimates CODE``: one row per estimate under a header."""
    rows = [
        [
            str(r.estimate_id),
            r.source,
            f"{r.window_start}..{r.window_end}",
            "yes" if r.converged else "NO",
            f"{r.created_at:%Y-%m-%d %H:%M}",
            r.created_by,
            *(g(getattr(r.params, n), ".4g") for n in parameters()),
        ]
        for r in records
    ]
    headers = ["id", "source", "window", "converged", "made (UTC)", "by", *parameters()]
    return table(headers, rows, "><<<<<>>>>>>>")


# --- pricing -----------------------------------------------------------------------------------


def sensitivity_lines(sensitivities: Mapping[str, float | Sequence[float]]) -> list[str]:
    """Premium change per 0.01 of each parameter: one vol point of a volatility, 0.01 of rho.

    ``sensitivities`` are derivatives per 1.00 of the parameter (the ``--json`` values); a
    list holds one per forward bucket.
    """
    lines = ["  premium change per vol point (rho: per 0.01; --json gives d/d per 1.00):"]
    for name, value in sensitivities.items():
        if isinstance(value, int | float):
            shown = f"{0.01 * value:+.6g}"
        else:
            shown = "[" + ", ".join(f"{0.01 * v:+.4g}" for v in value) + "] by bucket"
        lines.append(f"    {name:<12} {shown}")
    return lines
