"""Labelled batches from open data sets, for tests and benchmarks (test code only).

A *batch* imitates an analyst's work: a few classes of the data set, unequal group
sizes, labels local to the batch (renumbered in a random order, so "0" in one batch
has nothing to do with "0" in another).

Sources (name them in the tests that use them): scikit-learn's bundled UCI optical
digits (Alpaydin & Kaynak), wine (Forina et al.), breast cancer Wisconsin diagnostic
(Wolberg et al.), iris (Fisher 1936); the ``palmerpenguins`` package (Gorman,
Williams & Fraser 2014).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def load_open(name: str) -> tuple[np.ndarray, np.ndarray]:
    """``(X, y)`` of an open data set by short name: digits, wine, breast_cancer, iris,
    penguins (rows with a missing value dropped; numeric columns only)."""
    if name == "penguins":
        from palmerpenguins import load_penguins

        df = load_penguins().dropna()
        X = df.select_dtypes("number").to_numpy(dtype=float)
        y = np.unique(df["species"].to_numpy(), return_inverse=True)[1]
        return X, y
    from sklearn import datasets

    loaders: dict[str, Callable] = {
        "digits": datasets.load_digits,
        "wine": datasets.load_wine,
        "breast_cancer": datasets.load_breast_cancer,
        "iris": datasets.load_iris,
    }
    X, y = loaders[name](return_X_y=True)
    return np.asarray(X, dtype=float), np.asarray(y)


def split_pool(
    X: np.ndarray, y: np.ndarray, rng: np.random.Generator, test_fraction: float = 0.5
) -> tuple[tuple[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]:
    """Split records into two disjoint pools, stratified by class: (fit, score)."""
    fit_idx, score_idx = [], []
    for c in np.unique(y):
        idx = rng.permutation(np.flatnonzero(y == c))
        cut = int(round(len(idx) * (1.0 - test_fraction)))
        fit_idx.append(idx[:cut])
        score_idx.append(idx[cut:])
    a, b = np.concatenate(fit_idx), np.concatenate(score_idx)
    return (X[a], y[a]), (X[b], y[b])


def make_batches(
    X: np.ndarray,
    y: np.ndarray,
    n_batches: int,
    rng: np.random.Generator,
    classes_per_batch: tuple[int, int] = (2, 5),
    group_size: tuple[int, int] = (8, 40),
    disjoint: bool = True,
) -> list[tuple[np.ndarray, np.ndarray]]:
    """``n_batches`` labelled batches drawn from ``(X, y)``.

    Each batch takes between ``classes_per_batch`` classes (capped by the classes
    available) and, per class, a group size drawn uniformly from ``group_size`` (so
    groups are unequal). With ``disjoint`` records are not reused across batches
    until a class runs out, then that class is reshuffled and reused.
    """
    classes = np.unique(y)
    lo, hi = classes_per_batch
    hi = min(hi, len(classes))
    lo = min(lo, hi)
    queues = {c: list(rng.permutation(np.flatnonzero(y == c))) for c in classes}
    batches = []
    for _ in range(n_batches):
        k = int(rng.integers(lo, hi + 1))
        chosen = rng.choice(classes, size=k, replace=False)
        rows, labels = [], []
        for label, c in enumerate(rng.permutation(chosen)):
            avail = int((y == c).sum())
            size = min(int(rng.integers(group_size[0], group_size[1] + 1)), avail)
            if not disjoint:
                take = rng.choice(np.flatnonzero(y == c), size=size, replace=False)
            else:
                if len(queues[c]) < size:
                    queues[c] = list(rng.permutation(np.flatnonzero(y == c)))
                take, queues[c] = queues[c][:size], queues[c][size:]
            rows.append(X[np.asarray(take)])
            labels.append(np.full(size, label))
        order = rng.permutation(sum(len(r) for r in rows))
        batches.append((np.vstack(rows)[order], np.concatenate(labels)[order]))
    return batches


def few_batch_trial(
    name: str,
    seed: int,
    rules: tuple[str, ...] = ("one_se", "argmax"),
    n_batches: tuple[int, int] = (3, 5),
    group_size: tuple[int, int] = (5, 15),
    n_score: int = 15,
) -> dict[str, float]:
    """One few-batch problem: fit on 3–5 small batches, judge on a disjoint pool.

    Returns the mean held-out ARI (true k) of the metric each selection rule picks,
    and of the Euclidean metric (key ``"euclidean"``), on ``n_score`` batches drawn
    from records the fit never saw.
    """
    from sklearn.metrics import adjusted_rand_score

    from service.core import MetricSelector, group_records

    X, y = load_open(name)
    rng = np.random.default_rng(seed)
    (X_fit, y_fit), (X_score, y_score) = split_pool(X, y, rng)
    n_fit = int(rng.integers(n_batches[0], n_batches[1] + 1))
    fit = make_batches(X_fit, y_fit, n_fit, rng, group_size=group_size)
    score = make_batches(X_score, y_score, n_score, rng, group_size=group_size)

    def held_out(metric) -> float:
        return float(
            np.mean(
                [
                    adjusted_rand_score(yb, group_records(metric, Xb, len(np.unique(yb))).labels)
                    for Xb, yb in score
                ]
            )
        )

    out = {}
    for rule in rules:
        sel = MetricSelector(rule=rule, estimate_k=False, random_state=seed).fit(fit)
        out[rule] = held_out(sel.metric_)
    sel = MetricSelector(method="euclidean", estimate_k=False).fit(fit)
    out["euclidean"] = held_out(sel.metric_)
    return out
