"""Imports of the stages and the problem layer: no cycles, no private names across modules.

Walks the source with the standard library's ``ast`` (module-level and function-level
imports alike), so a cycle hidden inside a function is found too.
"""

import ast
from pathlib import Path

import invert

ROOT = Path(invert.__file__).parent


def _module_name(path):
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path):
    """``(target module, imported names)`` of every ``from ... import`` in a file."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    out = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[: len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            out.append((target, [a.name for a in node.names]))
        elif isinstance(node, ast.Import):
            out.extend((a.name, []) for a in node.names)
    return out


def _files():
    return sorted((ROOT / "stages").rglob("*.py")) + [ROOT / "problem.py"]


def test_no_private_names_imported_from_another_module():
    bad = []
    for path in _files():
        for target, names in _imports(path):
            if target.startswith("invert"):
                bad += [f"{_module_name(path)}: {n} from {target}" for n in names
                        if n.startswith("_")]
    assert not bad, bad


def test_no_import_cycles_among_the_stages():
    mods = {_module_name(p): p for p in _files()}
    graph = {}
    for name, path in mods.items():
        deps = set()
        for target, names in _imports(path):
            # "from . import diagnostics" names a submodule: count it as the dependency.
            for cand in [f"{target}.{n}" for n in names] + [target]:
                if cand in mods and cand != name:
                    deps.add(cand)
                    break
        graph[name] = deps
    # Packages import their submodules (their public surface); a submodule importing its own
    # package's __init__ is what would close a cycle, so keep those edges and drop none.
    state = {}

    def visit(n, stack):
        state[n] = 1
        for d in graph[n]:
            if state.get(d) == 1:
                raise AssertionError("import cycle: " + " -> ".join(stack + [n, d]))
            if d not in state:
                visit(d, stack + [n])
        state[n] = 2

    for n in graph:
        if n not in state:
            visit(n, [])
