"""Tiny causal language models built in code, model loading and saving, device choice.

Nothing here downloads: :func:`build_tiny_model` builds a ``transformers``
config in code and initialises the weights from a seed; :func:`load_model`
reads a local directory only (``local_files_only=True``).

A bonft model directory has the layout::

    CKPT/model/       model.save_pretrained(...)   (config.json, model.safetensors)
    CKPT/tokenizer/   tokenizer.save_pretrained(...)

A checkpoint of an adapter run (``adapter_rank``, :mod:`bonft.trainer.adapters`) holds the adapter
only: ``CKPT/model/adapter_config.json`` (naming the base model's directory) and
``adapter_model.safetensors``; :func:`load_model` loads the base model from there and the adapter on it.

Writing one (:func:`bonft.trainer.checkpoint.save_model`, and the trainer's checkpoints)
lives in :mod:`bonft.trainer.checkpoint`, the one place weights are written.
"""
from __future__ import annotations

import os
import pickle
import warnings
from pathlib import Path
from typing import Any

import torch
from transformers import AutoModelForCausalLM, AutoTokenizer, GPT2Config, GPT2LMHeadModel, LlamaConfig, LlamaForCausalLM

from bonft._core.checks import check_choice, check_int
from bonft.trainer.adapters import (
    ADAPTER_CONFIG,
    adapter_dir,
    add_adapter,
    attach_adapter,
    check_same_base,
    is_adapter_model,
    load_adapter_weights,
    recorded_base,
)
from bonft.trainer.checkpoint import PICKLE_SUFFIXES, is_verified_checkpoint, resolve_checkpoint, verify_checkpoint

ARCHS = ("gpt2", "llama")


def pick_device(preference: str = "auto") -> torch.device:
    """``"auto"``: cuda when available, else cpu; ``"cpu"``; ``"cuda"`` (error if absent)."""
    check_choice("preference", preference, ("auto", "cpu", "cuda"))
    if preference == "cuda" and not torch.cuda.is_available():
        raise ValueError("device 'cuda' needs a CUDA device, but torch.cuda.is_available() is False; use "
                         "device = 'cpu' or 'auto'")
    if preference == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    return torch.device(preference)


def _check_token_id(name: str, value: Any, vocab_size: int) -> int | None:
    if value is None:
        return None
    return check_int(name, value, min=0, max=vocab_size - 1)


