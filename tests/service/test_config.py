"""Settings from LIKEWISE_* variables, the error family and Context wiring."""

from __future__ import annotations

import pytest

from service.config import Settings
from service.context import Context
from service.core import CoreError
from service.errors import InvalidInput, NotFound, from_core


def test_defaults_have_no_secrets() -> None:
    s = Settings.from_env({})
    assert s.redis_url is None and s.admin_token is None and s.tokens == {}
    assert len(s.token_book()) == 0
    assert (s.key_prefix, s.queue_name, s.data_dir) == ("likewise", "likewise-fits", "./var")
    assert (s.fit_timeout, s.fit_retries, s.max_batch_records, s.max_batch_features) == (
        1800, 2, 100_000, 1000)
    assert (s.max_request_bytes, s.host, s.port, s.workers, s.worker_seen_seconds) == (
        64 * 2**20, "127.0.0.1", 8000, 1, 60)


def test_environment_and_overrides() -> None:
    env = {"LIKEWISE_REDIS_URL": "redis://h:1/2", "LIKEWISE_KEY_PREFIX": "blue",
           "LIKEWISE_ADMIN_TOKEN": "sekrit", "LIKEWISE_TOKENS": "etl=t1, viewer=t2,",
           "LIKEWISE_FIT_TIMEOUT": "60", "LIKEWISE_PORT": "9000", "LIKEWISE_WORKERS": "3"}
    s = Settings.from_env(env, port=9100)
    assert (s.redis_url, s.key_prefix, s.queue_name) == ("redis://h:1/2", "blue", "blue-fits")
    assert (s.fit_timeout, s.port, s.workers) == (60, 9100, 3)
    book = s.token_book()
    assert sorted(book.names()) == ["admin", "etl", "viewer"]
    assert (book.find("t1").name, book.find("t2").name, book.find("sekrit").name) == (
        "etl", "viewer", "admin")
    assert book.find("t3") is None
    assert "sekrit" not in repr(s) and "t1" not in repr(s)
    assert Settings.from_env({**env, "LIKEWISE_QUEUE": "q"}).queue_name == "q"
    assert s.replace(key_prefix="green").queue_name == "green-fits"


@pytest.mark.parametrize("env", [
    {"LIKEWISE_TOKENS": "notoken"}, {"LIKEWISE_TOKENS": "admin=x"},
    {"LIKEWISE_FIT_TIMEOUT": "soon"}, {"LIKEWISE_WORKERS": "0"},
    {"LIKEWISE_KEY_PREFIX": "a b"},
])
def test_bad_environment_is_refused(env) -> None:
    with pytest.raises(ValueError):
        Settings.from_env(env)


def test_errors_carry_problem_fields() -> None:
    err = from_core(CoreError("k=9 is larger than the number of records (3)", field="k"))
    assert isinstance(err, InvalidInput) and err.status == 422
    assert err.errors == [{"field": "k", "message": err.detail}]
    body = NotFound("metric 'x' does not exist").to_problem("/v1/metrics/x")
    assert body == {"type": "urn:likewise:problem:not-found", "title": "Not found",
                    "status": 404, "detail": "metric 'x' does not exist",
                    "instance": "/v1/metrics/x"}


def test_context_needs_a_redis_url_and_connects_lazily() -> None:
    with pytest.raises(ValueError):
        Context.build(Settings())
    ctx = Context.build(Settings(redis_url="redis://127.0.0.1:1/0"))  # nothing listens
    assert ctx.queue.name == "likewise-fits" and ctx.storage.prefix == "likewise"
    ctx.close()
