"""Drift watch: how far the records being grouped are from a version's training batches.

* At fit time, :func:`reference_blob` summarises the training batches as seen through
  the new version (each batch grouped with its own number of labelled groups), and
  the margins and distances of the batches cross-validation held out, each grouped
  by a map fitted without it; the fit commits it in the version's own transaction.
* Every grouping calls :func:`record`: after the answer, the process's backlog
  summarises the request and merges the summary into the ones of the same bucket
  (metric, version, hour) it still holds; a bucket's merged summaries are written
  in one round trip (never the records) at most every :data:`WRITE_SECONDS`, when
  they have waited that long, and at every ``BACKLOG.flush()`` and process exit. A
  busy web process thus writes a few times a second instead of once a request.
* :func:`report` scores the buckets since a time against the reference
  (:func:`service.core.drift.compare`); :func:`latest_verdicts` gives every metric's
  verdict for its active version over the whole retention, for dashboards.

Versions fitted before drift watch have no reference: nothing is recorded for them
and their report is a 409. References written before held-out margins existed score
live margins against the in-sample ones (the report's ``margins.reference`` says
which).
"""

from __future__ import annotations

import atexit
import logging
import os
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

import numpy as np

from service.clock import iso_utc
from service.core import CoreError, FittedMetric, Grouping, group_records
from service.core.drift import (
    FEATURE_LAYOUT,
    GROUP_LAYOUT,
    THRESHOLDS,
    Moments,
    Reference,
    Summary,
    build_reference,
    compare,
    empty_summary,
    summarise,
)
from service.errors import Conflict, NotFound
from service.store.codecs import pack_json, unpack_json
from service.tables import encoded_names

from .backlog import BACKLOG
from .metrics import require_metric
from .versions import chosen_version

if TYPE_CHECKING:
    from service.context import Context

HOUR = 3600
WRITE_SECONDS = 0.5  # the longest a process holds a bucket's summaries back

log = logging.getLogger(__name__)


def _hour(at: datetime) -> int:
    return int(at.timestamp()) // HOUR


def _now() -> datetime:
    return datetime.now(timezone.utc)


# ---- at fit time ---------------------------------------------------------------------
def reference_blob(fitted: FittedMetric, batches: Sequence[tuple[np.ndarray, np.ndarray]],
                   heldout: Iterable[Grouping] = ()) -> bytes | None:
    """The stored drift reference of a new version: its training batches, each grouped
    through it with as many groups as its labels name, and the held-out groupings of
    its cross-validation (``MetricSelector.heldout_groupings_``). None if the batches
    cannot be grouped (the version is then stored without a reference)."""
    try:
        seen = [(X, group_records(fitted, X, len(np.unique(labels)))) for X, labels in batches]
        return pack_json(build_reference(fitted, seen, list(heldout)).to_dict())
    except CoreError:
        return None


# ---- on every grouping ---------------------------------------------------------------
def _reference(ctx: Context, metric: dict[str, Any], n: int) -> Reference | None:
    """Version ``n``'s reference, cached like the version (both are immutable)."""
    key = ("drift-reference", metric["name"], metric["uid"], n)
    cached = ctx.cache.get(key)
    if cached is None:
        blob = ctx.storage.drift.reference(metric["name"], n)
        cached = (Reference.from_dict(unpack_json(blob)) if blob is not None else None,)
        ctx.cache.put(key, cached)
    return cached[0]


def _sizes(ref: Reference, n_features: int) -> dict[str, int]:
    return {"f": n_features * FEATURE_LAYOUT.size, "m": ref.layouts.margins.size,
            "d": ref.layouts.distances.size, "g": GROUP_LAYOUT.size}


def record(ctx: Context, metric: dict[str, Any], version: int, fitted: FittedMetric,
           X: np.ndarray, grouping: Grouping, imputed: int = 0) -> None:
    """Add one grouping request's summary to the current hour's bucket — after the
    answer has gone: the summary is computed, merged and written by the process's
    backlog (see the module doc)."""
    hour = _hour(_now())
    BACKLOG.submit(lambda: _add(ctx, metric, version, fitted, X, grouping, hour, imputed))


def _add(ctx: Context, metric: dict[str, Any], version: int, fitted: FittedMetric,
         X: np.ndarray, grouping: Grouping, hour: int, imputed: int) -> None:
    ref = _reference(ctx, metric, version)
    if ref is None:
        return
    s = summarise(fitted, X, grouping, ref.layouts)
    key = (ctx.storage.drift, metric["name"], metric["uid"], version, hour)
    _HELD.add(ctx, key, s, imputed)


