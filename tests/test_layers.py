"""The house's layers, read from the import statements of every module.

- ``service/core`` is pure (its own test, ``tests/core/test_isolation.py``, also runs
  it in a fresh interpreter).
- Use cases, storage and the table types know nothing of HTTP (flask, marshmallow)
  or of the queue library; views never reach past the use cases into the queue or
  Redis; only the queue adapter, the context that builds it and the workers import RQ.
- The client imports nothing of the service.

An exception is a line in ``ALLOWED`` with its reason, so the rules stay visible.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# (package or module prefix, top-level imports it must not make)
RULES: list[tuple[str, set[str]]] = [
    ("service/usecases", {"flask", "marshmallow", "rq", "redis", "werkzeug", "service.api",
                          "service.store.keys"}),
    ("service/store", {"flask", "marshmallow", "rq", "werkzeug", "service.api",
                       "service.usecases", "service.jobqueue"}),
    ("service/tables.py", {"flask", "marshmallow", "redis", "rq", "service.api",
                           "service.store", "service.usecases"}),
    ("service/arrow_tables.py", {"flask", "marshmallow", "redis", "rq", "service.api",
                                 "service.store", "service.usecases"}),
    ("service/lifecycle.py", {"flask", "marshmallow", "redis", "rq", "service.api",
                              "service.store", "service.usecases"}),
    ("service/run_lifecycle.py", {"flask", "marshmallow", "redis", "rq", "service.api",
                                  "service.store", "service.usecases"}),
    ("service/api", {"rq", "redis", "service.jobqueue", "service.store.keys",
                     "service.core"}),
    ("likewise_client", {"service", "workers", "flask", "redis", "rq", "marshmallow"}),
    ("service", {"rq"}),  # every other service module: the queue is jobqueue's
]

ALLOWED: dict[tuple[str, str], str] = {
    ("service/api/problems.py", "redis"): "maps a lost Redis connection to a 503",
    ("service/jobqueue.py", "rq"): "the queue adapter",
    ("service/context.py", "rq"): "builds the queue the adapter works on",
}


def _imports(path: Path) -> set[str]:
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            found.add(node.module)
    return found


def _modules(prefix: str) -> list[Path]:
    target = ROOT / prefix
    return [target] if target.suffix == ".py" else sorted(target.rglob("*.py"))


def _breaks(module: str, banned: set[str]) -> bool:
    return any(module == b or module.startswith(b + ".") for b in banned)


@pytest.mark.parametrize("prefix,banned", RULES, ids=[r[0] for r in RULES])
def test_layer_imports(prefix: str, banned: set[str]) -> None:
    wrong = []
    for path in _modules(prefix):
        rel = path.relative_to(ROOT).as_posix()
        for module in _imports(path):
            if _breaks(module, banned) and (rel, module.split(".")[0]) not in ALLOWED \
                    and (rel, module) not in ALLOWED:
                wrong.append(f"{rel} imports {module}")
    assert not wrong, "\n".join(wrong)


def test_every_exception_is_still_needed() -> None:
    """An ALLOWED line whose import is gone should go too."""
    for (rel, module), _reason in ALLOWED.items():
        assert any(m == module or m.startswith(module + ".") for m in _imports(ROOT / rel)), rel
