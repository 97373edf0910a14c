"""Drift: compact, mergeable summaries of grouped records and their scores.

Nothing here keeps a record. A *summary* of some records seen through a fitted
version holds:

* per-feature count, mean and M2 (sum of squared deviations from the mean), in raw
  units, merged with the pairwise update of Chan, Golub & LeVeque (1979):
  ``δ = m_b − m_a``, ``m = m_a + δ·n_b/n``, ``M2 = M2_a + M2_b + δ²·n_a·n_b/n``;
* a fixed-bin histogram of each feature, of each record's margin and distance in the
  learned space, and of each group's size relative to an even split (``size · k / n``).

Bin layout (:class:`BinLayout`): ``bins`` interior bins of equal ``width`` starting at
``lo``, plus an underflow bin in front (values below ``lo``) and an overflow bin at the
end (values at or above ``lo + bins · width``): ``bins + 2`` counts, in that order.
Interior bin ``i`` (1-based position ``i + 1`` in the counts) holds
``lo + i·width ≤ v < lo + (i+1)·width``.

* features: the version's own standardisation ``(x − mean) / scales`` (the first step
  of the map), ``FEATURE_LAYOUT`` = 12 bins of 0.5 from −3 (so ±3 scales, then the
  two tails);
* margins and distances: 20 bins from 0 to 1.5 × the reference's 95th percentile,
  fixed when the reference is built (:func:`layout_for`);
* group sizes: ``GROUP_LAYOUT`` = 16 bins of 0.25 from 0 (an even split is 1).

A version's reference is its training batches' summary, each batch grouped through
the version itself (in sample), plus the margins and distances of the held-out
batches, each grouped by the map cross-validation fitted without it
(:class:`HeldOut`); live margins and distances are scored against the held-out
ones when a reference has them (:meth:`Reference.margin_reference`).

Scores of live records against the reference: standardised mean shift
``(mean_live − mean_ref) / sd_ref`` per feature; the population stability index over
the fixed bins; the two-sample Kolmogorov–Smirnov statistic from the histograms.
:func:`verdict` turns them into ``quiet`` / ``steady`` / ``shifting`` / ``drifted``
with the thresholds named below.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats as sps

from .errors import CoreError
from .grouping import Grouping
from .metric import FittedMetric

# ---- thresholds --------------------------------------------------------------------
# PSI 0.1 / 0.25: a rule of thumb from credit-scoring practice, usually attributed to
# Siddiqi, "Credit Risk Scorecards" (Wiley, 2006) — from memory, not checked; it has no
# statistical derivation. Applied to the PSI in excess of its sampling noise
# (:func:`psi_noise`).
PSI_SHIFTING = 0.1
PSI_DRIFTED = 0.25
# |mean shift| in reference standard deviations: our own choice, common practice, no
# source (0.5 sd is a "medium" effect in Cohen's scale of effect sizes, from memory)
SHIFT_SHIFTING = 0.5
SHIFT_DRIFTED = 1.0
# fewer live records than this in the window: too few to judge (verdict "quiet");
# common practice, no source
MIN_RECORDS = 30
# small-count floor of PSI: half a record is added to every bin of both sides before
# shares are taken, so an empty bin gives a finite term and sparse bins do not inflate
# the index (an additive, Jeffreys-style pseudo-count; common practice, no source)
PSI_PSEUDOCOUNT = 0.5

VERDICTS = ("quiet", "steady", "shifting", "drifted")  # in order of concern


# ---- mergeable moments ---------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Moments:
    """Count, per-feature mean and M2 of some records (raw units)."""

    count: int
    mean: np.ndarray  # (d,)
    m2: np.ndarray  # (d,) Σ (x − mean)²

    @classmethod
    def zeros(cls, n_features: int) -> Moments:
        return cls(0, np.zeros(n_features), np.zeros(n_features))

    @classmethod
    def of(cls, X: np.ndarray) -> Moments:
        """Moments of the rows of ``X`` (two passes: mean, then squared deviations)."""
        X = np.asarray(X, dtype=float)
        if X.shape[0] == 0:
            return cls.zeros(X.shape[1])
        mean = X.mean(axis=0)
        return cls(int(X.shape[0]), mean, ((X - mean) ** 2).sum(axis=0))

    def merge(self, other: Moments) -> Moments:
        """The moments of both record sets (Chan, Golub & LeVeque 1979)."""
        if other.count == 0:
            return self
        if self.count == 0:
            return other
        n = self.count + other.count
        delta = other.mean - self.mean
        mean = self.mean + delta * (other.count / n)
        m2 = self.m2 + other.m2 + delta**2 * (self.count * other.count / n)
        return Moments(n, mean, m2)

    @property
    def variance(self) -> np.ndarray:
        """Population variance (``ddof=0``); 0 with no records."""
        return self.m2 / self.count if self.count else np.zeros_like(self.m2)

    def to_dict(self) -> dict[str, Any]:
        return {"count": self.count, "mean": self.mean.tolist(), "m2": self.m2.tolist()}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Moments:
        return cls(int(data["count"]), np.asarray(data["mean"], dtype=float),
                   np.asarray(data["m2"], dtype=float))


def merge_all(parts: Iterable[Moments], n_features: int) -> Moments:
    out = Moments.zeros(n_features)
    for part in parts:
        out = out.merge(part)
    return out


# ---- fixed bins ----------------------------------------------------------------------
@dataclass(frozen=True)
class BinLayout:
    """``bins`` bins of ``width`` from ``lo``, with underflow and overflow bins."""

    lo: float
    width: float
    bins: int

    def __post_init__(self) -> None:
        if not (np.isfinite(self.lo) and np.isfinite(self.width) and self.width > 0
                and self.bins >= 1):
            raise CoreError("a bin layout needs a finite lo, a width > 0 and bins ≥ 1",
                            "layout")

    @property
    def size(self) -> int:
        """Number of counts: interior bins plus underflow and overflow."""
        return self.bins + 2

    @property
    def edges(self) -> np.ndarray:
        """The ``bins + 1`` interior edges (the outer bins are open-ended)."""
        return self.lo + self.width * np.arange(self.bins + 1)

    def positions(self, values: np.ndarray) -> np.ndarray:
        """Count position of each value: 0 underflow, 1..bins interior, bins+1 overflow."""
        with np.errstate(invalid="ignore", over="ignore"):
            raw = np.floor((np.asarray(values, dtype=float) - self.lo) / self.width)
        return (np.clip(raw, -1, self.bins) + 1).astype(np.int64)

    def count(self, values: np.ndarray) -> np.ndarray:
        """Counts of ``values`` (1-D) in this layout."""
        return np.bincount(self.positions(values).ravel(), minlength=self.size)

    def count_columns(self, V: np.ndarray) -> np.ndarray:
        """Counts of each column of ``V`` (n × d) → (d × size), in one bincount."""
        V = np.asarray(V, dtype=float)
        d = V.shape[1]
        pos = self.positions(V) + self.size * np.arange(d)
        return np.bincount(pos.ravel(), minlength=d * self.size).reshape(d, self.size)

    def to_dict(self) -> dict[str, Any]:
        return {"lo": self.lo, "width": self.width, "bins": self.bins}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> BinLayout:
        return cls(float(data["lo"]), float(data["width"]), int(data["bins"]))


FEATURE_LAYOUT = BinLayout(-3.0, 0.5, 12)
GROUP_LAYOUT = BinLayout(0.0, 0.25, 16)
POSITIVE_BINS = 20


def layout_for(values: np.ndarray, bins: int = POSITIVE_BINS) -> BinLayout:
    """Layout for a non-negative quantity (margins, distances) from reference values:
    ``bins`` bins from 0 to 1.5 × their 95th percentile (width 1 when that is 0)."""
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    top = 1.5 * float(np.percentile(v, 95)) if v.size else 0.0
    return BinLayout(0.0, top / bins if top > 0 else 1.0, bins)


# ---- scores --------------------------------------------------------------------------
def _shares(counts: np.ndarray) -> np.ndarray:
    counts = np.asarray(counts, dtype=float)
    total = counts.sum(axis=-1, keepdims=True)
    return counts / np.where(total > 0, total, 1.0)


def psi(reference: np.ndarray, live: np.ndarray, pseudo: float = PSI_PSEUDOCOUNT
        ) -> np.ndarray:
    """Population stability index ``Σ_b (p_b − q_b) · ln(p_b / q_b)`` over the last
    axis: ``q`` reference shares, ``p`` live shares, each taken after adding ``pseudo``
    records to every bin (with ``pseudo=0`` an empty bin on one side gives ``inf``)."""
    q = _shares(np.asarray(reference, dtype=float) + pseudo)
    p = _shares(np.asarray(live, dtype=float) + pseudo)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = (p - q) * np.log(p / q)
    return np.where(p == q, 0.0, terms).sum(axis=-1)


def psi_noise(reference: np.ndarray, live: np.ndarray) -> np.ndarray:
    """The PSI expected between two samples of one distribution, over the last axis:
    ``(B − 1)(1/n + 1/m)`` with ``B`` the bins either side uses.

    To second order PSI is ``Σ (p − q)² / q``, which is ``(1/n + 1/m)`` times the
    two-sample χ² statistic, itself ≈ χ² with ``B − 1`` degrees of freedom when
    nothing changed (the derivation is ours; the χ² approximation is the textbook one).
    """
    reference, live = np.asarray(reference, float), np.asarray(live, float)
    n, m = live.sum(axis=-1), reference.sum(axis=-1)
    used = ((reference + live) > 0).sum(axis=-1)
    with np.errstate(divide="ignore"):
        noise = np.maximum(used - 1, 0) * (1.0 / n + 1.0 / m)
    return np.where((n > 0) & (m > 0), noise, 0.0)


def ks_from_counts(reference: np.ndarray, live: np.ndarray) -> np.ndarray:
    """Two-sample Kolmogorov–Smirnov statistic from histograms over the last axis:
    the largest gap between the two empirical CDFs at the bin edges.

    It is a lower bound of the statistic of the raw values, short of it by at most the
    largest share one bin holds on either side (the CDFs are only seen at edges).
    """
    gap = np.abs(np.cumsum(_shares(reference), axis=-1) - np.cumsum(_shares(live), axis=-1))
    return gap.max(axis=-1)


def ks_pvalue(statistic: float, n: int, m: int) -> float:
    """Asymptotic two-sided p-value of a two-sample KS statistic (Kolmogorov's
    distribution, ``scipy.stats.kstwobign``). Binned statistics are lower bounds, so
    this p-value is conservative."""
    if n <= 0 or m <= 0:
        return 1.0
    return float(sps.kstwobign.sf(statistic * np.sqrt(n * m / (n + m))))


def mean_shift(reference: Moments, live: Moments) -> np.ndarray:
    """``(mean_live − mean_ref) / sd_ref`` per feature (0 for a reference sd of 0 and
    equal means, ±inf when a constant feature moved)."""
    sd = np.sqrt(reference.variance)
    delta = live.mean - reference.mean
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(sd > 0, delta / np.where(sd > 0, sd, 1.0),
                       np.where(delta == 0, 0.0, np.sign(delta) * np.inf))
    return out


def verdict(count: int, psi_excess: float, shift: float | None = None) -> str:
    """``quiet`` below ``MIN_RECORDS``; else ``drifted`` / ``shifting`` when the PSI in
    excess of its noise or the |mean shift| reaches a threshold; else ``steady``."""
    if count < MIN_RECORDS:
        return "quiet"
    s = abs(shift) if shift is not None else 0.0
    if psi_excess >= PSI_DRIFTED or s >= SHIFT_DRIFTED:
        return "drifted"
    if psi_excess >= PSI_SHIFTING or s >= SHIFT_SHIFTING:
        return "shifting"
    return "steady"


def worst(verdicts: Iterable[str]) -> str:
    return max(verdicts, key=VERDICTS.index, default="quiet")


# ---- summaries -----------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class Summary:
    """Moments and histograms of some records seen through one version."""

    moments: Moments
    features: np.ndarray  # (d, FEATURE_LAYOUT.size) counts of the standardised values
    margins: np.ndarray  # (margin layout size,) counts of finite margins
    distances: np.ndarray  # (distance layout size,)
    groups: np.ndarray  # (GROUP_LAYOUT.size,) counts of groups by size · k / n

    def merge(self, other: Summary) -> Summary:
        return Summary(self.moments.merge(other.moments), self.features + other.features,
                       self.margins + other.margins, self.distances + other.distances,
                       self.groups + other.groups)

    def to_dict(self) -> dict[str, Any]:
        return {"moments": self.moments.to_dict(),
                **{f: getattr(self, f).tolist()
                   for f in ("features", "margins", "distances", "groups")}}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Summary:
        arr = {f: np.asarray(data[f], dtype=np.int64)
               for f in ("features", "margins", "distances", "groups")}
        return cls(Moments.from_dict(data["moments"]), **arr)


@dataclass(frozen=True)
class Layouts:
    """The bins of one version's summaries (features and groups are fixed)."""

    margins: BinLayout
    distances: BinLayout

    def to_dict(self) -> dict[str, Any]:
        return {"margins": self.margins.to_dict(), "distances": self.distances.to_dict()}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Layouts:
        return cls(BinLayout.from_dict(data["margins"]), BinLayout.from_dict(data["distances"]))


