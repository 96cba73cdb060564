"""The guard of every route that changes the store (the approval route, the review page's
decision): a request must carry ``Authorization: Bearer <token>``, the token configured on
the server (:mod:`calib.api.tokens`)."""

from __future__ import annotations

import hmac
from collections.abc import Callable
from typing import Annotated

from fastapi import Depends, HTTPException
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

Bearer = Annotated[
    HTTPAuthorizationCredentials | None,
    Depends(HTTPBearer(auto_error=False, description="The token configured on the server.")),
]


def bearer_guard(token: str) -> Callable[..., None]:
    """A dependency that refuses a request without ``Authorization: Bearer <token>`` (401; the
    token compared in constant time)."""
    expected = token.encode()

    def authorised(credentials: Bearer) -> None:
        given = b"" if credentials is None else credentials.credentials.encode()
        if not hmac.compare_digest(given, expected):
            raise HTTPException(
                401, "approval needs a valid bearer token", headers={"WWW-Authenticate": "Bearer"}
            )

    return authorised
