"""The trainer end to end on a tiny config: both stages, resume equivalence (Ctrl-C and kill -9)."""
import dataclasses
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from safetensors.torch import load_file

import bonft.trainer.loop as T
import bonft.trainer.run as R
import bonft.trainer.steps as S
from bonft.trainer.checkpoint import latest_checkpoint, load_state
from bonft.trainer.config import from_dict, to_toml

TINY = dict(
    layers=1, width=32, heads=2, max_positions=48, train_prompts=64, heldout_prompts=6, warm_start_steps=4, warm_start_batch_size=8,
    warm_start_lr=1e-2, rl_steps=4, prompts_per_step=4, n=4, k=2, lr=1e-2, eval_samples=4, eval_ks=[1, 4], n_boot=50,
    log_every=1, save_every=2, max_new_tokens=6, plots=False, eval_at_start=False, threads=1,
)


def tiny(tmp_path, name="run", **kw):
    return from_dict({**TINY, "run_dir": str(tmp_path / name), "name": name, **kw})


def final_weights(out) -> dict:
    return load_file(str(latest_checkpoint(out) / "model" / "model.safetensors"))


def assert_same_weights(a: dict, b: dict) -> None:
    assert a.keys() == b.keys()
    for key in a:
        assert torch.equal(a[key], b[key]), key


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """One uninterrupted run, shared by the resume tests."""
    tmp = tmp_path_factory.mktemp("ref")
    cfg = tiny(tmp, "ref")
    summary = T.train(cfg, progress=False)
    return cfg, summary, final_weights(cfg.run_dir)


def test_end_to_end_writes_everything(reference):
    cfg, summary, weights = reference
    out = Path(cfg.run_dir)
    lines = [json.loads(ln) for ln in (out / "metrics.jsonl").read_text().splitlines()]
    train_lines = [r for r in lines if r["kind"] == "train"]
    assert [r["step"] for r in train_lines] == list(range(1, 9))
    assert [r["stage"] for r in train_lines] == ["sft"] * 4 + ["rl"] * 4
    # the warm start lowers the NLL of the reference responses from its random-init value;
    # a uniform guess over the ~90-character vocabulary costs ln(90) ~ 4.5 nats/token (common practice)
    assert train_lines[0]["nll_per_token"] > 3.5
    assert train_lines[3]["nll_per_token"] < train_lines[0]["nll_per_token"]
    rl = train_lines[4]
    assert {"time/sample", "time/score", "time/forward", "time/credit", "time/backward", "time/optimizer", "time/step",
            "samples_per_s", "reward", "k", "grad/norm", "grad/clipped"} <= rl.keys()
    assert "grad/snr" not in rl  # opt-in (snr_every)
    # every other metric is a plain step figure or carries a prefix saying what it describes (bonft.trainer.metrics);
    # none falls back to loss/ (a loss statistic the metric table does not name)
    plain = {"kind", "stage", "step", "lr", "loss", "reward", "score", "k", "verifier_failures", "samples_per_s",
             "nll_per_token"}
    prefixes = {"time", "credit", "pool", "grad", "tokens", "anchor", "reference", "ratio"}
    named = sorted({key for r in train_lines for key in r if key not in plain})
    assert [key for key in named if key.split("/")[0] not in prefixes] == []
    assert "pool/value" in rl and "pool/with_signal" in rl and any(key.startswith("credit/") for key in rl)
    # the split adds up to the step: its phases are disjoint parts of time/step
    parts = sum(rl[f"time/{p}"] for p in ("sample", "score", "forward", "credit", "backward", "optimizer"))
    assert parts <= rl["time/step"] and rl["samples_per_s"] == pytest.approx(4 * 4 / rl["time/step"])
    # grad/clipped says whether the norm before clipping exceeded clip_grad_norm (1.0)
    assert all(r["grad/clipped"] == int(r["grad/norm"] > 1.0) for r in train_lines)
    (ev,) = [r for r in lines if r["kind"] == "eval"]
    assert ev["step"] == 8 and ev["ks"] == [1, 4] and ev["n_prompts"] == 6 and "proxy" in ev["best_of_k"]
    assert 0.0 <= ev["pass_at_k"]["mean"][0] <= ev["pass_at_k"]["mean"][1] <= 1.0  # pass@k grows with k
    assert 1.0 <= ev["distinct_answers"] <= 4.0 and ev["entropy"] > 0 and 1 <= ev["mean_length"] <= 6
    assert json.loads((out / "summary.json").read_text())["steps"] == 8
    state = load_state(latest_checkpoint(out))
    assert state["step"] == 8 and state["extra"]["stage"] == "rl" and state["optimizer"]["state"]
    assert (latest_checkpoint(out) / "tokenizer").is_dir() and (latest_checkpoint(out) / "config.toml").is_file()


