"""The held-out budget of cross-validation (private; docs/method.md, "Held-out budget").

The statistics are summed over every batch, so a fold's fit costs O(d³) however many
batches there are; the held-out scoring does not: every scored batch is grouped by
k-means once per candidate. With many batches, cross-validation scores a sample of
the held-out batches, just large enough that the sampling error of the mean held-out
ARI is within a tolerance. Every batch stays in the statistics.

- Unit and population: a batch, among the ``N`` batches of the fit.
- Allocation: the folds of the first repetition share the sample in proportion to
  the batches they hold out (largest remainder); a later repetition scores the
  sampled batches it holds out, so a batch is either scored in every repetition or
  in none.
- Strata: a fold's held-out batches ordered by (number of expert groups, records) —
  the two things that move a batch's ARI most — ties in a random order, cut into as
  many contiguous blocks as batches to draw, one batch drawn from each block
  (stratified sampling, one draw per stratum). Keys come from the batches'
  statistics, not from their records.
- Size: a pilot of ``min_batches``, then rounds: ``s`` is the largest standard
  deviation of per-batch ARI over the candidates; the next size is the ``m`` at which
  ``s/√m · √(1 − m/N)`` reaches the tolerance (``n₀/(1 + n₀/N)`` with
  ``n₀ = (s/tol)²``), drawn the same way from each fold's unscored batches; until the
  error is within the tolerance or ``max_batches`` are scored.
- The error reported, :func:`sampling_se`: the standard error of a mean of ``m`` of
  ``N`` values drawn without replacement, ``s/√m · √(1 − m/N)`` (zero when every
  batch is scored). With proportional allocation over strata the stratified mean's
  variance is at most this (Cochran, *Sampling Techniques*, 3rd ed., ch. 5; cited
  from memory), so the figure is on the safe side.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

MAX_ROUNDS = 4  # pilot + three top-ups; each top-up grows the sample by ≥ GROWTH
GROWTH = 1.25


@dataclass(frozen=True)
class Budget:
    """``tolerance`` None scores every held-out batch."""

    tolerance: float | None
    min_batches: int
    max_batches: int

    def applies(self, n_batches: int) -> bool:
        return self.tolerance is not None and n_batches > self.min_batches


def allocate(m: int, sizes: Sequence[int]) -> list[int]:
    """``m`` draws split over folds of ``sizes`` held-out batches, in proportion
    (largest remainder); a fold never gets more than it holds."""
    sizes_arr = np.asarray(sizes, dtype=float)
    exact = m * sizes_arr / sizes_arr.sum()
    share = np.floor(exact).astype(int)
    short = int(m - share.sum())
    if short > 0:
        share[np.argsort(-(exact - share), kind="stable")[:short]] += 1
    return np.minimum(share, np.asarray(sizes, dtype=int)).tolist()


def stratified_draw(
    pool: Sequence[int], keys: np.ndarray, m: int, rng: np.random.Generator
) -> list[int]:
    """``m`` of the batches in ``pool``, one from each of ``m`` contiguous blocks of
    the pool ordered by ``keys`` rows (groups, records; ties in a random order)."""
    pool_arr = np.asarray(pool, dtype=int)
    if m >= pool_arr.size:
        return sorted(pool_arr.tolist())
    if m <= 0:
        return []
    k = keys[pool_arr]
    order = pool_arr[np.lexsort((rng.permutation(pool_arr.size), k[:, 1], k[:, 0]))]
    return sorted(int(block[rng.integers(block.size)]) for block in np.array_split(order, m))


def needed(spread: float, tolerance: float, n_batches: int) -> int:
    """Batches to score so that ``spread/√m · √(1 − m/N)`` ≤ ``tolerance``."""
    if spread <= 0:
        return 0
    n0 = (spread / tolerance) ** 2
    return math.ceil(n0 / (1.0 + n0 / n_batches))


def sampling_se(values: np.ndarray, n_batches: int) -> float:
    """Standard error of the mean of ``values`` (one per scored batch) as an estimate
    of the mean over all ``n_batches`` (without replacement; 0 when all are scored)."""
    m = int(np.size(values))
    if m < 2 or m >= n_batches:
        return 0.0
    return float(np.std(values, ddof=1) / math.sqrt(m) * math.sqrt(1.0 - m / n_batches))
