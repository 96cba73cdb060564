"""The fit report of one calibration run: an HTML page and the PNG figures beside it.

Pure rendering over plain values, no database: ``calib report RUN --out DIR`` fills a
:class:`ReportInputs` from the stored run and calls :func:`render_report`, which writes
``DIR/index.html`` and one PNG per figure in ``DIR`` (referenced relatively, so the directory
can be moved or zipped as a whole). The page has its CSS inline, no script and no remote
resource. Every piece of text is escaped with :func:`html.escape`. matplotlib (Agg canvas, no
pyplot state) is imported inside the figure functions only.

Notes
-----
Residuals are model minus market: in vol points ``100 (s_model - s_market)``, in price
``premium_model - premium_market`` (currency per unit).

The futures-volatility term structure is the instantaneous volatility of ``dF/F`` for a future
``tau`` years from maturity, ``v(tau) = s1^2 + s2^2 B(tau)^2 - 2 rho s1 s2 B(tau)`` with
``B(tau) = (1 - e^{-kappa tau}) / kappa`` (:func:`calib.model.twofactor.futures_vol`). In
forward mode the volatilities are piecewise constant in calendar time, so the curve is drawn once
per bucket: the curve in force while that bucket runs.
"""

from __future__ import annotations

import datetime as dt
import html
import io
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import TYPE_CHECKING, Any

import numpy as np

from calib.calibrate.result import BucketVols, ConstraintReport
from calib.errors import ReportInputError
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams, decay_bound_slack, futures_vol
from calib.types import FloatArray

if TYPE_CHECKING:
    from matplotlib.figure import Figure

# --- inputs ------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class Commodity:
    """The commodity a run belongs to: code, name, unit of quotation and currency."""

    code: str
    name: str
    unit: str
    currency: str


def _array(name: str, values: object) -> FloatArray:
    a = np.array(values, dtype=np.float64)
    if a.ndim != 1:
        raise ReportInputError("report", f"{name} must be one-dimensional")
    a.flags.writeable = False
    return a


@dataclass(frozen=True, slots=True, eq=False)
class QuoteFits:
    """The fitted option quotes, one entry a quote (all fields of equal length).

    Attributes
    ----------
    label : the quote's label as stored with the run.
    expiry, delivery : option expiry and the delivery date of its future.
    kind : ``"call"`` or ``"put"``.
    strike : in currency per unit.
    t_expiry : ACT/365 years from the trade date to the expiry.
    market_vol, model_vol : implied volatilities, decimal (Black-76, or American for an
        American quote).
    market_price, model_price : premiums, currency per unit.
    exercise : ``"european"`` or ``"american"`` per quote (empty: every quote European).
    early_exercise : early-exercise premium per quote at its market vol (0 for a European
        quote; ``None``: every quote European).

    Arrays are copied to read-only float64.
    """

    label: tuple[str, ...]
    expiry: tuple[dt.date, ...]
    delivery: tuple[dt.date, ...]
    kind: tuple[str, ...]
    strike: FloatArray
    t_expiry: FloatArray
    market_vol: FloatArray
    model_vol: FloatArray
    market_price: FloatArray
    model_price: FloatArray
    exercise: tuple[str, ...] = ()
    early_exercise: FloatArray | None = None

    def __post_init__(self) -> None:
        n = len(self.label)
        if n == 0:
            raise ReportInputError("report", "a fit report needs at least one fitted quote")
        if not self.exercise:
            object.__setattr__(self, "exercise", ("european",) * n)
        if self.early_exercise is None:
            object.__setattr__(self, "early_exercise", np.zeros(n))
        for name in ("expiry", "delivery", "kind", "exercise"):
            seq = tuple(getattr(self, name))
            if len(seq) != n:
                raise ReportInputError("report", f"quotes.{name} has {len(seq)} entries, not {n}")
            object.__setattr__(self, name, seq)
        object.__setattr__(self, "label", tuple(str(x) for x in self.label))
        for name in (
            "strike",
            "t_expiry",
            "market_vol",
            "model_vol",
            "market_price",
            "model_price",
            "early_exercise",
        ):
            a = _array(f"quotes.{name}", getattr(self, name))
            if a.size != n:
                raise ReportInputError("report", f"quotes.{name} has {a.size} entries, not {n}")
            object.__setattr__(self, name, a)

    def __len__(self) -> int:
        return len(self.label)

    @property
    def vol_residual_points(self) -> FloatArray:
        """Model minus market implied volatility in vol points (0.01 = 1 point)."""
        return np.asarray(100.0 * (self.model_vol - self.market_vol))

    @property
    def price_residual(self) -> FloatArray:
        """Model minus market premium, currency per unit."""
        return np.asarray(self.model_price - self.market_price)


