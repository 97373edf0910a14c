"""The README's walkthrough runs as written against ``likewise run``.

Every ``sh`` block of the "Walkthrough" section is executed in order by bash, with
``curl -s`` turned into ``curl -sf`` so that any HTTP error fails the test, and the
base URL pointed at this test's port. The data in those commands is the README's
own illustration (two four-record batches), not a measurement.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

from .test_flow import _start, _stop, launcher_env

ROOT = Path(__file__).resolve().parents[2]
README = ROOT / "README.md"


def _section(title: str, next_title: str) -> str:
    text = README.read_text()
    return text[text.index(f"## {title}"):text.index(f"## {next_title}")]


def _walkthrough_blocks() -> list[str]:
    text = README.read_text()
    section = text[text.index("## Walkthrough"):text.index("## From Python")]
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
        _python_and_cli_sections_work(base, tmp_path)
    finally:
        assert _stop(proc) == 0


# bounded wait until no fit of the metric is queued or running (at most 120 s)
_WAIT_FOR_FITS = """
for _ in $(seq 1 240); do
  live=$(curl -sf "BASE/v1/fits?metric=shipments" -H "$AUTH" | python3 -c \
    'import json,sys; fits = json.load(sys.stdin)["fits"]
print(sum(f["status"] in ("waiting", "running") for f in fits))')
  [ "$live" = "0" ] && break
  sleep 0.5
done
[ "$live" = "0" ]
"""


def _python_and_cli_sections_work(base: str, cwd: Path) -> None:
    """The "From Python" example, then the "Operating from the command line" commands
    (``.venv/bin/likewise`` run as this interpreter's ``-m service.cli``), on the state
    the walkthrough left."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    for key in [k for k in env if k.startswith("LIKEWISE_")]:
        del env[key]  # as on an operator's shell: the token comes from var/admin-token
    (code,) = re.findall(r"```python\n(.*?)```", _section("From Python", "Operating"),
                         flags=re.S)
    out = subprocess.run([sys.executable, "-c", code.replace("http://127.0.0.1:8000", base)],
                         cwd=cwd, env=env, capture_output=True, text=True, timeout=180)
    assert out.returncode == 0, out.stdout[-2000:] + out.stderr[-2000:]
    assert "succeeded 100%" in out.stdout and "version 1" in out.stdout
    assert "422" in out.stdout  # the refused batch names its fields

    (block,) = re.findall(r"```sh\n(.*?)```", _section("Operating", "From an ETL job"),
                          flags=re.S)
    script = "set -euo pipefail\n" + block.replace(
        ".venv/bin/likewise", f"{sys.executable} -m service.cli")
    out = subprocess.run(["bash", "-c", script], cwd=cwd, capture_output=True, text=True,
                         timeout=120, env={**env, "LIKEWISE_URL": base})
    assert out.returncode == 0, out.stdout[-2000:] + out.stderr[-2000:]
    (cwd / "cli-session.txt").write_text(out.stdout)  # kept with the test's files
    for text in ("parcels", "held-out ARI", "hub_minutes", "version 1 -> 2",
                 "version 2 -> 1", "fit queue at", "dry run: would delete 3 batches"):
        assert text in out.stdout, (text, out.stdout[-3000:])
    _etl_section_works(base, cwd, env)


def _etl_section_works(base: str, cwd: Path, env: dict[str, str]) -> None:
    """The "From an ETL job" examples (pandas, then Dask), in one Python session."""
    blocks = re.findall(r"```python\n(.*?)```", _section("From an ETL job", "Running it"),
                        flags=re.S)
    assert len(blocks) == 2
    code = "\n".join(blocks).replace("http://127.0.0.1:8000", base)
    out = subprocess.run([sys.executable, "-c", code], cwd=cwd, env=env,
                         capture_output=True, text=True, timeout=180)
    assert out.returncode == 0, out.stdout[-2000:] + out.stderr[-2000:]
    assert out.stdout.splitlines().count("statistics") == 3  # the posted batches' kind
    assert "3 of 5 batches were statistics" in out.stdout
    assert "parcel_id" in out.stdout and "margin" in out.stdout
    assert "version 2 from 9 batches" in out.stdout
