"""Compare over time: ratios and differences, band edges, the table, CSV round trip and the plot."""

from __future__ import annotations

import csv
import datetime as dt
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from calib.errors import ReportInputError
from calib.output import compare as cmp

D0 = dt.date(2031, 3, 3)  # invented trade dates
STEP = 1e-9  # beyond an edge by far more than EDGE_RTOL (1e-12), far less than any band width


def _row(
    day: int, s1: float = 0.25, s2: float = 0.2, rho: float = 0.5, **kw: object
) -> cmp.CompareRow:
    base: dict[str, object] = dict(
        trade_date=D0 + dt.timedelta(days=day),
        run_id=100 + day,
        status="approved",
        sigma_spot=s1,
        sigma_yield=s2,
        rho=rho,
        hist_sigma_spot=0.25,
        hist_sigma_yield=0.2,
        hist_rho=0.5,
    )
    base.update(kw)
    return cmp.CompareRow(**base)  # type: ignore[arg-type]


def test_vol_ratio_flags_exactly_at_and_beyond_the_edges() -> None:
    # hist sigma_spot = 0.25 is a power of two, so 0.3125 / 0.25 = 1.25 and 0.2 / 0.25 = 0.8
    # exactly in binary floating point.
    rows = [
        _row(0, s1=0.3125),  # ratio 1.25, on the upper edge: inside
        _row(1, s1=0.3125 * (1 + STEP)),  # just above: flagged
        _row(2, s1=0.2),  # ratio 0.8, on the lower edge: inside
        _row(3, s1=0.2 * (1 - STEP)),  # just below: flagged
        _row(4, s1=0.25),  # ratio 1
    ]
    t = cmp.compare_series(rows, cmp.Bands())
    np.testing.assert_array_equal(t.measure["sigma_spot"][[0, 2, 4]], [1.25, 0.8, 1.0])
    np.testing.assert_array_equal(t.flagged["sigma_spot"], [False, True, False, True, False])
    assert not t.flagged["sigma_yield"].any() and not t.flagged["rho"].any()
    assert t.flags_of(1) == ("sigma_spot",)


def test_rho_is_compared_by_difference_with_its_own_band() -> None:
    band = cmp.Bands(rho=cmp.Band(-0.25, 0.25))  # quarter: exact in binary
    rows = [
        _row(0, rho=0.75),  # diff +0.25: on the edge
        _row(1, rho=0.75 + STEP),
        _row(2, rho=0.25),  # diff -0.25: on the edge
        _row(3, rho=0.25 - STEP),
        _row(4, rho=-0.5),  # sign change: a ratio would read -1, the difference reads -1.0
    ]
    t = cmp.compare_series(rows, band)
    np.testing.assert_array_equal(t.measure["rho"][[0, 2, 4]], [0.25, -0.25, -1.0])
    np.testing.assert_array_equal(t.flagged["rho"], [False, True, False, True, True])


def test_yield_band_is_separate_and_zero_history_is_flagged() -> None:
    band = cmp.Bands(sigma_yield=cmp.Band(0.5, 2.0))
    rows = [_row(0, s2=0.39), _row(1, s2=0.41), _row(2, hist_sigma_yield=0.0)]
    t = cmp.compare_series(rows, band)
    np.testing.assert_allclose(t.measure["sigma_yield"][:2], [1.95, 2.05], rtol=1e-15)
    assert np.isnan(t.measure["sigma_yield"][2])
    np.testing.assert_array_equal(t.flagged["sigma_yield"], [False, True, True])
    np.testing.assert_array_equal(t.any_flag, [False, True, True])


def test_rows_are_sorted_by_date_and_arrays_are_read_only() -> None:
    t = cmp.compare_series([_row(5), _row(1, s1=0.3), _row(3)])
    assert t.run_id == (101, 103, 105)
    assert t.calibrated["sigma_spot"][0] == 0.3
    with pytest.raises(ValueError, match="read-only"):
        t.measure["sigma_spot"][0] = 2.0


def test_empty_input_and_bad_band_are_errors_of_ours() -> None:
    with pytest.raises(ReportInputError, match="no calibration runs"):
        cmp.compare_series([])
    with pytest.raises(ReportInputError, match="low <= high"):
        cmp.Band(1.25, 0.8)


def test_terminal_table_marks_flagged_measures() -> None:
    t = cmp.compare_series([_row(0), _row(1, s1=0.5), _row(2, rho=0.9)])
    lines = cmp.format_table(t).splitlines()
    assert len(lines) == 2 + len(t) + 2  # header, rule, rows, rule, legend
    body = lines[2:-2]
    assert "*" not in body[0]
    assert "2.0000*" in body[1]  # sigma_spot ratio 0.5 / 0.25
    assert "+0.4000*" in body[2]  # rho difference 0.9 - 0.5
    assert lines[-1].startswith("2 of 3 day(s) flagged")


def test_csv_round_trip_is_exact(tmp_path: Path, rng: np.random.Generator) -> None:
    rows = [
        _row(
            i, s1=float(v1), s2=float(v2), rho=float(r), status="candidate" if i % 2 else "approved"
        )
        for i, (v1, v2, r) in enumerate(
            zip(
                rng.uniform(0.15, 0.4, 12),
                rng.uniform(0.1, 0.3, 12),
                rng.uniform(-0.2, 0.95, 12),
                strict=True,
            )
        )
    ]
    t = cmp.compare_series(rows)
    path = cmp.write_csv(t, tmp_path / "out" / "compare.csv")
    with path.open(newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        assert tuple(reader.fieldnames or ()) == cmp.csv_columns()
        back = list(reader)
    assert len(back) == len(t)
    for i, rec in enumerate(back):
        assert dt.date.fromisoformat(rec["trade_date"]) == t.trade_date[i]
        assert (int(rec["run_id"]), rec["status"]) == (t.run_id[i], t.status[i])
        for q in cmp.QUANTITIES:
            kind = cmp.MEASURE_KIND[q]
            assert float(rec[q]) == t.calibrated[q][i]
            assert float(rec[f"{q}_hist"]) == t.historical[q][i]
            assert float(rec[f"{q}_{kind}"]) == t.measure[q][i]
            assert rec[f"{q}_flag"] == ("1" if t.flagged[q][i] else "0")


def test_plot_writes_a_valid_png(tmp_path: Path) -> None:
    rows = [_row(i, s1=0.25 * (1 + 0.05 * i)) for i in range(10)]
    t = cmp.compare_series(rows)
    assert t.flagged["sigma_spot"].sum() == 4  # ratios 1.30 .. 1.45
    path = cmp.plot(t, tmp_path / "compare.png", title="QLM <test>")
    with Image.open(path) as img:
        assert img.format == "PNG"
        assert img.size == (1000, 800)  # 10 x 8 inches at 100 dpi
        img.verify()


def test_one_run_plots_over_the_range_asked_with_a_band_of_width() -> None:
    """The date axis is the --from/--to range, and a single run's band spans it (it held
    until another run's day), rather than a hairline at one date."""
    t = cmp.compare_series([_row(3)])
    start, end = D0, D0 + dt.timedelta(days=30)
    fig = cmp.figure(t, span=(start, end))
    from matplotlib.dates import date2num

    lo, hi = fig.axes[-1].get_xlim()
    assert (lo, hi) == (date2num(start), date2num(end + dt.timedelta(days=1)))
    band = fig.axes[0].collections[0].get_paths()[0].get_extents()
    assert band.x0 <= date2num(start) and band.x1 >= date2num(end)  # the whole range
