"""Rolling series as units of work on a generated, ingested year: stored and marked, never
the default, equal to single estimates, resumable, and the stability view over them."""

from __future__ import annotations

import csv
import json
from datetime import date
from pathlib import Path

import pytest

from calib.compute.executor import Executor, InlineExecutor, ProcessExecutor
from calib.errors import RollingRequestError
from calib.estimate.rolling import parse_period
from calib.model.twofactor import PARAM_NAMES
from calib.output.stability import write_csv, write_png
from calib.store.engine import Store
from calib.store.estimates import (
    EstimateRecord,
    get_estimate,
    latest_estimate,
    series_estimates,
)
from calib.workflows.estimates import estimate
from calib.workflows.rolling import RollingReport, RollingWindow, estimate_rolling
from calib.workflows.stability import stability
from tests.conftest import Cli
from tests.workflows.small_day import load_scenario

LENGTH = parse_period("--rolling", "6m")
STEP = parse_period("--step", "1m")
FIRST, LAST = date(2031, 7, 1), date(2031, 10, 1)  # four windows of half a year
MIN_DAYS = 100


class StopHereError(Exception):
    pass


def test_rolling_series_is_stored_marked_resumable_and_equal_to_single_estimates(
    store: Store, tmp_path: Path
) -> None:
    data = load_scenario(store, tmp_path)
    seen: list[RollingWindow] = []

    def stop_after_one(w: RollingWindow) -> None:
        seen.append(w)
        raise StopHereError

    def series(**kw: object) -> RollingReport:
        return estimate_rolling(
            store.sessions,
            data.code,
            FIRST,
            LAST,
            LENGTH,
            STEP,
            by="q",
            min_days=MIN_DAYS,
            chunk=2,
            **kw,  # type: ignore[arg-type]
        )

    # interrupted after the first window (estimated cold on its own, then stored): the
    # chunks after it were never written
    with pytest.raises(StopHereError):
        series(on_window=stop_after_one)
    report = series(cold_every=2)
    assert [w.status for w in report.windows] == ["held", "stored", "stored", "stored"]
    # the resumed windows warm-start from the held window before them
    assert [w.started for w in report.windows[1:]] == ["warm", "warm", "warm"]
    assert report.cold_checked == 2 and not report.local_optima  # windows 1 and 3
    with store.sessions() as s:
        stored = series_estimates(session=s, series_id=report.series_id)
        assert latest_estimate(session=s, commodity=data.code) is None  # never the default
    assert [e.series_id for e in stored] == [report.series_id] * 4
    assert all(e.converged and e.covariance is not None for e in stored)
    assert [e.settings["end"] for e in stored] == [w.end.isoformat() for w in report.windows]
    # each window equals a fresh single estimate on its dates
    for w in (report.windows[0], report.windows[3]):
        single = estimate(store.sessions, data.code, w.start, w.end, by="q", min_days=MIN_DAYS)
        with store.sessions() as s:
            kept = get_estimate(session=s, estimate_id=w.estimate_id or -1)
        assert kept is not None and single.series_id is None
        assert (kept.window_start, kept.window_end, kept.n_obs) == (
            single.window_start,
            single.window_end,
            single.n_obs,
        )
        assert kept.inputs_sha256 == single.inputs_sha256 and kept.rate == single.rate
        assert kept.loglik == pytest.approx(single.loglik, abs=1e-5)
        for n in PARAM_NAMES:  # within a hundredth of a standard error (same optimum)
            se = single.std_errors[n]
            assert se is not None
            assert abs(getattr(kept.params, n) - getattr(single.params, n)) <= 0.01 * se
    with store.sessions() as s:  # now a single estimate exists: it is the default
        chosen = latest_estimate(session=s, commodity=data.code)
    assert chosen is not None and chosen.series_id is None

    # the stability view against that single estimate
    view = stability(store.sessions, data.code, k=3.0)
    assert view.in_use.estimate_id == chosen.estimate_id and "default" in view.in_use_how
    assert len(view.windows) == 4 and not any(w.in_use for w in view.windows)
    named = stability(store.sessions, data.code, estimate_id=stored[1].estimate_id, k=3.0)
    assert [w.in_use for w in named.windows] == [False, True, False, False]
    assert named.windows[1].z == {n: 0.0 for n in PARAM_NAMES}
    tight = stability(store.sessions, data.code, estimate_id=stored[1].estimate_id, k=0.0)
    assert all(set(w.flags) - {"decay_bound"} for i, w in enumerate(tight.windows) if i != 1)
    assert "neighbouring windows already differ" in tight.recommendation
    out = view.to_dict()
    assert {"windows", "in_use", "recommendation", "quiet_steps", "caution", "k"} <= set(out)
    json.dumps(out, allow_nan=False)
    rows = list(csv.DictReader(write_csv(view.to_dict(), tmp_path / "s.csv").open()))
    assert len(rows) == 4 and float(rows[0]["kappa"]) == stored[0].params.kappa
    assert write_png(view.to_dict(), tmp_path / "s.png").stat().st_size > 10_000


