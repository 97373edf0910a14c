"""The benchmark scripts still run (``make bench`` is not part of CI; this keeps them
from rotting). Smoke runs only: nothing here checks a time or a ratio."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _run(script: str, *args: str) -> str:
    """A bench script's output (it must exit 0 within 5 minutes)."""
    return subprocess.run([sys.executable, str(ROOT / "bench" / script), *args],
                          capture_output=True, text=True, timeout=300, check=True,
                          cwd=ROOT).stdout


def test_fit_bench_quick_run_prints_every_table() -> None:
    out = _run("fit.py", "--quick")
    for heading in ("1. Fit on digits", "1b. Closed form + CV against NCA",
                    "2. Statistics vs fit", "3. Exact 1-D k-means"):
        assert heading in out
    assert out.count("target:") == 2  # NCA target and statistics target, each judged
    assert "one solve:" in out


def test_few_batches_bench_runs_with_one_seed_per_data_set() -> None:
    out = _run("few_batches.py", "1")
    assert "one_se − argmax over 5 problems" in out


def test_fit_latency_bench_runs_one_trial() -> None:
    out = _run("fit_latency.py", "--trials", "1")
    assert "request→version" in out and "target:" in out


def test_ingest_bench_runs_small() -> None:
    out = _run("ingest.py", "--quick")
    for fmt in ("json", "csv", "arrow", "parquet"):
        assert out.count(f" {fmt} ") == 2  # a line in each table
    assert "target: Arrow" in out and "target: JSON ingest" in out and "Peak memory" in out


def test_fit_budget_bench_runs_small_sizes() -> None:
    out = _run("fit_budget.py", "--sizes", "60", "120", "--max-unbudgeted", "60",
               "--repeats", "1")
    assert "target:" in out and ("same" in out or "DIFFERENT" in out)
    assert "skipped (> 60 batches)" in out


def test_store_codecs_bench_runs_small() -> None:
    out = _run("store_codecs.py", "--rows", "2000", "--repeats", "1")
    assert "zstd 3" in out and "pack_matrix as stored now" in out


def test_drift_overhead_bench_runs_quick() -> None:
    out = _run("drift_overhead.py", "--quick")
    assert "without ms" in out and "ratio" in out and "target:" in out


def test_grouping_bench_runs_quick() -> None:
    out = _run("grouping.py", "--quick")
    assert "in process s" in out and out.count("target:") == 1 and "k auto" in out
    assert "decode alone" in out


def test_throughput_bench_runs_quick() -> None:
    out = _run("throughput.py", "--quick")
    assert "reference: group_records" in out and "target: 4 clients" in out
    assert "best any server could reach" in out


def test_drift_reference_bench_runs_quick() -> None:
    out = _run("drift_reference.py", "--quick", "--batches", "6")
    assert "PSI held" in out and out.count("wine ") == 1 and "target:" in out


def test_grouping_runs_bench_runs_small() -> None:
    out = _run("grouping_runs.py", "--records", "3000")
    firsts = [line.split()[0] for line in out.splitlines() if line.strip()]
    assert firsts.count("arrow") == 1 and firsts.count("parquet") == 1  # a row each
    assert "same labels as in process: yes" in out and "target:" in out
