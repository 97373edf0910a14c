"""Learners: fitted metrics from summed batch statistics, O(d³), no raw records.

Every learner starts the same way (docs/method.md):

* feature scales ``s_j = sqrt(G_raw[j, j] / N)`` (pooled within-batch spread); a
  feature without spread gets scale 1, a :class:`ZeroSpreadWarning` and an entry in
  ``info["warnings"]``; if no feature has spread the fit fails;
* standardised scatters ``G = D⁻¹ G_raw D⁻¹``, ``H = D⁻¹ H_raw D⁻¹`` and the ridge
  ``λ = α · tr(G) / d``;
* the numerical null space of ``G`` is dropped before anything is inverted. This is
  exact, not an approximation: ``0 ≼ H ≼ G``, so a direction with no total spread has
  no between-group spread either (it covers zero-spread and collinear features).

Learners:

``closed_form``
    ``M = (G + λI)⁻¹ H (G + λI)⁻¹`` — the published ridge regression of the normalised
    assignment on the records. Computed in square-root form: with ``H = Fᵀ F``,
    ``W = (G + λI)⁻¹ Fᵀ`` and ``M = W Wᵀ``; the SVD of ``W`` gives ``L = Λ^{1/2} Uᵀ``
    over the eigenpairs above ``rel_tol`` × the largest, optionally ``max_rank`` of
    them. Rank ≤ min(d, Σ_b (k_b − 1)).
``discriminant``
    The generalised eigenproblem ``H v = μ (G − H + λI) v`` (within-group whitened).
    Components are the eigenvectors with ``μ`` above ``rel_tol`` × the largest,
    normalised to unit regularised within-group variance and weighted by the
    canonical correlation ``ρ = sqrt(μ / (1 + μ))``. Whitened directions alone give
    every retained direction the same weight however weakly it separates groups; ρ is
    bounded in [0, 1] and grows with μ, so weak directions cannot swamp k-means with
    within-group noise (our choice). Same directions as ``closed_form``, other
    weights: with ``G + λI = (G − H + λI) + H`` the closed form is
    ``M = V diag(μ / (1 + μ)²) Vᵀ`` over the same eigenvectors, i.e. weights
    ``sqrt(μ) / (1 + μ) = ρ · sqrt(1 − ρ²)``, which fall again for μ > 1 (strongly
    separating directions get *less* weight). A test checks both against scipy.
``diagonal``
    Per-feature weights only: ``w_j² = H_jj / (G_jj − H_jj + λ)``, a regularised
    between/within variance ratio of feature j (an F-ratio up to degrees of freedom).
    Chosen over the diagonal of the closed-form M because it depends on feature j
    alone, so a weight reads as "how well this feature alone separates the expert's
    groups"; α keeps perfectly separating features finite.
``euclidean``
    The identity on standardised features (the baseline): components = I, rank d.

Cost: the α-independent work (eigendecompositions of G and of the within-group
scatter) is done once per set of statistics (:class:`Prepared`, O(d³)); each α then
costs O(d·q²) with q = rank H ≤ Σ_b (k_b − 1). Cross-validation keeps one per fold
and groups held-out batches in :func:`scoring_map`'s form of a candidate (for
``closed_form``: the same distances without the per-α SVD).

Scale: k-means does not care about an overall factor, so every learned map except
``euclidean`` is rescaled so that the mapped training records have, on average over
the components, unit pooled within-batch variance: ``tr(L G Lᵀ) / (N r) = 1``.
"""

from __future__ import annotations

import math
import warnings
from typing import Any

import numpy as np
import scipy.linalg

from .errors import CoreError, NotEnoughDataError, ZeroSpreadWarning
from .metric import FittedMetric
from .stats import BatchStats
from .validation import check_whole

METHODS = ("closed_form", "discriminant", "diagonal", "euclidean")

# numerical tolerances (our choice, no source), a few orders above float64 rounding:
# a feature constant within every batch has exactly zero scatter (stats.py centres
# it exactly), so _SPREAD_TOL only has to reject variation at the rounding level
# (~500 ulps) and can keep real spread on a large offset (spread 1 on 1e12: 1e-12)
_SPREAD_TOL = 1e-13  # relative to |mean|: below this a feature has no spread
_NULL_TOL = 1e-12  # eigenvalues of G below this × the largest are exact zeros


def fit_metric(
    stats: BatchStats,
    method: str = "closed_form",
    alpha: float = 1e-3,
    max_rank: int | None = None,
    rel_tol: float = 1e-8,
) -> FittedMetric:
    """Fit one learner from summed statistics (see the module doc and docs/method.md)."""
    if method not in METHODS:
        raise CoreError(
            f"unknown method {method!r}; expected one of {', '.join(METHODS)}", "method"
        )
    alpha = _check_alpha(alpha)
    if max_rank is not None:
        max_rank = check_whole(max_rank, "max_rank", 1)
    if not isinstance(stats, BatchStats):
        raise TypeError("stats must be a BatchStats")
    return fit_prepared(Prepared(stats), method, alpha, max_rank, rel_tol)


