"""LoRA adapters (optional extra peft) and recomputed activations in the trainer.

What is checked against outside facts:

* a LoRA adapter of rank r on a layer W (d_out x d_in) has r (d_in + d_out) weights, B starts at 0 so
  the adapted model equals the base model at step 0 (Hu et al. 2021, arXiv:2106.09685, sec. 4.1);
* the KL anchor of an adapter run is the base model: its log-probs equal those of the base model loaded
  on its own (reference: transformers' own forward of the untouched base directory), exactly;
* gradient checkpointing recomputes the same forward in backward, so the gradient equals the plain
  one up to float32 round-off (Chen et al. 2016, arXiv:1604.06174; the reference is the plain backward);
* resuming is bit-identical: N steps straight == N/2 steps, an interrupt, a resume and N/2 more
  (common practice for checkpointed training; no outside source).
"""
import gc
import json
import sys
from pathlib import Path

import datasets
import pytest
import torch
from safetensors.torch import load_file
from transformers import PreTrainedModel

from bonft.cli import main
from bonft.generation import encode_responses, sequence_logprobs
from bonft.tasks import build_tokenizer
from bonft.trainer import steps as S
from bonft.trainer.config import from_dict
from bonft.trainer.loop import train
from bonft.trainer.models import build_tiny_model, load_model

GRADER = '''
def longer(prompts, responses):
    return [float(len(r)) for r in responses]

def has_digit(prompts, responses):
    return [float(any(c.isdigit() for c in r)) for r in responses]
'''
WIDTH, LAYERS = 32, 2


def save_base(path, arch="gpt2", width=WIDTH):
    tok = build_tokenizer()
    model = build_tiny_model(arch, vocab_size=len(tok), layers=LAYERS, width=width, heads=2, max_positions=64, seed=0,
                             pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id, bos_token_id=tok.bos_token_id)
    model.save_pretrained(str(path))
    tok.save_pretrained(str(path))
    return path


@pytest.fixture
def user_base(tmp_path, monkeypatch):
    save_base(tmp_path / "base")
    rows = [{"question": f"jars {a}+{b}"} for a in range(1, 6) for b in range(1, 5)]
    datasets.Dataset.from_list(rows).save_to_disk(str(tmp_path / "jars"))
    (tmp_path / "grader.py").write_text(GRADER)
    monkeypatch.chdir(tmp_path)
    base = dict(start_from="base", task="user", task_params={"data": "jars", "prompt_field": "question"},
                verifier="grader:longer", eval_verifier="grader:has_digit", objective="reinforce", n=4, k=1,
                rl_steps=4, prompts_per_step=4, lr=3e-2, warmup_steps=1, train_prompts=14, heldout_prompts=4,
                eval_samples=4, eval_ks=[1, 4], max_new_tokens=3, n_boot=20, plots=False, save_every=0, threads=1,
                log_every=1, eval_at_start=False)
    return tmp_path, base


def cfg_of(user_base, name, **kw):
    tmp, base = user_base
    return from_dict({**base, **kw, "run_dir": str(tmp / name)})


def newest(run_dir):
    return sorted((Path(run_dir) / "checkpoints").glob("step-*"))[-1]


def train_lines(run_dir):
    lines = [json.loads(x) for x in (Path(run_dir) / "metrics.jsonl").read_text().splitlines()]
    return [{k: v for k, v in r.items() if not k.startswith("time/") and k != "samples_per_s"}
            for r in lines if r["kind"] == "train"]


def stop_before_step_3(cfg, monkeypatch):
    """Train ``cfg`` until a Ctrl-C arrives in its third RL step (after the checkpoint of step 2)."""
    real = S.rl_step

    def stop_at_3(run, step, clock):
        if step == 2:
            raise KeyboardInterrupt
        return real(run, step, clock)

    monkeypatch.setattr(S, "rl_step", stop_at_3)
    with pytest.raises(KeyboardInterrupt):
        train(cfg, progress=False)
    monkeypatch.setattr(S, "rl_step", real)


