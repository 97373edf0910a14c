"""Cross-validation over batches and the choice of learner and α.

Folds are made of whole batches (labels are local to a batch, so a batch is the unit
of evidence). With fewer than five batches every batch is held out once (leave one
batch out); otherwise ``n_folds`` folds, repeated with fresh partitions when there
are few batches. Each fold is fitted from ``total − held-out`` statistics in O(d³).
Every held-out batch is grouped at its true k in each candidate metric and scored
against the expert grouping (ARI, NMI, Rand); the standardised Euclidean metric is
always a candidate and the baseline, raw Euclidean is reported beside it.

Statistics-only batches (``fit(..., stats_only=...)``: a batch's statistics without
its records) are added to the training statistics of every fold and to the final fit;
they are never held out, since held-out scoring groups records. Folds are made of the
batches with records, of which there must be at least two.

Held-out grouping: all candidates of a fold group a held-out batch together
(:mod:`service.core._stacked`: scikit-learn's k-means++ and Lloyd steps run on every
candidate at once, with the same random numbers for each, so candidates are
compared on common random numbers). ``cv_n_init`` restarts (2 by default;
scikit-learn's own default for k-means++ is 1; ``bench/few_batches.py`` compares
the picks with more restarts). The unknown-k rule is
calibrated on each batch as the winning candidate saw it held out
(:func:`service.core.kchoice.held_out_k_hits` gives its held-out hit rate).

Cost cap: at most ``max_heldout_records`` records of a held-out batch are grouped
(a deterministic subsample drawn from ``random_state``). Statistics are never
subsampled. Held-out budget: with more than ``min_heldout_batches`` batches, each fold
scores a stratified sample of its held-out batches, grown until the sampling standard
error of the mean held-out ARI is within ``heldout_tolerance`` (or
``max_heldout_batches`` are scored); ``heldout_tolerance=None`` scores every batch
(:mod:`service.core._budget`, docs/method.md "Held-out budget").

Held-out groupings (``heldout_groupings_``, the versions' drift reference): every
candidate's labels of the first repetition's held-out batches are kept while
scoring (at most ``max_heldout_batches`` batches); the winner's are measured
through its fold maps once it is chosen, the rest dropped (docs/method.md,
"Held-out groupings").

Selection rule (``rule="one_se"``, the default for ``method="auto"``). With three
to five small batches the held-out ARI of the candidates differs by noise, and the
arg-max over ~19 candidates chases it. Scores are paired (every candidate is scored
on the same held-out batches), so the rule uses the standard error of *paired
differences* across batches: the default learner (``discriminant``, at its best α)
stands unless another candidate — Euclidean included — beats it by more than one
paired standard error. ``rule="argmax"`` takes the best mean.

``bench/few_batches.py`` measures this rule against the arg-max on problems of 3–5
small batches from open data sets, judged on batches from a disjoint pool of
records; its figures are in the README (Benchmarks), not here. A requested method
(not ``auto``) takes its arg-max α.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from . import kchoice
from ._budget import Budget
from ._cv import Candidate, CrossValidation, make_folds
from .clustering import validated_inner_loop
from .errors import CoreError, NotEnoughDataError
from .grouping import Grouping, grouping_of
from .learners import METHODS, fit_metric
from .metric import FittedMetric
from .stats import BatchStats
from .validation import check_batch, check_batches_at_once, check_whole

Batch = tuple[np.ndarray, np.ndarray]  # (records n×d raw units, group labels n)

DEFAULT_ALPHAS = (1e-4, 1e-3, 1e-2, 1e-1, 1.0, 10.0)
RULES = ("one_se", "argmax")
DEFAULT_LEARNER = "discriminant"
_SCORE_KEYS = ("ari", "nmi", "rand")
# a smaller mean held-out ARI gain is not called "better" (rule of thumb, no source)
MIN_GAIN = 0.02
_K_FOLDS = 5  # folds of the calibration batches behind the k-accuracy estimate
# the held-out budget (docs/method.md, "Held-out budget"): target sampling standard
# error of the mean held-out ARI, and the floor and cap on the batches scored
HELDOUT_TOLERANCE = 0.01
MIN_HELDOUT_BATCHES = 50
MAX_HELDOUT_BATCHES = 200


class MetricSelector:
    """Choose learner and α by K-fold cross-validation over batches, then refit on all.

    Parameters are stored only; ``fit`` returns self with ``metric_`` (FittedMetric,
    with its calibrated ``k_rule``), ``report_`` (JSON-safe dict, see the module doc
    and ``_report``) and ``heldout_groupings_``.

    ``heldout_groupings_`` (dict: index in ``batches`` → :class:`Grouping`): the
    held-out batches as the chosen learner and α grouped them in cross-validation,
    each by the map fitted on its fold's training batches (first repetition), so no
    batch shaped the map that grouped it. Labels are cross-validation's own (k-means
    at the batch's true k, kept as they were scored: nothing is grouped twice);
    distances and margins are measured through that fold's map
    (:func:`service.core.grouping.grouping_of`), the same kind of map as ``metric_``.
    Only the batches cross-validation scored are there: the held-out
    budget's sample when it applies, at most ``max_heldout_batches`` of them (evenly
    spread), each as its at most ``max_heldout_records`` scored records (in
    ``batches`` order when not subsampled). Left out: batches whose fold could not
    be fitted, and statistics-only batches (never held out).
    """

    def __init__(
        self,
        method: str = "auto",
        alphas: Sequence[float] | None = None,
        n_folds: int = 5,
        max_rank: int | None = None,
        k_max: int = 10,
        random_state: int | None = 0,
        progress: Callable[[str, float], None] | None = None,
        rule: str = "one_se",
        n_repeats: int | None = None,
        max_heldout_records: int = 2000,
        cv_n_init: int = 2,
        estimate_k: bool = True,
        max_k_batches: int = 20,
        heldout_tolerance: float | None = HELDOUT_TOLERANCE,
        min_heldout_batches: int = MIN_HELDOUT_BATCHES,
        max_heldout_batches: int = MAX_HELDOUT_BATCHES,
    ) -> None:
        self.method = method
        self.alphas = alphas
        self.n_folds = n_folds
        self.max_rank = max_rank
        self.k_max = k_max
        self.random_state = random_state
        self.progress = progress
        self.rule = rule
        self.n_repeats = n_repeats
        self.max_heldout_records = max_heldout_records
        self.cv_n_init = cv_n_init
        self.estimate_k = estimate_k
        self.max_k_batches = max_k_batches
        self.heldout_tolerance = heldout_tolerance
        self.min_heldout_batches = min_heldout_batches
        self.max_heldout_batches = max_heldout_batches

    # ------------------------------------------------------------------ public
    def fit(
        self,
        batches: Sequence[Batch],
        stats: Sequence[BatchStats] | None = None,
        stats_only: Sequence[BatchStats] = (),
    ) -> MetricSelector:
        """Cross-validate over ``batches`` (records and labels; ``stats`` their
        statistics, computed when None) and refit on all.

        ``stats_only``: statistics of batches whose records are not at hand (each of one
        batch). They enter every fold's training statistics and the final fit, and are
        never held out: held-out scoring needs records, so at least 2 ``batches`` are
        still required.
        """
        with validated_inner_loop():
            return self._fit(batches, stats, stats_only)

    def _fit(self, batches: Sequence[Batch], stats: Sequence[BatchStats] | None,
             stats_only: Sequence[BatchStats]) -> MetricSelector:
        self._check_params()
        batches = _check_batches(batches)
        self._report_progress("statistics", 0.0)
        stats = _check_stats(batches, stats)
        extra = _check_stats_only(stats_only, batches[0][0].shape[1])
        n_rep = self.n_repeats
        if n_rep is None:
            n_rep = 1 if len(batches) < 5 or len(batches) > 10 else 3
        folds = make_folds(len(batches), self.n_folds, n_rep, self.random_state)
        self._cv = CrossValidation(
            batches,
            stats,
            folds,
            max_rank=self.max_rank,
            random_state=self.random_state,
            max_records=self.max_heldout_records,
            n_init=self.cv_n_init,
            extra=extra,
        )
        cands = self._candidates()
        budget = Budget(self.heldout_tolerance, self.min_heldout_batches, self.max_heldout_batches)
        if not budget.applies(len(batches)):  # a budget scores at most max_heldout_batches
            self._cv.keep_labels = set(_spread(range(len(batches)), self.max_heldout_batches))
        self._budget = self._cv.score(
            cands, budget, lambda f: self._report_progress("cross-validation", 0.05 + 0.75 * f)
        )
        winner, reason, best = self._select(cands)
        self._report_progress("refit", 0.8)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            metric = fit_metric(self._cv.total, winner.method, winner.alpha or 1.0, self.max_rank)
        for w in caught:
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
        self._report_progress("k-rule", 0.85)
        self._fold_maps: dict[int, FittedMetric | None] = {}
        heldout = self._heldout_groupings(winner)
        evidence = self._k_evidence(winner, metric)
        metric = metric.with_k_rule(kchoice.rule_from_evidence(evidence))
        k_acc, k_trials = None, 0
        if self.estimate_k:
            hits = kchoice.held_out_k_hits(evidence, _K_FOLDS)
            k_acc, k_trials = (float(np.mean(hits)) if hits else None), len(hits)
        self.metric_ = metric
        self.heldout_groupings_ = heldout
        self.report_ = self._report(cands, winner, reason, best, k_acc, k_trials, metric)
        self._report_progress("done", 1.0)
        return self

    def evaluate(self, method: str, alpha: float) -> dict[str, Any]:
        """Held-out scores of a fixed (method, α) on the folds used by ``fit``.

        Returns ``{"method", "alpha", "score": {"ari", "baseline_ari", "nmi",
        "baseline_nmi", "rand", "baseline_rand"}, "ari_se", "per_batch_ari"}``.
        """
        if not hasattr(self, "_cv"):
            raise RuntimeError("call fit before evaluate")
        if method not in METHODS:
            raise CoreError(f"unknown method {method!r}", "method")
        cand = Candidate(method, 0.0 if method == "euclidean" else float(alpha))
        with validated_inner_loop():
            self._cv.run([cand])
        res = self._cv.summary(cand)
        base = self._cv.summary(Candidate("euclidean", 0.0))
        return {
            "method": cand.method,
            "alpha": cand.alpha,
            "score": _score_pair(res, base),
            "ari_se": res["ari_se"],
            "per_batch_ari": res["per_batch"]["ari"].tolist(),
        }

    # ----------------------------------------------------------------- private
    def _check_params(self) -> None:
        if self.method != "auto" and self.method not in METHODS:
            raise CoreError(
                f"unknown method {self.method!r}; expected auto or one of {', '.join(METHODS)}",
                "method",
            )
        if self.rule not in RULES:
            raise CoreError(f"unknown selection rule {self.rule!r}", "rule")
        alphas = DEFAULT_ALPHAS if self.alphas is None else tuple(self.alphas)
        if not alphas or any(
            not isinstance(a, (int, float)) or not math.isfinite(a) or a <= 0 for a in alphas
        ):
            raise CoreError("alphas must be a non-empty list of numbers greater than 0", "alphas")
        self._alphas = tuple(sorted({float(a) for a in alphas}))
        check_whole(self.n_folds, "n_folds", 2)
        if self.max_rank is not None:
            check_whole(self.max_rank, "max_rank", 1)
        check_whole(self.k_max, "k_max", 2)
        tol = self.heldout_tolerance
        if tol is not None and (
            isinstance(tol, bool) or not isinstance(tol, (int, float)) or not math.isfinite(tol)
            or tol <= 0
        ):
            raise CoreError(
                "heldout_tolerance must be a number greater than 0, or None to score every "
                "held-out batch", "heldout_tolerance",
            )
        low = check_whole(self.min_heldout_batches, "min_heldout_batches", 2)
        check_whole(self.max_heldout_batches, "max_heldout_batches", low)

    def _candidates(self) -> list[Candidate]:
        methods = (
            [m for m in METHODS if m != "euclidean"]
            if self.method == "auto"
            else ([] if self.method == "euclidean" else [self.method])
        )
        return [Candidate("euclidean", 0.0)] + [
            Candidate(m, a) for m in methods for a in self._alphas
        ]

    def _select(self, cands: list[Candidate]) -> tuple[Candidate, str, Candidate]:
        """The winner, the reason in words, and the arg-max candidate (for the report)."""
        ari = {c: self._cv.per_batch_ari(c) for c in cands}
        pool = cands if self.method == "auto" else [c for c in cands if c.method == self.method]
        best = max(pool, key=lambda c: ari[c].mean())
        if self.rule == "argmax" or self.method != "auto":
            why = "the highest mean held-out ARI"
            if self.method != "auto":
                why = f"{self.method} as requested, at the α with {why}"
            return best, why, best
        default = max(
            (c for c in cands if c.method == DEFAULT_LEARNER), key=lambda c: ari[c].mean()
        )
        rival = max((c for c in cands if c.method != DEFAULT_LEARNER), key=lambda c: ari[c].mean())
        gain = float(ari[rival].mean() - ari[default].mean())
        se = _paired_se(ari[rival], ari[default])
        if gain > se:
            return (
                rival,
                (
                    f"{rival.label} beat the default learner {default.label} by {gain:.3f} "
                    f"held-out ARI, more than one paired standard error ({se:.3f})"
                ),
                best,
            )
        return (
            default,
            (
                f"default learner {DEFAULT_LEARNER} at its best α; the best alternative "
                f"({rival.label}, {gain:+.3f} ARI) did not beat it by more than one paired "
                f"standard error ({se:.3f})"
            ),
            best,
        )

    def _k_evidence(self, winner: Candidate, metric: FittedMetric) -> kchoice.KEvidence:
        """Curves for the k rule from (at most ``max_k_batches``, evenly spread) batches.

        Each batch is seen through the winning candidate as fitted in the
        cross-validation fold that held the batch out (first repetition), so no batch
        shaped its own map; when that fold could not be fitted, through the learner
        refitted without the batch, and when that cannot be fitted either (e.g. the
        other batches have no spread), through ``metric`` itself — then the mapping is
        reported as ``partly_in_sample``. The batches' records are the subsamples
        scored in cross-validation.
        """
        which = _spread(range(len(self._cv.batches)), self.max_k_batches)
        fold_of = self._cv.first_folds()
        maps: list[FittedMetric] = []
        in_sample = False
        for b in which:
            m = self._fold_map(fold_of[b], winner)
            if m is None:  # rare: refit from all statistics but this batch's
                rest = self._cv.without_batch(b)
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")  # the final fit warned already
                        m = fit_metric(rest, winner.method, winner.alpha or 1.0, self.max_rank)
                except CoreError:
                    m, in_sample = metric, True
            maps.append(m)
        data = [self._cv.held_out_data(b) for b in which]
        mapping = "leave_one_batch_out" if self._cv.leave_one_out else "out_of_fold"
        if in_sample:
            mapping = "partly_in_sample"
        return kchoice.evidence_from_maps(maps, data, self.k_max, self.random_state, mapping)

    def _fold_map(self, i: int, winner: Candidate) -> FittedMetric | None:
        """The winner fitted on fold ``i``'s training batches (None if it cannot be),
        fitted once for the held-out groupings and the k rule."""
        if i not in self._fold_maps:
            self._fold_maps[i] = self._cv.fold_metric(i, winner)
            self._cv.forget(i)
        return self._fold_maps[i]

    def _heldout_groupings(self, winner: Candidate) -> dict[int, Grouping]:
        """``heldout_groupings_``: the scored batches (at most ``max_heldout_batches``,
        evenly spread) as cross-validation grouped them with the winner, seen through
        the winner's fold map."""
        labels = self._cv.held_out_labels(winner)
        self._cv.drop_labels()
        fold_of = self._cv.first_folds()
        out: dict[int, Grouping] = {}
        for b in sorted(labels, key=lambda b: (fold_of[b], b)):
            m = self._fold_map(fold_of[b], winner)
            if m is None:  # nothing was learned without this batch: no reference
                continue
            g = grouping_of(m, self._cv.held_out_data(b)[0], labels[b])
            if np.isfinite(g.distances).all():
                out[b] = g
        return dict(sorted(out.items()))

    def _budget_report(self, res: dict[str, Any], n_batches: int) -> dict[str, Any]:
        """The held-out sample and the winner's sampling standard error (0 when every
        batch was scored); ``tolerance_met`` is false only when the cap stopped it."""
        out = dict(self._budget)
        out["n_batches"] = n_batches
        out["sampling_se"] = res["sampling_se"]
        tol = out["tolerance"]
        out["tolerance_met"] = tol is None or res["sampling_se"] <= tol
        return out

    def _report_progress(self, stage: str, fraction: float) -> None:
        if self.progress is not None:
            self.progress(stage, float(min(max(fraction, 0.0), 1.0)))

    def _report(self, cands, winner, reason, best, k_acc, k_trials, metric) -> dict[str, Any]:
        cv = self._cv
        euclid = Candidate("euclidean", 0.0)
        res, base = cv.summary(winner), cv.summary(euclid)
        score = _score_pair(res, base)
        beats = winner.method != "euclidean" and _clear_gain(
            cv.per_batch_ari(winner), cv.per_batch_ari(euclid)
        )
        candidates = []
        for c in cands:
            s = cv.summary(c, ("ari",))
            candidates.append(
                {
                    "method": c.method,
                    "alpha": c.alpha,
                    "ari": s["ari"],
                    "ari_se": s["ari_se"],
                    "won": c == winner,
                }
            )
        return {
            "method": winner.method,
            "alpha": winner.alpha,
            "rank": metric.rank,
            "score": score,
            "score_se": {"ari": res["ari_se"], "baseline_ari": base["ari_se"]},
            "raw_baseline": cv.raw_summary(),
            "beats_baseline": bool(beats),
            "summary": _summary(winner, score, beats, self.method, len(cv.batches)),
            "selection": {
                "requested": self.method,
                "rule": self.rule,
                "reason": reason,
                "best_by_mean": {
                    "method": best.method,
                    "alpha": best.alpha,
                    "ari": cv.summary(best, ("ari",))["ari"],
                },
            },
            "candidates": candidates,
            "folds": cv.fold_reports(cands),
            "cv": "leave-one-batch-out" if cv.leave_one_out else "k-fold",
            "n_folds": len({f.index for f in cv.folds}),
            "n_repeats": max(f.repeat for f in cv.folds) + 1,
            "max_heldout_records": self.max_heldout_records,
            "heldout_budget": self._budget_report(res, len(cv.batches)),
            "k_accuracy": k_acc,
            "k_trials": k_trials,
            "k_rule": (metric.k_rule or {}).get("rule"),
            "n_batches": len(cv.batches) + cv.n_stats_only,
            "n_heldout_batches": len(cv.batches),
            "n_stats_only_batches": cv.n_stats_only,
            "n_records": int(cv.total.n),
            "n_features": int(cv.total.n_features),
            "warnings": list(metric.info.get("warnings", [])),
        }


