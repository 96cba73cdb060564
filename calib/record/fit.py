"""The stored-fit contract: what a calibration run keeps of its fit, in one frozen record.

A fitted run stores a :class:`FitRecord`: the parameter set, the forward buckets, the fit
quality and solve, every constraint's report, the quotes left out and the gates. It is
written by the morning run and the backfill, and read back as the same type by the show and
report commands, pricing, the pricers' client, the HTTP API and the rerun check. Its JSON is
:func:`calib.record.codec.encode` of the record; :func:`fit_from_json` reads it back, including
the layout stored before :data:`SCHEMA_VERSION` 2 (no ``schema_version`` key).

Adding a field: give it a default here (old rows decode to the default) and set it where the
record is built (:func:`calib.workflows.fit.fit_record`). The HTTP schema is derived from this
module's types (:mod:`calib.api.schemas`), so it follows.

Stored layout (version 2): the seven parameters are columns of ``calibration_runs``, the
buckets the ``buckets`` column, and every other field (with ``schema_version``) the
``diagnostics`` column. Version 1 (no ``schema_version``) stored the same keys plus the
derived ``binding`` and ``all_gates_pass``, which are recomputed now.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from calib.model.params import TwoFactorParams
from calib.record.codec import Encoded, decode, encode

SCHEMA_VERSION = 2
"""Version of the stored layout (1: before the record existed, no ``schema_version`` key)."""

COLUMN_KEYS = ("params", "buckets")
"""Fields stored in their own columns rather than in the ``diagnostics`` JSON."""

DERIVED_KEYS = ("binding", "all_gates_pass")
"""Keys shown in a run's JSON that are computed from the record, not stored."""


@dataclass(frozen=True, slots=True)
class BucketVols:
    """Volatilities in force over calendar years ``[start, end)`` (forward mode: one per bucket).

    ``std_errors``: standard errors of ``(sigma_spot, sigma_yield, rho)`` at the fit (``inf``
    where the quotes do not identify the parameter, 0 where a constraint holds it);
    ``yield_set_by``: ``"quotes"`` when the quotes set ``sigma_yield``, ``"anchor"`` when it
    only follows the anchor, ``"none"`` when neither does (see
    :mod:`calib.calibrate.uncertainty`). ``None`` where not computed (a stored earlier run).
    Stored as JSON, an infinite standard error reads back as NaN (JSON has neither).
    """

    start: float
    end: float
    params: TwoFactorParams
    std_errors: tuple[float, float, float] | None = None
    yield_set_by: str | None = None


@dataclass(frozen=True, slots=True)
class ConstraintReport(Encoded):
    """One constraint at the solution.

    Attributes
    ----------
    name : the family (:mod:`calib.calibrate.constraints`): ``psd`` (``|rho| <= 1``),
        ``decay_bound``, ``yield_floor``, ``sigma_spot_cap``, ``held_rho``, and the held
        scan's ranges ``spot_limit`` and ``ratio_limit``.
    form : the constraint in words and symbols.
    bucket : forward-mode bucket index, ``None`` for a constant fit.
    slack : distance to the boundary in natural units (>= 0 when met): ``1 - |rho|``,
        ``rho kappa s1 - s2``, ``s2 - q s2_hist``, ``cap - s1``, ``10 - s1``,
        ``max_vol_ratio s1 - s2``; ``None`` for ``held_rho``.
    binds : whether the constraint is active (slack within ``max(1e-7, tolerance)``, or rho
        held).
    dual : the multiplier of the final convex sub-problem (objective per unit of the
        constraint in variance terms), ``None`` where the mode has no conic solve.
    refit_cost : objective saved by re-fitting without this constraint (in every bucket);
        ``None`` when not computed (see ``refit_note``).
    tolerance : the slack's resolution at the solver's stated precision: the constraint is
        met when ``slack >= -tolerance``.
    refit_note : why ``refit_cost`` is ``None`` for a binding constraint (no switch, or the
        re-fit cannot run, with its reason); ``None`` otherwise.
    """

    name: str
    form: str
    bucket: int | None
    slack: float | None
    binds: bool
    dual: float | None
    refit_cost: float | None
    tolerance: float = 0.0
    refit_note: str | None = None

    @property
    def met(self) -> bool:
        """Whether the constraint holds within its tolerance."""
        return self.slack is None or self.slack >= -self.tolerance

    @property
    def label(self) -> str:
        """Its name, with ``@k`` for forward-mode bucket ``k``."""
        return self.name if self.bucket is None else f"{self.name}@{self.bucket}"


