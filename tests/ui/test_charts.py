"""The console's numbers and plots, without a server: feature weights, the two planes,
the roll-back target, ages, and SVG that stays well-formed whatever a feature is called.

Data: iris (Fisher 1936) as bundled with scikit-learn.
"""

from __future__ import annotations

from datetime import datetime, timezone
from xml.etree import ElementTree

import numpy as np
from numpy.testing import assert_allclose

from service.usecases import charts
from service.usecases.console import age, rollback_target
from tests.datasets import load_open

SVG_NS = "{http://www.w3.org/2000/svg}"


def test_weights_are_the_diagonal_of_m_scaled_to_mean_one() -> None:
    L = np.random.default_rng(0).normal(size=(3, 5))
    w = charts.feature_weights(L)
    reference = np.diag(L.T @ L)  # numpy as the reference: M = LᵀL
    assert_allclose(w, reference * 5 / reference.sum())
    assert_allclose(w.mean(), 1.0)
    assert_allclose(charts.feature_weights(np.eye(4)), np.ones(4))  # Euclidean: all 1
    assert not charts.feature_weights(np.zeros((1, 3))).any()


def test_the_euclidean_plane_of_standardised_iris_keeps_its_known_variance() -> None:
    X, y = load_open("iris")
    S = (X - X.mean(0)) / X.std(0)
    plane = charts.projections(S, S @ np.eye(4), y)
    # standardised iris: the first two principal components carry 72.96 % and 22.85 %
    # of the variance (a much-reproduced PCA result; values from memory)
    ratios = plane["euclidean"].var(0) / S.var(0).sum()
    assert_allclose(ratios, [0.7296, 0.2285], atol=5e-4)
    assert_allclose(plane["learned"], plane["euclidean"])  # identity map: same plane
    assert plane["groups"] == ["0", "1", "2"] and plane["codes"].shape == (150,)
    one = charts.projections(S, S[:, :1], y)["learned"]  # a rank-1 map: a line
    assert not one[:, 1].any()


def test_plots_are_well_formed_svg_with_text_kept_as_text() -> None:
    names = ["a<b & c", "width", "height"]
    svg = charts.weights_chart(names, np.array([2.0, 0.5, 0.5]))
    root = ElementTree.fromstring(svg)
    texts = "".join(t.text or "" for t in root.iter(f"{SVG_NS}text"))
    assert "a<b & c" in texts and "&amp;" in svg  # escaped in the markup
    versions = [{"version": n, "score": {"ari": a, "baseline_ari": b}}
                for n, a, b in ((1, 0.9, 0.5), (2, 0.8, 0.55))]
    ElementTree.fromstring(charts.versions_chart(versions, active=2))
    X, y = load_open("iris")
    ElementTree.fromstring(charts.projection_chart(charts.projections(X, X, y)))


def test_the_rollback_target_is_the_version_that_served_before() -> None:
    history = [{"from": None, "to": 1}, {"from": 1, "to": 3}]
    assert rollback_target(3, history, [1, 2, 3]) == 1
    back = [*history, {"from": 3, "to": 1}]
    assert rollback_target(1, back, [1, 2, 3]) == 3
    assert rollback_target(2, [{"from": None, "to": 2}], [1, 2]) == 1  # none before: lower
    assert rollback_target(1, [{"from": None, "to": 1}], [1, 2]) is None
    assert rollback_target(None, [], []) is None


def test_ages_read_like_people_write_them() -> None:
    now = datetime(2024, 5, 1, 12, 0, 0, tzinfo=timezone.utc)
    assert age("2024-05-01T11:59:18.000Z", now) == "42 s"
    assert age("2024-05-01T11:57:00.000Z", now) == "3 min"
    assert age("2024-05-01T09:30:00.000Z", now) == "2 h"
    assert age("2024-04-26T12:00:00.000Z", now) == "5 d"
    assert age(None, now) == "—"
