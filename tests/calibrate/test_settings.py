"""Calibration settings and quotes: validation at the boundary, and plain-value round trips."""

from __future__ import annotations

import json

import numpy as np
import pytest

from calib.calibrate import CalibrationSettings, OptionQuotes
from calib.errors import QuoteError, SettingError


def test_settings_round_trip_through_json() -> None:
    s = CalibrationSettings(
        mode="forward",
        sigma_spot_cap=1.2,
        moneyness_band=(0.7, 1.4),
        loss="huber",
        huber_threshold=1.5,
        screen_vol_points=10.0,
    )
    again = CalibrationSettings.from_dict(json.loads(json.dumps(s.to_dict())))
    assert again == s
    assert "sigma_spot_cap" not in CalibrationSettings().to_dict()  # TOML has no null


@pytest.mark.parametrize(
    ("field", "value", "message"),
    [
        ("mode", "free", "mode = 'free' is invalid: must be one of constant, held_rho, forward"),
        ("yield_floor", 1.5, "yield_floor = 1.5 is invalid: must be <= 1"),
        ("anchor_weight", -1.0, "anchor_weight = -1.0 is invalid: must be >= 0"),
        ("sigma_spot_cap", 0.0, "sigma_spot_cap = 0.0 is invalid: must be > 0"),
        ("moneyness_band", (1.2, 0.8), "moneyness_band = 0.8 is invalid: must be >= 1.2"),
        ("decay_bound", 1, "decay_bound = 1 is invalid: must be true or false"),
        ("max_iterations", 0, "max_iterations = 0 is invalid: must be >= 1"),
        ("weighting", "bid", "weighting = 'bid' is invalid: must be one of equal, vega, spread"),
        ("step_tol", float("nan"), "step_tol = nan is invalid: must be finite"),
        ("loss", "absolute", "loss = 'absolute' is invalid: must be one of squares, huber"),
        ("huber_threshold", 0.0, "huber_threshold = 0.0 is invalid: must be > 0"),
        ("screen_vol_points", -1.0, "screen_vol_points = -1.0 is invalid: must be >= 0"),
    ],
)
def test_bad_settings_are_refused(field: str, value: object, message: str) -> None:
    with pytest.raises(SettingError, match=message.replace("(", r"\(").replace(")", r"\)")):
        CalibrationSettings(**{field: value})  # type: ignore[arg-type]


def test_unknown_setting_keys_are_refused() -> None:
    with pytest.raises(SettingError, match=r"settings = \['floor'\] is invalid: unknown key"):
        CalibrationSettings.from_dict({"floor": 0.5})


def _quotes(**over: object) -> OptionQuotes:
    base: dict[str, object] = dict(
        t_expiry=[0.5, 1.0],
        t_delivery=[0.6, 1.1],
        is_call=["call", "put"],
        strike=[50.0, 45.0],
        forward=[50.0, 50.0],
        rate=0.03,
        premium=[3.0, 1.5],
    )
    base.update(over)
    return OptionQuotes.from_arrays(**base)  # type: ignore[arg-type]


@pytest.mark.parametrize(
    ("over", "message"),
    [
        (
            {"t_delivery": [0.4, 1.1]},
            "option quotes: t_delivery precedes the option expiry at index 0",
        ),
        ({"strike": [50.0, -1.0]}, r"option quotes: strike must be > 0 \(index 1\)"),
        ({"premium": [3.0]}, r"option quotes: premium has shape \(1,\), expected \(2,\)"),
        ({"implied_vol": [0.3, 0.3]}, "give exactly one of premium and implied_vol"),
        ({"bid": [2.9, 1.4]}, "give both bid and ask, or neither"),
        ({"bid": [3.1, 1.4], "ask": [3.0, 1.6]}, "ask is below the bid at index 0"),
        ({"forward": [50.0, float("inf")]}, "forward is not finite at index 1"),
        ({"discount": [0.99, 0.98]}, "give exactly one of discount and rate"),
        ({"labels": ["a"]}, "labels has 1 entries, expected 2"),
    ],
)
def test_bad_quotes_are_refused(over: dict[str, object], message: str) -> None:
    with pytest.raises(QuoteError, match=message):
        _quotes(**over)


def test_quotes_are_read_only_copies() -> None:
    strike = np.array([50.0, 45.0])
    q = _quotes(strike=strike)
    strike[0] = 1.0
    assert q.strike[0] == 50.0
    with pytest.raises(ValueError, match="read-only"):
        q.strike[0] = 2.0
    np.testing.assert_allclose(q.rate, 0.03, rtol=1e-14)  # -ln(e^{-rT})/T, a few ulps