@dataclass(frozen=True, slots=True)
class Gate(Encoded):
    """One gate's verdict: its value, its limit and whether it passed."""

    name: str
    value: float | str | None
    limit: float | str | None
    passed: bool
    detail: str


@dataclass(frozen=True, slots=True)
class Dropped:
    """A stored quote the fit left out (``quote_id``: its ``option_quotes`` id), and why."""

    quote_id: int
    reason: str


@dataclass(frozen=True, slots=True)
class FitRecord:
    """What a fitted run stores (read-only); see the module notes.

    Attributes
    ----------
    params : the parameter set (forward mode: the front bucket's volatilities).
    buckets : volatilities per calendar bucket, years from the trade date.
    rmse, max_error : unweighted errors in ``error_measure`` (``price``: currency; ``vol``:
        decimal volatility).
    objective, fit : the minimised objective and its fit term.
    solver, status, iterations, converged, flags : how the final solve ended; ``flags``
        lists every caution (``inaccurate``, ``not_converged``).
    warnings : the calibration's warnings, one line each.
    n_quotes : quotes fitted.
    constraints : every constraint's report at the solution.
    dropped : quotes left out by the filters.
    gates : the gate verdicts against the approved set in force when the run was written.
    inaccurate_steps, solver_precision, anchor_penalty, anchor_fit_cost, not_identified,
        not_identified_reason, residual_variance : as
        :class:`~calib.calibrate.CalibrationResult` has them (defaults for runs stored before).
    """

    params: TwoFactorParams
    buckets: tuple[BucketVols, ...]
    rmse: float
    max_error: float
    error_measure: str
    objective: float
    fit: float
    solver: str
    status: str
    iterations: int
    converged: bool
    flags: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    n_quotes: int = 0
    constraints: tuple[ConstraintReport, ...] = ()
    dropped: tuple[Dropped, ...] = ()
    gates: tuple[Gate, ...] = ()
    inaccurate_steps: int = 0
    solver_precision: float = 0.0
    anchor_penalty: float = 0.0
    anchor_fit_cost: float | None = None
    not_identified: tuple[str, ...] = ()
    not_identified_reason: str = ""
    residual_variance: float | None = None
    schema_version: int = SCHEMA_VERSION

    @property
    def binding(self) -> tuple[str, ...]:
        """Labels of the binding constraints (:attr:`ConstraintReport.label`)."""
        return tuple(c.label for c in self.constraints if c.binds)

    @property
    def all_gates_pass(self) -> bool:
        return all(g.passed for g in self.gates)

    def to_dict(self) -> dict[str, Any]:
        """The record's JSON with the derived keys (``binding``, ``all_gates_pass``)."""
        out: dict[str, Any] = encode(self)
        out["binding"] = list(self.binding)
        out["all_gates_pass"] = self.all_gates_pass
        return out


def fit_from_json(data: Mapping[str, Any]) -> FitRecord:
    """The record stored as ``data`` (this version's layout or version 1's)."""
    return decode(FitRecord, {k: v for k, v in data.items() if k not in DERIVED_KEYS})


def fit_to_columns(record: FitRecord) -> tuple[TwoFactorParams, list[Any], dict[str, Any]]:
    """How a run row holds ``record``: parameters, the ``buckets`` and ``diagnostics`` JSON."""
    data: dict[str, Any] = encode(record)
    buckets = data.pop("buckets")
    del data["params"]
    return record.params, buckets, data


def fit_from_columns(
    params: TwoFactorParams, buckets: list[Any] | None, diagnostics: Mapping[str, Any]
) -> FitRecord:
    """Inverse of :func:`fit_to_columns` (reads version 1 rows too)."""
    return fit_from_json({**diagnostics, "params": encode(params), "buckets": buckets or []})
