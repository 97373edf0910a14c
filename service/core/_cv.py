"""Folds over batches and the held-out scoring behind :mod:`selection` (private)."""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._budget import GROWTH, MAX_ROUNDS, Budget, allocate, needed, sampling_se, stratified_draw
from ._stacked import chunk_size, kmeans_stacked
from .clustering import cluster, overflowing_row
from .errors import CoreError, RecordOverflowError
from .learners import Prepared, fit_prepared, scoring_map
from .metric import FittedMetric
from .scores import agreement_many
from .stats import BatchStats, without

_KEYS = ("ari", "nmi", "rand")
KEEP_ELEMENTS = 1 << 22  # 32 MB of float64


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
            out = set(held)  # a set: O(n) per fold, not O(n²) at 10,000 batches
            folds.append(Fold(i, r, held, tuple(b for b in every if b not in out)))
    return folds


def _check_reach(Zs: np.ndarray, b: int) -> None:
    """A named error when batch ``b``'s mapped records would overflow k-means."""
    row = overflowing_row(Zs)
    if row is not None:
        raise RecordOverflowError(
            f"records of batch {b} are too large to map (row {row} overflows in the "
            "learned space)",
            row,
        )


def _padded_width(rank: int, d: int) -> int:
    """The width a map of this rank is padded to when stacked: a power of two, ≤ d."""
    return min(1 << max(rank - 1, 0).bit_length(), max(d, rank))


Scores = dict[str, float]  # {"ari", "nmi", "rand"} of one held-out grouping


