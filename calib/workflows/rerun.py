"""Re-running a stored run: fit it again from its stored inputs and settings, compare."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from calib.errors import InputsChangedError
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.policy.settings import RunSettings
from calib.store.runs import RunRecord, require_run
from calib.workflows.fit import attempt_fit, fitted_inputs
from calib.workflows.provenance import code_version, inputs_sha256


@dataclass(frozen=True, slots=True)
class Rerun:
    """A stored run fitted again from its stored inputs and settings."""

    run: RunRecord
    params: TwoFactorParams | None
    failure: str | None
    identical: bool
    """Parameters (and outcome) bit for bit equal to the stored run's."""
    differences: dict[str, float]
    """Per parameter that differs: new minus stored."""

    def to_dict(self) -> dict[str, Any]:
        return {
            "run_id": self.run.run_id,
            "identical": self.identical,
            "stored": None if self.run.params is None else self.run.params.to_dict(),
            "rerun": None if self.params is None else self.params.to_dict(),
            "failure": self.failure,
            "differences": self.differences,
            "code_version_stored": self.run.code_version,
            "code_version_now": code_version(),
        }


def rerun(sessions: sessionmaker[Session], run_id: int) -> Rerun:
    """Refit a run from the exact quote rows it used (by id) and its stored settings.

    Raises
    ------
    UnknownRunError
    InputsChangedError
        A stored row is missing, or the ids no longer hash to the stored ``inputs_sha256``.
    """
    with sessions.begin() as session:
        run = require_run(session=session, run_id=run_id)
        if inputs_sha256(dict(run.inputs)) != run.inputs_sha256:
            raise InputsChangedError(run_id, "the stored ids do not match their stored hash")
        ids = run.inputs
        estimate, day = fitted_inputs(session, run)
    for what, key in (
        ("futures", "futures_rows"),
        ("options", "option_rows"),
        ("rates", "rate_rows"),
    ):
        found = len(getattr(day, what))
        if found != len(ids[key]):
            raise InputsChangedError(run_id, f"{len(ids[key]) - found} {what} row(s) are missing")
    settings = RunSettings.from_dict(run.settings)
    attempt = attempt_fit(day, estimate.params, settings.calibration)
    new = None if attempt.result is None else attempt.result.params
    differences: dict[str, float] = {}
    if new is not None and run.params is not None:
        for n in PARAM_NAMES:
            if getattr(new, n) != getattr(run.params, n):
                differences[n] = getattr(new, n) - getattr(run.params, n)
    identical = (new is None) == (run.params is None) and not differences
    return Rerun(run, new, attempt.failure, identical, differences)
