"""The HTTP client: every endpoint of openapi.yaml, retries that never duplicate data.

Retries: a connection error, a timeout, a dropped connection, a 503 or a 429 is tried
again (up to ``RetryPolicy.attempts`` tries in all) after an exponentially growing,
fully jittered wait (tenacity's ``wait_random_exponential``), at least the service's
``Retry-After`` and at most ``RetryPolicy.max_wait``. Every create — ``put_metric``,
``post_batch``, ``start_fit``, ``retry_fit``, ``activate``, ``start_grouping_run`` — sends an
``Idempotency-Key`` generated once per call and sent again on every retry: if the first
try did reach the service, the retry gets the first answer back (``Answer-Replayed:
true``) and nothing is stored twice.
"""

from __future__ import annotations

import contextlib
import json as jsonlib
import random
import sys
import time
import uuid
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import httpx
from tenacity import (
    RetryCallState,
    Retrying,
    retry_if_exception_type,
    retry_if_result,
    stop_after_attempt,
)

from . import batch_stats, bodies
from .errors import FitTimeout, GroupingRunTimeout, ProblemError, Unreachable

ENDED = frozenset({"succeeded", "failed"})  # a fit in one of these will not change again
RUN_ENDED = frozenset({"done", "failed"})  # a grouping run's final states
NEXT_CURSOR = "Next-Cursor"  # where an Arrow page of results says its next cursor
IDEMPOTENCY_HEADER = "Idempotency-Key"
REPLAY_HEADER = "Answer-Replayed"
Json = dict[str, Any]


@dataclass(frozen=True)
class RetryPolicy:
    """How hard to try: ``attempts`` tries in all; waits grow from ``first_wait``
    (random in [0, first_wait·2ⁿ], full jitter) up to ``max_wait`` seconds."""

    attempts: int = 5
    first_wait: float = 0.25
    max_wait: float = 8.0
    statuses: frozenset[int] = frozenset({429, 503})

    def wait(self, state: RetryCallState) -> float:
        n = state.attempt_number  # tries made so far (≥ 1)
        jittered = random.uniform(0.0, min(self.max_wait, self.first_wait * 2 ** (n - 1)))
        outcome = state.outcome
        asked = 0.0
        if outcome is not None and not outcome.failed:
            asked = _retry_after(outcome.result().headers)
        return min(self.max_wait, max(jittered, asked))


NO_RETRY = RetryPolicy(attempts=1)


def _retry_after(headers: httpx.Headers) -> float:
    try:
        return max(0.0, float(headers.get("Retry-After", "0")))
    except ValueError:  # an HTTP date: not sent by this service; fall back to backoff
        return 0.0


class Answer(NamedTuple):
    """One answer as it came: status, parsed body (JSON, text or None), headers."""

    status: int
    body: Any
    headers: httpx.Headers

    @property
    def replayed(self) -> bool:
        """True when the service replayed the first answer to an Idempotency-Key."""
        return self.headers.get(REPLAY_HEADER) == "true"


def _parse(resp: httpx.Response) -> Any:
    if not resp.content:
        return None
    kind = resp.headers.get("Content-Type", "").split(";")[0].strip()
    if kind == "application/json" or kind.endswith("+json"):
        try:
            return resp.json()
        except ValueError:
            pass
    if kind == bodies.ARROW:
        return resp.content
    return resp.text


def new_key() -> str:
    """A fresh Idempotency-Key (printable ASCII, unique per logical call)."""
    return f"lwc-{uuid.uuid4().hex}"


