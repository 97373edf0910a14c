"""Grouping latency with and without the drift write, measured in the same run.

A metric is fitted on wine batches (Forina et al., scikit-learn's copy) by a real
burst worker; grouping requests of several sizes (records resampled from wine) then
go through the grouping use case against a real Redis, alternating one request with
the drift write (``service.usecases.drift.record``: summary of the request and one
Lua call) and one with it switched off. Each call holds what it hands off and releases
it after the timing, as a request of the web tier does until its answer has been
sent (``service/api/handoff.py``). Target (issue 12): median latency with the write
≤ 1.05 × without.

    .venv/bin/python bench/drift_overhead.py [--quick]

Redis: ``LIKEWISE_REDIS_URL``, else 127.0.0.1:6379/13 if it answers, else an
embedded server for the run.
"""

from __future__ import annotations

import argparse
import os
import secrets
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from bench._redis import clean_up, fit_once, redis_url  # noqa: E402
from service.config import Settings  # noqa: E402
from service.context import Context  # noqa: E402
from service.tables import Table, from_json  # noqa: E402
from service.usecases import drift, groupings, metrics  # noqa: E402
from service.usecases.backlog import BACKLOG  # noqa: E402
from service.usecases.params import group_count  # noqa: E402
from tests.datasets import load_open, make_batches  # noqa: E402

TARGET = 1.05


def _fit(ctx: Context, feats: list[str]) -> None:
    X, y = load_open("wine")
    fit_once(ctx, "bench", feats, make_batches(X, y, 4, np.random.default_rng(0)))


def _time(ctx: Context, table: Table, write: bool, real_record) -> float:
    drift.record = real_record if write else (lambda *args, **kwargs: None)
    BACKLOG.hold()  # as the web tier does: the summary is handed off once the answer is sent
    started = time.perf_counter()
    groupings.group(ctx, "bench", table, k=group_count(3))
    elapsed = time.perf_counter() - started
    # the summary is computed and written after the answer (the backlog's thread): let
    # it finish outside the timing, so the next call starts with an empty backlog
    BACKLOG.flush()
    return elapsed


def main(quick: bool) -> None:
    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    ctx = Context.build(Settings(redis_url=url, key_prefix=prefix, admin_token="bench"))
    X, _ = load_open("wine")
    feats = [f"x{i}" for i in range(X.shape[1])]
    sizes, rounds = ((50,), 5) if quick else ((50, 500, 5000), 40)
    rng = np.random.default_rng(1)
    real_record = drift.record
    rows = []
    try:
        metrics.put_metric(ctx, "bench", feats)
        _fit(ctx, feats)
        for n in sizes:
            table = from_json({"columns": feats,
                               "rows": X[rng.integers(0, len(X), n)].tolist()})
            for write in (True, False):  # warm the version cache and the script
                _time(ctx, table, write, real_record)
            with_w, without = [], []
            for _ in range(rounds):
                with_w.append(_time(ctx, table, True, real_record))
                without.append(_time(ctx, table, False, real_record))
            rows.append((n, statistics.median(without), statistics.median(with_w)))
    finally:
        drift.record = real_record
        clean_up(ctx.redis, prefix, server)
    print(f"Grouping latency with and without the drift write, wine (d = 13), k = 3, "
          f"{rounds} alternating rounds; load average {os.getloadavg()[0]:.2f}")
    print(f"{'records':>8} {'without ms':>11} {'with ms':>9} {'ratio':>7}")
    for n, a, b in rows:
        print(f"{n:>8} {a * 1e3:>11.2f} {b * 1e3:>9.2f} {b / a:>7.3f}")
    worst = max(b / a for _, a, b in rows)
    print(f"target: with ≤ {TARGET} × without at every size (worst {worst:.3f}): "
          f"{'met' if worst <= TARGET else 'NOT met'}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="one size, five rounds")
    main(parser.parse_args().quick)