def empty_summary(n_features: int, layouts: Layouts) -> Summary:
    return Summary(Moments.zeros(n_features),
                   np.zeros((n_features, FEATURE_LAYOUT.size), dtype=np.int64),
                   np.zeros(layouts.margins.size, dtype=np.int64),
                   np.zeros(layouts.distances.size, dtype=np.int64),
                   np.zeros(GROUP_LAYOUT.size, dtype=np.int64))


def summarise(metric: FittedMetric, X: np.ndarray, grouping: Grouping, layouts: Layouts
              ) -> Summary:
    """The summary of records ``X`` (already checked) as ``metric`` grouped them."""
    X = np.asarray(X, dtype=float)
    with np.errstate(over="ignore", invalid="ignore"):
        Zs = metric.standardise(X)
    margins = np.asarray(grouping.margins, dtype=float)
    sizes = np.asarray(grouping.sizes, dtype=float)
    share = sizes * len(sizes) / max(sizes.sum(), 1.0)
    return Summary(Moments.of(X), FEATURE_LAYOUT.count_columns(Zs),
                   layouts.margins.count(margins[np.isfinite(margins)]),
                   layouts.distances.count(grouping.distances), GROUP_LAYOUT.count(share))


@dataclass(frozen=True, eq=False)
class HeldOut:
    """Margins and distances of held-out batches, each grouped by a map fitted
    without it (``MetricSelector.heldout_groupings_``), in a version's bins."""

    margins: np.ndarray  # (margin layout size,) counts of finite margins
    distances: np.ndarray  # (distance layout size,)
    batches: int  # held-out batches counted

    def to_dict(self) -> dict[str, Any]:
        return {"margins": self.margins.tolist(), "distances": self.distances.tolist(),
                "batches": self.batches}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> HeldOut:
        return cls(np.asarray(data["margins"], dtype=np.int64),
                   np.asarray(data["distances"], dtype=np.int64), int(data["batches"]))


