"""Agreement scores against scikit-learn's implementations (the reference):
``adjusted_rand_score`` (Hubert & Arabie 1985), ``rand_score`` (Rand 1971),
``normalized_mutual_info_score`` (arithmetic mean; Vinh, Epps & Bailey 2010)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import adjusted_rand_score, normalized_mutual_info_score, rand_score

from service.core.scores import agreement, agreement_many


def _reference(truth, pred) -> dict[str, float]:
    return {
        "ari": adjusted_rand_score(truth, pred),
        "nmi": normalized_mutual_info_score(truth, pred),
        "rand": rand_score(truth, pred),
    }


def test_random_labellings_match_scikit_learn() -> None:
    rng = np.random.default_rng(0)
    for _ in range(300):
        n = int(rng.integers(1, 120))
        truth = rng.integers(0, int(rng.integers(1, 7)), size=n)
        # half of the time a noisy copy of the truth, so high scores are covered too
        pred = truth.copy() if rng.random() < 0.5 else rng.integers(0, 6, size=n)
        flip = rng.random(n) < 0.2
        pred[flip] = rng.integers(0, 6, size=int(flip.sum()))
        got, ref = agreement(truth, pred), _reference(truth, pred)
        for key in ref:
            assert got[key] == pytest.approx(ref[key], abs=1e-12), (key, truth, pred)


@pytest.mark.parametrize(
    ("truth", "pred"),
    [
        ([0, 0, 0], [0, 0, 0]),  # both one group
        ([0, 0, 1, 1], [5, 5, 7, 7]),  # same partition, other names
        ([0, 1, 2, 3], [0, 0, 0, 0]),  # singletons against one group
        ([0, 1, 2, 3], [3, 2, 1, 0]),  # singletons both
        ([0], [0]),
        (["b", "a", "a"], ["x", "y", "y"]),  # labels of any kind
    ],
)
def test_edge_cases_match_scikit_learn(truth, pred) -> None:
    got, ref = agreement(truth, pred), _reference(truth, pred)
    for key in ref:
        assert got[key] == pytest.approx(ref[key], abs=1e-12), key


def test_lengths_must_match() -> None:
    with pytest.raises(ValueError, match="expert labels"):
        agreement([0, 1, 1], [0, 1])


def test_many_rows_at_once_equal_one_at_a_time() -> None:
    # each row against scikit-learn too (reference), including one-group rows
    rng = np.random.default_rng(2)
    for n in (1, 2, 7, 90):
        truth = rng.integers(0, 3, size=n)
        preds = rng.integers(0, 4, size=(6, n))
        preds[0] = 0
        preds[1] = truth
        for got, pred in zip(agreement_many(truth, preds), preds, strict=True):
            ref = _reference(truth, pred)
            for key in ref:
                assert got[key] == pytest.approx(ref[key], abs=1e-12), (key, n)


def test_many_groups_cost_memory_in_records_not_groups_squared() -> None:
    # 20,000 singleton groups: a dense table would hold 4·10⁸ cells (3.2 GB); the
    # values are scikit-learn's for identical partitions and for one group vs many
    n = 20_000
    for pred in (np.arange(n)[::-1], np.zeros(n, dtype=int)):
        got, ref = agreement(np.arange(n), pred), _reference(np.arange(n), pred)
        for key in ref:
            assert got[key] == pytest.approx(ref[key], abs=1e-12), key