class Client:
    """A session with one likewise service.

    ``Client("http://127.0.0.1:8000", token)``; use it as a context manager or call
    :meth:`close`. Methods return the service's JSON as dicts and lists; an error
    answer raises :class:`ProblemError`, a service that cannot be reached after every
    retry :class:`Unreachable`.
    """

    def __init__(self, base_url: str, token: str | None = None, *, timeout: float = 60.0,
                 retry: RetryPolicy | None = None,
                 transport: httpx.BaseTransport | None = None) -> None:
        self.base_url = base_url.rstrip("/")
        self.retry = retry or RetryPolicy()
        headers = {"User-Agent": "likewise-client/0.1"}
        if token:
            headers["Authorization"] = f"Bearer {token}"
        self._http = httpx.Client(base_url=self.base_url, headers=headers,
                                  timeout=timeout, transport=transport)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ low level
    def request(self, method: str, path: str, json: Any = None, *,
                content: bytes | None = None, content_type: str | None = None,
                params: Mapping[str, Any] | None = None,
                headers: Mapping[str, str] | None = None,
                idempotency_key: str | None = None,
                retry: RetryPolicy | None = None) -> Answer:
        """Send one logical request (retried as the policy says) and return the answer
        whatever its status. ``json`` is encoded here; ``content`` is sent as it is."""
        sent = dict(headers or {})
        if idempotency_key is not None:
            sent[IDEMPOTENCY_HEADER] = idempotency_key
        if json is not None:
            content, content_type = _dumps(json), bodies.JSON
        if content_type is not None:
            sent["Content-Type"] = content_type
        policy = retry or self.retry
        tries = 0

        def once() -> Answer:
            nonlocal tries
            tries += 1
            resp = self._http.request(method, path, content=content, params=params,
                                      headers=sent)
            answer = Answer(resp.status_code, _parse(resp), resp.headers)
            if tries > 1 and method == "DELETE" and answer.status == 404:
                # the first try's DELETE went through; only its answer was lost
                return Answer(204, None, resp.headers)
            return answer

        def again(answer: Answer) -> bool:
            if answer.status in policy.statuses:
                return True
            # a resent create whose first try the service is still handling
            return (idempotency_key is not None and tries > 1 and answer.status == 409
                    and IDEMPOTENCY_HEADER in str((answer.body or {}).get("detail", "")))

        retrying = Retrying(
            stop=stop_after_attempt(max(1, policy.attempts)),
            wait=policy.wait,
            retry=(retry_if_exception_type(httpx.TransportError) | retry_if_result(again)),
            retry_error_callback=lambda state: state.outcome.result(),  # last answer
        )
        try:
            return retrying(once)
        except httpx.TransportError as exc:
            raise Unreachable(f"cannot reach {self.base_url} ({exc or type(exc).__name__}); "
                              f"{method} {path} tried {tries} times") from exc

    def _call(self, method: str, path: str, json: Any = None, **kwargs: Any) -> Any:
        """``request`` that raises :class:`ProblemError` on an error answer."""
        answer = self.request(method, path, json, **kwargs)
        if answer.status >= 400:
            raise _problem(answer, method, path)
        return answer.body

    def _create(self, method: str, path: str, json: Any = None,
                idempotency_key: str | None = None, **kwargs: Any) -> Any:
        return self._call(method, path, json, idempotency_key=idempotency_key or new_key(),
                          **kwargs)

    def pages(self, path: str, key: str, params: Json | None = None, *,
              limit: int | None = None) -> Iterator[list[Json]]:
        """Every page of a list endpoint, following ``next_cursor`` until it is null."""
        query = dict(params or {})
        if limit is not None:
            query["limit"] = limit
        while True:
            body = self._call("GET", path, params=query)
            yield body[key]
            if not body.get("next_cursor"):
                return
            query["cursor"] = body["next_cursor"]

    def _every(self, path: str, key: str, params: Json | None = None) -> list[Json]:
        return [item for page in self.pages(path, key, params) for item in page]

    # ------------------------------------------------------------------ metrics
    def list_metrics(self) -> list[Json]:
        """Every metric, by name (all pages)."""
        return self._every("/v1/metrics", "metrics")

    def get_metric(self, name: str) -> Json:
        return self._call("GET", f"/v1/metrics/{name}")

    def put_metric(self, name: str, features: Sequence[str], description: str | None = None,
                   *, idempotency_key: str | None = None) -> Json:
        """Create the metric, or update its description (and features while it has no
        batches)."""
        body: Json = {"features": list(features)}
        if description is not None:
            body["description"] = description
        return self._create("PUT", f"/v1/metrics/{name}", body, idempotency_key)

    def delete_metric(self, name: str) -> None:
        self._call("DELETE", f"/v1/metrics/{name}")

    # ------------------------------------------------------------------ batches
    def post_batch(self, metric: str, data: Any, groups: Any, *,
                   columns: Sequence[str] | None = None, allow_duplicate: bool = False,
                   content_type: str = bodies.JSON,
                   idempotency_key: str | None = None) -> Json:
        """Post one labelled batch.

        ``data``: a pandas DataFrame, an Arrow table, a list of dicts, or an array with
        ``columns``. ``groups``: one label per record, or the name of the column holding
        them. ``content_type=bodies.ARROW`` sends an Arrow IPC stream (pyarrow).
        """
        data, labels = bodies.split_groups(data, groups)
        table = bodies.to_table(data, columns)
        raw, params = bodies.encode(table, {"groups": labels}, content_type)
        if allow_duplicate:
            params["allow_duplicate"] = "true"
        return self._create("POST", f"/v1/metrics/{metric}/batches", None, idempotency_key,
                            content=raw, content_type=content_type, params=params or None)

    def post_stats(self, metric: str, stats: Json, *, allow_duplicate: bool = False,
                   idempotency_key: str | None = None) -> Json:
        """Post one statistics-only batch: a ``likewise.batch-stats/1`` document (see
        :mod:`likewise_client.batch_stats` and docs/batch-stats.md)."""
        params = {"allow_duplicate": "true"} if allow_duplicate else None
        return self._create("POST", f"/v1/metrics/{metric}/batches", None, idempotency_key,
                            content=_dumps(stats), content_type=batch_stats.MEDIA_TYPE,
                            params=params)

    def list_batches(self, metric: str) -> list[Json]:
        """Every batch summary, oldest first (all pages)."""
        return self._every(f"/v1/metrics/{metric}/batches", "batches")

    def get_batch(self, metric: str, batch_id: str) -> Json:
        return self._call("GET", f"/v1/metrics/{metric}/batches/{batch_id}")

    def delete_batch(self, metric: str, batch_id: str) -> None:
        self._call("DELETE", f"/v1/metrics/{metric}/batches/{batch_id}")

    # ------------------------------------------------------------------ fits
    def start_fit(self, metric: str, *, idempotency_key: str | None = None,
                  **params: Any) -> Json:
        """Queue a fit (``method``, ``activate``, ``alphas``, ``n_folds``, ``k_max``,
        ``max_rank``, ``seed``; all optional). Returns the fit, status ``waiting``."""
        return self._create("POST", f"/v1/metrics/{metric}/fits", params, idempotency_key)

    def get_fit(self, fit_id: str) -> Json:
        return self._call("GET", f"/v1/fits/{fit_id}")

    def list_fits(self, metric: str | None = None, status: str | None = None) -> list[Json]:
        params = {k: v for k, v in (("metric", metric), ("status", status)) if v}
        return self._every("/v1/fits", "fits", params)

    def retry_fit(self, fit_id: str, *, idempotency_key: str | None = None) -> Json:
        return self._create("POST", f"/v1/fits/{fit_id}/retry", None, idempotency_key)

    def wait_for_fit(self, fit_id: str, timeout: float = 300.0, *,
                     on_progress: Callable[[Json], None] | None = None,
                     interval: float = 0.5, progress_bar: bool | None = None) -> Json:
        """Poll the fit until it ends (succeeded or failed) and return it; raise
        :class:`FitTimeout` after ``timeout`` seconds. ``on_progress(fit)`` is called
        after every poll. ``interval`` is kept within [0.05, 10] seconds.
        ``progress_bar``: a tqdm bar on stderr (None: when stderr is a terminal)."""
        if progress_bar is None:
            progress_bar = sys.stderr.isatty()
        if progress_bar and on_progress is None:
            with fit_progress_bar(fit_id) as show:
                return self.wait_for_fit(fit_id, timeout, on_progress=show,
                                         interval=interval, progress_bar=False)
        return _poll(lambda: self.get_fit(fit_id), ENDED, timeout, interval, on_progress,
                     FitTimeout)

    # ------------------------------------------------------------------ versions
    def list_versions(self, metric: str) -> list[Json]:
        """Every version summary, by number (all pages)."""
        return self._every(f"/v1/metrics/{metric}/versions", "versions")

    def get_version(self, metric: str, version: int) -> Json:
        return self._call("GET", f"/v1/metrics/{metric}/versions/{int(version)}")

    def explain(self, metric: str, version: int) -> Json:
        """The version by feature name: weight per unit and share per feature, the
        strongest directions with their loadings, held-out ARI per fold (unrounded)."""
        return self._call("GET", f"/v1/metrics/{metric}/versions/{int(version)}/explanation")

    def activate(self, metric: str, version: int, reason: str = "", *,
                 idempotency_key: str | None = None) -> Json:
        """Make ``version`` the active one (roll back or forward), recorded with
        ``reason`` in the history."""
        return self._create("PUT", f"/v1/metrics/{metric}/active",
                            {"version": int(version), "reason": reason}, idempotency_key)

    def history(self, metric: str) -> list[Json]:
        """Every activation, oldest first (all pages)."""
        return self._every(f"/v1/metrics/{metric}/history", "history")

    def drift(self, metric: str, version: int | None = None, since: str | None = None
              ) -> Json:
        """How far recent groupings' records are from the version's training batches:
        scores per feature, margins and distances, and the verdict."""
        params = {k: v for k, v in (("version", version), ("since", since)) if v is not None}
        return self._call("GET", f"/v1/metrics/{metric}/drift", params=params)

    # ------------------------------------------------------------------ groupings
    def group(self, metric: str, data: Any, k: int | str | None = "auto", *,
              version: int | None = None, columns: Sequence[str] | None = None,
              content_type: str = bodies.JSON) -> Json:
        """Group records (a DataFrame, a list of dicts, or an array with ``columns``)
        with the active version, or ``version``; ``k="auto"`` lets its rule choose."""
        members: Json = {"k": k}
        if version is not None:
            members["version"] = int(version)
        raw, params = bodies.encode(bodies.to_table(data, columns), members, content_type)
        return self._call("POST", f"/v1/metrics/{metric}/groupings", content=raw,
                          content_type=content_type, params=params or None)

    def group_frame(self, metric: str, frame: Any, id_column: str,
                    k: int | str | None = "auto", *, features: Sequence[str] | None = None,
                    version: int | None = None, content_type: str = bodies.ARROW) -> Any:
        """Group a pandas DataFrame; returns a DataFrame (the caller's index) with
        ``id_column`` as the service echoed it and ``group``, ``distance`` and
        ``margin`` beside it, ready to join back on ``id_column``.

        ``features`` (default: the metric's) are sent with the id column (Arrow on the
        wire unless ``content_type`` says otherwise); other columns stay here.
        """
        import pandas as pd  # the caller holds a DataFrame: pandas is loaded

        if features is None:
            features = self.get_metric(metric)["features"]
        members: Json = {"k": k, "ids": (id_column, frame[id_column].tolist())}
        if version is not None:
            members["version"] = int(version)
        raw, params = bodies.encode(bodies.to_table(frame, features), members, content_type)
        answer = self._call("POST", f"/v1/metrics/{metric}/groupings", content=raw,
                            content_type=content_type, params=params)
        return pd.DataFrame({id_column: answer["ids"], "group": answer["labels"],
                             "distance": answer["distances"],
                             "margin": pd.array(answer["margins"], dtype="Float64")},
                            index=frame.index)

    # ------------------------------------------------------------------ grouping runs
    def start_grouping_run(self, metric: str, data: Any, k: int | str | None = "auto", *,
                           version: int | None = None, features: Sequence[str] | None = None,
                           id_column: str | None = None, content_type: str = bodies.ARROW,
                           idempotency_key: str | None = None) -> Json:
        """Start grouping a large table (a DataFrame, an Arrow table, records, or an
        array with ``features`` as its columns) on the workers; returns the run
        (``run_id``, ``status`` …). ``id_column`` names a column of ``data`` whose
        values come back with the results; ``features`` (default: the metric's when an
        id column is given) are the columns sent besides it. Arrow on the wire."""
        members: Json = {"k": k}
        if version is not None:
            members["version"] = int(version)
        if id_column is not None:
            col = data[id_column]
            members["ids"] = (id_column, col.to_pylist() if hasattr(col, "to_pylist")
                              else list(col.tolist() if hasattr(col, "tolist") else col))
            if features is None:
                features = self.get_metric(metric)["features"]
        raw, params = bodies.encode(bodies.to_table(data, features), members, content_type)
        return self._create("POST", f"/v1/metrics/{metric}/grouping-runs", content=raw,
                            content_type=content_type, params=params or None,
                            idempotency_key=idempotency_key)

    def get_grouping_run(self, metric: str, run_id: str) -> Json:
        return self._call("GET", f"/v1/metrics/{metric}/grouping-runs/{run_id}")

    def delete_grouping_run(self, metric: str, run_id: str) -> None:
        self._call("DELETE", f"/v1/metrics/{metric}/grouping-runs/{run_id}")

    def wait_for_grouping_run(self, metric: str, run_id: str, timeout: float = 3600.0, *,
                              interval: float = 0.5,
                              on_progress: Callable[[Json], None] | None = None) -> Json:
        """Poll the run until it is done or failed and return it; raise
        :class:`GroupingRunTimeout` after ``timeout`` seconds. ``interval`` is kept
        within [0.05, 10] seconds."""
        return _poll(lambda: self.get_grouping_run(metric, run_id), RUN_ENDED, timeout,
                     interval, on_progress, GroupingRunTimeout)

    def grouping_run_pages(self, metric: str, run_id: str, *,
                           limit: int | None = None) -> Iterator[Json]:
        """Every page of a done run's results (``start``, ``labels``, ``distances``,
        ``margins``, ``ids`` when asked for), in record order."""
        path = f"/v1/metrics/{metric}/grouping-runs/{run_id}/results"
        query: Json = {} if limit is None else {"limit": int(limit)}
        while True:
            page = self._call("GET", path, params=query)
            yield page
            if not page.get("next_cursor"):
                return
            query["cursor"] = page["next_cursor"]

    def grouping_run_table(self, metric: str, run_id: str, *, limit: int = 65536) -> Any:
        """A done run's results as one pyarrow Table (columns ``record``, ``label``,
        ``distance``, ``margin``, ``id``), read page by page as Arrow streams."""
        import pyarrow as pa

        path = f"/v1/metrics/{metric}/grouping-runs/{run_id}/results"
        query: Json = {"limit": int(limit)}
        tables = []
        while True:
            answer = self.request("GET", path, params=query, headers={"Accept": bodies.ARROW})
            if answer.status >= 400:
                raise _problem(answer, "GET", path)
            tables.append(pa.ipc.open_stream(answer.body).read_all())
            cursor = answer.headers.get(NEXT_CURSOR)
            if not cursor:
                return pa.concat_tables(tables)
            query["cursor"] = cursor

    # ------------------------------------------------------------------ operations
    def queues(self) -> Json:
        """Queue counts (waiting, fitting, failed, done, oldest wait) and workers."""
        return self._call("GET", "/v1/queues")

    def health(self) -> Json:
        return self._call("GET", "/healthz")

    def ready(self) -> tuple[bool, Json]:
        """Readiness, asked once (a 503 here is an answer, not a reason to retry):
        ``(ready, body)`` where the body's ``checks`` say why."""
        answer = self.request("GET", "/readyz", retry=NO_RETRY)
        if answer.status not in (200, 503):
            raise _problem(answer, "GET", "/readyz")
        return answer.status == 200, answer.body

    def prometheus(self) -> str:
        """The Prometheus text exposition of ``/metrics``."""
        return self._call("GET", "/metrics")

    def openapi(self) -> Json:
        """The service's OpenAPI document (``/openapi.json``)."""
        return self._call("GET", "/openapi.json")

    def openapi_yaml(self) -> str:
        """The same document as the service's YAML text (``/openapi.yaml``)."""
        return self._call("GET", "/openapi.yaml")


