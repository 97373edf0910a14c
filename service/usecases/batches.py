"""Labelled batches: validated, reduced to statistics at ingest, kept compressed."""

from __future__ import annotations

import hashlib
import json
import secrets
from collections import Counter
from typing import TYPE_CHECKING, Any

import numpy as np

from service import batch_stats
from service.clock import utcnow
from service.core import BatchStats, CoreError
from service.errors import InvalidInput, NotFound, from_core
from service.store.codecs import pack_json, pack_matrix
from service.tables import Table, check_groups, encoded_names

from . import pages
from .metrics import require_metric

if TYPE_CHECKING:
    from service.context import Context

BATCH_ID_LEN = 16


def content_hash(X: np.ndarray, labels: list[Any]) -> str:
    """sha256 over the float64 little-endian matrix (feature order) and the labels' JSON."""
    h = hashlib.sha256()
    h.update(np.ascontiguousarray(X, dtype="<f8").data)  # hashed in place, no copy
    h.update(json.dumps(labels, separators=(",", ":")).encode())
    return h.hexdigest()


def _check_batch_id(batch_id: Any) -> str:
    if not isinstance(batch_id, str) or len(batch_id) != BATCH_ID_LEN or not all(
        c in "0123456789abcdef" for c in batch_id
    ):
        raise NotFound(f"batch {batch_id!r} does not exist")
    return batch_id


def add_batch(ctx: Context, name: str, table: Table, *, allow_duplicate: bool = False,
              ignore_extra: bool | None = None) -> dict[str, Any]:
    """Validate, reduce to statistics and store one labelled batch (one transaction).

    The table carries its group labels. A batch whose content hash is already stored
    on the metric is refused (DuplicateBatch, naming the stored batch) unless
    ``allow_duplicate``. ``ignore_extra`` (None: the metric's setting) drops columns
    that are not features.
    """
    metric = require_metric(ctx, name)
    inputs = metric["inputs"]
    if ignore_extra is None:
        ignore_extra = inputs["ignore_extra_columns"]
    m = table.matrix(metric["features"], ignore_extra=ignore_extra,
                     fill="own" if inputs["missing_values"] == "impute_mean" else None,
                     categories=inputs["categories"])
    X = m.X
    labels = check_groups(table.groups, X.shape[0], table.group_field)
    field = table.field
    try:
        with np.errstate(over="ignore", invalid="ignore"):
            stats = BatchStats.from_batch(X, labels)
    except CoreError as exc:
        raise from_core(exc, default_field=field) from exc
    if not all(np.isfinite(a).all() for a in (stats.G, stats.H, stats.sums)):
        # finite values whose squares overflow float64 would poison every later fit
        raise InvalidInput.field(
            field, "values too large: the batch's scatter overflows float64 "
                   "(rescale the feature, e.g. to other units)")
    batch_id = secrets.token_hex(BATCH_ID_LEN // 2)
    sizes = Counter(labels)
    meta = {
        "batch_id": batch_id,
        "records": int(X.shape[0]),
        "groups": len(sizes),
        "created_at": utcnow(),
        "sha256": content_hash(X, labels),
        "group_sizes": {str(k): int(v) for k, v in sizes.items()},
        "imputed": m.imputed,
    }
    ctx.storage.batches.add(name, metric["uid"], meta, stats.to_bytes(), pack_matrix(X),
                            pack_json(labels), allow_duplicate=allow_duplicate)
    return _summary(meta)


def add_batch_stats(ctx: Context, name: str, doc: dict[str, Any], *,
                    allow_duplicate: bool = False) -> dict[str, Any]:
    """Store one statistics-only batch (a ``likewise.batch-stats/1`` document whose
    envelope was checked): it enters every fit's statistics but, having no records, is
    never held out. Duplicates by content hash as for :func:`add_batch`."""
    metric = require_metric(ctx, name)
    inputs = metric["inputs"]
    stats, sizes = batch_stats.from_wire(doc, encoded_names(metric["features"],
                                                            inputs["categories"]))
    batch_id = secrets.token_hex(BATCH_ID_LEN // 2)
    meta = {
        "batch_id": batch_id,
        "kind": "statistics",
        "records": stats.n,
        "groups": stats.n_groups,
        "created_at": utcnow(),
        "sha256": batch_stats.content_hash(stats, sizes),
        "group_sizes": sizes,
        "imputed": 0,
    }
    ctx.storage.batches.add(name, metric["uid"], meta, stats.to_bytes(), b"", b"",
                            allow_duplicate=allow_duplicate)
    return _summary(meta)


def _summary(meta: dict[str, Any]) -> dict[str, Any]:
    out = {k: meta[k] for k in ("batch_id", "records", "groups", "created_at", "sha256")}
    out["imputed"] = int(meta.get("imputed", 0))
    out["kind"] = meta.get("kind", "records")
    return out


def list_batches(ctx: Context, name: str, limit: int = pages.DEFAULT_LIMIT,
                 cursor: str | None = None) -> dict[str, Any]:
    """A page of batch summaries, oldest first (by ingest order)."""
    require_metric(ctx, name)
    after = pages.decode(cursor, f"batches:{name}", pages.whole)
    rows = ctx.storage.batches.metas_after(name, after, limit + 1)
    page = pages.page("batches", rows, limit, f"batches:{name}", lambda r: r[0])
    return {"batches": [_summary(m) for _, m in page["batches"]],
            "next_cursor": page["next_cursor"]}


def get_batch(ctx: Context, name: str, batch_id: str) -> dict[str, Any]:
    require_metric(ctx, name)
    meta = ctx.storage.batches.meta(name, _check_batch_id(batch_id))
    if meta is None:
        raise NotFound(f"batch {batch_id!r} does not exist in metric {name!r}")
    return {**_summary(meta), "group_sizes": meta["group_sizes"]}


def delete_batch(ctx: Context, name: str, batch_id: str) -> None:
    """Remove a batch: its statistics no longer enter future fits."""
    require_metric(ctx, name)
    if not ctx.storage.batches.delete(name, _check_batch_id(batch_id)):
        raise NotFound(f"batch {batch_id!r} does not exist in metric {name!r}")


def load_training_data(ctx: Context, name: str) -> list[dict[str, Any]]:
    """Batches for a fit: ``meta``, ``X``, ``labels`` and ``stats`` (BatchStats);
    ``X`` and ``labels`` are None for a statistics-only batch."""
    rows = ctx.storage.batches.load(name)
    for row in rows:
        row["stats"] = BatchStats.from_bytes(row["stats"])
    return rows

