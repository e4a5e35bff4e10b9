"""Checkpoints: exact round trip, and a crash during a save leaves the previous checkpoint loadable."""
import random

import numpy as np
import pytest
import torch

import bonft.trainer.checkpoint as CK
from bonft.tasks.tokenizer import build_tokenizer
from bonft.trainer.checkpoint import (
    latest_checkpoint,
    list_checkpoints,
    load_state,
    recover_checkpoints,
    resolve_checkpoint,
    save_checkpoint,
    set_rng_state,
)
from bonft.trainer.models import build_tiny_model, load_model


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


def test_a_step_saved_again_is_never_lost_between_its_two_renames(tmp_path, parts, monkeypatch):
    # a re-save of step 2 moves the old copy aside, then moves the new one in; Ctrl-C between the two
    # renames puts the old copy back, and a kill there (no handler runs) leaves step-2.old-PID, which the
    # reader lists as step 2 and recover_checkpoints (the trainer, before resuming) moves back
    model, tok, opt = parts
    save_checkpoint(tmp_path, step=2, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    root = tmp_path / "checkpoints"
    real, calls = CK.os.replace, []

    def cut(src, dst):
        calls.append(dst)
        if len(calls) == 2:  # the new copy's rename: the old one is already aside
            raise KeyboardInterrupt
        return real(src, dst)

    monkeypatch.setattr(CK.os, "replace", cut)
    with pytest.raises(KeyboardInterrupt):
        save_checkpoint(tmp_path, step=2, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    monkeypatch.undo()
    assert sorted(p.name for p in root.iterdir()) == ["step-00000002"]
    assert latest_checkpoint(tmp_path) == root / "step-00000002"
    real(root / "step-00000002", root / "step-00000002.old-99999")  # what a kill -9 between the renames leaves
    assert latest_checkpoint(tmp_path) == root / "step-00000002.old-99999"  # read in its place, verified
    recover_checkpoints(tmp_path)
    assert sorted(p.name for p in root.iterdir()) == ["step-00000002"]
    assert load_state(root / "step-00000002")["step"] == 2
    # a copy aside whose step is in place is a leftover: removed, as unfinished .tmp- folders are
    (root / "step-00000002.old-99998").mkdir()
    (root / "step-00000004.tmp-99997").mkdir()
    save_checkpoint(tmp_path, step=3, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    assert sorted(p.name for p in root.iterdir()) == ["step-00000002", "step-00000003"]


def test_keep_prunes_oldest_and_resolve(tmp_path, parts):
    model, tok, opt = parts
    for s in (1, 2, 3):
        save_checkpoint(tmp_path, step=s, model=model, tokenizer=tok, optimizer=opt, config_toml="", keep=2)
    assert [p.name for p in list_checkpoints(tmp_path)] == ["step-00000002", "step-00000003"]
    assert resolve_checkpoint(tmp_path).name == "step-00000003"
    with pytest.raises(FileNotFoundError, match="no checkpoint in"):
        resolve_checkpoint(tmp_path / "empty")


# ----------------------------------------------------------------------------- manifest, damage, fallback
import json  # noqa: E402
import os  # noqa: E402
import pickle  # noqa: E402
import shutil  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

from bonft.trainer.checkpoint import CheckpointError, CheckpointWarning, verify_checkpoint  # noqa: E402


def _files(ckpt: Path) -> list[str]:
    return sorted(p.relative_to(ckpt).as_posix() for p in ckpt.rglob("*") if p.is_file())


def _truncate(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _flip(path: Path) -> None:
    """Change one byte and keep the size: only the hash can notice."""
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))


def test_manifest_lists_every_file_with_size_and_sha256(tmp_path, parts):
    import hashlib

    model, tok, opt = parts
    path = save_checkpoint(tmp_path, step=3, model=model, tokenizer=tok, optimizer=opt, config_toml="k = 1\n")
    man = json.loads((path / "manifest.json").read_text())
    assert man["format"] == "bonft-checkpoint/1" and man["step"] == 3
    assert sorted(man["files"]) == [f for f in _files(path) if f != "manifest.json"]
    assert {"model/model.safetensors", "model/config.json", "state.pt", "config.toml"} <= set(man["files"])
    for name, entry in man["files"].items():  # hashlib is the reference (FIPS 180-4)
        data = (path / name).read_bytes()
        assert entry == {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}, name
    assert verify_checkpoint(path) == path


@pytest.mark.parametrize("damage", ["truncate", "flip", "delete"])
def test_each_damaged_file_is_named(tmp_path, parts, damage):
    model, tok, opt = parts
    path = save_checkpoint(tmp_path, step=1, model=model, tokenizer=tok, optimizer=opt, config_toml="k = 1\n")
    names = [f for f in _files(path) if f != "manifest.json"]
    assert len(names) >= 5
    for name in names:
        copy = tmp_path / f"copy-{damage}" / "step-00000001"
        shutil.rmtree(copy.parent, ignore_errors=True)
        shutil.copytree(path, copy)
        target = copy / name
        {"truncate": _truncate, "flip": _flip, "delete": os.unlink}[damage](target)
        with pytest.raises(CheckpointError, match=rf"checkpoint {copy} is damaged: {name} "):
            verify_checkpoint(copy)


def test_damaged_or_missing_manifest_is_refused(tmp_path, parts):
    model, tok, opt = parts
    path = save_checkpoint(tmp_path, step=1, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    (path / "manifest.json").write_text("{not json")
    with pytest.raises(CheckpointError, match="manifest.json is not valid JSON"):
        verify_checkpoint(path)
    (path / "manifest.json").unlink()
    with pytest.raises(CheckpointError, match=r"damaged: no manifest.json \(written last; the save did not finish"):
        verify_checkpoint(path)


def test_a_damaged_newest_checkpoint_falls_back_with_a_warning(tmp_path, parts):
    model, tok, opt = parts
    for s in (1, 2):
        save_checkpoint(tmp_path, step=s, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    newest = tmp_path / "checkpoints" / "step-00000002"
    _truncate(newest / "model" / "model.safetensors")
    with pytest.warns(CheckpointWarning, match=rf"{newest} is damaged: model/model.safetensors has \d+ bytes.*"
                                               r"using the newest good checkpoint .*step-00000001"):
        assert latest_checkpoint(tmp_path).name == "step-00000001"
    with pytest.warns(CheckpointWarning):
        assert resolve_checkpoint(tmp_path).name == "step-00000001"
    with pytest.raises(CheckpointError, match="step-00000002 is damaged"):  # named directly: no silent substitute
        resolve_checkpoint(newest)
    with pytest.raises(CheckpointError, match="step-00000002 is damaged"):
        load_model(newest, device="cpu")
    _flip(tmp_path / "checkpoints" / "step-00000001" / "state.pt")
    with pytest.raises(CheckpointError, match=r"no good checkpoint in .*checkpoints: .*step-00000002 is damaged.*"
                                              r"step-00000001 is damaged: state.pt does not match its SHA-256"):
        latest_checkpoint(tmp_path)


def test_state_loads_with_weights_only(tmp_path, parts):
    model, tok, opt = parts
    path = save_checkpoint(tmp_path, step=1, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    state = torch.load(path / "state.pt", weights_only=True)  # torch's safe unpickler accepts it as is
    assert state["step"] == 1 and set(state["rng"]) == {"python", "numpy", "torch"}


class _Payload:
    """A pickle that runs code when loaded: it would create MARKER."""

    marker = ""

    def __reduce__(self):
        return (os.mkdir, (self.marker,))


def test_a_crafted_pickle_in_state_pt_is_refused_without_running(tmp_path, parts):
    model, tok, opt = parts
    path = save_checkpoint(tmp_path, step=1, model=model, tokenizer=tok, optimizer=opt, config_toml="")
    marker = tmp_path / "pwned"
    _Payload.marker = str(marker)
    with open(path / "state.pt", "wb") as fh:
        pickle.dump({"step": 1, "extra": _Payload()}, fh)
    # the attacker also rewrites the manifest, so the hash check passes and the unpickler must refuse
    man = json.loads((path / "manifest.json").read_text())
    import hashlib

    data = (path / "state.pt").read_bytes()
    man["files"]["state.pt"] = {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
    (path / "manifest.json").write_text(json.dumps(man))
    with pytest.raises(CheckpointError, match=r"refusing .*state.pt: it holds objects other than tensors and plain values"):
        load_state(path)
    assert not marker.exists()  # the payload never ran


# ----------------------------------------------------------------------------- recovery in a training run
RECOVERY = dict(layers=1, width=16, heads=2, max_positions=40, train_prompts=16, heldout_prompts=2, warm_start_steps=0, rl_steps=3,
                prompts_per_step=2, n=2, k=2, lr=1e-2, eval_samples=2, eval_ks=[1], n_boot=10, log_every=1, save_every=1,
                keep_checkpoints=3, max_new_tokens=4, plots=False, eval_at_start=False, threads=1)


def test_resume_skips_each_damaged_file_of_the_newest_checkpoint_and_ends_with_the_same_weights(tmp_path):
    """Corrupt each file of the newest checkpoint in turn: resume uses the one before and ends bit-identical."""
    from safetensors.torch import load_file

    from bonft.trainer.config import from_dict
    from bonft.trainer.loop import train

    ref = tmp_path / "ref"
    train(from_dict({**RECOVERY, "run_dir": str(ref)}), progress=False)
    final = load_file(str(ref / "checkpoints" / "step-00000003" / "model" / "model.safetensors"))
    step2 = ref / "checkpoints" / "step-00000002"
    names = [f for f in _files(step2)]
    assert "manifest.json" in names and len(names) >= 6
    for i, name in enumerate(names):
        run = tmp_path / f"crash-{i}"  # as if killed right after writing step 2: step 3 never happened
        shutil.copytree(ref, run)
        shutil.rmtree(run / "checkpoints" / "step-00000003")
        (run / "summary.json").unlink()
        (_truncate if i % 2 == 0 else _flip)(run / "checkpoints" / "step-00000002" / name)
        with warnings.catch_warnings(record=True) as seen:
            warnings.simplefilter("always")
            train(from_dict({**RECOVERY, "run_dir": str(run)}), resume=True, progress=False)
        damaged = [str(w.message) for w in seen if issubclass(w.category, CheckpointWarning)]
        assert len(damaged) == 1 and "step-00000002 is damaged" in damaged[0] and "step-00000001" in damaged[0], name
        got = load_file(str(run / "checkpoints" / "step-00000003" / "model" / "model.safetensors"))
        assert got.keys() == final.keys()
        for key in final:
            assert torch.equal(got[key], final[key]), (name, key)
        assert verify_checkpoint(run / "checkpoints" / "step-00000002")  # the damaged one was rewritten whole
