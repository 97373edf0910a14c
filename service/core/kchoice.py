"""Choosing k when the caller does not give it.

For a set of mapped records and every k in 1..k_max we group once (a Ward tree cut
at k, refined by k-means iterations; :mod:`service.core.kcurves`) and keep three
curves: the within-group sum of squares ``W_k``, the silhouette and the
Calinski–Harabasz ratio. Four candidate rules read k̂ from those curves:

* ``silhouette`` — k with the largest mean silhouette (no parameter);
* ``calinski_harabasz`` — k with the largest between/within variance ratio (no parameter);
* ``spread`` — the smallest k whose mean squared distance to the own centre,
  ``W_k / n``, is at most a threshold τ: how tight the experts' groups are in the
  learned space, learned from the training batches;
* ``explained`` — the smallest k with ``W_k / W_1 ≤ τ`` (share of spread left).

Calibration reads :class:`KEvidence`: per labelled batch, its curves in the learned
space and its number of expert groups. Each batch is seen through a map that was
fitted without it, because a metric makes its own training batches look tighter
than new ones: the selector (:mod:`service.core.selection`) passes the map of the
cross-validation fold that held the batch out to :func:`evidence_from_maps`.
:func:`rule_from_evidence` scores every rule
leave-one-batch-out (thresholds learned on the other batches); a held-out batch
counts as a hit when k̂ equals its number of expert groups. The rule with the best
held-out hit rate wins (ties go to the earlier rule in the list above) and is
refitted on all batches. :func:`held_out_k_hits` repeats the whole calibration —
the choice of rule included — without each fold of batches, for an honest hit rate.
The result is a JSON-safe dict stored with the metric; ``choose_k`` applies it to
records already mapped.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import kcurves
from .errors import CoreError
from .metric import FittedMetric
from .validation import check_matrix, check_whole

RULES = ("silhouette", "calinski_harabasz", "spread", "explained")
_THRESHOLD_RULES = ("spread", "explained")
DEFAULT_K_MAX = 10


@dataclass(frozen=True)
class KEvidence:
    """What the k rules are calibrated on: per labelled batch, the curves over k in the
    learned space (each batch mapped by a map fitted without it where possible, see
    ``mapping``) and the batch's number of expert groups."""

    curves: list[dict[str, np.ndarray]]
    truths: list[int]
    k_max: int
    # "out_of_fold", "in_sample" or "partly_in_sample"
    mapping: str
    # per rule without parameters, the k it reads from each batch's curves
    fixed: dict[str, list[int]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for rule in RULES:
            if rule not in _THRESHOLD_RULES and rule not in self.fixed:
                self.fixed[rule] = [_pick(rule, c, {}) for c in self.curves]

    def subset(self, which: Sequence[int]) -> KEvidence:
        return KEvidence(
            [self.curves[i] for i in which], [self.truths[i] for i in which],
            self.k_max, self.mapping,
            {rule: [picks[i] for i in which] for rule, picks in self.fixed.items()},
        )


def evidence_from_maps(
    maps: Sequence[FittedMetric],
    data: Sequence[tuple[np.ndarray, np.ndarray]],
    k_max: int,
    random_state: int | None,
    mapping: str,
) -> KEvidence:
    """Curves of each (validated) batch seen through its own map; ``mapping`` names
    how the maps were obtained (e.g. ``"out_of_fold"`` from cross-validation)."""
    k_max = _check_k_max(k_max)
    curves = [
        kcurves.curves(m.transform(X), k_max, random_state)
        for m, (X, _) in zip(maps, data, strict=True)
    ]
    truths = [int(codes.max()) + 1 for _, codes in data]
    return KEvidence(curves, truths, k_max, mapping)


def rule_from_evidence(ev: KEvidence) -> dict[str, Any]:
    """Score every rule leave-one-batch-out on ``ev``; the winner refitted on all of it."""
    curves, truths = ev.curves, ev.truths
    m = len(curves)
    candidates: dict[str, dict[str, Any]] = {}
    for rule in RULES:
        if rule in _THRESHOLD_RULES:
            if m < 2:
                continue  # a threshold cannot be checked held-out on a single batch
            lo, hi = _bounds(rule, curves, truths)
            every = np.ones(m, dtype=bool)
            held_params = []
            for i in range(m):
                every[i] = False
                held_params.append(_threshold(lo[every], hi[every]))
                every[i] = True
            params = _threshold(lo, hi)
            picks = [_pick(rule, c, p) for c, p in zip(curves, held_params, strict=True)]
        else:
            picks, params = ev.fixed[rule], {}
        hits = [k == t for k, t in zip(picks, truths, strict=True)]
        candidates[rule] = {
            "held_out_hit_rate": float(np.mean(hits)) if hits else None,
            "params": params,
        }
    winner = max(
        candidates,
        key=lambda name: (candidates[name]["held_out_hit_rate"] or 0.0, -RULES.index(name)),
    )
    return {
        "rule": winner,
        "params": candidates[winner]["params"],
        "k_max": ev.k_max,
        "held_out_hit_rate": candidates[winner]["held_out_hit_rate"],
        "n_batches": len(curves),
        "mapping": ev.mapping,
        "candidates": candidates,
        "sample_cap": kcurves.SAMPLE_CAP,
    }


def held_out_k_hits(ev: KEvidence, n_folds: int = 5) -> list[bool]:
    """Per batch of ``ev``: does k̂ equal its expert k when the whole calibration (which
    rule, its threshold) is redone without the batch's fold?

    Folds are contiguous runs of batches, ``n_folds`` of them (one batch per fold
    when there are fewer batches). Every batch is seen through the learner refitted
    without it (``ev.mapping``), so the batch being judged never shaped its own map;
    it did contribute to the maps of the batches the rule was calibrated on.
    """
    m = len(ev.curves)
    if m < 2:
        return []
    hits: list[bool] = []
    for part in np.array_split(np.arange(m), min(max(int(n_folds), 2), m)):
        train = [i for i in range(m) if i not in set(part.tolist())]
        rule = rule_from_evidence(ev.subset(train))
        hits += [
            _pick(rule["rule"], ev.curves[i], rule["params"]) == ev.truths[i] for i in part
        ]
    return hits


def choose_k(Z: np.ndarray, rule: dict[str, Any] | None, random_state: int | None = 0) -> int:
    """k in [2, k_max] for records already mapped into the learned space.

    Capped by the number of distinct points; 1 only when there is a single one.
    ``rule`` None means the silhouette rule with k_max = 10. Rules that do not read
    the silhouette get curves without it (cheaper; the other points are the same).
    """
    Z = check_matrix(Z, "records")
    rule = rule or {"rule": "silhouette", "params": {}, "k_max": DEFAULT_K_MAX}
    name = rule.get("rule")
    if name not in RULES:
        raise CoreError(f"unknown k rule {name!r}", "k_rule")
    k_max = _check_k_max(rule.get("k_max", DEFAULT_K_MAX))
    params = rule.get("params") or {}
    silhouette = name == "silhouette" or (name in _THRESHOLD_RULES and _tau(params) is None)
    return _pick(name, kcurves.curves(Z, k_max, random_state, silhouette=silhouette), params)


def _check_k_max(k_max) -> int:
    return check_whole(k_max, "k_max", 2)


def _statistic(rule: str, curves: dict[str, np.ndarray]) -> np.ndarray:
    """The curve a threshold rule compares with τ (index 0 ↔ k = 1)."""
    inertia = curves["inertia"]
    if rule == "spread":
        return inertia / curves["n"]
    return inertia / inertia[0] if inertia[0] > 0 else np.zeros_like(inertia)


def _pick(rule: str, curves: dict[str, np.ndarray], params: dict[str, Any]) -> int:
    k_hi = curves["inertia"].shape[0]
    if k_hi < 2:
        return 1
    if rule in _THRESHOLD_RULES:
        stat = _statistic(rule, curves)[1:]
        tau = _tau(params)
        if tau is None:  # nothing to calibrate on: fall back to the silhouette
            return _pick("silhouette", curves, {})
        below = np.flatnonzero(stat <= tau)
        return int(below[0]) + 2 if below.size else k_hi
    values = np.nan_to_num(curves[rule][1:], nan=-np.inf, posinf=np.finfo(float).max)
    return int(np.argmax(values)) + 2


def _tau(params: dict[str, Any]) -> Any:
    """A threshold rule's τ; None when there was nothing to calibrate it on."""
    return params.get("threshold")


def _fit_params(rule: str, curves: list, truths: list[int]) -> dict[str, Any]:
    """Threshold τ hitting the most batches; ``{}`` for rules without parameters."""
    if rule not in _THRESHOLD_RULES:
        return {}
    lo, hi = _bounds(rule, curves, truths)
    return _threshold(lo, hi)


def _bounds(rule: str, curves: list, truths: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Per batch, the interval [lo, hi) of thresholds that hit its k (NaN: none can).

    A batch is hit when stat[k_true] ≤ τ < stat[k] for every 2 ≤ k < k_true.
    """
    lo, hi = np.full(len(curves), np.nan), np.full(len(curves), np.nan)
    for i, (c, t) in enumerate(zip(curves, truths, strict=True)):
        stat = _statistic(rule, c)
        if t < 2 or t > stat.shape[0]:
            continue  # k out of reach: no threshold can hit this batch
        lo[i] = stat[t - 1]
        hi[i] = np.min(stat[1 : t - 1]) if t > 2 else np.inf
    return lo, hi


def _threshold(lo: np.ndarray, hi: np.ndarray) -> dict[str, Any]:
    """The threshold inside the most [lo, hi) intervals (widest such stretch on a log
    scale); NaN intervals are skipped."""
    ok = lo < hi  # False for NaN
    lo, hi = lo[ok], hi[ok]
    if lo.size == 0:
        return {"threshold": None}
    cover = ((lo[None, :] <= lo[:, None]) & (lo[:, None] < hi[None, :])).sum(axis=1)
    top = int(cover.max())
    starts = np.unique(lo[cover == top])
    events = np.sort(np.concatenate([lo, hi]))
    # each stretch runs from a start to the next event (an interval opening or closing)
    after = np.searchsorted(events, starts, side="right")
    ends = np.append(events, np.inf)[after]
    best_width, best_tau = -math.inf, None
    for start, end in zip(starts.tolist(), ends.tolist(), strict=True):
        tau, width = _inside(start, end)
        if width > best_width:
            best_width, best_tau = width, tau
    return {"threshold": best_tau, "training_hits": top}


def _inside(start: float, end: float) -> tuple[float, float]:
    """A point well inside [start, end) and the interval's width on a log scale."""
    if not math.isfinite(end):
        return (2.0 * start if start > 0 else 1.0), math.inf
    if start > 0:
        return math.sqrt(start * end), math.log(end / start)
    return end / 2.0, math.inf