@dataclass(frozen=True, eq=False)
class Reference:
    """The training batches as seen through a version: layouts, their summary (each
    batch grouped through the version itself: in sample) and, for versions fitted
    since held-out references exist, the held-out batches' margins and distances
    (``heldout``; None in older references)."""

    layouts: Layouts
    summary: Summary
    heldout: HeldOut | None = None

    def to_dict(self) -> dict[str, Any]:
        out = {"layouts": self.layouts.to_dict(), "summary": self.summary.to_dict()}
        if self.heldout is not None:
            out["heldout"] = self.heldout.to_dict()
        return out

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Reference:
        heldout = data.get("heldout")
        return cls(Layouts.from_dict(data["layouts"]), Summary.from_dict(data["summary"]),
                   HeldOut.from_dict(heldout) if heldout is not None else None)

    def margin_reference(self) -> tuple[np.ndarray, np.ndarray, str]:
        """The margin and distance counts live records are scored against, and which:
        ``held_out`` when the reference has them, else ``in_sample``."""
        if self.heldout is not None and self.heldout.margins.sum() > 0:
            return self.heldout.margins, self.heldout.distances, "held_out"
        return self.summary.margins, self.summary.distances, "in_sample"


def build_reference(metric: FittedMetric, batches: Sequence[tuple[np.ndarray, Grouping]],
                    heldout: Sequence[Grouping] = ()) -> Reference:
    """The reference of a version from its training batches, each grouped through it
    (``(X, grouping)`` pairs): the margin and distance bins are set from them. The
    ``heldout`` groupings (each batch grouped by a map fitted without it) are counted
    in the same bins; none gives a reference without held-out counts."""
    margins = np.concatenate([np.asarray(g.margins, float) for _, g in batches])
    distances = np.concatenate([np.asarray(g.distances, float) for _, g in batches])
    layouts = Layouts(layout_for(margins), layout_for(distances))
    total = empty_summary(metric.n_features, layouts)
    for X, g in batches:
        total = total.merge(summarise(metric, X, g, layouts))
    held = None
    if heldout:
        m = np.concatenate([np.asarray(g.margins, float) for g in heldout])
        held = HeldOut(layouts.margins.count(m[np.isfinite(m)]),
                       layouts.distances.count(
                           np.concatenate([np.asarray(g.distances, float) for g in heldout])),
                       len(heldout))
    return Reference(layouts, total, held)