@dataclass
class _Held:
    """Summaries of one bucket merged in this process, not written yet."""

    ctx: Context
    summary: Summary
    requests: int
    imputed: int
    since: float  # monotonic time of the first of them


class _Buckets:
    """The summaries this process holds back, by bucket (and store: tests build
    several deployments in one process). A forked child starts empty."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._held: dict[tuple[Any, ...], _Held] = {}
        self._pid = os.getpid()
        self._timer: threading.Timer | None = None

    def _mine(self) -> dict[tuple[Any, ...], _Held]:
        if self._pid != os.getpid():  # inherited from the parent: its to write
            self._held, self._timer, self._pid = {}, None, os.getpid()
        return self._held

    def add(self, ctx: Context, key: tuple[Any, ...], s: Summary, imputed: int) -> None:
        now = time.monotonic()
        with self._lock:
            held = self._mine()
            h = held.get(key)
            if h is None:
                held[key] = _Held(ctx, s, 1, imputed, now)
            else:
                h.summary, h.requests = h.summary.merge(s), h.requests + 1
                h.imputed += imputed
            due = self._take(lambda h: now - h.since >= WRITE_SECONDS)
            self._arm(now)  # the rest is written when due
        _write(due)

    def _arm(self, now: float) -> None:
        """(Lock held.) A timer for when the oldest bucket held falls due, if none runs."""
        held = self._mine()
        if held and self._timer is None:
            wait = min(h.since for h in held.values()) + WRITE_SECONDS - now
            self._timer = threading.Timer(max(wait, 0.0), self._wake)
            self._timer.daemon = True
            self._timer.start()

    def _take(self, pick: Callable[[_Held], bool]) -> list[tuple[tuple[Any, ...], _Held]]:
        held = self._mine()
        keys = [k for k, h in held.items() if pick(h)]
        return [(k, held.pop(k)) for k in keys]

    def _wake(self) -> None:
        with self._lock:
            self._timer = None
        # written on the backlog's thread, as the rest (a flush then waits for it); with
        # the backlog full, here and now rather than waiting for the next request
        if not BACKLOG.submit(self.write_due, "the drift summaries due are written in place",
                              may_hold=False):
            self.write_due()

    def write_due(self) -> None:
        now = time.monotonic()
        with self._lock:
            due = self._take(lambda h: now - h.since >= WRITE_SECONDS)
            self._arm(now)
        _write(due)

    def write_all(self) -> None:
        with self._lock:
            due = self._take(lambda h: True)
        _write(due)


def _write(due: list[tuple[tuple[Any, ...], _Held]]) -> None:
    for (_, name, uid, version, hour), h in due:
        ctx, s = h.ctx, h.summary
        ctx.storage.drift.add(
            name, uid, version, hour, (ctx.settings.drift_hours + 1) * HOUR,
            s.moments.count, s.moments.mean, s.moments.m2,
            {"f": s.features, "m": s.margins, "d": s.distances, "g": s.groups},
            imputed=h.imputed, requests=h.requests)


def _write_at_exit() -> None:
    try:
        _HELD.write_all()
    except Exception:  # noqa: BLE001 — Redis may be gone at exit: the summaries are lost
        log.warning("drift summaries held back could not be written at exit")


_HELD = _Buckets()
BACKLOG.on_flush(_HELD.write_all)
atexit.register(_write_at_exit)


# ---- reading -------------------------------------------------------------------------
def _live(ctx: Context, metric: dict[str, Any], n: int, ref: Reference, d: int,
          first: int, last: int) -> tuple[Summary, int, int, int]:
    """Merged buckets of hours ``first..last``: summary, requests, hours with data,
    missing values filled in."""
    buckets = ctx.storage.drift.buckets(metric["name"], metric["uid"], n,
                                        list(range(first, last + 1)), _sizes(ref, d))
    total = empty_summary(d, ref.layouts)
    for b in buckets:
        if b.count == 0 or len(b.mean) != d:
            continue
        c = b.counts
        total = total.merge(Summary(Moments(b.count, b.mean, b.m2),
                                    c["f"].reshape(d, FEATURE_LAYOUT.size), c["m"], c["d"],
                                    c["g"]))
    return (total, sum(b.requests for b in buckets), len(buckets),
            sum(b.imputed for b in buckets))


def report(ctx: Context, name: str, version: int | None = None,
           since: datetime | None = None) -> dict[str, Any]:
    """Drift of the records grouped with ``version`` (default: the active one) since
    ``since`` (``params.moment``; default and earliest: ``drift_hours`` ago; buckets are
    hourly, so it counts from the start of its hour). This process's own summaries
    still in its backlog or held back are written first; another process's land
    within about :data:`WRITE_SECONDS`."""
    from .groupings import load_version_metric

    BACKLOG.flush()
    metric = require_metric(ctx, name)
    now = _now()
    at = since
    version = chosen_version(ctx, name, version)
    # 404 for a missing version; scored per matrix column (a level of a categorical
    # feature is a column of its own)
    _, declared, inputs = load_version_metric(ctx, metric, version)
    features = encoded_names(declared, inputs.get("categories"))
    ref = _reference(ctx, metric, version)
    if ref is None:
        raise Conflict(f"version {version} of metric {name!r} has no drift reference "
                       "(it was fitted before drift watch); fit a new version")
    last = _hour(now)
    first = max(_hour(at) if at is not None else 0, last - ctx.settings.drift_hours)
    live, requests, hours, imputed = _live(ctx, metric, version, ref, len(features), first,
                                           last)
    scores = compare(ref, live, features)
    records, trained = live.moments.count, ref.summary.moments.count
    return {"name": name, "version": version,
            "imputed": imputed,
            "imputed_per_record": imputed / records if records else None,
            "reference_imputed_per_record": int(inputs.get("imputed_in_training", 0))
            / trained if trained else None,
            "since": iso_utc(datetime.fromtimestamp(first * HOUR, timezone.utc)),
            "until": iso_utc(now), "hours": hours, "requests": requests,
            "reference_records": ref.summary.moments.count,
            "reference_heldout_batches": ref.heldout.batches
            if ref.heldout is not None and scores["margins"]["reference"] == "held_out"
            else None,
            **scores,
            "thresholds": THRESHOLDS}


def margin_histogram(ctx: Context, name: str, version: int) -> dict[str, Any] | None:
    """The margins of the records grouped with ``version`` over the retained window
    against its training reference, as shares per bin (for the console's panel):
    ``edges`` (interior bin edges), ``live``, ``reference`` (what live margins are
    scored against: ``reference_kind`` ``held_out`` or, in older references,
    ``in_sample``) and ``in_sample`` (shares of the interior bins and, last, of the
    overflow), ``records``, ``verdict``. None without a reference."""
    from .groupings import load_version_metric

    BACKLOG.flush()
    metric = require_metric(ctx, name)
    _, declared, inputs = load_version_metric(ctx, metric, version)
    ref = _reference(ctx, metric, version)
    if ref is None:
        return None
    d = len(encoded_names(declared, inputs.get("categories")))
    last = _hour(_now())
    live, _, _, _ = _live(ctx, metric, version, ref, d, last - ctx.settings.drift_hours,
                          last)
    layout = ref.layouts.margins

    def shares(counts: np.ndarray) -> list[float]:
        total = float(counts.sum())
        kept = np.asarray(counts[1:], dtype=float)  # margins are never below 0
        return (kept / total).tolist() if total > 0 else [0.0] * kept.size

    scores = compare(ref, live, encoded_names(declared, inputs.get("categories")))
    against, _, kind = ref.margin_reference()
    return {"edges": layout.edges.tolist(), "live": shares(live.margins),
            "reference": shares(against), "reference_kind": kind,
            "in_sample": shares(ref.summary.margins), "records": int(live.margins.sum()),
            "verdict": scores["margins"].get("verdict")}


def latest_verdicts(ctx: Context) -> dict[str, dict[str, Any]]:
    """Every metric's verdict for its active version over the whole retention (for the
    metrics exposition and the operator page): version, verdict, records, flagged.
    ``verdict`` is None for a metric without an active version or without a reference."""
    BACKLOG.flush()
    out: dict[str, dict[str, Any]] = {}
    for name in ctx.storage.metrics.names():
        try:
            r = report(ctx, name)
        except NotFound:  # deleted meanwhile
            continue
        except Conflict:
            out[name] = {"version": ctx.storage.versions.active(name), "verdict": None,
                         "records": 0, "flagged": []}
            continue
        out[name] = {k: r[k] for k in ("version", "verdict", "records", "flagged")}
    return out


__all__ = ["latest_verdicts", "record", "reference_blob", "report"]
