"""Micro-batches (grad_accum): a step's gradient equals the full batch's to float tolerance.

A step with grad_accum = g splits its prompts into g micro-batches, each a whole number of prompts
(a prompt's n samples are never split), samples each prompt from the seed of its slot in the
step's batch and scales each micro-batch's summed loss by 1 / prompts_per_step. The gradient is
linear in the per-prompt losses, so the sum over micro-batches is the full batch's gradient up to
float32 summation order (common practice of gradient accumulation; no published source). The
reference here is the same step run with grad_accum = 1.
"""
from pathlib import Path

import pytest
import torch

from bonft.trainer import steps
from bonft.trainer.config import from_dict, unread_keys
from bonft.trainer.measure import Stopwatch
from bonft.trainer.run import build_run

SCRIPTS = Path(__file__).parent / "dist_scripts"  # the toy verifier: varied rewards even for a random model
BASE = dict(layers=1, width=32, heads=2, max_positions=48, train_prompts=64, heldout_prompts=4, rl_steps=1,
            prompts_per_step=8, n=4, k=2, max_new_tokens=6, threads=1, verifier="toy_verifier:digit_share",
            correct_threshold=0.2)


def step_gradient(tmp_path, **kw):
    torch.manual_seed(0)
    cfg = {**BASE, **kw}
    # keys the objective never reads (k of reinforce, correct_threshold outside pass@k) may not be set
    cfg = {key: v for key, v in cfg.items() if key not in unread_keys(cfg.get("objective", "pass_at_k"), 0)}
    run = build_run(from_dict({**cfg, "run_dir": str(tmp_path / "r")}))
    run.model.train()
    rec = steps.rl_step(run, 0, Stopwatch(run.device))
    grads = torch.cat([p.grad.reshape(-1) for p in run.module.parameters() if p.grad is not None])
    return grads, rec


@pytest.mark.parametrize("objective", ["pass_at_k", "best_of_k", "reinforce"])
def test_micro_batches_give_the_full_batch_gradient(tmp_path, monkeypatch, objective):
    monkeypatch.syspath_prepend(str(SCRIPTS))
    full, rec_full = step_gradient(tmp_path, objective=objective, grad_accum=1)
    assert rec_full["pool/with_signal"] > 0 and float(full.norm()) > 0  # a real gradient, not zeros on both sides
    for g in (2, 4, 8):
        part, rec = step_gradient(tmp_path, objective=objective, grad_accum=g)
        torch.testing.assert_close(part, full, rtol=1e-5, atol=1e-7)
        assert rec["loss"] == pytest.approx(rec_full["loss"], rel=1e-6, abs=1e-9)
        assert rec["reward"] == pytest.approx(rec_full["reward"], rel=1e-12)
