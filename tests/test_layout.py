"""The package layout is the architecture: layers, no import cycles, one concept per module, one calling
convention.

The import graph is read from the source with ``ast`` (imports inside functions count as much as those at
the top); cycles are the strongly connected components with more than one module (Tarjan 1972,
"Depth-first search and linear graph algorithms"). Data flows one way: prompts -> samples ->
scores/rewards -> credit -> loss -> step, so each part may import only the parts listed in ``ALLOWED``.
"""
from __future__ import annotations

import ast
import importlib
import inspect
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "bonft"

# What each part of bonft (top-level module or package) may import from the rest of bonft.
ALLOWED = {
    "": {"_core"},  # bonft/__init__.py
    "_core": set(),
    "bon": {"_core"},
    "estimate": {"_core"},
    "objectives": {"_core"},
    "strategies": {"_core", "bon", "estimate", "objectives"},
    "viz": {"_core", "estimate"},  # figures take plain data; matplotlib loads inside each function
    "objcheck": {"_core", "bon", "estimate", "objectives", "viz"},
    "generation": {"_core"},
    "io": {"_core"},
    "verifiers": {"_core", "estimate", "viz"},
    "tasks": {"_core", "verifiers", "io"},
    "testing": {"_core", "verifiers", "objcheck", "generation", "objectives"},
    "pytest_plugin": {"_core", "testing", "verifiers"},
    "plan": {"_core", "bon", "estimate", "io", "viz", "generation", "verifiers", "tasks"},
    "trainer": {"_core", "bon", "estimate", "objectives", "strategies", "generation", "verifiers", "tasks",
                "io", "viz", "plan", "objcheck"},  # objcheck: the study measures its credits' bias
    "cli": None,  # the command line may import anything
}


