"""Bearer-token checks for the HTTP service (no web framework imported here).

The service has one shared secret, fixed when the server starts (see
:func:`ergodex.service.settings.read_token`). A request proves it holds the secret with the header
``Authorization: Bearer <token>``. The comparison runs in constant time so that the time a refusal
takes tells an attacker nothing about how many leading characters were right.
"""

from __future__ import annotations

import hashlib
import hmac

#: Why a write was refused, by case; the HTTP layer turns these into 401/403 JSON errors.
NO_TOKEN_CONFIGURED = "no-token-configured"
MISSING_TOKEN = "missing-token"
WRONG_TOKEN = "wrong-token"

MESSAGES = {
    NO_TOKEN_CONFIGURED: (
        "this server has no write token configured, so every write is refused; restart it with "
        "--token-file FILE or the ERGODEX_TOKEN environment variable"
    ),
    MISSING_TOKEN: "this endpoint needs the header 'Authorization: Bearer <token>'",
    WRONG_TOKEN: "the bearer token does not match the server's token",
}


def bearer_token(authorization: str | None) -> str | None:
    """The token in an ``Authorization: Bearer <token>`` header value, or ``None``.

    The scheme name is case-insensitive (RFC 6750 section 2.1 follows RFC 7235, where auth
    schemes are case-insensitive); anything else (no header, another scheme, an empty token)
    gives ``None``.
    """
    if not authorization:
        return None
    scheme, _, token = authorization.strip().partition(" ")
    if scheme.lower() != "bearer":
        return None
    token = token.strip()
    return token or None


def tokens_match(presented: str, expected: str) -> bool:
    """Compare two tokens in time independent of where they first differ."""
    return hmac.compare_digest(presented.encode("utf-8"), expected.encode("utf-8"))


def authorize(authorization: str | None, expected: str | None) -> str | None:
    """``None`` when the header carries the expected token, else the refusal reason code.

    With no token configured every request is refused: a server started without a secret must
    not quietly accept writes from anyone who can reach its port.
    """
    if expected is None:
        return NO_TOKEN_CONFIGURED
    presented = bearer_token(authorization)
    if presented is None:
        return MISSING_TOKEN
    if not tokens_match(presented, expected):
        return WRONG_TOKEN
    return None


def owner_key(token: str | None) -> str | None:
    """A stable, non-secret key for the holder of ``token`` (queue bounds count per key).

    A hash rather than the token itself, so the job table never stores the secret; with several
    tokens one day, each gets its own bound without changing the table.
    """
    if token is None:
        return None
    return hashlib.sha256(b"ergodex-owner:" + token.encode("utf-8")).hexdigest()[:32]
