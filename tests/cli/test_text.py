"""What the CLI prints (calib/output/text.py), line by line, on hand-made records: vol points
first, headers on lists, every forward bucket, the auto-approve verdict, noise by contract
slot, residuals by contract, spread sensitivities with their unit, the demo's caution."""

from __future__ import annotations

from datetime import UTC, date, datetime
from types import SimpleNamespace
from typing import Any

import numpy as np

from calib.model.twofactor import TwoFactorParams
from calib.output import text
from calib.store.quotes import OptionChain

PARAMS = TwoFactorParams(-0.012, 1.2, 0.1, 0.075, 0.253, 0.204, 0.673)
GATES: list[dict[str, Any]] = [
    {"name": "solver_optimal", "value": "CLARABEL: optimal", "limit": "optimal", "passed": True,
     "detail": ""},
    {"name": "rmse_vol", "value": 0.7811, "limit": 0.5, "passed": False, "detail": "vol points"},
    {"name": "max_error_vol", "value": 2.372, "limit": 3.0, "passed": True,
     "detail": "vol points"},
]  # fmt: skip
DIAGNOSTICS: dict[str, Any] = {
    "rmse": 2.633,
    "max_error": 8.559,
    "error_measure": "price",
    "flags": [],
    "n_quotes": 141,
    "dropped": [1, 2],
    "solver": "CLARABEL",
    "status": "optimal",
    "iterations": 3,
    "binding": ["decay_bound"],
    "gates": GATES,
}


def _run(**changes: Any) -> Any:
    fields = {
        "run_id": 7,
        "commodity": "QLM",
        "trade_date": date(2033, 6, 1),
        "mode": "constant",
        "estimate_id": 1,
        "status": "candidate",
        "params": PARAMS,
        "failure_reason": None,
        "diagnostics": DIAGNOSTICS,
        "buckets": [{"start": 0.0, "end": 0.9, "params": PARAMS.to_dict()}],
        "approved_at": None,
        "approved_by": None,
        "study": None,
    }
    run = {**fields, **changes}
    # the printers read a run's fit through its stored record (``run.fit.to_dict()``)
    record = {**run["diagnostics"], "buckets": run["buckets"]}
    fit = None if run["params"] is None else SimpleNamespace(to_dict=lambda: record)
    return SimpleNamespace(**run, fit=fit)


def test_fit_line_leads_with_vol_points_and_labels_the_premium_error() -> None:
    # issue 12: "rmse 2.633 (premium, currency)" beside gates in vol points
    fit = text.run_lines(_run())[1]
    assert (
        fit == "  fit: rmse 0.781 vol points (max 2.37); premium rmse 2.633 (max 8.559, currency)"
    )
    in_vol = {**DIAGNOSTICS, "error_measure": "vol", "rmse": 0.0071, "max_error": 0.02}
    assert text.run_lines(_run(diagnostics=in_vol))[1] == "  fit: rmse 0.71 vol points (max 2)"


def test_forward_mode_shows_every_bucket() -> None:
    buckets = [
        {"start": 0.0, "end": 0.25, "params": PARAMS.with_vols(0.25, 0.20, 0.6).to_dict()},
        {"start": 0.25, "end": 0.5, "params": PARAMS.with_vols(0.26, 0.21, 0.7).to_dict()},
        {"start": 0.5, "end": 0.75, "params": PARAMS.with_vols(0.27, 0.22, 0.8).to_dict()},
    ]
    lines = text.run_lines(_run(mode="forward", buckets=buckets))
    assert "sigma_spot=" not in lines[4] and lines[4].startswith("  mu=")  # slow ones only
    assert lines[5].split() == ["bucket", "(years)", "sigma_spot", "sigma_yield", "rho"]
    assert [line.split()[1:] for line in lines[6:9]] == [
        ["0.25", "0.2", "0.6"],
        ["0.26", "0.21", "0.7"],
        ["0.27", "0.22", "0.8"],
    ]


def test_auto_approve_verdict_says_why() -> None:
    verdict = text.verdict_line(GATES, approved=False)
    assert verdict == (
        "verdict: not approved because rmse_vol 0.7811 against limit 0.5 (vol points); "
        "the run stays a candidate"
    )
    assert text.verdict_line(GATES[:1], approved=True) == "verdict: approved (every gate passed)"