def _scored(truth: np.ndarray, preds: list[np.ndarray]) -> list[Scores]:
    """Each prediction's agreement with the expert grouping."""
    return agreement_many(truth, np.stack(preds))


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
        extra: Sequence[BatchStats] = (),
    ) -> None:
        self.batches = list(batches)
        self.stats = list(stats)
        self.folds = folds
        # statistics-only batches: in every fold's training statistics, never held out
        self.n_stats_only = len(extra)
        self.extra = BatchStats.sum(extra, self.stats[0].n_features)
        # the first repetition's folds hold every batch out once: their held-out sums
        # add up to the total, so each batch's statistics are added once for both
        # (at 10,000 batches the sums are the largest cost that grows with them). Kept
        # while they fit in KEEP_ELEMENTS floats; wider features sum every batch into
        # one total, as before, and each fold's held-out part again when asked.
        first = [i for i, f in enumerate(folds) if f.repeat == 0]
        d = self.stats[0].n_features
        held = sorted(b for i in first for b in folds[i].held_out)
        self._held_sums: dict[int, BatchStats] = {}
        if held == list(range(len(self.stats))) and 2 * d * d * len(first) <= KEEP_ELEMENTS:
            self._held_sums = {i: BatchStats.sum([self.stats[b] for b in folds[i].held_out])
                               for i in first}
            self.total = BatchStats.sum(list(self._held_sums.values())) + self.extra
        else:
            self.total = BatchStats.sum(self.stats) + self.extra
        self.leave_one_out = all(len(f.held_out) == 1 for f in folds) and len(folds) == len(batches)
        self.max_rank = max_rank
        self.random_state = random_state
        self.max_records = max(int(max_records), 2)
        self.n_init = max(int(n_init), 1)
        self._held: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        # per fold, the α-independent part of its fits; the first repetition's are
        # kept while they fit in KEEP_ELEMENTS floats (the k rule refits the winner
        # from them), the others are dropped once the fold is scored
        self._prepared: dict[int, Prepared | None] = {}
        self._kept: set[int] = set()
        self._kept_size = 0
        # per candidate, per (fold, batch): the held-out grouping's scores
        self._scores: dict[Candidate, dict[tuple[int, int], Scores]] = {}
        self._raw: dict[int, Scores] = {}
        # the held-out batches that are scored (all of them unless ``score`` budgets)
        self.sample: list[int] = list(range(len(self.batches)))
        # per candidate, its per-batch scores over the sample: built once, dropped
        # only when the candidate gets new scores
        self._per_batch: dict[Candidate, dict[str, np.ndarray]] = {}
        # the held-out labels of these batches (None: every batch), per candidate, in
        # the first repetition: the selector takes the winner's (its drift reference)
        self.keep_labels: set[int] | None = None
        self._labels: dict[Candidate, dict[int, np.ndarray]] = {}

    # ------------------------------------------------------------ data access
    def held_out_data(self, b: int) -> tuple[np.ndarray, np.ndarray]:
        """Batch ``b`` as scored: at most ``max_records`` records drawn (deterministic),
        plus the first record of every expert group the draw missed."""
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
        """``total − held-out``: O(d²), recomputed rather than kept (d² floats per fold;
        the first repetition's held-out sums are kept while they fit in
        :data:`KEEP_ELEMENTS` floats).

        Summed from the training batches instead when the subtraction cancels
        (:func:`service.core.stats.without`).
        """
        fold = self.folds[i]
        held = self._held_sums.get(i)
        if held is None:
            held = BatchStats.sum([self.stats[b] for b in fold.held_out])
        train = [self.stats[b] for b in fold.train]
        return without(self.total, held, lambda: BatchStats.sum(train) + self.extra)

    def without_batch(self, b: int) -> BatchStats:
        """``total`` without batch ``b`` (the statistics-only batches stay in)."""
        return without(self.total, self.stats[b], lambda: BatchStats.sum(
            s for j, s in enumerate(self.stats) if j != b) + self.extra)

    def fold_metric(self, i: int, cand: Candidate) -> FittedMetric | None:
        """The candidate fitted on fold ``i``'s training batches (None if it cannot be)."""
        prep = self._prep(i)
        if prep is None:
            return None
        return fit_prepared(prep, cand.method, cand.alpha or 1.0, self.max_rank)

    def _scoring_metric(self, i: int, cand: Candidate) -> FittedMetric | None:
        """As :meth:`fold_metric`, in a form only good for grouping (see
        :func:`service.core.learners.scoring_map`: the same distances, cheaper)."""
        prep = self._prep(i)
        if prep is None:
            return None
        return scoring_map(prep, cand.method, cand.alpha or 1.0, self.max_rank)

    def _prep(self, i: int) -> Prepared | None:
        if i not in self._prepared:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # the final fit reports warnings once
                try:
                    self._prepared[i] = Prepared(self.train_stats(i))
                except CoreError:  # e.g. no spread left in this fold's training batches
                    self._prepared[i] = None
        return self._prepared[i]

    def forget(self, i: int) -> None:
        """Drop fold ``i``'s prepared statistics unless they are kept (see __init__)."""
        prep = self._prepared.get(i)
        if prep is None or i in self._kept:
            return
        size = 5 * prep.stats.n_features**2  # G, H and the eigenvector bases: O(d²)
        if self.folds[i].repeat == 0 and self._kept_size + size <= KEEP_ELEMENTS:
            self._kept.add(i)
            self._kept_size += size
        else:
            del self._prepared[i]

    # ---------------------------------------------------------------- scoring
    def in_sample(self, i: int) -> list[int]:
        """Fold ``i``'s held-out batches that are scored."""
        chosen = self._chosen
        return [b for b in self.folds[i].held_out if chosen[b]]

    @property
    def _chosen(self) -> np.ndarray:
        chosen = np.zeros(len(self.batches), dtype=bool)
        chosen[self.sample] = True
        return chosen

    def run(
        self, cands: Sequence[Candidate], progress: Callable[[float], None] | None = None
    ) -> None:
        """Score ``cands`` on every fold's sampled batches (cached: a candidate is scored
        once per (fold, batch))."""
        chosen = self._chosen
        for i, fold in enumerate(self.folds):
            held = [b for b in fold.held_out if chosen[b]]
            todo = [c for c in cands if any((i, b) not in self._scores.get(c, {}) for b in held)]
            if todo:
                metrics = dict(zip(todo, (self._scoring_metric(i, c) for c in todo), strict=True))
                for b in held:
                    lacking = [c for c in todo if (i, b) not in self._scores.get(c, {})]
                    if not lacking:
                        continue
                    # the raw baseline rides along the first time its batch is grouped
                    raw = [] if b in self._raw else [self._raw_metric(b)]
                    preds = self._group_all([metrics[c] for c in lacking] + raw, b, (0, i, b))
                    if fold.repeat == 0 and (self.keep_labels is None or b in self.keep_labels):
                        self._keep(lacking, b, preds)
                    scored = _scored(self.held_out_data(b)[1], preds)
                    if raw:
                        self._raw[b] = scored.pop()
                    for cand, one in zip(lacking, scored, strict=True):
                        self._scores.setdefault(cand, {})[(i, b)] = one
                for c in todo:
                    self._per_batch.pop(c, None)
            if progress is not None:
                progress((i + 1) / len(self.folds))
            self.forget(i)

    def first_folds(self) -> dict[int, int]:
        """Each batch's fold in the first repetition (every batch is held out once)."""
        return {b: i for i, f in enumerate(self.folds) if f.repeat == 0 for b in f.held_out}

    def held_out_labels(self, cand: Candidate) -> dict[int, np.ndarray]:
        """The labels :meth:`run` gave the batches in ``keep_labels`` as ``cand``
        grouped them held out in the first repetition (kept as they were scored)."""
        return dict(self._labels.get(cand, {}))

    def drop_labels(self) -> None:
        """Keep no more held-out labels (the selector has taken the winner's)."""
        self._labels.clear()
        self.keep_labels = set()

    def _keep(self, cands: Sequence[Candidate], b: int, preds: list[np.ndarray]) -> None:
        """Keep held-out batch ``b``'s labels per candidate, in the smallest integers."""
        small = np.min_scalar_type(max(int(self.held_out_data(b)[1].max()), 1))
        for cand, labels in zip(cands, preds, strict=False):  # preds may end with raw's
            self._labels.setdefault(cand, {})[b] = labels.astype(small)

    def score(
        self,
        cands: Sequence[Candidate],
        budget: Budget,
        progress: Callable[[float], None] | None = None,
    ) -> dict[str, Any]:
        """Score ``cands`` on every batch, or within ``budget`` on a stratified sample
        (:mod:`service.core._budget`); returns what the report says of the sample."""
        n = len(self.batches)
        out: dict[str, Any] = {
            "tolerance": budget.tolerance, "min_batches": budget.min_batches,
            "max_batches": budget.max_batches, "strata": "expert groups, then records",
        }
        if not budget.applies(n):
            self.sample = list(range(n))
            self.run(cands, progress)
            return {**out, "applied": False, "rounds": 1, "scored_batches": n}
        keys = np.array([[s.n_groups, s.n] for s in self.stats], dtype=np.int64)
        seed = None if self.random_state is None else [int(self.random_state), 1, 0]
        rng = np.random.default_rng(seed)
        first = [i for i, f in enumerate(self.folds) if f.repeat == 0]
        cap = min(budget.max_batches, n)
        target, chosen, rounds = min(budget.min_batches, cap), set(), 0
        spread = 0.0
        for rounds in range(1, MAX_ROUNDS + 1):
            shares = allocate(target, [len(self.folds[i].held_out) for i in first])
            for i, share in zip(first, shares, strict=True):
                mine = [b for b in self.folds[i].held_out if b in chosen]
                pool = [b for b in self.folds[i].held_out if b not in chosen]
                chosen.update(stratified_draw(pool, keys, share - len(mine), rng))
            self.sample = sorted(chosen)
            lo, hi = 1.0 - 0.5 ** (rounds - 1), 1.0 - 0.5**rounds
            self.run(cands, None if progress is None else (
                lambda f, lo=lo, hi=hi: progress(lo + (hi - lo) * f)))
            spread = max(float(np.std(self.per_batch_ari(c), ddof=1)) for c in cands)
            m = len(self.sample)
            se = spread / math.sqrt(m) * math.sqrt(1.0 - m / n)
            if se <= budget.tolerance or m >= cap:
                break
            target = min(cap, max(needed(spread, budget.tolerance, n), math.ceil(GROWTH * m)))
        if progress is not None:
            progress(1.0)
        return {**out, "applied": True, "rounds": rounds, "scored_batches": len(self.sample),
                "largest_sd": spread, "sample": list(self.sample)}

    def _group_all(
        self, metrics: Sequence[FittedMetric | None], b: int, stream: tuple[int, ...]
    ) -> list[np.ndarray]:
        """Held-out batch ``b`` grouped at its true k in each metric.

        Metrics of rank ≥ 2 are grouped by :func:`kmeans_stacked` (k-means++, ``n_init``
        restarts, the same random numbers for every metric; one stack per padded
        width, see ``_padded_width``); rank 1 by the
        exact one-dimensional solver, as the service groups; a metric that could not
        be fitted (None) or of rank 0 puts every record in one group.
        """
        X, codes = self.held_out_data(b)
        n, k = X.shape[0], int(codes.max()) + 1
        preds: list[np.ndarray | None] = [None] * len(metrics)
        stacked = []
        standard: dict[tuple[int, bytes], np.ndarray] = {}  # shared by a fold's metrics
        for j, metric in enumerate(metrics):
            if metric is None or metric.rank == 0:
                preds[j] = np.zeros(n, dtype=np.intp)
            elif metric.rank == 1:
                Z = self._mapped(metric, X, b, standard)
                preds[j] = cluster(Z, k, self.random_state)[0]
            else:
                stacked.append(j)
        # stacked by padded width: a power of two at least the rank (at most d), so a
        # candidate's arithmetic depends on its own rank only, and a low-rank one
        # does not work at the full width of the Euclidean candidates
        by_width: dict[int, list[int]] = {}
        for j in stacked:
            by_width.setdefault(_padded_width(metrics[j].rank, X.shape[1]), []).append(j)
        seed = None if self.random_state is None else [int(self.random_state), *stream]
        for r, group in sorted(by_width.items()):
            step = chunk_size(n, r, self.n_init, k)
            for lo in range(0, len(group), step):
                part = group[lo : lo + step]
                Zs = np.zeros((len(part), n, r))
                for q, j in enumerate(part):
                    Z = self._mapped(metrics[j], X, b, standard, check=False)  # type: ignore[arg-type]
                    Zs[q, :, : Z.shape[1]] = Z  # zero columns add nothing to distances
                _check_reach(Zs, b)  # once for the chunk
                labels, _ = kmeans_stacked(Zs, k, self.n_init, seed)
                for q, j in enumerate(part):
                    preds[j] = labels[q]
        return preds  # type: ignore[return-value]

    @staticmethod
    def _mapped(
        metric: FittedMetric,
        X: np.ndarray,
        b: int,
        standard: dict[tuple[int, bytes], np.ndarray],
        check: bool = True,
    ) -> np.ndarray:
        """``metric.transform(X)``; with ``check``, a named error when squared distances
        would overflow (see ``_check_reach``).

        ``standard`` caches ``(X − mean) / scales`` for metrics fitted on the same
        statistics (records validated at the edge are not checked again).
        """
        key = (id(metric.scales), metric.mean.tobytes())
        with np.errstate(over="ignore", invalid="ignore"):
            if key not in standard:
                standard[key] = metric.standardise(X)
            Z = standard[key] @ metric.components.T
        if check:
            _check_reach(Z[None], b)
        return Z

    def _raw_metric(self, b: int) -> FittedMetric:
        """Euclidean distance on raw units: the second baseline (reported only)."""
        X, _ = self.held_out_data(b)
        d = X.shape[1]
        return FittedMetric("euclidean", 0.0, np.ones(d), X.mean(axis=0), np.eye(d))

    def _raw_scores(self, b: int) -> Scores:
        if b not in self._raw:  # normally filled by ``run``; same random numbers here
            i = next(i for i, f in enumerate(self.folds) if b in f.held_out)
            codes = self.held_out_data(b)[1]
            preds = self._group_all([self._raw_metric(b)], b, (0, i, b))
            self._raw[b] = _scored(codes, preds)[0]
        return self._raw[b]

    # -------------------------------------------------------------- summaries
    def per_batch(self, cand: Candidate, keys: Sequence[str] = _KEYS) -> dict[str, np.ndarray]:
        """Each sampled batch's scores (in ``sample`` order) averaged over the repeats in
        which it was held out; built once per candidate (read-only arrays)."""
        if cand not in self._per_batch:
            where = np.full(len(self.batches), -1)
            where[self.sample] = np.arange(len(self.sample))
            sums = np.zeros((len(_KEYS), len(self.sample)))
            counts = np.zeros(len(self.sample))
            for (_, bb), v in self._scores[cand].items():  # one pass over the scores
                p = where[bb]
                counts[p] += 1
                for j, key in enumerate(_KEYS):
                    sums[j, p] += v[key]
            table = {}
            for j, key in enumerate(_KEYS):
                table[key] = sums[j] / counts
                table[key].setflags(write=False)
            self._per_batch[cand] = table
        return {key: self._per_batch[cand][key] for key in keys}

    def per_batch_ari(self, cand: Candidate) -> np.ndarray:
        return self.per_batch(cand, ("ari",))["ari"]

    def summary(self, cand: Candidate, keys: Sequence[str] = _KEYS) -> dict[str, Any]:
        """Mean scores over the sampled batches; ``ari_se`` the standard error of the
        mean ARI across batches (s/√m), ``sampling_se`` the part of it that comes from
        scoring a sample instead of every batch (:func:`_budget.sampling_se`)."""
        pb = self.per_batch(cand, keys)
        ari = pb["ari"]
        se = float(ari.std(ddof=1) / math.sqrt(ari.size)) if ari.size > 1 else 0.0
        out: dict[str, Any] = {key: float(np.mean(pb[key])) for key in keys}
        out["ari_se"] = se
        out["sampling_se"] = sampling_se(ari, len(self.batches))
        out["per_batch"] = pb
        return out

    def raw_summary(self) -> dict[str, float]:
        rows = [self._raw_scores(b) for b in self.sample]
        return {key: float(np.mean([r[key] for r in rows])) for key in _KEYS}

    def fold_reports(self, cands: Sequence[Candidate]) -> list[dict[str, Any]]:
        reports = []
        for i, fold in enumerate(self.folds):
            scores, held = [], self.in_sample(i)
            for cand in cands:
                rows = [self._scores[cand][(i, b)]["ari"] for b in held]
                ari = float(np.mean(rows)) if rows else None
                scores.append({"method": cand.method, "alpha": cand.alpha, "ari": ari})
            reports.append(
                {
                    "fold": fold.index,
                    "repeat": fold.repeat,
                    "held_out": list(fold.held_out),
                    "scored_batches": len(held),
                    "train_batches": len(fold.train),
                    "scores": scores,
                }
            )
        return reports
