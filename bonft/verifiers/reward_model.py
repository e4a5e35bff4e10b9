"""A local transformers sequence-classification model as a scoring verifier (a reward model).

::

    rm = RewardModel("path/to/reward_model", threshold=0.0, batch_size=32, device="cpu")
    v = rm(prompts, responses)   # Verdicts(scores = model score, rewards = 1[score >= 0.0])

The directory must hold a model saved with ``save_pretrained`` whose head is a
sequence classifier (``...ForSequenceClassification``) and its tokenizer. The
text scored is ``prompt + response`` (the sequence the policy wrote, as it saw
it), right-padded in batches of ``batch_size``, under ``torch.no_grad()`` in
eval mode on ``device``; nothing is downloaded. The model's ``pad_token_id`` is set
to the tokenizer's (the id the batches are padded with), so the head reads each
text's last real token and a score does not depend on the batch it came in, up to
float32 round-off: a padded batch runs kernels of other shapes (a response scored
alone and in a batch of 64 differed by up to 2.8e-7 on a 4-layer, 256-wide model),
so a ``threshold`` equal to a score can give that response either reward.

The score: with one label, the logit; with several, the probability of class
``label`` (default 1, the "good" class of a two-class head). ``threshold``
turns scores into 0/1 rewards (``reward = score >= threshold``); without it the
verdicts carry no rewards, so a trainer trains on the scores and an evaluation
needs a separate evaluation verifier (recipe key ``eval_verifier``) for pass@k.

Caution (reward hacking): a reward model is a learned proxy; the policy will
find responses it over-scores. Keep a checker you trust beside it (best-of-k
under the reward model next to pass@k under that checker shows the gap).
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Sequence

import numpy as np

from bonft._core.checks import check_int, check_real
from bonft.verifiers.base import Verdicts
from bonft.verifiers.scoring import check_batch


def _no_head(path: Path, why: str) -> ValueError:
    return ValueError(f"path {str(path)!r} must hold a sequence-classification model (a reward model), but {why}; save one "
                      "with AutoModelForSequenceClassification(...).save_pretrained(path)")


def _device(device: str):
    """``torch.device(device)``, checked to exist on this machine."""
    import torch

    try:
        dev = torch.device(device)
    except RuntimeError as e:
        raise ValueError(f"device must be a torch device string like 'cpu', 'cuda' or 'cuda:1', got {device!r} ({e})") from None
    if dev.type == "cuda":
        count = torch.cuda.device_count() if torch.cuda.is_available() else 0
        if count == 0:
            raise ValueError(f"device={device!r}, but torch sees no CUDA device on this machine; use device='cpu'")
        if dev.index is not None and dev.index >= count:
            raise ValueError(f"device={device!r}, but torch sees {count} CUDA device(s) (cuda:0..cuda:{count - 1})")
    return dev


def _check_tokens(enc, start: int, texts: Sequence[str], vocab_size: int) -> None:
    """Every text of the batch has a token, and every token id has an embedding."""
    lengths = enc["attention_mask"].sum(-1)
    if (lengths == 0).any():
        i = start + int((lengths == 0).nonzero()[0, 0])
        raise ValueError(f"texts[{i}] = {texts[i]!r:.60} gives no tokens (an empty prompt + response): "
                         "the reward model has nothing to score")
    top = int(enc["input_ids"].max())
    if top >= vocab_size:
        raise ValueError(f"the tokenizer gives token id {top}, but the model's vocabulary has {vocab_size} tokens: "
                         "the tokenizer saved beside the model does not match it")


class RewardModel:
    """Score ``prompt + response`` with a local sequence-classification model; see the module docstring.

    path:       directory with ``config.json``, the weights and the tokenizer.
    threshold:  None (scores only) or a number: ``rewards = 1.0 where score >= threshold``.
    batch_size: texts per forward pass.
    device:     torch device string ("cpu", "cuda", "cuda:1"); a CUDA device this machine lacks is a ValueError.
    label:      which class's probability is the score when the head has several labels.
    max_length: texts are cut to this many tokens (from the left, so the response's end is kept); None = the model's limit
                (a larger value is a ValueError: longer texts would fail in the forward pass).
    """

    def __init__(self, path: str | os.PathLike, *, threshold: float | None = None, batch_size: int = 32,
                 device: str = "cpu", label: int | None = None, max_length: int | None = None) -> None:
        if not isinstance(path, (str, os.PathLike)):
            raise TypeError(f"path must be a local model directory, got {type(path).__name__}")
        self.path = Path(path)
        if not self.path.is_dir():
            raise ValueError(f"path must be a local model directory, got {str(self.path)!r} (no such directory)")
        if not (self.path / "config.json").is_file():
            raise _no_head(self.path, "it has no config.json")
        self.threshold = None if threshold is None else check_real("threshold", threshold)
        self.batch_size = check_int("batch_size", batch_size, min=1)
        if not isinstance(device, str):
            raise TypeError(f"device must be a torch device string like 'cpu' or 'cuda', got {type(device).__name__}")
        if max_length is not None:
            max_length = check_int("max_length", max_length, min=1)

        from transformers import AutoConfig, AutoModelForSequenceClassification, AutoTokenizer

        self.device = _device(device)
        config = AutoConfig.from_pretrained(str(self.path), local_files_only=True)
        archs = list(getattr(config, "architectures", None) or [])
        if not any(a.endswith("ForSequenceClassification") for a in archs):
            raise _no_head(self.path, f"its config names the architectures {archs or 'none'}")
        model, info = AutoModelForSequenceClassification.from_pretrained(
            str(self.path), local_files_only=True, output_loading_info=True)
        head = [k for k in info.get("missing_keys", []) if k.split(".")[0] in ("score", "classifier")]
        if head:
            raise _no_head(self.path, f"its weights lack the classification head ({', '.join(sorted(head)[:3])})")
        self.num_labels = int(model.config.num_labels)
        if self.num_labels == 1:
            if label is not None:
                raise ValueError(f"label applies to a head with several labels, got label={label} for a head with one")
        else:
            label = 1 if label is None else label
            check_int("label", label, min=0, max=self.num_labels - 1)
        self.label = label
        self.tokenizer = AutoTokenizer.from_pretrained(str(self.path), local_files_only=True)
        if self.tokenizer.pad_token_id is None:
            if self.tokenizer.eos_token_id is None:
                raise ValueError(f"path {str(self.path)!r}: the tokenizer has neither a pad nor an eos token to pad batches with")
            self.tokenizer.pad_token = self.tokenizer.eos_token
        self.tokenizer.padding_side = "right"
        self.tokenizer.truncation_side = "left"
        self.vocab_size = int(model.get_input_embeddings().num_embeddings)
        pad = int(self.tokenizer.pad_token_id)
        if pad >= self.vocab_size:
            raise ValueError(f"path {str(self.path)!r}: the tokenizer's pad token {self.tokenizer.pad_token!r} has id {pad}, "
                             f"but the model's vocabulary has {self.vocab_size} tokens (ids 0..{self.vocab_size - 1}); "
                             "save the tokenizer with a pad token the model knows (for instance "
                             "tokenizer.pad_token = tokenizer.eos_token) or resize the model's embeddings")
        # The head reads the rightmost token that is not the pad id: it must be the id the batches are padded
        # with, or a shorter text of a batch is scored at a pad position.
        model.config.pad_token_id = pad
        model.config.get_text_config().pad_token_id = pad
        limit = getattr(model.config, "max_position_embeddings", None) or getattr(model.config, "n_positions", None)
        if max_length is not None and limit is not None and max_length > limit:  # longer texts would raise in the forward
            raise ValueError(f"max_length must be <= the model's {limit} positions (max_position_embeddings of "
                             f"{str(self.path)!r}), got max_length={max_length}")
        self.max_length = max_length or limit
        self.model = model.to(self.device).eval()

    def score(self, texts: Sequence[str]) -> np.ndarray:
        """The score of each text, (N,) float64; a text that gives no tokens (``""`` without a BOS token) is a ValueError."""
        import torch

        out = np.zeros(len(texts))
        with torch.no_grad():
            for a in range(0, len(texts), self.batch_size):
                enc = self.tokenizer(list(texts[a:a + self.batch_size]), return_tensors="pt", padding=True,
                                     truncation=self.max_length is not None, max_length=self.max_length)
                _check_tokens(enc, a, texts, self.vocab_size)
                enc = {k: v.to(self.device) for k, v in enc.items() if k in ("input_ids", "attention_mask")}
                logits = self.model(**enc).logits.double()  # (b, num_labels)
                if self.num_labels == 1:
                    s = logits[:, 0]
                else:
                    s = torch.softmax(logits, dim=-1)[:, self.label]
                out[a:a + len(s)] = s.cpu().numpy()
        return out

    def __call__(self, prompts: Sequence[str], responses: Sequence[str]) -> Verdicts:
        prompts, responses = check_batch(prompts, responses)
        scores = self.score([p + r for p, r in zip(prompts, responses)])
        rewards = None if self.threshold is None else (scores >= self.threshold).astype(np.float64)
        return Verdicts(scores=scores, rewards=rewards)

    def __repr__(self) -> str:
        return f"RewardModel({str(self.path)!r}, threshold={self.threshold})"
