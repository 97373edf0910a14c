"""Which training margins do unseen records' margins resemble: ``.venv/bin/python
bench/drift_reference.py`` (about a minute; ``--quick``: one data set, one draw).

A version's drift reference holds its training batches' margins twice: in sample
(each batch grouped through the version, which was fitted on it) and held out (each
batch grouped by the map cross-validation fitted without it,
``MetricSelector.heldout_groupings_``). Live margins are scored against the held-out
ones. Here, per open data set (scikit-learn's bundled wine, Forina et al.; iris,
Fisher 1936; breast cancer Wisconsin, Wolberg et al.; UCI optical digits, Alpaydin &
Kaynak; the ``palmerpenguins`` package, Gorman, Williams & Fraser 2014), the records
are split by class into two disjoint halves (``tests.datasets.split_pool``);
``--batches`` labelled batches of one half train the version, ``--live`` batches of
the other half (``tests.datasets.make_batches``, the same recipe) are grouped by it at
their true k, as a grouping request would, and their margins are compared with both
references by the PSI in the version's bins (``service.core.drift.psi``, the score
drift watch gives). Target (issue 12's premise): the held-out reference is the
closer one (lower PSI) in more than half of the draws. One run; nothing here is a
test.
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.core import MetricSelector, group_records  # noqa: E402
from service.core.drift import build_reference, psi  # noqa: E402
from tests.datasets import load_open, make_batches, split_pool  # noqa: E402

DATA_SETS = ("wine", "iris", "breast_cancer", "digits", "penguins")


def draw(name: str, seed: int, n_train: int, n_live: int) -> dict[str, float]:
    X, y = load_open(name)
    rng = np.random.default_rng(seed)
    (Xf, yf), (Xl, yl) = split_pool(X, y, rng)
    train = make_batches(Xf, yf, n_train, rng, disjoint=False)
    live = make_batches(Xl, yl, n_live, rng, disjoint=False)
    sel = MetricSelector(random_state=seed).fit(train)
    m = sel.metric_
    seen = [(Xb, group_records(m, Xb, len(np.unique(yb)))) for Xb, yb in train]
    ref = build_reference(m, seen, list(sel.heldout_groupings_.values()))
    margins = np.concatenate([group_records(m, Xb, len(np.unique(yb))).margins
                              for Xb, yb in live])
    counts = ref.layouts.margins.count(margins[np.isfinite(margins)])
    inside = np.concatenate([g.margins for _, g in seen])
    held = np.concatenate([g.margins for g in sel.heldout_groupings_.values()])
    return {"psi_in": float(psi(ref.summary.margins, counts)),
            "psi_held": float(psi(ref.heldout.margins, counts)),
            "med_in": float(np.median(inside[np.isfinite(inside)])),
            "med_held": float(np.median(held[np.isfinite(held)])),
            "med_live": float(np.median(margins[np.isfinite(margins)])),
            "rank": m.rank, "method": m.method}


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="wine only, one draw")
    ap.add_argument("--batches", type=int, nargs="+", default=[6, 20],
                    help="training batches per draw (one table row each)")
    ap.add_argument("--live", type=int, default=30, help="live batches per draw")
    ap.add_argument("--seeds", type=int, default=3, help="draws per data set")
    args = ap.parse_args(argv)
    names = ("wine",) if args.quick else DATA_SETS
    seeds = range(1 if args.quick else args.seeds)
    print("\nLive margins against the two training references (PSI in the version's "
          "bins; lower is closer; one run)")
    print(f"{'data set':<14}{'batches':>8}{'draw':>5}{'rank':>5}{'PSI in':>8}{'PSI held':>9}"
          f"{'held/in':>8}{'median in':>10}{'held':>7}{'live':>7}  closer")
    closer = total = 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # constant pixels in digits: zero spread
        for name in names:
            for n in args.batches:
                for seed in seeds:
                    r = draw(name, seed, n, args.live)
                    held_wins = r["psi_held"] < r["psi_in"]
                    closer += held_wins
                    total += 1
                    print(f"{name:<14}{n:>8}{seed:>5}{r['rank']:>5}{r['psi_in']:8.3f}"
                          f"{r['psi_held']:9.3f}{r['psi_held'] / r['psi_in']:8.2f}"
                          f"{r['med_in']:10.2f}{r['med_held']:7.2f}{r['med_live']:7.2f}  "
                          f"{'held out' if held_wins else 'in sample'}")
    verdict = "met" if closer * 2 > total else "MISSED"
    print(f"target: the held-out reference closer in more than half of the draws -> "
          f"{closer} of {total} ({verdict})")


if __name__ == "__main__":
    main()
