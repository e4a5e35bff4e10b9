"""The trainer's and the sampler's import graph: no cycles, imports at the top, packages that only re-export.

The graph is read from the source with ``ast`` (every ``import`` and ``from ... import``, inside
functions too), so an import hidden in a function body counts like one at the top. Cycles are
found as the strongly connected components of the graph (Tarjan 1972) with more than one module.
"""
import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "bonft"
OWN = ("bonft.trainer", "bonft.generation")


def module_name(path: Path) -> str:
    parts = path.relative_to(ROOT.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {module_name(p): p for p in ROOT.rglob("*.py")}


def imports(path: Path) -> list[tuple[str, ast.stmt, bool]]:
    """(imported bonft module, statement, at module level) for every import in ``path``."""
    tree = ast.parse(path.read_text())
    inner = {id(node) for fn in ast.walk(tree) if isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef))
             for node in ast.walk(fn) if isinstance(node, (ast.Import, ast.ImportFrom))}
    here = module_name(path)
    package = here if path.name == "__init__.py" else here.rpartition(".")[0]
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                base = ".".join(anchor[: len(anchor) - node.level + 1] + ([base] if base else []))
            names = [f"{base}.{a.name}" if f"{base}.{a.name}" in MODULES else base for a in node.names]
        else:
            continue
        for name in names:
            while name and name not in MODULES:  # `import bonft.x.y` of a name inside a module
                name = name.rpartition(".")[0]
            if name.startswith("bonft"):
                out.append((name, node, id(node) not in inner))
    return out


GRAPH = {m: sorted({t for t, _, _ in imports(p) if t != m}) for m, p in MODULES.items()}


def strongly_connected(graph: dict[str, list[str]]) -> list[list[str]]:
    """Tarjan's algorithm (Tarjan 1972, "Depth-first search and linear graph algorithms")."""
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


def test_the_cycle_finder_finds_a_known_cycle():
    # a hand-made graph: a -> b -> c -> a is one cycle, d -> a hangs off it
    comps = strongly_connected({"a": ["b"], "b": ["c"], "c": ["a"], "d": ["a"]})
    assert sorted(comps) == [["a", "b", "c"], ["d"]]


def test_no_import_cycle_touches_the_trainer_or_the_sampler():
    cycles = [c for c in strongly_connected(GRAPH) if len(c) > 1 and any(m.startswith(OWN) for m in c)]
    assert cycles == []
    assert "bonft.trainer.checkpoint" in GRAPH["bonft.trainer.models"]  # models reads checkpoints ...
    assert not any(m.startswith("bonft.trainer.models") for m in GRAPH["bonft.trainer.checkpoint"])  # ... not back


@pytest.mark.parametrize("name", sorted(m for m in MODULES if m.startswith(OWN)))
def test_imports_inside_functions_state_their_reason(name):
    path = MODULES[name]
    lines = path.read_text().splitlines()
    for target, node, top in imports(path):
        if top:
            continue
        near = " ".join(lines[max(0, node.lineno - 2): node.end_lineno])
        assert "#" in near, f"{name}:{node.lineno} imports {target} inside a function without a comment saying why"


@pytest.mark.parametrize("package", ["bonft.trainer.distributed", "bonft.trainer.demo", "bonft.generation"])
def test_package_init_only_re_exports(package):
    tree = ast.parse(MODULES[package].read_text())
    for node in tree.body:
        docstring = isinstance(node, ast.Expr) and isinstance(node.value, ast.Constant)
        all_list = isinstance(node, ast.Assign) and [t.id for t in node.targets if isinstance(t, ast.Name)] == ["__all__"]
        assert docstring or all_list or isinstance(node, (ast.Import, ast.ImportFrom)), (package, ast.dump(node)[:80])
    names = {a.asname or a.name for node in tree.body if isinstance(node, ast.ImportFrom) for a in node.names}
    exported = next(ast.literal_eval(n.value) for n in tree.body if isinstance(n, ast.Assign))
    assert sorted(exported) == sorted(names - {"annotations"})


def test_steps_holds_only_the_two_steps():
    tree = ast.parse(MODULES["bonft.trainer.steps"].read_text())
    public = sorted(n.name for n in tree.body if isinstance(n, (ast.FunctionDef, ast.ClassDef)) and not n.name.startswith("_"))
    assert public == ["rl_step", "sft_step"]
    loop = ast.parse(MODULES["bonft.trainer.loop"].read_text())
    from_steps = [a.name for n in loop.body if isinstance(n, ast.ImportFrom) and n.module == "bonft.trainer.steps"
                  for a in n.names]
    assert from_steps == []  # the loop calls steps.rl_step: a test replaces it where it is defined