@dataclass(frozen=True, slots=True, eq=False)
class FuturesCurve:
    """The settled futures curve of the trade date, one entry a contract.

    ``delivery`` the contracts' delivery dates, ``t_delivery`` the same in ACT/365 years from
    the trade date, ``settle`` their settlements.
    """

    delivery: tuple[dt.date, ...]
    t_delivery: FloatArray
    settle: FloatArray

    def __post_init__(self) -> None:
        object.__setattr__(self, "delivery", tuple(self.delivery))
        n = len(self.delivery)
        if n == 0:
            raise ReportInputError("report", "the futures curve has no contracts")
        for name in ("t_delivery", "settle"):
            a = _array(f"curve.{name}", getattr(self, name))
            if a.size != n:
                raise ReportInputError("report", f"curve.{name} has {a.size} entries, not {n}")
            object.__setattr__(self, name, a)


@dataclass(frozen=True, slots=True)
class GateRow:
    """One approval gate: its measured value, the limit it is held to, and the verdict.

    ``limit`` is a number or a short text such as ``"<= 0.02"``; ``value`` is ``None`` when
    the gate could not be measured.
    """

    name: str
    value: float | None
    limit: float | str
    passed: bool


@dataclass(frozen=True, slots=True)
class DroppedRow:
    """A quote the filters left out, and why."""

    label: str
    reason: str


@dataclass(frozen=True, slots=True)
class FrontierRow:
    """A point of the yield-volatility anchor frontier.

    ``distance`` is ``|sigma_yield - sigma_yield_hist|`` of the fit at that anchor weight,
    ``rmse`` its unweighted error in the settings' error measure, ``fit`` its weighted MSE.
    """

    anchor_weight: float
    distance: float
    rmse: float
    fit: float


@dataclass(frozen=True, slots=True)
class RunInfo:
    """Who made the run, when, with which code and from which inputs."""

    run_id: str
    status: str
    created_at: dt.datetime
    created_by: str
    code_version: str
    input_batches: tuple[str, ...] = ()
    inputs_hash: str = ""


@dataclass(frozen=True, slots=True)
class SolveInfo:
    """How the fit ended: solver, its status, iterations, convergence and caution flags.

    ``rmse`` and ``max_error`` are the fit's own figures in ``error_measure`` (``"price"``:
    currency per unit; ``"vol"``: decimal volatility).
    """

    solver: str
    status: str
    iterations: int
    converged: bool
    rmse: float
    max_error: float
    error_measure: str
    flags: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class PreviousSet:
    """The approved set a run would replace: its run id, trade date and parameters."""

    run_id: int
    trade_date: dt.date
    params: TwoFactorParams


@dataclass(frozen=True, slots=True)
class EstimateWindow:
    """A window of a rolling series set against the estimate a run held fixed.

    ``z`` is ``(window - held) / sqrt(se_window^2 + se_held^2)`` by parameter (NaN where a
    standard error is unknown); ``flags`` names the parameters beyond ``k`` and
    ``decay_bound`` / ``not_converged`` where they apply.
    """

    estimate_id: int
    window_start: dt.date
    window_end: dt.date
    params: Mapping[str, float]
    z: Mapping[str, float]
    flags: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class EstimateUsed:
    """The historical estimate a run held fixed, and how stable the history says it is.

    Attributes
    ----------
    estimate_id, source, window_start, window_end, converged : the stored estimate.
    std_errors : asymptotic standard errors by parameter (``None`` where unknown).
    series : a line naming the newest rolling series of the commodity (``None``: no series).
    windows : that series' windows ending on or before the trade date (what was known that
        morning), oldest first, each against the estimate.
    k : standard errors beyond which a window is flagged.
    recommendation : the stability view's re-estimation line over ``windows``.
    """

    estimate_id: int
    source: str
    window_start: dt.date
    window_end: dt.date
    converged: bool
    std_errors: Mapping[str, float | None]
    series: str | None = None
    windows: tuple[EstimateWindow, ...] = ()
    k: float = 3.0
    recommendation: str | None = None


@dataclass(frozen=True, slots=True, eq=False)
class ReportInputs:
    """Everything a fit report shows, as plain values.

    Attributes
    ----------
    commodity : code, name, unit, currency.
    trade_date : the run's trade date.
    run : id, status, creation, code version, inputs.
    params : the calibrated set (in forward mode the front bucket's).
    historical : the historical estimate the fit was held to.
    buckets : volatilities per calendar bucket (``CalibrationResult.buckets``); with more than
        one, the term-structure figure draws each bucket's curve.
    quotes : the fitted quotes with market and model values.
    curve : the futures curve of the trade date.
    solve : solver outcome and the fit's own error figures.
    constraints : ``CalibrationResult.constraints`` as they are.
    gates, dropped, frontier : tables; ``frontier`` may be empty.
    settings : the calibration settings as plain values (shown as given; ``anchor_weight``,
        when present, marks the chosen point of the frontier).
    """

    commodity: Commodity
    trade_date: dt.date
    run: RunInfo
    params: TwoFactorParams
    historical: TwoFactorParams
    quotes: QuoteFits
    curve: FuturesCurve
    solve: SolveInfo
    buckets: tuple[BucketVols, ...] = ()
    constraints: tuple[ConstraintReport, ...] = ()
    gates: tuple[GateRow, ...] = ()
    dropped: tuple[DroppedRow, ...] = ()
    frontier: tuple[FrontierRow, ...] = ()
    settings: Mapping[str, Any] = field(default_factory=dict)
    previous: PreviousSet | None = None
    """The approved set in force when the run was made (``None``: none yet)."""
    warnings: tuple[str, ...] = ()
    """The solver's warnings, one line each: the fit's own and those of the frontier's
    re-solves."""
    estimate: EstimateUsed | None = None
    """The historical estimate the run held fixed and its stability (``None``: not shown)."""

    def __post_init__(self) -> None:
        for name in ("buckets", "constraints", "gates", "dropped", "frontier", "warnings"):
            object.__setattr__(self, name, tuple(getattr(self, name)))
        object.__setattr__(self, "settings", MappingProxyType(dict(self.settings)))


