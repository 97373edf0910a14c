"""Cross-validation sums each batch's statistics once: the first repetition's held-out
fold sums make the total (``service/core/_cv.py``). The total must equal the batches'
plain sum (to rounding), and the fold sums are kept only while they are small.

Data: scikit-learn's bundled UCI optical digits (Alpaydin & Kaynak); for the wide
case, its 64 pixels side by side as many times as needed.
"""

from __future__ import annotations

import numpy as np

from service.core import BatchStats
from service.core._cv import KEEP_ELEMENTS, CrossValidation, make_folds
from tests.datasets import load_open, make_batches


def _cv(batches, n_folds: int = 5, n_repeats: int = 1) -> CrossValidation:
    stats = [BatchStats.from_batch(X, y) for X, y in batches]
    folds = make_folds(len(batches), n_folds, n_repeats, 0)
    return CrossValidation(batches, stats, folds, max_rank=None, random_state=0,
                           max_records=500, n_init=1)


def _close(a: BatchStats, b: BatchStats) -> None:
    assert (a.n_batches, a.n, a.n_groups) == (b.n_batches, b.n, b.n_groups)
    for x, y in ((a.G, b.G), (a.H, b.H), (a.sums, b.sums)):
        np.testing.assert_allclose(x, y, rtol=1e-12, atol=1e-9)


def test_the_total_from_fold_sums_equals_the_plain_sum_for_every_fold_layout():
    X, y = load_open("digits")
    batches = make_batches(X, y, 23, np.random.default_rng(0))
    plain = BatchStats.sum(BatchStats.from_batch(a, b) for a, b in batches)
    for n_folds, n_repeats, n in ((5, 1, 23), (5, 3, 8), (30, 1, 23), (5, 1, 4)):
        cv = _cv(batches[:n], n_folds, n_repeats)
        _close(cv.total, BatchStats.sum(BatchStats.from_batch(a, b) for a, b in batches[:n]))
        assert len(cv._held_sums) == len([f for f in cv.folds if f.repeat == 0])
        for i, fold in enumerate(cv.folds):  # each fold's training statistics too
            train = BatchStats.sum(cv.stats[b] for b in fold.train)
            _close(cv.train_stats(i), train)
    _close(_cv(batches).total, plain)


def test_wide_features_keep_no_fold_sums():
    X, y = load_open("digits")
    copies = int(np.sqrt(KEEP_ELEMENTS / 10)) // X.shape[1] + 1  # 5 folds of 2·d² floats
    wide = np.tile(X, (1, copies))                              # exceed the cap
    batches = make_batches(wide, y, 6, np.random.default_rng(1))
    cv = _cv(batches)
    assert cv._held_sums == {}
    _close(cv.total, BatchStats.sum(BatchStats.from_batch(a, b) for a, b in batches))