def test_same_seed_same_weights_and_seed_matters(tmp_path, reference):
    cfg, _, weights = reference
    again = tiny(tmp_path, "again")
    T.train(again, progress=False)
    assert_same_weights(final_weights(again.run_dir), weights)
    other = tiny(tmp_path, "other", seed=cfg.seed + 1)  # another init, data order and sampling stream
    T.train(other, progress=False)
    changed = final_weights(other.run_dir)
    assert changed.keys() == weights.keys()
    assert sum(not torch.equal(changed[key], weights[key]) for key in weights) == len(weights)


def _interrupt_at(monkeypatch, cfg, at: int):
    """Run ``cfg`` until a Ctrl-C at RL step ``at``; returns the real step function (to restore it)."""
    real = S.rl_step

    def interrupt(run, step, clock):
        if step == at:
            raise KeyboardInterrupt
        return real(run, step, clock)

    monkeypatch.setattr(S, "rl_step", interrupt)
    with pytest.raises(KeyboardInterrupt):
        T.train(cfg, progress=False)
    return real


def test_ctrl_c_writes_checkpoint_and_resume_is_exact(tmp_path, reference, monkeypatch):
    _, _, weights = reference
    cfg = tiny(tmp_path, "interrupted", save_every=0)  # only the Ctrl-C checkpoint (and the stage boundary)
    real = _interrupt_at(monkeypatch, cfg, 6)
    assert load_state(latest_checkpoint(cfg.run_dir))["step"] == 6
    monkeypatch.setattr(S, "rl_step", real)
    T.train(cfg, resume=True, progress=False)
    assert_same_weights(final_weights(cfg.run_dir), weights)
    steps = [json.loads(ln)["step"] for ln in (Path(cfg.run_dir) / "metrics.jsonl").read_text().splitlines()
             if '"train"' in ln]
    assert steps == list(range(1, 9))  # no step logged twice, none lost