def test_an_adapter_trains_its_factors_only_and_checkpoints_only_them(user_base):
    pytest.importorskip("peft")
    from bonft.trainer.adapters import trainable_count
    from bonft.trainer.run import build_run

    cfg = cfg_of(user_base, "a", adapter_rank=4, adapter_scale=2.0)
    # the base: 30,304 weights (counted by torch on the saved model); the adapter: LAYERS x r (d_in + d_out)
    assert sum(p.numel() for p in load_model(user_base[0] / "base")[0].parameters()) == 30_304
    assert trainable_count(build_run(cfg).module) == (1024, 30_304 + 1024)
    train(cfg, progress=False)
    ckpt = newest(cfg.run_dir)
    assert sorted(p.name for p in (ckpt / "model").iterdir() if p.suffix != ".md") == [
        "adapter_config.json", "adapter_model.safetensors"]
    saved = load_file(str(ckpt / "model" / "adapter_model.safetensors"))
    # GPT-2's default adapted layer is c_attn (d_in = WIDTH, d_out = 3 WIDTH); r (d_in + d_out) per layer (Hu et al.)
    assert sum(t.numel() for t in saved.values()) == LAYERS * 4 * (WIDTH + 3 * WIDTH) == 1024
    adapter_cfg = json.loads((ckpt / "model" / "adapter_config.json").read_text())
    assert adapter_cfg["r"] == 4 and adapter_cfg["lora_alpha"] == 8.0  # scale 2 = alpha / r
    assert adapter_cfg["base_model_name_or_path"] == str((user_base[0] / "base").resolve())
    assert any(float(t.abs().max()) > 0 for k, t in saved.items() if "lora_B" in k)  # the factors moved
    model, _ = load_model(ckpt)
    base, _ = load_model(user_base[0] / "base")
    inner = dict(model.get_base_model().named_parameters())
    for name, p in base.named_parameters():  # the base weights are frozen: bit for bit the base directory's
        key = name.replace("c_attn.weight", "c_attn.base_layer.weight").replace("c_attn.bias", "c_attn.base_layer.bias")
        assert torch.equal(inner[key], p), name
    # the optimizer state holds the factors' moments only (AdamW: exp_avg and exp_avg_sq per factor)
    state = torch.load(ckpt / "state.pt", weights_only=True)
    assert len(state["optimizer"]["state"]) == len(saved) == 2 * LAYERS


def test_resume_of_an_adapter_run_is_bit_identical(user_base, monkeypatch):
    pytest.importorskip("peft")
    kw = dict(adapter_rank=4, save_every=1, keep_checkpoints=10, anchor_weight=0.1)
    whole = cfg_of(user_base, "whole", **kw)
    train(whole, progress=False)
    cut = cfg_of(user_base, "cut", **kw)
    stop_before_step_3(cut, monkeypatch)
    assert newest(cut.run_dir).name == "step-00000002"
    train(cut, resume=True, progress=False)
    a = load_file(str(newest(whole.run_dir) / "model" / "adapter_model.safetensors"))
    b = load_file(str(newest(cut.run_dir) / "model" / "adapter_model.safetensors"))
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
    assert train_lines(whole.run_dir) == train_lines(cut.run_dir)
    assert [r["step"] for r in train_lines(whole.run_dir)] == [1, 2, 3, 4]
    assert all(r["anchor/kl"] > 0 for r in train_lines(whole.run_dir)[1:])  # the adapter moved off the base
    assert not (Path(whole.run_dir) / "rl_start").exists()  # no copy of the model for the anchor


def test_the_anchor_is_the_base_model_with_the_adapter_off_and_no_second_model(user_base):
    pytest.importorskip("peft")
    from bonft.trainer.adapters import AdapterOff
    from bonft.trainer.run import build_run

    tok = build_tokenizer()
    rows = encode_responses(tok, ["jars 1+2", "jars 3+4"], [["3", "34"], ["7", "x"]])
    with torch.no_grad():
        base, _ = load_model(user_base[0] / "base")
        want = sequence_logprobs(base, *rows)  # transformers' forward of the untouched base directory
    del base
    gc.collect()
    run = build_run(cfg_of(user_base, "anchor", adapter_rank=4, anchor_weight=0.1))
    with torch.no_grad():
        assert torch.equal(sequence_logprobs(run.module, *rows), want)  # B = 0 at the start: the base model (Hu et al.)
        for name, p in run.module.named_parameters():
            if "lora_B" in name:
                p.normal_()
        policy = sequence_logprobs(run.module, *rows)
        anchor = AdapterOff(run.module)
        got = sequence_logprobs(anchor, *rows)
    assert not torch.allclose(policy, want)  # the adapter changes the policy...
    assert torch.equal(got, want)  # ...and the anchor is exactly the base model
    assert {id(p) for p in anchor.parameters()} == {id(p) for p in run.module.parameters()}
    gc.collect()
    mine = [o for o in gc.get_objects() if issubclass(type(o), PreTrainedModel) and hasattr(o, "lm_head")
            and Path(o.name_or_path).resolve() == (user_base[0] / "base").resolve()]
    assert len(mine) == 1  # one model of the base directory in memory: the policy's, which the anchor shares


