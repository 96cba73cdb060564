"""The HTTP read API: approved parameter sets for pricers, and approval with a token.

Routes (JSON; the OpenAPI schema is at ``/openapi.json``, its pages at ``/docs``):

=======================================================  =========================================
``GET  /v1/commodities/{commodity}/latest[?as_of=T]``    the approved set in force (now, or at T)
``GET  /v1/commodities/{commodity}/history``             every approval, oldest first
``GET  /v1/runs/{run_id}[?as_of=T]``                     a stored run with its status and events
``POST /v1/runs/{run_id}/approve``                       approve a candidate (only with a token)
=======================================================  =========================================

Every ``GET`` answer carries a strong ``ETag`` (a hash of its body) and ``Cache-Control:
no-cache``; a poller that sends it back in ``If-None-Match`` gets ``304 Not Modified`` with no
body until another set comes into force. An unknown commodity or run, or no approved set, is
``404`` with ``{"detail": "..."}``; an illegal status change ``409``.

Approving over HTTP exists only when the server is given a token (``CALIB_API_TOKEN``, or a
file named by ``CALIB_API_TOKEN_FILE`` / ``calib serve --token-file``): without one the route
is not mounted at all. A request must carry ``Authorization: Bearer <token>`` (compared in
constant time) and ``{"by": ..., "note": ...}``; it runs the same unit of work as
``calib approve`` (:func:`calib.workflows.approve.approve`).

Reads go through one :class:`calib.client.Client` per server process. The latest-set route
runs on the event loop (one short statement on a held connection is cheaper than a hop to
the thread pool; on PostgreSQL it holds the loop for one round trip); the other reads and the
approval run in the thread pool. Nothing is opened at import time: :func:`create_app` builds
the app, and the database is opened when the server starts it.
"""

from __future__ import annotations

import hashlib
import hmac
import json
from collections import OrderedDict
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from datetime import date, datetime
from typing import Annotated, Any

from fastapi import Depends, FastAPI, HTTPException, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from calib import __version__
from calib.api.review import include_review
from calib.api.schemas import (
    ApprovalBody,
    ApprovedBody,
    ApprovedSetBody,
    ApproveRequest,
    ErrorBody,
    RunBody,
)
from calib.api.tokens import check_token, token_from_env
from calib.client import Client
from calib.errors import (
    IllegalTransitionError,
    InputError,
    NoApprovedSetError,
    StoreUnavailableError,
    StudyRunError,
    UnknownCommodityError,
    UnknownRunError,
)
from calib.settings import Settings, get_settings
from calib.store.engine import Store, make_store
from calib.workflows.approve import approve as approve_run

BODY_CACHE_SIZE = 256
"""Rendered latest-set bodies kept (one per approval event; they never change)."""

_NOT_FOUND: dict[int | str, dict[str, Any]] = {404: {"model": ErrorBody}}
_CACHED: dict[int | str, dict[str, Any]] = {
    304: {"description": "Not modified: the `If-None-Match` ETag is current."}
}
Bearer = Annotated[
    HTTPAuthorizationCredentials | None,
    Depends(HTTPBearer(auto_error=False, description="The token configured on the server.")),
]
AsOf = Annotated[
    datetime | None,
    Query(description="ISO time (UTC unless a zone is given); default now."),
]


def _json(payload: Any) -> bytes:
    return json.dumps(payload, separators=(",", ":"), allow_nan=False, default=_plain).encode()


def _plain(value: object) -> Any:
    if isinstance(value, date | datetime):
        return value.isoformat()
    if hasattr(value, "tolist"):
        return value.tolist()
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


def _etag(body: bytes) -> str:
    return '"' + hashlib.blake2b(body, digest_size=16).hexdigest() + '"'


def _matches(request: Request, etag: str) -> bool:
    """Whether ``If-None-Match`` names ``etag`` (weak comparison, RFC 9110 section 13.1.2)."""
    header = request.headers.get("if-none-match")
    if not header:
        return False
    if header.strip() == "*":
        return True
    return any(tag.strip().removeprefix("W/") == etag for tag in header.split(","))


def _answer(request: Request, body: bytes, etag: str | None = None) -> Response:
    etag = etag or _etag(body)
    headers = {"ETag": etag, "Cache-Control": "no-cache"}
    if _matches(request, etag):
        return Response(status_code=304, headers=headers)
    return Response(body, media_type="application/json", headers=headers)


