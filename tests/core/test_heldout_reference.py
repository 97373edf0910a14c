"""Held-out groupings of the chosen learner (``MetricSelector.heldout_groupings_``) and
the drift reference built from them.

Data: iris (Fisher 1936) and wine (Forina et al.), as bundled with scikit-learn, split
into labelled batches by ``tests/datasets.py``. Reference computations: the public
core API (``BatchStats``, ``fit_metric``, ``group_records``) for the map fitted
without a batch and its grouping, ``scipy.spatial.distance.cdist`` for distances to
the groups' centres, scikit-learn's ``adjusted_rand_score`` to compare partitions.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.spatial.distance import cdist
from sklearn.metrics import adjusted_rand_score

from service.core import BatchStats, MetricSelector, fit_metric, group_records
from service.core.drift import (
    Reference,
    build_reference,
    compare,
    empty_summary,
    summarise,
)
from tests.datasets import load_open, make_batches

ALPHAS = (1e-3, 1e-1, 10.0)  # a short grid keeps the tests quick


def _batches(name: str, n: int, seed: int = 1) -> list[tuple[np.ndarray, np.ndarray]]:
    X, y = load_open(name)
    return make_batches(X, y, n, np.random.default_rng(seed))


def _map_without(batches, held: set[int], report: dict):
    """The chosen learner and α fitted, with the public API, on every batch not in
    ``held``."""
    rest = BatchStats.sum([BatchStats.from_batch(X, y) for j, (X, y) in enumerate(batches)
                           if j not in held])
    return fit_metric(rest, report["method"], report["alpha"] or 1.0)


def _given_labels(Z: np.ndarray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distances to the own group's mean and margins (runner-up minus own), by scipy."""
    centres = np.stack([Z[labels == g].mean(axis=0) for g in range(labels.max() + 1)])
    dist = cdist(Z, centres)
    own = dist[np.arange(len(Z)), labels]
    dist[np.arange(len(Z)), labels] = np.inf
    return own, dist.min(axis=1) - own


def test_leave_one_batch_out_margins_equal_a_refit_without_the_batch() -> None:
    # iris, three batches: every batch held out once; the refit without it (public
    # API) groups it into the same partition, with the same margins and distances
    batches = _batches("iris", 3)
    sel = MetricSelector(alphas=ALPHAS, random_state=0).fit(batches)
    assert sel.report_["cv"] == "leave-one-batch-out"
    assert sorted(sel.heldout_groupings_) == [0, 1, 2]
    for b, g in sel.heldout_groupings_.items():
        X, y = batches[b]
        m = _map_without(batches, {b}, sel.report_)
        ref = group_records(m, X, len(np.unique(y)))
        assert g.k == ref.k == len(np.unique(y))
        assert adjusted_rand_score(ref.labels, g.labels) == 1.0
        assert_allclose(g.margins, ref.margins, rtol=1e-7, atol=1e-9)
        assert_allclose(g.distances, ref.distances, rtol=1e-7, atol=1e-9)
        assert g.sizes.sum() == len(X)


def test_k_fold_margins_are_measured_through_the_fold_that_held_the_batch_out() -> None:
    # wine, eight batches: five folds (three repetitions); the first repetition's fold
    # of each batch (as the report lists it) is refitted with the public API and the
    # margins recomputed with scipy from the held-out labels
    batches = _batches("wine", 8)
    sel = MetricSelector(alphas=ALPHAS, random_state=0).fit(batches)
    assert sel.report_["cv"] == "k-fold"
    folds = [f for f in sel.report_["folds"] if f["repeat"] == 0]
    held_by = {b: set(f["held_out"]) for f in folds for b in f["held_out"]}
    assert sorted(sel.heldout_groupings_) == list(range(8))
    for b, g in sel.heldout_groupings_.items():
        X, y = batches[b]
        Z = _map_without(batches, held_by[b], sel.report_).transform(X)
        own, margins = _given_labels(Z, g.labels)
        assert_allclose(g.distances, own, rtol=1e-7, atol=1e-9)
        assert_allclose(g.margins, margins, rtol=1e-7, atol=1e-9)
        # k-means at the true k ended where it stands: every record is nearest its own
        # group's mean
        assert (margins >= -1e-9).all() and g.k == len(np.unique(y))
        assert adjusted_rand_score(y, g.labels) > 0.5  # the grouping found the classes


def test_a_budget_keeps_the_scored_sample_and_statistics_only_batches_none() -> None:
    batches = _batches("wine", 12, seed=2)
    sel = MetricSelector(alphas=ALPHAS, random_state=0, heldout_tolerance=1.0,
                         min_heldout_batches=4, max_heldout_batches=6,
                         max_heldout_records=20).fit(batches)
    budget = sel.report_["heldout_budget"]
    assert budget["applied"] and budget["scored_batches"] < 12
    assert sorted(sel.heldout_groupings_) == budget["sample"]
    for b, g in sel.heldout_groupings_.items():  # at most 20 records + one a group
        assert len(g.margins) <= 20 + len(np.unique(batches[b][1]))
    # statistics-only batches are never held out: only the raw batches appear
    raw, rest = batches[:3], batches[3:]
    mixed = MetricSelector(alphas=ALPHAS, random_state=0).fit(
        raw, stats_only=[BatchStats.from_batch(X, y) for X, y in rest])
    assert sorted(mixed.heldout_groupings_) == [0, 1, 2]
    assert sum(len(g.margins) for g in mixed.heldout_groupings_.values()) == sum(
        len(X) for X, _ in raw)
    # without a budget, at most max_heldout_batches, evenly spread
    capped = MetricSelector(alphas=ALPHAS, random_state=0, heldout_tolerance=None,
                            min_heldout_batches=2, max_heldout_batches=4).fit(batches)
    assert sorted(capped.heldout_groupings_) == [0, 4, 7, 11]


def test_the_reference_counts_held_out_margins_in_the_version_bins() -> None:
    batches = _batches("wine", 5)
    sel = MetricSelector(alphas=ALPHAS, random_state=0).fit(batches)
    m = sel.metric_
    seen = [(X, group_records(m, X, len(np.unique(y)))) for X, y in batches]
    held = list(sel.heldout_groupings_.values())
    ref = build_reference(m, seen, held)
    assert ref.heldout is not None and ref.heldout.batches == 5
    margins = np.concatenate([g.margins for g in held])
    assert_allclose(ref.heldout.margins, ref.layouts.margins.count(margins))
    assert ref.heldout.distances.sum() == ref.heldout.margins.sum() == len(margins)
    back = Reference.from_dict(ref.to_dict())
    assert_allclose(back.heldout.margins, ref.heldout.margins)
    # live records from the training pool: margins scored against the held-out counts
    X = np.vstack([Xb for Xb, _ in batches])
    live = empty_summary(m.n_features, ref.layouts)
    for Xb, yb in batches:
        live = live.merge(summarise(m, Xb, group_records(m, Xb, len(np.unique(yb))),
                                    ref.layouts))
    names = [f"x{j}" for j in range(X.shape[1])]
    out = compare(back, live, names)
    assert out["margins"]["reference"] == out["distances"]["reference"] == "held_out"
    assert out["verdict"] == "steady"
    # an old-format reference (no held-out counts) still gives a verdict, in sample;
    # these live records are the training batches themselves: no margin drift at all
    old = ref.to_dict()
    del old["heldout"]
    legacy = compare(Reference.from_dict(old), live, names)
    assert legacy["margins"]["reference"] == "in_sample"
    assert legacy["verdict"] == "steady" and legacy["margins"]["psi"] == pytest.approx(0.0)
    assert legacy["features"] == out["features"]
