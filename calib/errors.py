"""Every error and warning calib raises, with their message templates.

User mistakes (bad files, bad settings, unknown names) are :class:`InputError` subclasses and
are printed by the CLI as one clear line, never as a traceback. Numerical failures name the
cause. Tests match on the messages with ``pytest.raises(..., match=...)``.
"""

from __future__ import annotations


class CalibError(Exception):
    """Base of every calib error."""


class CalibWarning(UserWarning):
    """Base of every calib warning."""


# --- user input -------------------------------------------------------------------------------


class InputError(CalibError):
    """A user mistake: bad file, bad option, bad value. Printed without a traceback."""


class ParameterError(InputError, ValueError):
    """A parameter value outside its domain (e.g. ``kappa <= 0``)."""

    TEMPLATE = "{name} = {value!r} is invalid: {reason}"

    def __init__(self, name: str, value: object, reason: str) -> None:
        self.name = name
        self.value = value
        self.reason = reason
        super().__init__(self.TEMPLATE.format(name=name, value=value, reason=reason))


class ImpliedVolError(InputError, ValueError):
    """A premium from which no implied volatility exists (outside the no-arbitrage bounds)."""

    TEMPLATE = "no implied volatility for premium {premium!r}: {reason}"

    def __init__(self, premium: float, reason: str) -> None:
        self.premium = premium
        self.reason = reason
        super().__init__(self.TEMPLATE.format(premium=premium, reason=reason))


# --- Black-76 implied volatility (numeric core) ---------------------------------------------

IMPLIED_VOL_REASONS: dict[str, str] = {
    "BELOW_INTRINSIC": "the premium is below the discounted intrinsic value",
    "ABOVE_UPPER_BOUND": (
        "the premium is at or above its upper bound (discounted futures price for a call, "
        "discounted strike for a put)"
    ),
    "NON_POSITIVE_INPUT": "futures price, strike and time to expiry must all be > 0",
    "NO_TIME_VALUE": "the premium equals the intrinsic value, so it carries no volatility",
    "NON_FINITE_INPUT": "an input is NaN or infinite",
}
"""Reason phrases of :class:`ImpliedVolError`, keyed by the implied-vol reason-code name."""


# --- fit reports and compare over time (workflows) --------------------------------------------


class ReportInputError(InputError, ValueError):
    """Report or compare inputs that do not hang together (lengths, empty series)."""

    TEMPLATE = "cannot build the {what}: {reason}"

    def __init__(self, what: str, reason: str) -> None:
        self.what = what
        self.reason = reason
        super().__init__(self.TEMPLATE.format(what=what, reason=reason))
