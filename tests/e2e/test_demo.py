"""``likewise demo`` against a running ``likewise run``: the invented scenario end to end.

The demo's data is invented (service/demo_data.py); this test checks only that the
command drives the whole flow and reports the learned metric ahead of Euclidean
k-means on held-out weeks, as the README promises. No outside reference applies.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys

import pytest

from .test_flow import TOKEN, _start, _stop, launcher_env


@pytest.mark.timeout(300)
def test_demo_runs_the_whole_flow_and_reports_held_out_ari(settings, tmp_path):
    env = launcher_env(settings)
    proc, base = _start(env, tmp_path)
    try:
        out = subprocess.run(
            [sys.executable, "-m", "service.cli", "demo", "--url", base, "--token", TOKEN],
            capture_output=True, text=True, timeout=240, env={**os.environ, **env},
        )
        assert out.returncode == 0, out.stdout + out.stderr
        text = out.stdout
        assert "posted 16 labelled weeks" in text
        mean = re.search(r"^mean\s+([0-9.]+)\s+([0-9.]+)$", text, flags=re.M)
        assert mean, text
        learned, euclidean = map(float, mean.groups())
        assert learned > euclidean
        assert "better than plain Euclidean" in text and "NOT better" not in text
        # both scores it prints are explained in its own output
        from service.demo import SCORE_CV, SCORE_FRESH

        assert SCORE_CV in text and SCORE_FRESH in text
        assert text.index("cross-validated held-out ARI") < text.index(SCORE_CV)
    finally:
        assert _stop(proc) == 0