def _spread(items: Sequence[int], at_most: int) -> list[int]:
    """``items``, or ``at_most`` of them evenly spread (the first and last included)."""
    items = list(items)
    if len(items) <= at_most:
        return items
    return [items[j] for j in np.linspace(0, len(items) - 1, at_most).round().astype(int)]


def _check_batches(batches: Sequence[Batch]) -> list[tuple[np.ndarray, np.ndarray]]:
    batches = list(batches)
    if len(batches) < 2:
        raise NotEnoughDataError(
            f"cross-validation needs at least 2 labelled batches, got {len(batches)}", "batches"
        )
    at_once = check_batches_at_once(batches)
    if at_once is not None:
        return at_once
    out = []
    d = None
    for i, item in enumerate(batches):
        try:
            X, y = item
        except (TypeError, ValueError) as exc:
            raise CoreError(f"batch {i} must be a (records, groups) pair", "batches") from exc
        X = np.asarray(X, dtype=float) if not isinstance(X, np.ndarray) else X
        if d is not None and (X.ndim != 2 or X.shape[1] != d):
            got = X.shape[1] if X.ndim == 2 else "?"
            raise CoreError(f"batch {i} has {got} feature(s), expected {d}", "features")
        out.append(check_batch(X, y, d))
        d = out[0][0].shape[1]
    return out


