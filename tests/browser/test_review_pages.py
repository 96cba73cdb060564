"""The review pages driven in headless Chromium against a real server on loopback: the
overview lists today's candidate with its gates, approving with the token changes the set in
force (read back through the pricers' client), a wrong token is refused with a message and
changes nothing, a hostile note shows as text, the run and history pages show their figures.
Screenshots of each page land in ``test-artefacts/browser/``."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING

import pytest

from calib.api.app import create_app
from calib.client import Client
from calib.output.report import FIGURES
from calib.settings import Settings
from tests.browser.harness import chromium, new_page, screenshot
from tests.browser.review_store import ReviewStore, build
from tests.serving.test_api import serving

if TYPE_CHECKING:
    from playwright.sync_api import Browser, Locator, Page

TOKEN = "review-token-for-tests-only"
HOSTILE_NOTE = '<script>window.hacked = 1</script> looks fine & "ok"'
BROKEN_IMAGES = (
    "Promise.all(Array.from(document.images).map(i => i.decode().catch(() => null)))"
    ".then(() => Array.from(document.images)"
    ".filter(i => !(i.complete && i.naturalWidth > 0)).map(i => i.src))"
)
"""Waits for every image, then lists those that did not load (``page.evaluate`` runs outside
the page's CSP; ``wait_for_function`` would need ``unsafe-eval``)."""


@pytest.fixture(scope="module")
def browser() -> Iterator[Browser]:
    with chromium() as launched:
        yield launched


@pytest.fixture
def page(browser: Browser) -> Iterator[Page]:
    with new_page(browser) as fresh:
        yield fresh


@pytest.fixture(scope="module")
def review_store(tmp_path_factory: pytest.TempPathFactory) -> ReviewStore:
    return build(tmp_path_factory.mktemp("review"))


@contextmanager
def served(db_url: str, token: str | None) -> Iterator[str]:
    """The API (with the review pages) on a free loopback port; its base URL."""
    with serving(create_app(Settings(db_url=db_url), token=token)) as http:
        yield str(http.base_url).rstrip("/")


def _decide(page: Page, run: int, note: str, action: str) -> Locator:
    """Write ``note`` into run ``run``'s decision form and press approve or reject; the form."""
    form = page.locator(f"form.decide[data-run='{run}']")
    form.locator("input[name=note]").fill(note)
    form.locator(f"button.{action}").click()
    return form


def _hold_token(page: Page, by: str, token: str) -> None:
    form = page.locator("#token-form")
    form.locator("input[name=by]").fill(by)
    form.locator("input[name=token]").fill(token)
    form.locator("button[type=submit]").click()


def test_overview_lists_the_candidate_read_only_without_a_token(
    review_store: ReviewStore, page: Page, url: str
) -> None:
    with served(url, None) as base:
        response = page.goto(base + "/")
        assert response is not None and response.ok
        csp = response.headers["content-security-policy"]
        assert "script-src 'self'" in csp and "unsafe-inline" not in csp
        row = page.locator(f"tr.fit-row[data-run='{review_store.candidate}']")
        assert row.locator(".status").inner_text() == "candidate"
        chips = row.locator(".gate")
        with Client(url) as client:
            stored = client.run(review_store.candidate).to_dict()["diagnostics"]["gates"]
        assert chips.count() == len(stored)
        for chip, gate in zip(chips.all(), stored, strict=True):
            assert gate["name"] in chip.inner_text()
            assert ("pass" in (chip.get_attribute("class") or "")) == gate["passed"]
        failed = page.locator(f"tr.fit-row[data-run='{review_store.failed}']")
        assert failed.locator(".status").inner_text() == "rejected"
        assert "fit failed" in failed.locator(".gate.fail").inner_text()
        in_force = page.locator(".inforce")
        assert f"run {review_store.approved[1]}" in in_force.inner_text()
        assert "quant.b" in in_force.inner_text()
        assert "Read-only" in page.locator(".readonly").inner_text()
        assert page.locator("form.decide").count() == 0
        assert page.locator("#token-form").count() == 0
        screenshot(page, "overview-read-only")


def test_approving_with_the_token_changes_the_set_in_force(
    review_store: ReviewStore, page: Page, url: str
) -> None:
    run = review_store.candidate
    with served(url, TOKEN) as base:
        page.goto(base + "/")
        assert "no cookie, no browser storage" in page.locator("#token-state").inner_text()
        _hold_token(page, "quant.c", TOKEN)
        assert "Deciding as quant.c" in page.locator("#token-state").inner_text()
        assert page.locator("#token-form input[name=token]").input_value() == ""
        screenshot(page, "overview-deciding")
        # links are followed inside the page while a token is held: typed once per tab
        page.locator(f"tr.fit-row[data-run='{run}'] a").click()
        page.locator("h1").filter(has_text=f"Run {run}").wait_for()
        assert page.url == f"{base}/runs/{run}"
        assert "Deciding as quant.c" in page.locator("#token-state").inner_text()
        page.go_back()
        page.locator("h1").filter(has_text="This morning").wait_for()
        assert page.url == f"{base}/"
        _decide(page, run, HOSTILE_NOTE, "approve")
        page.locator("#flash").filter(has_text=f"Run {run} approved").wait_for()
        # the page refreshed in place: the candidate is now the set in force
        page.locator(".inforce").filter(has_text=f"run {run}").wait_for()
        with Client(url) as client:
            latest = client.latest(review_store.code)
        assert latest.run_id == run and latest.approved_by == "quant.c"
        assert latest.approval_note == HOSTILE_NOTE
        assert page.evaluate("document.cookie") == ""
        assert page.evaluate("window.localStorage.length + window.sessionStorage.length") == 0
        assert page.locator(".inforce .note").inner_text() == HOSTILE_NOTE
        assert page.evaluate("window.hacked") is None
        screenshot(page, "overview-approved")

        page.goto(f"{base}/commodities/{review_store.code}")
        current = page.locator("table.approvals tr.current")
        assert current.locator(".note").inner_text() == HOSTILE_NOTE
        assert page.locator("script").count() == 1  # ours, from /static
        assert page.evaluate("window.hacked") is None


def test_a_wrong_token_is_refused_with_a_message_then_the_right_one_rejects(
    review_store: ReviewStore, page: Page, url: str
) -> None:
    run = review_store.candidate
    with served(url, TOKEN) as base:
        page.goto(f"{base}/runs/{run}")
        _hold_token(page, "quant.c", "not-the-token-at-all")
        form = _decide(page, run, "approve please", "approve")
        message = form.locator(".msg")
        message.filter(has_text="Refused").wait_for()
        assert "did not accept the token" in message.inner_text()
        assert "No token held" in page.locator("#token-state").inner_text()
        screenshot(page, "run-wrong-token")
        with Client(url) as client:
            assert client.latest(review_store.code).run_id == review_store.approved[1]
            assert client.run(run).status == "candidate"

        _hold_token(page, "quant.c", TOKEN)
        _decide(page, run, "rmse too high", "reject")
        page.locator("#flash").filter(has_text=f"Run {run} rejected").wait_for()
        with Client(url) as client:
            assert client.run(run).status == "rejected"
            assert client.latest(review_store.code).run_id == review_store.approved[1]
        assert page.locator("h1 .status").inner_text() == "rejected"


def test_run_page_shows_gates_constraints_residuals_and_every_figure(
    review_store: ReviewStore, page: Page, url: str
) -> None:
    run = review_store.candidate
    with served(url, None) as base:
        problems: list[str] = []
        page.on("pageerror", lambda exc: problems.append(f"error: {exc}"))
        page.on("requestfailed", lambda req: problems.append(f"failed: {req.url}"))
        page.goto(f"{base}/runs/{run}", wait_until="load")
        assert page.evaluate(BROKEN_IMAGES) == []
        assert page.locator("figure img").count() == len(FIGURES)
        with Client(url) as client:
            record = client.run(run)
        assert record.fit is not None
        assert page.locator("table.gate-table tbody tr").count() == len(record.fit.gates)
        assert page.locator("table.residuals tbody tr").count() == record.fit.n_quotes
        assert "decay_bound" in page.locator("main").inner_text()
        assert problems == []
        screenshot(page, "run")


def test_history_page_shows_what_a_pricer_got_at_a_past_moment(
    review_store: ReviewStore, page: Page, url: str
) -> None:
    first = review_store.approved[0]
    with served(url, None) as base:
        page.goto(f"{base}/commodities/{review_store.code}")
        page.locator("input[name=as_of]").fill(review_store.between.isoformat())
        page.locator(".asof-form button").click()
        answer = page.locator(".answer")
        answer.wait_for()
        assert f"got run {first}" in " ".join(answer.inner_text().split())
        assert "wall-clock time of approval" in page.locator(".asof").inner_text()
        assert page.evaluate(BROKEN_IMAGES) == []
        assert page.locator("table.approvals tbody tr").count() == 2
        screenshot(page, "history")
