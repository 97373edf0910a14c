"""The README's walkthrough runs as written against ``likewise run``.

Every ``sh`` block of the "Walkthrough" section is executed in order by bash, with
``curl -s`` turned into ``curl -sf`` so that any HTTP error fails the test, and the
base URL pointed at this test's port. The data in those commands is the README's
own illustration (two four-record batches), not a measurement.
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import pytest

from .test_flow import _start, _stop, launcher_env

README = Path(__file__).resolve().parents[2] / "README.md"


def _walkthrough_blocks() -> list[str]:
    text = README.read_text()
    section = text[text.index("## Walkthrough"):text.index("## Running it for real")]
    return re.findall(r"```sh\n(.*?)```", section, flags=re.S)


def test_walkthrough_has_commands():
    blocks = _walkthrough_blocks()
    assert len(blocks) >= 6
    assert "export LW=http://127.0.0.1:8000" in blocks[0]


@pytest.mark.timeout(300)
def test_walkthrough_commands_work_as_written(settings, tmp_path):
    data_dir = tmp_path / "var"  # the README reads the token from var/admin-token
    # no admin token: the launcher generates var/admin-token, as on a fresh machine
    proc, base = _start(launcher_env(settings, admin_token=""), tmp_path, data_dir=data_dir)
    try:
        script = "set -euo pipefail\n"
        for block in _walkthrough_blocks():
            block = block.replace("http://127.0.0.1:8000", base).replace("curl -s ", "curl -sf ")
            script += block + "\n"
            # a fit must finish before the next step reads its version
            if "/fits" in block:
                script += _WAIT_FOR_FITS.replace("BASE", base)
        out = subprocess.run(["bash", "-c", script], cwd=tmp_path, capture_output=True,
                             text=True, timeout=240)
        assert out.returncode == 0, out.stdout[-2000:] + out.stderr[-2000:]
        assert '"history"' in out.stdout and '"labels"' in out.stdout
        assert "likewise_http_requests_total" in out.stdout
    finally:
        assert _stop(proc) == 0


# bounded wait until no fit of the metric is queued or running (at most 120 s)
_WAIT_FOR_FITS = """
for _ in $(seq 1 240); do
  live=$(curl -sf "BASE/v1/fits?metric=shipments" -H "$AUTH" | python3 -c \
    'import json,sys; fits = json.load(sys.stdin)["fits"]
print(sum(f["status"] in ("queued", "running") for f in fits))')
  [ "$live" = "0" ] && break
  sleep 0.5
done
[ "$live" = "0" ]
"""
