"""Drift maths: mergeable moments, fixed bins, PSI, KS from histograms, verdicts.

Data: wine (Forina et al.) and iris (Fisher 1936), as bundled with scikit-learn.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from service.core import CoreError, MetricSelector, group_records
from service.core.drift import (
    FEATURE_LAYOUT,
    BinLayout,
    Moments,
    build_reference,
    compare,
    ks_from_counts,
    ks_pvalue,
    layout_for,
    mean_shift,
    merge_all,
    psi,
    psi_noise,
    summarise,
    verdict,
)
from tests.datasets import load_open, make_batches


def test_merged_moments_equal_numpys_on_the_stacked_records() -> None:
    # Chan, Golub & LeVeque (1979) pairwise update against numpy's two-pass mean/var
    X, _ = load_open("wine")
    rng = np.random.default_rng(3)
    cuts = np.sort(rng.choice(np.arange(1, len(X)), size=9, replace=False))
    parts = np.split(X[rng.permutation(len(X))], cuts)
    for offset in (0.0, 1e6):  # a large common offset: the update stays accurate
        pieces = [Moments.of(p + offset) for p in parts]
        # merged in a tree order and in sequence: the same answer
        left = merge_all(pieces[:5], X.shape[1]).merge(merge_all(pieces[5:], X.shape[1]))
        seq = merge_all(pieces, X.shape[1])
        stacked = np.vstack(parts) + offset
        for m in (left, seq):
            assert m.count == len(X)
            assert_allclose(m.mean, stacked.mean(axis=0), rtol=1e-12)
            assert_allclose(m.variance, stacked.var(axis=0), rtol=1e-8)
    empty = Moments.zeros(3)
    one = Moments.of(np.ones((2, 3)))
    assert empty.merge(one) is one and one.merge(empty) is one
    assert_allclose(Moments.from_dict(one.to_dict()).mean, one.mean)


def test_bin_layout_places_edges_and_tails() -> None:
    lay = BinLayout(0.0, 1.0, 3)  # under | [0,1) [1,2) [2,3) | over
    assert lay.size == 5 and lay.edges.tolist() == [0.0, 1.0, 2.0, 3.0]
    v = np.array([-5.0, -1e-9, 0.0, 0.999, 1.0, 2.5, 3.0, 1e300])
    assert lay.positions(v).tolist() == [0, 0, 1, 1, 2, 3, 4, 4]
    assert lay.count(v).tolist() == [2, 2, 1, 1, 2]
    cols = lay.count_columns(np.column_stack([v, v + 1]))
    assert cols.tolist() == [[2, 2, 1, 1, 2], [1, 1, 2, 1, 3]]
    with pytest.raises(CoreError):
        BinLayout(0.0, 0.0, 3)
    # margins/distances: 20 bins up to 1.5 × the 95th percentile
    lay = layout_for(np.arange(101.0))
    assert lay.bins == 20 and lay.lo == 0 and lay.width == pytest.approx(1.5 * 95 / 20)
    assert layout_for(np.zeros(4)).width == 1.0


def test_psi_matches_a_hand_computation() -> None:
    # reference shares q = (.25, .25, .5), live shares p = (.4, .3, .3):
    #   (.40 − .25) · ln(.40/.25) = .15 · 0.4700036 = 0.0705005
    #   (.30 − .25) · ln(.30/.25) = .05 · 0.1823216 = 0.0091161
    #   (.30 − .50) · ln(.30/.50) = −.2 · −0.5108256 = 0.1021651
    #   PSI = 0.1817818
    #   (without the pseudo-count: no bin is empty)
    assert psi(np.array([25, 25, 50]), np.array([40, 30, 30]), pseudo=0) == pytest.approx(
        0.1817818, abs=1e-6)
    # the small-count floor, half a record added to every bin: reference (3, 1, 0) and
    # live (2, 1, 1) become (3.5, 1.5, .5) and (2.5, 1.5, 1.5), each over 5.5:
    #   q = (.636364, .272727, .090909), p = (.454545, .272727, .272727)
    #   (p − q) · ln(p/q) = −.181818 · ln(.714286) = 0.0611767;  0;
    #                       .181818 · ln 3 = 0.1997477;  PSI = 0.2609244
    assert psi(np.array([3, 1, 0]), np.array([2, 1, 1])) == pytest.approx(0.2609244,
                                                                          abs=1e-6)
    assert psi(np.array([3, 0]), np.array([2, 1]), pseudo=0) == np.inf
    assert psi(np.array([3, 4]), np.array([30, 40]), pseudo=0) == pytest.approx(0.0,
                                                                                abs=1e-15)
    rows = psi(np.array([[25, 25, 50], [3, 4, 0]]), np.array([[40, 30, 30], [3, 4, 0]]),
               pseudo=0)
    assert_allclose(rows, [0.1817818, 0.0], atol=1e-6)


def test_psi_noise_is_the_mean_psi_of_two_samples_of_one_distribution() -> None:
    # the χ² approximation behind psi_noise, checked by resampling wine's alcohol column
    X, _ = load_open("wine")
    lay = BinLayout(11.0, 0.25, 16)
    rng = np.random.default_rng(0)
    values, noise = [], []
    for _ in range(400):
        a, b = rng.choice(X[:, 0], 150), rng.choice(X[:, 0], 100)
        ca, cb = lay.count(a), lay.count(b)
        values.append(psi(ca, cb))
        noise.append(psi_noise(ca, cb))
    # within 20 %: a second-order approximation, and the pseudo-count pulls sparse bins
    # together (our tolerance, no source)
    assert np.mean(values) == pytest.approx(np.mean(noise), rel=0.2)


def test_ks_from_histograms_is_close_to_scipys_on_the_raw_values() -> None:
    # reference implementation: scipy.stats.ks_2samp on the raw values. The CDFs are only
    # seen at bin edges, so the binned statistic is never above scipy's and short of it
    # by at most the largest share one bin holds on either side.
    X, y = load_open("wine")
    for col, lay in ((0, BinLayout(11.0, 0.1, 40)), (0, BinLayout(11.0, 0.5, 8)),
                     (9, BinLayout(1.0, 0.5, 24))):
        a, b = X[y == 0, col], X[y == 1, col]
        ca, cb = lay.count(a), lay.count(b)
        exact = stats.ks_2samp(a, b).statistic
        binned = float(ks_from_counts(ca, cb))
        slack = max((ca / ca.sum()).max(), (cb / cb.sum()).max())
        assert binned <= exact + 1e-12
        assert exact - binned <= slack
    # with fine bins the two agree closely (width 0.1 on alcohol: 0.03, our tolerance)
    a, b = X[y == 0, 0], X[y == 1, 0]
    lay = BinLayout(11.0, 0.1, 40)
    assert float(ks_from_counts(lay.count(a), lay.count(b))) == pytest.approx(
        stats.ks_2samp(a, b).statistic, abs=0.03)
    # its p-value: Kolmogorov's limit distribution, as scipy's asymptotic method gives it
    d = stats.ks_2samp(a, b).statistic
    assert ks_pvalue(d, len(a), len(b)) == pytest.approx(
        stats.ks_2samp(a, b, method="asymp").pvalue, rel=1e-6)


def test_mean_shift_and_verdicts() -> None:
    ref = Moments.of(np.array([[0.0, 5.0], [2.0, 5.0]]))  # sd 1 and 0
    live = Moments.of(np.array([[3.0, 5.0], [3.0, 5.0]]))
    assert mean_shift(ref, live).tolist() == [2.0, 0.0]
    moved = Moments.of(np.array([[1.0, 6.0]]))
    assert mean_shift(ref, moved).tolist() == [0.0, np.inf]
    assert verdict(10, 5.0, 3.0) == "quiet"
    assert verdict(100, 0.0, 0.1) == "steady"
    assert verdict(100, 0.1, 0.0) == verdict(100, 0.0, -0.5) == "shifting"
    assert verdict(100, 0.25, 0.0) == verdict(100, 0.0, 1.0) == "drifted"


def test_compare_flags_a_shifted_feature_of_iris_by_name() -> None:
    # iris (Fisher 1936): reference from its batches, live records from the same pool
    X, y = load_open("iris")
    batches = make_batches(X, y, 5, np.random.default_rng(1), classes_per_batch=(2, 3))
    sel = MetricSelector(method="diagonal", alphas=[0.1], estimate_k=False).fit(batches)
    m = sel.metric_
    seen = [(Xb, group_records(m, Xb, len(np.unique(yb)))) for Xb, yb in batches]
    ref = build_reference(m, seen)
    assert ref.summary.moments.count == sum(len(b) for b, _ in batches)
    assert ref.summary.features.shape == (4, FEATURE_LAYOUT.size)
    names = ["sl", "sw", "pl", "pw"]
    steady = compare(ref, summarise(m, X, group_records(m, X, 3), ref.layouts), names)
    assert steady["verdict"] == "steady" and steady["flagged"] == [], steady
    shifted = X.copy()
    shifted[:, 1] += 2 * X[:, 1].std()
    out = compare(ref, summarise(m, shifted, group_records(m, shifted, 3), ref.layouts),
                  names)
    assert out["flagged"] == ["sw"] and out["features"]["sw"]["verdict"] == "drifted"
    assert out["verdict"] == "drifted"
    few = compare(ref, summarise(m, X[:5], group_records(m, X[:5], 2), ref.layouts), names)
    assert few["verdict"] == "quiet"
