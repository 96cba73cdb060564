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

Reads go through one :class:`calib.client.Client` per server process. Every route that
touches the database runs in the thread pool, never on the event loop, so a slow or blocked
statement holds only its own request: the schema, the pages and the other routes still answer.
No statement runs longer than the server's timeout (``CALIB_API_TIMEOUT`` / ``calib serve
--timeout``, :mod:`calib.api.timeouts`): PostgreSQL cancels it, an approval stops waiting for
SQLite's write lock, and the answer is ``503`` with ``{"detail": "..."}`` in one line (and
``Retry-After``). Nothing is opened at import time: :func:`create_app` builds the app, and the
database is opened when the server starts it.

Inputs are checked at the door, the same on every engine: a run id is a positive 64-bit
integer, a commodity code has the characters files may carry, ``as_of`` is read by
:func:`calib.as_of.parse_as_of` (as the CLI's ``--as-of``), approval texts carry no NUL
character; anything else is ``422`` with one line naming the field and the reason.
"""

from __future__ import annotations

import hashlib
import json
from collections import OrderedDict
from collections.abc import AsyncIterator, Mapping
from contextlib import asynccontextmanager
from datetime import datetime
from typing import Annotated, Any

from fastapi import Depends, FastAPI, HTTPException, Query, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import Response
from sqlalchemy.exc import OperationalError
from starlette.exceptions import HTTPException as StarletteHTTPException

from calib import __version__
from calib.api.guard import bearer_guard
from calib.api.review import include_review
from calib.api.schemas import (
    ApprovalBody,
    ApprovedBody,
    ApprovedSetBody,
    ApproveRequest,
    CommodityCode,
    ErrorBody,
    RunBody,
    RunId,
)
from calib.api.timeouts import DEFAULT_TIMEOUT, check_timeout, timeout_from_env
from calib.api.tokens import check_token, token_from_env
from calib.as_of import AS_OF_HELP, parse_as_of
from calib.client import Client
from calib.errors import (
    AsOfError,
    IllegalTransitionError,
    InputError,
    NoApprovedSetError,
    StoreUnavailableError,
    StudyRunError,
    UnknownCommodityError,
    UnknownRunError,
)
from calib.record.codec import encode
from calib.settings import Settings, get_settings
from calib.store.engine import Store, make_store
from calib.workflows.approve import approve as approve_run

BODY_CACHE_SIZE = 256
"""Rendered latest-set bodies kept (one per approval event; they never change)."""

_NOT_FOUND: dict[int | str, dict[str, Any]] = {
    404: {"model": ErrorBody},
    422: {"model": ErrorBody},
    503: {"model": ErrorBody},
}
_CACHED: dict[int | str, dict[str, Any]] = {
    304: {"description": "Not modified: the `If-None-Match` ETag is current."}
}
AS_OF_EXAMPLE = "2033-06-01T17:00:00Z"


def as_of_query(
    as_of: Annotated[
        str | None, Query(description=f"{AS_OF_HELP}; default now.", examples=[AS_OF_EXAMPLE])
    ] = None,
) -> datetime | None:
    """The ``as_of`` query parameter read by :func:`calib.as_of.parse_as_of` (the CLI's
    reader); a bad one is ``422`` naming the field and the reason (the value is not echoed)."""
    if as_of is None:
        return None
    try:
        return parse_as_of(as_of)
    except AsOfError as exc:
        raise HTTPException(
            422, f"as_of: {exc.reason} (give an ISO time such as {AS_OF_EXAMPLE})"
        ) from None


AsOf = Annotated[datetime | None, Depends(as_of_query)]


def _json(payload: Any) -> bytes:
    return json.dumps(payload, separators=(",", ":"), allow_nan=False, default=encode).encode()


def problem(status: int, detail: str, headers: Mapping[str, str] | None = None) -> Response:
    """``{"detail": ...}`` with ``status``; ASCII JSON, so any text (a lone surrogate echoed
    from a request included) can be sent."""
    body = json.dumps({"detail": detail}).encode("ascii")
    return Response(body, status_code=status, media_type="application/json", headers=headers)


def _first_line(exc: BaseException) -> str:
    text = str(getattr(exc, "orig", None) or exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


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


def create_app(
    settings: Settings | None = None,
    *,
    token: str | None = None,
    timeout: float = DEFAULT_TIMEOUT,
) -> FastAPI:
    """The API app on ``settings.db_url``; approval is mounted only when ``token`` is given.

    Parameters
    ----------
    settings : program settings (default: from the environment).
    token : the approval bearer token (at least ``ApiTokenError.MIN_LENGTH`` characters);
        ``None`` leaves the approval route out.
    timeout : seconds one database statement may take before the request answers ``503``
        (:mod:`calib.api.timeouts`).
    """
    settings = settings or get_settings()
    if token is not None:
        check_token(token, "given")
    timeout = check_timeout(timeout, "timeout")

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        client = Client(settings.db_url, timeout=timeout)
        app.state.client = client
        app.state.writer = (
            make_store(settings.db_url, timeout=timeout) if token is not None else None
        )
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
    async def input_error(_request: Request, exc: InputError) -> Response:
        status = 400
        if isinstance(
            exc, UnknownCommodityError | UnknownRunError | NoApprovedSetError | StudyRunError
        ):
            status = 404
        elif isinstance(exc, IllegalTransitionError):
            status = 409
        return problem(status, str(exc))

    @app.exception_handler(RequestValidationError)
    async def invalid(_request: Request, exc: RequestValidationError) -> Response:
        return problem(422, validation_reason(exc))

    @app.exception_handler(StarletteHTTPException)
    async def http_error(_request: Request, exc: StarletteHTTPException) -> Response:
        return problem(exc.status_code, str(exc.detail), exc.headers)

    @app.exception_handler(StoreUnavailableError)
    async def unavailable(_request: Request, exc: StoreUnavailableError) -> Response:
        return problem(503, str(exc), {"Retry-After": "1"})

    @app.exception_handler(OperationalError)
    async def busy(request: Request, exc: OperationalError) -> Response:
        """A statement cancelled by the timeout, a write lock not had in time, a lost server."""
        url = client_of(request).url
        return await unavailable(request, StoreUnavailableError(url, _first_line(exc)))

    @app.get(
        "/v1/commodities/{commodity}/latest",
        response_model=ApprovedSetBody,
        responses={**_NOT_FOUND, **_CACHED},
        summary="The approved parameter set in force",
    )
    def latest(request: Request, commodity: CommodityCode, as_of: AsOf) -> Response:
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
    def history(request: Request, commodity: CommodityCode) -> Response:
        approvals = client_of(request).history(commodity)
        return _answer(request, _json([a.to_dict() for a in approvals]))

    @app.get(
        "/v1/runs/{run_id}",
        response_model=RunBody,
        responses={**_NOT_FOUND, **_CACHED},
        summary="A stored calibration run, its status and events",
    )
    def run(request: Request, run_id: RunId, as_of: AsOf) -> Response:
        record = client_of(request).run(run_id, as_of=as_of)
        return _answer(request, _json(record.to_dict()))

    if token is not None:
        _mount_approval(app, token)
    include_review(app, settings, token, timeout)  # the morning review pages (calib.api.review)
    return app


def _mount_approval(app: FastAPI, token: str) -> None:
    """Add ``POST /v1/runs/{run_id}/approve``, guarded by the bearer ``token``."""

    @app.post(
        "/v1/runs/{run_id}/approve",
        response_model=ApprovedBody,
        responses={401: {"model": ErrorBody}, 409: {"model": ErrorBody}, **_NOT_FOUND},
        dependencies=[Depends(bearer_guard(token))],
        summary="Approve a candidate run (supersedes the commodity's approved set)",
    )
    def approve(request: Request, run_id: RunId, decision: ApproveRequest) -> Response:
        store: Store = request.app.state.writer
        result = approve_run(store.sessions, run_id, by=decision.by, note=decision.note)
        body = _json({**result.run.to_dict(), "superseded_run_id": result.superseded})
        return Response(body, media_type="application/json")


def validation_reason(exc: RequestValidationError) -> str:
    """One line for a request that does not fit its route: where, and what is wrong (the
    offending value is not echoed)."""
    first = exc.errors()[0] if exc.errors() else {}
    where = ".".join(str(p) for p in first.get("loc", ()) if p not in ("query", "body", "path"))
    reason = (str(first.get("msg", "")).splitlines() or ["invalid request"])[0]
    if first.get("type") == "string_pattern_mismatch":
        reason = _PATTERN_REASONS.get(where, "not of the expected form")
    return f"{where}: {reason}" if where else reason


_PATTERN_REASONS = {
    "commodity": "not a commodity code (1-32 letters, digits, '.', '_' or '-')",
    "code": "not a commodity code (1-32 letters, digits, '.', '_' or '-')",
    "by": "a NUL character cannot be stored",
    "note": "a NUL character cannot be stored",
}
"""What a path or body field that fails its pattern lacks, in words (not the pattern)."""


def app_from_env() -> FastAPI:
    """The app from the environment (``CALIB_DB``, the token variables): uvicorn's factory."""
    return create_app(get_settings(), token=token_from_env(), timeout=timeout_from_env())
