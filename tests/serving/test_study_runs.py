"""Study runs (the fits of a calibration policy compared by ``calib hedge policies``) are never
approved or served: refused by approve (workflow, CLI, HTTP), invisible to the set in force
(CLI latest, client, HTTP API), marked in ``calib runs``. SQLite and PostgreSQL."""

from __future__ import annotations

from collections.abc import Callable

import pytest
from sqlalchemy import insert

from bench.serve_seed import CODE, PARAMS, T0, candidate, commodity, seeded_fit
from calib.api.app import create_app
from calib.client import Client
from calib.errors import NoApprovedSetError, StudyRunError
from calib.settings import Settings
from calib.store.engine import Store
from calib.store.run_models import RunEvent
from calib.store.runs import add_run, append_event, latest_approved, study_baseline
from calib.workflows.approve import approve
from tests.cli.test_store_cmds import run
from tests.serving.test_api import LATEST, TOKEN, serving


def study_candidate(store: Store, cid: int, eid: int, study: str) -> int:
    """A fitted candidate run of ``study`` (fitted on 2031-01-20, after every production run)."""
    with store.sessions.begin() as s:
        run_id = add_run(
            session=s,
            commodity_id=cid,
            trade_date=T0.date().replace(day=20),
            created_at=T0,
            created_by="tester",
            estimate_id=eid,
            mode="constant",
            settings={"study": study},
            inputs={"option_rows": []},
            inputs_sha256="1" * 64,
            failure_reason=None,
            fit=seeded_fit(PARAMS.with_vols(0.5, 0.2, 0.7)),
            code_version="test",
            study=study,
        )
        append_event(session=s, run_id=run_id, to_status="candidate", by="tester", note="fit")
    return run_id


Cli = Callable[..., tuple[int, str, str]]


@pytest.fixture
def cli(capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> Cli:
    """``calib ARGS...`` in this process: exit code, stdout, stderr."""
    return lambda *args: run(capsys, monkeypatch, *args)


def test_approve_refuses_a_study_run(store: Store, db_url: str, cli: Cli) -> None:
    cid, eid = commodity(store)
    served = candidate(store, cid, eid, 1)
    approve(store.sessions, served, by="risk", note="ok")
    study = study_candidate(store, cid, eid, "free")
    with pytest.raises(StudyRunError, match=f"run {study} belongs to the policy study 'free'"):
        approve(store.sessions, study, by="risk", note="no")
    args = ["approve", str(study), "--by", "risk", "--note", "x", "--db", db_url]
    code, _, err = cli(*args)
    assert code == 2 and err.count("\n") == 1 and "study runs are never approved" in err
    with Client(db_url) as client:
        assert client.latest(CODE).run_id == served  # nothing changed
    with serving(create_app(Settings(db_url=db_url), token=TOKEN)) as http:
        auth = {"Authorization": f"Bearer {TOKEN}"}
        refused = http.post(
            f"/v1/runs/{study}/approve", json={"by": "risk", "note": "x"}, headers=auth
        )
        assert refused.status_code == 404 and "policy study 'free'" in refused.json()["detail"]
        assert http.get(LATEST).json()["run_id"] == served


def test_a_study_run_is_never_served(store: Store, db_url: str, cli: Cli) -> None:
    cid, eid = commodity(store)
    study = study_candidate(store, cid, eid, "held")
    # an approved event written around the workflow (the store's own check refuses it): the
    # in-force statement must still never return the run
    with store.sessions.begin() as s:
        s.execute(
            insert(RunEvent).values(
                run_id=study, commodity_id=cid, to_status="approved", at=T0, by="x", note="forced"
            )
        )
    with store.sessions.begin() as s:
        assert latest_approved(session=s, commodity=CODE) is None
        found = study_baseline(session=s, commodity_id=cid, study="held", before=T0.date())
        assert found is None  # fitted on the 20th, not before the 6th
    with Client(db_url) as client:
        with pytest.raises(NoApprovedSetError):
            client.latest(CODE)
        with pytest.raises(StudyRunError):
            client.run(study)
    code, _, err = cli("latest", CODE, "--db", db_url)
    assert code != 0 and "no approved parameter set" in err
    code, out, _ = cli("runs", CODE, "--db", db_url)
    assert code == 0 and "(study held)" in out
    with serving(create_app(Settings(db_url=db_url))) as http:
        assert http.get(LATEST).status_code == 404
        answer = http.get(f"/v1/runs/{study}")
        assert answer.status_code == 404
        assert answer.json()["detail"].endswith("study runs are never approved or served")