def _scores(ref: np.ndarray, live: np.ndarray, count: int, shift: float | None = None
            ) -> dict[str, Any]:
    """Scores of one histogram (None throughout when no live value was counted)."""
    out: dict[str, Any] = dict.fromkeys(("psi", "psi_excess", "ks", "ks_pvalue"))
    if live.sum() > 0:
        value = float(psi(ref, live))
        ks = float(ks_from_counts(ref, live))
        out.update(psi=value, psi_excess=max(value - float(psi_noise(ref, live)), 0.0),
                   ks=ks, ks_pvalue=ks_pvalue(ks, int(live.sum()), int(ref.sum())))
    if shift is not None:
        out["mean_shift"] = shift if np.isfinite(shift) and count > 0 else None
    out["verdict"] = verdict(count, out["psi_excess"] or 0.0, shift if count > 0 else None)
    return out


def compare(reference: Reference, live: Summary, features: Sequence[str]) -> dict[str, Any]:
    """Scores of ``live`` against ``reference``: per feature (by name), margins,
    distances and group sizes, the overall verdict and the features it flags.

    Margins and distances are scored against the held-out batches' when the
    reference has them (live records were never in the training set, so margins of
    batches grouped by a map fitted without them are what to expect; in-sample
    margins tend to be wider, since the map was fitted to separate those very groups),
    else against the in-sample ones; ``reference`` in their scores says which.

    The overall verdict is the worst of the features' verdicts. Margins and distances
    get a verdict of their own that does not enter it: how well records separate
    depends on k and on which groups a request holds, which analysts' batches need not
    share with live traffic. Group sizes are reported, not judged.
    """
    ref = reference.summary
    n = live.moments.count
    shifts = mean_shift(ref.moments, live.moments)
    sd = np.sqrt(ref.moments.variance)
    per_feature = {}
    for j, name in enumerate(features):
        s = _scores(ref.features[j], live.features[j], n, float(shifts[j]))
        s["mean"] = float(live.moments.mean[j]) if n else None
        s["reference_mean"] = float(ref.moments.mean[j])
        s["reference_sd"] = float(sd[j])
        per_feature[name] = s
    ref_margins, ref_distances, kind = reference.margin_reference()
    margins = {**_scores(ref_margins, live.margins, int(live.margins.sum())), "reference": kind}
    distances = {**_scores(ref_distances, live.distances, n), "reference": kind}
    groups = _scores(ref.groups, live.groups, int(live.groups.sum()))
    del groups["verdict"]
    flagged = [f for f, s in per_feature.items() if s["verdict"] in ("shifting", "drifted")]
    overall = worst(s["verdict"] for s in per_feature.values()) if n >= MIN_RECORDS \
        else "quiet"
    return {"verdict": overall, "records": n, "flagged": flagged, "features": per_feature,
            "margins": margins, "distances": distances, "group_sizes": groups}


THRESHOLDS = {
    "psi_shifting": PSI_SHIFTING, "psi_drifted": PSI_DRIFTED,
    "mean_shift_shifting": SHIFT_SHIFTING, "mean_shift_drifted": SHIFT_DRIFTED,
    "min_records": MIN_RECORDS,
}

__all__ = ["FEATURE_LAYOUT", "GROUP_LAYOUT", "THRESHOLDS", "VERDICTS", "BinLayout",
           "HeldOut", "Layouts", "Moments", "Reference", "Summary", "build_reference", "compare",
           "empty_summary", "ks_from_counts", "ks_pvalue", "layout_for", "mean_shift",
           "merge_all", "psi", "psi_noise", "summarise", "verdict", "worst"]
