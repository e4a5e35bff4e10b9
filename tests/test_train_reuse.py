"""The trainer's sample reuse (``updates_per_batch``): one sampled batch, several optimizer updates.

What is checked, and against what:
- the first update of a reused batch is the on-policy step: its gradient equals, bit for bit, the gradient
  a run with ``updates_per_batch = 1`` applies at the same step (the importance ratio of the first update
  is 1 by definition: Schulman et al. 2017, eq. 6-7, ``r_t = 1`` at the old parameters);
- the later updates' gradient is the importance-weighted policy gradient ``-sum_i w_i r_i grad log pi(y_i)``
  with ``r_i = pi(y_i)/pi_old(y_i)`` recomputed here by hand from the model's own log-probs (Williams 1992
  score function; the ratio weighting: Schulman et al. 2017);
- the optimizer steps once per update, each after the finite check; the ratio monitors are logged, finite;
- bad values of the keys are errors naming the key.
The toy verifier (tests/dist_scripts) gives varied rewards even for a random model, so the credit is not all zero.
"""
import json
import math
from pathlib import Path

import pytest
import torch
from safetensors.torch import load_file

import bonft.trainer.loop as T
import bonft.trainer.steps as S
from bonft.generation import sequence_logprobs
from bonft.trainer.checkpoint import latest_checkpoint, load_state
from bonft.trainer.config import TrainConfig, from_dict

SCRIPTS = Path(__file__).parent / "dist_scripts"  # the toy verifier: varied rewards even for a random model
TOY = dict(layers=1, width=32, heads=2, max_positions=48, train_prompts=64, heldout_prompts=6, warm_start_steps=0,
           rl_steps=2, prompts_per_step=4, n=4, k=1, lr=1e-2, eval_samples=4, eval_ks=[1, 4], n_boot=50, log_every=1,
           save_every=0, max_new_tokens=6, plots=False, eval_at_start=False, threads=1, objective="reinforce",
           reward_source="scores", verifier="toy_verifier:digit_share", clip_grad_norm=0.0)


def toy(tmp_path, name, **kw):
    return from_dict({**TOY, "run_dir": str(tmp_path / name), "name": name, **kw})


def _record_updates(monkeypatch):
    """Wrap the loop's update: a copy of the gradient at every optimizer step (in order)."""
    seen = []
    real = T._apply_update

    def spy(run, s, lr, loss, clock, what=""):
        seen.append((s, [p.grad.detach().clone() if p.grad is not None else None for p in run.module.parameters()]))
        return real(run, s, lr, loss, clock, what)

    monkeypatch.setattr(T, "_apply_update", spy)
    return seen


def _train_lines(run_dir):
    return [json.loads(ln) for ln in (run_dir / "metrics.jsonl").read_text().splitlines() if '"train"' in ln]


def test_first_update_is_the_on_policy_step_and_later_ones_log_ratios(tmp_path, monkeypatch):
    monkeypatch.syspath_prepend(str(SCRIPTS))
    seen = _record_updates(monkeypatch)
    T.train(toy(tmp_path, "one"), progress=False)
    one = list(seen)
    seen.clear()
    T.train(toy(tmp_path, "two", updates_per_batch=2), progress=False)
    two = list(seen)
    assert [s for s, _ in one] == [0, 1]
    assert [s for s, _ in two] == [0, 0, 1, 1]  # two optimizer steps per sampled batch, each through the check
    for a, b in zip(one[0][1], two[0][1]):  # step 1, first update: same weights, same samples -> same gradient
        assert (a is None and b is None) or torch.equal(a, b)
    assert any(g is not None and bool(g.abs().sum() > 0) for g in two[0][1])  # the credit was not all zero
    # the second update moved on from the first: a different gradient
    assert any(not torch.equal(a, b) for a, b in zip(two[0][1], two[1][1]) if a is not None)
    lines = _train_lines(tmp_path / "two")
    assert [r["step"] for r in lines] == [1, 2]
    for r in lines:
        ess = r["ratio/ess"]
        assert math.isfinite(ess) and 0 < ess <= 1  # Kish's effective sample size as a share: in (0, 1]
        assert math.isfinite(r["loss"]) and "ratio/clip_frac" not in r  # no clip asked
    assert all("ratio/ess" not in r for r in _train_lines(tmp_path / "one"))


