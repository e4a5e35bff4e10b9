"""The math layer's import graph (bon, estimate, strategies, objcheck): no cycles, imports at the top unless
a comment says why, package ``__init__`` files that only re-export, and no private name taken from another
package.

The graph is read from the source with ``ast`` (imports inside functions too); cycles are the strongly
connected components with more than one module (Tarjan 1972, "Depth-first search and linear graph
algorithms").
"""
import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "bonft"
OWN = ("bonft.bon", "bonft.estimate", "bonft.strategies", "bonft.objcheck")


def module_name(path: Path) -> str:
    parts = path.relative_to(ROOT.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {module_name(p): p for p in ROOT.rglob("*.py")}


def imports(path: Path):
    """(imported bonft module, imported names, statement, at module level) for every bonft import in ``path``."""
    tree = ast.parse(path.read_text())
    inner = {id(node) for fn in ast.walk(tree) if isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef))
             for node in ast.walk(fn) if isinstance(node, (ast.Import, ast.ImportFrom))}
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            pairs = [(a.name, []) for a in node.names]
        elif isinstance(node, ast.ImportFrom) and not node.level:
            base = node.module or ""
            pairs = [(f"{base}.{a.name}", []) if f"{base}.{a.name}" in MODULES else (base, [a.name]) for a in node.names]
        else:
            continue
        for name, names in pairs:
            while name and name not in MODULES:
                name = name.rpartition(".")[0]
            if name.startswith("bonft"):
                out.append((name, names, node, id(node) not in inner))
    return out


GRAPH = {m: sorted({t for t, _, _, _ in imports(p) if t != m}) for m, p in MODULES.items()}


def strongly_connected(graph):
    index, low, stack, on, out, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def _own(m: str) -> bool:
    return any(m == o or m.startswith(o + ".") for o in OWN)


def test_the_cycle_finder_finds_a_planted_cycle():
    # objcheck <-> transformer as it once was: check -> transformer -> check
    comps = strongly_connected({"check": ["transformer", "report"], "transformer": ["check"], "report": []})
    assert sorted(comps) == [["check", "transformer"], ["report"]]


def test_no_import_cycle_touches_the_math_layer():
    assert [c for c in strongly_connected(GRAPH) if len(c) > 1 and any(_own(m) for m in c)] == []
    assert "bonft.strategies.base" in GRAPH["bonft.strategies.curves"]  # curves use the classes ...
    assert "bonft.strategies.base" not in GRAPH["bonft.strategies.estimators"]  # ... estimators do not need them


def findings(name: str, path: Path) -> list[str]:
    """Imports inside a function without a comment, and private names taken from another package."""
    lines = path.read_text().splitlines()
    out = []
    for target, names, node, top in imports(path):
        near = " ".join(lines[max(0, node.lineno - 2): node.end_lineno])
        if not top and "#" not in near:
            out.append(f"{name}:{node.lineno} imports {target} inside a function without a comment saying why")
        package = name if path.name == "__init__.py" else name.rpartition(".")[0]
        same = target.startswith(package + ".") or target == package
        private = [n for n in names if n.startswith("_")]
        if target.rpartition(".")[2].startswith("_") and not target.startswith("bonft._core"):
            private.append(target)
        if private and not same:
            out.append(f"{name}:{node.lineno} takes private {private} from {target}")
    return out


def test_the_checker_finds_a_lazy_import_and_a_foreign_private_name(tmp_path):
    # the layout before the packages: a lazy import without a reason and a private helper from bonft.bon
    f = tmp_path / "m.py"
    f.write_text("from bonft.bon import _check_probs\n\ndef f():\n    from bonft.estimate import summarize\n")
    assert findings("bonft.strategies.exact", f) == [
        "bonft.strategies.exact:1 takes private ['_check_probs'] from bonft.bon",
        "bonft.strategies.exact:4 imports bonft.estimate inside a function without a comment saying why"]


ABOVE = ("bonft.trainer", "bonft.plan", "bonft.cli", "bonft.tasks", "bonft.generation", "bonft.verifiers")


def test_the_math_layer_imports_nothing_above_it():
    # DEVELOPERS.md's layers: objcheck may read viz (for its plot); nothing here reads the trainer or the CLI
    bad = {m: [t for t in GRAPH[m] if t.startswith(ABOVE) or (t == "bonft.viz" and not m.startswith("bonft.objcheck"))]
           for m in MODULES if _own(m)}
    assert {m: t for m, t in bad.items() if t} == {}


@pytest.mark.parametrize("name", sorted(m for m in MODULES if _own(m)))
def test_imports_at_the_top_or_a_stated_reason_and_no_foreign_private_names(name):
    assert findings(name, MODULES[name]) == []


@pytest.mark.parametrize("package", ["bonft.estimate", "bonft.strategies", "bonft.objcheck"])
def test_package_init_only_re_exports(package):
    tree = ast.parse(MODULES[package].read_text())
    for node in tree.body:
        docstring = isinstance(node, ast.Expr) and isinstance(node.value, ast.Constant)
        all_list = isinstance(node, ast.Assign) and [t.id for t in node.targets if isinstance(t, ast.Name)] == ["__all__"]
        assert docstring or all_list or isinstance(node, ast.ImportFrom), (package, ast.dump(node)[:80])
    names = {a.asname or a.name for node in tree.body if isinstance(node, ast.ImportFrom) for a in node.names}
    exported = next(ast.literal_eval(n.value) for n in tree.body if isinstance(n, ast.Assign))
    assert sorted(exported) == sorted(names)