def test_recomputed_activations_give_the_plain_gradient_and_run():
    tok = build_tokenizer()
    rows = encode_responses(tok, ["jars 1+2", "jars 3+4 and more"], [["3", "34"], ["7", "x y"]])
    grads = []
    for recompute in (False, True):
        model = build_tiny_model("llama", vocab_size=len(tok), layers=2, width=32, heads=2, seed=1,
                                 pad_token_id=tok.pad_token_id, eos_token_id=tok.eos_token_id)
        if recompute:
            from bonft.trainer.models import is_recomputing, recompute_activations

            recompute_activations(model)
            assert is_recomputing(model)
        model.train()
        sequence_logprobs(model, *rows).sum().backward()
        grads.append([p.grad.clone() for p in model.parameters()])
    for a, b in zip(*grads):
        torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-6)  # float32 round-off


def test_recompute_activations_in_a_run_equals_the_plain_run(user_base):
    # SGD: an update proportional to the gradient (AdamW's sign-like first steps would magnify round-off
    # in weights whose gradient is near 0)
    kw = dict(rl_steps=2, optimizer="sgd", lr=0.5, clip_grad_norm=0.0)
    plain = cfg_of(user_base, "plain", **kw)
    again = cfg_of(user_base, "again", recompute_activations=True, **kw)
    train(plain, progress=False)
    train(again, progress=False)
    a, b = load_file(str(newest(plain.run_dir) / "model" / "model.safetensors")), \
        load_file(str(newest(again.run_dir) / "model" / "model.safetensors"))
    assert any(not torch.equal(a[k], load_file(str(user_base[0] / "base" / "model.safetensors"))[k]) for k in a)
    for k in a:
        torch.testing.assert_close(a[k], b[k], rtol=1e-5, atol=1e-6)
    la, lb = train_lines(plain.run_dir), train_lines(again.run_dir)
    assert [r["reward"] for r in la] == [r["reward"] for r in lb]  # the same samples were drawn
    assert [r["loss"] for r in la] == pytest.approx([r["loss"] for r in lb], rel=1e-4, abs=1e-6)


# ----------------------------------------------------------------------------- bad input
def test_adapter_keys_that_cannot_take_effect_are_errors(user_base):
    tmp, base = user_base
    with pytest.raises(ValueError, match=r"^adapter_scale needs adapter_rank >= 1 \(it shapes a LoRA adapter"):
        from_dict({**base, "adapter_scale": 1.0})
    with pytest.raises(ValueError, match=r"^adapter_rank needs start_from \(the base model the adapter trains on"):
        from_dict({**base, "start_from": "", "adapter_rank": 4})
    with pytest.raises(ValueError, match=r"^recompute_activations cannot take effect without training steps"):
        from_dict({**base, "rl_steps": 0, "recompute_activations": True})
    with pytest.raises(ValueError, match=r"^adapter_dropout must be in \[0, 1\), got adapter_dropout=1.0"):
        from_dict({**base, "adapter_rank": 4, "adapter_dropout": 1.0})
    with pytest.raises(ValueError, match=r"^adapter_rank must be left unset with adapter_from"):
        from_dict({**base, "adapter_rank": 4, "adapter_from": "somewhere"})
    with pytest.raises(TypeError, match=r"^adapter_modules must be a list of layer names"):
        from_dict({**base, "adapter_rank": 4, "adapter_modules": "c_attn"})
    with pytest.raises(ValueError, match=r"^adapter_rank cannot take effect without training steps"):
        from_dict({**base, "rl_steps": 0, "adapter_rank": 4})
    cfg = from_dict({**base, "adapter_rank": 2})
    assert cfg.adapter_modules == []