def test_worker_processes_give_the_inline_result(store: Store, db_url: str, tmp_path: Path) -> None:
    if not db_url.startswith("sqlite"):
        pytest.skip("workers never touch the store: one engine is enough (spawn costs seconds)")
    data = load_scenario(store, tmp_path)
    ends = (date(2031, 7, 1), date(2031, 9, 1))  # three windows: one cold, two in workers

    def estimates(min_days: int, executor: Executor) -> list[EstimateRecord]:
        report = estimate_rolling(
            store.sessions, data.code, *ends, LENGTH, STEP, by="q", min_days=min_days,
            chunk=1, executor=executor,
        )  # fmt: skip
        with store.sessions() as s:
            return series_estimates(session=s, series_id=report.series_id)

    # two series (min_days differs, every window has more days than either): same numbers
    pooled = estimates(MIN_DAYS, ProcessExecutor(2))
    inline = estimates(MIN_DAYS + 1, InlineExecutor())
    assert len(pooled) == 3 and [e.params for e in pooled] == [e.params for e in inline]
    assert [e.settings["start_point"] for e in pooled] == ["cold", "warm", "warm"]


def test_rolling_and_stability_requests_that_cannot_be_served(store: Store, tmp_path: Path) -> None:
    data = load_scenario(store, tmp_path)
    with pytest.raises(RollingRequestError, match="no window end between"):
        estimate_rolling(store.sessions, data.code, LAST, FIRST, LENGTH, STEP, by="q")
    with pytest.raises(RollingRequestError, match="no rolling series stored"):
        stability(store.sessions, data.code)
    early = estimate_rolling(
        store.sessions,
        data.code,
        date(2031, 2, 1),
        date(2031, 2, 1),
        LENGTH,
        STEP,
        by="q",
        min_days=MIN_DAYS,
    )
    (w,) = early.windows
    assert w.status == "failed" and "TooFewDaysError" in (w.detail or "")
    with pytest.raises(RollingRequestError, match="holds no estimate yet"):
        stability(store.sessions, data.code)


@pytest.mark.slow
def test_rolling_and_stability_from_the_command_line(
    store: Store, db_url: str, tmp_path: Path, cli: Cli
) -> None:
    if not db_url.startswith("sqlite"):
        pytest.skip("the command line is engine-blind; the workflow tests run on both engines")
    data = load_scenario(store, tmp_path)
    calib = cli

    args = (
        "estimate",
        data.code,
        "--from",
        "2031-07-01",
        "--to",
        "2031-08-01",
        "--rolling",
        "6m",
        "--step",
        "1m",
        "--min-days",
        str(MIN_DAYS),
        "--workers",
        "1",
    )
    code, out, err = calib(*args, "--json")
    report = json.loads(out)
    assert code == 0 and report["stored"] == 2 and err == ""  # no progress bar with --json
    code, out, _ = calib(*args)
    assert code == 0 and "0 estimated now, 2 held from before" in out
    code, _, err = calib(
        "estimate", data.code, "--from", "2031-07-01", "--to", "2031-08-01", "--step", "1m"
    )
    assert code == 2 and "--step needs --rolling" in err
    code, out, _ = calib(
        "stability",
        data.code,
        "--estimate",
        str(report["windows"][0]["estimate_id"]),
        "--csv",
        str(tmp_path / "s.csv"),
        "--png",
        str(tmp_path / "s.png"),
    )
    assert code == 0 and "recommendation:" in out and "caution:" in out
    assert (tmp_path / "s.png").exists() and (tmp_path / "s.csv").exists()
    code, out, _ = calib("stability", data.code, "--json")
    assert code == 2 or json.loads(out)["windows"]  # code 2: no converged single estimate


def test_unknown_standard_errors_print_as_null() -> None:
    # a window whose observed information was not positive definite has NaN s.e.: JSON null
    from calib.workflows.stability import StabilityWindow

    w = StabilityWindow(
        estimate_id=1, window_start=date(2031, 1, 1), window_end=date(2031, 12, 31),
        converged=False, params=dict.fromkeys(PARAM_NAMES, 0.5),
        std_errors=dict.fromkeys(PARAM_NAMES, float("nan")),
        z=dict.fromkeys(PARAM_NAMES, float("nan")), flags=("not_converged",),
        decay_slack=float("nan"), in_use=False,
    )  # fmt: skip
    out = json.loads(json.dumps(w.to_dict(), allow_nan=False))
    assert out["std_errors"]["kappa"] is None and out["z"]["rho"] is None
