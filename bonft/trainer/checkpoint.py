"""Checkpoints that survive crashes: written into a temp directory, then renamed into place.

Layout of one checkpoint ``RUN/checkpoints/step-00000120/``::

    model/        save_pretrained (safetensors)
    tokenizer/    save_pretrained
    state.pt      optimizer state, RNG states (torch, numpy, python), step, stage, extra
    config.toml   the run's configuration

A checkpoint is complete once its directory name has no ``.tmp`` suffix: the
files are written and fsync'ed inside ``step-XXXXXXXX.tmp-PID``, which is then
renamed (atomic on POSIX). Older checkpoints are deleted only after the new one
is in place, so a crash or ``kill -9`` at any moment leaves the previous
checkpoint loadable. Leftover ``.tmp-*`` directories are ignored and cleaned.
"""
from __future__ import annotations

import os
import random
import re
import shutil
from pathlib import Path
from typing import Any

import numpy as np
import torch

_STEP_DIR = re.compile(r"^step-(\d{8})$")


def _fsync_tree(root: Path) -> None:
    for p in sorted(root.rglob("*")):
        if p.is_file():
            with open(p, "rb") as fh:
                os.fsync(fh.fileno())


def rng_state() -> dict:
    """The global RNG states of python, numpy and torch."""
    return {"python": random.getstate(), "numpy": np.random.get_state(), "torch": torch.get_rng_state()}


def set_rng_state(state: dict) -> None:
    random.setstate(state["python"])
    np.random.set_state(state["numpy"])
    torch.set_rng_state(state["torch"])


def list_checkpoints(run_dir: str | Path) -> list[Path]:
    """Complete checkpoints of a run, oldest first."""
    root = Path(run_dir) / "checkpoints"
    if not root.is_dir():
        return []
    found = [p for p in root.iterdir() if p.is_dir() and _STEP_DIR.match(p.name) and (p / "state.pt").is_file()]
    return sorted(found, key=lambda p: int(_STEP_DIR.match(p.name).group(1)))


def latest_checkpoint(run_dir: str | Path) -> Path | None:
    """The newest complete checkpoint of a run directory, or None."""
    found = list_checkpoints(run_dir)
    return found[-1] if found else None


def resolve_checkpoint(path: str | Path) -> Path:
    """Accept a checkpoint directory or a run directory (-> its newest checkpoint)."""
    path = Path(path)
    if (path / "model").is_dir():
        return path
    latest = latest_checkpoint(path)
    if latest is None:
        raise FileNotFoundError(f"no checkpoint in {path} (expected {path}/model/ or {path}/checkpoints/step-*/)")
    return latest


def save_checkpoint(
    run_dir: str | Path,
    *,
    step: int,
    model: Any,
    tokenizer: Any,
    optimizer: torch.optim.Optimizer | None,
    config_toml: str,
    extra: dict | None = None,
    keep: int = 2,
) -> Path:
    """Write checkpoint ``step`` atomically, then prune to the ``keep`` newest. Returns its path.

    Call it on the main rank only (the trainer's ``is_main`` gate).
    """
    root = Path(run_dir) / "checkpoints"
    root.mkdir(parents=True, exist_ok=True)
    final = root / f"step-{step:08d}"
    tmp = root / f"{final.name}.tmp-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    from transformers.utils import logging as hf_logging

    bars = hf_logging.is_progress_bar_enabled()
    hf_logging.disable_progress_bar()  # no "Writing model shards" bar in the middle of the trainer's bar
    try:
        model.save_pretrained(tmp / "model", safe_serialization=True)
    finally:
        if bars:
            hf_logging.enable_progress_bar()
    tokenizer.save_pretrained(tmp / "tokenizer")
    state = {
        "step": int(step),
        "optimizer": optimizer.state_dict() if optimizer is not None else None,
        "rng": rng_state(),
        "extra": dict(extra or {}),
    }
    torch.save(state, tmp / "state.pt")
    (tmp / "config.toml").write_text(config_toml)
    _fsync_tree(tmp)
    if final.exists():  # the same step saved twice (e.g. Ctrl-C right after a periodic save)
        old = root / f"{final.name}.old-{os.getpid()}"
        os.replace(final, old)
        os.replace(tmp, final)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, final)
    dir_fd = os.open(root, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)
    for old in list_checkpoints(run_dir)[:-keep]:
        shutil.rmtree(old, ignore_errors=True)
    for stale in root.glob("*.tmp-*"):  # leftovers of a crashed save
        if stale != tmp:
            shutil.rmtree(stale, ignore_errors=True)
    return final


def load_state(ckpt: str | Path) -> dict:
    """Read ``state.pt`` of a checkpoint (optimizer, RNG, step, extra)."""
    path = Path(ckpt) / "state.pt"
    if not path.is_file():
        raise FileNotFoundError(f"not a bonft checkpoint (no state.pt): {ckpt}")
    # weights_only=False: the RNG states hold numpy arrays and python tuples; only load your own checkpoints.
    return torch.load(path, map_location="cpu", weights_only=False)
