"""The own-loop example in docs/objectives.md runs as written: it samples, trains a step, reuses the batch."""
import contextlib
import io
import pathlib
import re

import numpy as np
import pytest
import torch

from bonft.objectives import best_of_k_credit, pool_value

DOC = pathlib.Path(__file__).resolve().parents[1] / "docs" / "objectives.md"


def python_blocks(text):
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def run_own_loop_example():
    text = DOC.read_text().split("## Writing your own objective")[0]  # that one: test_objcheck.py
    blocks = python_blocks(text.split("## Is my loop on-policy?")[0])  # that one: test_on_policy.py
    assert len(blocks) == 1, f"expected one python example, found {len(blocks)}"
    ns = {}
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(blocks[0], str(DOC), "exec"), ns)
    return ns, out.getvalue()


def test_own_loop_example_runs_trains_and_reuses():
    ns, out = run_own_loop_example()
    assert re.search(r"step 1: loss=-?\d+\.\d{4} pool V_2=\d\.\d{3} pools with signal=\d\.\d\d \|credit\|=\d\.\d{4} "
                     r"padding=\d\.\d\d\nstep 2 \(reused\): loss=-?\d+\.\d{4} ratio ESS=\d\.\d{3}\n$", out), out
    B, n = ns["B"], ns["n"]
    info, info2 = ns["info"], ns["info2"]
    assert all(isinstance(v, torch.Tensor) and not v.requires_grad for v in [*info.values(), *info2.values()])
    # the monitors against their definitions on the example's own pools (pool value: bonft.estimate's
    # U-statistic through pool_value; pools with signal: the credit function's zero rows)
    scores, rewards = ns["scores"].numpy(), ns["rewards"].numpy()
    w = best_of_k_credit(scores, rewards, k=2)
    assert float(info["pools_with_signal"]) == pytest.approx(np.mean((w != 0).any(-1)), abs=1e-7)  # float32
    assert float(info["credit_abs_mean"]) == pytest.approx(np.abs(w).mean(), abs=1e-7)
    assert float(info["pool_value"]) == pytest.approx(np.mean(pool_value(scores, rewards, k=2)), abs=1e-15)
    mask = ns["mask"]
    assert mask.shape == (B, n, ns["responses"].shape[1])
    # the mask marks each response up to and including its first EOS, nothing of the prompt
    assert torch.equal(mask.reshape(B * n, -1), ~ns["padding"])
    assert float(info["masked_frac"]) == pytest.approx(1 - float(mask.sum()) / mask.numel(), abs=1e-7)
    # the reuse step: the policy moved after step 1, so the pool ratios differ from 1 and their ESS is below 1
    assert "ratio_ess" not in info and 0.0 < float(info2["ratio_ess"]) < 1.0
    grads = [p.grad for p in ns["model"].parameters() if p.grad is not None]
    assert grads and all(torch.isfinite(g).all() for g in grads)
    # the stored sampling log-probs: finite on response tokens, exactly 0 on padding
    assert torch.isfinite(ns["sampling_logprobs"][mask]).all() and (ns["sampling_logprobs"][~mask] == 0).all()


def test_doc_names_every_objective_and_the_cautions():
    text = DOC.read_text()
    for name in ("best_of_k_credit", "pass_at_k_credit", "best_of_k_sft_credit", "reinforce_credit",
                 "best_of_k_loss", "pass_at_k_loss", "best_of_k_sft_loss", "reinforce_loss", "nll_loss"):
        assert f"`{name}`" in text, name
    assert "policy_gradient_loss(logprobs, credit, **common)" in text
    for option in ("sampling_logprobs", "clip_ratio", "ratio_level", "token_logprobs", "pools_with_signal",
                   "credit_abs_mean", "ratio_ess"):
        assert f"`{option}" in text, option
    for cite in ("Chow et al. 2024", "Kool", "Chen et al. 2021", "Walder & Karkhanis 2025", "Schulman et al. 2017"):
        assert cite in text, cite
    assert "Reward hacking" in text and "sandbox" in text
