"""The package's layering rules, checked by walking the source (issue: one contract per seam).

- no import cycle between modules of ``invert`` (imports inside functions count too: a lazy
  import is still a dependency, and hiding a cycle behind it is what the rule is against);
- no module imports a private (leading-underscore) name from another module (a private
  *module* such as ``_spectrum`` may be imported; its public names are its interface);
- only the geometry package asks which kind of region it has.
"""

import ast
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2] / "invert"


def _modules():
    mods = {}
    for p in ROOT.rglob("*.py"):
        parts = list(p.relative_to(ROOT.parent).with_suffix("").parts)
        is_pkg = parts[-1] == "__init__"
        if is_pkg:
            parts = parts[:-1]
        mods[".".join(parts)] = (p, is_pkg)
    return mods


MODULES = _modules()


def _imports(name):
    """(target module, imported name or None, line) for every import in module ``name``."""
    path, is_pkg = MODULES[name]
    pkg = name if is_pkg else name.rsplit(".", 1)[0]
    out = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out += [(a.name, None, node.lineno) for a in node.names if a.name.startswith("invert")]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            if target.startswith("invert"):
                out += [(target, a.name, node.lineno) for a in node.names]
    return out


def _edges():
    edges = {m: set() for m in MODULES}
    for m in MODULES:
        for target, name, _ in _imports(m):
            sub = f"{target}.{name}" if name else None
            if sub in MODULES:
                edges[m].add(sub)
            elif target in MODULES and target != m:
                edges[m].add(target)
    return edges


def test_no_import_cycles():
    # Tarjan-free check: depth-first search with colours finds any back edge (a cycle).
    edges = _edges()
    # A package __init__ re-exports its submodules; a submodule reaching its own package's
    # __init__ is the usual way to import a sibling's public name, and the __init__ -> sub
    # edge would make every such import a cycle. Drop the __init__ -> own-descendant edges.
    for m, (_, is_pkg) in MODULES.items():
        if is_pkg:
            edges[m] = {t for t in edges[m] if not t.startswith(m + ".")}
    colour, stack, cycles = {}, [], []

    def visit(u):
        colour[u] = 1
        stack.append(u)
        for v in sorted(edges[u]):
            if colour.get(v) == 1:
                cycles.append(stack[stack.index(v):] + [v])
            elif v not in colour:
                visit(v)
        stack.pop()
        colour[u] = 2

    for m in sorted(MODULES):
        if m not in colour:
            visit(m)
    assert not cycles, "import cycles: " + "; ".join(" -> ".join(c) for c in cycles)


def test_no_private_names_imported_across_modules():
    bad = []
    for m in MODULES:
        for target, name, line in _imports(m):
            if name and name.startswith("_") and f"{target}.{name}" not in MODULES:
                bad.append(f"{MODULES[m][0].relative_to(ROOT.parent)}:{line} imports {name} "
                           f"from {target}")
    assert not bad, "\n".join(bad)


def test_only_geometry_asks_the_kind_of_region():
    pattern = re.compile(r"""kind\s*[!=]=\s*["'](disk|ball|annulus)["']"""
                         r"""|getattr\([^)]*["']kind["']|\.kind\b""")
    bad = []
    for m, (path, _) in MODULES.items():
        if m.startswith("invert.geometry"):
            continue
        for i, line in enumerate(path.read_text().splitlines(), 1):
            code = line.split("#", 1)[0]
            if pattern.search(code):
                bad.append(f"{path.relative_to(ROOT.parent)}:{i}: {line.strip()}")
    assert not bad, "\n".join(bad)