def _check_stats(batches, stats) -> list[BatchStats]:
    if stats is None:
        return [BatchStats.from_batch(X, y) for X, y in batches]
    stats = list(stats)
    if len(stats) != len(batches):
        raise CoreError(f"{len(stats)} statistics for {len(batches)} batches", "batches")
    return _check_each(stats, batches[0][0].shape[1], "statistics")


def _check_stats_only(stats_only: Sequence[BatchStats], d: int) -> list[BatchStats]:
    return _check_each(list(stats_only), d, "statistics-only batch")


def _check_each(stats: list[BatchStats], d: int, what: str) -> list[BatchStats]:
    """Each one batch's statistics, over ``d`` features."""
    for i, s in enumerate(stats):
        if not isinstance(s, BatchStats) or s.n_batches != 1:
            raise CoreError(f"{what} {i} are not those of one batch", "batches")
        if s.n_features != d:
            raise CoreError(f"{what} {i} have {s.n_features} feature(s), expected {d}",
                            "features")
    return stats


def _clear_gain(a: np.ndarray, b: np.ndarray) -> bool:
    """``a`` beats ``b`` by more than one paired standard error and by ``MIN_GAIN``."""
    return float(a.mean() - b.mean()) > max(_paired_se(a, b), MIN_GAIN)


