"""The morning review in a browser: HTML pages served by ``calib serve`` beside the JSON API.

Pages (server-rendered with Jinja2, every value escaped; one stylesheet and one small script,
both served from this package: no build step, nothing fetched from elsewhere):

=========================================  ==================================================
``GET /``                                  overview: per commodity the set in force, the
                                           newest day's fits with their gates, drift alerts
``GET /runs/{run_id}``                     one run: parameters, gates, constraints and their
                                           slack, the fit report's figures, residuals, events
``GET /runs/{run_id}/figures/{name}.png``  a figure of the fit report
``GET /commodities/{code}[?as_of=T]``      approvals over time, the calibrated-vs-historical
                                           chart, and the set a pricer got at moment ``T``
``GET /commodities/{code}/compare.png``    that chart
``GET /static/{review.css,review.js}``     the page assets
``POST /v1/runs/{run_id}/reject``          reject a candidate (only with a token, as approve)
=========================================  ==================================================

Deciding happens only through the token-guarded ``POST`` routes: every ``GET`` is a read.
When the server has no token the pages say they are read-only and show no decision controls.
With one, the page's script asks for the approver's name and the token once per tab, keeps
them in a JavaScript variable (never a cookie, never browser storage) and sends the token as
``Authorization: Bearer``. Every answer carries a Content-Security-Policy that allows scripts,
styles and images from this server only and no inline script.

The fit report's inputs of a run (which re-solve the anchor frontier) and its figures are kept
in small in-memory caches: a stored run never changes, only its status, which is read afresh.
"""

from __future__ import annotations

import threading
import warnings
from collections import OrderedDict
from collections.abc import AsyncIterator, Callable, Hashable
from contextlib import asynccontextmanager
from datetime import UTC, datetime
from importlib import resources
from typing import Any, Generic, TypeVar

from fastapi import APIRouter, Depends, FastAPI, HTTPException
from fastapi.responses import HTMLResponse, JSONResponse, Response
from jinja2 import Environment, PackageLoader, StrictUndefined

from calib import __version__
from calib.api.guard import bearer_guard
from calib.api.schemas import ApproveRequest, ErrorBody, PageCode, RunBody, RunId
from calib.as_of import parse_as_of
from calib.client import ApprovedSet, Client
from calib.errors import (
    AsOfError,
    CalibWarning,
    NoApprovedSetError,
    RunNotFittedError,
    UnknownCommodityError,
    UnknownRunError,
)
from calib.model.twofactor import PARAM_NAMES
from calib.output.compare import plot_png
from calib.output.report import CAUTIONS, FIGURES, ReportInputs, figure_names, figure_png
from calib.settings import Settings
from calib.store.engine import Store, make_store
from calib.workflows import approve as approve_flow
from calib.workflows import review as views
from calib.workflows.report import report_inputs

CSP = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
    "connect-src 'self'; form-action 'self'; base-uri 'none'; frame-ancestors 'none'"
)
"""Content-Security-Policy of every review answer: this server's own assets, no inline script."""

SECURITY_HEADERS = {
    "Content-Security-Policy": CSP,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
}

STATIC = {"review.css": "text/css; charset=utf-8", "review.js": "text/javascript; charset=utf-8"}
"""The assets under ``calib/api/static/`` and their media types (nothing else is served)."""

_DRAWING = threading.Lock()
"""Figures are drawn one at a time: matplotlib's first import and its font cache are not safe
across the server's threads."""

REPORT_CACHE = 8
"""Fit-report inputs kept (one per run page recently shown)."""
FIGURE_CACHE = 64
"""Rendered figure PNGs kept."""

_K = TypeVar("_K", bound=Hashable)
_V = TypeVar("_V")


class _Cache(Generic[_K, _V]):
    """A small least-recently-used map, safe across the server's worker threads."""

    def __init__(self, size: int) -> None:
        self._size = size
        self._items: OrderedDict[_K, _V] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: _K, make: Callable[[], _V]) -> _V:
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                return self._items[key]
        value = make()  # outside the lock: two threads may both make it, either copy is right
        with self._lock:
            self._items[key] = value
            while len(self._items) > self._size:
                self._items.popitem(last=False)
        return value


def _drawn(draw: Callable[..., bytes], *args: Any, **kwargs: Any) -> bytes:
    with _DRAWING:
        return draw(*args, **kwargs)


def _noted(
    gather: Callable[..., tuple[ReportInputs, Any]], *args: Any
) -> tuple[ReportInputs, tuple[str, ...]]:
    """The report inputs of a run, and the calib warnings their frontier re-solves gave (shown
    on the page, not raised: ``catch_warnings`` is process-wide, hence the lock)."""
    with _DRAWING, warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", CalibWarning)
        inputs = gather(*args)[0]
    notes = (str(w.message) for w in caught if issubclass(w.category, CalibWarning))
    return inputs, tuple(dict.fromkeys(notes))


def _num(value: Any, fmt: str = ".4g") -> str:
    if value is None:
        return "\u2013"
    if isinstance(value, str):
        return value
    return format(value, fmt)


