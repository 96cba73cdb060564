"""Set-up shared by the review-page tests."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.browser.review_store import ReviewStore


@pytest.fixture
def url(review_store: ReviewStore, tmp_path: Path) -> str:
    """A copy of the module's review store for this test alone (a decision changes it); its
    URL."""
    return review_store.copy_to(tmp_path)
