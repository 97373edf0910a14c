"""Folds over batches and the held-out scoring behind :mod:`selection` (private)."""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import sklearn
from sklearn.metrics import adjusted_rand_score

from .errors import CoreError
from .grouping import group_records
from .learners import Prepared, fit_prepared
from .metric import FittedMetric
from .scores import agreement
from .stats import BatchStats, without

_KEYS = ("ari", "nmi", "rand")


@dataclass(frozen=True)
class Candidate:
    method: str
    alpha: float  # 0.0 for euclidean

    @property
    def label(self) -> str:
        return self.method if self.method == "euclidean" else f"{self.method} (α={self.alpha:g})"


@dataclass(frozen=True)
class Fold:
    index: int
    repeat: int
    held_out: tuple[int, ...]
    train: tuple[int, ...]


def make_folds(
    n_batches: int, n_folds: int, n_repeats: int, random_state: int | None
) -> list[Fold]:
    """Leave one batch out below five batches, else ``n_folds`` folds × ``n_repeats``."""
    every = tuple(range(n_batches))
    if n_batches < 5 or n_folds >= n_batches:
        return [Fold(b, 0, (b,), tuple(i for i in every if i != b)) for b in every]
    rng = np.random.default_rng(random_state)
    folds = []
    for r in range(max(int(n_repeats), 1)):
        perm = rng.permutation(n_batches)
        for i, part in enumerate(np.array_split(perm, n_folds)):
            held = tuple(sorted(int(b) for b in part))
            folds.append(Fold(i, r, held, tuple(b for b in every if b not in held)))
    return folds


def group_labels(
    metric: FittedMetric, X: np.ndarray, k: int, random_state: int | None, n_init: int
) -> np.ndarray:
    """Labels of ``X`` grouped at ``k`` in ``metric`` (the service's own grouping)."""
    return group_records(metric, X, k, random_state=random_state, n_init=n_init).labels


class _Scored:
    """Expert and predicted labels of one held-out batch; scores computed on demand."""

    __slots__ = ("pred", "scores", "truth")

    def __init__(self, truth: np.ndarray, pred: np.ndarray) -> None:
        self.truth = truth
        self.pred = np.asarray(pred, dtype=np.int32)
        self.scores: dict[str, float] = {"ari": adjusted_rand_score(truth, self.pred)}

    def get(self, key: str) -> float:
        if key not in self.scores:
            with sklearn.config_context(assume_finite=True, skip_parameter_validation=True):
                self.scores.update(agreement(self.truth, self.pred))
        return self.scores[key]


