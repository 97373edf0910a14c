"""``likewise demo`` without a service to talk to: one clear line, no traceback."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _demo(args: list[str], cwd: Path, **env: str) -> subprocess.CompletedProcess:
    clean = {k: v for k, v in os.environ.items() if not k.startswith("LIKEWISE_")}
    clean["PYTHONPATH"] = str(ROOT)
    return subprocess.run([sys.executable, "-m", "service.cli", "demo", *args], cwd=cwd,
                          env={**clean, **env}, capture_output=True, text=True, timeout=120)


def test_demo_without_a_token_says_where_it_looked(tmp_path: Path) -> None:
    out = _demo([], tmp_path)
    assert out.returncode == 1
    assert "likewise demo: no token:" in out.stderr and "admin-token" in out.stderr
    assert "Traceback" not in out.stderr


def test_demo_against_a_closed_port_says_it_cannot_reach_the_service(tmp_path: Path) -> None:
    with socket.socket() as s:  # a port that was free a moment ago; nothing listens now
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    out = _demo(["--token", "t"], tmp_path, LIKEWISE_PORT=str(port))
    assert out.returncode == 1
    assert f"cannot reach http://127.0.0.1:{port}" in out.stderr
    assert "Traceback" not in out.stderr
