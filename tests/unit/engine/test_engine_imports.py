"""The core stays pure: monitor/engine imports only the stdlib and itself (design card)."""

from __future__ import annotations

import ast
import sys
from pathlib import Path

ENGINE = Path(__file__).resolve().parents[3] / "monitor" / "engine"


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(), filename=str(path))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def test_engine_imports_only_stdlib_and_itself() -> None:
    modules = sorted(ENGINE.glob("*.py"))
    assert len(modules) >= 4, "the engine modules were not found"
    offenders = {}
    for path in modules:
        bad = {
            name
            for name in _imports(path)
            if not name.startswith("monitor.engine")
            and name.split(".")[0] not in sys.stdlib_module_names
        }
        if bad:
            offenders[path.name] = sorted(bad)
    assert offenders == {}, f"engine modules import outside the core: {offenders}"


def test_engine_reads_no_clock() -> None:
    offenders = []
    for path in sorted(ENGINE.glob("*.py")):
        text = path.read_text()
        for needle in ("datetime.now(", "datetime.utcnow(", "time.time(", "date.today("):
            if needle in text:
                offenders.append(f"{path.name}: {needle}")
    assert offenders == []
