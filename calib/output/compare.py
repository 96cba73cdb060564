"""Calibrated against historical parameters over time: ratios, band flags, table, CSV and plot.

Pure functions over plain values, no database: the ``calib compare`` command fills one
:class:`CompareRow` per stored run (the calibrated volatilities and the historical estimate in
force on its trade date) and calls :func:`compare_series`; :func:`format_table`,
:func:`write_csv` and :func:`plot` render the resulting :class:`CompareTable`. matplotlib is
imported inside :func:`plot` only.

Notes
-----
For the two volatilities the measure of drift is the ratio ``calibrated / historical``: a
volatility is a scale, so "25 % above history" means the same at any level. For the
correlation it is the difference ``rho_cal - rho_hist``: ``rho`` is not a scale, it can be
near zero or change sign, where a ratio explodes or flips meaning, while the difference lies in
``[-2, 2]`` and reads directly in correlation units.

A day is flagged for a quantity when its measure ``m`` leaves the band,
``m < low (1 - EDGE_RTOL)`` or ``m > high (1 + EDGE_RTOL)`` (edges widened by ``EDGE_RTOL``
times their size for the difference band), so a value exactly on an edge is inside.
A ratio with a zero historical volatility is undefined (NaN) and always flagged.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import TYPE_CHECKING, TypeVar

import numpy as np

from calib.errors import ReportInputError
from calib.types import BoolArray, FloatArray

if TYPE_CHECKING:
    from matplotlib.figure import Figure

QUANTITIES: tuple[str, ...] = ("sigma_spot", "sigma_yield", "rho")
"""The compared quantities, by their stable parameter names."""

MEASURE_KIND: Mapping[str, str] = MappingProxyType(
    {"sigma_spot": "ratio", "sigma_yield": "ratio", "rho": "diff"}
)
"""How each quantity is compared: ``ratio`` = calibrated / historical, ``diff`` = cal - hist."""

EDGE_RTOL = 1e-12
"""Relative widening of each band edge: the measures are quotients of stored floats, so a
value on an edge on paper can land an ulp or two outside it; a tolerance far below any band
width keeps it inside."""


@dataclass(frozen=True, slots=True)
class Band:
    """An accepted interval ``[low, high]`` of one quantity's measure (ratio or difference)."""

    low: float
    high: float

    def __post_init__(self) -> None:
        low, high = float(self.low), float(self.high)
        if not (math.isfinite(low) and math.isfinite(high)) or low > high:
            raise ReportInputError("band", f"need finite low <= high, got [{low!r}, {high!r}]")
        object.__setattr__(self, "low", low)
        object.__setattr__(self, "high", high)

    def outside(self, values: FloatArray) -> BoolArray:
        """``True`` where a value is outside the band (NaN included), edges inside."""
        lo = self.low - EDGE_RTOL * abs(self.low)
        hi = self.high + EDGE_RTOL * abs(self.high)
        with np.errstate(invalid="ignore"):
            inside = (values >= lo) & (values <= hi)
        return np.asarray(~inside, dtype=np.bool_)


@dataclass(frozen=True, slots=True)
class Bands:
    """One band per quantity: ratio bands for the volatilities, a difference band for ``rho``.

    The defaults (ratios within ``[0.8, 1.25]``, correlation within 0.2 of history) are
    common practice for a daily drift alert, not a published standard; set them per desk.
    """

    sigma_spot: Band = field(default_factory=lambda: Band(0.8, 1.25))
    sigma_yield: Band = field(default_factory=lambda: Band(0.8, 1.25))
    rho: Band = field(default_factory=lambda: Band(-0.2, 0.2))

    def of(self, quantity: str) -> Band:
        """The band of a quantity by name."""
        band: Band = getattr(self, quantity)
        return band


@dataclass(frozen=True, slots=True)
class CompareRow:
    """One calibration run against the historical estimate in force on its trade date.

    Attributes
    ----------
    trade_date : the run's trade date.
    run_id : the run's id.
    status : the run's status (``candidate``, ``approved``, ...).
    sigma_spot, sigma_yield, rho : the calibrated values.
    hist_sigma_spot, hist_sigma_yield, hist_rho : the historical estimate in force that day.
    """

    trade_date: dt.date
    run_id: int
    status: str
    sigma_spot: float
    sigma_yield: float
    rho: float
    hist_sigma_spot: float
    hist_sigma_yield: float
    hist_rho: float


_A = TypeVar("_A", FloatArray, BoolArray)


def _frozen(a: _A) -> _A:
    a.flags.writeable = False
    return a