@dataclass(frozen=True, slots=True)
class ReportFiles:
    """What :func:`render_report` wrote: the page and the figures by name."""

    index: Path
    figures: Mapping[str, Path]


CAUTIONS = (
    "This page describes a model calibration; parameters drive real money. The two-factor model "
    "is a simplification of the market and carries model risk. Validate the parameters before "
    "use; the firm's model-validation policy prevails over anything on this page. The fit says "
    "how well the model reprices the quotes it saw, not that it prices other products right."
)
"""The cautions paragraph of every report."""

FIGURES: tuple[tuple[str, str], ...] = (
    ("smiles", "Market and model implied volatility by expiry and strike"),
    ("residuals", "Residuals, model minus market, in vol points"),
    ("curve", "Futures curve"),
    ("term_structure", "Model futures-volatility term structure"),
    ("frontier", "Trade-off frontier of the yield-volatility anchor"),
)
"""Figure names (file ``fig_<name>.png``) and captions, in page order."""


# --- figures -------------------------------------------------------------------------------------


def _figure(width: float, height: float) -> Figure:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _expiry_groups(q: QuoteFits) -> list[tuple[dt.date, np.ndarray]]:
    """Quote positions per expiry, expiries ascending, strikes ascending within each."""
    groups = []
    for e in sorted(set(q.expiry)):
        idx = np.array([i for i, x in enumerate(q.expiry) if x == e], dtype=np.int64)
        groups.append((e, idx[np.argsort(q.strike[idx], kind="stable")]))
    return groups


def _fig_smiles(inp: ReportInputs) -> Figure:
    q = inp.quotes
    groups = _expiry_groups(q)
    forwards = dict(zip(inp.curve.delivery, inp.curve.settle.tolist(), strict=True))
    ncols = min(4, len(groups))
    nrows = math.ceil(len(groups) / ncols)
    fig = _figure(3.0 * ncols + 0.6, 2.3 * nrows + 0.6)
    axes = np.atleast_1d(fig.subplots(nrows, ncols, sharey=True, squeeze=False)).ravel()
    for ax, (expiry, idx) in zip(axes, groups, strict=False):  # axes may outnumber expiries
        k = q.strike[idx]
        calls = np.array([q.kind[i] == "call" for i in idx], dtype=bool)
        ax.plot(k, 100 * q.model_vol[idx], color="#08519c", lw=1.5, label="model")
        ax.plot(
            k[calls],
            100 * q.market_vol[idx][calls],
            "o",
            ms=4,
            color="#cb181d",
            mfc="none",
            label="market call",
        )
        ax.plot(
            k[~calls],
            100 * q.market_vol[idx][~calls],
            "s",
            ms=3.5,
            color="#238b45",
            label="market put",
        )
        forward = forwards.get(q.delivery[idx[0]])
        if forward is not None and forward > 0.0:  # the same strikes as moneyness K / F
            top = ax.secondary_xaxis(
                "top", functions=(lambda x, f=forward: x / f, lambda m, f=forward: m * f)
            )
            top.tick_params(labelsize=6)
        ax.set_title(f"{expiry.isoformat()}  ({q.t_expiry[idx[0]]:.2f} y)", fontsize=9)
        ax.tick_params(labelsize=7)
        ax.grid(True, color="#e0e0e0", lw=0.5)
    for ax in axes[len(groups) :]:
        ax.set_visible(False)
    for ax in axes[::ncols]:
        ax.set_ylabel("implied vol (%)", fontsize=8)
    fig.supxlabel(
        f"strike ({inp.commodity.currency}/{inp.commodity.unit}); top axis: moneyness K / F",
        fontsize=9,
    )
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside upper center", ncols=3, fontsize=8, frameon=False)
    return fig


