"""The settings file of the morning run: calibration settings and gate limits.

TOML with two optional tables: ``[calibration]`` (the fields of
:class:`~calib.calibrate.CalibrationSettings`) and ``[gates]`` (the fields of
:class:`~calib.policy.gates.GateLimits`), where ``[gates.<CODE>]`` overrides the gates for one
commodity::

    [calibration]
    mode = "constant"
    yield_floor = 0.5

    [gates]
    max_rmse_vol_points = 1.0

    [gates.QLM]
    max_jump_rho = 0.1
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from calib.calibrate.settings import CalibrationSettings
from calib.errors import SettingError, SettingsFileError
from calib.policy.gates import GateLimits


@dataclass(frozen=True, slots=True)
class RunSettings:
    """The calibration settings and the gate limits of one commodity's runs."""

    calibration: CalibrationSettings
    gates: GateLimits

    def to_dict(self) -> dict[str, Any]:
        return {"calibration": self.calibration.to_dict(), "gates": self.gates.to_dict()}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> RunSettings:
        return cls(
            calibration=CalibrationSettings.from_dict(dict(data.get("calibration", {}))),
            gates=GateLimits.from_dict(data.get("gates", {})),
        )


def default_settings() -> RunSettings:
    """The default calibration settings and gate limits."""
    return RunSettings(CalibrationSettings(), GateLimits())


def load_settings(path: Path | None, commodity: str) -> RunSettings:
    """Run settings from a TOML file (see the module notes); defaults when ``path`` is None.

    Raises
    ------
    SettingsFileError
        The file cannot be read or parsed, holds unknown tables, or a bad value.
    """
    if path is None:
        return default_settings()
    name = str(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SettingsFileError(name, "no such file") from None
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise SettingsFileError(name, f"not a TOML file ({exc})") from None
    unknown = sorted(set(data) - {"calibration", "gates"})
    if unknown:
        raise SettingsFileError(name, f"unknown table(s) {unknown}: use [calibration] and [gates]")
    gates = dict(data.get("gates", {}))
    per_commodity = {k: gates.pop(k) for k in list(gates) if isinstance(gates[k], dict)}
    gates.update(per_commodity.get(commodity, {}))
    try:
        return RunSettings.from_dict({"calibration": data.get("calibration", {}), "gates": gates})
    except SettingError as exc:
        raise SettingsFileError(name, str(exc)) from None
