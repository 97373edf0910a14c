"""Who may do what: Bearer tokens, their scopes and the metrics they may touch.

Scopes (names of our own):

========== ==========================================================================
``view``    read metrics, batches, fits, versions, history, the queue; group records
``feed``    post and delete batches
``fit``     request and retry fits
``release`` activate a version (roll back or forward)
``manage``  create, change and delete metrics
========== ==========================================================================

Tokens come from three places:

- ``LIKEWISE_ADMIN_TOKEN`` — principal ``admin``, every scope, every metric;
- ``LIKEWISE_TOKENS`` — ``name=token`` (every scope) or ``name=token:view+feed``;
- ``LIKEWISE_TOKEN_FILE`` — a JSON file holding only SHA-256 hashes of tokens::

      {"tokens": [{"name": "parcels-etl", "sha256": "<64 hex digits>",
                   "scopes": ["view", "feed"], "metrics": ["parcels-*"]}]}

  ``metrics`` (optional) lists metric names or shell-style patterns (``*``, ``?``);
  without it a token may touch every metric.

Every token is kept as the SHA-256 of its text, and a presented token is compared
with each of them in constant time (:func:`hmac.compare_digest`).
"""

from __future__ import annotations

import fnmatch
import hashlib
import hmac
import json
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from service.config import ADMIN_NAME

SCOPES = ("view", "feed", "fit", "release", "manage")
_HEX64 = re.compile(r"[0-9a-f]{64}")
_NAME = re.compile(r"[A-Za-z0-9_.@-]{1,64}")


def digest(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


@dataclass(frozen=True)
class Principal:
    name: str
    scopes: frozenset[str]
    metrics: tuple[str, ...] | None = None  # patterns; None = every metric

    def may(self, scope: str) -> bool:
        return scope in self.scopes

    def may_touch(self, metric: str) -> bool:
        return self.metrics is None or any(fnmatch.fnmatchcase(metric, p) for p in self.metrics)


@dataclass(frozen=True)
class _Entry:
    sha256: bytes
    principal: Principal


class TokenBook:
    """The configured tokens, by hash."""

    def __init__(self, entries: list[_Entry]) -> None:
        self._entries = entries

    def __len__(self) -> int:
        return len(self._entries)

    def find(self, presented: str) -> Principal | None:
        given = digest(presented).encode()
        found = None
        for entry in self._entries:  # every entry is compared: no early exit
            if hmac.compare_digest(given, entry.sha256):
                found = entry.principal
        return found

    def names(self) -> list[str]:
        return [e.principal.name for e in self._entries]


def _scopes(raw: Any, where: str) -> frozenset[str]:
    if not isinstance(raw, list) or not raw or any(s not in SCOPES for s in raw):
        raise ValueError(f"{where}: scopes must be a non-empty list of {', '.join(SCOPES)}")
    return frozenset(raw)


def _entry(name: str, sha: str, scopes: frozenset[str], metrics: Any, where: str) -> _Entry:
    if not isinstance(name, str) or not _NAME.fullmatch(name):
        raise ValueError(f"{where}: a name is 1-64 letters, digits or . _ @ -")
    if not isinstance(sha, str) or not _HEX64.fullmatch(sha):
        raise ValueError(f"{where}: sha256 must be 64 lowercase hex digits")
    if metrics is not None and (not isinstance(metrics, list) or not metrics or any(
            not isinstance(m, str) or not m for m in metrics)):
        raise ValueError(f"{where}: metrics must be a non-empty list of names or patterns")
    pats = tuple(metrics) if metrics is not None else None
    return _Entry(sha.encode(), Principal(name, scopes, pats))


def book(admin_token: str | None, tokens: dict[str, str], token_file: str | None) -> TokenBook:
    """All configured tokens; ValueError names a bad entry (never its token)."""
    entries: list[_Entry] = []
    if admin_token:
        entries.append(_entry(ADMIN_NAME, digest(admin_token), frozenset(SCOPES), None,
                              "LIKEWISE_ADMIN_TOKEN"))
    for name, value in tokens.items():
        token, _, suffix = value.rpartition(":")
        wanted = suffix.split("+")
        if token and all(w in SCOPES for w in wanted):
            scopes = frozenset(wanted)
        else:  # no scope suffix (a token may itself contain ':')
            token, scopes = value, frozenset(SCOPES)
        entries.append(_entry(name, digest(token), scopes, None, f"LIKEWISE_TOKENS {name}"))
    if token_file:
        data = json.loads(Path(token_file).read_text(encoding="utf-8"))
        items = data.get("tokens") if isinstance(data, dict) else None
        if not isinstance(items, list):
            raise ValueError(f"{token_file}: expected {{\"tokens\": [...]}}")
        for i, item in enumerate(items):
            where = f"{token_file} tokens[{i}]"
            if not isinstance(item, dict) or set(item) - {"name", "sha256", "scopes",
                                                          "metrics"}:
                raise ValueError(f"{where}: keys are name, sha256, scopes, metrics")
            entries.append(_entry(item.get("name"), item.get("sha256"),
                                  _scopes(item.get("scopes"), where), item.get("metrics"),
                                  where))
    names = [e.principal.name for e in entries]
    if len(set(names)) != len(names):
        raise ValueError("two tokens share a name; names are recorded as who acted")
    return TokenBook(entries)
