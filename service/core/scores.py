"""Label-invariant agreement scores between an expert grouping and a computed one.

Adjusted Rand index (Hubert & Arabie 1985), Rand index (Rand 1971), normalised
mutual information with the arithmetic-mean normaliser (Vinh, Epps & Bailey 2010),
all three from one contingency table. scikit-learn's ``adjusted_rand_score``,
``rand_score`` and ``normalized_mutual_info_score`` are the reference (same
formulas, same edge cases; tests compare them on many labellings). They are not
called here because cross-validation scores hundreds of small groupings and their
per-call input checks cost ~1 ms each, about 50× the arithmetic.
"""

from __future__ import annotations

import numpy as np


def agreement(labels_true, labels_pred) -> dict[str, float]:
    """``{"ari", "nmi", "rand"}`` between an expert grouping and a computed one."""
    truth = np.unique(np.asarray(labels_true).reshape(-1), return_inverse=True)[1].reshape(-1)
    pred = np.unique(np.asarray(labels_pred).reshape(-1), return_inverse=True)[1].reshape(-1)
    if truth.shape != pred.shape:
        raise ValueError(f"{truth.size} expert labels but {pred.size} computed labels")
    return _from_table(_contingency(truth, pred))


def agreement_codes(truth: np.ndarray, pred: np.ndarray) -> dict[str, float]:
    """:func:`agreement` for labels already coded 0..a−1 and 0..b−1 (no relabelling)."""
    return _from_table(_contingency(truth, pred))


def _contingency(truth: np.ndarray, pred: np.ndarray) -> np.ndarray:
    a = int(truth.max()) + 1 if truth.size else 0
    b = int(pred.max()) + 1 if pred.size else 0
    flat = np.bincount(truth.astype(np.int64) * b + pred, minlength=a * b)
    table = flat.reshape(a, b)
    return table[table.sum(axis=1) > 0][:, table.sum(axis=0) > 0]


def _from_table(table: np.ndarray) -> dict[str, float]:
    return {"ari": _ari(table), "nmi": _nmi(table), "rand": _rand(table)}


def _pairs(table: np.ndarray) -> tuple[int, int, int, int]:
    """Pair counts (tn, fp, fn, tp) over ordered pairs, as scikit-learn's
    ``pair_confusion_matrix`` counts them."""
    n = int(table.sum())
    sum_sq = int(np.sum(table.astype(np.int64) ** 2))
    rows_sq = int(np.sum(table.sum(axis=1).astype(np.int64) ** 2))
    cols_sq = int(np.sum(table.sum(axis=0).astype(np.int64) ** 2))
    tp = sum_sq - n
    fp = cols_sq - sum_sq
    fn = rows_sq - sum_sq
    tn = n * n - fp - fn - sum_sq
    return tn, fp, fn, tp


def _ari(table: np.ndarray) -> float:
    tn, fp, fn, tp = _pairs(table)
    if fn == 0 and fp == 0:  # identical partitions (incl. both a single group)
        return 1.0
    return float(2.0 * (tp * tn - fn * fp) / ((tp + fn) * (fn + tn) + (tp + fp) * (fp + tn)))


def _rand(table: np.ndarray) -> float:
    tn, fp, fn, tp = _pairs(table)
    agree, total = tn + tp, tn + fp + fn + tp
    if agree == total or total == 0:
        return 1.0
    return float(agree / total)


def _nmi(table: np.ndarray) -> float:
    a, b = table.shape
    if a == b == 1 or a == b == 0:  # both groupings trivial: perfect agreement
        return 1.0
    n = float(table.sum())
    rows, cols = table.sum(axis=1) / n, table.sum(axis=0) / n
    nz = table > 0
    p = table[nz] / n
    outer = np.outer(rows, cols)[nz]
    mi = float(max(np.sum(p * (np.log(p) - np.log(outer))), 0.0))
    if mi == 0.0:
        return 0.0
    h_true = float(-np.sum(rows * np.log(rows)))
    h_pred = float(-np.sum(cols * np.log(cols)))
    return float(mi / max((h_true + h_pred) / 2.0, np.finfo("float64").eps))
