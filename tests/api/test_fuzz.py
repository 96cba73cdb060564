"""Property-based fuzzing of the HTTP API from its own OpenAPI schema (schemathesis): every
operation, with data that fits the schema and data that does not, with and without the bearer
token, on both engines: no answer is a server error, and every refusal is one line.

Bounded and reproducible: a fixed number of examples per operation and generation mode,
derandomised (hypothesis derives its choices from the test itself), no example database.
"""

from __future__ import annotations

from typing import Any

import schemathesis
from hypothesis import HealthCheck, Phase, given, settings
from schemathesis import GenerationMode

from bench.serve_seed import candidate, commodity
from calib.api.app import create_app
from calib.settings import Settings
from calib.store.engine import Store
from calib.workflows.approve import approve
from tests.serving.test_api import HANG_SECONDS, TOKEN, serving

EXAMPLES = 10
"""Examples per operation, generation mode and token setting: the strategies draw the edge
values first (empty, huge, out of type, non-ASCII), so a few reach each kind; a few seconds
per engine."""


def _fuzz(base_url: str, operation: Any, mode: GenerationMode, headers: dict[str, str]) -> None:
    seen: list[str] = []

    @settings(
        max_examples=EXAMPLES,
        derandomize=True,
        database=None,
        deadline=None,
        phases=[Phase.explicit, Phase.generate],
        suppress_health_check=list(HealthCheck),
    )
    @given(case=operation.as_strategy(generation_mode=mode))
    def check(case: schemathesis.Case[Any]) -> None:
        answer = case.call(base_url=base_url, headers=headers, timeout=HANG_SECONDS)
        where = f"{case.method} {case.formatted_path} query={case.query!r}"
        assert answer.status_code < 500, f"{where}: {answer.status_code} {answer.text[:200]}"
        if answer.status_code >= 400 and answer.status_code != 405:
            detail = answer.json()["detail"]
            assert isinstance(detail, str) and "\n" not in detail, (where, detail)
        seen.append(where)

    check()
    assert seen, f"no request sent for {operation.label}"


def test_no_request_from_the_schema_is_a_server_error(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    approve(store.sessions, candidate(store, cid, eid, 1), by="risk", note="first")
    for n in (2, 3):
        candidate(store, cid, eid, n)
    with serving(create_app(Settings(db_url=db_url), token=TOKEN)) as http:
        base_url = str(http.base_url).rstrip("/")
        schema = schemathesis.openapi.from_dict(http.get("/openapi.json").json())
        operations = [result.ok() for result in schema.get_all_operations()]  # type: ignore[union-attr]
        assert {op.label for op in operations} >= {
            "GET /v1/commodities/{commodity}/latest",
            "GET /v1/runs/{run_id}",
            "POST /v1/runs/{run_id}/approve",
        }
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            for operation in operations:
                _fuzz(base_url, operation, mode, {"Authorization": f"Bearer {TOKEN}"})
                if operation.method.upper() == "POST":  # the reads do not look at the token
                    _fuzz(base_url, operation, mode, {})
