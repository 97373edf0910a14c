"""The launcher: its admin token (generated once, mode 600, never empty) and the
restart limit of fit workers."""

from __future__ import annotations

import os
import sys
from pathlib import Path

from service.config import Settings
from service.launcher import TOKEN_FILE, ensure_admin_token


def test_token_is_generated_once_with_mode_600(tmp_path: Path) -> None:
    s = Settings(data_dir=str(tmp_path / "var"))
    token, created = ensure_admin_token(s)
    path = tmp_path / "var" / TOKEN_FILE
    assert created and len(token) >= 32 and path.read_text().strip() == token
    assert path.stat().st_mode & 0o777 == 0o600
    assert ensure_admin_token(s) == (token, False)


def test_configured_token_wins_and_no_file_is_written(tmp_path: Path) -> None:
    s = Settings(data_dir=str(tmp_path), admin_token="given")
    assert ensure_admin_token(s) == ("given", False)
    assert not (tmp_path / TOKEN_FILE).exists()


def test_an_empty_token_file_is_replaced_not_used(tmp_path: Path) -> None:
    # an empty token would be dropped by Settings.from_env: every call would be 401
    path = tmp_path / TOKEN_FILE
    path.write_text("\n")
    path.chmod(0o644)
    token, created = ensure_admin_token(Settings(data_dir=str(tmp_path)))
    assert created and token and path.read_text().strip() == token
    assert path.stat().st_mode & 0o777 == 0o600


def test_a_worker_that_keeps_dying_is_given_up_after_the_restart_limit():
    from service import launcher

    cmd = [sys.executable, "-c", "raise SystemExit(3)"]
    child = launcher._Child.start("worker-0", cmd, dict(os.environ), restart=True)
    child.proc.wait(timeout=30)
    restarted = 0
    while child.respawn(cmd):
        child.proc.wait(timeout=30)
        restarted += 1
        assert restarted <= launcher.RESTART_LIMIT
    assert restarted == launcher.RESTART_LIMIT
    # supervision then reports a failure for good (and the launcher stops everything)
    assert launcher._supervise([child], stopped=lambda: False) is True


def test_a_taken_port_stops_the_launcher_before_it_starts_anything(tmp_path: Path, caplog):
    import socket

    from service import launcher

    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        assert launcher.port_in_use("127.0.0.1", port)
        settings = Settings(data_dir=str(tmp_path / "var"), port=port)
        assert launcher.run(settings) == 2
    out = caplog.text
    assert f"127.0.0.1:{port} is already in use" in out and "LIKEWISE_PORT=" in out
    assert not (tmp_path / "var").exists()  # no Redis, no token: nothing was started
    assert not launcher.port_in_use("127.0.0.1", port)  # free again once closed