def test_adapter_keys_without_peft_say_how_to_install_it(user_base, monkeypatch, capsys):
    tmp, base = user_base
    monkeypatch.setitem(sys.modules, "peft", None)  # import peft now raises ImportError
    with pytest.raises(ValueError, match=r"^adapter_rank needs the optional dependency peft, which is not installed: "
                                         r"pip install 'bonft\[peft\]'$"):
        from_dict({**base, "adapter_rank": 4})
    (tmp / "r.toml").write_text('start_from = "base"\nrl_steps = 1\nadapter_rank = 4\n')
    assert main(["train", str(tmp / "r.toml"), "--output", str(tmp / "nopeft"), "--quiet"]) != 0
    err = capsys.readouterr().err
    assert err.strip() == ("bonft train: error: adapter_rank needs the optional dependency peft, which is not "
                           "installed: pip install 'bonft[peft]'")
    assert not (tmp / "nopeft").exists()
    # an adapter directory to evaluate, peft missing: the same advice, one line
    (tmp / "adapter").mkdir()
    (tmp / "adapter" / "adapter_config.json").write_text(json.dumps({"peft_type": "LORA", "base_model_name_or_path": "base"}))
    assert main(["eval", str(tmp / "adapter"), "--recipe", str(tmp / "r.toml"), "--n", "2", "--ks", "1"]) != 0
    assert capsys.readouterr().err.strip() == ("bonft eval: error: LoRA adapters need the optional dependency peft, "
                                               "which is not installed: pip install 'bonft[peft]'")


def test_bad_adapters_stop_before_any_step_with_one_line(user_base, capsys):
    pytest.importorskip("peft")
    tmp, base = user_base
    save_base(tmp / "wide", width=64)
    train(cfg_of(user_base, "small", adapter_rank=2, rl_steps=1), progress=False)
    adapter = newest(tmp / "small")
    capsys.readouterr()

    def fails(*overrides, run="bad"):
        code = main(["train", str(tmp / "r.toml"), "--output", str(tmp / run), "--quiet", *overrides])
        err = capsys.readouterr().err
        assert code != 0 and len(err.strip().splitlines()) == 1, err
        assert not (tmp / run / "checkpoints").exists() and not (tmp / run / "config.toml").exists()
        return err.strip()

    (tmp / "r.toml").write_text(
        'start_from = "base"\ntask = "user"\nverifier = "grader:longer"\neval_verifier = "grader:has_digit"\n'
        'objective = "reinforce"\nn = 4\nk = 1\nrl_steps = 1\nprompts_per_step = 2\ntrain_prompts = 14\n'
        'heldout_prompts = 4\neval_samples = 4\neval_ks = [1]\nmax_new_tokens = 3\nplots = false\nthreads = 1\n'
        '[task_params]\ndata = "jars"\nprompt_field = "question"\n')
    err = fails("--set", f"adapter_from={adapter}", "--set", "start_from=wide")
    assert (f"adapter_from {str(adapter)!r} was trained on {str((tmp / 'base').resolve())!r} (base_model_name_or_path in "
            f"{adapter / 'model' / 'adapter_config.json'}), which differs from start_from 'wide' in hidden_size 32 vs 64"
            in err)
    err = fails("--set", "adapter_rank=2", "--set", "adapter_modules=q_proj,v_proj")
    assert ("adapter_modules names no layer of the start_from model (['q_proj', 'v_proj']); its linear layers are "
            "['c_attn', 'c_fc', 'c_proj', 'lm_head']: name some of those") in err
    err = fails("--set", "adapter_rank=2", "--set", "adapter_modules=c_attn,v_proj")
    assert "adapter_modules names ['v_proj'], which the start_from model does not have (its linear layers are" in err
    err = fails("--set", "adapter_rank=40")
    assert "adapter_rank must be <= 32 (the smaller side of the narrowest adapted layer" in err
    err = fails("--set", f"start_from={adapter}")
    assert f"start_from {str(adapter)!r} is a LoRA adapter: to train it further set adapter_from = {str(adapter)!r}" in err
    # an adapter whose base model directory is gone: eval and training name the file and the field
    cfg_file = adapter / "model" / "adapter_config.json"
    moved = tmp / "moved"
    import shutil

    shutil.copytree(adapter / "model", moved)
    (moved / "adapter_config.json").write_text(
        json.dumps({**json.loads(cfg_file.read_text()), "base_model_name_or_path": str(tmp / "gone")}))
    assert main(["eval", str(moved), "--recipe", str(tmp / "r.toml"), "--n", "4", "--ks", "1"]) != 0
    err = capsys.readouterr().err.strip()
    assert err == (f"bonft eval: error: adapter {str(moved)!r}: its base model {str(tmp / 'gone')!r} "
                   f"(base_model_name_or_path in {moved / 'adapter_config.json'}) is not a directory here; put the base "
                   f"model there or set that field to its directory")


