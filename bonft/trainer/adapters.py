"""Low-rank adapters (LoRA, Hu et al. 2021, arXiv:2106.09685) through ``peft``, an optional extra.

With ``adapter_rank = r`` the trainer freezes the ``start_from`` model (the base) and trains, in each
adapted linear layer ``W``, two factors ``B (d_out x r)`` and ``A (r x d_in)``: the layer computes
``W x + adapter_scale * B A x`` (``B`` starts at zero, so step 0 is the base model). Only the
factors, their optimizer state and the RNG state go into a checkpoint; the checkpoint records the
base model's directory (``base_model_name_or_path`` in ``model/adapter_config.json``), from which
:func:`bonft.trainer.models.load_model` rebuilds the policy.

The KL anchor of an adapter run is the base model itself: :class:`AdapterOff` runs the same
module with the adapter switched off (peft's ``disable_adapter``), so there is one model in memory
and nothing is written for the anchor.

``peft`` is imported inside the functions here, not at the top: it is an optional dependency
(``pip install 'bonft[peft]'``), and a run without adapter keys never needs it.
"""
from __future__ import annotations

import contextlib
import json
import os
import warnings
from pathlib import Path
from typing import Any, Callable

import torch
from safetensors.torch import load_file
from transformers import AutoConfig

PEFT_HINT = "pip install 'bonft[peft]'"
ADAPTER_CONFIG = "adapter_config.json"
# config fields compared between an adapter's recorded base model and start_from (first difference is named)
SHAPE_FIELDS = ("model_type", "architectures", "vocab_size", "hidden_size", "num_hidden_layers", "num_attention_heads",
                "intermediate_size")
_QUIET = (  # peft's notes on our own set-up, which say nothing the user can act on
    r"fan_in_fan_out is set to",
    r".*is_gradient_checkpointing.* is deprecated",
)


class PeftMissing(ImportError, ValueError):
    """An adapter was asked for but peft is not installed (an ImportError, and a ValueError: bad input, one line)."""


def peft_missing(key: str) -> str | None:
    """None when ``peft`` imports, else the one-line error for ``key`` (which needs it)."""
    try:
        import peft  # noqa: F401  # optional dependency: imported only where an adapter is asked for
    except ImportError:
        return f"{key} needs the optional dependency peft, which is not installed: {PEFT_HINT}"
    return None


def _peft():
    """The ``peft`` module, or :class:`PeftMissing` saying how to install it."""
    try:
        import peft  # optional dependency: imported only where an adapter is asked for
    except ImportError:
        raise PeftMissing(f"LoRA adapters need the optional dependency peft, which is not installed: {PEFT_HINT}") from None
    return peft


@contextlib.contextmanager
def _quiet():
    with warnings.catch_warnings():
        for pattern in _QUIET:
            warnings.filterwarnings("ignore", message=pattern)
        yield


def is_adapter_model(model: Any) -> bool:
    """Whether ``model`` is a peft model (a base model with adapters)."""
    return callable(getattr(model, "disable_adapter", None)) and hasattr(model, "peft_config")


def adapter_dir(path: str | os.PathLike) -> Path | None:
    """The directory holding ``adapter_config.json`` of an adapter directory or of an adapter run's checkpoint, else None."""
    path = Path(path)
    for d in (path / "model", path):
        if (d / ADAPTER_CONFIG).is_file():
            return d
    return None


def read_adapter_config(directory: str | os.PathLike) -> dict:
    """``adapter_config.json`` of an adapter directory as a dict (an error naming the file when unreadable)."""
    path = Path(directory) / ADAPTER_CONFIG
    try:
        cfg = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise ValueError(f"{path} cannot be read as an adapter configuration ({type(e).__name__}: {e})") from None
    if not isinstance(cfg, dict):
        raise ValueError(f"{path} must hold a JSON object (an adapter configuration written by peft)")
    if cfg.get("peft_type", "LORA") != "LORA":
        raise ValueError(f"{path}: peft_type must be 'LORA' (bonft trains and loads LoRA adapters), got {cfg['peft_type']!r}")
    return cfg


def recorded_base(directory: str | os.PathLike) -> str:
    """The base model directory an adapter records (``base_model_name_or_path``), or an error saying what is missing."""
    path = Path(directory) / ADAPTER_CONFIG
    base = read_adapter_config(directory).get("base_model_name_or_path")
    if not base:
        raise ValueError(f"{path} names no base model (base_model_name_or_path is empty): set it to the directory of "
                         f"the model the adapter was trained on")
    return str(base)


