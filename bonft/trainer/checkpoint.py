"""Checkpoints that survive crashes and are checked before use.

Layout of one checkpoint ``RUN/checkpoints/step-00000120/``::

    model/         save_pretrained (safetensors); of an adapter run, the adapter only
                   (adapter_config.json naming the base model, adapter_model.safetensors)
    tokenizer/     save_pretrained
    state.pt       optimizer state, RNG states (torch, numpy, python), step, extra: tensors and plain
                   values only, read with ``torch.load(weights_only=True)``
    config.toml    the run's configuration
    manifest.json  size and SHA-256 of every file above

A checkpoint is complete once its directory name has no ``.tmp`` suffix: the
files are written and fsync'ed inside ``step-XXXXXXXX.tmp-PID``, the manifest
last, and the directory is then renamed (atomic on POSIX). Older checkpoints
are deleted only after the new one is in place, so a crash or ``kill -9`` at
any moment leaves the previous checkpoint loadable. Leftover ``.tmp-*``
directories are ignored and cleaned; a step saved again moves its previous copy
aside (``step-S.old-PID``) for the moment between two renames, and a copy left
there by a kill is read in its place and moved back (:func:`recover_checkpoints`).

Reading checks the manifest (it lists every file the checkpoint needs and
holds, no weights are a pickle, every listed file is present with its size and
hash): :func:`latest_checkpoint` skips a damaged newest checkpoint with a
:class:`CheckpointWarning` naming it and returns the newest good one, and
raises :class:`CheckpointError` when checkpoints exist but none is good.

Caution: ``state.pt`` is never unpickled as arbitrary objects, since a
checkpoint may come from someone else; a file holding anything but tensors and
plain values is refused (:class:`CheckpointError`).
"""
from __future__ import annotations

import contextlib
import hashlib
import json
import os
import pickle
import random
import re
import shutil
import tempfile
import warnings
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import torch
from transformers.utils import logging as hf_logging

from bonft._core.jsonl import new_file_mode

MANIFEST = "manifest.json"
FORMAT = "bonft-checkpoint/1"
_STEP_DIR = re.compile(r"^step-(\d{8})$")
_OLD_DIR = re.compile(r"^step-(\d{8})\.old-\d+$")  # a checkpoint moved aside while its step is re-saved


class CheckpointError(ValueError):
    """A checkpoint is missing a file, is truncated or corrupt, or holds something other than plain data."""


class CheckpointWarning(UserWarning):
    """A damaged checkpoint was skipped in favour of an older good one."""


def _fsync_tree(root: Path) -> None:
    for p in sorted(root.rglob("*")):
        if p.is_file():
            with open(p, "rb") as fh:
                os.fsync(fh.fileno())


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# ----------------------------------------------------------------------------- RNG state as plain values
def rng_state() -> dict:
    """The global RNG states of python, numpy and torch, as tensors and plain values only."""
    kind, keys, pos, has_gauss, gauss = np.random.get_state()
    version, internal, py_gauss = random.getstate()
    return {
        "python": {"version": int(version), "state": torch.tensor(internal, dtype=torch.int64), "gauss": py_gauss},
        "numpy": {"kind": str(kind), "keys": torch.from_numpy(keys.astype(np.int64)), "pos": int(pos),
                  "has_gauss": int(has_gauss), "gauss": float(gauss)},
        "torch": torch.get_rng_state(),
    }


def set_rng_state(state: dict) -> None:
    """Restore what :func:`rng_state` returned."""
    py, npy = state["python"], state["numpy"]
    random.setstate((py["version"], tuple(int(v) for v in py["state"].tolist()), py["gauss"]))
    np.random.set_state((npy["kind"], npy["keys"].numpy().astype(np.uint32), npy["pos"], npy["has_gauss"], npy["gauss"]))
    torch.set_rng_state(state["torch"])


# ----------------------------------------------------------------------------- manifest
def _write_manifest(ckpt: Path, step: int) -> None:
    files = {}
    for p in sorted(ckpt.rglob("*")):
        if p.is_file() and p.name != MANIFEST:
            files[p.relative_to(ckpt).as_posix()] = {"bytes": p.stat().st_size, "sha256": _sha256(p)}
    text = json.dumps({"format": FORMAT, "step": int(step), "files": files}, indent=1)
    with open(ckpt / MANIFEST, "w", encoding="utf-8") as fh:
        fh.write(text)


