"""The maths core imports numpy, scipy and scikit-learn only (DEVELOPERS.md)."""

from __future__ import annotations

import ast
import json
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
FORBIDDEN = ("flask", "redis", "rq", "marshmallow")


def test_core_imports_no_service_libraries() -> None:
    code = (
        "import json, sys\n"
        "import service.core\n"
        f"bad = sorted(m for m in sys.modules if m.split('.')[0] in {FORBIDDEN!r})\n"
        "print(json.dumps(bad))\n"
    )
    done = subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout.strip().splitlines()[-1]) == []


def test_core_sources_import_only_the_allowed_libraries() -> None:
    # The runtime check above only sees what gets loaded; this reads every import
    # statement. threadpoolctl is a required dependency of scikit-learn itself.
    allowed = {"numpy", "scipy", "sklearn", "threadpoolctl"} | set(sys.stdlib_module_names)
    seen: dict[str, set[str]] = {}
    for path in sorted((ROOT / "service" / "core").glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names = [node.module or ""]
            else:
                continue
            for name in names:
                seen.setdefault(name.split(".")[0], set()).add(path.name)
    assert seen, "no imports found: wrong directory?"
    outside = {mod: files for mod, files in seen.items() if mod not in allowed}
    assert outside == {}
