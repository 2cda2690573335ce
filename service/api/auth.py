"""Bearer tokens: who is asking.

Tokens come from ``TOPOSCOUT_TOKENS="alice:tok1,bob:tok2"`` and/or a file named by
``TOPOSCOUT_TOKENS_FILE`` (one ``owner:token`` per line, ``#`` starts a comment). With no
token configured every request belongs to the owner ``local`` and only loopback clients are
served (unless ``allow_remote``). With tokens, every endpoint but ``/healthz`` needs
``Authorization: Bearer TOKEN`` (401 otherwise). Tokens are compared in constant time and
never logged or echoed: error messages name the problem, not the token.
"""

from __future__ import annotations

import hmac
import ipaddress
import re

from fastapi import HTTPException, Request

from toposcout.service.settings import parse_tokens

__all__ = ["parse_tokens", "LOCAL_OWNER", "owner_for_token", "request_owner", "is_loopback", "redact"]

LOCAL_OWNER = "local"


def owner_for_token(table: dict[str, str], token: str) -> str | None:
    """The owner of ``token``, compared in constant time against every known token."""
    found = None
    given = token.encode()
    for known, owner in table.items():
        if hmac.compare_digest(known.encode(), given):
            found = owner
    return found


def is_loopback(host: str | None) -> bool:
    if not host:
        return False
    if host in ("localhost", "testclient"):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


_UNAUTH = {"WWW-Authenticate": "Bearer"}


async def request_owner(request: Request) -> str:
    """The owner of a request (a FastAPI dependency; async because it does no I/O, so it
    needs no thread); raises 401/403 as described above."""
    app = request.app
    table: dict[str, str] = app.state.tokens
    if not table:
        client = request.client.host if request.client else None
        if not app.state.settings.allow_remote and not is_loopback(client):
            raise HTTPException(403, "this server has no tokens configured and serves loopback clients only; "
                                     "configure TOPOSCOUT_TOKENS or start it with --allow-remote")
        return LOCAL_OWNER
    header = request.headers.get("authorization")
    token = None
    if header:
        scheme, _, value = header.partition(" ")
        if scheme.lower() != "bearer" or not value.strip():
            raise HTTPException(401, "Authorization header: expected 'Bearer <token>'", headers=_UNAUTH)
        token = value.strip()
    else:
        token = request.cookies.get("toposcout_token")
    if not token:
        raise HTTPException(401, "Authorization header: a bearer token is required on this server",
                            headers=_UNAUTH)
    owner = owner_for_token(table, token)
    if owner is None:
        raise HTTPException(401, "Authorization header: unknown token", headers=_UNAUTH)
    return owner


_SECRET_QUERY = re.compile(r"(?i)(token=)[^&\s\"]*")


def redact(text: str) -> str:
    """Hide ``token=...`` query values (the access log must not carry tokens).

    >>> redact("GET /?token=abc&x=1 HTTP/1.1")
    'GET /?token=***&x=1 HTTP/1.1'
    """
    return _SECRET_QUERY.sub(r"\1***", text)
