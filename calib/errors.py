"""Every error and warning calib raises, with their message templates.

User mistakes (bad files, bad settings, unknown names) are :class:`InputError` subclasses and
are printed by the CLI as one clear line, never as a traceback. Numerical failures name the
cause. Tests match on the messages with ``pytest.raises(..., match=...)``.

An error with a message template subclasses :class:`TemplatedError`, names its template in
the class statement and lists its fields::

    class UnknownRunError(TemplatedError, InputError, template="no calibration run {run_id}"):
        # docstring, then the fields
        run_id: int

It is a dataclass: its fields are its constructor's arguments (in order) and its attributes,
and its message is the template filled with them. A class whose message needs a field worked
out first overrides :meth:`TemplatedError.fill`.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any, ClassVar, dataclass_transform


class CalibError(Exception):
    """Base of every calib error."""


class CalibWarning(UserWarning):
    """Base of every calib warning."""


@dataclass_transform(eq_default=False)
@dataclass(eq=False, repr=False)
class TemplatedError(Exception):
    """Mixin: the message is ``TEMPLATE`` formatted with the dataclass fields (see the module).

    A subclass names its template in its class statement (``template="..."``, else it keeps
    its parent's) and lists its fields; it is made a dataclass (``eq=False, repr=False``) as it
    is defined, so its constructor takes the fields in order.
    """

    TEMPLATE: ClassVar[str] = ""

    def __init_subclass__(cls, template: str | None = None, **kwargs: Any) -> None:
        super().__init_subclass__(**kwargs)
        if template is not None:
            cls.TEMPLATE = template
        dataclass(eq=False, repr=False)(cls)

    def fill(self) -> dict[str, Any]:
        """The values ``TEMPLATE`` is formatted with; by default the fields as given."""
        return {f.name: getattr(self, f.name) for f in fields(self)}

    def __post_init__(self) -> None:
        Exception.__init__(self, self.TEMPLATE.format(**self.fill()))

    def __reduce__(self) -> tuple[Any, ...]:
        # rebuilt from the fields (e.g. across a worker process), not from the message
        return (type(self), tuple(getattr(self, f.name) for f in fields(self)))


# --- user input -------------------------------------------------------------------------------


class InputError(CalibError):
    """A user mistake: bad file, bad option, bad value. Printed without a traceback."""


class ParameterError(
    TemplatedError, InputError, ValueError, template="{name} = {value!r} is invalid: {reason}"
):
    """A parameter value outside its domain (e.g. ``kappa <= 0``)."""

    name: str
    value: object
    reason: str


class ImpliedVolError(
    TemplatedError,
    InputError,
    ValueError,
    template="no implied volatility for premium {premium!r}: {reason}",
):
    """A premium from which no implied volatility exists (outside the no-arbitrage bounds)."""

    premium: float
    reason: str


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


class QuoteError(
    TemplatedError, InputError, ValueError, template="option quotes: {field} {reason}"
):
    """Option quotes that cannot be used as given (shapes, signs, missing fields)."""

    field: str
    reason: str


class TooFewQuotesError(
    TemplatedError,
    InputError,
    template=(
        "only {usable} usable option quote(s) of {total}, {mode} mode needs at least {needed}"
        "{dropped}"
    ),
):
    """Fewer usable quotes than the calibration mode has free parameters."""

    usable: int
    total: int
    mode: str
    needed: int
    dropped: dict[str, int]

    def fill(self) -> dict[str, Any]:
        why = ", ".join(f"{r} ({k})" for r, k in sorted(self.dropped.items()))
        return {**super().fill(), "dropped": f"; dropped: {why}" if self.dropped else ""}


class InfeasibleSettingsError(
    TemplatedError, InputError, template="calibration constraints conflict: {conflict}"
):
    """Constraints that no parameter set can meet together; says which and by how much."""

    conflict: str
    shortfall: float


class CalibrationShapeError(
    TemplatedError,
    InputError,
    ValueError,
    template="calibrator built for {built}, these quotes need {needed}",
):
    """Quotes that do not fit the shape a re-usable calibrator was built for."""

    built: str
    needed: str


class CalibrationSolverError(
    TemplatedError, CalibError, template="solver {solver} returned {status}: {cause}"
):
    """The conic solver failed or returned no usable solution; names the solver and status."""

    solver: str
    status: str
    cause: str


class CalibrationInaccurateWarning(CalibWarning):
    """The solver stopped short of its tolerances; the result carries the flag too."""

    TEMPLATE = "solver {solver} returned {status} at Gauss-Newton iteration {iteration}"


class CalibrationNotConvergedWarning(CalibWarning):
    """Gauss-Newton steps stopped at the iteration limit; the result carries the flag too."""

    TEMPLATE = "Gauss-Newton did not converge in {iterations} iterations (last step {step:.3g})"


# --- quote store and ingestion ----------------------------------------------------------------


class StoreURLError(
    TemplatedError, InputError, template="database URL {url!r} is not usable: {reason}"
):
    """A database URL calib cannot use."""

    url: str
    reason: str


class StoreNotInitialisedError(
    TemplatedError,
    InputError,
    template="database {url} has no calib schema: run `calib init` first",
):
    """The database holds no calib schema yet."""

    url: str


class StoreOutdatedError(
    TemplatedError,
    InputError,
    template=(
        "database schema is at revision {found}, this program needs {head}: run `calib init`"
    ),
):
    """The database is at an older schema revision than this program."""

    found: str
    head: str


class SchemaTooNewError(
    TemplatedError,
    InputError,
    template=(
        "database schema is at revision {found}, unknown to this program (newest known: {head});"
        " it was written by a newer calib: upgrade calib, the database was not changed"
    ),
):
    """The database was migrated by a newer calib; this program refuses to touch it."""

    found: str
    head: str


class FileError(TemplatedError, InputError, template="{file}: {reason}"):
    """A file refused as a whole, nothing stored from it: ``{file}: {reason}``."""

    file: str
    reason: str


class IngestFileError(FileError):
    """A file refused as a whole (unreadable, wrong columns, unknown commodity); nothing stored."""


class UnknownCommodityError(TemplatedError, InputError, template="unknown commodity {codes}{hint}"):
    """A commodity code that is not registered."""

    codes: list[str]
    hint: str = ""

    def fill(self) -> dict[str, Any]:
        return {**super().fill(), "codes": ", ".join(map(repr, self.codes))}


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
ROW_VOL_RANGE = "implied volatility must be in (0, {high:g}]: {value!r}"
ROW_RATE_RANGE = "zero rate must be within +-{limit:g} (a decimal, not percent): {value!r}"
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


class StoreUnavailableError(TemplatedError, CalibError, template="database {url}: {detail}"):
    """The database cannot be reached or used (server down, file locked, disk full)."""

    url: str
    detail: str


# --- estimation (Kalman-filter maximum likelihood) ---------------------------------------------


class EstimationDataError(InputError, ValueError):
    """Curves the estimator cannot use; the message names the offending day, slot or size."""


class CurveShapeError(TemplatedError, EstimationDataError, template="curves: {reason}"):
    """Inputs of inconsistent shapes, or dates that do not increase."""

    reason: str


class TooFewDaysError(
    TemplatedError,
    EstimationDataError,
    template="need at least {minimum} observation days, got {count}",
):
    """Fewer observation days than the estimate needs."""

    count: int
    minimum: int


class TooFewContractsError(
    TemplatedError,
    EstimationDataError,
    template="need at least {minimum} contracts per day, got {count}",
):
    """Fewer contract slots than the estimate needs."""

    count: int
    minimum: int


class EmptySlotError(
    TemplatedError, EstimationDataError, template="contract slot {slot} has no price on any day"
):
    """A contract slot without a single price: its noise cannot be estimated."""

    slot: int


class BadPriceError(
    TemplatedError,
    EstimationDataError,
    template="{what} {value!r} on day {day} ({date}), slot {slot}: {reason}",
):
    """A price that is not a positive finite number, or a maturity that is not ahead."""

    what: str
    value: float
    day: int
    date: object
    slot: int
    reason: str


class FirstCurveError(
    TemplatedError,
    EstimationDataError,
    template=("the first day ({date}) needs at least two prices of distinct maturity, got {count}"),
):
    """The first day cannot start the filter (it needs two prices of distinct maturity)."""

    date: object
    count: int


class CurveGapError(
    TemplatedError,
    EstimationDataError,
    template=(
        "gap of {days:g} days between {start} and {end} exceeds the maximum of {maximum:g} days"
    ),
):
    """Consecutive observation days further apart than the filter is allowed to bridge."""

    days: float
    start: object
    end: object
    maximum: float


class QuoteTableError(TemplatedError, EstimationDataError, template="futures table: {reason}"):
    """A long futures table that cannot be turned into curves (duplicates, bad columns)."""

    reason: str


class EstimationError(TemplatedError, CalibError, template="maximum likelihood failed: {reason}"):
    """Maximum likelihood failed outright (no start gave a finite likelihood)."""

    reason: str


class EstimationWarning(CalibWarning):
    """The estimate did not converge, or its Hessian gives no standard errors; see the result."""


# --- fit reports and compare over time (workflows) --------------------------------------------


class ReportInputError(
    TemplatedError, InputError, ValueError, template="cannot build the {what}: {reason}"
):
    """Report or compare inputs that do not hang together (lengths, empty series)."""

    what: str
    reason: str


# --- estimates, calibration runs and approvals (storage and workflows) -------------------------


class UnknownRunError(TemplatedError, InputError, template="no calibration run {run_id}"):
    """A calibration run id that is not stored."""

    run_id: int


class UnknownEstimateError(
    TemplatedError, InputError, template="no historical estimate {estimate_id}{detail}"
):
    """A historical estimate id that is not stored, or belongs to another commodity."""

    estimate_id: int
    detail: str = ""


class NoEstimateError(
    TemplatedError,
    InputError,
    template=(
        "no converged historical estimate for {commodity}{unconverged}: run `calib estimate` or "
        "`calib estimates import`, or name one with --estimate"
    ),
):
    """No converged historical estimate to hold the slow parameters at."""

    commodity: str
    unconverged: list[int]

    def fill(self) -> dict[str, Any]:
        ids = ", ".join(map(str, self.unconverged))
        return {**super().fill(), "unconverged": f" (not converged: {ids})" if ids else ""}


class NotConvergedEstimateError(
    TemplatedError,
    InputError,
    template=("historical estimate {estimate_id} did not converge ({message}); it is not used"),
):
    """An estimate named explicitly that did not converge (never used silently)."""

    estimate_id: int
    message: str


class IllegalTransitionError(
    TemplatedError,
    InputError,
    template=("run {run_id} is {current}: it cannot become {wanted} (allowed: {allowed})"),
):
    """A status change the run's state machine does not allow."""

    run_id: int
    current: str
    wanted: str
    allowed: list[str]

    def fill(self) -> dict[str, Any]:
        allowed = ", ".join(self.allowed) if self.allowed else "none, it is final"
        return {**super().fill(), "allowed": allowed}


class EstimateFileError(FileError):
    """An estimate file that cannot be imported; nothing is stored."""


class SettingsFileError(FileError):
    """A settings file (TOML) that cannot be read or holds a bad value."""


class NoQuotesError(TemplatedError, InputError, template="{commodity}: {what}"):
    """Nothing stored to fit or estimate from (no run is stored)."""

    commodity: str
    what: str


class InputsChangedError(
    TemplatedError,
    CalibError,
    template="run {run_id}: its stored inputs cannot be rebuilt: {reason}",
):
    """Rows a stored run was made from are no longer in the store as recorded."""

    run_id: int
    reason: str


ESTIMATE_FILE_NOT_JSON = "not a JSON object ({detail})"
ESTIMATE_FILE_MISSING = "missing key(s) {keys}; an estimate file needs {required}"
ESTIMATE_FILE_UNKNOWN = "unknown key(s) {keys}; known: {known}"
ESTIMATE_FILE_DATE = "{key} must be an ISO date (YYYY-MM-DD): {value!r}"
ESTIMATE_FILE_WINDOW = "window_start {start} is after window_end {end}"


# --- backfill and spread pricing (workflows) ---------------------------------------------------


class BackfillRangeError(InputError):
    """A backfill asked for an empty date range or no workers."""


class SpreadRequestError(TemplatedError, InputError, template="{commodity}: {reason}"):
    """A spread option that cannot be priced from the store as asked (nothing is priced)."""

    commodity: str
    reason: str


SPREAD_NO_APPROVED = "no approved parameter set (fit and approve a run, or name one with --run)"
SPREAD_RUN_OTHER = "run {run_id} is {other}'s, not this commodity's"
SPREAD_RUN_FAILED = "run {run_id} failed and has no parameters"
SPREAD_NOT_QUOTED = "no futures settlement for delivery {delivery} on {day}"
SPREAD_ORDER = "the near delivery {near} must come before the far delivery {far}"
SPREAD_EXPIRY = "the expiry {expiry} must lie after {day} and not after the near delivery {near}"


# --- fit report, compare over stored runs, the demo (workflows) ------------------------------


class RunNotFittedError(
    TemplatedError, InputError, template="run {run_id} failed ({reason}): it has no fit to report"
):
    """A run that failed has no fit to report or compare."""

    run_id: int
    reason: str


class BandOptionError(
    TemplatedError, InputError, template="{option} {value!r}: {reason} (give LO,HI, e.g. 0.8,1.25)"
):
    """A ``--band-*`` option that is not ``LO,HI`` with two finite numbers, ``LO <= HI``."""

    option: str
    value: str
    reason: str


# --- serving: the pricers' client and the HTTP API ---------------------------------------------


class NoApprovedSetError(
    TemplatedError, InputError, template="{commodity}: no approved parameter set {when}"
):
    """A commodity that had no approved parameter set at the time asked for."""

    commodity: str
    when: str


class ApiTokenError(TemplatedError, InputError, template="approval token {source}: {reason}"):
    """An approval token for the HTTP API that cannot be used; the server does not start."""

    MIN_LENGTH: ClassVar[int] = 16
    source: str
    reason: str


# --- the as_of moment (CLI and HTTP API) -------------------------------------------------------


class AsOfError(TemplatedError, InputError, ValueError, template="as of {value!r}: {reason}"):
    """An ``as_of`` that is not a wall-clock time calib reads (:mod:`calib.as_of`)."""

    value: str
    reason: str


# --- rolling estimates, stability and price uncertainty (issue 15) -----------------------------


class PeriodError(
    TemplatedError,
    InputError,
    template=(
        "{option} {text!r}: expected a positive whole number and a unit y, m, w or d (2y, 1m)"
    ),
):
    """A window length or step that is not a whole number of years, months, weeks or days."""

    option: str
    text: str


class RollingRequestError(TemplatedError, InputError, template="{commodity}: {reason}"):
    """A rolling re-estimation or stability request that cannot be served as asked."""

    commodity: str
    reason: str


ROLLING_NO_WINDOWS = "no window end between {first} and {last} (--from after --to?)"
ROLLING_ONLY_WITH = "{option} needs --rolling"
STABILITY_NO_SERIES = (
    "no rolling series stored (make one: calib estimate {commodity} --rolling ...)"
)
STABILITY_UNKNOWN_SERIES = "no rolling series {series_id} of this commodity"
STABILITY_EMPTY = "rolling series {series_id} holds no estimate yet"
UNCERTAINTY_NO_COVARIANCE = (
    "estimate {estimate_id} has no stored covariance (imported, or made before covariances "
    "were kept): re-estimate it to price its uncertainty"
)


class VanillaRequestError(SpreadRequestError):
    """A vanilla option that cannot be priced from the store as asked (nothing is priced)."""


VANILLA_EXPIRY = "the expiry {expiry} must lie after {day} and not after the delivery {future}"
VANILLA_STRIKE = "the strike must be a positive number, got {strike}"


# --- hedge studies (calib.hedge, workflows.hedge): block kept together for merges ----------------


class HedgeRequestError(InputError):
    """A hedge study that cannot run as asked (nothing is simulated or replayed)."""

    TEMPLATE = "{commodity}: {reason}"

    def __init__(self, commodity: str, reason: str) -> None:
        self.commodity = commodity
        self.reason = reason
        super().__init__(self.TEMPLATE.format(commodity=commodity, reason=reason))


HEDGE_OPTION_LEGS = (
    "name the option's futures: --future D for a vanilla, or --near D1 --far D2 for a spread"
)
HEDGE_NO_SET = "no approved parameter set {when} (fit and approve a run, or name one with --run)"
HEDGE_WORLD_FILE = "world file {path}: {reason}"
HEDGE_WORLD_RUN = "world run {run_id} has no parameters (it failed)"
HEDGE_STEPS = "--steps-per-year must be >= 1 and --paths >= 2 (got {steps} and {paths})"
HEDGE_REPLAY_START = "cannot sell on {day}: {reason}"
HEDGE_REPLAY_END = "the option expires on {expiry}, after the last stored settlement ({last})"
HEDGE_REPLAY_SETS = 'sets must be "in-force" or "by-trade-date", not {value!r}'
HEDGE_MORNING = "--morning must be a time HH:MM (UTC), not {value!r}"


# --- American options on futures (numeric core) ---------------------------------------------

AMERICAN_IMPLIED_VOL_REASONS: dict[str, str] = {
    "BELOW_INTRINSIC": (
        "the premium is below the undiscounted intrinsic value (an American option can be "
        "exercised now)"
    ),
    "ABOVE_UPPER_BOUND": (
        "the premium is at or above its upper bound (the futures price for a call, the strike "
        "for a put)"
    ),
    "NON_POSITIVE_INPUT": IMPLIED_VOL_REASONS["NON_POSITIVE_INPUT"],
    "NO_TIME_VALUE": (
        "the premium equals the undiscounted intrinsic value, which every volatility up to the "
        "one at which immediate exercise stops being optimal reproduces"
    ),
    "NON_FINITE_INPUT": IMPLIED_VOL_REASONS["NON_FINITE_INPUT"],
}
"""Reason phrases of :class:`ImpliedVolError` for American premiums, keyed like Black-76's."""


# --- quote files: limits, plausibility, store text limits (ingest) -----------------------------

FILE_TOO_MANY_COLUMNS = "the header has {found} columns; at most {limit} are read"
FILE_HEADER_TOO_LONG = (
    "the header line is longer than {limit} bytes; at most {columns} columns are read"
)
FILE_NO_ROWS = "no rows after the header"
NOTE_NO_CURVE = (
    "no zero curve stored for {count} trade date(s) ({days}): premiums checked with r = 0;"
    " ingest a day's rates before its options"
)
HINT_KNOWN = " (known: {known})"
ROW_NUL = "contains a NUL character"
ROW_LINE_TOO_LONG = "line of {found} characters; at most {limit} are read"
ROW_UNBALANCED_QUOTE = "unbalanced quote: {count} quote character(s) on the line"
ROW_BEYOND_HORIZON = "{value} is more than {years} years after the trade date {trade_date}"
ROW_PRICE_RANGE = "must be within {low:g}..{high:g}: {value!r}"
ROW_TOO_HIGH = "must be at most {high:g}: {value!r}"
ROW_VOL_LOW = "implied volatility below {low:g}: {value!r}"
ROW_STRIKE_RATIO = (
    "strike {strike:.10g} is beyond x{limit:g} of the future's settlement {forward:.10g}"
)
ROW_PREMIUM_TINY = "premium {premium:.10g} is below {ratio:g} of max(F, K)"
ROW_UNKNOWN_COMMODITY = "unknown commodity {value!r}; known: {known}"
ROW_DAY_MOVE = (
    "{name} {value:.10g} is x{ratio:.4g} the previous {previous:.10g} of {day},"
    " beyond the day-on-day band (x{limit:g} either way)"
)


class TextTooLongError(
    TemplatedError,
    InputError,
    template="{what} is {found} characters long; at most {limit} are stored",
):
    """A text value longer than the store keeps (the same limit on every engine)."""

    what: str
    found: int
    limit: int


# --- calibration: robustness (the fit's own block) -----------------------------------------------


class CalibrationNumericalError(
    TemplatedError, CalibError, template="calibration failed numerically: {reason}"
):
    """A numerical failure inside a fit (overflow, division by zero, a singular system)."""

    reason: str


class CalibrationNotIdentifiedWarning(CalibWarning):
    """The quotes do not identify a fitted parameter; the result carries the flag too."""

    TEMPLATE = "the quotes do not identify {what}: {reason}"


CALIBRATION_ERRORS: tuple[type[CalibError], ...] = (
    TooFewQuotesError,
    InfeasibleSettingsError,
    QuoteError,
    CalibrationSolverError,
    CalibrationNumericalError,
)
"""What a fit raises for a day it cannot fit: each is stored as a rejected run with its reason."""


# --- the demo's folder (issue 19) --------------------------------------------------------------


class DemoFolderError(
    TemplatedError,
    InputError,
    template=(
        "{path} is not empty and has no {marker} (it was not made by calib demo): choose a new "
        "or empty --dir"
    ),
):
    """A ``calib demo --dir`` the demo did not make and that is not empty: nothing is written
    or deleted there."""

    path: str
    marker: str


# --- computing on a cluster (task dask) --------------------------------------------------------


class ClusterError(TemplatedError, InputError, template="--cluster {address}: {detail}"):
    """The Dask cluster named with ``--cluster`` cannot be used: dask not installed, a
    malformed address, no answer in time, or an option that does not go with it."""

    address: str
    detail: str


class CommoditySelectionError(TemplatedError, InputError, template="{reason}"):
    """A command over several commodities was given none, or both names and ``--all``."""

    reason: str


# --- study runs and policy comparisons (hedge2) --------------------------------------------------


class StudyRunError(
    TemplatedError,
    InputError,
    template=(
        "run {run_id} belongs to the policy study {study!r}: study runs are never approved or "
        "served"
    ),
):
    """A run of a policy study asked to be approved or served: study runs never are."""

    run_id: int
    study: str


# --- American-style quotes (amfit) -------------------------------------------------------------

ROW_NOT_EXERCISE = "exercise must be european or american (or empty): {value!r}"
ROW_BELOW_INTRINSIC_AMERICAN = (
    "premium {premium:.10g} of an American option is below the undiscounted intrinsic value "
    "{bound:.10g} (it can be exercised now; F={forward:.10g})"
)
ROW_ABOVE_BOUND_AMERICAN = (
    "premium {premium:.10g} of an American option is above the no-arbitrage bound {bound:.10g}"
    " ({what}, undiscounted)"
)