def module_name(path: Path) -> str:
    parts = path.relative_to(PKG.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {module_name(p): p for p in sorted(PKG.rglob("*.py"))}


def package_of(name: str, path: Path) -> str:
    return name if path.name == "__init__.py" else name.rpartition(".")[0]


def imports(path: Path, name: str):
    """(imported bonft module, imported names, statement, at module level) for every bonft import.

    A sub-command's ``run`` counts as module level: the command line builds every sub-command's parser
    for ``bonft --help`` and loads the heavy modules (torch, transformers) only when a command runs, the
    reason stated once in bonft/cli/__init__.py.
    """
    tree = ast.parse(path.read_text())
    cold = name.startswith("bonft.cli.")
    inner = {id(node) for fn in ast.walk(tree) if isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef))
             and not (cold and fn.name == "run" and fn in tree.body)
             for node in ast.walk(fn) if isinstance(node, (ast.Import, ast.ImportFrom))}
    package = package_of(name, path)
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            pairs = [(a.name, []) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                up = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                base = ".".join(up + ([node.module] if node.module else []))
            pairs = [(f"{base}.{a.name}", []) if f"{base}.{a.name}" in MODULES else (base, [a.name])
                     for a in node.names]
        else:
            continue
        for target, names in pairs:
            while target and target not in MODULES:
                target = target.rpartition(".")[0]
            if target.startswith("bonft"):
                out.append((target, names, node, id(node) not in inner))
    return out


GRAPH = {m: sorted({t for t, _, _, _ in imports(p, m) if t != m}) for m, p in MODULES.items()}


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


def unit(name: str) -> str:
    return name.split(".")[1] if "." in name else ""


def findings(name: str, path: Path) -> list[str]:
    """Imports inside a function without a comment saying why, and private names taken from another package."""
    lines = path.read_text().splitlines()
    out = []
    for target, names, node, top in imports(path, name):
        near = " ".join(lines[max(0, node.lineno - 2): node.end_lineno])
        if not top and "#" not in near:
            out.append(f"{name}:{node.lineno} imports {target} inside a function without a comment saying why")
        package = package_of(name, path)
        same = target.startswith(package + ".") or target == package
        private = [n for n in names if n.startswith("_") and not n.startswith("__")]
        if target.rpartition(".")[2].startswith("_") and not target.startswith("bonft._core"):
            private.append(target)
        if private and not same:
            out.append(f"{name}:{node.lineno} takes private {private} from {target}")
    return out


# ---------------------------------------------------------------- the checkers themselves
def test_the_cycle_finder_finds_a_planted_cycle():
    comps = strongly_connected({"check": ["transformer", "report"], "transformer": ["check"], "report": []})
    assert sorted(comps) == [["check", "transformer"], ["report"]]


def test_the_checker_finds_a_lazy_import_and_a_foreign_private_name(tmp_path):
    f = tmp_path / "m.py"
    f.write_text("from bonft.bon import _check_probs\n\ndef f():\n    from bonft.estimate import summarize\n")
    assert findings("bonft.strategies.exact", f) == [
        "bonft.strategies.exact:1 takes private ['_check_probs'] from bonft.bon",
        "bonft.strategies.exact:4 imports bonft.estimate inside a function without a comment saying why"]


def test_the_reader_resolves_relative_and_lazy_imports(tmp_path):
    f = tmp_path / "m.py"
    f.write_text("def f():\n    from ..trainer import loop\n    from .. import viz  # cold path\n")
    got = {t for t, _, _, _ in imports(f, "bonft.plan.m")}
    assert got == {"bonft.trainer.loop", "bonft.viz"}


# ---------------------------------------------------------------- the rules
def test_no_import_cycles():
    assert [c for c in strongly_connected(GRAPH) if len(c) > 1] == []


def test_lower_layers_import_nothing_from_higher_ones():
    bad = []
    for name, deps in GRAPH.items():
        assert unit(name) in ALLOWED, f"bonft.{unit(name)} has no row in ALLOWED: say what it may import"
        allowed = ALLOWED[unit(name)]
        if allowed is not None:
            bad += [f"{name} -> {d}" for d in deps if unit(d) not in (unit(name), *allowed)]
    assert bad == []


@pytest.mark.parametrize("name", sorted(MODULES))
def test_imports_at_the_top_or_a_stated_reason_and_no_foreign_private_names(name):
    assert findings(name, MODULES[name]) == []


def test_top_level_holds_at_most_eight_modules_and_no_module_is_a_private_half():
    tops = sorted(p.stem for p in PKG.glob("*.py") if p.name != "__init__.py")
    assert len(tops) <= 8, tops
    private = sorted(str(p.relative_to(PKG)) for p in PKG.rglob("_*.py")
                     if p.name not in ("__init__.py", "__main__.py") and p.parent.name != "_core")
    assert private == [], "name each part after its concept"


REEXPORT_ONLY = sorted(m for m, p in MODULES.items() if p.name == "__init__.py" and m not in ("bonft", "bonft.cli"))


@pytest.mark.parametrize("package", REEXPORT_ONLY)
def test_package_init_only_re_exports(package):
    tree = ast.parse(MODULES[package].read_text())
    for node in tree.body:
        docstring = isinstance(node, ast.Expr) and isinstance(node.value, ast.Constant)
        all_list = isinstance(node, ast.Assign) and [t.id for t in node.targets if isinstance(t, ast.Name)] == ["__all__"]
        assert docstring or all_list or isinstance(node, (ast.ImportFrom, ast.Import)), (package, ast.dump(node)[:80])
    names = {a.asname or a.name for node in tree.body if isinstance(node, ast.ImportFrom) for a in node.names}
    exported = [ast.literal_eval(n.value) for n in tree.body if isinstance(n, ast.Assign)]
    if names - {"annotations"}:  # a package that re-exports lists exactly that in __all__
        assert exported and sorted(exported[0]) == sorted(names - {"annotations"}), "__all__ lists what is imported"


def test_steps_holds_only_the_two_steps():
    tree = ast.parse(MODULES["bonft.trainer.steps"].read_text())
    public = sorted(n.name for n in tree.body if isinstance(n, (ast.FunctionDef, ast.ClassDef)) and not n.name.startswith("_"))
    assert public == ["rl_step", "sft_step"]
    loop = ast.parse(MODULES["bonft.trainer.loop"].read_text())
    from_steps = [a.name for n in loop.body if isinstance(n, ast.ImportFrom) and n.module == "bonft.trainer.steps"
                  for a in n.names]
    assert from_steps == []  # the loop calls steps.rl_step: a test replaces it where it is defined


# ---------------------------------------------------------------- one calling convention
DATA_ARGS = {  # the positional (data) parameters of each public function; everything else is keyword-only
    "bon": {"softmax_policy": ["logits"], "best_of_k_distribution": ["probs", "scores"],
            "log_best_of_k_distribution": ["probs", "scores"], "best_of_k_value": ["probs", "scores", "rewards"],
            "best_of_k_success": ["p"], "best_of_k_kl": ["probs", "scores"]},
    "estimate.bestofk": {"best_of_k": ["scores", "rewards"], "best_of_k_per_prompt": ["scores", "rewards"],
                         "pass_at_k_per_prompt": ["rewards"]},
    "estimate.passk": {"pass_at_k": ["n", "c"]},
    "estimate.paired": {"per_prompt_curves": ["pools"], "paired_bootstrap": ["a", "b"], "bootstrap_mean": ["a"],
                        "paired_comparison": ["curves"], "format_interval": ["m", "lo", "hi"],
                        "paired_table": ["comparison"], "t_interval": ["values"], "seed_comparison": ["per_seed"]},
    "estimate.intervals": {"bootstrap_ci": ["values"], "summarize": ["scores", "rewards"],
                           "default_ks": ["smallest_pool"], "reward_bounds": ["rewards"]},
    "objectives.credit": {"best_of_k_credit": ["scores", "rewards"], "pass_at_k_credit": ["correct"],
               "best_of_k_sft_credit": ["scores", "reference_scores"], "reinforce_credit": ["rewards"],
               "pool_value": ["scores", "rewards"]},
    "objectives.losses": {"policy_gradient_loss": ["logprobs", "credit"], "best_of_k_loss": ["logprobs", "scores", "rewards"],
               "pass_at_k_loss": ["logprobs", "correct"],
               "best_of_k_sft_loss": ["logprobs", "scores", "reference_logprobs", "reference_scores"],
               "reinforce_loss": ["logprobs", "rewards"], "nll_loss": ["logprobs"]},
    "objectives.logprobs": {"token_logprobs": ["logits", "labels"]},
    "strategies.base": {"get_strategy": ["strategy"], "strategy_value": ["strategy", "probs"],
                        "strategy_per_prompt": ["strategy"], "strategy_credit": ["strategy", "scores", "rewards"]},
    "strategies.exact": {"majority_vote_value": ["probs", "answers", "rewards"],
                         "weighted_vote_value": ["probs", "answers", "scores", "rewards"]},
    "strategies.estimators": {"majority_vote_per_prompt": ["answers", "rewards"],
                              "majority_vote_credit": ["answers", "rewards"],
                              "weighted_vote_per_prompt": ["answers", "scores", "rewards"],
                              "weighted_vote_credit": ["answers", "scores", "rewards"]},
    "strategies.loss": {"strategy_loss": ["logprobs", "scores", "rewards"]},
    "strategies.curves": {"compare_strategies": ["strategies"]},
}
NOT_MATH = {"get_strategy", "format_interval", "paired_table"}  # a name lookup, text formatting: no shapes, no formula


@pytest.mark.parametrize("module", sorted(DATA_ARGS))
def test_public_functions_take_hyper_parameters_by_keyword_only(module):
    mod = importlib.import_module(f"bonft.{module}")
    public = {name: obj for name, obj in vars(mod).items()
              if inspect.isfunction(obj) and obj.__module__ == mod.__name__ and not name.startswith("_")}
    assert set(public) == set(DATA_ARGS[module]), "a new public function needs its data arguments listed here"
    for name, fn in public.items():
        params = list(inspect.signature(fn).parameters.values())
        positional = [p.name for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
        assert positional == DATA_ARGS[module][name], f"{module}.{name}: positional {positional}"
        rest = [p for p in params if p.name not in positional]
        assert all(p.kind in (p.KEYWORD_ONLY, p.VAR_KEYWORD) for p in rest), f"{module}.{name}: {[(p.name, p.kind) for p in rest]}"
        if module.endswith("losses") or name == "strategy_loss":  # the loss convention: logprobs first, info only on request
            shared = any(p.kind == p.VAR_KEYWORD and p.name == "common" for p in rest)  # LossOptions' fields
            assert positional[0] == "logprobs" and ("return_info" in {p.name for p in rest} or shared), name



@pytest.mark.parametrize("module", sorted(DATA_ARGS))
def test_public_docstrings_give_shape_math_and_references(module):
    mod = importlib.import_module(f"bonft.{module}")
    for name in set(DATA_ARGS[module]) - NOT_MATH:
        doc = getattr(mod, name).__doc__ or ""
        for part in ("Shape:", "References:", ".. math::"):
            assert part in doc, f"{module}.{name} lacks {part!r}"
