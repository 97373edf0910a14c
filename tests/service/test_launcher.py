"""The launcher's admin token: generated once (mode 600), then reused; never empty."""

from __future__ import annotations

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
