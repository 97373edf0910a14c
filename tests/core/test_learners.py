"""Learners from summed statistics, checked against outside facts.

* Regression ↔ LDA: on centred data the column space of the least-squares
  regression of the (normalised) assignment on the records is the Fisher
  discriminant subspace — Hastie, Tibshirani & Friedman, *The Elements of
  Statistical Learning*, 2nd ed., §4.3 and Ex. 4.3; Hastie, Buja & Tibshirani (1995),
  "Penalized discriminant analysis", Ann. Statist. Reference implementation:
  scikit-learn ``LinearDiscriminantAnalysis(solver="eigen")``.
* k = 2: the map is rank one along Fisher's direction (G + λI)⁻¹(μ₁ − μ₂)
  (ESL Ex. 4.2); as λ → 0, scikit-learn's LDA direction on breast cancer Wisconsin
  diagnostic (UCI, Wolberg et al.).
* Exact recovery with n − 1 ≤ d generic records (a fact of the method, docs/method.md).
Data: scikit-learn's bundled wine (UCI, Forina et al.) and optical digits (UCI,
Alpaydin & Kaynak). ARI: Hubert & Arabie (1985), via scikit-learn.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import scipy.linalg
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
    # Source: ESL §4.3 and Ex. 4.3; Hastie, Buja & Tibshirani (1995). Reference
    # implementation: scikit-learn LinearDiscriminantAnalysis(solver="eigen").
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


@pytest.mark.parametrize("alpha", [1e-3, 0.5])
def test_closed_form_and_discriminant_weigh_the_same_directions_differently(
    alpha: float,
) -> None:
    # Derivation (ours): with W = G − H + λI and the generalised eigenpairs
    # H V = W V diag(μ), VᵀWV = I, we have G + λI = W + H, so
    #   (G + λI)⁻¹ H (G + λI)⁻¹ = V diag(μ / (1 + μ)²) Vᵀ        (closed form)
    # and the discriminant learner's weights ρ = sqrt(μ / (1 + μ)) give
    #   V diag(μ / (1 + μ)) Vᵀ.                                   (discriminant)
    # Reference eigensolver: scipy.linalg.eigh(H, W). (The closed form's weight
    # ρ·sqrt(1 − ρ²) is the optimal-scoring ↔ LDA factor of ESL §12.5 — from memory.)
    # Both maps are rescaled by _normalise, so compare up to one positive factor.
    X, y = load_open("wine")
    stats = BatchStats.from_batch(X, y)
    closed = fit_metric(stats, "closed_form", alpha=alpha)
    discr = fit_metric(stats, "discriminant", alpha=alpha)
    s = closed.scales
    G, H = stats.G / np.outer(s, s), stats.H / np.outer(s, s)
    lam = alpha * np.trace(G) / G.shape[0]
    mu, V = scipy.linalg.eigh(H, G - H + lam * np.eye(G.shape[0]))
    mu, V = mu[-2:], V[:, -2:]  # three groups: two non-zero eigenvalues
    for metric, weights in ((closed, mu / (1 + mu) ** 2), (discr, mu / (1 + mu))):
        ref = V @ np.diag(weights) @ V.T
        factor = np.sum(metric.matrix * ref) / np.sum(ref * ref)
        assert factor > 0
        assert_allclose(metric.matrix, factor * ref, atol=1e-10 * np.abs(ref * factor).max())


def test_two_groups_match_scikit_learns_fisher_direction() -> None:
    # As λ → 0 the rank-1 map must be LDA's single discriminant direction S_W⁻¹(μ₁ − μ₂)
    # (ESL Ex. 4.2), computed independently by scikit-learn's LDA (eigen solver).
    X, y = load_open("breast_cancer")
    metric = fit_metric(BatchStats.from_batch(X, y), "closed_form", alpha=1e-10)
    assert metric.rank == 1
    lda = LinearDiscriminantAnalysis(solver="eigen").fit(X, y)
    angle = subspace_angles(_raw_row_space(metric), lda.scalings_[:, :1])
    assert np.degrees(angle).max() < 1e-4  # ~0: tolerance for rounding only


def test_exact_recovery_when_records_are_linearly_independent() -> None:
    # A fact of the method (docs/method.md): with n − 1 ≤ d generic records the centred
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


def test_real_spread_on_a_huge_offset_is_kept() -> None:
    # spread ~1 on values ~1e12 (ulp 1.2e-4) is real variation, not rounding: the fit
    # must match the fit of the unshifted records (translation invariance, docs/method.md)
    X, y = load_open("iris")
    plain = fit_metric(BatchStats.from_batch(X, y), "closed_form", alpha=0.01)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ZeroSpreadWarning)
        shifted = fit_metric(BatchStats.from_batch(X + 1e12, y), "closed_form", alpha=0.01)
    assert shifted.info["zero_spread_features"] == []
    # tolerances: storing iris + 1e12 already rounds each value by up to ~1e-4
    assert_allclose(shifted.scales, plain.scales, rtol=1e-3)
    assert_allclose(shifted.matrix, plain.matrix, rtol=1e-2, atol=1e-2 * np.abs(plain.matrix).max())


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
    # and by d when the batches hold more groups than features: Σ (k_b − 1) = 6 > d = 3
    few = BatchStats.sum(
        BatchStats.from_batch(rng.normal(size=(40, 3)), np.arange(40) % 4) for _ in range(2)
    )
    for method in ("closed_form", "discriminant"):
        assert fit_metric(few, method, alpha=0.01).rank == 3


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


def test_a_method_without_a_learner_fails_loudly():
    """An unknown name must never fall through to another learner (own check, no source)."""
    from sklearn.datasets import load_iris

    from service.core.learners import Prepared, fit_prepared

    X, y = load_iris(return_X_y=True)
    with pytest.raises(CoreError) as err:
        fit_prepared(Prepared(BatchStats.from_batch(X, y)), "nearest_shrunken", 1e-3)
    assert err.value.field == "method"


def test_scoring_map_gives_the_same_distances_as_the_fitted_map() -> None:
    # cross-validation groups with learners.scoring_map (no per-α SVD): its M = LᵀL
    # must equal the fitted closed form's up to an overall factor and the eigenvalues
    # below rel_tol (1e-8) of the largest, so k-means sees the same distances
    # (outside data: digits batches, tests/datasets.py)
    from service.core._stacked import kmeans_stacked
    from service.core.learners import Prepared, fit_prepared, scoring_map
    from tests.datasets import make_batches

    X, y = load_open("digits")
    rng = np.random.default_rng(3)
    batches = make_batches(X, y, 12, rng)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ZeroSpreadWarning)  # blank pixels
        prep = Prepared(BatchStats.sum(BatchStats.from_batch(a, b) for a, b in batches))
    held, truth = make_batches(X, y, 1, rng)[0]
    for alpha in (1e-4, 1e-2, 1.0, 10.0):
        fast, full = scoring_map(prep, "closed_form", alpha), fit_prepared(
            prep, "closed_form", alpha
        )
        M_fast, M_full = fast.matrix / np.trace(fast.matrix), full.matrix / np.trace(full.matrix)
        assert_allclose(M_fast, M_full, atol=1e-7 * np.abs(M_full).max())
        Zs = [m.transform(held) for m in (fast, full)]
        r = max(Z.shape[1] for Z in Zs)
        stack = np.zeros((2, len(truth), r))
        for q, Z in enumerate(Zs):
            stack[q, :, : Z.shape[1]] = Z / np.sqrt(np.trace(Z.T @ Z))  # one scale
        labels, _ = kmeans_stacked(stack, len(np.unique(truth)), 2, seed=0)
        assert adjusted_rand_score(labels[0], labels[1]) == 1.0
    # any other learner, or a rank cap, is simply the fitted map
    assert scoring_map(prep, "discriminant", 0.1).rank == fit_prepared(
        prep, "discriminant", 0.1
    ).rank
    capped = scoring_map(prep, "closed_form", 0.1, max_rank=3)
    assert capped.rank == 3
