"""Fixtures of the HTTP tests: the app on a real Redis, a spec-checking client, open data.

Every API test talks through ``api`` (a :class:`SpecClient`), so every response body in
these tests is validated against openapi.yaml. ``unchanged`` snapshots every key of the
test deployment (their contents) so an error-path test can assert nothing was stored.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import Any

import pytest
from flask import Flask

from service.api import create_app
from service.context import Context
from service.usecases.backlog import BACKLOG
from tests.conftest import ADMIN_TOKEN, ETL_TOKEN

from .helpers import IRIS_FEATURES, iris_batches, post_batches
from .spec import SEEN, SpecClient, load_spec, unexercised

__all__ = ["ADMIN_TOKEN", "ETL_TOKEN"]


def pytest_terminal_summary(terminalreporter: Any) -> None:
    """List documented statuses no API test produced (information, not a failure)."""
    if not SEEN:
        return
    missing = unexercised(load_spec())
    terminalreporter.write_sep("-", f"openapi.yaml: {len(missing)} documented answers untested")
    for line in missing:
        terminalreporter.write_line(line)


@pytest.fixture
def app(ctx: Context) -> Flask:
    return create_app(context=ctx)


@pytest.fixture
def api(app: Flask) -> SpecClient:
    return SpecClient(app, ADMIN_TOKEN)


def _content(ctx: Context, key: bytes) -> Any:
    """A key's logical content (DUMP is not stable: Redis rehashes on reads)."""
    r = ctx.redis
    kind = r.type(key).decode()
    readers: dict[str, Callable[[], Any]] = {
        "string": lambda: r.get(key),
        "hash": lambda: r.hgetall(key),
        "list": lambda: r.lrange(key, 0, -1),
        "set": lambda: r.smembers(key),
        "zset": lambda: r.zrange(key, 0, -1, withscores=True),
        "stream": lambda: r.xrange(key),
    }
    return kind, readers.get(kind, lambda: None)()


def _snapshot(ctx: Context) -> dict[bytes, Any]:
    s = ctx.settings
    keys: set[bytes] = set()
    for pattern in (f"{s.key_prefix}:*", f"rq:*{s.key_prefix}*"):
        keys.update(ctx.redis.scan_iter(match=pattern, count=1000))
    return {key: _content(ctx, key) for key in sorted(keys)}


@pytest.fixture
def unchanged(ctx: Context) -> Callable[[], contextlib.AbstractContextManager[None]]:
    """``with unchanged(): ...`` fails if any key of this deployment changed inside
    (keys starting with ``but`` aside)."""

    @contextlib.contextmanager
    def check(but: str | None = None) -> Iterator[None]:
        def snapshot() -> dict[bytes, Any]:
            assert BACKLOG.flush()  # summaries handed off by earlier requests land first
            keys = _snapshot(ctx)
            return {k: v for k, v in keys.items() if not (but and k.startswith(but.encode()))}

        before = snapshot()
        yield
        after = snapshot()
        added = sorted(set(after) - set(before))
        removed = sorted(set(before) - set(after))
        changed = sorted(k for k in set(before) & set(after) if before[k] != after[k])
        assert (added, removed, changed) == ([], [], []), "the failed request stored data"

    return check


@pytest.fixture
def metric(api: SpecClient) -> str:
    """An empty metric ``iris`` over the four iris features."""
    resp = api.put("/v1/metrics/iris", json={"features": IRIS_FEATURES, "description": "iris"})
    assert resp.status_code == 201
    return "iris"


@pytest.fixture
def with_batches(api: SpecClient, metric: str) -> list[str]:
    """Metric ``iris`` with six labelled iris batches; returns their ids."""
    return post_batches(api, metric, iris_batches(6))


@pytest.fixture
def fit_to_version(
    api: SpecClient, ctx: Context, run_worker_burst: Callable[..., Any]
) -> Callable[..., dict[str, Any]]:
    """``fit_to_version(name, **params)``: request a fit, run a real burst worker, return
    the finished fit (asserted succeeded)."""

    def run(name: str, **params: Any) -> dict[str, Any]:
        resp = api.post(f"/v1/metrics/{name}/fits", json=params)
        assert resp.status_code == 202, resp.get_json()
        run_worker_burst(ctx, max_jobs=5)
        fit = api.get(resp.headers["Location"]).get_json()
        assert fit["status"] == "succeeded", fit
        return fit

    return run


@pytest.fixture
def fitted(with_batches: list[str], fit_to_version: Callable[..., dict]) -> dict[str, Any]:
    """Metric ``iris`` with batches and version 1 (active), from a real worker."""
    fit = fit_to_version("iris")
    assert fit["version"] == 1
    return fit
