"""Invented demo scenario: cold-chain shipments grouped by the kind of temperature excursion.

A logistics team's quality analysts read the temperature logger of every shipment
that arrived out of range and file it under a cause: the reefer door was left open
at a stop, the compressor failed, the load was not pre-cooled, or the logger itself
drifted. Each delivery week they hand-group that week's flagged shipments — a
labelled batch. The logger summaries carry the cause, but each record also carries
trip facts (distance, stops, pallets, outside temperature) whose spread is large and
which say nothing about the cause: plain k-means is dominated by them.

All numbers here are made up for the demo; nothing is measured data.
"""

from __future__ import annotations

import numpy as np

FEATURES = [
    "peak_temp_c",
    "minutes_above_8c",
    "rise_rate_c_per_h",
    "recovery_minutes",
    "excursion_count",
    "trip_km",
    "stops",
    "pallets",
    "outside_temp_c",
    "logger_age_days",
]

CAUSES = ["door-open", "compressor-failure", "no-pre-cooling", "logger-drift"]

# Mean logger summary per cause (first five features); trip facts are cause-free.
_CAUSE_MEANS = np.array(
    [
        # peak, minutes>8, rise rate, recovery, count
        [10.5, 25.0, 6.0, 20.0, 4.0],  # door-open: short sharp repeated spikes
        [14.0, 210.0, 1.5, 200.0, 1.0],  # compressor-failure: one long slow climb
        [11.5, 70.0, 0.6, 60.0, 1.0],  # no-pre-cooling: warm start, slow pull-down
        [9.0, 120.0, 0.2, 5.0, 1.0],  # logger-drift: flat offset, no dynamics
    ]
)
_CAUSE_SPREAD = np.array([1.4, 40.0, 0.9, 35.0, 0.8])
_TRIP_MEAN = np.array([650.0, 9.0, 22.0, 14.0, 400.0])
_TRIP_SPREAD = np.array([380.0, 5.0, 9.0, 9.0, 260.0])


def make_week(rng: np.random.Generator, n_causes: int | None = None):
    """One week's labelled batch: (records as list of dicts, cause per record)."""
    if n_causes is None:
        n_causes = int(rng.integers(2, len(CAUSES) + 1))
    causes = rng.choice(len(CAUSES), size=n_causes, replace=False)
    sizes = rng.integers(6, 30, size=n_causes)
    rows, labels = [], []
    for cause, size in zip(causes, sizes, strict=True):
        logger = _CAUSE_MEANS[cause] + rng.normal(size=(size, 5)) * _CAUSE_SPREAD
        trip = _TRIP_MEAN + rng.normal(size=(size, 5)) * _TRIP_SPREAD
        rows.append(np.hstack([logger, np.abs(trip)]))
        labels.extend([CAUSES[cause]] * int(size))
    X = np.vstack(rows)
    order = rng.permutation(len(labels))
    X = np.round(X[order], 2)
    labels = [labels[i] for i in order]
    return X, labels


def make_weeks(n_weeks: int, seed: int = 7):
    rng = np.random.default_rng(seed)
    return [make_week(rng) for _ in range(n_weeks)]
