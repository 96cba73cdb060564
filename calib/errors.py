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


# --- quote store and ingestion ----------------------------------------------------------------


class StoreURLError(InputError):
    """A database URL calib cannot use."""

    TEMPLATE = "database URL {url!r} is not usable: {reason}"

    def __init__(self, url: str, reason: str) -> None:
        self.url = url
        self.reason = reason
        super().__init__(self.TEMPLATE.format(url=url, reason=reason))


class StoreNotInitialisedError(InputError):
    """The database holds no calib schema yet."""

    TEMPLATE = "database {url} has no calib schema: run `calib init` first"

    def __init__(self, url: str) -> None:
        self.url = url
        super().__init__(self.TEMPLATE.format(url=url))


class StoreOutdatedError(InputError):
    """The database is at an older schema revision than this program."""

    TEMPLATE = "database schema is at revision {found}, this program needs {head}: run `calib init`"

    def __init__(self, found: str, head: str) -> None:
        self.found = found
        self.head = head
        super().__init__(self.TEMPLATE.format(found=found, head=head))


class SchemaTooNewError(InputError):
    """The database was migrated by a newer calib; this program refuses to touch it."""

    TEMPLATE = (
        "database schema is at revision {found}, unknown to this program (newest known: {head});"
        " it was written by a newer calib: upgrade calib, the database was not changed"
    )

    def __init__(self, found: str, head: str) -> None:
        self.found = found
        self.head = head
        super().__init__(self.TEMPLATE.format(found=found, head=head))


class IngestFileError(InputError):
    """A file refused as a whole (unreadable, wrong columns, unknown commodity); nothing stored."""

    TEMPLATE = "{file}: {reason}"

    def __init__(self, file: str, reason: str) -> None:
        self.file = file
        self.reason = reason
        super().__init__(self.TEMPLATE.format(file=file, reason=reason))


class UnknownCommodityError(InputError):
    """A commodity code that is not registered."""

    TEMPLATE = "unknown commodity {codes}{hint}"

    def __init__(self, codes: list[str], hint: str = "") -> None:
        self.codes = codes
        super().__init__(self.TEMPLATE.format(codes=", ".join(map(repr, codes)), hint=hint))


# File-level refusals (IngestFileError reasons).
FILE_NOT_FOUND = "no such file"
FILE_FORMAT = "unknown format {suffix!r}: give a .csv or .parquet file"
FILE_NOT_TEXT = "not UTF-8 text ({detail})"
FILE_UNREADABLE = "cannot be read: {detail}"
FILE_NO_HEADER = "empty file: no header line"
FILE_MISSING_COLUMNS = "missing required column(s) {columns}; a {kind} file needs {required}"
FILE_DUPLICATE_COLUMNS = "column(s) {columns} appear more than once"
FILE_NO_PRICE_COLUMN = "an options file needs a premium or an implied_vol column (or both)"
HINT_CREATE = " (pass --create to register it)"

# Row-level reasons, stored in quarantine with the row's line, field and raw text.
ROW_FIELD_COUNT = "expected {expected} fields, found {found}"
ROW_EMPTY = "empty"
ROW_NOT_NUMBER = "not a number: {value!r}"
ROW_NOT_FINITE = "not a finite number: {value!r}"
ROW_NOT_DATE = "not an ISO date (YYYY-MM-DD): {value!r}"
ROW_DATE_RANGE = "date {value!r} outside {low}..{high}"
ROW_NOT_KIND = "kind must be call or put: {value!r}"
ROW_BAD_CODE = "commodity code must be 1-32 letters, digits, '.', '_' or '-': {value!r}"
ROW_NOT_POSITIVE = "must be > 0: {value!r}"
ROW_NEGATIVE = "must be >= 0: {value!r}"
ROW_VOL_RANGE = "implied volatility must be in (0, {high}]: {value!r}"
ROW_RATE_RANGE = "zero rate must be within +-{limit} (a decimal, not percent): {value!r}"
ROW_NO_PRICE = "needs a premium or an implied_vol"
ROW_BEFORE_TRADE = "{value} is before the trade date {trade_date}"
ROW_NOT_AFTER_TRADE = "{value} is not after the trade date {trade_date}"
ROW_AFTER_DELIVERY = "expiry {value} is after the delivery {delivery}"
ROW_BID_ASK = "bid {bid} is above ask {ask}"
ROW_NO_FUTURE = "no futures settlement for delivery {delivery} on {trade_date}"
ROW_BELOW_INTRINSIC = (
    "premium {premium:.10g} is below the discounted intrinsic value {bound:.10g}"
    " (F={forward:.10g}, D={discount:.10g}{curve})"
)
ROW_ABOVE_BOUND = (
    "premium {premium:.10g} is above the no-arbitrage bound {bound:.10g}"
    " (D x {what}, D={discount:.10g}{curve})"
)
ROW_NO_CURVE = "; no zero curve stored for the day, r = 0"
ROW_CONFLICT = "same key as line(s) {lines} with different values"
ROW_REPEAT = "repeats line {line}"