def build_tiny_model(
    arch: str = "gpt2",
    *,
    vocab_size: int,
    layers: int = 2,
    width: int = 128,
    heads: int = 4,
    max_positions: int = 128,
    seed: int = 0,
    pad_token_id: int | None = None,
    eos_token_id: int | None = None,
    bos_token_id: int | None = None,
):
    """A randomly initialised causal LM, reproducible from ``seed``.

    ``arch="gpt2"``: ``GPT2LMHeadModel`` (learned positions, LayerNorm, GELU MLP 4x).
    ``arch="llama"``: ``LlamaForCausalLM`` (rotary positions, RMSNorm, SwiGLU MLP 4x,
    tied embeddings). Dropout is 0 in both, so train-mode and eval-mode
    forward passes give the same log-probs (the trainer relies on that).

    The default (2 layers, width 128, 4 heads, vocab ~90) has ~0.4 M parameters.
    The global torch RNG is left untouched.
    """
    check_choice("arch", arch, ARCHS)
    vocab_size = check_int("vocab_size", vocab_size, min=2)
    layers = check_int("layers", layers, min=1)
    width = check_int("width", width, min=1)
    heads = check_int("heads", heads, min=1)
    max_positions = check_int("max_positions", max_positions, min=2)
    seed = check_int("seed", seed, min=0)
    if width % heads:
        raise ValueError(f"width must be divisible by heads (heads={heads}), got width={width}")
    if arch == "llama" and (width // heads) % 2:
        raise ValueError(f"width / heads must be even for rotary positions (arch='llama'), got {width}/{heads}")
    ids = {
        "pad_token_id": _check_token_id("pad_token_id", pad_token_id, vocab_size),
        "eos_token_id": _check_token_id("eos_token_id", eos_token_id, vocab_size),
        "bos_token_id": _check_token_id("bos_token_id", bos_token_id, vocab_size),
    }
    if arch == "gpt2":
        config = GPT2Config(
            vocab_size=vocab_size, n_positions=max_positions, resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0, **ids,
        )
        # the standard names; GPT2Config maps each onto its own field when set (its attribute_map)
        config.hidden_size, config.num_hidden_layers, config.num_attention_heads = width, layers, heads
        cls = GPT2LMHeadModel
    else:
        config = LlamaConfig(
            vocab_size=vocab_size, hidden_size=width, intermediate_size=4 * width, num_hidden_layers=layers,
            num_attention_heads=heads, num_key_value_heads=heads, max_position_embeddings=max_positions,
            attention_dropout=0.0, tie_word_embeddings=True, **ids,
        )
        cls = LlamaForCausalLM
    with torch.random.fork_rng(devices=[]):  # seed the init without touching the caller's RNG
        torch.manual_seed(seed)
        model = cls(config)
    model.eval()
    return model


_TOKENIZER_FILES = ("tokenizer_config.json", "tokenizer.json", "vocab.json", "tokenizer.model", "vocab.txt")


def context_length(model) -> int | None:
    """Positions the model can attend to (``max_position_embeddings``; GPT-2's ``n_positions``), None if unknown."""
    limit = getattr(getattr(model, "config", None), "max_position_embeddings", None)
    return limit if isinstance(limit, int) and not isinstance(limit, bool) else None


def check_context(model, tokenizer, prompts, *, max_new_tokens: int, references=(), knob: str = "max_positions") -> None:
    """Refuse, before any work, prompts that cannot fit the model's context with their responses.

    prompts: P strings (encoded as the sampler encodes them); references: reference
    responses (+ EOS) a warm start trains on, paired with the prompts or empty.
    Needs ``len(prompt) + max(max_new_tokens, len(reference) + 1) <= context`` for
    every prompt. ``knob`` names the setting that sets the context (``max_positions`` for tiny models).
    """
    limit = context_length(model)
    prompts = list(prompts)
    if limit is None or not prompts:
        return
    longer = f"raise {knob}" if knob.isidentifier() else "use a model with a longer context"
    lens = [len(ids) for ids in tokenizer(prompts)["input_ids"]]
    i = max(range(len(lens)), key=lens.__getitem__)
    if lens[i] + max_new_tokens > limit:
        room = limit - lens[i]
        fix = f"lower max_new_tokens to <= {room} or {longer}" if room >= 1 else longer
        raise ValueError(f"{knob} must fit the longest prompt plus max_new_tokens: prompt {prompts[i]!r} takes {lens[i]} "
                         f"tokens + max_new_tokens={max_new_tokens} = {lens[i] + max_new_tokens} > {limit} positions "
                         f"of the model; {fix}")
    refs = list(references)
    if refs:
        total = [n + len(ids) + 1 for n, ids in zip(lens, tokenizer(refs, add_special_tokens=False)["input_ids"])]
        j = max(range(len(total)), key=total.__getitem__)
        if total[j] > limit:
            raise ValueError(f"{knob} must fit each warm-start prompt with its reference response: prompt {prompts[j]!r} "
                             f"with reference {refs[j]!r} and EOS takes {total[j]} tokens > {limit} positions of the model; "
                             f"{longer}")


class UnknownTokenWarning(UserWarning):
    """Prompts or reference responses hold text the tokenizer can only encode as its unknown token."""


def check_vocabulary(tokenizer, prompts, references=()) -> None:
    """Warn, naming the characters, when the tokenizer encodes prompts (or warm-start references) with its unknown
    token: the model reads every such character as one symbol and can never write it (a character tokenizer made
    for arithmetic meets code's braces and backticks). Silent when the tokenizer has no unknown token."""
    unk = getattr(tokenizer, "unk_token_id", None)
    if unk is None:
        return
    for kind, texts, special in (("prompts", list(prompts), True), ("reference responses", list(references), False)):
        if not texts:
            continue
        hit = [t for t, ids in zip(texts, tokenizer(texts, add_special_tokens=special)["input_ids"]) if unk in ids]
        if not hit:
            continue
        chars = sorted({c for t in hit[:200] for c in set(t) if unk in tokenizer(c, add_special_tokens=False)["input_ids"]})
        shown = " ".join(repr(c) for c in chars[:12]) + (" ..." if len(chars) > 12 else "")
        warnings.warn(f"{len(hit)} of {len(texts)} {kind} hold characters the tokenizer encodes as its unknown token "
                      f"{tokenizer.unk_token!r} ({shown or 'a sequence it cannot split'}; e.g. {hit[0][:60]!r}): the model "
                      f"reads each as one symbol and can never write it; use a tokenizer that covers your data",
                      UnknownTokenWarning, stacklevel=2)


def model_dirs(path: Path) -> tuple[Path, Path]:
    """(model dir, tokenizer dir) for a bonft checkpoint or a plain transformers directory."""
    if (path / "model").is_dir():
        tok = path / "tokenizer" if (path / "tokenizer").is_dir() else path / "model"
        return path / "model", tok
    return path, path


def load_model(path: str | os.PathLike, *, device: str | torch.device | None = None, trainable: bool = False):
    """``(model, tokenizer)`` from a local directory; never downloads.

    ``path`` is a bonft checkpoint (``path/model`` and ``path/tokenizer``
    sub-directories, see :func:`bonft.trainer.checkpoint.save_model`), a training run directory (its
    newest ``checkpoints/step-*``), a directory written by
    ``save_pretrained`` holding both the model and its tokenizer, or a LoRA adapter directory (peft's
    ``save_pretrained``, or a checkpoint of an adapter run): its base model is loaded from the directory
    the adapter records (``base_model_name_or_path``) and the adapter on it (needs peft); the tokenizer
    is the adapter directory's when it holds one, else the base model's. ``trainable``: the adapter's
    weights require gradients (a full model's always do).
    ``device``: ``None`` -> :func:`pick_device` ``("auto")``. The model is returned in eval mode.
    """
    path = _model_path(path)
    if is_verified_checkpoint(path):  # a trainer checkpoint: sizes and hashes against its manifest
        verify_checkpoint(path)
    adir = adapter_dir(path)
    if adir is not None:
        return _load_with_adapter(path, adir, device, trainable)
    model_dir, tok_dir = model_dirs(path)
    if not (model_dir / "config.json").is_file():
        raise FileNotFoundError(f"no config.json in {str(model_dir)!r}: path must be a transformers model directory or a bonft checkpoint")
    tokenizer = _tokenizer_in(path, model_dir, tok_dir)
    device = _device(device)
    try:
        model = AutoModelForCausalLM.from_pretrained(model_dir, local_files_only=True)
    except pickle.UnpicklingError:  # torch's weights-only loader met objects that could run code
        found = sorted(p for p in model_dir.iterdir() if p.name.endswith(PICKLE_SUFFIXES))
        raise ValueError(f"refusing {found[0] if found else model_dir}: pickled weights holding objects other than "
                         f"tensors (loading them can run code); bonft loads such files only as plain tensors. Was it "
                         f"written by another program? Save the model as safetensors") from None
    model = _in_float32(model, model_dir)
    _note_generation_settings(model, model_dir)
    model.to(device).eval()
    return model, tokenizer


class ModelLoadWarning(UserWarning):
    """A model was loaded other than as saved (its precision), or with saved settings bonft does not read."""


def _in_float32(model, model_dir: Path):
    """The model in float32: bonft trains, samples and scores in float32. A model saved in half precision
    (most published checkpoints are bfloat16) would otherwise train in it: a bfloat16 weight keeps 8 bits of
    mantissa, so an update much smaller than the weight rounds away, and its log-probs differ from float32's by
    about 1e-2 nats."""
    kinds = sorted({str(p.dtype).removeprefix("torch.") for p in model.parameters()
                    if p.is_floating_point() and p.dtype != torch.float32})
    if kinds:
        warnings.warn(f"{model_dir}: the model's weights are saved in {', '.join(kinds)}; bonft loads them as float32 "
                      f"(it trains, samples and scores in float32: in half precision most small updates round away); "
                      f"its checkpoints are float32", ModelLoadWarning, stacklevel=3)
        model = model.float()
    return model


# what a saved generation_config may set that bonft's sampler does not read: it draws at the recipe's or the
# command's temperature, top_k and top_p (bonft.generation.sample), with no penalty, beam or length rule of the file
_SAMPLING_KEYS = ("temperature", "top_p", "top_k", "min_p", "typical_p", "epsilon_cutoff", "eta_cutoff",
                  "repetition_penalty", "no_repeat_ngram_size", "num_beams", "length_penalty", "bad_words_ids",
                  "suppress_tokens", "begin_suppress_tokens", "sequence_bias", "forced_bos_token_id",
                  "forced_eos_token_id", "max_length", "max_new_tokens", "min_length", "min_new_tokens")


def _note_generation_settings(model, model_dir: Path) -> None:
    """Warn once per load when the model's saved generation settings differ from what bonft samples with."""
    gen = getattr(model, "generation_config", None)
    if gen is None:
        return
    diff = gen.to_diff_dict()
    unread = {key: diff[key] for key in _SAMPLING_KEYS if key in diff}
    if diff.get("do_sample") is False:
        unread = {"do_sample": False, **unread}
    if unread:
        said = ", ".join(f"{key}={value!r}" for key, value in unread.items())
        warnings.warn(f"{model_dir}: its generation_config sets {said}, which bonft does not read: it samples at the "
                      f"recipe's (or the command's) temperature, top_k and top_p, with no penalty or length rule of "
                      f"the model's; set temperature, top_k and top_p to what you serve with", ModelLoadWarning, stacklevel=3)


def _model_path(path) -> Path:
    """A model, checkpoint or adapter directory as given, or a training run directory's newest checkpoint."""
    if not isinstance(path, (str, os.PathLike)):
        raise TypeError(f"path must be a str or os.PathLike, got {type(path).__name__}")
    path = Path(path)
    if not path.is_dir():
        raise FileNotFoundError(f"path must be a model or checkpoint directory, got {str(path)!r} (not a directory)")
    if not (path / "config.json").is_file() and not (path / "model").is_dir() and (path / "checkpoints").is_dir():
        path = resolve_checkpoint(path)  # a training run directory: its newest checkpoint
    return path


def load_tokenizer(path: str | os.PathLike):
    """The tokenizer :func:`load_model` would return for ``path``, without reading the weights (nor checking them
    against a checkpoint's manifest): e.g. to render a user task's prompts with the model's chat template."""
    path = _model_path(path)
    adir = adapter_dir(path)
    if adir is not None:
        own = _adapter_tokenizer(path, adir)
        return own if own is not None else load_tokenizer(recorded_base(adir))
    model_dir, tok_dir = model_dirs(path)
    return _tokenizer_in(path, model_dir, tok_dir)


def _tokenizer_in(path: Path, model_dir: Path, tok_dir: Path):
    """The tokenizer saved in ``tok_dir`` (a checkpoint's tokenizer/, else the model directory), or a clear error."""
    if not any((tok_dir / f).is_file() for f in _TOKENIZER_FILES):
        where = f"{path / 'tokenizer'}/ or {model_dir}/" if tok_dir == model_dir and model_dir != path else f"{tok_dir}/"
        raise FileNotFoundError(f"no tokenizer for the model in {str(path)!r}: expected tokenizer files "
                                f"({', '.join(_TOKENIZER_FILES[:2])}) in {where} (save it with tokenizer.save_pretrained)")
    return AutoTokenizer.from_pretrained(tok_dir, local_files_only=True)


def _adapter_tokenizer(path: Path, adir: Path):
    """An adapter directory's own tokenizer (a checkpoint's tokenizer/, else the adapter directory's), or None."""
    for tok_dir in (path / "tokenizer", adir):
        if tok_dir.is_dir() and _has_tokenizer(tok_dir):
            return AutoTokenizer.from_pretrained(tok_dir, local_files_only=True)
    return None


def _device(device) -> torch.device:
    if isinstance(device, str):
        return pick_device(device) if device in ("auto", "cpu", "cuda") else torch.device(device)
    if device is None:
        return pick_device("auto")
    if not isinstance(device, torch.device):
        raise TypeError(f"device must be None, a str or a torch.device, got {type(device).__name__}")
    return device


def _has_tokenizer(d: Path) -> bool:
    return any((d / f).is_file() for f in _TOKENIZER_FILES)


def _load_with_adapter(path: Path, adir: Path, device, trainable: bool):
    """The base model an adapter records, the adapter on it, and a tokenizer (the adapter's own, else the base's)."""
    base = recorded_base(adir)
    where = adir / ADAPTER_CONFIG
    if not Path(base).is_dir():
        raise FileNotFoundError(f"adapter {str(path)!r}: its base model {base!r} (base_model_name_or_path in {where}) is "
                                f"not a directory here; put the base model there or set that field to its directory")
    if adapter_dir(base) is not None:
        raise ValueError(f"adapter {str(path)!r}: its base model {base!r} (base_model_name_or_path in {where}) is an "
                         f"adapter itself; the base must be a full model directory")
    model, tokenizer = load_model(base, device=device)
    tokenizer = _adapter_tokenizer(path, adir) or tokenizer
    model = attach_adapter(model, adir, trainable=trainable, key="adapter")
    model.to(_device(device)).eval()
    return model, tokenizer


def model_source(path: str | os.PathLike) -> str:
    """The absolute directory a model is read from: a run directory resolves to its newest checkpoint."""
    path = Path(path)
    if path.is_dir() and not (path / "config.json").is_file() and not (path / "model").is_dir() \
            and (path / "checkpoints").is_dir():
        path = resolve_checkpoint(path)
    return str(path.resolve())


# ----------------------------------------------------------------------------- the policy the trainer trains
def policy_model(model, cfg, *, training: bool = True):
    """The model a run trains: ``model`` (loaded from ``cfg.start_from``, or built) with the recipe's adapter and
    recompute setting applied.

    ``adapter_rank``: a fresh LoRA adapter, seeded from ``cfg.seed``; ``adapter_from``: that adapter
    (its recorded base must match ``start_from``, :func:`bonft.trainer.adapters.check_same_base`).
    ``training=False`` (an evaluation) returns ``model`` as loaded. A ``start_from`` that is an adapter,
    trained without ``adapter_from``, is an error: its weights would not train.
    """
    if not training:
        return model
    adapted = is_adapter_model(model)
    if cfg.adapter_rank or cfg.adapter_from:
        if adapted:
            raise ValueError(f"start_from must be the base model with adapter_rank or adapter_from, got the adapter "
                             f"{cfg.start_from!r}; set adapter_from = {cfg.start_from!r} and start_from = its base "
                             f"{recorded_base(adapter_dir(cfg.start_from))!r}")
        if cfg.adapter_from:
            if adapter_dir(cfg.adapter_from) is None:
                raise FileNotFoundError(f"adapter_from must be an adapter directory (holding {ADAPTER_CONFIG}) or a "
                                        f"checkpoint of an adapter run, got {cfg.adapter_from!r}")
            check_same_base(cfg.adapter_from, cfg.start_from, model.config, model_dir=lambda p: model_dirs(p)[0])
            model = attach_adapter(model, adapter_dir(cfg.adapter_from), trainable=True, key="adapter_from")
            model.peft_config["default"].base_model_name_or_path = model_source(cfg.start_from)
        else:
            model = add_adapter(model, rank=cfg.adapter_rank, scale=cfg.adapter_scale, dropout=cfg.adapter_dropout,
                                modules=cfg.adapter_modules, seed=cfg.seed, base_path=model_source(cfg.start_from))
        model.eval()
    elif adapted and cfg.warm_start_steps + cfg.rl_steps:
        raise ValueError(f"start_from {cfg.start_from!r} is a LoRA adapter: to train it further set adapter_from = "
                         f"{cfg.start_from!r} and start_from = its base {recorded_base(adapter_dir(cfg.start_from))!r}")
    switched = switch_off_dropout(model)
    if switched:
        warnings.warn(f"start_from's model has active dropout ({', '.join(switched[:3])}{', ...' if len(switched) > 3 else ''}): "
                      f"set to 0 for training, since the sampler decodes without dropout and the policy gradient "
                      f"needs the log-probs of the policy that sampled (adapter_dropout is the adapter's own)",
                      stacklevel=2)
    if cfg.recompute_activations:
        recompute_activations(model)
    return model


_DROPOUT_ATTRS = ("attention_dropout", "attn_dropout", "dropout_p")  # rates some attention layers hold as floats


def switch_off_dropout(model) -> list[str]:
    """Set every dropout rate of ``model`` outside a LoRA adapter to 0 (in memory; its config is untouched):
    ``nn.Dropout`` layers and the float rates attention layers pass to their kernels. Returns what was > 0."""
    switched = []
    for name, module in model.named_modules():
        if "lora_" in name:
            continue  # the adapter's dropout is a recipe key of its own (adapter_dropout)
        if isinstance(module, torch.nn.Dropout) and module.p > 0:
            switched.append(f"{name or 'model'} p={module.p:g}")
            module.p = 0.0
        for attr in _DROPOUT_ATTRS:
            rate = getattr(module, attr, None)
            if isinstance(rate, float) and rate > 0:
                switched.append(f"{name}.{attr}={rate:g}")
                setattr(module, attr, 0.0)
    return switched


def recompute_activations(model) -> None:
    """Gradient checkpointing (Chen et al. 2016) on a transformers model (or the base of a peft model)."""
    base = model.get_base_model() if is_adapter_model(model) else model
    if not getattr(base, "supports_gradient_checkpointing", False):
        raise ValueError(f"recompute_activations: the model ({type(base).__name__}) does not support recomputing its "
                         f"activations (transformers' supports_gradient_checkpointing is False); leave it unset")
    enable = getattr(base, "activation_checkpointing_enable", None)
    if enable is not None:  # transformers >= 5.25
        enable(activation_checkpointing_kwargs={"use_reentrant": False})
    else:
        base.gradient_checkpointing_enable(gradient_checkpointing_kwargs={"use_reentrant": False})


def is_recomputing(model) -> bool:
    """Whether any layer of ``model`` recomputes its activations in training forwards."""
    return any(getattr(m, "gradient_checkpointing", False) for m in model.modules())


def reload_policy(model, ckpt: str | os.PathLike, *, device):
    """``(model, tokenizer)`` holding checkpoint ``ckpt``'s weights, set up as ``model`` (the run's policy) is.

    An adapter run loads the checkpoint's adapter weights into ``model`` itself (the base model is
    unchanged); a full run loads the checkpoint's model, recomputing its activations when ``model`` did.
    """
    ckpt = Path(ckpt)
    if is_adapter_model(model):
        adir = adapter_dir(ckpt)
        if adir is None:
            raise ValueError(f"checkpoint {ckpt} holds a full model, but this run trains an adapter (adapter_rank or "
                             f"adapter_from); resume it without the adapter keys, or use another run_dir")
        if is_verified_checkpoint(ckpt):
            verify_checkpoint(ckpt)
        load_adapter_weights(model, adir)
        tok_dir = ckpt / "tokenizer" if (ckpt / "tokenizer").is_dir() else adir
        return model, AutoTokenizer.from_pretrained(tok_dir, local_files_only=True)
    if adapter_dir(ckpt) is not None:
        raise ValueError(f"checkpoint {ckpt} holds a LoRA adapter, but this run trains every weight; resume it with the "
                         f"adapter keys it was trained with (see its config.toml)")
    loaded, tokenizer = load_model(ckpt, device=device)
    if is_recomputing(model):
        recompute_activations(loaded)
    return loaded, tokenizer