def test_lists_have_headers() -> None:
    runs = text.runs_table([_run(), _run(run_id=8, params=None, status="rejected")])
    assert runs[0].split() == [
        "run", "trade", "date", "status", "mode", "rmse", "vol", "sigma_spot", "sigma_yield", "rho"
    ]  # fmt: skip
    assert runs[1].split()[4:6] == ["0.781", "vp"] and runs[2].split()[4] == "failed"

    at = datetime(2033, 6, 1, 18, 5, tzinfo=UTC)
    approval = SimpleNamespace(
        run_id=7, trade_date=date(2033, 6, 1), params=PARAMS, approved_at=at,
        approved_by="A. Quant", superseded_at=None,
    )  # fmt: skip
    history = text.history_table([approval])
    assert history[0].split()[:7] == ["run", "trade", "date", "approved", "(UTC)", "by", "until"]
    assert "2033-06-01 18:05  A. Quant  in force" in history[1]

    estimates = text.estimates_table([_estimate()])
    assert estimates[0].split()[:5] == ["id", "source", "window", "converged", "made"]
    assert estimates[1].split()[:4] == ["3", "kalman", "2031-01-06..2033-01-05", "yes"]


def _estimate() -> Any:
    return SimpleNamespace(
        estimate_id=3, commodity="QLM", source="kalman", window_start=date(2031, 1, 6),
        window_end=date(2033, 1, 5), converged=True, n_days=518, n_contracts=3, n_obs=1554,
        loglik=16267.6, rate=0.0276, message="converged", params=PARAMS,
        std_errors={"kappa": 0.005}, noise_sd=(8.3e-05, 6.1e-05, 6.9e-05),
        created_at=datetime(2033, 1, 6, 7, 0, tzinfo=UTC), created_by="risk",
    )  # fmt: skip


def test_noise_sd_rows_name_their_contract_slot() -> None:
    lines = text.estimate_lines(_estimate())
    at = lines.index("  measurement noise sd of log futures price, by contract slot (1 = nearest):")
    assert [line.split() for line in lines[at + 1 :]] == [
        ["slot", "noise", "sd"],
        ["1", "8.3e-05"],
        ["2", "6.1e-05"],
        ["3", "6.9e-05"],
    ]


def test_residuals_by_contract_in_vol_points() -> None:
    residuals = [
        {"quote_id": 12, "market_price": 14.1, "model_price": 14.4, "market_vol": 0.241,
         "model_vol": 0.2432, "vol_residual": 0.0022},
        {"quote_id": 11, "market_price": 0.5, "model_price": 0.28, "market_vol": 0.2617,
         "model_vol": 0.2432, "vol_residual": -0.0185},
        {"quote_id": 13, "market_price": 1.0, "model_price": 1.1, "market_vol": 0.25,
         "model_vol": 0.26, "vol_residual": 0.01},
    ]  # fmt: skip
    nan = np.full(2, np.nan)
    chain = OptionChain(
        delivery=np.array(["2033-07-12"] * 2, dtype="datetime64[D]"),
        expiry=np.array(["2033-07-05"] * 2, dtype="datetime64[D]"),
        is_call=np.array([False, True]),
        strike=np.array([1350.0, 1700.0]),
        premium=nan, implied_vol=nan, bid=nan, ask=nan,
        row_id=np.array([11, 12]), american=np.array([False, True]),
    )  # fmt: skip
    contracts = text.option_contracts(chain, np.array([0.0, 0.0123]))
    assert contracts[12] == {
        "delivery": "2033-07-12", "expiry": "2033-07-05", "kind": "call", "strike": 1700.0,
        "exercise": "american", "early_exercise": 0.0123,
    }  # fmt: skip
    lines = text.residual_table(residuals, contracts)
    assert "vol points" in lines[0] and "early-exercise premium" in lines[0]
    assert lines[1].split()[-8:] == ["mkt", "vol", "%", "model", "resid", "vp", "early", "ex"]
    # by expiry then strike; a quote whose row is gone last, with dashes
    assert lines[2].split() == [
        "11", "2033-07-12", "2033-07-05", "put", "eu", "1350", "0.5000", "0.2800", "26.17",
        "24.32", "-1.850", "0.0000",
    ]  # fmt: skip
    assert lines[3].split()[0] == "12" and lines[3].split()[-2:] == ["+0.220", "0.0123"]
    assert lines[3].split()[4] == "am"
    assert lines[4].split()[:6] == ["13", "-", "-", "-", "-", "-"]


def test_spread_sensitivities_state_their_unit() -> None:
    lines = text.sensitivity_lines({"sigma_spot": 12.5, "sigma_yield": [1.0, -2.0], "rho": 0.3})
    assert "per vol point" in lines[0] and "rho: per 0.01" in lines[0]
    assert lines[1].split() == ["sigma_spot", "+0.125"]
    assert lines[2].split() == ["sigma_yield", "[+0.01,", "-0.02]", "by", "bucket"]
    assert lines[3].split() == ["rho", "+0.003"]


def test_demo_caution_speaks_of_the_terminal_not_a_page() -> None:
    # issue 12: the demo's closing caution said "This page describes ..." in a terminal
    assert "page" not in text.DEMO_CAUTION
    assert "model risk" in text.DEMO_CAUTION and "model-validation policy" in text.DEMO_CAUTION