def test_kill_9_then_resume_is_exact(tmp_path, reference):
    _, _, weights = reference
    cfg = tiny(tmp_path, "killed", save_every=1)
    recipe = tmp_path / "killed.toml"
    recipe.write_text(to_toml(cfg))
    cmd = [sys.executable, "-m", "bonft.cli", "train", str(recipe), "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    killed_at = None
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        ck = latest_checkpoint(cfg.run_dir)
        if ck is not None and int(ck.name.split("-")[1]) >= 2:
            os.kill(proc.pid, signal.SIGKILL)
            killed_at = int(ck.name.split("-")[1])
            break
        time.sleep(0.02)
    proc.wait()
    assert killed_at is not None, f"the run ended before it could be killed: {proc.stderr.read().decode()[-500:]}"
    assert proc.returncode == -signal.SIGKILL
    assert load_state(latest_checkpoint(cfg.run_dir))["step"] < 8
    T.train(cfg, resume=True, progress=False)  # in-process: one interpreter start less
    assert_same_weights(final_weights(cfg.run_dir), weights)


def test_resume_refuses_a_recipe_that_changes_the_training(tmp_path, reference, monkeypatch):
    # --resume continues a run with its own settings: a changed objective would mix two runs in one
    # directory (and rotate the first run's checkpoints away), so it is refused before any step, naming each
    # changed key with both values; where and how it runs and records may change, a step size (with a
    # warning), and rl_steps under a constant k (train longer); a refusal leaves the run's files untouched
    cfg = tiny(tmp_path, "mixed", save_every=0)
    real = _interrupt_at(monkeypatch, cfg, 6)
    monkeypatch.setattr(S, "rl_step", real)
    out = Path(cfg.run_dir)
    before = {p.name: p.read_bytes() for p in (out / "checkpoints").glob("*/state.pt")}
    config_before = (out / "config.toml").read_text()
    changed = tiny(tmp_path, "mixed", save_every=0, objective="reinforce", k=1, lr=0.5)
    with pytest.raises(ValueError, match=r"the recipe changes 2 key\(s\) that shape the training: "
                                         r"objective: \"pass_at_k\" -> \"reinforce\"; k: 2 -> 1\. Resume with"):
        T.train(changed, resume=True, progress=False)
    assert {p.name: p.read_bytes() for p in (out / "checkpoints").glob("*/state.pt")} == before
    assert (out / "config.toml").read_text() == config_before
    # fewer steps than the checkpoint already holds: the run would report 5 steps with weights of 6
    with pytest.raises(ValueError, match=r"rl_steps = 1 ends the run at step 5, but its newest checkpoint "
                                         r"step-00000006 is at step 6"):
        T.train(tiny(tmp_path, "mixed", save_every=0, rl_steps=1), resume=True, progress=False)
    with pytest.raises(ValueError, match=r"k_final: 0 -> 3"):  # k spread over the steps: rl_steps fixed too
        T.train(tiny(tmp_path, "mixed", save_every=0, k_schedule="linear", k_final=3), resume=True, progress=False)
    # a new name, checkpoint cadence, more RL steps and a lower lr (as after a non-finite step): resumed, the
    # step size named in a warning, every step logged once
    longer = dataclasses.replace(tiny(tmp_path, "mixed", save_every=3, keep_checkpoints=5, rl_steps=6, lr=5e-3),
                                 name="longer")
    with pytest.warns(UserWarning, match=r"from step-00000006 with changed step sizes: lr: 0\.01 -> 0\.005"):
        T.train(longer, resume=True, progress=False)
    steps = [json.loads(ln)["step"] for ln in (out / "metrics.jsonl").read_text().splitlines() if '"train"' in ln]
    assert steps == list(range(1, 11))


def test_a_training_verifier_that_fails_on_every_sample_stops_the_run_before_the_update(tmp_path, monkeypatch):
    # a verifier that raises on every sample (here a KeyError, as a missing row field gives) would score every
    # sample 0: the step would learn nothing from it, and a run would train on the KL anchor alone. The run
    # stops at the first such step, naming the cause, and keeps the checkpoints written before it
    from bonft.cli.main import main
    from bonft.verifiers.scoring import VerifierError

    monkeypatch.chdir(tmp_path)
    (tmp_path / "broken_grader.py").write_text("def score(prompts, responses):\n    raise KeyError('gold')\n")
    cfg = tiny(tmp_path, "broken", verifier="broken_grader:score", save_every=0)
    with pytest.raises(VerifierError, match=r"the training verifier failed on every one of the 16 samples of step 4 "
                                            r"\(KeyError: 'gold'\), so every sample would get one stand-in score"):
        T.train(cfg, progress=False)
    assert load_state(latest_checkpoint(cfg.run_dir))["step"] == 4  # the warm start's checkpoint, kept
    recipe = tmp_path / "broken.toml"
    recipe.write_text(to_toml(tiny(tmp_path, "broken-cli", verifier="broken_grader:score", warm_start_steps=0,
                                       warm_start_lr=3e-3, warm_start_batch_size=128)))
    assert main(["train", str(recipe), "--quiet"]) == 2  # a user error, not a traceback


def test_refuses_to_overwrite_a_run(tmp_path, reference):
    cfg, _, _ = reference
    with pytest.raises(ValueError, match="already holds checkpoints; pass --resume"):
        T.train(cfg, progress=False)


@pytest.mark.parametrize(
    "schedule, k, k_final, expect",
    [("constant", 8, 0, [8, 8, 8, 8, 8]), ("linear", 16, 1, [16, 12, 8, 5, 1]), ("geometric", 16, 1, [16, 8, 4, 2, 1])],
)
def test_k_schedule(tmp_path, schedule, k, k_final, expect):
    # geometric: 16 * (1/16)^(t/4) = 16, 8, 4, 2, 1 (hand computed); linear: 16 - 15 t / 4 rounded
    cfg = tiny(tmp_path, rl_steps=5, n=16, k=k, k_final=k_final, k_schedule=schedule)
    assert [R.k_at(cfg, t) for t in range(5)] == expect


def test_seed_streams_are_named_and_derived_one_way():
    # the stream values are part of every recorded run: they never change
    assert {m.name: int(m) for m in R.Stream} == {"SAMPLES": 0, "BATCH": 1, "EVALUATION": 2, "STEP": 3,
                                                  "SAMPLE_COMMAND": 4, "PLACEBO": 5}
    seeds = {R.Stream.STEP.seed(0, step=s, rank=r) for s in range(50) for r in range(4)}
    assert len(seeds) == 200
    # reference: numpy's SeedSequence on the tuple (seed, step, rank, stream), first 64-bit word, top 63 bits
    # (numpy documentation, "Parallel random number generation"); a prompt's seed puts the tag 0x5EED
    # before its slot: (seed, step, 0x5EED, slot, stream)
    for seed, step, rank in [(0, 3, 1), (7, 0, 0), (2**40, 123456, 3)]:
        for stream in R.Stream:
            word = int(np.random.SeedSequence([seed, step, rank, int(stream)]).generate_state(1, np.uint64)[0])
            assert stream.seed(seed, step=step, rank=rank) == word >> 1
            word = int(np.random.SeedSequence([seed, step, 0x5EED, rank, int(stream)]).generate_state(1, np.uint64)[0])
            assert stream.for_prompt(seed, step=step, slot=rank) == word >> 1
    # the streams of one (seed, step, rank or slot) never collide
    assert len({m.seed(3, step=5, rank=1) for m in R.Stream} | {m.for_prompt(3, step=5, slot=1) for m in R.Stream}) == 12
    with pytest.raises(ValueError, match=r"step must be >= 0, got step=-1"):
        R.Stream.BATCH.seed(0, step=-1)


def test_prompt_sharding_keeps_the_global_batch(tmp_path):
    cfg = tiny(tmp_path)
    whole = R.prompt_batch(cfg, 5, 8, 64, 0, 1)
    parts = [R.prompt_batch(cfg, 5, 8, 64, r, 2) for r in range(2)]
    assert sorted(whole.tolist()) == sorted(parts[0].tolist() + parts[1].tolist())


@pytest.mark.parametrize("poison", ["loss", "gradient"])
def test_non_finite_step_stops_before_the_update_and_keeps_good_checkpoints(tmp_path, monkeypatch, poison):
    # the finite check runs before optimizer.step(): a bad step is never applied, and every checkpoint
    # holds the weights of the step its label names (a resume cannot apply a step twice)
    ref = tiny(tmp_path, "ref", rl_steps=0, warm_start_steps=6, save_every=1, keep_checkpoints=10)
    T.train(ref, progress=False)
    at = lambda out, s: load_file(str(Path(out) / "checkpoints" / f"step-{s:08d}" / "model" / "model.safetensors"))
    cfg = tiny(tmp_path, "bad", rl_steps=0, warm_start_steps=6, save_every=2)
    real = S.sft_step

    def bad_at_3(run, step, clock):  # the 4th step (0-based step 3) goes wrong
        rec = real(run, step, clock)
        if step == 3 and poison == "loss":
            rec["loss"] = float("nan")
        if step == 3 and poison == "gradient":
            next(run.module.parameters()).grad.view(-1)[0] = float("inf")
        return rec

    monkeypatch.setattr(S, "sft_step", bad_at_3)
    with pytest.raises(ValueError, match=rf"step 4 has a non-finite {poison}.*not applied, checkpoint step-00000003"):
        T.train(cfg, progress=False)
    assert sorted(p.name for p in (Path(cfg.run_dir) / "checkpoints").iterdir()) == ["step-00000002", "step-00000003"]
    assert_same_weights(at(cfg.run_dir, 2), at(ref.run_dir, 2))  # the earlier checkpoint is intact
    assert_same_weights(at(cfg.run_dir, 3), at(ref.run_dir, 3))  # and step-3 holds exactly 3 updates
    monkeypatch.setattr(S, "sft_step", real)
    T.train(cfg, resume=True, progress=False)  # resuming applies each step once
    assert_same_weights(final_weights(cfg.run_dir), at(ref.run_dir, 6))


@pytest.mark.parametrize("top_k, top_p", [(3, 1.0), (3, 0.8)])
def test_a_truncated_sampling_law_is_trained_on_policy(tmp_path, monkeypatch, top_k, top_p):
    # the training forward scores the law the samples were drawn from: with top_k (and top_p) its log-probs of
    # the sampled tokens are the sampler's own, to float32 round-off (an untruncated forward would differ)
    drawn, scored = [], []
    real_sample, real_lp = S.sample, S.sequence_logprobs

    def sample(*a, **kw):
        drawn.append(real_sample(*a, **kw))
        return drawn[-1]

    def logprobs(model, *rows, **kw):
        scored.append((kw, real_lp(model, *rows, **kw)))
        return scored[-1][1]

    monkeypatch.setattr(S, "sample", sample)
    monkeypatch.setattr(S, "sequence_logprobs", logprobs)
    T.train(tiny(tmp_path, warm_start_steps=1, rl_steps=1, top_k=top_k, top_p=top_p, temperature=0.8), progress=False)
    (smp,) = drawn
    assert (smp.top_k, smp.top_p) == (top_k, top_p)
    (kw, lp), = [(kw, lp) for kw, lp in scored if kw.get("top_k") == top_k]
    assert kw == {"temperature": 0.8, "top_p": top_p, "top_k": top_k}
    torch.testing.assert_close(lp.detach(), smp.token_logprobs, atol=2e-5, rtol=0)


def test_a_broken_starting_model_is_named_as_the_cause_of_a_non_finite_first_step(tmp_path):
    # no update has happened yet, so "lower lr" would be the wrong advice: the weights were loaded with a NaN
    from bonft.tasks.tokenizer import build_tokenizer
    from bonft.trainer.checkpoint import save_model
    from bonft.trainer.models import build_tiny_model

    tok = build_tokenizer()
    model = build_tiny_model(vocab_size=len(tok), layers=1, width=32, heads=2, max_positions=48, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    with torch.no_grad():
        model.transformer.h[0].mlp.c_fc.weight[0, 0] = float("nan")
    save_model(model, tok, tmp_path / "broken")
    keys = {k: v for k, v in TINY.items() if k not in ("layers", "width", "heads", "max_positions")}
    cfg = from_dict({**keys, "start_from": str(tmp_path / "broken"), "rl_steps": 0, "warm_start_steps": 2,
                     "run_dir": str(tmp_path / "run")})
    with pytest.raises(ValueError, match=r"step 1 has a non-finite loss \(loss nan, gradient norm nan\): the model's "
                                         r"weights already hold NaN or inf before this update, in 1 tensor\(s\) "
                                         r"\(transformer.h.0.mlp.c_fc.weight\); the starting model is broken"):
        T.train(cfg, progress=False)


def test_resume_with_sgd_momentum_is_exact(tmp_path, monkeypatch):
    # the momentum buffers travel in the checkpoint like AdamW's moments (placebo on: its permutations too)
    kw = dict(optimizer="sgd", momentum=0.9, lr=0.05, placebo=True, save_every=0)
    whole = tiny(tmp_path, "whole", **kw)
    T.train(whole, progress=False)
    cfg = tiny(tmp_path, "cut", **kw)
    real = _interrupt_at(monkeypatch, cfg, 6)
    monkeypatch.setattr(S, "rl_step", real)
    state = load_state(latest_checkpoint(cfg.run_dir))
    assert state["step"] == 6 and any("momentum_buffer" in v for v in state["optimizer"]["state"].values())
    T.train(cfg, resume=True, progress=False)
    assert_same_weights(final_weights(cfg.run_dir), final_weights(whole.run_dir))
