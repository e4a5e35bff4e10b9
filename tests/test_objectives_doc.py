"""The example in docs/objectives.md runs as written and trains a step."""
import contextlib
import io
import pathlib
import re

import torch

DOC = pathlib.Path(__file__).resolve().parents[1] / "docs" / "objectives.md"


def python_blocks(text):
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def test_doc_example_runs_and_updates_the_model():
    text = DOC.read_text().split("## Writing your own objective")[0]  # that one: test_objcheck.py
    blocks = python_blocks(text.split("## Is my loop on-policy?")[0])  # that one: test_on_policy.py
    assert len(blocks) == 1, f"expected one python example, found {len(blocks)}"
    ns = {}
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(blocks[0], str(DOC), "exec"), ns)
    assert re.search(r"loss=-?\d+\.\d{4} pool V_2=\d\.\d{3} pools with signal=\d\.\d\d", out.getvalue()), out.getvalue()
    assert torch.isfinite(ns["loss"]) and ns["loss"].ndim == 0
    # the optimiser moved the weights (AdamW's first step is about lr in size unless the gradient is zero)
    grads = [p.grad for p in ns["model"].parameters() if p.grad is not None]
    assert grads and all(torch.isfinite(g).all() for g in grads)
    assert 0.0 <= float(ns["info"]["pools_with_signal"]) <= 1.0
    assert all(isinstance(v, torch.Tensor) and not v.requires_grad for v in ns["info"].values())


def test_doc_names_every_objective_and_the_cautions():
    text = DOC.read_text()
    for name in ("best_of_k_credit", "pass_at_k_credit", "best_of_k_sft_credit", "reinforce_credit",
                 "best_of_k_loss", "pass_at_k_loss", "best_of_k_sft_loss", "reinforce_loss", "nll_loss"):
        assert f"`{name}`" in text, name
    assert "policy_gradient_loss(logprobs, credit, *," in text
    for cite in ("Chow et al. 2024", "Kool", "Chen et al. 2021", "Walder & Karkhanis 2025"):
        assert cite in text, cite
    assert "Reward hacking" in text and "sandbox" in text