def _fig_residuals(inp: ReportInputs) -> Figure:
    """Heat map: one row per expiry, one cell per strike (cell edges halfway between strikes)."""
    from matplotlib.colors import TwoSlopeNorm

    q = inp.quotes
    groups = _expiry_groups(q)
    res = q.vol_residual_points
    lim = max(float(np.max(np.abs(res))), 0.01)
    norm = TwoSlopeNorm(vcenter=0.0, vmin=-lim, vmax=lim)
    fig = _figure(9.0, 0.42 * len(groups) + 1.6)
    ax = fig.subplots()
    mesh = None
    for row, (_, idx) in enumerate(groups):
        k = q.strike[idx]
        if k.size > 1:
            mid = 0.5 * (k[1:] + k[:-1])
            edges = np.concatenate([[k[0] - (mid[0] - k[0])], mid, [k[-1] + (k[-1] - mid[-1])]])
        else:
            half = max(0.02 * abs(float(k[0])), 1e-9)
            edges = np.array([k[0] - half, k[0] + half])
        mesh = ax.pcolormesh(
            edges,
            [row - 0.45, row + 0.45],
            res[idx][None, :],
            cmap="RdBu_r",
            norm=norm,
            edgecolors="white",
            linewidth=0.3,
        )
    ax.set_yticks(range(len(groups)), [e.isoformat() for e, _ in groups], fontsize=8)
    ax.set_ylim(len(groups) - 0.5, -0.5)
    ax.set_ylabel("expiry")
    ax.set_xlabel(f"strike ({inp.commodity.currency}/{inp.commodity.unit})")
    assert mesh is not None  # QuoteFits holds at least one quote
    cbar = fig.colorbar(mesh, ax=ax, pad=0.01)
    cbar.set_label("model - market (vol points)")
    return fig


def _fig_curve(inp: ReportInputs) -> Figure:
    c = inp.curve
    fig = _figure(8.0, 3.6)
    ax = fig.subplots()
    ax.plot(
        np.array(c.delivery, dtype="datetime64[D]"), c.settle, "-o", ms=3.5, color="#333333", lw=1.2
    )
    underlyings = sorted(set(inp.quotes.delivery))
    if underlyings:
        on = np.isin(
            np.array(c.delivery, dtype="datetime64[D]"),
            np.array(underlyings, dtype="datetime64[D]"),
        )
        ax.plot(
            np.array(c.delivery, dtype="datetime64[D]")[on],
            c.settle[on],
            "o",
            ms=6,
            mfc="none",
            mec="#08519c",
            label="underlying of fitted options",
        )
        ax.legend(fontsize=8, frameon=False)
    ax.set_xlabel("delivery")
    ax.set_ylabel(f"settle ({inp.commodity.currency}/{inp.commodity.unit})")
    ax.set_title(
        f"{inp.commodity.code} futures settled on {inp.trade_date.isoformat()}", fontsize=10
    )
    ax.grid(True, color="#e0e0e0", lw=0.5)
    return fig


def _fig_term_structure(inp: ReportInputs) -> Figure:
    horizon = max(float(inp.curve.t_delivery.max()), 0.25)
    tau = np.linspace(0.0, horizon, 241)
    fig = _figure(8.0, 3.8)
    ax = fig.subplots()
    if len(inp.buckets) > 1:
        colours = _ramp(len(inp.buckets))
        for k, (b, col) in enumerate(zip(inp.buckets, colours, strict=True)):
            ax.plot(
                tau,
                100 * futures_vol(tau, b.params),
                color=col,
                lw=1.3,
                label=f"bucket {k}: {b.start:.2f}-{b.end:.2f} y",
            )
    else:
        ax.plot(
            tau, 100 * futures_vol(tau, inp.params), color="#08519c", lw=1.8, label="calibrated"
        )
    ax.plot(
        tau,
        100 * futures_vol(tau, inp.historical),
        color="#636363",
        lw=1.3,
        ls="--",
        label="historical",
    )
    ax.plot(
        inp.curve.t_delivery,
        np.zeros_like(inp.curve.t_delivery),
        "|",
        ms=10,
        color="#333333",
        transform=ax.get_xaxis_transform(),
        label="listed maturities",
    )
    ax.set_xlabel("time to maturity (years)")
    ax.set_ylabel("instantaneous futures vol (%)")
    ax.set_xlim(0.0, horizon)
    ax.grid(True, color="#e0e0e0", lw=0.5)
    ax.legend(fontsize=8, frameon=False, ncols=2)
    return fig


LABEL_SPACING = 0.06
"""Least distance, as a fraction of the plotted span, between two labelled frontier points."""


def _spaced(pts: Sequence[FrontierRow], d: FloatArray, r: FloatArray) -> list[FrontierRow]:
    """The frontier points to label: no label within :data:`LABEL_SPACING` of another one
    (points that crowd together, as the large anchor weights do, share one label)."""
    span_d = float(np.ptp(d)) or 1.0
    span_r = float(np.ptp(r)) or 1.0
    kept: list[int] = []
    for i in range(len(pts)):
        near = any(
            math.hypot((d[i] - d[j]) / span_d, (r[i] - r[j]) / span_r) < LABEL_SPACING for j in kept
        )
        if not near:
            kept.append(i)
    return [pts[i] for i in kept]