@contextlib.contextmanager
def fit_progress_bar(fit_id: str) -> Iterator[Callable[[Json], None]]:
    """A tqdm bar on stderr for one fit; yields the ``on_progress`` that moves it."""
    from tqdm import tqdm

    with tqdm(total=100, unit="%", file=sys.stderr, desc=fit_id,
              bar_format="{desc} {percentage:3.0f}%|{bar}| {postfix}") as bar:
        def show(fit: Json) -> None:
            bar.n = round(100 * float(fit.get("progress") or 0))
            bar.set_postfix_str(f"{fit['status']} {fit.get('stage') or ''}".strip())

        yield show


def _poll(get: Callable[[], Json], ended: frozenset[str], timeout: float, interval: float,
          on_progress: Callable[[Json], None] | None,
          too_late: Callable[[Json, float], Exception]) -> Json:
    """``get()`` every ``interval`` (kept within [0.05, 10] s) until its ``status`` is
    one of ``ended``; ``too_late(last, timeout)`` is raised after ``timeout`` seconds."""
    interval = min(10.0, max(0.05, interval))
    deadline = time.monotonic() + timeout
    while True:
        current = get()
        if on_progress is not None:
            on_progress(current)
        if current["status"] in ended:
            return current
        left = deadline - time.monotonic()
        if left <= 0:
            raise too_late(current, timeout)
        time.sleep(min(interval, left))


def _problem(answer: Answer, method: str, path: str) -> ProblemError:
    body = answer.body if isinstance(answer.body, dict) else {
        "title": "error", "detail": str(answer.body or "")}
    return ProblemError(answer.status, body, method, path)


def _dumps(value: Any) -> bytes:
    return jsonlib.dumps(value, allow_nan=False, separators=(",", ":")).encode()
