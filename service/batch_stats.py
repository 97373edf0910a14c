"""The wire format of one batch's statistics, ``likewise.batch-stats/1`` (docs/batch-stats.md).

A producer that cannot ship its records (a distributed ETL job) sends what a fit needs
instead, in raw feature units and in the metric's column order::

    {"format": "likewise.batch-stats/1",
     "features": [...],                 # the metric's matrix columns, in order (d)
     "n": 1200, "k": 3,                 # records, expert groups
     "group_sizes": {"a": 500, ...},    # k labels → records (they add up to n)
     "sums": [...],                     # Σ x                           (d)
     "scatter": [[...], ...],           # Σ (x − x̄)(x − x̄)ᵀ             (d × d)
     "between": [[...], ...]}           # Σ_c n_c (x̄_c − x̄)(x̄_c − x̄)ᵀ  (d × d)

:func:`from_wire` checks a document the marshmallow envelope let through (types of
the members) with numpy — shapes, finiteness, symmetry, positive semi-definiteness of
both scatters and of their difference (the within-group scatter), counts — and gives
the core's :class:`~service.core.BatchStats`. Every error names its member.
"""

from __future__ import annotations

import hashlib
import json
from typing import Any

import numpy as np

from service.core import BatchStats
from service.errors import InvalidInput

FORMAT = "likewise.batch-stats/1"
MEDIA_TYPE = "application/vnd.likewise.batch-stats+json"
MAX_COUNT = 2**53 - 1  # counts are exact in a JSON number read as a double
# symmetry and semi-definiteness are checked up to this share of the scatter's size
# (rounding in a producer's sums is ~1e-16 of it; our choice, no source)
_RTOL = 1e-8


def _bad(field: str, message: str) -> InvalidInput:
    return InvalidInput.field(field, message, f"{field}: {message}")


def _array(doc: dict[str, Any], field: str, shape: tuple[int, ...]) -> np.ndarray:
    try:
        arr = np.array(doc[field], dtype=np.float64)
    except (TypeError, ValueError):
        raise _bad(field, "must hold numbers only") from None
    if arr.shape != shape:
        want = " × ".join(map(str, shape))
        raise _bad(field, f"must be {want} (one row and column per feature), got "
                          f"{' × '.join(map(str, arr.shape)) or 'a number'}")
    if not np.isfinite(arr).all():
        where = tuple(int(i) for i in np.argwhere(~np.isfinite(arr))[0])
        raise _bad(field, f"holds a value that is not a finite number at {list(where)}")
    return arr


def _scatter(doc: dict[str, Any], field: str, d: int) -> np.ndarray:
    S = _array(doc, field, (d, d))
    size = float(np.abs(S).max()) if S.size else 0.0
    i, j = np.unravel_index(int(np.argmax(np.abs(S - S.T))), S.shape) if S.size else (0, 0)
    if S.size and abs(S[i, j] - S[j, i]) > _RTOL * size:
        raise _bad(field, f"must be symmetric: [{i}][{j}] is {S[i, j]!r}, "
                          f"[{j}][{i}] is {S[j, i]!r}")
    S = (S + S.T) / 2.0
    _semidefinite(S, field, "a scatter is positive semi-definite")
    return S


def _semidefinite(S: np.ndarray, field: str, what: str) -> None:
    if not S.size:
        return
    low = float(np.linalg.eigvalsh(S)[0])
    if low < -_RTOL * max(float(np.trace(np.abs(S))), np.finfo(float).tiny):
        raise _bad(field, f"has a negative eigenvalue ({low:.6g}); {what}")


def _count(doc: dict[str, Any], field: str, low: int) -> int:
    value = doc[field]
    if not isinstance(value, int) or isinstance(value, bool) or not low <= value <= MAX_COUNT:
        raise _bad(field, f"must be a whole number from {low} to {MAX_COUNT}")
    return value


def from_wire(doc: dict[str, Any], features: list[str]) -> tuple[BatchStats, dict[str, int]]:
    """The statistics and group sizes of a ``likewise.batch-stats/1`` document whose
    ``features`` must equal the metric's matrix columns ``features``."""
    if doc["format"] != FORMAT:
        raise _bad("format", f"unknown format {doc['format']!r}; this service reads {FORMAT!r}")
    if list(doc["features"]) != list(features):
        raise _bad("features", "must be the metric's matrix columns in order: "
                               f"{features} (a categorical feature is one column per level)")
    d = len(features)
    n, k = _count(doc, "n", 2), _count(doc, "k", 2)
    sizes = doc["group_sizes"]
    if len(sizes) != k:
        raise _bad("group_sizes", f"has {len(sizes)} group(s), k is {k}")
    for label, size in sizes.items():
        if not isinstance(size, int) or isinstance(size, bool) or not 1 <= size <= MAX_COUNT:
            raise _bad("group_sizes", f"group {label!r}: a size is a whole number ≥ 1")
    if sum(sizes.values()) != n:
        raise _bad("group_sizes", f"the sizes add up to {sum(sizes.values())}, n is {n}")
    sums = _array(doc, "sums", (d,))
    G = _scatter(doc, "scatter", d)
    H = _scatter(doc, "between", d)
    _semidefinite(G - H, "between", "scatter − between (the within-group scatter) must be "
                                    "positive semi-definite")
    return BatchStats(1, n, k, G, H, sums), {str(g): int(s) for g, s in sizes.items()}


def content_hash(stats: BatchStats, sizes: dict[str, int]) -> str:
    """sha256 over the format's name, the statistics' bytes and the sorted group sizes."""
    h = hashlib.sha256(FORMAT.encode() + b"\x00")
    h.update(stats.to_bytes())
    h.update(json.dumps(sorted(sizes.items()), separators=(",", ":")).encode())
    return h.hexdigest()
