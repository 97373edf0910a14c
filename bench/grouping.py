"""Grouping through the API against k-means in process on the same mapped records.

A metric is fitted on digits batches (UCI optical digits, scikit-learn's copy; the
first 20 pixel features that vary), then records drawn from the data set are grouped
through the Flask app in process (real Redis; JSON in and out, a call timed until the
answer's bytes are in hand) and, as the reference, by the core's ``group_records`` on
the same matrix, in the same run. Targets (issue 9):
1,000 × 20 ≤ 1.5 × the reference, 100,000 × 20 ≤ 1.2 ×, and ``"k": "auto"`` ≤ 2 × a
fixed k through the API. Beside them, the floor no JSON body goes under: the
reference plus the bare decode of the body into a matrix (``jsonio.number_rows``, the
service's own decoder for number tables: no envelope checks, no table), as a ratio.

The auto target is about the cost of choosing k, so it is judged against a fixed-k
grouping at the k that auto chose (read from the answer's ``"k"``, timed in the same
turns): k-means at a larger k costs more by itself, and against k = 5 that cost would
be charged to the choice. The ratio against k = 5 is printed beside it.

    .venv/bin/python bench/grouping.py [--quick]
"""

from __future__ import annotations

import argparse
import json
import os
import secrets
import statistics
import sys
import time
from collections.abc import Callable
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from bench._redis import clean_up, fit_once, redis_url, verdict  # noqa: E402
from service.api import create_app, jsonio  # noqa: E402
from service.config import Settings  # noqa: E402
from service.context import Context  # noqa: E402
from service.core import FittedMetric, group_records  # noqa: E402
from service.usecases import metrics, versions  # noqa: E402
from service.usecases.params import version_number  # noqa: E402
from tests.datasets import load_open, make_batches  # noqa: E402

K = 5


def _interleaved(fns: dict[str, Callable[[], object]], repeats: int) -> dict[str, float]:
    """Median seconds of each function, the functions taking turns within every repeat
    so a change of the machine's load hits them all alike."""
    times: dict[str, list[float]] = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            started = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - started)
    return {name: statistics.median(t) for name, t in times.items()}


def main(quick: bool) -> None:
    url, server = redis_url()
    prefix = f"lwb-{secrets.token_hex(4)}"
    settings = Settings(redis_url=url, key_prefix=prefix, admin_token="bench",
                        max_request_bytes=256 * 1024 * 1024)
    ctx = Context.build(settings)
    X, y = load_open("digits")
    X = X[:, np.argsort(X.std(axis=0))[::-1][:20]]  # the 20 most varied pixels
    feats = [f"px{j:02d}" for j in range(X.shape[1])]
    sizes = (1000,) if quick else (1000, 100_000)
    repeats = {1000: 3 if quick else 41, 100_000: 7}
    rows = []
    try:
        metrics.put_metric(ctx, "bench", feats)
        fit_once(ctx, "bench", feats, make_batches(X, y, 6, np.random.default_rng(0)))
        first = versions.get_version(ctx, "bench", version_number(1))
        fitted = FittedMetric.from_dict(first["metric"])
        client = create_app(context=ctx).test_client()
        headers = {"Authorization": "Bearer bench"}
        rng = np.random.default_rng(1)
        for n in sizes:
            Xn = X[rng.integers(0, len(X), n)] + rng.normal(0, 0.01, (n, X.shape[1]))
            # bytes, as a client sends them (a str would be encoded on every call)
            bodies = {k: json.dumps({"columns": feats, "rows": Xn.tolist(), "k": k}).encode()
                      for k in (K, "auto")}

            def api(k, bodies=bodies) -> bytes:
                """The answer's bytes: decoding them is the client's work (the standard
                library's ``json.loads`` of a 100,000-record answer takes ~70 ms)."""
                resp = client.post("/v1/metrics/bench/groupings", data=bodies[k],
                                   content_type="application/json", headers=headers)
                assert resp.status_code == 200, resp.get_data(as_text=True)[:300]
                return resp.get_data()

            api(K)  # warm the version cache
            chosen = int(json.loads(api("auto"))["k"])  # the k auto chooses on these records
            bodies[chosen] = json.dumps(
                {"columns": feats, "rows": Xn.tolist(), "k": chosen}).encode()
            raw = bodies[K]
            t = _interleaved({"ref": lambda Xn=Xn: group_records(fitted, Xn, k=K),
                              "fixed": lambda: api(K), "auto": lambda: api("auto"),
                              "at_chosen": lambda chosen=chosen: api(chosen),
                              "decode": lambda raw=raw: jsonio.number_rows(raw)}, repeats[n])
            rows.append((n, t["ref"], t["fixed"], t["auto"], t["decode"], chosen,
                         t["at_chosen"]))
    finally:
        clean_up(ctx.redis, prefix, server)
    print(f"Grouping {K} groups through the API (JSON in and out) against group_records in "
          f"process, median of {', '.join(str(repeats[n]) for n in sizes)} turns (load average "
          f"{os.getloadavg()[0]:.2f})")
    print(f"{'records':>9} {'in process s':>13} {'API k=5 s':>10} {'ratio':>6} "
          f"{'API auto s':>11} {'auto/k=5':>9} {'decode alone s':>15} {'floor':>6} "
          f"{'auto chose':>11} {'API that k s':>13} {'auto/that k':>12}")
    for n, ref, fixed, auto, decode, chosen, at_chosen in rows:
        print(f"{n:>9,} {ref:>13.4f} {fixed:>10.4f} {fixed / ref:>6.2f} {auto:>11.4f} "
              f"{auto / fixed:>9.2f} {decode:>15.4f} {(ref + decode) / ref:>6.2f} "
              f"{'k=' + str(chosen):>11} {at_chosen:>13.4f} {auto / at_chosen:>12.2f}")
    for n, ref, fixed, auto, _, chosen, at_chosen in rows:
        limit = 1.5 if n <= 1000 else 1.2
        print(f"target: {n:,} × 20 through the API ≤ {limit} × in process: "
              f"{fixed / ref:.2f} — {verdict(fixed / ref <= limit)}; k auto ≤ 2 × fixed k "
              f"(at the chosen k={chosen}): {auto / at_chosen:.2f} — "
              f"{verdict(auto / at_chosen <= 2)} (against k={K}: {auto / fixed:.2f})")


if __name__ == "__main__":
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    main(parser.parse_args().quick)
