"""Standard errors of the fitted volatilities and what the quotes leave unidentified."""

from __future__ import annotations

import json
import math
import warnings
from dataclasses import replace

import numpy as np
import pytest

from calib.calibrate import CalibrationSettings, Calibrator, OptionQuotes, fit
from calib.errors import CalibrationNotIdentifiedWarning
from calib.model import black76
from tests.calibrate.quotes_from_model import TRUE, make_quotes

N_BOOT = 200  # the bootstrap's own standard error of a spread is about 1/sqrt(2 N) = 5 %
# standard errors against the bootstrap spread, relative: four times the spread's own error
# (5 %, above), the rest left to the linearisation behind the standard errors
SE_TOL = 0.2


def _quotes(**kw: object) -> OptionQuotes:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # quad's round-off note at 1e-14 relative
        return make_quotes(TRUE, **kw)  # type: ignore[arg-type]


def _noisy(q: OptionQuotes, noise: float, seed: int) -> OptionQuotes:
    assert q.premium is not None
    vol = black76.implied_vol(q.premium, q.forward, q.strike, q.t_expiry, q.rate, q.is_call)
    rng = np.random.default_rng(seed)
    return replace(q, premium=None, implied_vol=vol + noise * rng.standard_normal(vol.size))


def test_standard_errors_match_the_bootstrap_spread() -> None:
    # 126 quotes on three futures per expiry, 0.2 vol points of seeded noise, weighted least
    # squares in vol with equal weights: the pairs bootstrap (Efron & Tibshirani (1993), An
    # Introduction to the Bootstrap, ch. 9) resamples quotes with replacement and refits
    q = _noisy(_quotes(maturity_gaps=(0.05, 0.5, 1.5)), 0.002, seed=1)
    s = CalibrationSettings(
        anchor_weight=0.0, error_measure="vol", weighting="equal", refit_costs=False
    )
    res = fit(q, TRUE, s)
    assert res.binding == () and res.not_identified == ()
    se = np.array(res.buckets[0].std_errors)
    rng = np.random.default_rng(2)
    boot = []
    cal = Calibrator(s)  # one compiled problem re-solved for every resample
    for _ in range(N_BOOT):
        p = cal.fit(q.take(rng.integers(0, len(q), len(q))), TRUE).params
        boot.append((p.sigma_spot, p.sigma_yield, p.rho))
    spread = np.std(np.array(boot), axis=0, ddof=1)
    np.testing.assert_allclose(se, spread, rtol=SE_TOL)
    d = res.to_dict()["buckets"][0]
    assert d["std_errors"]["rho"] == se[2] and d["yield_set_by"] == "quotes"


def test_one_expiry_on_one_future_is_not_identified() -> None:
    q = _quotes(expiries=(0.5,), maturity_gaps=(0.05,))
    with pytest.warns(CalibrationNotIdentifiedWarning, match="the quotes do not identify"):
        res = fit(q, TRUE, CalibrationSettings(refit_costs=False, anchor_weight=0.0))
    assert res.not_identified and "singular" in res.not_identified_reason
    assert any(math.isinf(v) for v in res.buckets[0].std_errors or ())
    d = res.to_dict()
    assert d["not_identified"] == list(res.not_identified)
    assert None in d["buckets"][0]["std_errors"].values()  # JSON has no infinity
    json.dumps(d, allow_nan=False)


def test_held_correlation_has_no_rho_error() -> None:
    q = _noisy(_quotes(), 0.002, seed=3)
    res = fit(q, TRUE, CalibrationSettings(mode="held_rho", refit_costs=False))
    se = res.buckets[0].std_errors
    assert se is not None and se[2] == 0.0 and se[0] > 0.0 and se[1] > 0.0


def test_forward_buckets_say_whether_quotes_or_the_anchor_set_sigma_yield() -> None:
    # three futures per expiry: a faint anchor leaves each bucket's yield vol to the quotes,
    # a strong one holds it at history
    q = _noisy(_quotes(maturity_gaps=(0.05, 0.5, 1.5)), 0.002, seed=4)
    faint = fit(q, TRUE, CalibrationSettings(mode="forward", refit_costs=False, anchor_weight=1e-6))
    strong = fit(
        q, TRUE, CalibrationSettings(mode="forward", refit_costs=False, anchor_weight=1e-2)
    )
    assert {b.yield_set_by for b in faint.buckets} == {"quotes"}
    assert {b.yield_set_by for b in strong.buckets} == {"anchor"}


def test_forward_buckets_on_one_future_per_expiry_are_not_identified() -> None:
    # one future per expiry and no smoothness: within a bucket, (P, Q, C) are seen only
    # through one combination per expiry after it
    s = CalibrationSettings(mode="forward", refit_costs=False, anchor_weight=0.0, smoothness=0.0)
    with pytest.warns(CalibrationNotIdentifiedWarning, match="@"):
        res = fit(_noisy(_quotes(), 0.002, seed=5), TRUE, s)
    assert res.not_identified
    assert all(n.split("@")[0] in ("sigma_spot", "sigma_yield", "rho") for n in res.not_identified)
