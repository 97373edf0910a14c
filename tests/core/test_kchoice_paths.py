"""``choose_k`` reads k from curves without silhouettes when its rule does not need
them; it must pick what the full curves (the ones calibration reads) give.

Data: scikit-learn's bundled copies of iris (Fisher 1936), wine (UCI, Forina et al.),
UCI optical digits (Alpaydin & Kaynak) and breast cancer Wisconsin diagnostic
(Wolberg et al.), each seen raw (the whole set, and batches of 2–5 classes) and
through metrics fitted on batches of it (``MetricSelector``, the service's path).
Reference: ``_pick`` on the full ``kcurves.curves`` of the same records, for every
rule: the thresholds a fit calibrated, thresholds equal to a point of the statistic
(where ``stat ≤ τ`` turns), between two points and beyond them all, and none (the
fallback to the silhouette).
"""

from __future__ import annotations

import functools
import warnings

import numpy as np
import pytest

from service.core import MetricSelector
from service.core.kchoice import RULES, _pick, _statistic, choose_k
from service.core.kcurves import curves
from tests.datasets import load_open, make_batches

SETS = ("iris", "wine", "digits", "breast_cancer")
K_MAX = (2, 10, 15)


@functools.cache
def _mapped(name: str) -> tuple[list[np.ndarray], list[dict]]:
    """Record sets of one data set (raw and mapped) and the k rules fitted on it."""
    X, y = load_open(name)
    rng = np.random.default_rng(0)
    batches = make_batches(X, y, 6, rng)
    # the whole set (digits: above the sample cap, so the subsample path too) and batches
    records = [X] + [b for b, _ in batches[:3]]
    rules = []
    for method in ("euclidean", "closed_form"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # digits has blank pixels (zero spread)
            sel = MetricSelector(method=method, alphas=[1e-2], random_state=0).fit(batches)
        records += [sel.metric_.transform(b) for b in (X, *(b for b, _ in batches[3:]))]
        rules.append(sel.metric_.k_rule)
    return records, rules


def _thresholds(rule: str, full: dict, fitted: list[dict]) -> list[float | None]:
    stat = np.unique(_statistic(rule, full)[1:])
    between = (stat[:-1] + stat[1:]) / 2.0
    calibrated = [r["candidates"].get(rule, {}).get("params", {}).get("threshold")
                  for r in fitted]
    return [None, *calibrated, *stat.tolist(), *between.tolist(),
            float(stat[0]) / 2.0, float(stat[-1]) * 2.0]


@pytest.mark.parametrize(
    "name", [pytest.param(s, marks=pytest.mark.slow) if s == "digits" else s for s in SETS]
)
def test_choose_k_picks_what_the_full_curves_give(name: str) -> None:
    records, fitted = _mapped(name)
    seen = {rule: set() for rule in RULES}
    for Z in records:
        for k_max in K_MAX:
            full = curves(Z, k_max)  # reference: what calibration reads
            for rule in RULES:
                thresholds = _thresholds(rule, full, fitted) if rule in ("spread", "explained") \
                    else [None]
                for tau in thresholds:
                    params = {} if tau is None else {"threshold": tau}
                    k = choose_k(Z, {"rule": rule, "params": params, "k_max": k_max})
                    assert k == _pick(rule, full, params), (rule, tau, k_max)
                    seen[rule].add(k)
    # the thresholds reach many answers, not a constant k (the silhouette reads 2
    # on iris whatever the map)
    assert len(seen["spread"]) > 3 and len(seen["explained"]) > 3, seen


@pytest.mark.parametrize("name", SETS)
def test_curves_without_silhouettes_are_the_same_points(name: str) -> None:
    # reference: the full curves; leaving the silhouette out changes no other point
    records, _ = _mapped(name)
    for Z in records[:4]:
        for random_state in (0, 3):
            full = curves(Z, 10, random_state)
            part = curves(Z, 10, random_state, silhouette=False)
            assert set(part) == set(full) - {"silhouette"}
            for key, values in part.items():
                np.testing.assert_array_equal(values, full[key], err_msg=key)
