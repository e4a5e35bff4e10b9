"""The package layout is the architecture: import directions and one calling convention.

Checked by reading the modules' source (ast), not by importing them, so a lazy
import inside a function counts as much as one at the top.
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "bonft"
MATH = ("bon", "estimate", "objectives", "strategies")  # modules and packages (every module inside is read)
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
        base = PKG.parent / mod.replace(".", "/")
        if base.with_suffix(".py").exists():
            path, package = base.with_suffix(".py"), mod.rsplit(".", 1)[0]
        elif (base / "__init__.py").exists():  # a package: its __init__ and every module in it
            path, package = base / "__init__.py", mod
            todo += [f"{mod}.{f.stem}" for f in base.glob("*.py") if f.stem != "__init__"]
        else:
            continue
        seen[mod] = _imports(path, package)
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


# ---------------------------------------------------------------- one calling convention (issue 12, section 3)
DATA_ARGS = {  # the positional (data) parameters of each public function; everything else is keyword-only
    "bon": {"softmax_policy": ["logits"], "best_of_k_distribution": ["probs", "scores"],
            "log_best_of_k_distribution": ["probs", "scores"], "best_of_k_value": ["probs", "scores", "rewards"],
            "best_of_k_success": ["p"], "best_of_k_kl": ["probs", "scores"]},
    "estimate.bestofk": {"best_of_k": ["scores", "rewards"], "best_of_k_per_prompt": ["scores", "rewards"],
                         "pass_at_k_per_prompt": ["rewards"]},
    "estimate.passk": {"pass_at_k": ["n", "c"]},
    "estimate.intervals": {"bootstrap_ci": ["values"], "summarize": ["scores", "rewards"],
                           "default_ks": ["smallest_pool"]},
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
NOT_MATH = {"get_strategy"}  # a name lookup: no shapes, no formula


@pytest.mark.parametrize("module", sorted(DATA_ARGS))
def test_public_functions_take_hyper_parameters_by_keyword_only(module):
    import importlib
    import inspect

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
    import importlib

    mod = importlib.import_module(f"bonft.{module}")
    for name in set(DATA_ARGS[module]) - NOT_MATH:
        doc = getattr(mod, name).__doc__ or ""
        for part in ("Shape:", "References:", ".. math::"):
            assert part in doc, f"{module}.{name} lacks {part!r}"
