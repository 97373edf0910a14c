"""The held-out budget of cross-validation (docs/method.md, "Held-out budget").

Data: scikit-learn's bundled UCI optical digits (Alpaydin & Kaynak) and breast cancer
Wisconsin diagnostic (Wolberg et al.), cut into small labelled batches
(``tests.datasets.make_batches``). Score: adjusted Rand index (Hubert & Arabie 1985).
Every budgeted fit is compared with the same selector run unbudgeted
(``heldout_tolerance=None``) on the same batches in the same test.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from service.core import CoreError, MetricSelector
from service.core._budget import allocate, stratified_draw
from tests.datasets import load_open, make_batches

N_BATCHES = 150  # above the default floor (50): the budget applies


def _batches(name: str, n: int, seed: int = 0):
    X, y = load_open(name)
    return make_batches(X, y, n, np.random.default_rng(seed), group_size=(5, 15))


def _fit(batches, seed: int = 0, **kw) -> MetricSelector:
    return MetricSelector(estimate_k=False, random_state=seed, **kw).fit(batches)


@pytest.fixture(scope="module")
def digits_pair():
    batches = _batches("digits", N_BATCHES)
    return batches, _fit(batches), _fit(batches, heldout_tolerance=None)


@pytest.mark.filterwarnings("ignore::service.core.errors.ZeroSpreadWarning")
@pytest.mark.parametrize("name", ["digits", "breast_cancer"])
def test_budgeted_selector_picks_the_unbudgeted_learner_and_alpha(name, digits_pair) -> None:
    # A sweep when this was written (5 open data sets × 150 and 500 batches × seeds
    # 0-2): the learner was the same in 29 of 30 problems, learner and α in 22; every
    # differing pick's unbudgeted ARI was within 0.005 of the winner's (mostly
    # neighbouring small α's, whose maps barely differ). These two draws agree.
    if name == "digits":
        batches, budgeted, full = digits_pair
    else:
        batches = _batches(name, N_BATCHES)
        budgeted, full = _fit(batches), _fit(batches, heldout_tolerance=None)
    hb = budgeted.report_["heldout_budget"]
    assert hb["applied"] is True and hb["scored_batches"] < N_BATCHES
    assert full.report_["heldout_budget"]["scored_batches"] == N_BATCHES
    assert (budgeted.report_["method"], budgeted.report_["alpha"]) == (
        full.report_["method"], full.report_["alpha"])
    # every batch stays in the statistics: the refit is the same metric
    np.testing.assert_allclose(budgeted.metric_.components, full.metric_.components)
    assert budgeted.report_["n_records"] == full.report_["n_records"]


@pytest.mark.filterwarnings("ignore::service.core.errors.ZeroSpreadWarning")
def test_reported_standard_error_agrees_with_direct_computations(digits_pair) -> None:
    batches, budgeted, full = digits_pair
    hb = budgeted.report_["heldout_budget"]
    sample = hb["sample"]
    m, n = len(sample), len(batches)
    assert hb["scored_batches"] == m and hb["n_batches"] == n
    winner = (budgeted.report_["method"], budgeted.report_["alpha"])
    mine = np.asarray(budgeted.evaluate(*winner)["per_batch_ari"])
    everyone = np.asarray(full.evaluate(*winner)["per_batch_ari"])
    # a sampled batch is scored exactly as the unbudgeted run scores it (same folds,
    # same random numbers per fold and batch)
    np.testing.assert_array_equal(mine, everyone[sample])
    # 1. the formula: standard error of a mean of m of n values drawn without
    # replacement, s/√m·√(1 − m/n) (Cochran, Sampling Techniques, ch. 2; from memory)
    direct = mine.std(ddof=1) / math.sqrt(m) * math.sqrt(1 - m / n)
    assert hb["sampling_se"] == pytest.approx(direct, rel=1e-12)
    assert hb["tolerance_met"] is bool(direct <= hb["tolerance"])
    # 2. the design: the unbudgeted run knows every batch's ARI, so the spread of the
    # sample mean can be measured by redrawing the sample the way the budget draws it
    # (per fold of the first repetition, one draw per stratum) many times. The formula
    # ignores the strata, so it should be at least that spread (conservative), and not
    # wildly above it; bounds 0.5–1.15 are a rule of thumb (no source).
    folds = [f for f in budgeted._cv.folds if f.repeat == 0]
    keys = np.array([[s.n_groups, s.n] for s in budgeted._cv.stats])
    shares = allocate(m, [len(f.held_out) for f in folds])
    rng = np.random.default_rng(1)
    means = []
    for _ in range(400):
        drawn = [b for f, k in zip(folds, shares, strict=True)
                 for b in stratified_draw(f.held_out, keys, k, rng)]
        means.append(everyone[drawn].mean())
    ratio = float(np.std(means)) / direct
    print(f"Monte Carlo / reported SE: {ratio:.2f}")  # shown with pytest -s
    assert 0.5 <= ratio <= 1.15
    # the sampled mean is within a few standard errors of the mean over every batch
    assert abs(mine.mean() - everyone.mean()) <= 4 * direct


@pytest.mark.filterwarnings("ignore::service.core.errors.ZeroSpreadWarning")
def test_sample_is_stratified_and_reproducible(digits_pair) -> None:
    batches, budgeted, _ = digits_pair
    sample = set(budgeted.report_["heldout_budget"]["sample"])
    groups = np.array([len(np.unique(y)) for _, y in batches])
    for fold in budgeted._cv.folds:
        held = np.asarray(fold.held_out)
        taken = np.array([b in sample for b in held])
        share = taken.mean()
        for k in np.unique(groups[held]):
            of_k = groups[held] == k
            # proportional within each stratum of the first key, up to the rounding of
            # one draw per block in each of the (at most four) rounds
            assert abs(taken[of_k].sum() - share * of_k.sum()) <= 4
    again = _fit(batches)
    assert again.report_["heldout_budget"]["sample"] == sorted(sample)
    assert json.dumps(again.report_) == json.dumps(budgeted.report_)
    other = _fit(batches, seed=5)
    assert other.report_["heldout_budget"]["sample"] != sorted(sample)


def test_fewer_batches_than_the_floor_are_all_scored() -> None:
    batches = _batches("digits", 30)
    with pytest.warns(Warning):
        budgeted = _fit(batches)
    with pytest.warns(Warning):
        full = _fit(batches, heldout_tolerance=None)
    a, b = dict(budgeted.report_), dict(full.report_)
    ha, hb = a.pop("heldout_budget"), b.pop("heldout_budget")
    assert json.dumps(a) == json.dumps(b)  # the same result as without a budget
    assert ha["applied"] is False and ha["scored_batches"] == 30 and ha["sampling_se"] == 0.0
    assert "sample" not in ha and hb["tolerance"] is None


@pytest.mark.filterwarnings("ignore::service.core.errors.ZeroSpreadWarning")
def test_floor_and_cap_bound_the_sample() -> None:
    batches = _batches("digits", 90)
    loose = _fit(batches, heldout_tolerance=0.5, min_heldout_batches=20, max_heldout_batches=40)
    hb = loose.report_["heldout_budget"]
    assert hb["scored_batches"] == 20 and hb["rounds"] == 1 and hb["tolerance_met"] is True
    tight = _fit(batches, heldout_tolerance=1e-6, min_heldout_batches=20, max_heldout_batches=40)
    hb = tight.report_["heldout_budget"]
    assert hb["scored_batches"] == 40 and hb["tolerance_met"] is False
    assert hb["sampling_se"] > 1e-6


def test_budget_parameters_are_checked() -> None:
    batches = _batches("iris", 3)
    for bad, field in (({"heldout_tolerance": 0.0}, "heldout_tolerance"),
                       ({"heldout_tolerance": True}, "heldout_tolerance"),
                       ({"min_heldout_batches": 1}, "min_heldout_batches"),
                       ({"min_heldout_batches": 30, "max_heldout_batches": 20},
                        "max_heldout_batches")):
        with pytest.raises(CoreError) as info:
            _fit(batches, **bad)
        assert info.value.field == field