class CrossValidation:
    """Scores candidates on held-out batches; results are cached per (candidate, fold)."""

    def __init__(
        self,
        batches: Sequence[tuple[np.ndarray, np.ndarray]],
        stats: Sequence[BatchStats],
        folds: list[Fold],
        *,
        max_rank: int | None,
        random_state: int | None,
        max_records: int,
        n_init: int,
    ) -> None:
        self.batches = list(batches)
        self.stats = list(stats)
        self.folds = folds
        self.total = BatchStats.sum(self.stats)
        self.leave_one_out = all(len(f.held_out) == 1 for f in folds) and len(folds) == len(batches)
        self.max_rank = max_rank
        self.random_state = random_state
        self.max_records = max(int(max_records), 2)
        self.n_init = max(int(n_init), 1)
        self._held: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        self._prepared: dict[int, Prepared | None] = {}
        # per candidate, per (fold, batch): predicted labels and the scores computed so
        # far (ARI at once for the choice; NMI and Rand only when a report needs them)
        self._scores: dict[Candidate, dict[tuple[int, int], _Scored]] = {}
        self._raw: dict[int, _Scored] = {}

    # ------------------------------------------------------------ data access
    def held_out_data(self, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Batch ``b`` as scored: at most ``max_records`` records, deterministic."""
        if b not in self._held:
            X, codes = self.batches[b]
            if X.shape[0] > self.max_records:
                seed = None if self.random_state is None else [int(self.random_state), b]
                idx = np.random.default_rng(seed).choice(X.shape[0], self.max_records, False)
                # every expert group keeps at least one record, so the true k is kept
                _, first = np.unique(codes, return_index=True)
                idx = np.union1d(idx, first)
                X, codes = X[idx], np.unique(codes[idx], return_inverse=True)[1].reshape(-1)
            self._held[b] = (X, codes)
        return self._held[b]

    def train_stats(self, i: int) -> BatchStats:
        """``total − held-out``: O(d²), recomputed rather than kept (d² floats per fold).

        Summed from the training batches instead when the subtraction cancels
        (:func:`service.core.stats.without`).
        """
        fold = self.folds[i]
        held = BatchStats.sum([self.stats[b] for b in fold.held_out])
        train = [self.stats[b] for b in fold.train]
        return without(self.total, held, lambda: BatchStats.sum(train))

    def fold_metric(self, i: int, cand: Candidate) -> FittedMetric | None:
        """The candidate fitted on fold ``i``'s training batches (None if it cannot be)."""
        if i not in self._prepared:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # the final fit reports warnings once
                try:
                    self._prepared[i] = Prepared(self.train_stats(i))
                except CoreError:  # e.g. no spread left in this fold's training batches
                    self._prepared[i] = None
        prep = self._prepared[i]
        if prep is None:
            return None
        return fit_prepared(prep, cand.method, cand.alpha or 1.0, self.max_rank)

    # ---------------------------------------------------------------- scoring
    def run(
        self, cands: Sequence[Candidate], progress: Callable[[float], None] | None = None
    ) -> None:
        # inputs are validated once at the edge; skip scikit-learn's per-call checks
        with sklearn.config_context(assume_finite=True, skip_parameter_validation=True):
            self._run(cands, progress)

    def _run(
        self, cands: Sequence[Candidate], progress: Callable[[float], None] | None
    ) -> None:
        for i, fold in enumerate(self.folds):
            for cand in cands:
                table = self._scores.setdefault(cand, {})
                if (i, fold.held_out[0]) in table:
                    continue
                metric = self.fold_metric(i, cand)
                for b in fold.held_out:
                    table[(i, b)] = self._score(metric, b)
            if progress is not None:
                progress((i + 1) / len(self.folds))
            self._prepared.pop(i, None)  # O(d²) each: keep one fold's at a time

    def _score(self, metric: FittedMetric | None, b: int) -> _Scored:
        X, codes = self.held_out_data(b)
        k = int(codes.max()) + 1
        if metric is None:
            pred = np.zeros(X.shape[0], dtype=np.int32)
        else:
            pred = group_labels(metric, X, k, self.random_state, self.n_init)
        return _Scored(codes, pred)

    def _raw_scores(self, b: int) -> _Scored:
        if b not in self._raw:
            X, _ = self.held_out_data(b)
            d = X.shape[1]
            raw = FittedMetric("euclidean", 0.0, np.ones(d), X.mean(axis=0), np.eye(d))
            self._raw[b] = self._score(raw, b)
        return self._raw[b]

    # -------------------------------------------------------------- summaries
    def per_batch(self, cand: Candidate, keys: Sequence[str] = _KEYS) -> dict[str, list[float]]:
        """Each batch's scores averaged over the repeats in which it was held out."""
        by_batch: dict[int, list[_Scored]] = {}
        for (_, bb), v in self._scores[cand].items():  # one pass: O(folds), not O(b²)
            by_batch.setdefault(bb, []).append(v)
        out: dict[str, list[float]] = {key: [] for key in keys}
        for b in range(len(self.batches)):
            rows = by_batch[b]
            for key in keys:
                out[key].append(float(np.mean([r.get(key) for r in rows])))
        return out

    def per_batch_ari(self, cand: Candidate) -> np.ndarray:
        return np.asarray(self.per_batch(cand, ("ari",))["ari"])

    def summary(self, cand: Candidate, keys: Sequence[str] = _KEYS) -> dict[str, Any]:
        pb = self.per_batch(cand, keys)
        ari = np.asarray(pb["ari"])
        se = float(ari.std(ddof=1) / math.sqrt(ari.size)) if ari.size > 1 else 0.0
        out: dict[str, Any] = {key: float(np.mean(pb[key])) for key in keys}
        out["ari_se"] = se
        out["per_batch"] = pb
        return out

    def raw_summary(self) -> dict[str, float]:
        rows = [self._raw_scores(b) for b in range(len(self.batches))]
        return {key: float(np.mean([r.get(key) for r in rows])) for key in _KEYS}

    def fold_reports(self, cands: Sequence[Candidate]) -> list[dict[str, Any]]:
        reports = []
        for i, fold in enumerate(self.folds):
            scores = []
            for cand in cands:
                rows = [self._scores[cand][(i, b)] for b in fold.held_out]
                ari = float(np.mean([r.get("ari") for r in rows]))
                scores.append({"method": cand.method, "alpha": cand.alpha, "ari": ari})
            reports.append(
                {
                    "fold": fold.index,
                    "repeat": fold.repeat,
                    "held_out": list(fold.held_out),
                    "train_batches": len(fold.train),
                    "scores": scores,
                }
            )
        return reports
