"""Cross-validation over batches and the choice of learner and α (invented data).

Scores: adjusted Rand index (Hubert & Arabie 1985), NMI (Vinh, Epps & Bailey 2010),
Rand index (Rand 1971), all via scikit-learn.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from service.core import CoreError, MetricSelector, NotEnoughDataError
from tests.datasets import few_batch_trial, load_open, make_batches

ALPHAS = (1e-3, 1e-1, 10.0)  # a short grid keeps the tests quick
SCORE_KEYS = {"ari", "baseline_ari", "nmi", "baseline_nmi", "rand", "baseline_rand"}


def signal_batches(
    n_batches: int, seed: int, signal: float = 3.0, d: int = 8, size=(15, 40)
) -> list[tuple[np.ndarray, np.ndarray]]:
    """Groups differ along two directions; six noisy features hide them from Euclidean."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n_batches):
        k = int(rng.integers(2, 5))
        sizes = rng.integers(size[0], size[1] + 1, size=k)
        y = np.repeat(np.arange(k), sizes)
        centres = rng.normal(size=(k, 2)) * signal
        X = rng.normal(size=(len(y), d)) * np.r_[0.5, 0.5, np.full(d - 2, 2.0)]
        X[:, :2] += centres[y]
        X += rng.normal(size=d) * 5  # batch offset: labels and positions are local
        order = rng.permutation(len(y))
        out.append((X[order], y[order]))
    return out


def noise_batches(n_batches: int, seed: int) -> list[tuple[np.ndarray, np.ndarray]]:
    """Labels unrelated to the records: nothing to learn."""
    rng = np.random.default_rng(seed)
    return [
        (rng.normal(size=(40, 6)), rng.permutation(np.arange(40) % 3)) for _ in range(n_batches)
    ]


@pytest.fixture(scope="module")
def fitted() -> MetricSelector:
    return MetricSelector(alphas=ALPHAS, random_state=0).fit(signal_batches(8, seed=1))


def test_auto_picks_a_learned_metric_when_there_is_signal(fitted: MetricSelector) -> None:
    report = fitted.report_
    assert report["method"] in ("closed_form", "discriminant", "diagonal")
    assert report["beats_baseline"] is True
    # 0.2: the invented signal is strong; margin is a rule of thumb (common practice,
    # no source)
    assert report["score"]["ari"] > report["score"]["baseline_ari"] + 0.2
    assert "beat the Euclidean baseline" in report["summary"]
    assert fitted.metric_.method == report["method"]
    assert fitted.metric_.alpha == report["alpha"]
    assert fitted.metric_.rank == report["rank"]


def test_report_fields_are_complete_and_json_safe(fitted: MetricSelector) -> None:
    report = fitted.report_
    json.dumps(report, allow_nan=False)
    assert set(report["score"]) == SCORE_KEYS
    for key in ("method", "alpha", "rank", "beats_baseline", "summary", "folds", "candidates",
                "k_accuracy", "n_batches", "n_records", "warnings", "selection"):
        assert key in report
    assert report["n_batches"] == 8
    assert report["n_records"] == sum(len(y) for _, y in signal_batches(8, seed=1))
    # 8 batches, 5 folds, repeated 3 times (few batches): every batch held out 3 times
    assert report["cv"] == "k-fold" and report["n_folds"] == 5 and report["n_repeats"] == 3
    held = sorted(b for f in report["folds"] for b in f["held_out"])
    assert held == sorted(list(range(8)) * 3)
    n_cands = len(report["candidates"])
    assert n_cands == 1 + 3 * len(ALPHAS)  # euclidean + three learners × each α
    assert all(len(f["scores"]) == n_cands for f in report["folds"])
    assert sum(c["won"] for c in report["candidates"]) == 1
    won = next(c for c in report["candidates"] if c["won"])
    assert (won["method"], won["alpha"]) == (report["method"], report["alpha"])
    assert won["ari"] == pytest.approx(report["score"]["ari"])
    assert report["selection"]["rule"] and report["selection"]["reason"]
    # the k rule is calibrated and its held-out hit rate reported
    assert fitted.metric_.k_rule is not None
    # one trial per batch (each judged by a rule calibrated without its fold), and the
    # accuracy is the share of those trials that hit
    assert report["k_trials"] == 8
    assert report["k_accuracy"] * 8 == pytest.approx(round(report["k_accuracy"] * 8))


def test_no_signal_is_said_plainly() -> None:
    report = MetricSelector(alphas=ALPHAS, random_state=0, estimate_k=False).fit(
        noise_batches(6, seed=2)).report_
    assert report["beats_baseline"] is False
    assert "No learned metric beat the Euclidean baseline" in report["summary"]