def _paired_se(a: np.ndarray, b: np.ndarray) -> float:
    diff = a - b
    if diff.size < 2:
        return 0.0
    return float(diff.std(ddof=1) / math.sqrt(diff.size))


def _score_pair(res: dict[str, Any], base: dict[str, Any]) -> dict[str, float]:
    out: dict[str, float] = {}
    for key in _SCORE_KEYS:
        out[key] = res[key]
        out[f"baseline_{key}"] = base[key]
    return out


def _summary(
    winner: Candidate, score: dict[str, float], beats: bool, requested: str, n_batches: int
) -> str:
    held = (
        f"held-out ARI {score['ari']:.3f} vs Euclidean {score['baseline_ari']:.3f} "
        f"over {n_batches} batches"
    )
    if requested == "euclidean":
        return f"The Euclidean metric on standardised features was fitted as requested ({held})."
    if beats:
        return f"The {winner.label} metric beat the Euclidean baseline: {held}."
    if winner.method == "euclidean":
        return (
            "No learned metric beat the Euclidean baseline by more than the noise between "
            f"batches, so the Euclidean metric on standardised features was kept ({held})."
        )
    return (
        "No learned metric beat the Euclidean baseline by a clear margin (one standard "
        f"error and {MIN_GAIN} ARI); the {winner.label} metric was kept as chosen ({held})."
    )