# ----------------------------------------------------------------------------- building and loading
def _linear_names(model) -> list[str]:
    """Last names of the linear layers an adapter can take (torch Linear and transformers' Conv1D)."""
    names = set()
    for name, mod in model.named_modules():
        if isinstance(mod, torch.nn.Linear) or type(mod).__name__ == "Conv1D":
            names.add(name.rsplit(".", 1)[-1])
    return sorted(names)


def _targets_conv1d(model, targets) -> bool:
    """Whether the layers ``targets`` names (None: peft's default) are transformers' Conv1D (weights stored transposed)."""
    kinds = {type(mod).__name__ for name, mod in model.named_modules()
             if targets is None or name.rsplit(".", 1)[-1] in targets}
    return "Conv1D" in kinds and "Linear" not in kinds


def add_adapter(model, *, rank: int, scale: float, dropout: float, modules: list[str], seed: int, base_path: str):
    """``model`` wrapped as a peft model with a fresh trainable LoRA adapter; ``model``'s own weights frozen.

    ``A`` is drawn from a generator seeded with ``seed`` (the caller's RNG is untouched); ``B`` is zero.
    ``modules``: last names of the layers to adapt; empty = peft's default for the model type. The
    adapter records ``base_path`` as its base model. Errors name the recipe key.
    """
    peft = _peft()
    targets = list(modules) or None
    default = peft.utils.constants.TRANSFORMERS_MODELS_TO_LORA_TARGET_MODULES_MAPPING
    model_type = getattr(getattr(model, "config", None), "model_type", None)
    found = _linear_names(model)
    if targets is None and model_type not in default:
        raise ValueError(f"adapter_modules must name the layers to adapt: peft has no default for model type "
                         f"{model_type!r}; its linear layers are {found}")
    if targets is not None:
        missing = [t for t in targets if t not in found]
        if len(missing) == len(targets):
            raise ValueError(f"adapter_modules names no layer of the start_from model ({targets}); its linear layers are "
                             f"{found}: name some of those")
        if missing:  # those names would adapt nothing
            raise ValueError(f"adapter_modules names {missing}, which the start_from model does not have (its linear "
                             f"layers are {found}); remove them")
    config = peft.LoraConfig(r=rank, lora_alpha=scale * rank, lora_dropout=dropout, target_modules=targets,
                             task_type="CAUSAL_LM", bias="none", init_lora_weights=True,
                             fan_in_fan_out=_targets_conv1d(model, targets or default.get(model_type)))
    try:
        with _quiet(), torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)
            wrapped = peft.get_peft_model(model, config)
    except ValueError as e:  # peft's own refusal of the target layers
        raise ValueError(f"adapter_modules: peft cannot adapt {targets or 'its default layers'} of the start_from "
                         f"model ({e}); its linear layers are {found}") from None
    wrapped.peft_config["default"].base_model_name_or_path = base_path  # absolute: eval and resume find it from anywhere
    _check_rank(rank, wrapped)
    return wrapped


def attach_adapter(model, directory: str | os.PathLike, *, trainable: bool, key: str = "adapter"):
    """``model`` (a base model) with the adapter in ``directory`` loaded onto it; trainable or not.

    A size mismatch between the adapter's factors and ``model``'s layers is an error naming ``key``.
    """
    peft = _peft()
    try:
        with _quiet():
            return peft.PeftModel.from_pretrained(model, str(directory), is_trainable=trainable)
    except (RuntimeError, ValueError, KeyError) as e:
        lines = [ln.strip() for ln in str(e).splitlines() if ln.strip()] or [type(e).__name__]
        first = next((ln for ln in lines if "size mismatch" in ln), lines[0]).rstrip(".")
        raise ValueError(f"{key} {str(directory)!r} does not fit the base model it is loaded on ({first}); was it "
                         f"trained on another model? Its base is recorded in {Path(directory) / ADAPTER_CONFIG}") from None


def load_adapter_weights(model, directory: str | os.PathLike) -> None:
    """Copy the adapter weights saved in ``directory`` into the peft ``model`` (the same adapter's shapes), exactly."""
    peft = _peft()
    path = Path(directory) / "adapter_model.safetensors"
    if not path.is_file():
        raise FileNotFoundError(f"no adapter weights in {str(directory)!r} (expected adapter_model.safetensors)")
    saved = load_file(str(path), device=str(next(model.parameters()).device))
    result = peft.set_peft_model_state_dict(model, saved)
    unexpected = list(getattr(result, "unexpected_keys", []) or [])
    missing = [k for k in getattr(result, "missing_keys", []) or [] if "lora_" in k]
    if unexpected or missing:
        raise ValueError(f"adapter weights in {path} do not fit the run's adapter (missing {missing[:2]}, unexpected "
                         f"{unexpected[:2]}); was the checkpoint written with other adapter keys?")