def test_leave_one_batch_out_below_five_batches() -> None:
    sel = MetricSelector(alphas=[0.01, 1.0], estimate_k=False).fit(signal_batches(3, seed=3))
    report = sel.report_
    assert report["cv"] == "leave-one-batch-out"
    assert [f["held_out"] for f in report["folds"]] == [[0], [1], [2]]
    assert all(f["train_batches"] == 2 for f in report["folds"])


def test_evaluate_scores_a_fixed_configuration_on_the_same_folds(fitted) -> None:
    same = fitted.evaluate(fitted.report_["method"], fitted.report_["alpha"])
    assert same["score"] == pytest.approx(fitted.report_["score"])
    other = fitted.evaluate("closed_form", 0.5)  # not on the grid: scored afresh
    assert set(other["score"]) == SCORE_KEYS
    assert other["score"]["baseline_ari"] == pytest.approx(fitted.report_["score"]["baseline_ari"])
    assert len(other["per_batch_ari"]) == 8
    base = fitted.evaluate("euclidean", 123.0)
    assert base["alpha"] == 0.0 and base["score"]["ari"] == base["score"]["baseline_ari"]


def test_requested_method_is_kept_and_progress_is_reported() -> None:
    seen: list[tuple[str, float]] = []
    sel = MetricSelector(
        method="diagonal",
        alphas=[0.1, 1.0],
        progress=lambda s, f: seen.append((s, f)),
        estimate_k=False,
    ).fit(signal_batches(5, seed=4))
    assert sel.report_["method"] == "diagonal"
    assert {c["method"] for c in sel.report_["candidates"]} == {"euclidean", "diagonal"}
    fractions = [f for _, f in seen]
    assert fractions == sorted(fractions) and fractions[-1] == 1.0
    assert {"cross-validation", "refit", "done"} <= {s for s, _ in seen}


def test_selection_is_reproducible() -> None:
    batches = signal_batches(5, seed=5)
    a = MetricSelector(alphas=[0.01, 1.0], random_state=3, estimate_k=False).fit(batches)
    b = MetricSelector(alphas=[0.01, 1.0], random_state=3, estimate_k=False).fit(batches)
    assert a.metric_.k_rule == b.metric_.k_rule
    assert json.dumps(a.report_) == json.dumps(b.report_)
    np.testing.assert_array_equal(a.metric_.components, b.metric_.components)


def test_held_out_records_are_capped() -> None:
    sel = MetricSelector(alphas=[0.1], max_heldout_records=30, estimate_k=False)
    batches = signal_batches(4, seed=6, size=(40, 60))
    sel.fit(batches)
    assert sel.report_["max_heldout_records"] == 30
    for b, (_, y) in enumerate(batches):
        X_used, codes = sel._cv.held_out_data(b)
        # 30 drawn, plus the first record of any group the draw missed: k is kept
        assert 30 <= len(X_used) <= 30 + len(np.unique(y))
        assert len(np.unique(codes)) == len(np.unique(y))
    # the k rule still maps each (subsampled) batch by the learner refitted without it:
    # the refits come from the full statistics, not from the subsample
    assert sel.metric_.k_rule["mapping"] == "leave_one_batch_out"


def test_errors() -> None:
    with pytest.raises(NotEnoughDataError) as info:
        MetricSelector().fit(signal_batches(1, seed=7))
    assert info.value.field == "batches"
    a, b = signal_batches(2, seed=7, d=8)[0], signal_batches(1, seed=8, d=5)[0]
    with pytest.raises(CoreError) as info:
        MetricSelector().fit([a, b])
    assert info.value.field == "features"
    with pytest.raises(CoreError) as info:
        MetricSelector(method="nearest").fit(signal_batches(2, seed=7))
    assert info.value.field == "method"
    with pytest.raises(CoreError) as info:
        MetricSelector(alphas=[0.0]).fit(signal_batches(2, seed=7))
    assert info.value.field == "alphas"
    with pytest.raises(CoreError) as info:
        MetricSelector(max_rank=0).fit(signal_batches(2, seed=7))
    assert info.value.field == "max_rank"


def test_few_batch_rule_is_no_worse_than_naive_argmax_held_out() -> None:
    """A small version of bench/few_batches.py (run that for the full measurement).

    Three to five small batches from open data (wine: UCI, Forina et al.; iris:
    Fisher 1936; palmerpenguins: Gorman, Williams & Fraser 2014); the metric picked by
    each rule is judged on batches from a disjoint pool (ARI, Hubert & Arabie 1985).
    """
    trials = [few_batch_trial(name, seed) for name in ("wine", "iris", "penguins")
              for seed in (11, 12)]
    mean = {k: float(np.mean([t[k] for t in trials])) for k in trials[0]}
    print(mean)  # shown with pytest -s
    # margins: rules of thumb (common practice, no source); 0.01 allows one trial's noise
    assert mean["one_se"] >= mean["argmax"] - 0.01
    assert mean["one_se"] > mean["euclidean"] + 0.05


