"""Choosing k when the caller omits it.

Outside data: synthetic Gaussian blobs (scikit-learn ``make_blobs``) with a known
number of groups, and scikit-learn's bundled UCI optical digits (Alpaydin & Kaynak)
as labelled batches of 2–5 classes. Accuracy floors are rules of thumb (common
practice, no source), set well above chance and above the best constant guess.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from sklearn.datasets import make_blobs

from service.core import CoreError, FittedMetric, MetricSelector, group_records
from service.core.kchoice import (
    RULES,
    _fit_params,
    choose_k,
    evidence_from_maps,
    rule_from_evidence,
)
from service.core.validation import check_batch
from tests.datasets import load_open, make_batches, split_pool


def blob_batch(seed: int, d: int = 5) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    k = int(rng.integers(2, 7))
    X, y = make_blobs(
        n_samples=int(rng.integers(80, 300)), centers=k, n_features=d, cluster_std=1.0,
        center_box=(-15, 15), random_state=seed,
    )
    return X, y


def identity_metric(d: int) -> FittedMetric:
    return FittedMetric("euclidean", 0.0, np.ones(d), np.zeros(d), np.eye(d))


def selected(batches, method: str, alpha: float | None = None, k_max: int = 10
             ) -> tuple[FittedMetric, dict]:
    """The path the service takes: the selector fits the metric and calibrates its k
    rule on the batches seen through their out-of-fold maps."""
    sel = MetricSelector(method=method, alphas=[alpha] if alpha else None, k_max=k_max,
                         random_state=0).fit(batches)
    return sel.metric_, sel.metric_.k_rule


def in_sample_evidence(batches, k_max: int = 10):
    """Curves of the batches under the identity map (no learned metric involved)."""
    data = [check_batch(X, y, 5) for X, y in batches]
    return evidence_from_maps([identity_metric(5)] * len(data), data, k_max, 0, "in_sample")


@pytest.fixture(scope="module")
def blob_fit() -> tuple[FittedMetric, dict]:
    return selected([blob_batch(s) for s in range(8)], "euclidean")


@pytest.fixture(scope="module")
def blob_rule(blob_fit) -> dict:
    return blob_fit[1]


def test_blobs_known_k_is_found_held_out(blob_fit) -> None:
    metric = blob_fit[0]
    held_out = [blob_batch(s) for s in range(100, 130)]
    hits = []
    for X, y in held_out:
        g = group_records(metric, X)  # k omitted: the calibrated rule chooses
        assert g.k_chosen and 2 <= g.k <= 10
        hits.append(g.k == len(np.unique(y)))
    assert np.mean(hits) >= 0.9  # well-separated blobs: rule of thumb, no source


def test_rule_is_json_safe_and_complete(blob_rule: dict) -> None:
    text = json.dumps(blob_rule, allow_nan=False)  # strict JSON: no NaN or infinity
    assert json.loads(text) == blob_rule
    assert blob_rule["rule"] in RULES and blob_rule["k_max"] == 10
    assert blob_rule["n_batches"] == 8 and blob_rule["mapping"] == "out_of_fold"
    rates = {name: c["held_out_hit_rate"] for name, c in blob_rule["candidates"].items()}
    assert set(rates) == set(RULES)
    assert blob_rule["held_out_hit_rate"] == max(rates.values())
    # the rule survives the metric's own serialisation
    metric = FittedMetric.from_dict(
        json.loads(json.dumps(identity_metric(5).with_k_rule(blob_rule).to_dict()))
    )
    assert metric.k_rule == blob_rule


@pytest.mark.slow
def test_open_data_digits_k_accuracy() -> None:
    X, y = load_open("digits")
    rng = np.random.default_rng(0)
    (Xf, yf), (Xs, ys) = split_pool(X, y, rng)
    train = make_batches(Xf, yf, 12, rng)
    held_out = make_batches(Xs, ys, 30, rng)  # disjoint record pool
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # digits has blank pixels (zero spread)
        metric, rule = selected(train, "closed_form", alpha=1e-2)
    truth = np.array([len(np.unique(b)) for _, b in held_out])
    k_hat = np.array([choose_k(metric.transform(a), rule) for a, _ in held_out])
    accuracy = float(np.mean(k_hat == truth))
    train_ks = np.array([len(np.unique(b)) for _, b in train])
    constant_guess = float(np.mean(truth == np.bincount(train_ks).argmax()))
    assert accuracy >= 0.5  # chance over k = 2..10 is 1/9: rule of thumb, no source
    assert accuracy > constant_guess + 0.2


def test_threshold_hits_the_most_batches() -> None:
    # spread curves (index 0 ↔ k = 1) of three batches with 2, 3 and 3 groups:
    # a batch is hit when stat[k_true] ≤ τ < stat[k] for 2 ≤ k < k_true
    def curves(values):
        return {"inertia": np.asarray(values, dtype=float), "n": np.asarray(1.0)}

    batches = [curves([9, 1, 0.5]), curves([9, 4, 2, 1.5]), curves([9, 5, 1.8, 1.0])]
    params = _fit_params("spread", batches, [2, 3, 3])
    # intervals [1, ∞), [2, 4) and [1.8, 5): all three cover [2, 4)
    assert params["training_hits"] == 3
    assert 2.0 <= params["threshold"] < 4.0
    assert params["threshold"] == pytest.approx(np.sqrt(8.0))  # middle on a log scale


def test_choose_k_bounds() -> None:
    rule = {"rule": "silhouette", "params": {}, "k_max": 6}
    two = np.array([[0.0], [1.0]])
    assert choose_k(two, rule) == 2  # capped by the records
    assert choose_k(np.zeros((5, 2)), rule) == 1  # a single distinct point
    rng = np.random.default_rng(0)
    four = np.concatenate([rng.normal(c, 0.05, size=(30, 2)) for c in (0, 3, 6, 9)])
    assert choose_k(four, rule) == 4
    assert choose_k(four, None) == 4  # default: silhouette, k_max 10
    assert choose_k(four, {"rule": "spread", "params": {"threshold": None}, "k_max": 6}) == 4


def test_curves_ignore_a_large_common_offset() -> None:
    # k-means is translation invariant, so are its curves; mapped records of a batch
    # far from the pooled mean sit at a large offset in the learned space
    from service.core.kcurves import curves

    rng = np.random.default_rng(0)
    Z = rng.normal(size=(60, 2)) * 0.3
    Z[:, 0] += 4.0 * (np.arange(60) % 3)
    near, far = curves(Z, 6), curves(Z + 1e9, 6)
    np.testing.assert_allclose(far["inertia"], near["inertia"], rtol=1e-6)
    np.testing.assert_allclose(far["silhouette"][1:], near["silhouette"][1:], rtol=1e-6)


@pytest.mark.parametrize(
    "rule",
    [{"rule": "guess"}, {"rule": "silhouette", "k_max": 1}, {"rule": "spread", "k_max": 2.5}],
)
def test_invalid_rule(rule: dict) -> None:
    with pytest.raises(CoreError):
        choose_k(np.eye(3), rule)


def test_hit_rates_are_those_of_the_rules_on_the_curves() -> None:
    # for a rule without parameters, the held-out hit rate is the share of batches
    # whose curves it reads as their expert k (calibration changes nothing for it)
    batches = [blob_batch(s) for s in range(6)]
    ev = in_sample_evidence(batches)
    rule = rule_from_evidence(ev)
    truths = np.array([len(np.unique(y)) for _, y in batches])
    assert ev.truths == truths.tolist()
    for name in ("silhouette", "calinski_harabasz"):
        expected = float(np.mean(np.array(ev.fixed[name]) == truths))
        assert rule["candidates"][name]["held_out_hit_rate"] == pytest.approx(expected)
        # and choose_k reads the same k from the records themselves
        picks = [choose_k(X, {"rule": name, "params": {}, "k_max": 10}) for X, _ in batches]
        assert picks == ev.fixed[name]


def test_single_batch_calibrates_in_sample_without_thresholds() -> None:
    rule = rule_from_evidence(in_sample_evidence([blob_batch(1)], k_max=8))
    assert rule["mapping"] == "in_sample"
    assert set(rule["candidates"]) == {"silhouette", "calinski_harabasz"}
    json.dumps(rule, allow_nan=False)


def test_invalid_k_max_is_rejected() -> None:
    with pytest.raises(CoreError):
        in_sample_evidence([blob_batch(1)], k_max=1)
    with pytest.raises(CoreError) as info:
        MetricSelector(k_max=1).fit([blob_batch(1), blob_batch(2)])
    assert info.value.field == "k_max"


def test_curves_building_blocks_match_scipy_and_sklearn() -> None:
    # references: scipy's cut_tree for cutting a Ward tree, scikit-learn's
    # silhouette_score for the silhouette
    from scipy.cluster.hierarchy import cut_tree, linkage
    from scipy.spatial.distance import pdist, squareform
    from sklearn.metrics import adjusted_rand_score, silhouette_score

    from service.core.kcurves import _cut, _silhouette, curves

    rng = np.random.default_rng(4)
    for n in (5, 17, 60):
        Z = rng.normal(size=(n, 3))
        merges = linkage(Z, method="ward")
        dist = squareform(pdist(Z))
        for k in range(2, min(n - 1, 8)):
            labels = _cut(merges, n, k)
            assert adjusted_rand_score(labels, cut_tree(merges, n_clusters=k)[:, 0]) == 1.0
            assert _silhouette(dist, labels, k) == pytest.approx(silhouette_score(Z, labels))
    c = curves(rng.normal(size=(40, 2)), k_max=6)
    assert c["inertia"].shape == (6,) and float(c["n"]) == 40
    assert np.all(np.diff(c["inertia"]) < 0)  # more groups, less within-group spread
    assert np.isnan(c["silhouette"][0]) and np.isfinite(c["silhouette"][1:]).all()
    # large inputs are subsampled, reproducibly
    big = rng.normal(size=(5000, 2))
    a, b = curves(big, 4, random_state=1), curves(big, 4, random_state=1)
    assert float(a["n"]) == 1000
    np.testing.assert_array_equal(a["inertia"], b["inertia"])


def test_held_out_hit_rate_recalibrates_without_each_fold(monkeypatch) -> None:
    from service.core import kchoice

    ev = in_sample_evidence([blob_batch(s) for s in range(10)])
    seen: list[set[int]] = []
    real = kchoice.rule_from_evidence

    def spy(sub):
        seen.append({id(c) for c in sub.curves})
        return real(sub)

    monkeypatch.setattr(kchoice, "rule_from_evidence", spy)
    hits = kchoice.held_out_k_hits(ev, n_folds=5)
    assert len(hits) == 10 and len(seen) == 5
    for fold, train in enumerate(seen):
        # the batches judged in this fold were not among those the rule came from
        judged = {id(ev.curves[i]) for i in range(2 * fold, 2 * fold + 2)}
        assert not judged & train and len(train) == 8
    assert np.mean(hits) >= 0.9  # separated blobs: rule of thumb, no source
    # a single batch leaves nothing to calibrate on held out
    assert kchoice.held_out_k_hits(ev.subset([0])) == []


def test_calinski_harabasz_is_infinite_once_every_distinct_point_has_its_group() -> None:
    # three distinct points repeated: from k = 3 on the within-group spread is zero up
    # to rounding; the ratio must read as infinite there, not as rounding noise, so
    # its rule picks k = 3 (the smallest such k), as the exact arithmetic would
    from service.core.kcurves import curves

    points = np.array([[0.0, 0.0], [5.0, 1.0], [1.0, 7.0]])
    Z = np.repeat(points, [10, 7, 13], axis=0) + 1e3  # an offset for rounding to act on
    c = curves(Z, k_max=6)
    assert np.isfinite(c["calinski_harabasz"][1]) and np.all(np.isinf(c["calinski_harabasz"][2:]))
    rule = {"rule": "calinski_harabasz", "params": {}, "k_max": 6}
    assert choose_k(Z, rule) == 3