def _fig_frontier(inp: ReportInputs) -> Figure:
    pts = sorted(inp.frontier, key=lambda p: p.anchor_weight)
    d = np.array([p.distance for p in pts])
    r = np.array([p.rmse for p in pts])
    fig = _figure(7.0, 4.0)
    ax = fig.subplots()
    ax.plot(d, r, "-o", ms=4, color="#333333", lw=1.0)
    for p in _spaced(pts, d, r):
        ax.annotate(
            f"{p.anchor_weight:.3g}",
            (p.distance, p.rmse),
            textcoords="offset points",
            xytext=(4, 4),
            fontsize=7,
            color="#555555",
        )
    chosen = _chosen_frontier_point(inp)
    if chosen is not None:
        ax.plot(
            [chosen.distance],
            [chosen.rmse],
            "o",
            ms=10,
            mfc="none",
            mec="#cb181d",
            mew=1.6,
            label=f"chosen anchor weight {chosen.anchor_weight:.3g}",
        )
        ax.legend(fontsize=8, frameon=False)
    ax.set_xlabel("|sigma_yield - historical sigma_yield|")
    ax.set_ylabel(f"RMSE ({_measure_unit(inp)})")
    ax.grid(True, color="#e0e0e0", lw=0.5)
    return fig


def _ramp(n: int) -> list[tuple[float, float, float, float]]:
    from matplotlib import colormaps

    cmap = colormaps["viridis"]
    return [cmap(x) for x in np.linspace(0.0, 0.85, n)]


def _chosen_frontier_point(inp: ReportInputs) -> FrontierRow | None:
    w = inp.settings.get("anchor_weight")
    if not isinstance(w, (int, float)) or isinstance(w, bool):
        return None
    for p in inp.frontier:
        if math.isclose(p.anchor_weight, float(w), rel_tol=1e-12, abs_tol=0.0):
            return p
    return None


def _measure_unit(inp: ReportInputs) -> str:
    if inp.solve.error_measure == "vol":
        return "decimal vol"
    return f"{inp.commodity.currency}/{inp.commodity.unit}"


_FIGURE_FUNCS = {
    "smiles": _fig_smiles,
    "residuals": _fig_residuals,
    "curve": _fig_curve,
    "term_structure": _fig_term_structure,
    "frontier": _fig_frontier,
}


# --- HTML ----------------------------------------------------------------------------------------


def _e(x: object) -> str:
    return html.escape(str(x), quote=True)


def _num(x: float | None, fmt: str = ".6g") -> str:
    if x is None:
        return "&ndash;"
    if isinstance(x, float) and math.isnan(x):
        return "NaN"
    return _e(format(x, fmt))