def test_a_batch_without_spread_does_not_break_the_k_rule() -> None:
    # two batches, one of identical records: the fold holding out the other batch has
    # nothing to learn from, so that batch is seen through the final metric instead
    rng = np.random.default_rng(0)
    X0 = np.r_[rng.normal(0, 1, (20, 3)), rng.normal(4, 1, (20, 3))]
    y0 = np.r_[[0] * 20, [1] * 20]
    X1, y1 = np.ones((10, 3)), np.r_[[0] * 5, [1] * 5]
    sel = MetricSelector(alphas=ALPHAS, random_state=0).fit([(X0, y0), (X1, y1)])
    assert sel.metric_.k_rule["mapping"] == "partly_in_sample"
    assert sel.report_["k_trials"] == 2


def test_records_that_overflow_once_mapped_are_a_named_error() -> None:
    # one batch sits 1e160 away: its own scatter is fine (centred), but the others,
    # mapped around the pooled mean, have squared distances beyond float64
    from service.core import RecordOverflowError

    batches = signal_batches(6, seed=11)
    X2, y2 = batches[2]
    batches[2] = (X2 + 1e160, y2)
    with pytest.raises(RecordOverflowError, match="too large to map") as info:
        MetricSelector(alphas=ALPHAS, random_state=0).fit(batches)
    assert info.value.row is not None


def test_whole_number_parameters_accept_numpy_integers_and_refuse_bools() -> None:
    # the same rule as fit_metric and group_records (validation.check_whole)
    sel = MetricSelector(method="closed_form", alphas=ALPHAS, max_rank=np.int64(2),
                         k_max=np.int64(4), n_folds=np.int32(2), estimate_k=False)
    assert sel.fit(signal_batches(4, seed=12)).metric_.rank <= 2
    for bad in ({"max_rank": True}, {"k_max": 1}, {"n_folds": 2.0}):
        with pytest.raises(CoreError, match="whole number of at least") as info:
            MetricSelector(**bad).fit(signal_batches(3, seed=12))
        assert info.value.field == next(iter(bad))


def test_batches_checked_at_once_equal_the_batch_by_batch_check() -> None:
    """The whole-array check of many batches gives check_batch's matrices and codes
    (digits from scikit-learn's bundled copy, and random whole-number labels of every
    integer kind), and leaves every batch with a problem to the loop."""
    from service.core.selection import _check_batches
    from service.core.validation import check_batch
    from service.core.validation import check_batches_at_once as _check_batches_at_once

    X, y = load_open("digits")
    pool = make_batches(X, y, 300, np.random.default_rng(0), group_size=(5, 15))
    cases = [pool]
    rng = np.random.default_rng(3)
    for trial in range(200):
        batches = []
        for _ in range(int(rng.integers(2, 6))):
            n = int(rng.integers(2, 8))
            labels = rng.choice([-5, 0, 3, 7, 2**40, -(2**40)][: int(rng.integers(2, 7))], n)
            kind = (np.int64, np.int8, np.uint64)[trial % 3]
            if kind is np.int8:
                labels = np.clip(labels, -100, 100)
            if kind is np.uint64:
                labels = np.abs(labels)
            batches.append((rng.normal(size=(n, 3)), labels.astype(kind)))
        cases.append(batches)
    taken = 0
    for batches in cases:
        try:
            expected = [check_batch(Xb, yb) for Xb, yb in batches]
        except CoreError:
            assert _check_batches_at_once(batches) is None
            continue
        got = _check_batches_at_once(batches)
        assert got is not None
        taken += 1
        for (x1, c1), (x2, c2) in zip(got, expected, strict=True):
            assert x1 is x2 or np.array_equal(x1, x2)
            assert c1.dtype == c2.dtype and np.array_equal(c1, c2)
        assert all(np.array_equal(a[1], b[1]) for a, b in zip(
            _check_batches(batches), expected, strict=True))
    assert taken > 100
    bad = [(pool[0][0].copy(), pool[0][1]), pool[1]]
    bad[0][0][2, 3] = np.nan
    assert _check_batches_at_once(bad) is None
    with pytest.raises(CoreError, match="NaN"):
        _check_batches(bad)
    assert _check_batches_at_once([pool[0], (pool[1][0], np.zeros(len(pool[1][1]), int))]) \
        is None
    assert _check_batches_at_once([pool[0], (pool[1][0], pool[1][1].astype(float))]) is None