@dataclass(frozen=True, slots=True, eq=False)
class CompareTable:
    """The compared series in trade-date order (read-only arrays, one entry a run).

    Attributes
    ----------
    trade_date, run_id, status : per run.
    calibrated, historical : per quantity name (:data:`QUANTITIES`), the two series.
    measure : per quantity, the ratio (volatilities) or difference (``rho``).
    flagged : per quantity, ``True`` where the measure leaves its band.
    bands : the bands used.
    """

    trade_date: tuple[dt.date, ...]
    run_id: tuple[int, ...]
    status: tuple[str, ...]
    calibrated: Mapping[str, FloatArray]
    historical: Mapping[str, FloatArray]
    measure: Mapping[str, FloatArray]
    flagged: Mapping[str, BoolArray]
    bands: Bands

    def __len__(self) -> int:
        return len(self.trade_date)

    @property
    def any_flag(self) -> BoolArray:
        """``True`` on the days where at least one quantity is flagged."""
        return np.asarray(np.stack([self.flagged[q] for q in QUANTITIES]).any(axis=0))

    def flags_of(self, i: int) -> tuple[str, ...]:
        """Names of the quantities flagged on row ``i``."""
        return tuple(q for q in QUANTITIES if self.flagged[q][i])


def compare_series(rows: Sequence[CompareRow], band: Bands | None = None) -> CompareTable:
    """Ratios (volatilities) and differences (``rho``) of calibrated against historical.

    Parameters
    ----------
    rows : one per run, any order; sorted by trade date (stably, so several runs of one day
        keep the caller's order).
    band : the accepted band per quantity; default :class:`Bands()`.

    Returns
    -------
    CompareTable

    Raises
    ------
    ReportInputError
        When ``rows`` is empty.

    Notes
    -----
    ``ratio = cal / hist`` for ``sigma_spot`` and ``sigma_yield``, ``diff = rho_cal - rho_hist``
    (see the module notes for why); flagged where outside the band, NaN included.
    """
    if not rows:
        raise ReportInputError("comparison", "no calibration runs in the chosen dates")
    bands = band if band is not None else Bands()
    ordered = sorted(rows, key=lambda r: r.trade_date)
    cal = {q: np.array([getattr(r, q) for r in ordered], dtype=np.float64) for q in QUANTITIES}
    hist = {
        q: np.array([getattr(r, f"hist_{q}") for r in ordered], dtype=np.float64)
        for q in QUANTITIES
    }
    measure: dict[str, FloatArray] = {}
    for q in QUANTITIES:
        if MEASURE_KIND[q] == "ratio":
            with np.errstate(divide="ignore", invalid="ignore"):
                m = np.where(
                    hist[q] != 0.0, cal[q] / np.where(hist[q] != 0.0, hist[q], 1.0), np.nan
                )
        else:
            m = cal[q] - hist[q]
        measure[q] = np.asarray(m, dtype=np.float64)
    flagged = {q: bands.of(q).outside(measure[q]) for q in QUANTITIES}
    return CompareTable(
        trade_date=tuple(r.trade_date for r in ordered),
        run_id=tuple(int(r.run_id) for r in ordered),
        status=tuple(r.status for r in ordered),
        calibrated=MappingProxyType({q: _frozen(a) for q, a in cal.items()}),
        historical=MappingProxyType({q: _frozen(a) for q, a in hist.items()}),
        measure=MappingProxyType({q: _frozen(a) for q, a in measure.items()}),
        flagged=MappingProxyType({q: _frozen(a) for q, a in flagged.items()}),
        bands=bands,
    )


# --- terminal table and CSV ---------------------------------------------------------------------

_SHORT = {"sigma_spot": "s_spot", "sigma_yield": "s_yield", "rho": "rho"}


def _measure_header(q: str) -> str:
    return f"{_SHORT[q]} {'ratio' if MEASURE_KIND[q] == 'ratio' else 'diff'}"


def format_table(table: CompareTable) -> str:
    """A fixed-width text table for the terminal; flagged measures carry a ``*``.

    One line per run: date, run, status, and for each quantity calibrated, historical and
    measure; a last line counts the flagged days and states the bands.
    """
    head = ["trade date", "run", "status"]
    for q in QUANTITIES:
        head += [f"{_SHORT[q]} cal", f"{_SHORT[q]} hist", _measure_header(q)]
    body: list[list[str]] = []
    for i in range(len(table)):
        line = [table.trade_date[i].isoformat(), str(table.run_id[i]), table.status[i]]
        for q in QUANTITIES:
            mark = "*" if table.flagged[q][i] else " "
            fmt = "{:+.4f}" if MEASURE_KIND[q] == "diff" else "{:.4f}"
            line += [
                f"{table.calibrated[q][i]:.4f}",
                f"{table.historical[q][i]:.4f}",
                fmt.format(table.measure[q][i]) + mark,
            ]
        body.append(line)
    widths = [max(len(r[j]) for r in [head, *body]) for j in range(len(head))]
    left = 3  # date, run and status are left-aligned, numbers right-aligned

    def render(cells: list[str]) -> str:
        return "  ".join(
            c.ljust(w) if j < left else c.rjust(w)
            for j, (c, w) in enumerate(zip(cells, widths, strict=True))
        ).rstrip()

    n_flag = int(table.any_flag.sum())
    b = table.bands
    legend = (
        f"{n_flag} of {len(table)} day(s) flagged (*): ratio bands s_spot "
        f"[{b.sigma_spot.low:g}, {b.sigma_spot.high:g}], s_yield "
        f"[{b.sigma_yield.low:g}, {b.sigma_yield.high:g}]; rho difference "
        f"[{b.rho.low:+g}, {b.rho.high:+g}]"
    )
    rule = "-" * len(render(head))
    return "\n".join([render(head), rule, *(render(r) for r in body), rule, legend])


