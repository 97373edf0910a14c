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

# (data set, required margin over the better Euclidean baseline in ARI, group sizes).
# Group sizes are chosen so that the fitting batches of the larger sets do not reuse
# records: reused records leak between cross-validation folds and flatter the low-α
# fits. Wine and iris are too small for that; reuse there is within the fitting pool
# only, never across the two pools.
CASES = [
    ("digits", 0.1, (8, 40)),
    ("breast_cancer", 0.1, (6, 24)),
    ("wine", 0.0, (6, 20)),
    ("iris", 0.0, (6, 20)),
    ("penguins", 0.0, (6, 20)),
]
N_FIT, N_SCORE = 12, 24
# One draw. Seed sweep 0–5 when this was written: every set passed on every seed
# except digits on seed 1 (margin 0.06). Seed 2026 draws a breast cancer scoring pool
# where even scikit-learn's LDA *classifier*, trained on the fitting pool, reaches
# only ARI 0.66 — the 0.1 margin over Euclidean (0.56) is out of reach there.
SEED = 0


def _kmeans_ari(X: np.ndarray, y: np.ndarray) -> float:
    k = len(np.unique(y))
    return adjusted_rand_score(y, KMeans(k, n_init=10, random_state=0).fit_predict(X))


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore::service.core.errors.ZeroSpreadWarning")
@pytest.mark.parametrize(("name", "margin", "sizes"), CASES, ids=[c[0] for c in CASES])
def test_learned_metric_beats_euclidean_kmeans_on_held_out_batches(
    name: str, margin: float, sizes: tuple[int, int]
) -> None:
    X, y = load_open(name)
    rng = np.random.default_rng(SEED)
    (X_fit, y_fit), (X_score, y_score) = split_pool(X, y, rng, test_fraction=0.4)
    fit_batches = make_batches(X_fit, y_fit, N_FIT, rng, group_size=sizes)
    score_batches = make_batches(X_score, y_score, N_SCORE, rng, group_size=sizes)

    selector = MetricSelector(method="auto", random_state=0, estimate_k=False)
    metric = selector.fit(fit_batches).metric_
    # the held-out budget leaves the choice alone here: 12 batches are below its floor,
    # so every one is scored, as unbudgeted (tests/core/test_budget.py compares budgeted
    # and unbudgeted picks where the budget samples)
    budget = selector.report_["heldout_budget"]
    assert budget["applied"] is False and budget["scored_batches"] == N_FIT

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
