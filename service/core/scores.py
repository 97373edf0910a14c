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
    return agreement_many(truth, pred[None, :])[0]


def agreement_many(truth: np.ndarray, preds: np.ndarray) -> list[dict[str, float]]:
    """:func:`agreement` of one expert grouping against each row of ``preds``, for
    labels already coded 0..a−1 (``truth``, n) and 0..b−1 (``preds``, P × n), computed
    for all rows at once from P contingency tables kept sparse (only the non-empty
    cells: memory grows with the records, not with a × b)."""
    preds = np.asarray(preds, dtype=np.int64)
    truth = np.asarray(truth, dtype=np.int64)
    P, n = preds.shape
    a = int(truth.max()) + 1 if n else 1
    b = int(preds.max()) + 1 if n else 1
    # the non-empty cells of every table: key (table p, truth i, pred j) → count
    keys = (np.arange(P)[:, None] * a + truth) * b + preds
    cells, count = np.unique(keys.ravel(), return_counts=True)
    table_of, row_of, col_of = cells // (a * b), (cells // b) % a, cells % b
    count = count.astype(np.float64)
    rows = np.bincount(truth, minlength=a).astype(np.float64)  # the same for every p
    cols = np.bincount((np.arange(P)[:, None] * b + preds).ravel(), minlength=P * b)
    cols = cols.reshape(P, b).astype(np.float64)
    sum_sq = np.bincount(table_of, weights=count**2, minlength=P)
    rows_sq, cols_sq = float(rows @ rows), np.einsum("pj,pj->p", cols, cols)
    # pair counts (tn, fp, fn, tp) over ordered pairs, as scikit-learn's
    # pair_confusion_matrix counts them (exact in float64 while n² < 2⁵³)
    tp, fp, fn = sum_sq - n, cols_sq - sum_sq, rows_sq - sum_sq
    tn = float(n) * n - fp - fn - sum_sq
    same = (fn == 0) & (fp == 0)
    denom = (tp + fn) * (fn + tn) + (tp + fp) * (fp + tn)
    ari = np.where(same, 1.0, 2.0 * (tp * tn - fn * fp) / np.where(same, 1.0, denom))
    agree, total = tn + tp, tn + fp + fn + tp
    rand = np.where((agree == total) | (total == 0), 1.0, agree / np.maximum(total, 1.0))
    nmi = _nmi_many(count, table_of, rows[row_of], cols[table_of, col_of], rows, cols, n, P)
    return [
        {"ari": float(x), "nmi": float(y), "rand": float(z)}
        for x, y, z in zip(ari, nmi, rand, strict=True)
    ]


def _nmi_many(count, table_of, row_n, col_n, rows, cols, n: int, P: int) -> np.ndarray:
    """NMI of every table from its non-empty cells (count, with their row and column
    totals) and the totals themselves."""
    if n == 0:
        return np.ones(P)
    # Σ p_ij log(p_ij / (p_i p_j)) over the non-empty cells, per table
    terms = count / n * (np.log(count) + np.log(n) - np.log(row_n) - np.log(col_n))
    mi = np.maximum(np.bincount(table_of, weights=terms, minlength=P), 0.0)
    pr = rows[rows > 0] / n
    h_true = float(-np.sum(pr * np.log(pr)))
    with np.errstate(divide="ignore", invalid="ignore"):
        pc = cols / n
        h_pred = -np.where(pc > 0, pc * np.log(pc), 0.0).sum(axis=1)
    nmi = mi / np.maximum((h_true + h_pred) / 2.0, np.finfo("float64").eps)
    nmi = np.where(mi == 0.0, 0.0, nmi)
    trivial = (np.count_nonzero(rows) <= 1) & ((cols > 0).sum(axis=1) <= 1)
    return np.where(trivial, 1.0, nmi)
