"""Architecture rules a test can see (DESIGN §2 layout, §8 habits).

Imports flow one way: preset -> model -> ir -> {backends, analysis} ->
instrument -> host, with engine.errors and engine.locations below them all.
Backends and analysis never import each other; no module takes another
module's private name; the engine imports no project module inside a
function (such imports hide cycles); every module states its public surface
in ``__all__``.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
SOURCES = sorted(p for top in ("engine", "host") for p in (REPO / top).rglob("*.py"))

# Layer rank of each part; a module may import only parts of lower or equal rank,
# and two parts of one rank only when they are the same part.
RANKS = {
    "engine.errors": 0, "engine.locations": 0, "engine": 0,
    "engine.preset": 1, "engine.model": 2, "engine.ir": 3,
    "engine.backends": 4, "engine.analysis": 4,
    "engine.instrument": 5,
    "host": 6,
}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(REPO).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _part(module: str) -> str:
    """The layer a module belongs to: the longest RANKS key that prefixes it."""
    parts = module.split(".")
    for k in range(len(parts), 0, -1):
        key = ".".join(parts[:k])
        if key in RANKS:
            return key
    raise KeyError(module)


def _project_imports(path: Path):
    """(imported module without the 'sheafsynth.' prefix, names, lineno, inside a function?) for our imports."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    func_lines: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            func_lines.update(range(node.lineno, (node.end_lineno or node.lineno) + 1))
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            mod = node.module or ""
            if node.level:
                base = _module_name(path).split(".")
                if path.name != "__init__.py":
                    base = base[:-1]
                base = base[: len(base) - (node.level - 1)]
                mod = ".".join(base + ([mod] if mod else []))
            elif mod.startswith("sheafsynth."):
                mod = mod[len("sheafsynth."):]
            else:
                if mod.split(".")[0] in ("engine", "host"):
                    out.append((mod, [], node.lineno, False, "top-level"))
                continue
            out.append((mod, [a.name for a in node.names], node.lineno, node.lineno in func_lines, ""))
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.startswith("sheafsynth."):
                    out.append((a.name[len("sheafsynth."):], [], node.lineno, node.lineno in func_lines, ""))
                elif a.name.split(".")[0] in ("engine", "host"):
                    out.append((a.name, [], node.lineno, False, "top-level"))
    return out


def _where(path: Path, line: int) -> str:
    return f"{path.relative_to(REPO)}:{line}"


def test_sources_found():
    assert len(SOURCES) > 40


def test_nothing_imports_the_bare_top_level_names():
    bad = [_where(p, ln) for p in SOURCES for mod, _, ln, _, tag in _project_imports(p) if tag == "top-level"]
    assert not bad, f"import through sheafsynth.engine / sheafsynth.host instead: {bad}"


def test_imports_flow_one_way():
    bad = []
    for p in SOURCES:
        me = _part(_module_name(p))
        for mod, names, ln, _, tag in _project_imports(p):
            if tag:
                continue
            targets = [mod] if mod != "engine" else [f"engine.{n}" for n in names]
            for t in targets:
                there = _part(t)
                if there == me:
                    continue
                if RANKS[there] > RANKS[me] or (RANKS[there] == RANKS[me] and RANKS[me] > 0):
                    bad.append(f"{_where(p, ln)} ({me} -> {there})")
    assert not bad, bad


def test_backends_and_analysis_never_import_each_other():
    bad = [_where(p, ln) for p in SOURCES
           for mod, _, ln, _, _ in _project_imports(p)
           if {_part(_module_name(p)), _part(mod) if mod.split(".")[0] in ("engine", "host") else ""}
           == {"engine.backends", "engine.analysis"}]
    assert not bad, bad


def test_no_module_imports_a_private_name():
    bad = [f"{_where(p, ln)} {n}" for p in SOURCES for mod, names, ln, _, _ in _project_imports(p)
           for n in names if n.startswith("_") and not n.startswith("__")]
    bad += [f"{_where(p, ln)} {mod}" for p in SOURCES for mod, _, ln, _, _ in _project_imports(p)
            if any(part.startswith("_") and not part.startswith("__") for part in mod.split("."))]
    assert not bad, bad


def test_engine_imports_no_project_module_inside_a_function():
    bad = [_where(p, ln) for p in SOURCES if _module_name(p).startswith("engine")
           for _, _, ln, in_func, tag in _project_imports(p) if in_func and not tag]
    assert not bad, f"move these to the top of the module (they hide import cycles): {bad}"


@pytest.mark.parametrize("path", [p for p in SOURCES if p.name != "__init__.py"],
                         ids=lambda p: str(p.relative_to(REPO)))
def test_every_module_states_its_public_surface(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    assert any(isinstance(n, ast.Assign) and any(isinstance(t, ast.Name) and t.id == "__all__" for t in n.targets)
               for n in tree.body), f"{path.relative_to(REPO)} has no __all__"


def test_engine_has_no_asserts_for_argument_checks():
    offenders = [f"{p.relative_to(REPO)}:{node.lineno}" for p in SOURCES if _module_name(p).startswith("engine")
                 for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))) if isinstance(node, ast.Assert)]
    assert not offenders, offenders


def test_nothing_changes_directory():
    offenders = [str(p.relative_to(REPO)) for p in SOURCES if "os.chdir" in p.read_text(encoding="utf-8")]
    assert not offenders, offenders
