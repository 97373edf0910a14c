"""Settings of a likewise deployment, read from ``LIKEWISE_*`` environment variables.

No secret has a default: without ``LIKEWISE_ADMIN_TOKEN`` and ``LIKEWISE_TOKENS``
no Bearer token is accepted. Nothing here touches the network or the disk.

=========================== ============================== ===========================
variable                    field                          default
=========================== ============================== ===========================
LIKEWISE_REDIS_URL          redis_url                      None (launcher decides)
LIKEWISE_KEY_PREFIX         key_prefix                     ``likewise``
LIKEWISE_DATA_DIR           data_dir                       ``./var``
LIKEWISE_ADMIN_TOKEN        admin_token                    None
LIKEWISE_TOKENS             tokens (``name=token[:scopes],…``) {}
LIKEWISE_TOKEN_FILE         token_file (hashed tokens)     None
LIKEWISE_QUEUE              queue_name                     ``<key_prefix>-fits``
LIKEWISE_FIT_TIMEOUT        fit_timeout (seconds)          1800
LIKEWISE_FIT_RETRIES        fit_retries                    2
LIKEWISE_MAX_BATCH_RECORDS  max_batch_records              100000
LIKEWISE_MAX_BATCH_FEATURES max_batch_features             1000
LIKEWISE_MAX_GROUPS         max_groups (largest k asked for) 100
LIKEWISE_MAX_BATCH_BYTES    max_batch_bytes (raw float64)  64 MiB
LIKEWISE_MAX_REQUEST_BYTES  max_request_bytes              64 MiB
LIKEWISE_HOST               host                           ``127.0.0.1``
LIKEWISE_PORT               port                           8000
LIKEWISE_WORKERS            workers                        1
LIKEWISE_WEB_WORKERS        web_workers (HTTP processes)   cores + 1
LIKEWISE_WORKER_SEEN_SECONDS worker_seen_seconds           60
LIKEWISE_WARDEN_SECONDS     warden_seconds (sweep period)  5
LIKEWISE_LEASE_SECONDS      lease_seconds (attempt alive)  10
LIKEWISE_STRANDED_SECONDS   stranded_seconds (a lost job)  60
LIKEWISE_IDEMPOTENCY_HOURS  idempotency_hours (answers kept) 24
LIKEWISE_LOG_FORMAT         (service/logs.py) ``json``|``text`` ``json``, ``text`` on a terminal
LIKEWISE_LOG_LEVEL          (service/logs.py) log level    ``INFO``
LIKEWISE_DRIFT_HOURS        drift_hours (hourly buckets kept) 72
LIKEWISE_MAX_RUN_RECORDS    max_run_records (a grouping run) 2000000
LIKEWISE_MAX_RUN_BYTES      max_run_bytes (raw float64)    512 MiB
LIKEWISE_MAX_RUN_REQUEST_BYTES max_run_request_bytes       1 GiB
LIKEWISE_RUN_RESULT_HOURS   run_result_hours (results kept) 24
LIKEWISE_CLIENT_SECONDS     client_seconds (a request's head) 10
LIKEWISE_CLIENT_MIN_RATE    client_min_rate (bytes/s, body and answer) 100000
=========================== ============================== ===========================

The two log variables are read by the entry points' logging setup
(:mod:`service.logs`), not kept in :class:`Settings`.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from service.tokens import TokenBook

ENV_PREFIX = "LIKEWISE_"
ADMIN_NAME = "admin"
MIB = 1024 * 1024
# the ceiling of LIKEWISE_MAX_BATCH_FEATURES: request envelopes refuse longer name
# lists before looking at a single name
MAX_FEATURES = 10_000


def _parse_tokens(raw: str) -> dict[str, str]:
    """``"name=token,name2=token2"`` → ``{"name": "token", …}``; blanks ignored."""
    tokens: dict[str, str] = {}
    for part in raw.split(","):
        part = part.strip()
        if not part:
            continue
        name, sep, token = part.partition("=")
        name, token = name.strip(), token.strip()
        if not sep or not name or not token:
            raise ValueError(f"{ENV_PREFIX}TOKENS entry {part!r} is not name=token")
        if name == ADMIN_NAME:
            raise ValueError(f"{ENV_PREFIX}TOKENS may not define the reserved name 'admin'")
        tokens[name] = token
    return tokens


@dataclass(frozen=True)
class Settings:
    """One deployment's configuration (immutable; build with :meth:`from_env`)."""

    redis_url: str | None = None
    key_prefix: str = "likewise"
    data_dir: str = "./var"
    admin_token: str | None = field(default=None, repr=False)
    tokens: dict[str, str] = field(default_factory=dict, repr=False)
    token_file: str | None = None
    queue_name: str = ""  # empty → "<key_prefix>-fits"
    fit_timeout: int = 1800
    fit_retries: int = 2
    max_batch_records: int = 100_000
    max_batch_features: int = 1000
    max_groups: int = 100
    max_batch_bytes: int = 64 * MIB
    max_request_bytes: int = 64 * MIB
    host: str = "127.0.0.1"
    port: int = 8000
    workers: int = 1
    # one process more than cores: while each core parses a large body (JSON parsing
    # holds a process's GIL), one process is still free for probes and small requests
    web_workers: int = field(default_factory=lambda: (os.cpu_count() or 1) + 1)
    worker_seen_seconds: int = 60
    warden_seconds: int = 5
    lease_seconds: int = 10
    stranded_seconds: int = 60
    idempotency_hours: int = 24
    drift_hours: int = 72
    # grouping runs (POST …/grouping-runs): large tables grouped by the workers
    max_run_records: int = 2_000_000
    max_run_bytes: int = 512 * MIB
    max_run_request_bytes: int = 1024 * MIB
    run_result_hours: int = 24
    # the web tier's deadlines on a client (service/deadlines.py): its request's head
    # within client_seconds, a body or an answer within that plus its length at
    # client_min_rate bytes a second
    client_seconds: int = 10
    client_min_rate: int = 100_000

    def __post_init__(self) -> None:
        if not self.key_prefix or any(c in self.key_prefix for c in " \t\r\n"):
            raise ValueError("key_prefix must be a non-empty string without whitespace")
        if not self.queue_name:
            object.__setattr__(self, "queue_name", f"{self.key_prefix}-fits")
        for name in ("fit_timeout", "max_batch_records", "max_batch_features", "max_groups",
                     "max_batch_bytes", "max_request_bytes", "workers", "web_workers",
                     "warden_seconds",
                     "lease_seconds", "idempotency_hours", "drift_hours",
                     "max_run_records", "max_run_bytes", "max_run_request_bytes",
                     "run_result_hours", "client_seconds", "client_min_rate"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"{name} must be at least 1")
        if self.max_batch_features > MAX_FEATURES:
            raise ValueError(f"max_batch_features must be at most {MAX_FEATURES}")
        if self.stranded_seconds < 0:
            raise ValueError("stranded_seconds must be ≥ 0")
        if self.fit_retries < 0:
            raise ValueError("fit_retries must be ≥ 0")

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None, **overrides: Any) -> Settings:
        """Read ``LIKEWISE_*`` from ``environ`` (default ``os.environ``); ``overrides``
        (field names) win over the environment."""
        env = os.environ if environ is None else environ
        values: dict[str, Any] = {}
        for f in dataclasses.fields(cls):
            key = ENV_PREFIX + ("QUEUE" if f.name == "queue_name" else f.name.upper())
            raw = env.get(key)
            if raw is None or raw == "":
                continue
            if f.name == "tokens":
                values[f.name] = _parse_tokens(raw)
            elif f.type in ("int", int):
                try:
                    values[f.name] = int(raw)
                except ValueError as exc:
                    raise ValueError(f"{key} must be a whole number, got {raw!r}") from exc
            else:
                values[f.name] = raw
        values.update(overrides)
        return cls(**values)

    def token_book(self) -> TokenBook:
        """Every configured token (as hashes) with its principal, scopes and metrics."""
        from service.tokens import book

        return book(self.admin_token, self.tokens, self.token_file)

    def replace(self, **changes: Any) -> Settings:
        """A copy with some fields changed (``queue_name`` follows a new prefix unless given)."""
        if "key_prefix" in changes and "queue_name" not in changes:
            if self.queue_name == f"{self.key_prefix}-fits":
                changes["queue_name"] = ""
        return dataclasses.replace(self, **changes)