class Prepared:
    """The α-independent part of a fit, O(d³) once; each α then costs O(d·q²).

    (q = rank of H ≤ Σ_b (k_b − 1).) Private to the core: cross-validation keeps one
    per fold and fits every candidate from it. Emits the zero-spread warning.
    """

    def __init__(self, stats: BatchStats) -> None:
        if stats.n_batches < 1 or stats.n < 2:
            raise NotEnoughDataError("no labelled batches to learn from", "batches")
        self.stats = stats
        self.scales, self.warnings, self.zero = _scales(stats)
        outer = np.outer(self.scales, self.scales)
        G, H = stats.G / outer, stats.H / outer
        self.G, self.H = (G + G.T) / 2.0, (H + H.T) / 2.0
        self.ridge_unit = float(np.trace(self.G)) / stats.n_features  # λ = α · this
        self.max_rank = max(int(stats.n_groups) - int(stats.n_batches), 1)
        self._range: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
        self._within: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None

    def range_parts(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(V, γ, F)``: basis of range(G), its eigenvalues, and ``VᵀHV = F Fᵀ``."""
        if self._range is None:
            gam, V = scipy.linalg.eigh(self.G)
            keep = gam > _NULL_TOL * max(float(gam[-1]), 0.0)
            V, gam = V[:, keep], gam[keep]
            Hr = V.T @ self.H @ V
            h, Q = scipy.linalg.eigh((Hr + Hr.T) / 2.0)
            pos = h > _NULL_TOL * max(float(h[-1]) if h.size else 0.0, 0.0)
            self._range = (V, gam, Q[:, pos] * np.sqrt(h[pos]))
        return self._range

    def within_parts(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(Q, ω, QᵀF)`` with ``diag(γ) − VᵀHV = Q diag(ω) Qᵀ`` (within-group scatter)."""
        if self._within is None:
            _, gam, F = self.range_parts()
            Wt = np.diag(gam) - F @ F.T
            om, Q = scipy.linalg.eigh((Wt + Wt.T) / 2.0)
            self._within = (Q, om, Q.T @ F)
        return self._within


def fit_prepared(
    prep: Prepared,
    method: str,
    alpha: float,
    max_rank: int | None = None,
    rel_tol: float = 1e-8,
) -> FittedMetric:
    """Fit one learner from prepared statistics; arguments already validated."""
    d = prep.stats.n_features
    lam = alpha * prep.ridge_unit
    info: dict[str, Any] = {
        "lambda": lam,
        "n_batches": int(prep.stats.n_batches),
        "n_records": int(prep.stats.n),
        "zero_spread_features": list(prep.zero),
        "warnings": list(prep.warnings),
    }
    max_r = prep.max_rank if max_rank is None else min(prep.max_rank, int(max_rank))
    if method == "euclidean":
        L = np.eye(d)
        alpha = 0.0
        info["lambda"] = 0.0
    elif method == "diagonal":
        L, weights = _diagonal(prep.G, prep.H, lam, rel_tol)
        info["weights"] = weights.tolist()
    elif method in ("closed_form", "discriminant"):
        V, gam, F = prep.range_parts()
        if method == "closed_form":
            Lr, eig = _closed_form(gam, F, lam, rel_tol, max_r)
        else:
            Q, om, QtF = prep.within_parts()
            Lr, eig = _discriminant(Q, om, QtF, lam, float(gam.max()), rel_tol, max_r)
        L = Lr @ V.T
        info["eigenvalues"] = eig.tolist()
    else:  # a name in METHODS without a branch here is a programming error
        raise CoreError(f"no learner implements method {method!r}", "method")
    if method != "euclidean":
        L = _normalise(L, prep.G, prep.stats.n)
    if L.shape[0] == 0:  # no between-group signal at all: fall back to a zero map
        L = np.zeros((1, d))
        info["warnings"].append("no between-group spread: the learned map is zero")
    return FittedMetric(
        method=method,
        alpha=float(alpha),
        scales=prep.scales,
        mean=prep.stats.mean.copy(),
        components=L,
        info=info,
    )


def scoring_map(
    prep: Prepared, method: str, alpha: float, max_rank: int | None = None
) -> FittedMetric:
    """A map that k-means cannot tell from ``fit_prepared``'s, for held-out scoring.

    For ``closed_form`` without ``max_rank`` it skips the per-α SVD: ``L = Wᵀ Vᵀ``
    (q × d) satisfies ``LᵀL = M`` exactly, and k-means depends on the records only
    through distances under M, which do not change with a rotation of L or an
    overall factor (the normalisation). What differs: directions with eigenvalues
    below ``rel_tol`` × the largest are kept (their distances weigh at most 1e-8 of
    the largest), and the components are neither ordered nor normalised, so the
    result is for grouping only. Other learners: ``fit_prepared``.
    """
    if method != "closed_form" or max_rank is not None:
        return fit_prepared(prep, method, alpha, max_rank)
    V, gam, F = prep.range_parts()
    lam = alpha * prep.ridge_unit
    components = ((F / (gam + lam)[:, None]).T @ V.T) if F.shape[1] else np.zeros((1, V.shape[0]))
    return FittedMetric(method, float(alpha), prep.scales, prep.stats.mean, components)


def _check_alpha(alpha: Any) -> float:
    try:
        value = float(alpha)
    except (TypeError, ValueError) as exc:
        raise CoreError("alpha must be a number", "alpha") from exc
    if not math.isfinite(value) or value <= 0.0:
        raise CoreError("alpha must be a finite number greater than 0", "alpha")
    return value


def _scales(stats: BatchStats) -> tuple[np.ndarray, list[str], list[int]]:
    """Pooled within-batch standard deviations; zero-spread features get scale 1."""
    var = np.clip(np.diag(stats.G), 0.0, None) / stats.n
    s = np.sqrt(var)
    ref = np.maximum(np.abs(stats.mean), np.finfo(float).tiny)
    zero_mask = s <= _SPREAD_TOL * ref
    if zero_mask.all():
        raise CoreError(
            "no feature varies within any batch; there is nothing to learn from", "records"
        )
    zero = [int(j) for j in np.flatnonzero(zero_mask)]
    msgs: list[str] = []
    if zero:
        msg = (
            f"feature(s) {', '.join(map(str, zero))} have no spread within batches; "
            "they carry no signal and get scale 1"
        )
        warnings.warn(msg, ZeroSpreadWarning, stacklevel=4)
        msgs.append(msg)
    s = np.where(zero_mask, 1.0, s)
    return s, msgs, zero


def _closed_form(
    gam: np.ndarray, F: np.ndarray, lam: float, rel_tol: float, max_r: int
) -> tuple[np.ndarray, np.ndarray]:
    """``L`` with ``LᵀL = A⁻¹ F Fᵀ A⁻¹`` (A = diag(γ) + λI), square-root form."""
    if F.shape[1] == 0:
        return np.zeros((0, gam.shape[0])), np.zeros(0)
    W = F / (gam + lam)[:, None]
    U, sig, _ = scipy.linalg.svd(W, full_matrices=False)
    return _top((U * sig).T, sig**2, rel_tol, max_r)  # eigenvalues of M: σ²


def _discriminant(
    Q: np.ndarray,
    om: np.ndarray,
    QtF: np.ndarray,
    lam: float,
    gam_max: float,
    rel_tol: float,
    max_r: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Generalised eigenvectors of H against the regularised within-group scatter.

    Whitened by hand — equivalent to ``scipy.linalg.eigh(H, W + λI)`` — so that a
    within-group scatter that is singular up to rounding (perfectly separated groups)
    stays solvable, and in factored form: the whitened between scatter is ``P Pᵀ``
    with ``P = (Ω + λI)^{-1/2} Qᵀ F``, so an SVD of P (r × q) gives its eigenpairs.
    """
    if QtF.shape[1] == 0:
        return np.zeros((0, Q.shape[0])), np.zeros(0)
    floor = max(lam, _NULL_TOL * gam_max)
    inv_sqrt = 1.0 / np.sqrt(np.maximum(om + lam, floor))
    P = QtF * inv_sqrt[:, None]
    E, sig, _ = scipy.linalg.svd(P, full_matrices=False)
    mu = sig**2
    V = Q @ (E * inv_sqrt[:, None])  # columns: vᵀ (W + λI) v = 1
    weights = np.sqrt(mu / (1.0 + mu))
    return _top((V * weights).T, mu, rel_tol, max_r)


def _diagonal(
    G: np.ndarray, H: np.ndarray, lam: float, rel_tol: float
) -> tuple[np.ndarray, np.ndarray]:
    """One row per informative feature (``max_rank`` does not apply)."""
    g, h = np.diag(G), np.clip(np.diag(H), 0.0, None)
    within = np.clip(g - h, 0.0, None)
    weights = np.sqrt(h / (within + max(lam, _NULL_TOL * float(g.max()))))
    w2 = weights**2
    keep = w2 > rel_tol * float(w2.max()) if w2.max() > 0 else np.zeros(w2.shape, bool)
    L = np.diag(weights)[keep]
    return L, weights


def _top(
    rows: np.ndarray, eig: np.ndarray, rel_tol: float, max_r: int
) -> tuple[np.ndarray, np.ndarray]:
    """Rows whose eigenvalue exceeds ``rel_tol`` × the largest, at most ``max_r``."""
    if eig.size == 0 or eig.max() <= 0:
        return rows[:0], eig[:0]
    order = np.argsort(eig)[::-1]
    eig, rows = eig[order], rows[order]
    keep = eig > rel_tol * eig[0]
    keep[max_r:] = False
    return rows[keep], eig[keep]


def _normalise(L: np.ndarray, G: np.ndarray, n: int) -> np.ndarray:
    """Rescale so that mapped records have unit within-batch variance per component."""
    if L.shape[0] == 0:
        return L
    var = float(np.trace(L @ G @ L.T)) / (n * L.shape[0])
    if var <= 0 or not math.isfinite(var):
        return L
    return L / math.sqrt(var)
