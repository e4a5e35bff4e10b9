"""The package layout is the architecture: import directions and one calling convention.

Checked by reading the modules' source (ast), not by importing them, so a lazy
import inside a function counts as much as one at the top.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "bonft"
MATH = ("bon", "estimate", "credit", "losses", "strategies", "vote_estimate", "strategy_curves")
BELOW = ("trainer", "plan", "cli", "viz", "tasks")


def _imports(path: Path, package: str) -> set[str]:
    """Absolute names of every module imported anywhere in ``path`` (relative imports resolved)."""
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            out.add(mod)
            out.update(f"{mod}.{a.name}" for a in node.names)  # `from bonft import viz`
    return out


def _closure(names: tuple[str, ...]) -> dict[str, set[str]]:
    """Each math module and the private bonft modules it reaches -> their imports."""
    seen: dict[str, set[str]] = {}
    todo = [f"bonft.{n}" for n in names]
    while todo:
        mod = todo.pop()
        if mod in seen:
            continue
        path = PKG.parent / (mod.replace(".", "/") + ".py")
        if not path.exists():
            continue
        seen[mod] = _imports(path, mod.rsplit(".", 1)[0])
        todo += [m for m in seen[mod] if m.startswith("bonft.")]
    return seen


def test_math_modules_import_nothing_below_them():
    seen = _closure(MATH)
    assert set(f"bonft.{n}" for n in MATH) <= set(seen)  # the rule really read the four modules
    bad = {
        mod: sorted(m for m in imps if any(m == f"bonft.{b}" or m.startswith(f"bonft.{b}.") for b in BELOW))
        for mod, imps in seen.items()
    }
    bad = {k: v for k, v in bad.items() if v}
    assert not bad, f"math modules must not import trainer/plan/cli/viz/tasks: {bad}"


def test_rule_catches_a_forbidden_import(tmp_path):
    # the checker itself: a lazy relative import of the trainer inside a function is found
    f = tmp_path / "m.py"
    f.write_text("def f():\n    from .trainer.loop import train\n    from . import viz\n")
    imps = _imports(f, "bonft")
    assert "bonft.trainer.loop" in imps and "bonft.viz" in imps


@pytest.mark.parametrize("package", ["trainer", "plan", "cli", "verifiers", "tasks"])
def test_packages_exist(package):
    assert (PKG / package / "__init__.py").exists()
