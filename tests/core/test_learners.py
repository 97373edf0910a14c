"""Learners from summed statistics, checked against outside facts.

* Regression ↔ LDA: on centred data the column space of the least-squares
  regression of the (normalised) assignment on the records is the Fisher
  discriminant subspace — Hastie, Tibshirani & Friedman, *The Elements of
  Statistical Learning*, 2nd ed., §4.3 and Ex. 4.3; Hastie, Buja & Tibshirani (1995),
  "Penalized discriminant analysis", Ann. Statist. Reference implementation:
  scikit-learn ``LinearDiscriminantAnalysis(solver="eigen")``.
* k = 2: the map is rank one along Fisher's direction (G + λI)⁻¹(μ₁ − μ₂)
  (ESL Ex. 4.2).
* Exact recovery with n − 1 ≤ d generic records (a fact of the method, METHOD.md).
Data: scikit-learn's bundled wine (UCI, Forina et al.) and optical digits (UCI,
Alpaydin & Kaynak). ARI: Hubert & Arabie (1985), via scikit-learn.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.linalg import subspace_angles
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.metrics import adjusted_rand_score

from service.core import (
    METHODS,
    BatchStats,
    CoreError,
    ZeroSpreadWarning,
    fit_metric,
    group_records,
)
from tests.datasets import load_open


def _raw_row_space(metric) -> np.ndarray:
    """Directions of the map in raw feature units (d × r): z = L D⁻¹ (x − mean)."""
    return (metric.components / metric.scales).T


@pytest.mark.parametrize("name", ["wine", "digits"])
@pytest.mark.parametrize("method", ["closed_form", "discriminant"])
def test_subspace_equals_the_lda_subspace(name: str, method: str) -> None:
    X, y = load_open(name)
    # digits has pixels that are 0 in every image: LDA's within-class scatter is
    # singular there, so scikit-learn gets only the pixels that vary; our learner keeps
    # them (zero-spread warning) and must give them no weight.
    varying = X.std(axis=0) > 0
    k = len(np.unique(y))
    lda = LinearDiscriminantAnalysis(solver="eigen").fit(X[:, varying], y)
    reference = np.zeros((X.shape[1], k - 1))
    reference[varying] = lda.scalings_[:, : k - 1]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ZeroSpreadWarning)
        metric = fit_metric(BatchStats.from_batch(X, y), method, alpha=1e-10)
    assert metric.rank == k - 1
    angles = subspace_angles(_raw_row_space(metric), reference)
    assert np.degrees(angles).max() < 1e-4  # ~0: tolerance for rounding only
    assert_allclose(metric.components[:, ~varying], 0.0, atol=1e-12)


@pytest.mark.parametrize("alpha", [1e-6, 0.1, 3.0])
def test_two_groups_give_rank_one_along_fishers_direction(alpha: float) -> None:
    X, y = load_open("wine")
    X, y = X[y < 2], y[y < 2]
    stats = BatchStats.from_batch(X, y)
    metric = fit_metric(stats, "closed_form", alpha=alpha)
    assert metric.rank == 1
    # Fisher's direction in standardised units: (G + λI)⁻¹ (μ₁ − μ₂), ESL Ex. 4.2
    Z = X / metric.scales
    G = stats.G / np.outer(metric.scales, metric.scales)
    lam = alpha * np.trace(G) / X.shape[1]
    w = np.linalg.solve(G + lam * np.eye(X.shape[1]), Z[y == 0].mean(0) - Z[y == 1].mean(0))
    cos = abs(metric.components[0] @ w) / (np.linalg.norm(metric.components[0]) * np.linalg.norm(w))
    assert cos == pytest.approx(1.0, abs=1e-9)


def test_exact_recovery_when_records_are_linearly_independent() -> None:
    # A fact of the method (METHOD.md): with n − 1 ≤ d generic records the centred
    # records are linearly independent, the regression fits the normalised assignment
    # exactly as α → 0, every group maps to a single point, and k-means finds the
    # expert grouping exactly.
    rng = np.random.default_rng(7)
    n, d, k = 16, 20, 4
    X = rng.normal(size=(n, d))
    y = rng.permutation(np.arange(n) % k)
    metric = fit_metric(BatchStats.from_batch(X, y), "closed_form", alpha=1e-10)
    assert metric.rank == k - 1
    grouping = group_records(metric, X, k, random_state=0)
    assert adjusted_rand_score(y, grouping.labels) == 1.0
    # and the groups really collapse: within-group spread is rounding noise
    Z = metric.transform(X)
    for g in range(k):
        assert np.ptp(Z[y == g], axis=0).max() < 1e-6 * np.ptp(Z, axis=0).max()


def test_zero_spread_feature_warns_and_gets_scale_one() -> None:
    rng = np.random.default_rng(3)
    X = rng.normal(size=(30, 3))
    X[:, 1] = 5.0  # constant within the batch
    y = np.arange(30) % 3
    with pytest.warns(ZeroSpreadWarning, match="no spread"):
        metric = fit_metric(BatchStats.from_batch(X, y), "closed_form", alpha=0.01)
    assert metric.scales[1] == 1.0
    assert metric.info["zero_spread_features"] == [1]
    assert any("no spread" in w for w in metric.info["warnings"])
    assert_allclose(metric.components[:, 1], 0.0, atol=1e-12)


def test_no_feature_with_spread_is_an_error() -> None:
    X = np.tile([[1.0, 2.0]], (6, 1))
    with pytest.raises(CoreError) as info:
        fit_metric(BatchStats.from_batch(X, [0, 0, 0, 1, 1, 1]))
    assert info.value.field == "records"


def test_euclidean_is_the_identity_on_standardised_features() -> None:
    X, y = load_open("wine")
    stats = BatchStats.from_batch(X, y)
    metric = fit_metric(stats, "euclidean")
    assert_allclose(metric.components, np.eye(X.shape[1]))
    assert metric.rank == X.shape[1]
    assert_allclose(metric.scales, X.std(axis=0))  # one batch: its own spread
    assert_allclose(metric.transform(X), (X - X.mean(0)) / X.std(0), atol=1e-12)


def test_rank_is_bounded_by_the_groups_and_by_max_rank() -> None:
    rng = np.random.default_rng(4)
    parts = []
    for k in (2, 3, 2):  # Σ (k_b − 1) = 4
        X = rng.normal(size=(40, 12))
        parts.append(BatchStats.from_batch(X, np.arange(40) % k))
    stats = BatchStats.sum(parts)
    for method in ("closed_form", "discriminant"):
        assert fit_metric(stats, method, alpha=0.01).rank == 4
        assert fit_metric(stats, method, alpha=0.01, max_rank=2).rank == 2


def test_diagonal_weights_follow_each_features_separation() -> None:
    rng = np.random.default_rng(5)
    y = np.arange(200) % 2
    X = rng.normal(size=(200, 3))
    X[:, 0] += 4.0 * y  # strong signal
    X[:, 1] += 1.0 * y  # weak signal
    metric = fit_metric(BatchStats.from_batch(X, y), "diagonal", alpha=0.01)
    w = np.asarray(metric.info["weights"])
    assert w[0] > w[1] > w[2] >= 0.0
    M = metric.matrix
    assert_allclose(M, np.diag(np.diag(M)))  # per-feature weights only


@pytest.mark.parametrize("method", METHODS)
def test_fitted_metric_is_plain_json_safe_data_of_unit_scale(method: str) -> None:
    X, y = load_open("iris")
    stats = BatchStats.from_batch(X, y)
    metric = fit_metric(stats, method, alpha=0.01)
    json.dumps(metric.to_dict(), allow_nan=False)
    # mapped records: unit pooled within-batch variance per component, on average
    Z = metric.transform(X)
    assert np.sum(Z.var(axis=0)) / metric.rank == pytest.approx(1.0, rel=1e-9)


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"method": "nearest"}, "method"),
        ({"alpha": 0.0}, "alpha"),
        ({"alpha": float("nan")}, "alpha"),
        ({"max_rank": 0}, "max_rank"),
    ],
)
def test_invalid_parameters_raise_domain_errors(kwargs, field) -> None:
    stats = BatchStats.from_batch([[0.0, 1.0], [1.0, 0.0], [2.0, 2.0]], [0, 1, 1])
    with pytest.raises(CoreError) as info:
        fit_metric(stats, **kwargs)
    assert info.value.field == field