def _read_manifest(ckpt: Path) -> dict:
    path = ckpt / MANIFEST
    if not path.is_file():
        raise CheckpointError(f"checkpoint {ckpt} is damaged: no {MANIFEST} (written last; the save did not finish, "
                              f"or the checkpoint was written by an older format without one)")
    try:
        man = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError, RecursionError) as e:
        raise CheckpointError(f"checkpoint {ckpt} is damaged: {MANIFEST} is not valid JSON ({type(e).__name__})") from None
    if not isinstance(man, dict) or man.get("format") != FORMAT or not isinstance(man.get("files"), dict):
        raise CheckpointError(f"checkpoint {ckpt} is damaged: {MANIFEST} is not a {FORMAT} manifest")
    return man


_VERIFIED: dict[str, tuple] = {}  # checkpoint path -> stat signature of its files when last verified
NEEDED = ("state.pt", "config.toml")  # with a model/config.json (or adapter_config.json), model/*.safetensors, a tokenizer/ file
MODEL_CONFIGS = ("model/config.json", "model/adapter_config.json")  # a full model's, an adapter's
ADAPTER_WEIGHTS = "model/adapter_model.safetensors"
PICKLE_SUFFIXES = (".bin", ".pt", ".pth", ".pkl", ".pickle", ".ckpt")  # weights formats that unpickle when loaded


def _check_complete(ckpt: Path, man: dict) -> None:
    """The manifest lists every file the checkpoint needs and every file it holds; no pickled weights.

    A manifest that lists less proves nothing about what is loaded, so the checkpoint counts as damaged
    (and :func:`latest_checkpoint` falls back to an older good one). Weights in a pickle format
    (``model/pytorch_model.bin``...) are refused whether listed or not: unpickling can run code, and
    bonft writes weights as safetensors only.
    """
    listed = set(man["files"])
    held = {p.relative_to(ckpt).as_posix() for p in ckpt.rglob("*") if p.is_file() and p.name != MANIFEST}
    for name in sorted(listed | held):
        if name.startswith(("model/", "tokenizer/")) and name.endswith(PICKLE_SUFFIXES):
            raise CheckpointError(f"checkpoint {ckpt} is damaged: refusing {name}, a pickle file (loading it can run "
                                  f"code); bonft checkpoints hold weights as safetensors only")
    missing = [n for n in NEEDED if n not in listed]
    config = MODEL_CONFIGS[1] if ADAPTER_WEIGHTS in held | listed else MODEL_CONFIGS[0]  # an adapter run's, a full model's
    if config not in listed:
        missing.append(config)
    if not any(n.startswith("model/") and n.endswith(".safetensors") for n in listed):
        missing.append("model/*.safetensors (the weights)")
    if not any(n.startswith("tokenizer/") for n in listed):
        missing.append("tokenizer/ (the tokenizer files)")
    if missing:
        raise CheckpointError(f"checkpoint {ckpt} is damaged: {MANIFEST} does not list {', '.join(missing)}; a "
                              f"manifest must list every file the checkpoint needs")
    extra = sorted(held - listed)
    if extra:
        more = f" (and {len(extra) - 1} more)" if len(extra) > 1 else ""
        raise CheckpointError(f"checkpoint {ckpt} is damaged: {extra[0]}{more} is not in {MANIFEST} (added after the "
                              f"save, or the manifest was rewritten)")


def _signature(ckpt: Path, names) -> tuple:
    out = []
    for name in [MANIFEST, *names]:
        st = (ckpt / name).stat()
        out.append((name, st.st_size, st.st_mtime_ns, st.st_ino))
    return tuple(out)


def verify_checkpoint(ckpt: str | Path, *, only: tuple[str, ...] | None = None) -> Path:
    """Check a checkpoint against its manifest; return its path or raise :class:`CheckpointError`.

    The manifest must list every file the checkpoint needs (``state.pt``, ``config.toml``, the
    model's config (or an adapter's) and safetensors weights, the tokenizer) and every file it holds, and no
    weights may be a pickle; every file it lists must exist with the listed size and SHA-256
    (``only``: hash just these names). The message names the directory, the file and what is
    wrong. A result is cached until a file's size or mtime changes.
    """
    ckpt = Path(ckpt)
    if not ckpt.is_dir():
        raise FileNotFoundError(f"checkpoint must be a directory, got {str(ckpt)!r} (no such directory)")
    man = _read_manifest(ckpt)
    _check_complete(ckpt, man)
    names = [n for n in man["files"] if only is None or n in only]
    if only is not None and len(names) != len(only):
        missing = sorted(set(only) - set(names))
        raise CheckpointError(f"checkpoint {ckpt} is damaged: {MANIFEST} does not list {', '.join(missing)}")
    for name in names:
        if not (ckpt / name).is_file():
            raise CheckpointError(f"checkpoint {ckpt} is damaged: {name} is missing")
    key = f"{ckpt.resolve()}|{only}"
    sig = _signature(ckpt, names)
    if _VERIFIED.get(key) == sig:
        return ckpt
    for name in names:
        want, path = man["files"][name], ckpt / name
        size = path.stat().st_size
        if size != want.get("bytes"):
            raise CheckpointError(f"checkpoint {ckpt} is damaged: {name} has {size} bytes, the manifest says "
                                  f"{want.get('bytes')} (truncated or overwritten)")
        if _sha256(path) != want.get("sha256"):
            raise CheckpointError(f"checkpoint {ckpt} is damaged: {name} does not match its SHA-256 in {MANIFEST} (corrupt)")
    _VERIFIED[key] = sig
    return ckpt


