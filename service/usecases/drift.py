"""Drift watch: how far the records being grouped are from a version's training batches.

* At fit time, :func:`reference_blob` summarises the training batches as seen through
  the new version (each batch grouped with its own number of labelled groups), and
  the margins and distances of the batches cross-validation held out, each grouped
  by a map fitted without it; the fit commits it in the version's own transaction.
* Every grouping calls :func:`record`: the request's summary goes into the hour's
  bucket of that version (one round trip; never the records).
* :func:`report` scores the buckets since a time against the reference
  (:func:`service.core.drift.compare`); :func:`latest_verdicts` gives every metric's
  verdict for its active version over the whole retention, for dashboards.

Versions fitted before drift watch have no reference: nothing is recorded for them
and their report is a 409. References written before held-out margins existed score
live margins against the in-sample ones (the report's ``margins.reference`` says
which).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
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
    answer has gone: the summary is computed and written by the process's backlog."""
    hour = _hour(_now())
    BACKLOG.submit(lambda: _write(ctx, metric, version, fitted, X, grouping, hour, imputed))


def _write(ctx: Context, metric: dict[str, Any], version: int, fitted: FittedMetric,
           X: np.ndarray, grouping: Grouping, hour: int, imputed: int) -> None:
    ref = _reference(ctx, metric, version)
    if ref is None:
        return
    s = summarise(fitted, X, grouping, ref.layouts)
    ctx.storage.drift.add(
        metric["name"], metric["uid"], version, hour,
        (ctx.settings.drift_hours + 1) * HOUR, s.moments.count, s.moments.mean,
        s.moments.m2, {"f": s.features, "m": s.margins, "d": s.distances, "g": s.groups},
        imputed=imputed)


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
    still in its backlog are written first; another process's land within moments."""
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
