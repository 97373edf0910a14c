"""mypy over the use cases (``[tool.mypy]`` in pyproject.toml): with ``Context.storage``
and ``Context.jobs`` typed by the protocols of ``service/usecases/ports.py``, a use case
that calls a storage or queue member the protocols do not list fails here, as does a
typed parameter value (``service/usecases/params.py``) passed where it does not fit."""

from __future__ import annotations

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_the_use_cases_type_check(monkeypatch: pytest.MonkeyPatch) -> None:
    api = pytest.importorskip("mypy.api")
    monkeypatch.chdir(ROOT)
    out, err, status = api.run(["--config-file", str(ROOT / "pyproject.toml"),
                                "--cache-dir", str(ROOT / ".mypy_cache")])
    assert status == 0, out + err