def is_verified_checkpoint(path: str | Path) -> bool:
    """True when ``path`` carries a bonft manifest (a trainer checkpoint, as opposed to a bare model directory)."""
    return (Path(path) / MANIFEST).is_file()


# ----------------------------------------------------------------------------- finding checkpoints
def list_checkpoints(run_dir: str | Path) -> list[Path]:
    """Checkpoint directories of a run (renamed into place, not yet verified), oldest first.

    A step whose directory is missing but whose previous copy was moved aside (``step-S.old-PID``:
    a re-save of step S was cut between its two renames) is listed by that copy.
    """
    root = Path(run_dir) / "checkpoints"
    if not root.is_dir():
        return []
    found = {int(m.group(1)): p for p in root.iterdir() if p.is_dir() and (m := _STEP_DIR.match(p.name))}
    for p in sorted(root.iterdir()):
        m = _OLD_DIR.match(p.name)
        if m and p.is_dir():
            found.setdefault(int(m.group(1)), p)
    return [found[step] for step in sorted(found)]


def recover_checkpoints(run_dir: str | Path) -> None:
    """Tidy a run's checkpoints after a crash (call it holding the run's lock, before reading them).

    A copy moved aside by a re-save (``step-S.old-PID``) goes back to ``step-S`` when the new one never
    arrived, and is removed when it did; unfinished ``step-S.tmp-PID`` folders are removed.
    """
    root = Path(run_dir) / "checkpoints"
    if not root.is_dir():
        return
    for p in sorted(root.iterdir()):
        m = _OLD_DIR.match(p.name)
        if m and p.is_dir():
            final = root / f"step-{m.group(1)}"
            if final.exists():
                shutil.rmtree(p, ignore_errors=True)
            else:
                os.replace(p, final)
        elif ".tmp-" in p.name and p.name.startswith("step-") and p.is_dir():
            shutil.rmtree(p, ignore_errors=True)


def prune_checkpoints(run_dir: str | Path, *, keep: int, upto: int) -> None:
    """Delete checkpoints of steps <= ``upto`` but the ``keep`` newest of them (newer ones stay; 0 keeps all)."""
    older = [p for p in list_checkpoints(run_dir) if _STEP_DIR.match(p.name) and int(p.name[5:]) <= upto]
    for old in older[:-keep]:
        shutil.rmtree(old, ignore_errors=True)


def latest_checkpoint(run_dir: str | Path) -> Path | None:
    """The newest checkpoint of a run that passes :func:`verify_checkpoint`; None when the run has none.

    A damaged newer checkpoint is skipped with a :class:`CheckpointWarning`
    naming it and what is wrong; when checkpoints exist but none is good,
    :class:`CheckpointError` lists each with its problem.
    """
    found = list_checkpoints(run_dir)
    problems = []
    for ckpt in reversed(found):
        try:
            verify_checkpoint(ckpt)
        except CheckpointError as e:
            problems.append(str(e))
            continue
        for text in problems:
            warnings.warn(f"{text}; using the newest good checkpoint {ckpt} instead", CheckpointWarning, stacklevel=2)
        return ckpt
    if problems:
        raise CheckpointError(f"no good checkpoint in {Path(run_dir) / 'checkpoints'}: " + "; ".join(problems))
    return None


def resolve_checkpoint(path: str | Path) -> Path:
    """Accept a checkpoint directory (verified when it has a manifest) or a run directory (-> its newest good checkpoint)."""
    path = Path(path)
    if (path / "model").is_dir():
        if is_verified_checkpoint(path) or _STEP_DIR.match(path.name):
            verify_checkpoint(path)
        return path
    latest = latest_checkpoint(path)
    if latest is None:
        raise FileNotFoundError(f"no checkpoint in {path} (expected {path}/model/ or {path}/checkpoints/step-*/)")
    return latest


# ----------------------------------------------------------------------------- writing and reading
# ----------------------------------------------------------------------------- writing weights
@contextlib.contextmanager
def quiet_transformers() -> Iterator[None]:
    """No transformers progress bars ("Loading weights", "Writing model shards") inside the trainer's own bar."""
    was = hf_logging.is_progress_bar_enabled()
    hf_logging.disable_progress_bar()
    try:
        yield
    finally:
        if was:
            hf_logging.enable_progress_bar()


