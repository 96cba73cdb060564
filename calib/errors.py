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


# --- calibration ------------------------------------------------------------------------------


class SettingError(ParameterError):
    """A calibration setting outside its domain (e.g. ``yield_floor = 1.5``)."""


class QuoteError(InputError, ValueError):
    """Option quotes that cannot be used as given (shapes, signs, missing fields)."""

    TEMPLATE = "option quotes: {field} {reason}"

    def __init__(self, field: str, reason: str) -> None:
        self.field = field
        self.reason = reason
        super().__init__(self.TEMPLATE.format(field=field, reason=reason))


class TooFewQuotesError(InputError):
    """Fewer usable quotes than the calibration mode has free parameters."""

    TEMPLATE = (
        "only {usable} usable option quote(s) of {total}, {mode} mode needs at least {needed}"
        "{dropped}"
    )

    def __init__(
        self, usable: int, total: int, mode: str, needed: int, dropped: dict[str, int]
    ) -> None:
        self.usable = usable
        self.needed = needed
        self.dropped = dict(dropped)
        why = "; dropped: " + ", ".join(f"{r} ({k})" for r, k in sorted(dropped.items()))
        super().__init__(
            self.TEMPLATE.format(
                usable=usable, total=total, mode=mode, needed=needed, dropped=why if dropped else ""
            )
        )


class InfeasibleSettingsError(InputError):
    """Constraints that no parameter set can meet together; says which and by how much."""

    TEMPLATE = "calibration constraints conflict: {conflict}"

    def __init__(self, conflict: str, shortfall: float) -> None:
        self.conflict = conflict
        self.shortfall = shortfall
        super().__init__(self.TEMPLATE.format(conflict=conflict))


class CalibrationShapeError(InputError, ValueError):
    """Quotes that do not fit the shape a re-usable calibrator was built for."""

    TEMPLATE = "calibrator built for {built}, these quotes need {needed}"

    def __init__(self, built: str, needed: str) -> None:
        super().__init__(self.TEMPLATE.format(built=built, needed=needed))


class CalibrationSolverError(CalibError):
    """The conic solver failed or returned no usable solution; names the solver and status."""

    TEMPLATE = "solver {solver} returned {status}: {cause}"

    def __init__(self, solver: str, status: str, cause: str) -> None:
        self.solver = solver
        self.status = status
        self.cause = cause
        super().__init__(self.TEMPLATE.format(solver=solver, status=status, cause=cause))


class CalibrationInaccurateWarning(CalibWarning):
    """The solver stopped short of its tolerances; the result carries the flag too."""

    TEMPLATE = "solver {solver} returned {status} at Gauss-Newton iteration {iteration}"


class CalibrationNotConvergedWarning(CalibWarning):
    """Gauss-Newton steps stopped at the iteration limit; the result carries the flag too."""

    TEMPLATE = "Gauss-Newton did not converge in {iterations} iterations (last step {step:.3g})"


# --- estimation (Kalman-filter maximum likelihood) ---------------------------------------------


class EstimationDataError(InputError, ValueError):
    """Curves the estimator cannot use; the message names the offending day, slot or size."""


class CurveShapeError(EstimationDataError):
    """Inputs of inconsistent shapes, or dates that do not increase."""

    TEMPLATE = "curves: {reason}"

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(self.TEMPLATE.format(reason=reason))


class TooFewDaysError(EstimationDataError):
    """Fewer observation days than the estimate needs."""

    TEMPLATE = "need at least {minimum} observation days, got {count}"

    def __init__(self, count: int, minimum: int) -> None:
        self.count = count
        self.minimum = minimum
        super().__init__(self.TEMPLATE.format(count=count, minimum=minimum))


class TooFewContractsError(EstimationDataError):
    """Fewer contract slots than the estimate needs."""

    TEMPLATE = "need at least {minimum} contracts per day, got {count}"

    def __init__(self, count: int, minimum: int) -> None:
        self.count = count
        self.minimum = minimum
        super().__init__(self.TEMPLATE.format(count=count, minimum=minimum))


class EmptySlotError(EstimationDataError):
    """A contract slot without a single price: its noise cannot be estimated."""

    TEMPLATE = "contract slot {slot} has no price on any day"

    def __init__(self, slot: int) -> None:
        self.slot = slot
        super().__init__(self.TEMPLATE.format(slot=slot))


class BadPriceError(EstimationDataError):
    """A price that is not a positive finite number, or a maturity that is not ahead."""

    TEMPLATE = "{what} {value!r} on day {day} ({date}), slot {slot}: {reason}"

    def __init__(
        self, what: str, value: float, day: int, date: object, slot: int, reason: str
    ) -> None:
        self.day = day
        self.slot = slot
        super().__init__(
            self.TEMPLATE.format(
                what=what, value=value, day=day, date=date, slot=slot, reason=reason
            )
        )


class FirstCurveError(EstimationDataError):
    """The first day cannot start the filter (it needs two prices of distinct maturity)."""

    TEMPLATE = "the first day ({date}) needs at least two prices of distinct maturity, got {count}"

    def __init__(self, date: object, count: int) -> None:
        self.count = count
        super().__init__(self.TEMPLATE.format(date=date, count=count))


class CurveGapError(EstimationDataError):
    """Consecutive observation days further apart than the filter is allowed to bridge."""

    TEMPLATE = (
        "gap of {days:g} days between {start} and {end} exceeds the maximum of {maximum:g} days"
    )

    def __init__(self, days: float, start: object, end: object, maximum: float) -> None:
        self.days = days
        self.maximum = maximum
        super().__init__(self.TEMPLATE.format(days=days, start=start, end=end, maximum=maximum))


class QuoteTableError(EstimationDataError):
    """A long futures table that cannot be turned into curves (duplicates, bad columns)."""

    TEMPLATE = "futures table: {reason}"

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(self.TEMPLATE.format(reason=reason))


class EstimationError(CalibError):
    """Maximum likelihood failed outright (no start gave a finite likelihood)."""

    TEMPLATE = "maximum likelihood failed: {reason}"

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(self.TEMPLATE.format(reason=reason))


class EstimationWarning(CalibWarning):
    """The estimate did not converge, or its Hessian gives no standard errors; see the result."""


# --- fit reports and compare over time (workflows) --------------------------------------------


class ReportInputError(InputError, ValueError):
    """Report or compare inputs that do not hang together (lengths, empty series)."""

    TEMPLATE = "cannot build the {what}: {reason}"

    def __init__(self, what: str, reason: str) -> None:
        self.what = what
        self.reason = reason
        super().__init__(self.TEMPLATE.format(what=what, reason=reason))