def test_eval_and_sample_accept_an_adapter_directory_and_an_adapter_checkpoint(user_base, capsys):
    pytest.importorskip("peft")
    tmp, base = user_base
    cfg = cfg_of(user_base, "ev", adapter_rank=4)
    train(cfg, progress=False)
    ckpt = newest(cfg.run_dir)
    capsys.readouterr()
    assert main(["eval", str(tmp / "ev"), "--n", "4", "--ks", "1,4", "--json", str(tmp / "e1.json")]) == 0
    # the adapter directory alone (what peft's save_pretrained writes), with the recipe for the task and verifiers
    (tmp / "r.toml").write_text(
        'task = "user"\nverifier = "grader:longer"\neval_verifier = "grader:has_digit"\ntrain_prompts = 14\n'
        'heldout_prompts = 4\nmax_new_tokens = 3\nrl_steps = 4\nadapter_rank = 4\n'
        '[task_params]\ndata = "jars"\nprompt_field = "question"\n')
    assert main(["eval", str(ckpt / "model"), "--recipe", str(tmp / "r.toml"), "--n", "4", "--ks", "1,4",
                 "--json", str(tmp / "e2.json")]) == 0
    e1, e2 = (json.loads((tmp / f).read_text()) for f in ("e1.json", "e2.json"))
    assert e1["pass_at_k"]["mean"] == e2["pass_at_k"]["mean"] and e1["eval_verifier"] == "grader:has_digit"  # the same policy
    final = [json.loads(x) for x in (tmp / "ev" / "metrics.jsonl").read_text().splitlines()][-1]
    assert final["kind"] == "eval" and final["step"] == 4
    assert e1["pass_at_k"]["mean"] == final["pass_at_k"]["mean"]  # what the run's own last evaluation measured
    assert main(["sample", str(ckpt / "model"), "--recipe", str(tmp / "r.toml"), "--n", "2", "-o", str(tmp / "s.jsonl")]) == 0
    rows = [json.loads(x) for x in (tmp / "s.jsonl").read_text().splitlines()]
    assert len(rows) == 8 and all(r["reward"] == float(any(c.isdigit() for c in r["response"])) for r in rows)


def test_adapter_from_continues_a_trained_adapter_on_its_base(user_base):
    pytest.importorskip("peft")
    from bonft.trainer.run import build_run

    first = cfg_of(user_base, "first", adapter_rank=4, rl_steps=2)
    train(first, progress=False)
    ckpt = newest(first.run_dir)
    saved = load_file(str(ckpt / "model" / "adapter_model.safetensors"))
    run = build_run(cfg_of(user_base, "next", adapter_from=str(ckpt)))
    params = {n: p for n, p in run.module.named_parameters() if p.requires_grad}
    assert len(params) == len(saved) == 2 * LAYERS  # the adapter's factors train, nothing else
    for key, tensor in saved.items():  # it starts from the saved factors, exactly
        assert torch.equal(params[key.replace(".weight", ".default.weight")], tensor)
    # rl_steps = 0 evaluates the adapter as it is: the same pass@k as the first run's last evaluation
    cfg = cfg_of(user_base, "look", adapter_from=str(ckpt), rl_steps=0)
    evs = train(cfg, progress=False)["evaluations"]
    last = json.loads((Path(first.run_dir) / "summary.json").read_text())["evaluations"][-1]
    assert [e["step"] for e in evs] == [0] and evs[0]["pass_at_k"]["mean"] == last["pass_at_k"]["mean"]


def test_resume_keeps_recomputing_activations(user_base, monkeypatch):
    # The resumed steps must run the same forward as the uninterrupted run's (the recomputing one, which skips the
    # cached prompt pass): bit-equal weights fail if the reloaded model lost the setting.
    kw = dict(recompute_activations=True, save_every=1, keep_checkpoints=10)
    whole = cfg_of(user_base, "whole", **kw)
    train(whole, progress=False)
    cut = cfg_of(user_base, "cut", **kw)
    stop_before_step_3(cut, monkeypatch)
    train(cut, resume=True, progress=False)
    a = load_file(str(newest(whole.run_dir) / "model" / "model.safetensors"))
    b = load_file(str(newest(cut.run_dir) / "model" / "model.safetensors"))
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)
    assert train_lines(whole.run_dir) == train_lines(cut.run_dir)
