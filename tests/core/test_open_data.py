"""Held-out quality on open data: the learned metric against Euclidean k-means.

Data (bundled with scikit-learn unless noted): UCI optical handwritten digits
(Alpaydin & Kaynak), wine (UCI, Forina et al.), breast cancer Wisconsin diagnostic
(Wolberg et al.), iris (Fisher 1936), and the ``palmerpenguins`` package (Gorman,
Williams & Fraser 2014; rows with a missing value dropped, numeric columns).
Score: adjusted Rand index (Hubert & Arabie 1985), scikit-learn's implementation.

Batches of 2–5 classes with unequal group sizes are drawn from a fitting pool; the
metric is selected (method "auto") and fitted on them only, then judged on batches
from a disjoint pool of records, grouped at their true k. The baselines are
scikit-learn ``KMeans`` on the raw records and on each batch standardised on its own.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.cluster import KMeans
from sklearn.metrics import adjusted_rand_score

from service.core import MetricSelector, group_records
from tests.datasets import load_open, make_batches, split_pool

# (data set, required margin over the better Euclidean baseline, in ARI)
CASES = [("digits", 0.1), ("breast_cancer", 0.1), ("wine", 0.0), ("iris", 0.0), ("penguins", 0.0)]
N_FIT, N_SCORE = 12, 12


def _kmeans_ari(X: np.ndarray, y: np.ndarray) -> float:
    k = len(np.unique(y))
    return adjusted_rand_score(y, KMeans(k, n_init=10, random_state=0).fit_predict(X))


@pytest.mark.slow
@pytest.mark.parametrize(("name", "margin"), CASES, ids=[c[0] for c in CASES])
def test_learned_metric_beats_euclidean_kmeans_on_held_out_batches(
    name: str, margin: float
) -> None:
    X, y = load_open(name)
    rng = np.random.default_rng(2026)
    (X_fit, y_fit), (X_score, y_score) = split_pool(X, y, rng)
    fit_batches = make_batches(X_fit, y_fit, N_FIT, rng)
    score_batches = make_batches(X_score, y_score, N_SCORE, rng)

    selector = MetricSelector(method="auto", random_state=0, estimate_k=False)
    metric = selector.fit(fit_batches).metric_

    learned, raw, standardised = [], [], []
    for Xb, yb in score_batches:
        k = len(np.unique(yb))
        learned.append(adjusted_rand_score(yb, group_records(metric, Xb, k).labels))
        raw.append(_kmeans_ari(Xb, yb))
        spread = Xb.std(axis=0)
        standardised.append(_kmeans_ari((Xb - Xb.mean(0)) / np.where(spread > 0, spread, 1), yb))
    best_baseline = max(np.mean(raw), np.mean(standardised))
    assert selector.report_["beats_baseline"] is True
    assert np.mean(learned) > best_baseline + margin, (
        f"{name}: learned {np.mean(learned):.3f}, raw {np.mean(raw):.3f}, "
        f"standardised {np.mean(standardised):.3f}"
    )