def check_same_base(adapter: str | os.PathLike, start_from: str | os.PathLike, model_config: Any, *,
                    model_dir: Callable[[Path], Path] = lambda p: p) -> None:
    """Refuse ``adapter_from`` whose recorded base model differs from ``start_from`` in architecture or sizes.

    The recorded base (``base_model_name_or_path``) is compared with ``start_from`` by path; when the
    paths differ and the recorded one still exists, its ``config.json`` is compared field by field
    (:data:`SHAPE_FIELDS`) with the ``start_from`` model's config: a difference is an error naming the
    field; the same architecture and sizes under another path is a warning (a copy, or another model
    of the same shape). A recorded base that no longer exists is not compared (the factors' shapes are
    checked when they are loaded). ``model_dir``: a model path -> the directory holding its ``config.json``.
    """
    adir = adapter_dir(adapter)
    base = recorded_base(adir)
    where = adir / ADAPTER_CONFIG
    theirs = Path(base)
    if not theirs.is_dir():
        return
    mine = Path(start_from)
    if model_dir(theirs).resolve() == model_dir(mine).resolve():
        return
    try:
        recorded = AutoConfig.from_pretrained(model_dir(theirs), local_files_only=True)
    except (OSError, ValueError):
        return
    diffs = [f"{f} {getattr(recorded, f, None)!r} vs {getattr(model_config, f, None)!r}" for f in SHAPE_FIELDS
             if getattr(recorded, f, None) != getattr(model_config, f, None)]
    if diffs:
        raise ValueError(f"adapter_from {str(adapter)!r} was trained on {base!r} (base_model_name_or_path in {where}), "
                         f"which differs from start_from {str(start_from)!r} in {'; '.join(diffs)}: set start_from = "
                         f"{base!r}, or train a new adapter (adapter_rank) on {str(start_from)!r}")
    warnings.warn(f"adapter_from {str(adapter)!r} records base model {base!r}; start_from is {str(start_from)!r}, "
                  f"a model of the same architecture and sizes: training the adapter on start_from", UserWarning, stacklevel=3)


# ----------------------------------------------------------------------------- the anchor
class AdapterOff:
    """The base model of a peft model: each call runs the same module with its adapter switched off (the KL anchor).

    No weights are copied: the anchor's parameters are the base model's own, shared with the policy.
    """

    def __init__(self, model) -> None:
        if not is_adapter_model(model):
            raise TypeError(f"model must be a peft model (a base model with an adapter), got {type(model).__name__}")
        self.module = model  # the name DDP and bonft.generation look through to find the model's own keywords

    def __call__(self, *args, **kwargs):
        with self.module.disable_adapter():
            return self.module(*args, **kwargs)

    forward = __call__

    def parameters(self, recurse: bool = True):
        return self.module.parameters(recurse)

    def modules(self):
        """The wrapped model's modules (code that inspects or patches a model's layers sees the shared ones)."""
        return self.module.modules()

    def named_modules(self, *args, **kwargs):
        return self.module.named_modules(*args, **kwargs)

    @property
    def config(self):
        return self.module.config

    @property
    def training(self) -> bool:
        return self.module.training


# ----------------------------------------------------------------------------- counts
def trainable_count(model) -> tuple[int, int]:
    """(weights that train, all weights) of ``model``."""
    train = sum(p.numel() for p in model.parameters() if p.requires_grad)
    return train, sum(p.numel() for p in model.parameters())


def _check_rank(rank: int, model) -> None:
    """A rank above an adapted layer's smaller side is no longer low-rank (B A can have full rank): refuse it."""
    shapes = dict(model.named_parameters())
    widths = [min(p.shape[1], shapes[name.replace("lora_A", "lora_B")].shape[0])
              for name, p in shapes.items() if ".lora_A." in name]
    if widths and rank > min(widths):
        raise ValueError(f"adapter_rank must be <= {min(widths)} (the smaller side of the narrowest adapted layer; a "
                         f"larger rank is no longer a low-rank update), got adapter_rank={rank}")
