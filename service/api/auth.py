"""Bearer-token authentication for every ``/v1`` route.

Tokens come from the settings (``LIKEWISE_ADMIN_TOKEN`` → principal ``admin``,
``LIKEWISE_TOKENS`` → their names). Every configured token is compared with
:func:`hmac.compare_digest`, so the time taken does not tell which one nearly matched.
The principal's name is ``who`` for activations and ``requested_by`` for fits.
"""

from __future__ import annotations

import hmac

from flask import current_app, g, request

from service.errors import Unauthorized


def _match(presented: str, principals: dict[str, str]) -> str | None:
    found: str | None = None
    given = presented.encode("utf-8")
    for token, name in principals.items():
        if hmac.compare_digest(given, token.encode("utf-8")):
            found = name
    return found


def require_token() -> None:
    """``before_request`` hook: sets ``g.principal`` or raises a 401 problem."""
    header = request.headers.get("Authorization", "")
    scheme, _, presented = header.partition(" ")
    if scheme.lower() != "bearer" or not presented.strip():
        raise Unauthorized("Send 'Authorization: Bearer <token>'.")
    name = _match(presented.strip(), current_app.extensions["likewise.principals"])
    if name is None:
        raise Unauthorized("The Bearer token is not valid.")
    g.principal = name


def principal() -> str:
    """The authenticated caller's name (only inside a ``/v1`` request)."""
    return str(g.principal)
