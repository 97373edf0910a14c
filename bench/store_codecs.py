"""Compression of stored matrices: ``make bench`` (``.venv/bin/python bench/store_codecs.py``).

Every posted batch is stored as a compressed float64 matrix (``service/store/codecs.py``
``pack_matrix``). This compares the codecs on a 50,000 × 20 matrix: zlib at levels 1
and 6 (level 6 was the stored format) and Zstandard (the ``zstandard`` package) at
levels 1 and 3. Size, pack and unpack time, each against zlib level 6 measured in the
same run (best of ``--repeats`` runs; one BLAS thread does not matter here).

Data: records drawn from a Gaussian fitted to each class of the breast cancer
Wisconsin diagnostic data (Wolberg et al., bundled with scikit-learn), its first 20
features, rounded to the decimals the data set itself has per feature — values as an
analyst would post them from a measurement table. The same records at full float64
precision (not rounded) are the second case: the least compressible realistic input.
"""

from __future__ import annotations

import argparse
import sys
import time
import zlib
from collections.abc import Callable
from pathlib import Path

import numpy as np
import zstandard

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from service.store import codecs  # noqa: E402
from tests.datasets import load_open  # noqa: E402

ROWS, COLS = 50_000, 20


def records(rows: int, rounded: bool, seed: int = 0) -> np.ndarray:
    X, y = load_open("breast_cancer")
    X = X[:, :COLS]
    rng = np.random.default_rng(seed)
    classes, counts = np.unique(y, return_counts=True)
    per = rng.multinomial(rows, counts / counts.sum())
    parts = [rng.multivariate_normal(X[y == c].mean(0), np.cov(X[y == c].T), size=m)
             for c, m in zip(classes, per, strict=True)]
    out = np.abs(np.vstack(parts))[rng.permutation(rows)]  # the features are non-negative
    if rounded:
        for j in range(COLS):
            out[:, j] = np.round(out[:, j], _decimals(X[:, j]))
    return out


def _decimals(col: np.ndarray) -> int:
    """The fewest decimals that reproduce every value of ``col`` (at most 8)."""
    for d in range(9):
        if np.allclose(np.round(col, d), col, rtol=0, atol=1e-12):
            return d
    return 8


def _zlib(level: int) -> tuple[Callable[[bytes], bytes], Callable[[bytes], bytes]]:
    return (lambda raw: zlib.compress(raw, level)), zlib.decompress


def _zstd(level: int) -> tuple[Callable[[bytes], bytes], Callable[[bytes], bytes]]:
    c, d = zstandard.ZstdCompressor(level=level), zstandard.ZstdDecompressor()
    return c.compress, d.decompress


CODECS = {
    "zlib 6 (old stored format)": _zlib(6),
    "zlib 1": _zlib(1),
    "zstd 1": _zstd(1),
    "zstd 3": _zstd(3),
}


def best(fn: Callable[[], object], repeats: int) -> float:
    t = np.inf
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        t = min(t, time.perf_counter() - start)
    return t


def table(X: np.ndarray, title: str, repeats: int) -> None:
    raw = np.ascontiguousarray(X, dtype="<f8").tobytes()
    print(f"\n{title}: {X.shape[0]:,} × {X.shape[1]} float64, {len(raw) / 1e6:.1f} MB raw")
    print(f"{'codec':<28}{'size %':>8}{'pack ms':>10}{'× zlib6':>9}{'unpack ms':>11}{'× zlib6':>9}")
    rows = {}
    for name, (pack, unpack) in CODECS.items():
        blob = pack(raw)
        assert unpack(blob) == raw
        rows[name] = (len(blob), best(lambda p=pack: p(raw), repeats),
                      best(lambda u=unpack, b=blob: u(b), repeats))
    ref = rows["zlib 6 (old stored format)"]
    for name, (size, tp, tu) in rows.items():
        print(f"{name:<28}{100 * size / len(raw):>8.1f}{1e3 * tp:>10.1f}{tp / ref[1]:>9.2f}"
              f"{1e3 * tu:>11.1f}{tu / ref[2]:>9.2f}")
    blob = codecs.pack_matrix(X)
    t_pack = best(lambda: codecs.pack_matrix(X), repeats)
    t_unpack = best(lambda: codecs.unpack_matrix(blob), repeats)
    print(f"{'pack_matrix as stored now':<28}{100 * len(blob) / len(raw):>8.1f}"
          f"{1e3 * t_pack:>10.1f}{t_pack / ref[1]:>9.2f}{1e3 * t_unpack:>11.1f}"
          f"{t_unpack / ref[2]:>9.2f}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=ROWS)
    ap.add_argument("--repeats", type=int, default=5)
    args = ap.parse_args()
    print("Stored-matrix compression (ratios against zlib level 6 in this run)")
    table(records(args.rows, True), "breast cancer model, rounded as the data set", args.repeats)
    table(records(args.rows, False), "the same records at full precision", args.repeats)


if __name__ == "__main__":
    main()
