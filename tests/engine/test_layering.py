"""Architecture rules that a test can see (DESIGN §2, §8)."""

from __future__ import annotations

import ast
from pathlib import Path

ENGINE = Path(__file__).resolve().parents[2] / "engine"


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def test_engine_never_imports_host():
    offenders = [str(p) for p in ENGINE.rglob("*.py") if any(n.split(".")[0] == "host" for n in _imports(p))]
    assert not offenders, offenders


def test_engine_has_no_asserts_for_argument_checks():
    offenders = []
    for p in ENGINE.rglob("*.py"):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Assert):
                offenders.append(f"{p.name}:{node.lineno}")
    assert not offenders, offenders


def test_engine_never_changes_directory():
    offenders = [str(p) for p in ENGINE.rglob("*.py") if "os.chdir" in p.read_text(encoding="utf-8")]
    assert not offenders, offenders