class StoreUnavailableError(CalibError):
    """The database cannot be reached or used (server down, file locked, disk full)."""

    TEMPLATE = "database {url}: {detail}"

    def __init__(self, url: str, detail: str) -> None:
        self.url = url
        self.detail = detail
        super().__init__(self.TEMPLATE.format(url=url, detail=detail))


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


# --- estimates, calibration runs and approvals (storage and workflows) -------------------------


class UnknownRunError(InputError):
    """A calibration run id that is not stored."""

    TEMPLATE = "no calibration run {run_id}"

    def __init__(self, run_id: int) -> None:
        self.run_id = run_id
        super().__init__(self.TEMPLATE.format(run_id=run_id))


class UnknownEstimateError(InputError):
    """A historical estimate id that is not stored, or belongs to another commodity."""

    TEMPLATE = "no historical estimate {estimate_id}{detail}"

    def __init__(self, estimate_id: int, detail: str = "") -> None:
        self.estimate_id = estimate_id
        super().__init__(self.TEMPLATE.format(estimate_id=estimate_id, detail=detail))


class NoEstimateError(InputError):
    """No converged historical estimate to hold the slow parameters at."""

    TEMPLATE = (
        "no converged historical estimate for {commodity}{unconverged}: run `calib estimate` or "
        "`calib estimates import`, or name one with --estimate"
    )

    def __init__(self, commodity: str, unconverged: list[int]) -> None:
        self.commodity = commodity
        self.unconverged = list(unconverged)
        extra = f" (not converged: {', '.join(map(str, unconverged))})" if unconverged else ""
        super().__init__(self.TEMPLATE.format(commodity=commodity, unconverged=extra))


class NotConvergedEstimateError(InputError):
    """An estimate named explicitly that did not converge (never used silently)."""

    TEMPLATE = "historical estimate {estimate_id} did not converge ({message}); it is not used"

    def __init__(self, estimate_id: int, message: str) -> None:
        self.estimate_id = estimate_id
        super().__init__(self.TEMPLATE.format(estimate_id=estimate_id, message=message))


class IllegalTransitionError(InputError):
    """A status change the run's state machine does not allow."""

    TEMPLATE = "run {run_id} is {current}: it cannot become {wanted} (allowed: {allowed})"

    def __init__(self, run_id: int, current: str, wanted: str, allowed: list[str]) -> None:
        self.run_id = run_id
        self.current = current
        self.wanted = wanted
        super().__init__(
            self.TEMPLATE.format(
                run_id=run_id,
                current=current,
                wanted=wanted,
                allowed=", ".join(allowed) if allowed else "none, it is final",
            )
        )


class EstimateFileError(InputError):
    """An estimate file that cannot be imported; nothing is stored."""

    TEMPLATE = "{file}: {reason}"

    def __init__(self, file: str, reason: str) -> None:
        self.file = file
        self.reason = reason
        super().__init__(self.TEMPLATE.format(file=file, reason=reason))


class SettingsFileError(InputError):
    """A settings file (TOML) that cannot be read or holds a bad value."""

    TEMPLATE = "{file}: {reason}"

    def __init__(self, file: str, reason: str) -> None:
        self.file = file
        self.reason = reason
        super().__init__(self.TEMPLATE.format(file=file, reason=reason))


class NoQuotesError(InputError):
    """Nothing stored to fit or estimate from (no run is stored)."""

    TEMPLATE = "{commodity}: {what}"

    def __init__(self, commodity: str, what: str) -> None:
        self.commodity = commodity
        self.what = what
        super().__init__(self.TEMPLATE.format(commodity=commodity, what=what))


