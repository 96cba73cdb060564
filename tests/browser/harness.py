"""Debian's Chromium driven by Playwright for Python: the page-level tests' browser.

Playwright only drives the browser here: it never downloads one of its own. The tests run the
system browser at :data:`CHROMIUM` (Debian package ``chromium``, installed by ``.ci/run``),
headless, with a fresh profile per launch and a fresh browser context per test, and with every
background service of the browser off,
so a test talks to nothing but the loopback server under test.

Outside CI a machine without the browser (or without Playwright) skips these tests with the
reason; under CI (``CI=true``) the same absence is a failure, so a green CI run has always
driven the real browser. Screenshots land in :data:`ARTEFACTS` (git-ignored).
"""

from __future__ import annotations

import importlib.util
import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

import pytest

if TYPE_CHECKING:
    from playwright.sync_api import Browser, Page

CHROMIUM = Path("/usr/bin/chromium")
"""Debian's Chromium (package ``chromium``)."""

REPO = Path(__file__).resolve().parents[2]
ARTEFACTS = REPO / "test-artefacts" / "browser"
"""Screenshots of the pages the tests drove (git-ignored; kept by CI as test artefacts)."""

FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
)
"""Command-line switches of every launch (headless, no background traffic, root-safe)."""

VIEWPORT = {"width": 1366, "height": 860}
"""A laptop screen."""


def under_ci() -> bool:
    """Whether this is a CI run (``CI=true``), where a missing browser fails the tests."""
    return os.environ.get("CI", "").strip().lower() == "true"


def missing() -> str | None:
    """Why the browser tests cannot run here, or ``None`` when they can."""
    if not CHROMIUM.exists():
        return f"headless Chromium not installed ({CHROMIUM}, Debian package chromium)"
    if importlib.util.find_spec("playwright") is None:
        return "Playwright for Python not installed (the dev extra)"
    return None


def require_browser() -> None:
    """Skip (outside CI) or fail (under CI) the calling test when the browser cannot run."""
    reason = missing()
    if reason is None:
        return
    if under_ci():
        pytest.fail(f"CI=true but {reason}: .ci/run installs it")
    pytest.skip(reason)


@contextmanager
def chromium() -> Iterator[Browser]:
    """A headless Chromium (Playwright gives each launch a fresh, temporary profile)."""
    require_browser()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=list(FLAGS))
        try:
            yield browser
        finally:
            browser.close()


@contextmanager
def new_page(browser: Browser) -> Iterator[Page]:
    """A page in a context of its own (no cookies, storage or cache shared with another)."""
    context = browser.new_context(viewport=VIEWPORT)  # type: ignore[arg-type]
    try:
        yield context.new_page()
    finally:
        context.close()


@contextmanager
def chromium_page() -> Iterator[Page]:
    """One page of a browser launched for it alone."""
    with chromium() as browser, new_page(browser) as page:
        yield page


def screenshot(page: Page, name: str) -> Path:
    """Save a full-page screenshot as ``ARTEFACTS/<name>.png``; its path."""
    ARTEFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTEFACTS / f"{name}.png"
    page.screenshot(path=str(path), full_page=True)
    return path