def test_second_update_gradient_is_the_ratio_weighted_policy_gradient(tmp_path, monkeypatch):
    # independent recomputation: after the first update, -sum_i w_i r_i grad log pi(y_i) / B with
    # r_i = exp(log pi(y_i) - log pi_old(y_i)) (sequence level, token sums), by autograd on the weights
    monkeypatch.syspath_prepend(str(SCRIPTS))
    cfg = toy(tmp_path, "check", updates_per_batch=2, rl_steps=1)
    kept, grads = {}, []
    real_pool_loss, real_apply = S._pool_loss, T._apply_update

    def pool_loss(run, model, rows, reference_rows, credit, anchor_logp, **reuse):
        if not reuse:  # the first forward: the samples, the credit and pi_old (this micro-batch)
            kept["rows"], kept["credit"] = rows, credit
            with torch.no_grad():
                kept["old"] = sequence_logprobs(model, *rows, temperature=run.cfg.temperature, top_p=run.cfg.top_p)
        return real_pool_loss(run, model, rows, reference_rows, credit, anchor_logp, **reuse)

    def apply(run, s, lr, loss, clock, what=""):
        grads.append([p.grad.detach().clone() for p in run.module.parameters()])
        if len(grads) == 2:  # before the second optimizer step: recompute its gradient by hand
            params = list(run.module.parameters())
            rows, w = kept["rows"], kept["credit"]
            lp = sequence_logprobs(run.model, *rows, temperature=run.cfg.temperature, top_p=run.cfg.top_p)
            m = rows[3].to(lp.dtype)
            seq, old = (lp * m).sum(-1), (kept["old"] * m).sum(-1)
            r = torch.exp(seq.detach() - old)
            loss_hand = -(w * r * seq).sum() / run.cfg.prompts_per_step
            kept["by_hand"] = torch.autograd.grad(loss_hand, params, allow_unused=True)
        return real_apply(run, s, lr, loss, clock, what)

    monkeypatch.setattr(S, "_pool_loss", pool_loss)
    monkeypatch.setattr(T, "_apply_update", apply)
    T.train(cfg, progress=False)
    assert len(grads) == 2
    for got, want in zip(grads[1], kept["by_hand"]):
        want = torch.zeros_like(got) if want is None else want
        torch.testing.assert_close(got, want, rtol=1e-5, atol=1e-7)
    assert max(float(g.abs().max()) for g in grads[1]) > 1e-6


def test_clip_ratio_logs_the_clipped_share(tmp_path, monkeypatch):
    monkeypatch.syspath_prepend(str(SCRIPTS))
    T.train(toy(tmp_path, "clip", updates_per_batch=3, clip_ratio=0.01, ratio_level="token", lr=5e-2), progress=False)
    for r in _train_lines(tmp_path / "clip"):
        assert 0 <= r["ratio/clip_frac"] <= 1 and 0 < r["ratio/ess"] <= 1


@pytest.mark.parametrize("bad_update", [1, 2])
def test_a_non_finite_update_of_a_reused_batch_is_refused_before_its_step(tmp_path, monkeypatch, bad_update):
    # update 1 is the on-policy forward; update 2 the reused one. Neither is applied when non-finite, and once
    # an earlier update of the batch is in the weights no checkpoint is written (it would hold part of a step).
    monkeypatch.syspath_prepend(str(SCRIPTS))
    real_pool_loss, calls = S._pool_loss, []

    def pool_loss(run, model, rows, reference_rows, credit, anchor_logp, **reuse):
        loss, info, logp = real_pool_loss(run, model, rows, reference_rows, credit, anchor_logp, **reuse)
        calls.append(bool(reuse))
        if (bad_update == 2) == bool(reuse) and len(calls) <= 2:
            loss = loss * float("nan")
        return loss, info, logp

    monkeypatch.setattr(S, "_pool_loss", pool_loss)
    steps_taken = []
    real_apply = T._apply_update
    monkeypatch.setattr(T, "_apply_update", lambda *a, **kw: (steps_taken.append(1), real_apply(*a, **kw))[1])
    cfg = toy(tmp_path, f"nan{bad_update}", updates_per_batch=2)
    with pytest.raises(ValueError, match=rf"step 1 \(update {bad_update} of 2 on its sampled batch\) has a non-finite "
                                         rf"loss") as err:
        T.train(cfg, progress=False)
    assert len(steps_taken) == bad_update  # one check per update; the failing one raised before its optimizer step
    if bad_update == 2:
        assert "earlier updates of the same batch were: no checkpoint was written" in str(err.value)