def save_weights(model, directory: str | os.PathLike) -> None:
    """``model.save_pretrained(directory)`` (safetensors), without a progress bar: the one place weights are written."""
    with quiet_transformers():  # a bar per save would cut into the trainer's bar and --quiet runs
        model.save_pretrained(directory, safe_serialization=True)
    mode = new_file_mode()  # the weights file comes out 0o600 (a private temporary file renamed): as any other file
    for f in Path(directory).iterdir():
        if f.is_file() and not f.is_symlink():
            os.chmod(f, mode)


def save_model(model, tokenizer, path: str | os.PathLike) -> Path:
    """Write a bonft model directory (``path/model``, ``path/tokenizer``, safetensors) and return ``path``.

    The directory is written to a temporary sibling and moved into place only when complete;
    an existing one at ``path`` is replaced only after the new one is fully on disk, so a crash
    never leaves neither. Read it back with :func:`bonft.trainer.models.load_model`.
    """
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike, got {type(path).__name__}")
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.tmp-", dir=path.parent))
    try:
        save_weights(model, tmp / "model")
        tokenizer.save_pretrained(tmp / "tokenizer")
        if path.exists():
            old = path.with_name(f".{path.name}.old-{os.getpid()}")
            os.replace(path, old)
            os.replace(tmp, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.replace(tmp, path)
    finally:
        if tmp.exists():
            shutil.rmtree(tmp, ignore_errors=True)
    return path


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
    """Write checkpoint ``step`` atomically with its manifest, then prune to the ``keep`` newest. Returns its path.

    Pruning only removes checkpoints older than ``step``; a newer one (left by a
    run resumed from an older checkpoint) stays until this run overwrites it.
    Call it on the main rank only (the trainer's ``is_main`` gate).
    """
    root = Path(run_dir) / "checkpoints"
    root.mkdir(parents=True, exist_ok=True)
    final = root / f"step-{step:08d}"
    tmp = root / f"{final.name}.tmp-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        save_weights(model, tmp / "model")
        tokenizer.save_pretrained(tmp / "tokenizer")
        state = {
            "step": int(step),
            "optimizer": optimizer.state_dict() if optimizer is not None else None,
            "rng": rng_state(),
            "extra": dict(extra or {}),
        }
        torch.save(state, tmp / "state.pt")
        (tmp / "config.toml").write_text(config_toml)
        _write_manifest(tmp, step)  # last: a directory with a manifest was written completely
        _fsync_tree(tmp)
    except BaseException:  # a full disk, a kill signal turned exception, Ctrl-C: no half-written folder stays
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if final.exists():  # the same step saved twice (e.g. Ctrl-C right after a periodic save)
        old = root / f"{final.name}.old-{os.getpid()}"  # a kill between the renames: list_checkpoints reads it
        try:
            os.replace(final, old)
            os.replace(tmp, final)
        except BaseException:
            if not final.exists() and old.exists():
                os.replace(old, final)
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, final)
    dir_fd = os.open(root, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)
    recover_checkpoints(run_dir)  # leftovers of a crashed save
    prune_checkpoints(run_dir, keep=keep, upto=step)
    return final


def load_state(ckpt: str | Path) -> dict:
    """Read ``state.pt`` of a checkpoint (optimizer, RNG, step, extra), checked against the manifest.

    Loaded with ``torch.load(weights_only=True)``: tensors and plain values
    only. Anything else (a crafted or foreign pickle) raises :class:`CheckpointError`
    without running it.
    """
    path = Path(ckpt) / "state.pt"
    if not path.is_file():
        raise FileNotFoundError(f"not a bonft checkpoint (no state.pt): {ckpt}")
    verify_checkpoint(ckpt, only=("state.pt",))
    try:
        with warnings.catch_warnings():  # torch's note on the pickle protocol of a foreign file adds nothing here
            warnings.simplefilter("ignore", UserWarning)
            return torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as e:
        found = re.search(r"WeightsUnpickler error:\s*(.+?)\s*(?:Check the documentation|$)", str(e), re.S)
        what = " ".join(found.group(1).split()) if found else type(e).__name__
        raise CheckpointError(f"refusing {path}: it holds objects other than tensors and plain values ({what}); "
                              f"bonft never unpickles those, since loading them can run code. Was it written by another program?") from None
    except (RuntimeError, EOFError, OSError) as e:
        raise CheckpointError(f"checkpoint {Path(ckpt)} is damaged: state.pt cannot be read ({e})") from None
