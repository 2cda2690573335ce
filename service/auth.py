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
from typing import Iterable

from fastapi import HTTPException, Request

from compiler.errors import ToposcoutError

__all__ = ["parse_tokens", "LOCAL_OWNER", "owner_for_token", "request_owner", "is_loopback", "redact"]

LOCAL_OWNER = "local"
_OWNER = re.compile(r"^[A-Za-z0-9_.@-]{1,64}$")


def parse_tokens(lines: Iterable[str]) -> dict[str, str]:
    """token -> owner from ``owner:token`` entries; blank entries and ``#`` comments skipped.

    >>> parse_tokens(["alice:alice-tok-1", " # comment", "", "bob:bob-tok-22"])
    {'alice-tok-1': 'alice', 'bob-tok-22': 'bob'}
    """
    table: dict[str, str] = {}
    for n, raw in enumerate(lines, 1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        owner, sep, token = line.partition(":")
        owner, token = owner.strip(), token.strip()
        if not sep or not token or not _OWNER.match(owner):
            raise ToposcoutError(f"token entry {n}: expected owner:token with an owner of letters, digits "
                                 "and _.@- (the token itself is not shown)", field="tokens")
        if len(token) < 8:
            raise ToposcoutError(f"token entry {n} (owner {owner}): a token needs at least 8 characters",
                                 field="tokens")
        if token in table:
            raise ToposcoutError(f"token entry {n} (owner {owner}): the same token is given twice", field="tokens")
        table[token] = owner
    return table


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
