"""A batch's statistics computed where its records live (docs/batch-stats.md).

:func:`stats_from_frame` reduces a pandas DataFrame (or an array with its labels) to
one ``likewise.batch-stats/1`` document; :func:`stats_from_dask` does it for a Dask
DataFrame: each partition is reduced to :class:`Partial` sums, which Dask merges in a
tree (``dask.bag``'s reduction, ``split_every`` at a time) on whatever scheduler the
caller runs. With ``by=`` a column, one batch per value of that column. Post the
documents with :meth:`likewise_client.Client.post_stats`; nothing is pickled on the
wire.

Neither pandas nor dask is imported here until :func:`stats_from_dask` is called.
"""

from __future__ import annotations

from collections.abc import Hashable, Sequence
from dataclasses import dataclass
from functools import reduce
from typing import Any

import numpy as np

FORMAT = "likewise.batch-stats/1"
MEDIA_TYPE = "application/vnd.likewise.batch-stats+json"
Json = dict[str, Any]


@dataclass(frozen=True)
class Partial:
    """Mergeable sums of some records of one batch: ``n``, their ``mean``, ``scatter``
    ``Σ (x − mean)(x − mean)ᵀ`` and, per group label, ``(records, mean)``."""

    n: int
    mean: np.ndarray
    scatter: np.ndarray
    groups: dict[Hashable, tuple[int, np.ndarray]]

    def merge(self, other: Partial) -> Partial:
        """The sums of both parts (Chan, Golub & LeVeque's pairwise update; from memory)."""
        if other.n == 0:
            return self
        if self.n == 0:
            return other
        n = self.n + other.n
        delta = other.mean - self.mean
        groups = dict(self.groups)
        for g, (m, mean) in other.groups.items():
            if g in groups:
                m0, mean0 = groups[g]
                groups[g] = (m0 + m, mean0 + (mean - mean0) * (m / (m0 + m)))
            else:
                groups[g] = (m, mean)
        return Partial(n, self.mean + delta * (other.n / n),
                       self.scatter + other.scatter + np.outer(delta, delta)
                       * (self.n * other.n / n), groups)

    def to_doc(self, features: Sequence[str]) -> Json:
        """The ``likewise.batch-stats/1`` document of these records."""
        labels = sorted(self.groups, key=str)
        sizes = np.array([self.groups[g][0] for g in labels], dtype=float)
        offsets = np.array([self.groups[g][1] for g in labels]) - self.mean
        between = (offsets * sizes[:, None]).T @ offsets
        return {
            "format": FORMAT,
            "features": [str(f) for f in features],
            "n": int(self.n),
            "k": len(labels),
            "group_sizes": {str(g): int(self.groups[g][0]) for g in labels},
            "sums": (self.mean * self.n).tolist(),
            "scatter": ((self.scatter + self.scatter.T) / 2).tolist(),
            "between": ((between + between.T) / 2).tolist(),
        }


def partial(X: np.ndarray, labels: Sequence[Hashable] | np.ndarray,
            columns: Sequence[str] | None = None) -> Partial:
    """The mergeable sums of records ``X`` (n × d, float) with their group labels."""
    X = np.asarray(X, dtype=np.float64)
    labels = np.asarray(labels)
    d = X.shape[1]
    if X.shape[0] == 0:
        return Partial(0, np.zeros(d), np.zeros((d, d)), {})
    bad = np.argwhere(~np.isfinite(X))
    if len(bad):
        row, col = (int(v) for v in bad[0])
        name = columns[col] if columns is not None else col
        raise ValueError(f"row {row}, column {name!r}: {X[row, col]} is not a finite "
                         "number (statistics need every value; fill or drop it first)")
    mean = X.mean(axis=0)
    centred = X - mean
    codes_of, codes = np.unique(labels, return_inverse=True)
    codes = codes.reshape(-1)
    order = np.argsort(codes, kind="stable")
    counts = np.bincount(codes, minlength=len(codes_of))
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    # group means from centred sums (no cancellation of a large common offset)
    group_means = np.add.reduceat(centred[order], starts, axis=0) / counts[:, None] + mean
    groups = {_plain(g): (int(c), m) for g, c, m in zip(codes_of, counts, group_means,
                                                        strict=True)}
    return Partial(int(X.shape[0]), mean, centred.T @ centred, groups)


def _plain(label: Any) -> Hashable:
    """A numpy scalar label as the Python value (so ``3`` and ``np.int64(3)`` merge)."""
    return label.item() if isinstance(label, np.generic) else label


def _frame_partial(frame: Any, features: Sequence[str], group_column: str) -> Partial:
    return partial(frame[list(features)].to_numpy(dtype=np.float64),
                   frame[group_column].to_numpy(), list(features))


def stats_from_frame(frame: Any, features: Sequence[str], group_column: str) -> Json:
    """One batch's ``likewise.batch-stats/1`` document from a pandas DataFrame:
    ``features`` in the metric's column order, labels in ``group_column``."""
    return _frame_partial(frame, features, group_column).to_doc(features)


def _frame_partials_by(frame: Any, features: Sequence[str], group_column: str,
                       by: str) -> dict[Hashable, Partial]:
    return {_plain(key): _frame_partial(part, features, group_column)
            for key, part in frame.groupby(by, sort=False)}


def _merge_by(a: dict[Hashable, Partial], b: dict[Hashable, Partial]
              ) -> dict[Hashable, Partial]:
    out = dict(a)
    for key, p in b.items():
        out[key] = out[key].merge(p) if key in out else p
    return out


def stats_from_dask(frame: Any, features: Sequence[str], group_column: str, *,
                    by: str | None = None, split_every: int = 8,
                    **compute: Any) -> Json | dict[Hashable, Json]:
    """Statistics of a Dask DataFrame, computed by Dask: one document for the whole
    frame, or with ``by`` a column, ``{value: document}`` (one batch per value).

    Each partition is reduced to :class:`Partial` sums; ``dask.bag`` merges them in a
    tree of ``split_every`` at a time. ``compute`` goes to ``compute()`` (e.g.
    ``scheduler="threads"``).
    """
    import dask
    import dask.bag as db

    cols = [*features, group_column, *([by] if by is not None else [])]
    parts = frame[cols].to_delayed()
    if by is None:
        one = dask.delayed(lambda f: [_frame_partial(f, features, group_column)])
        merge: Any = Partial.merge
    else:
        one = dask.delayed(lambda f: [_frame_partials_by(f, features, group_column, by)])
        merge = _merge_by
    bag = db.from_delayed([one(p) for p in parts])
    total = bag.reduction(lambda ps: reduce(merge, ps), lambda ps: reduce(merge, ps),
                          split_every=split_every).compute(**compute)
    if by is None:
        return total.to_doc(features)
    return {key: p.to_doc(features) for key, p in total.items()}
