"""Few-batch selection: the default rule against the naive arg-max, held out.

Each problem: 3–5 small labelled batches (groups of 5–15) from a fitting pool of an
open data set; the selector picks learner and α by cross-validation over batches
with each rule; the picked metric is judged by ARI (Hubert & Arabie 1985) at the
true k on 15 batches from a disjoint pool. Data: scikit-learn's bundled digits
(UCI, Alpaydin & Kaynak), wine (Forina et al.), breast cancer Wisconsin (Wolberg et
al.), iris (Fisher 1936) and ``palmerpenguins`` (Gorman, Williams & Fraser 2014).

    .venv/bin/python bench/few_batches.py [seeds per data set, default 6]

Seeds start at 1000: the rule was designed on other seeds, these check it afresh.
"""

from __future__ import annotations

import math
import sys
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tests.datasets import few_batch_trial  # noqa: E402

SETS = ("digits", "wine", "breast_cancer", "iris", "penguins")


def main(n_seeds: int = 6) -> None:
    warnings.simplefilter("ignore")
    rows: dict[str, list[dict[str, float]]] = {}
    start = time.perf_counter()
    for name in SETS:
        rows[name] = [few_batch_trial(name, 1000 + s) for s in range(n_seeds)]
    print(f"{'data set':<14} {'one_se':>7} {'argmax':>7} {'euclid':>7} {'one_se−argmax':>14}")
    diffs: list[float] = []
    for name, trials in rows.items():
        mean = {k: sum(t[k] for t in trials) / len(trials) for k in trials[0]}
        d = [t["one_se"] - t["argmax"] for t in trials]
        diffs += d
        print(
            f"{name:<14} {mean['one_se']:7.3f} {mean['argmax']:7.3f} "
            f"{mean['euclidean']:7.3f} {sum(d) / len(d):+14.3f}"
        )
    m = sum(diffs) / len(diffs)
    se = math.sqrt(sum((x - m) ** 2 for x in diffs) / (len(diffs) - 1) / len(diffs))
    wins = sum(x > 0 for x in diffs)
    losses = sum(x < 0 for x in diffs)
    print(
        f"\none_se − argmax over {len(diffs)} problems: {m:+.3f} ± {se:.3f} (paired s.e.), "
        f"{wins} better, {losses} worse; {time.perf_counter() - start:.0f} s"
    )


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 6)
