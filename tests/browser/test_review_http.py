"""The review pages' server side over real HTTP, without a browser: security headers, no
inline script, every GET a read, the reject route only with a token, escaping of stored text,
errors as pages, and the assets shipped as package data."""

from __future__ import annotations

import re
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from calib.api.app import create_app
from calib.api.review import CSP, STATIC
from calib.client import Client
from calib.settings import Settings
from calib.store.engine import store_for
from calib.store.quotes import add_commodity
from tests.browser.harness import REPO
from tests.browser.review_store import ReviewStore, build
from tests.serving.test_api import serving

TOKEN = "review-token-for-tests-only"
HOSTILE = '<img src=x onerror="window.hacked=1">&'


@pytest.fixture(scope="module")
def review_store(tmp_path_factory: pytest.TempPathFactory) -> ReviewStore:
    return build(tmp_path_factory.mktemp("review-http"))


def _pages(rs: ReviewStore) -> list[str]:
    run = rs.candidate
    return [
        "/",
        f"/runs/{run}",
        f"/runs/{run}?action=approve&note=via-get",
        f"/commodities/{rs.code}",
        f"/commodities/{rs.code}?as_of={rs.between.isoformat()}",
    ]


def test_every_page_is_a_read_with_security_headers_and_no_inline_script(
    review_store: ReviewStore, url: str
) -> None:
    with serving(create_app(Settings(db_url=url), token=TOKEN)) as http:
        for path in _pages(review_store):
            got = http.get(path)
            assert got.status_code == 200, path
            assert got.headers["content-security-policy"] == CSP
            assert got.headers["x-content-type-options"] == "nosniff"
            assert got.headers["cache-control"] == "no-store"
            scripts = re.findall(r"<script\b[^>]*>", got.text)
            assert scripts == ['<script src="/static/review.js" defer>'], path
            assert not re.search(r"\son[a-z]+\s*=", got.text), path  # no inline handlers
        assert http.post("/").status_code == 405  # a page is never a place to post to
        for name, media in STATIC.items():
            asset = http.get(f"/static/{name}")
            assert asset.status_code == 200 and asset.headers["content-type"] == media
        assert http.get("/static/app.py").status_code == 404
        assert http.get("/static/..%2Fapp.py").status_code == 404
        png = http.get(f"/commodities/{review_store.code}/compare.png")
        assert png.headers["content-type"] == "image/png" and png.content[:4] == b"\x89PNG"
    with Client(url) as client:
        assert client.run(review_store.candidate).status == "candidate"
        assert client.latest(review_store.code).run_id == review_store.approved[1]


def test_reject_needs_the_token_and_exists_only_with_one(
    review_store: ReviewStore, url: str
) -> None:
    body = {"by": "quant.c", "note": "no"}
    path = f"/v1/runs/{review_store.candidate}/reject"
    with serving(create_app(Settings(db_url=url))) as http:
        assert http.post(path, json=body).status_code in (404, 405)
        page = http.get("/").text
        assert "Read-only." in page and 'class="decide"' not in page
    with serving(create_app(Settings(db_url=url), token=TOKEN)) as http:
        wrong = http.post(path, json=body, headers={"Authorization": "Bearer wrong-token"})
        assert wrong.status_code == 401
        assert wrong.json() == {"detail": "approval needs a valid bearer token"}
        assert 'class="decide"' in http.get("/").text
        done = http.post(path, json=body, headers={"Authorization": f"Bearer {TOKEN}"})
        assert done.status_code == 200 and done.json()["status"] == "rejected"
        again = http.post(path, json=body, headers={"Authorization": f"Bearer {TOKEN}"})
        assert again.status_code == 409
    with Client(url) as client:
        assert client.run(review_store.candidate).status == "rejected"


def test_stored_text_is_escaped_and_errors_are_pages(review_store: ReviewStore, url: str) -> None:
    with store_for(url) as store, store.sessions.begin() as session:
        add_commodity(
            session=session,
            code="ZZ<b>",
            name=HOSTILE,
            unit="t&c",
            currency='"X"',
            calendar_rule="m",
        )
    with serving(create_app(Settings(db_url=url))) as http:
        page = http.get("/").text
        assert HOSTILE not in page and "&lt;img src=x onerror=" in page
        assert "ZZ&lt;b&gt;" in page and "ZZ<b>" not in page
        assert "/commodities/ZZ%3Cb%3E" in page
        assert http.get("/commodities/ZZ%3Cb%3E").status_code == 200
        failed = http.get(f"/runs/{review_store.failed}")
        assert failed.status_code == 200
        assert "The fit failed: TooFewQuotesError: 3 quotes left after the filters" in failed.text
        assert "<figure" not in failed.text and 'class="decide"' not in failed.text
        missing = http.get("/runs/999")
        assert missing.status_code == 404 and "no calibration run 999" in missing.text
        assert missing.headers["content-security-policy"] == CSP
        assert http.get("/commodities/NOPE").status_code == 404
        assert http.get(f"/runs/{review_store.candidate}/figures/nope.png").status_code == 404
        bad = http.get(f"/commodities/{review_store.code}", params={"as_of": "yesterday"})
        assert bad.status_code == 200
        assert "as of &#39;yesterday&#39;: not an ISO date or time" in bad.text
        early = http.get(f"/commodities/{review_store.code}", params={"as_of": "2000-01-01"})
        assert "no approved parameter set" in early.text


@pytest.mark.slow
def test_the_wheel_ships_the_templates_and_assets(tmp_path: Path) -> None:
    # a normal (non-editable) install gets exactly the wheel's files; pip builds it in an
    # isolated environment with the build requirements of pyproject.toml
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--no-deps",
            "-q",
            "-w",
            str(tmp_path),
            str(REPO),
        ],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    (wheel,) = tmp_path.glob("calib-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    templates = {p.name for p in (REPO / "calib/api/templates").glob("*.html")}
    assert templates and {f"calib/api/templates/{t}" for t in templates} <= names
    assert {f"calib/api/static/{s}" for s in STATIC} <= names
