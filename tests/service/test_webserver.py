"""The gunicorn settings' folder for the web processes' samples (``/metrics``)."""

from __future__ import annotations

from pathlib import Path

from service import webserver


def test_a_given_folder_is_emptied_and_made_private(tmp_path: Path) -> None:
    folder = tmp_path / "samples"
    folder.mkdir(mode=0o755)
    (folder / "counter_123.db").write_bytes(b"old")
    env = {webserver.MULTIPROC_ENV: str(folder)}
    assert webserver.prepare_multiprocess_dir(env) == str(folder)
    assert list(folder.iterdir()) == []
    assert folder.stat().st_mode & 0o777 == 0o700


def test_without_one_the_server_makes_its_own_and_removes_it_on_exit() -> None:
    env: dict[str, str] = {}
    path = Path(webserver.prepare_multiprocess_dir(env))
    assert env[webserver.MULTIPROC_ENV] == str(path)
    assert path.is_dir() and path.stat().st_mode & 0o777 == 0o700
    webserver.on_exit(None)
    assert not path.exists()