def _table(head: Sequence[str], rows: Sequence[Sequence[str]], cls: str = "") -> str:
    """An HTML table; ``head`` is plain text (escaped here), ``rows`` cells already HTML."""
    th = "".join(f"<th>{_e(h)}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
    klass = f' class="{_e(cls)}"' if cls else ""
    return f"<table{klass}><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>"


def _yes_no(flag: bool, bad_when: bool) -> str:
    cls = "bad" if flag == bad_when else "ok"
    return f'<span class="{cls}">{"yes" if flag else "no"}</span>'


def _compare(name: str, c: float, h: float) -> str:
    """Calibrated against a reference: a ratio for volatilities, a difference for ``rho``."""
    if name == "rho":
        return f"{c - h:+.4f} (difference)"
    if h != 0.0:
        return f"{c / h:.4f} (ratio)"
    return "&ndash;"


_VOLS = ("sigma_spot", "sigma_yield", "rho")


def _section_params(inp: ReportInputs) -> str:
    cal, hist, prev = inp.params, inp.historical, inp.previous
    rows = []
    forward = len(inp.buckets) > 1
    for name in PARAM_NAMES:
        held = "" if name in _VOLS else " (held)"
        sets = [(f"<code>{_e(name)}</code>{_e(held)}", cal, hist)]
        if forward and name in _VOLS:  # every bucket, each against history
            sets = [
                (
                    f"<code>{_e(name)}</code> bucket {k} [{b.start:.3g}, {b.end:.3g}) y",
                    b.params,
                    hist,
                )
                for k, b in enumerate(inp.buckets)
            ]
        for label, own, ref in sets:
            c, h = getattr(own, name), getattr(ref, name)
            row = [label, _num(c), _num(h), _e(_compare(name, c, h))]
            if prev is not None:
                p = getattr(prev.params, name)
                row += [_num(p), _e(_compare(name, c, p))]
            rows.append(row)
    slack = (decay_bound_slack(cal), decay_bound_slack(hist))
    last = ["decay-bound slack <code>rho kappa s1 - s2</code>", _num(slack[0]), _num(slack[1]), ""]
    if prev is not None:
        last += [_num(decay_bound_slack(prev.params)), ""]
    rows.append(last)
    head = ["parameter", "calibrated", "historical", "calibrated vs historical"]
    if prev is not None:
        head += [f"previous approved (run {prev.run_id})", "calibrated vs previous"]
    out = [
        "<h2>Parameters against historical</h2>",
        _table(head, rows),
        '<p class="note">Volatilities compare as a ratio; the correlation as a difference, '
        "since it may be near zero or change sign. Parameters marked held are taken from the "
        "historical estimate.</p>",
    ]
    if inp.buckets:
        brow = [
            [
                _e(k),
                _num(b.start, ".4f"),
                _num(b.end, ".4f"),
                _num(b.params.sigma_spot),
                _num(b.params.sigma_yield),
                _num(b.params.rho),
                _num(decay_bound_slack(b.params)),
            ]
            for k, b in enumerate(inp.buckets)
        ]
        out += [
            "<h3>Forward volatilities by calendar bucket</h3>",
            _table(
                ["bucket", "from (y)", "to (y)", "sigma_spot", "sigma_yield", "rho", "decay slack"],
                brow,
            ),
        ]
    return "\n".join(out)


def _section_estimate(inp: ReportInputs) -> str:
    """The estimate the run held fixed: its errors, and the newest rolling window against it."""
    e = inp.estimate
    if e is None:
        return ""
    age = (inp.trade_date - e.window_end).days
    state = "converged" if e.converged else "NOT converged"
    newest = e.windows[-1] if e.windows else None
    head = ["parameter", "estimate", "s.e.", "-2 s.e.", "+2 s.e."]
    if newest is not None:
        head += [f"newest window (to {newest.window_end})", "z", f"beyond {e.k:g} s.e."]
    rows = []
    for name in PARAM_NAMES:
        v, se = getattr(inp.historical, name), e.std_errors.get(name)
        band = ("&ndash;", "&ndash;") if se is None else (_num(v - 2 * se), _num(v + 2 * se))
        row = [f"<code>{_e(name)}</code>", _num(v), _num(se), *band]
        if newest is not None:
            z = newest.z[name]
            row += [
                _num(newest.params[name]),
                _num(z, ".2f"),
                _yes_no(name in newest.flags, bad_when=True),
            ]
        rows.append(row)
    out = [
        "<h2>Historical estimate held by this run</h2>",
        f"<p>Estimate {_e(e.estimate_id)} ({_e(e.source)}), window {_e(e.window_start)} to "
        f"{_e(e.window_end)}, {_e(state)}; its window ended {_e(age)} days before the trade "
        "date.</p>",
        _table(head, rows),
    ]
    if e.series is None:
        out.append(
            '<p class="note">No rolling series is stored for this commodity, so the estimate\'s '
            f"stability is not shown: <code>calib estimate {_e(inp.commodity.code)} --rolling "
            f"2y --step 1m</code> then <code>calib stability {_e(inp.commodity.code)}</code>.</p>"
        )
    elif not e.windows:
        out.append(f"<p>{_e(e.series)}: no window ended on or before the trade date.</p>")
    else:
        flagged = [w for w in e.windows if w.flags]
        latest = "; ".join(f"to {w.window_end}: {', '.join(w.flags)}" for w in flagged[-3:])
        more = f" (latest {latest}{'; ...' if len(flagged) > 3 else ''})" if flagged else ""
        out.append(
            f"<p>{_e(e.series)}: {len(e.windows)} window(s) ended on or before the trade date; "
            f"{len(flagged)} differ from this estimate by more than {e.k:g} s.e. or fail the "
            f"decay bound{_e(more)}. Recommendation: {_e(e.recommendation or '')}.</p>"
        )
    out.append(
        '<p class="note">An estimate is a statistic with an error: the +-2 s.e. band is '
        "asymptotic (normal approximation to the likelihood), too narrow on short windows and "
        "for poorly identified drifts. z is the window's difference from this estimate in "
        "standard errors of the difference.</p>"
    )
    return "\n".join(out)


def _section_fit(inp: ReportInputs) -> str:
    q, s, cur = inp.quotes, inp.solve, _e(inp.commodity.currency)
    vp, pr = q.vol_residual_points, q.price_residual
    rows = [
        ["quotes fitted", _e(len(q)), ""],
        ["RMSE, vol", _num(float(np.sqrt(np.mean(vp**2))), ".3f"), "vol points"],
        ["max |error|, vol", _num(float(np.max(np.abs(vp))), ".3f"), "vol points"],
        ["RMSE, price", _num(float(np.sqrt(np.mean(pr**2))), ".4g"), f"{cur} per unit"],
        ["max |error|, price", _num(float(np.max(np.abs(pr))), ".4g"), f"{cur} per unit"],
        ["fit RMSE (objective measure)", _num(s.rmse, ".4g"), _e(_measure_unit(inp))],
        ["fit max error (objective measure)", _num(s.max_error, ".4g"), _e(_measure_unit(inp))],
    ]
    flags = ", ".join(s.flags) if s.flags else "none"
    solve = [
        ["solver", _e(s.solver)],
        ["solver status", _e(s.status)],
        ["iterations", _e(s.iterations)],
        ["converged", _yes_no(s.converged, bad_when=False)],
        ["caution flags", f'<span class="{"bad" if s.flags else "ok"}">{_e(flags)}</span>'],
    ]
    warned = "".join(f'<li class="bad">{_e(w)}</li>' for w in inp.warnings)
    return "\n".join(
        [
            "<h2>Fit quality</h2>",
            '<div class="pair">',
            _table(["measure", "value", "unit"], rows),
            _table(["solve", ""], solve),
            "</div>",
            '<p class="note">Errors are model minus market over the fitted quotes; one vol '
            "point is 0.01 of implied volatility.</p>",
            _american_quotes(q, cur),
            f"<h3>Solver warnings</h3><ul>{warned}</ul>" if warned else "",
        ]
    )


def _american_quotes(q: QuoteFits, cur: str) -> str:
    """The American-style quotes with their early-exercise premiums ("" when none)."""
    am = [i for i, style in enumerate(q.exercise) if style == "american"]
    if not am:
        return ""
    assert q.early_exercise is not None
    rows = [
        [
            _e(q.label[i]),
            _e(q.kind[i]),
            _num(float(q.strike[i]), "g"),
            _e(q.expiry[i]),
            _num(float(q.market_price[i]), ".4f"),
            _num(float(q.early_exercise[i]), ".4f"),
            _num(100 * float(q.market_vol[i]), ".2f"),
            _num(100 * float(q.model_vol[i]), ".2f"),
        ]
        for i in am
    ]
    head = ["quote", "kind", "strike", "expiry", "premium", "early exercise", "vol %", "model %"]
    return "\n".join(
        [
            f'<h3 id="american">American-style quotes ({len(am)} of {len(q)})</h3>',
            _table(head, rows),
            f'<p class="note">Premiums and early-exercise premiums in {cur} per unit; vols are '
            "American implied volatilities; the model prices an American quote at the constant "
            "volatility with the model's total variance to expiry (an approximation: see the "
            "README).</p>",
        ]
    )


def _section_figures(figs: Mapping[str, Path]) -> str:
    out = []
    for name, caption in FIGURES:
        if name not in figs:
            continue
        src = _e(figs[name].name)
        out.append(
            f'<figure id="fig-{_e(name)}"><img src="{src}" alt="{_e(caption)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>"
        )
    return "\n".join(out)


def _section_constraints(inp: ReportInputs) -> str:
    if not inp.constraints:
        return "<h2>Constraints</h2><p>No constraints were imposed.</p>"
    rows = [
        [
            f"<code>{_e(c.name)}</code>",
            _e(c.form),
            "&ndash;" if c.bucket is None else _e(c.bucket),
            _num(c.slack),
            _yes_no(c.binds, bad_when=True).replace('class="bad"', 'class="warn"'),
            _num(c.dual),
            _num(c.refit_cost),
        ]
        for c in inp.constraints
    ]
    return "\n".join(
        [
            "<h2>Constraints</h2>",
            _table(["name", "form", "bucket", "slack", "binds", "dual", "re-fit cost"], rows),
            '<p class="note">Slack is the distance to the boundary in natural units (0 when '
            "binding). The dual is the multiplier of the final convex solve; the re-fit cost is "
            "the objective saved by fitting again without the constraint.</p>",
        ]
    )


def _section_gates(inp: ReportInputs) -> str:
    if not inp.gates:
        return "<h2>Approval gates</h2><p>No gates were evaluated for this run.</p>"
    rows = [
        [
            _e(g.name),
            _num(g.value),
            _e(g.limit) if isinstance(g.limit, str) else _num(g.limit),
            f'<span class="{"ok" if g.passed else "bad"}">{"pass" if g.passed else "FAIL"}</span>',
        ]
        for g in inp.gates
    ]
    return "<h2>Approval gates</h2>" + _table(["gate", "value", "limit", "verdict"], rows)


def _section_dropped(inp: ReportInputs) -> str:
    if not inp.dropped:
        return "<h2>Dropped quotes</h2><p>No quote was dropped.</p>"
    rows = [[_e(d.label), _e(d.reason)] for d in inp.dropped]
    return f"<h2>Dropped quotes ({len(inp.dropped)})</h2>" + _table(
        ["quote", "reason"], rows, "tall"
    )


def _plain(value: Any) -> str:
    if isinstance(value, str):
        return value
    return json.dumps(value, default=str, sort_keys=True)


def _section_inputs(inp: ReportInputs) -> str:
    r = inp.run
    rows = [
        ["run", _e(r.run_id)],
        ["status", _e(r.status)],
        ["created", f"{_e(r.created_at.isoformat(timespec='seconds'))} by {_e(r.created_by)}"],
        ["code version", f"<code>{_e(r.code_version)}</code>"],
        ["input batches", _e(", ".join(r.input_batches) or "none recorded")],
        ["inputs hash", f"<code>{_e(r.inputs_hash or 'none recorded')}</code>"],
        ["futures contracts", _e(len(inp.curve.delivery))],
        ["option quotes fitted / dropped", _e(f"{len(inp.quotes)} / {len(inp.dropped)}")],
    ]
    settings = [[f"<code>{_e(k)}</code>", _e(_plain(v))] for k, v in sorted(inp.settings.items())]
    out = ["<h2>Inputs and settings</h2>", '<div class="pair">', _table(["input", ""], rows)]
    if settings:
        out.append(_table(["setting", "value"], settings))
    out.append("</div>")
    return "\n".join(out)


_CSS = """
body{font:14px/1.45 system-ui,-apple-system,"Segoe UI",sans-serif;color:#222;margin:0 auto;
max-width:1080px;padding:0 20px 40px}
header{border-bottom:2px solid #333;margin-bottom:12px}
h1{font-size:22px;margin:18px 0 4px}h2{font-size:17px;margin:28px 0 8px;border-bottom:1px solid
#ccc}h3{font-size:15px}
.meta{color:#555;margin:0 0 10px}.meta span{margin-right:18px}
.caution{background:#fff8e1;border-left:4px solid #e0a800;padding:10px 14px;margin:14px 0}
table{border-collapse:collapse;margin:6px 0 10px;font-size:13px}
th,td{border:1px solid #ddd;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#f3f3f3}td{font-variant-numeric:tabular-nums}
.pair{display:flex;gap:24px;flex-wrap:wrap;align-items:flex-start}
.ok{color:#1a7f37}.bad{color:#b00020;font-weight:600}.warn{color:#9a6700;font-weight:600}
.status{display:inline-block;padding:1px 8px;border-radius:3px;background:#eee;font-weight:600}
.note{color:#555;font-size:12.5px}
figure{margin:18px 0}figure img{max-width:100%;border:1px solid #eee}
figcaption{color:#444;font-size:13px}
table.tall{display:block;max-height:320px;overflow-y:auto}
code{font-size:12.5px}
.verdict{padding:8px 12px;border-radius:4px;border:2px solid}
.verdict.ok{border-color:#2a7a2a;background:#eef7ee}
.verdict.bad{border-color:#b02a2a;background:#fbeeee}
"""


def _verdict(inp: ReportInputs) -> str:
    """The box at the top: whether the run passed its gates and solved cleanly, and why not."""
    failed = [g.name for g in inp.gates if not g.passed]
    flags = list(inp.solve.flags)
    if not failed and not flags:
        text = f"every gate passed ({len(inp.gates)}), solver {inp.solve.status}"
        return f'<p class="verdict ok"><b>Verdict:</b> {_e(text)}.</p>'
    why = []
    if failed:
        why.append(f"failed gate{'s' if len(failed) > 1 else ''}: {', '.join(failed)}")
    if flags:
        why.append(f"caution flags: {', '.join(flags)}")
    text = "not for automatic approval; " + "; ".join(why)
    return f'<p class="verdict bad"><b>Verdict:</b> {_e(text)}.</p>'


def _page(inp: ReportInputs, figs: Mapping[str, Path]) -> str:
    c = inp.commodity
    title = f"Fit report {c.code} {inp.trade_date.isoformat()} run {inp.run.run_id}"
    named = f"{c.name} ({c.code})" if c.name and c.name != c.code else c.code
    header = (
        f"<header><h1>Fit report: {_e(named)}, "
        f"trade date {_e(inp.trade_date.isoformat())}</h1>"
        f'<p class="meta"><span>run <b>{_e(inp.run.run_id)}</b></span>'
        f'<span>status <span class="status">{_e(inp.run.status)}</span></span>'
        f"<span>quoted in {_e(c.currency)} per {_e(c.unit)}</span></p></header>"
    )
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        header,
        _verdict(inp),
        f'<p class="caution"><b>Caution.</b> {_e(CAUTIONS)}</p>',
        _section_params(inp),
        _section_estimate(inp),
        _section_fit(inp),
        "<h2>Figures</h2>",
        _section_figures(figs),
        _section_constraints(inp),
        _section_gates(inp),
        _section_dropped(inp),
        _section_inputs(inp),
        f'<p class="note">Generated from run {_e(inp.run.run_id)} by calib '
        f"{_e(inp.run.code_version)}.</p>",
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def figure_names(inputs: ReportInputs) -> tuple[str, ...]:
    """The figures the report of ``inputs`` has, in page order (no frontier without points)."""
    return tuple(name for name, _ in FIGURES if name != "frontier" or inputs.frontier)


def figure_png(inputs: ReportInputs, name: str) -> bytes:
    """One figure of the report (a name of :func:`figure_names`) as PNG bytes."""
    if name not in figure_names(inputs):
        raise ReportInputError("report", f"no figure {name!r} in this report")
    buffer = io.BytesIO()
    _FIGURE_FUNCS[name](inputs).savefig(buffer, format="png")
    return buffer.getvalue()


def render_report(inputs: ReportInputs, out_dir: Path) -> ReportFiles:
    """Write the fit report of one run: ``out_dir/index.html`` and ``out_dir/fig_*.png``.

    Parameters
    ----------
    inputs : the run's values (see :class:`ReportInputs`).
    out_dir : created if missing; files of the same names are replaced.

    Returns
    -------
    ReportFiles
        The page and the figures by name (:data:`FIGURES`; ``frontier`` only when
        ``inputs.frontier`` is not empty).
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    figs: dict[str, Path] = {}
    for name in figure_names(inputs):
        path = out / f"fig_{name}.png"
        _FIGURE_FUNCS[name](inputs).savefig(path, format="png")
        figs[name] = path
    index = out / "index.html"
    index.write_text(_page(inputs, figs), encoding="utf-8")
    return ReportFiles(index=index, figures=MappingProxyType(figs))
