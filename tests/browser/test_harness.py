"""The browser harness skips outside CI and fails under CI when the browser is missing."""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.browser import harness


def test_missing_browser_skips_outside_ci_and_fails_under_ci(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    monkeypatch.setattr(harness, "CHROMIUM", tmp_path / "no-such-chromium")
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception, match="headless Chromium not installed"):
        harness.require_browser()
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match=r"CI=true but headless Chromium"):
        harness.require_browser()