class InputsChangedError(CalibError):
    """Rows a stored run was made from are no longer in the store as recorded."""

    TEMPLATE = "run {run_id}: its stored inputs cannot be rebuilt: {reason}"

    def __init__(self, run_id: int, reason: str) -> None:
        self.run_id = run_id
        super().__init__(self.TEMPLATE.format(run_id=run_id, reason=reason))


ESTIMATE_FILE_NOT_JSON = "not a JSON object ({detail})"
ESTIMATE_FILE_MISSING = "missing key(s) {keys}; an estimate file needs {required}"
ESTIMATE_FILE_UNKNOWN = "unknown key(s) {keys}; known: {known}"
ESTIMATE_FILE_DATE = "{key} must be an ISO date (YYYY-MM-DD): {value!r}"
ESTIMATE_FILE_WINDOW = "window_start {start} is after window_end {end}"


# --- backfill and spread pricing (workflows) ---------------------------------------------------


class BackfillRangeError(InputError):
    """A backfill asked for an empty date range or no workers."""


class SpreadRequestError(InputError):
    """A spread option that cannot be priced from the store as asked (nothing is priced)."""

    TEMPLATE = "{commodity}: {reason}"

    def __init__(self, commodity: str, reason: str) -> None:
        self.commodity = commodity
        self.reason = reason
        super().__init__(self.TEMPLATE.format(commodity=commodity, reason=reason))


SPREAD_NO_APPROVED = "no approved parameter set (fit and approve a run, or name one with --run)"
SPREAD_RUN_OTHER = "run {run_id} is {other}'s, not this commodity's"
SPREAD_RUN_FAILED = "run {run_id} failed and has no parameters"
SPREAD_NOT_QUOTED = "no futures settlement for delivery {delivery} on {day}"
SPREAD_ORDER = "the near delivery {near} must come before the far delivery {far}"
SPREAD_EXPIRY = "the expiry {expiry} must lie after {day} and not after the near delivery {near}"


# --- fit report, compare over stored runs, the demo (workflows) ------------------------------


class RunNotFittedError(InputError):
    """A run that failed has no fit to report or compare."""

    TEMPLATE = "run {run_id} failed ({reason}): it has no fit to report"

    def __init__(self, run_id: int, reason: str) -> None:
        self.run_id = run_id
        self.reason = reason
        super().__init__(self.TEMPLATE.format(run_id=run_id, reason=reason))


class BandOptionError(InputError):
    """A ``--band-*`` option that is not ``LO,HI`` with two finite numbers, ``LO <= HI``."""

    TEMPLATE = "{option} {value!r}: {reason} (give LO,HI, e.g. 0.8,1.25)"

    def __init__(self, option: str, value: str, reason: str) -> None:
        self.option = option
        self.value = value
        super().__init__(self.TEMPLATE.format(option=option, value=value, reason=reason))


class DemoDirectoryError(InputError):
    """The demo's directory holds a store the demo did not make; kept unless ``--fresh``."""

    TEMPLATE = (
        "{path} already exists and is not the demo's: pass --fresh to replace it, or choose "
        "another --dir"
    )

    def __init__(self, path: str) -> None:
        self.path = path
        super().__init__(self.TEMPLATE.format(path=path))


# --- serving: the pricers' client and the HTTP API ---------------------------------------------


class NoApprovedSetError(InputError):
    """A commodity that had no approved parameter set at the time asked for."""

    TEMPLATE = "{commodity}: no approved parameter set {when}"

    def __init__(self, commodity: str, when: str) -> None:
        self.commodity = commodity
        super().__init__(self.TEMPLATE.format(commodity=commodity, when=when))


class ApiTokenError(InputError):
    """An approval token for the HTTP API that cannot be used; the server does not start."""

    TEMPLATE = "approval token {source}: {reason}"
    MIN_LENGTH = 16

    def __init__(self, source: str, reason: str) -> None:
        self.source = source
        super().__init__(self.TEMPLATE.format(source=source, reason=reason))


# --- recut: the demo's folder ------------------------------------------------------------------


class DemoFolderError(InputError):
    """A ``calib demo --dir`` the demo did not make and that is not empty: nothing is written
    or deleted there."""

    TEMPLATE = (
        "{path} is not empty and has no {marker} (it was not made by calib demo): choose a new "
        "or empty --dir"
    )

    def __init__(self, path: str, marker: str) -> None:
        self.path = path
        super().__init__(self.TEMPLATE.format(path=path, marker=marker))
