"""Statistics-only batches in the selector: summed into every fold, never held out.

Data: scikit-learn's bundled wine data set (Forina et al.), cut into labelled batches by
tests/datasets.py. Reference for the summed statistics: numpy on the stacked records.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from service.core import BatchStats, CoreError, MetricSelector, NotEnoughDataError
from tests.datasets import load_open, make_batches


@pytest.fixture(scope="module")
def wine_batches():
    X, y = load_open("wine")
    return make_batches(X, y, 8, np.random.default_rng(3), classes_per_batch=(2, 3))


def _selector(**kw):
    return MetricSelector(method="discriminant", alphas=(0.1,), random_state=0,
                          estimate_k=False, **kw)


def test_stats_only_batches_give_the_all_raw_matrix(wine_batches):
    raw_all = _selector().fit(wine_batches)
    few, rest = wine_batches[:3], wine_batches[3:]
    mixed = _selector().fit(few, stats_only=[BatchStats.from_batch(X, y) for X, y in rest])
    # the final fit is from the same summed statistics whichever batches kept records
    # (the matrix, not the components: an eigenvector's sign is arbitrary)
    for attr in ("mean", "scales", "matrix"):
        assert_allclose(getattr(mixed.metric_, attr), getattr(raw_all.metric_, attr),
                        rtol=1e-9, atol=1e-12)
    rep = mixed.report_
    assert rep["n_batches"] == 8 and rep["n_stats_only_batches"] == 5
    assert rep["n_heldout_batches"] == 3
    assert rep["n_records"] == sum(len(y) for _, y in wine_batches)
    assert rep["cv"] == "leave-one-batch-out" and len(rep["folds"]) == 3
    # every fold trains on the other raw batches and every statistics-only one
    assert all(f["train_batches"] == 2 for f in rep["folds"])


def test_fold_training_statistics_include_the_stats_only_batches(wine_batches):
    few, rest = wine_batches[:3], wine_batches[3:]
    sel = _selector().fit(few, stats_only=[BatchStats.from_batch(X, y) for X, y in rest])
    cv = sel._cv
    for i, fold in enumerate(cv.folds):
        train = [few[b] for b in fold.train] + rest
        X = np.vstack([x for x, _ in train])
        # reference: numpy on the stacked records of the fold's training batches
        assert cv.train_stats(i).n == X.shape[0]
        assert_allclose(cv.train_stats(i).sums, X.sum(axis=0), rtol=1e-12)


def test_two_raw_batches_are_still_needed(wine_batches):
    stats = [BatchStats.from_batch(X, y) for X, y in wine_batches]
    with pytest.raises(NotEnoughDataError):
        _selector().fit(wine_batches[:1], stats_only=stats[1:])


def test_stats_only_must_match_the_features(wine_batches):
    X, y = wine_batches[3]
    with pytest.raises(CoreError) as err:
        _selector().fit(wine_batches[:2], stats_only=[BatchStats.from_batch(X[:, :5], y)])
    assert err.value.field == "features"
    both = BatchStats.from_batch(X, y) + BatchStats.from_batch(*wine_batches[4])
    with pytest.raises(CoreError) as err:
        _selector().fit(wine_batches[:2], stats_only=[both])
    assert err.value.field == "batches"