@pytest.mark.parametrize("kw, exc, msg", [
    ({"updates_per_batch": 0}, ValueError, r"updates_per_batch must be >= 1, got updates_per_batch=0"),
    ({"updates_per_batch": 65}, ValueError, r"updates_per_batch must be <= 64"),
    ({"updates_per_batch": 1.5}, TypeError, r"updates_per_batch"),
    ({"clip_ratio": 0.2}, ValueError, r"clip_ratio needs updates_per_batch > 1"),
    ({"ratio_level": "token"}, ValueError, r"ratio_level needs updates_per_batch > 1"),
    ({"updates_per_batch": 2, "ratio_level": "pool", "clip_ratio": 0.2}, ValueError, r"ratio_level='pool'"),
    ({"updates_per_batch": 2, "ratio_level": "prompt"}, ValueError, r"ratio_level must be one of"),
    ({"updates_per_batch": 2, "clip_ratio": -0.1}, ValueError, r"clip_ratio must be"),
    ({"updates_per_batch": 2, "clip_ratio": float("nan")}, ValueError, r"clip_ratio must be"),
])
def test_bad_reuse_keys_are_errors_naming_the_key(kw, exc, msg):
    with pytest.raises(exc, match=msg):
        TrainConfig(rl_steps=1, **kw)



def test_ctrl_c_inside_a_reused_batch_keeps_the_last_whole_step_and_resume_is_exact(tmp_path, monkeypatch):
    # An interrupt between the updates of a batch leaves weights of no step: no checkpoint is written then;
    # the last one on disk is a whole step, and resuming from it ends with the uninterrupted run's weights.
    monkeypatch.syspath_prepend(str(SCRIPTS))
    kw = dict(updates_per_batch=2, rl_steps=3, save_every=1, keep_checkpoints=10)
    whole = toy(tmp_path, "whole", **kw)
    T.train(whole, progress=False)
    cfg = toy(tmp_path, "cut", **kw)
    real_pool_loss = S._pool_loss

    def pool_loss(run, model, rows, reference_rows, credit, anchor_logp, **reuse):
        if reuse and len(list((tmp_path / "cut" / "checkpoints").glob("step-*"))) == 1:  # step 2's second update
            raise KeyboardInterrupt
        return real_pool_loss(run, model, rows, reference_rows, credit, anchor_logp, **reuse)

    monkeypatch.setattr(S, "_pool_loss", pool_loss)
    with pytest.raises(KeyboardInterrupt):
        T.train(cfg, progress=False)
    assert load_state(latest_checkpoint(cfg.run_dir))["step"] == 1  # not the half-applied step 2
    assert_weights_equal(_weights(latest_checkpoint(cfg.run_dir)), _weights(Path(whole.run_dir) / "checkpoints" / "step-00000001"))
    monkeypatch.setattr(S, "_pool_loss", real_pool_loss)
    T.train(cfg, resume=True, progress=False)
    assert_weights_equal(_weights(latest_checkpoint(cfg.run_dir)), _weights(latest_checkpoint(whole.run_dir)))


def _weights(ckpt):
    return load_file(str(Path(ckpt) / "model" / "model.safetensors"))


def assert_weights_equal(a, b):
    assert a.keys() == b.keys()
    for key in a:
        assert torch.equal(a[key], b[key]), key