def create_app(settings: Settings | None = None, *, token: str | None = None) -> FastAPI:
    """The API app on ``settings.db_url``; approval is mounted only when ``token`` is given.

    Parameters
    ----------
    settings : program settings (default: from the environment).
    token : the approval bearer token (at least ``ApiTokenError.MIN_LENGTH`` characters);
        ``None`` leaves the approval route out.
    """
    settings = settings or get_settings()
    if token is not None:
        check_token(token, "given")

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        client = Client(settings.db_url)
        app.state.client = client
        app.state.writer = make_store(settings.db_url) if token is not None else None
        try:
            yield
        finally:
            client.close()
            if app.state.writer is not None:
                app.state.writer.engine.dispose()

    app = FastAPI(
        title="calib",
        version=__version__,
        summary="Approved two-factor parameter sets for pricers.",
        lifespan=lifespan,
    )
    bodies: OrderedDict[int, tuple[bytes, str]] = OrderedDict()

    def client_of(request: Request) -> Client:
        return request.app.state.client  # type: ignore[no-any-return]

    @app.exception_handler(InputError)
    async def input_error(_request: Request, exc: InputError) -> JSONResponse:
        status = 400
        if isinstance(
            exc, UnknownCommodityError | UnknownRunError | NoApprovedSetError | StudyRunError
        ):
            status = 404
        elif isinstance(exc, IllegalTransitionError):
            status = 409
        return JSONResponse({"detail": str(exc)}, status_code=status)

    @app.exception_handler(RequestValidationError)
    async def invalid(_request: Request, exc: RequestValidationError) -> JSONResponse:
        return JSONResponse({"detail": validation_reason(exc)}, status_code=422)

    @app.exception_handler(StoreUnavailableError)
    async def unavailable(_request: Request, exc: StoreUnavailableError) -> JSONResponse:
        return JSONResponse({"detail": str(exc)}, status_code=503)

    @app.get(
        "/v1/commodities/{commodity}/latest",
        response_model=ApprovedSetBody,
        responses={**_NOT_FOUND, **_CACHED},
        summary="The approved parameter set in force",
    )
    async def latest(request: Request, commodity: str, as_of: AsOf = None) -> Response:
        found = client_of(request).latest(commodity, as_of=as_of)
        rendered = bodies.get(found.approval_id)
        if rendered is None:
            body = _json(found.to_dict())
            rendered = bodies[found.approval_id] = (body, _etag(body))
            if len(bodies) > BODY_CACHE_SIZE:
                bodies.popitem(last=False)
        return _answer(request, *rendered)

    @app.get(
        "/v1/commodities/{commodity}/history",
        response_model=list[ApprovalBody],  # type: ignore[valid-type]
        responses={**_NOT_FOUND, **_CACHED},
        summary="Every approval of a commodity, oldest first",
    )
    def history(request: Request, commodity: str) -> Response:
        approvals = client_of(request).history(commodity)
        return _answer(request, _json([a.to_dict() for a in approvals]))

    @app.get(
        "/v1/runs/{run_id}",
        response_model=RunBody,
        responses={**_NOT_FOUND, **_CACHED},
        summary="A stored calibration run, its status and events",
    )
    def run(request: Request, run_id: int, as_of: AsOf = None) -> Response:
        record = client_of(request).run(run_id, as_of=as_of)
        return _answer(request, _json(record.to_dict()))

    if token is not None:
        _mount_approval(app, token)
    include_review(app, settings, token)  # the morning review pages (calib.api.review)
    return app


def _mount_approval(app: FastAPI, token: str) -> None:
    """Add ``POST /v1/runs/{run_id}/approve``, guarded by the bearer ``token``."""
    expected = token.encode()

    def authorised(credentials: Bearer) -> None:
        given = b"" if credentials is None else credentials.credentials.encode()
        if not hmac.compare_digest(given, expected):
            raise HTTPException(
                401, "approval needs a valid bearer token", headers={"WWW-Authenticate": "Bearer"}
            )

    @app.post(
        "/v1/runs/{run_id}/approve",
        response_model=ApprovedBody,
        responses={401: {"model": ErrorBody}, 404: {"model": ErrorBody}, 409: {"model": ErrorBody}},
        dependencies=[Depends(authorised)],
        summary="Approve a candidate run (supersedes the commodity's approved set)",
    )
    def approve(request: Request, run_id: int, decision: ApproveRequest) -> Response:
        store: Store = request.app.state.writer
        result = approve_run(store.sessions, run_id, by=decision.by, note=decision.note)
        body = _json({**result.run.to_dict(), "superseded_run_id": result.superseded})
        return Response(body, media_type="application/json")


def validation_reason(exc: RequestValidationError) -> str:
    """One line for a request that does not fit its route: where, and what is wrong (the
    offending value is not echoed)."""
    first = exc.errors()[0] if exc.errors() else {}
    where = ".".join(str(p) for p in first.get("loc", ()) if p not in ("query", "body", "path"))
    reason = str(first.get("msg", "invalid request")).splitlines()[0]
    if where == "as_of":
        reason += " (give an ISO time such as 2033-06-01T17:00:00Z)"
    return f"{where}: {reason}" if where else reason


def app_from_env() -> FastAPI:
    """The app from the environment (``CALIB_DB``, the token variables): uvicorn's factory."""
    return create_app(get_settings(), token=token_from_env())
