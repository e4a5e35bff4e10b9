"""Checkpoints: exact round trip, and a crash during a save leaves the previous checkpoint loadable."""
import random

import numpy as np
import pytest
import torch

from bonft.trainer.checkpoint import latest_checkpoint, list_checkpoints, load_state, resolve_checkpoint, save_checkpoint, set_rng_state
from bonft.trainer.models import build_tiny_model, load_model
from bonft.tasks.tokenizer import build_tokenizer


@pytest.fixture()
def parts():
    tok = build_tokenizer()
    model = build_tiny_model("gpt2", vocab_size=len(tok), layers=1, width=16, heads=2, max_positions=32, seed=3)
    opt = torch.optim.AdamW(model.parameters(), lr=1e-2)
    model(torch.tensor([[1, 5, 6]]), labels=torch.tensor([[1, 5, 6]])).loss.backward()
    opt.step()
    return model, tok, opt


def _weights(model):
    return {k: v.detach().clone() for k, v in model.state_dict().items()}


def test_round_trip_is_exact(tmp_path, parts):
    model, tok, opt = parts
    random.seed(1), np.random.seed(2), torch.manual_seed(3)
    path = save_checkpoint(tmp_path, step=7, model=model, tokenizer=tok, optimizer=opt, config_toml="k = 1\n", extra={"stage": "rl"})
    draws = (random.random(), np.random.rand(), torch.rand(1).item())
    assert path.name == "step-00000007" and (path / "model" / "model.safetensors").is_file()
    loaded, tok2 = load_model(path, device="cpu")
    for k, v in _weights(model).items():
        assert torch.equal(loaded.state_dict()[k], v), k
    state = load_state(path)
    assert state["step"] == 7 and state["extra"] == {"stage": "rl"}
    opt2 = torch.optim.AdamW(loaded.parameters(), lr=1e-2)
    opt2.load_state_dict(state["optimizer"])
    for a, b in zip(opt.state.values(), opt2.state.values()):
        assert torch.equal(a["exp_avg"], b["exp_avg"]) and torch.equal(a["exp_avg_sq"], b["exp_avg_sq"])
    set_rng_state(state["rng"])  # the global RNGs continue exactly where they were at the save
    assert (random.random(), np.random.rand(), torch.rand(1).item()) == draws
    assert tok2("ab")["input_ids"] == tok("ab")["input_ids"]


def test_crash_during_save_keeps_previous(tmp_path, parts, monkeypatch):
    model, tok, opt = parts
    save_checkpoint(tmp_path, step=1, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    before = _weights(model)
    with torch.no_grad():
        for p in model.parameters():
            p.add_(1.0)

    def boom(*a, **k):
        raise OSError("disk full (simulated)")

    monkeypatch.setattr(torch, "save", boom)  # dies after the weights, before state.pt
    with pytest.raises(OSError, match="simulated"):
        save_checkpoint(tmp_path, step=2, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    monkeypatch.undo()
    latest = latest_checkpoint(tmp_path)
    assert latest.name == "step-00000001"
    loaded, _ = load_model(latest, device="cpu")
    for k, v in before.items():
        assert torch.equal(loaded.state_dict()[k], v), k
    # the next successful save cleans the half-written directory
    save_checkpoint(tmp_path, step=3, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    assert [p.name for p in (tmp_path / "checkpoints").iterdir()] != [] and not list((tmp_path / "checkpoints").glob("*.tmp-*"))


def test_keep_prunes_oldest_and_resolve(tmp_path, parts):
    model, tok, opt = parts
    for s in (1, 2, 3):
        save_checkpoint(tmp_path, step=s, model=model, tokenizer=tok, optimizer=opt, config_toml="", keep=2)
    assert [p.name for p in list_checkpoints(tmp_path)] == ["step-00000002", "step-00000003"]
    assert resolve_checkpoint(tmp_path).name == "step-00000003"
    with pytest.raises(FileNotFoundError, match="no checkpoint in"):
        resolve_checkpoint(tmp_path / "empty")