def _when(value: datetime | None) -> str:
    if value is None:
        return "\u2013"
    return value.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def _environment() -> Environment:
    env = Environment(
        loader=PackageLoader("calib.api", "templates"),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.filters["num"] = _num
    env.filters["when"] = _when
    env.globals.update(
        version=__version__,
        cautions=CAUTIONS,
        param_names=PARAM_NAMES,
        captions=dict(FIGURES),
    )
    return env


def _static() -> dict[str, bytes]:
    folder = resources.files("calib.api").joinpath("static")
    return {name: folder.joinpath(name).read_bytes() for name in STATIC}


def review_router(settings: Settings, token: str | None, timeout: float | None = None) -> APIRouter:
    """The review pages on ``settings.db_url``; deciding is offered only when ``token`` is set.

    The store and a pricers' :class:`~calib.client.Client` (for the as-of view: exactly what a
    pricer reads) are opened when the server starts and closed when it stops; ``timeout``
    bounds each statement (:mod:`calib.api.timeouts`).
    """
    opened: dict[str, Any] = {}

    @asynccontextmanager
    async def lifespan(_app: FastAPI) -> AsyncIterator[None]:
        opened["store"] = make_store(settings.db_url, timeout=timeout)
        opened["client"] = Client(settings.db_url, timeout=timeout)
        try:
            yield
        finally:
            opened.pop("client").close()
            opened.pop("store").engine.dispose()

    router = APIRouter(lifespan=lifespan, include_in_schema=False)
    env = _environment()
    static = _static()
    reports: _Cache[int, tuple[ReportInputs, tuple[str, ...]]] = _Cache(REPORT_CACHE)
    figures: _Cache[tuple[int, str], bytes] = _Cache(FIGURE_CACHE)
    can_decide = token is not None

    def store() -> Store:
        found: Store = opened["store"]
        return found

    def page(template: str, status: int = 200, **context: Any) -> HTMLResponse:
        body = env.get_template(template).render(
            can_decide=can_decide,
            nav=views.commodities(store().sessions),
            served_at=datetime.now(UTC),
            **context,
        )
        headers = {**SECURITY_HEADERS, "Cache-Control": "no-store"}
        return HTMLResponse(body, status_code=status, headers=headers)

    def png(body: bytes) -> Response:
        headers = {**SECURITY_HEADERS, "Cache-Control": "no-cache"}
        return Response(body, media_type="image/png", headers=headers)

    def report_and_notes(run_id: int) -> tuple[ReportInputs | None, tuple[str, ...]]:
        try:
            return reports.get(run_id, lambda: _noted(report_inputs, store().sessions, run_id))
        except RunNotFittedError:
            return None, ()

    def report_of(run_id: int) -> ReportInputs | None:
        return report_and_notes(run_id)[0]

    @router.get("/", response_class=HTMLResponse)
    def overview() -> HTMLResponse:
        return page("overview.html", items=views.overview(store().sessions))

    @router.get("/runs/{run_id}", response_class=HTMLResponse)
    def run_page(run_id: RunId) -> HTMLResponse:
        try:
            view = views.run_view(store().sessions, run_id)
        except UnknownRunError as exc:
            return page("missing.html", 404, message=str(exc))
        report, notes = report_and_notes(run_id)
        names = () if report is None else figure_names(report)
        return page("run.html", view=view, report=report, figures=names, notes=notes)

    @router.get("/runs/{run_id}/figures/{name}.png")
    def run_figure(run_id: RunId, name: str) -> Response:
        try:
            report = report_of(run_id)
        except UnknownRunError:
            report = None
        if report is None or name not in figure_names(report):
            raise HTTPException(404, f"run {run_id} has no figure {name!r}")
        return png(figures.get((run_id, name), lambda: _drawn(figure_png, report, name)))

    @router.get("/commodities/{code}", response_class=HTMLResponse)
    def commodity_page(code: PageCode, as_of: str | None = None) -> HTMLResponse:
        try:
            hist = views.history(store().sessions, code)
        except UnknownCommodityError as exc:
            return page("missing.html", 404, message=str(exc))
        when: datetime | None = None
        pricer: ApprovedSet | None = None
        problem = ""
        if as_of:
            try:
                when = parse_as_of(as_of)
                pricer = opened["client"].latest(code, as_of=when)
            except (AsOfError, NoApprovedSetError) as exc:
                problem = str(exc)
        return page(
            "history.html", hist=hist, as_of=as_of or "", when=when, pricer=pricer, problem=problem
        )

    @router.get("/commodities/{code}/compare.png")
    def commodity_chart(code: PageCode) -> Response:
        try:
            hist = views.history(store().sessions, code)
        except UnknownCommodityError as exc:
            raise HTTPException(404, str(exc)) from None
        if hist.compared is None:
            raise HTTPException(404, f"{code}: no approved run to compare yet")
        title = f"{hist.commodity.code}: runs ever approved against the historical estimate"
        return png(_drawn(plot_png, hist.compared, title=title))

    @router.get("/static/{name}")
    def asset(name: str) -> Response:
        if name not in static:
            raise HTTPException(404, f"no asset {name!r}")
        headers = {**SECURITY_HEADERS, "Cache-Control": "no-cache"}
        return Response(static[name], media_type=STATIC[name], headers=headers)

    if token is not None:

        @router.post(
            "/v1/runs/{run_id}/reject",
            response_model=RunBody,
            responses={401: {"model": ErrorBody}, 404: {"model": ErrorBody}},
            dependencies=[Depends(bearer_guard(token))],
            include_in_schema=True,
            summary="Reject a candidate run",
        )
        def reject(run_id: RunId, decision: ApproveRequest) -> JSONResponse:
            record = approve_flow.reject(
                store().sessions, run_id, by=decision.by, note=decision.note
            )
            return JSONResponse(record.to_dict())

    return router


def include_review(
    app: FastAPI, settings: Settings, token: str | None, timeout: float | None = None
) -> None:
    """Add the review pages (and, with a token, the reject route) to the API ``app``."""
    app.include_router(review_router(settings, token, timeout))