def csv_columns() -> tuple[str, ...]:
    """The CSV header: identifiers, then per quantity cal, hist, measure and flag."""
    cols = ["trade_date", "run_id", "status"]
    for q in QUANTITIES:
        kind = MEASURE_KIND[q]
        cols += [q, f"{q}_hist", f"{q}_{kind}", f"{q}_flag"]
    return tuple(cols)


def write_csv(table: CompareTable, path: Path) -> Path:
    """Write the table as CSV (ISO dates, floats in shortest round-trip form, flags 0/1).

    The columns are :func:`csv_columns`; NaN is written as an empty field.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)

    def num(x: float) -> str:
        return "" if math.isnan(x) else repr(float(x))

    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(csv_columns())
        for i in range(len(table)):
            row = [table.trade_date[i].isoformat(), str(table.run_id[i]), table.status[i]]
            for q in QUANTITIES:
                row += [
                    num(table.calibrated[q][i]),
                    num(table.historical[q][i]),
                    num(table.measure[q][i]),
                    "1" if table.flagged[q][i] else "0",
                ]
            w.writerow(row)
    return path


# --- plot -------------------------------------------------------------------------------------

_LABEL = {"sigma_spot": "spot volatility", "sigma_yield": "yield volatility", "rho": "correlation"}


def plot(
    table: CompareTable,
    path: Path,
    *,
    title: str = "",
    span: tuple[dt.date, dt.date] | None = None,
) -> Path:
    """PNG of :func:`figure` at ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    figure(table, title=title, span=span).savefig(path, format="png", dpi=100)
    return path


def plot_png(
    table: CompareTable, *, title: str = "", span: tuple[dt.date, dt.date] | None = None
) -> bytes:
    """The figure of :func:`plot` as PNG bytes."""
    buffer = io.BytesIO()
    figure(table, title=title, span=span).savefig(buffer, format="png", dpi=100)
    return buffer.getvalue()


def _held(
    dates: np.ndarray, values: FloatArray, start: np.datetime64, end: np.datetime64
) -> tuple[np.ndarray, FloatArray]:
    """Step edges for ``values`` held from each trade date to the next, from ``start`` to
    ``end``: a band or a line of one run still spans the whole range."""
    edges = np.concatenate([[start], dates[1:], [end]])
    return edges, np.concatenate([values, values[-1:]])


def figure(
    table: CompareTable, *, title: str = "", span: tuple[dt.date, dt.date] | None = None
) -> Figure:
    """The calibrated and historical series per quantity, the band, flagged days marked.

    One panel per quantity against trade date: the historical estimate as a step line, the
    band it implies (``hist * [low, high]`` for a volatility, ``hist + [low, high]`` for
    ``rho``) shaded, the calibrated series with markers, and flagged days circled in red.
    The date axis is ``span`` (the range asked for; default the first to the last run), and
    each day's band and historical value hold until the next run's day.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    dates = np.array(table.trade_date, dtype="datetime64[D]")
    first, last = (dates[0], dates[-1]) if span is None else np.array(span, dtype="datetime64[D]")
    start, end = min(first, dates[0]), max(last, dates[-1]) + np.timedelta64(1, "D")
    fig = Figure(figsize=(10.0, 8.0), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(QUANTITIES), 1, sharex=True)
    for ax, q in zip(axes, QUANTITIES, strict=True):
        cal, hist, band = table.calibrated[q], table.historical[q], table.bands.of(q)
        if MEASURE_KIND[q] == "ratio":
            lo, hi = hist * band.low, hist * band.high
            band_label = f"band x[{band.low:g}, {band.high:g}]"
        else:
            lo, hi = hist + band.low, hist + band.high
            band_label = f"band {band.low:+g} / {band.high:+g}"
        x, lo_held = _held(dates, lo, start, end)
        ax.fill_between(
            x,
            lo_held,
            _held(dates, hi, start, end)[1],
            step="post",
            color="#9ecae1",
            alpha=0.45,
            label=band_label,
        )
        ax.step(
            x,
            _held(dates, hist, start, end)[1],
            where="post",
            color="#08519c",
            lw=1.4,
            label="historical",
        )
        ax.plot(dates, cal, color="#333333", lw=1.0, marker=".", ms=4, label="calibrated")
        bad = table.flagged[q]
        if bad.any():
            ax.plot(
                dates[bad],
                cal[bad],
                ls="none",
                marker="o",
                ms=8,
                mfc="none",
                mec="#cb181d",
                mew=1.6,
                label=f"flagged ({int(bad.sum())})",
            )
        ax.set_ylabel(_LABEL[q])
        ax.grid(True, color="#dddddd", lw=0.6)
        ax.legend(loc="upper left", fontsize=8, ncols=4, frameon=False)
    axes[-1].set_xlim(first, last + np.timedelta64(1, "D"))
    axes[-1].set_xlabel("trade date")
    fig.suptitle(title or "Calibrated against historical parameters")
    return fig
