"""Model mode of the planner: draw pools at a grid of temperatures, score them, cache them on disk.

One samples JSONL file per (model hash, prompts hash, verifier, temperature, n, seed,
top_p, top_k, max_new_tokens) under ``cache_dir``, so a re-run with more temperatures samples
only the new ones. Each temperature gets its own seed derived from ``seed`` and T, so a
cached pool is the same whichever other temperatures are asked for.

Caution: sampled responses are model-written. If the verifier runs them (code,
tool calls), run it sandboxed (:class:`bonft.verifiers.CodeRunner`), never with
``exec`` in your own process. A planner run against a gameable verifier finds
the temperature that games it best (reward hacking): plan on true rewards.
"""
from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
from tqdm.auto import tqdm

from bonft._core.checks import MAX_POOL, check_bound, check_fraction, check_int, check_seed
from bonft._core.seeds import derive_seed, float_key
from bonft.generation.sampling import sample
from bonft.io import SampleTable, read_samples, same_temperature, temperature_label, write_samples
from bonft.plan.sweep import (
    PLAN_OPTIONS,
    _check_boot_table,
    _check_budgets,
    _check_temperatures,
    check_plan_options,
    plan_samples,
)
from bonft.verifiers import score_batch
from bonft.verifiers.base import verifier_name as name_of_verifier
from bonft.verifiers.scoring import VerifierError

PROMPT_CHUNK = 16  # prompts per sampling call: the progress bar's step, and part of each chunk's seed


def model_fingerprint(model: Any, tokenizer: Any) -> str:
    """sha256 of the model class, config, every parameter/buffer (name, dtype, shape, bytes) and the vocabulary."""
    import torch

    h = hashlib.sha256(type(model).__name__.encode())
    cfg = getattr(model, "config", None)
    if cfg is not None and hasattr(cfg, "to_json_string"):
        h.update(cfg.to_json_string(use_diff=False).encode())
    for name, t in sorted(model.state_dict().items()):
        t = t.detach().cpu().contiguous()
        h.update(f"{name}|{t.dtype}|{tuple(t.shape)}".encode())
        h.update(t.reshape(-1).view(torch.uint8).numpy().tobytes())
    if hasattr(tokenizer, "get_vocab"):
        h.update(json.dumps(sorted(tokenizer.get_vocab().items())).encode())
    return h.hexdigest()


def prompts_fingerprint(prompts: Sequence[str]) -> str:
    return hashlib.sha256(json.dumps(list(prompts)).encode()).hexdigest()


def _seed_for(seed: int, temperature: float, chunk: int) -> int:
    return derive_seed(seed, float_key(temperature), chunk, bits=31)


def cache_file(cache_dir, *, model_hash: str, prompts_hash: str, verifier: str, temperature: float, n: int,
               seed: int, top_p: float, max_new_tokens: int, top_k: int = 0) -> Path:
    """The cache file of one temperature's pools: ``plan-T{T}-n{n}-{key}.jsonl`` (key: sha256 of all the fields)."""
    fields = dict(model=model_hash, prompts=prompts_hash, verifier=verifier, temperature=round(float(temperature), 9),
                  n=n, seed=seed, top_p=round(float(top_p), 9), max_new_tokens=max_new_tokens, chunk=PROMPT_CHUNK)
    if top_k:  # untruncated pools keep the keys they had before top_k existed
        fields["top_k"] = top_k
    key = hashlib.sha256(json.dumps(fields, sort_keys=True).encode()).hexdigest()[:16]
    return Path(cache_dir) / f"plan-T{temperature:g}-n{n}-{key}.jsonl"


def _check_sampled_temperatures(temperatures: Any) -> np.ndarray:
    """A grid to sample: temperatures distinct as float32 (a pool's temperature as a samples file stores it,
    :func:`bonft.io.same_temperature`), or two of them would sample, cache and plan one pool twice."""
    temps = _check_temperatures(temperatures)
    for i in range(1, temps.size):
        same = np.flatnonzero(same_temperature(temps[:i], temps[i]))
        if same.size:
            raise ValueError(f"temperatures must be distinct as float32 (the precision a pool's temperature is stored "
                             f"with), got {float(temps[same[0]])!r} and {float(temps[i])!r}, both "
                             f"T={temperature_label(temps[i])}")
    return temps


def _check_verifier_name(verifier_name: Any) -> None:
    if verifier_name is not None and not isinstance(verifier_name, str):
        raise TypeError(f"verifier_name must be a str (part of the cache key) or None, got "
                        f"{type(verifier_name).__name__} {verifier_name!r}")
    if verifier_name is not None and not verifier_name.strip():
        raise ValueError(f"verifier_name must be a non-empty str (part of the cache key) or None, got {verifier_name!r}")


def check_model_plan(temperatures: Any, n: Any, *, verifier_name: Any = None, **plan_kwargs: Any) -> None:
    """What :func:`plan_model` can check before any model is loaded or sampled: the grid, n, the verifier's name and
    every planner option, including those that depend on the grid (the bootstrap table's size, a sample budget
    above the largest k planned, a token budget below one token)."""
    unknown = sorted(set(plan_kwargs) - set(PLAN_OPTIONS))
    if unknown:
        raise TypeError(f"plan_model got unknown planner option(s) {unknown}; plan_kwargs takes "
                        f"{', '.join(o for o in PLAN_OPTIONS if o != 'seed')}")
    check_plan_options(**plan_kwargs)  # the planner's knobs on their own
    temps = _check_sampled_temperatures(temperatures)
    n = check_bound("n", n, max=MAX_POOL, why="samples per prompt: a pool is sampled, scored and planned over at once")
    _check_verifier_name(verifier_name)
    max_k = plan_kwargs.get("max_k")
    if max_k is not None and max_k > n:
        raise ValueError(f"max_k must be <= n (n={n}, the samples drawn per prompt), got max_k={max_k}")
    top, what = (n, f"n (n={n}, the samples drawn per prompt)") if max_k is None else (
        max_k, f"max_k (max_k={max_k}, the largest k planned)")
    for b in _check_budgets("budget_samples", plan_kwargs.get("budget_samples"), integer=True):
        if b > top:
            raise ValueError(f"budget_samples must be <= {what}: the grid cannot reach a larger budget, got "
                             f"budget_samples={b}")
    for b in _check_budgets("budget_tokens", plan_kwargs.get("budget_tokens"), integer=False):
        if float(b) < 1:
            raise ValueError(f"budget_tokens must be >= 1 (a sampled response costs at least one generated token, its "
                             f"end-of-sequence), got budget_tokens={float(b):g}")
    _check_boot_table(plan_kwargs.get("n_boot", 2000), temps.size, top)


def draw_samples(
    model: Any,
    tokenizer: Any,
    prompts: Sequence[str],
    verifier: Callable,
    *,
    temperatures: Sequence[float],
    n: int,
    seed: int = 0,
    top_p: float = 1.0,
    top_k: int = 0,
    max_new_tokens: int = 32,
    batch_size: int | None = None,
    cache_dir: str | os.PathLike | None = None,
    verifier_name: str | None = None,
    progress: bool = True,
):
    """Sample n responses per prompt at each temperature and score them.

    prompts: P strings; -> (SampleTable with P * n rows per temperature, info), where
    info = {"sampled": temperatures drawn now, "cached": temperatures read from cache_dir,
    "failed": verifier failures, "files": cache files}. Prompt ids are "p0", "p1", ... in order; each cache row
    carries its sample index (0 .. n-1, field ``sample``), so identical short responses read as distinct samples
    (``bonft plan --samples`` on a cache file); caches written without it are read as before.
    verifier_name: part of the cache key (default: the verifier's qualified name); change it
    when the verifier's behaviour changes, or old pools would be reused.
    """
    temps = _check_sampled_temperatures(temperatures)
    n = check_bound("n", n, max=MAX_POOL, why="samples per prompt: a pool is sampled, scored and planned over at once")
    _check_verifier_name(verifier_name)
    seed = check_seed(seed)
    top_p = check_fraction("top_p", top_p, open_low=True)
    top_k = check_int("top_k", top_k, min=0)
    max_new_tokens = check_int("max_new_tokens", max_new_tokens, min=1)
    if isinstance(prompts, str) or not all(isinstance(p, str) for p in prompts):
        raise TypeError("prompts must be a sequence of strings")
    prompts = list(prompts)
    if not prompts:
        raise ValueError("prompts must hold at least one prompt, got none")
    if not callable(verifier):
        raise TypeError(f"verifier must be callable as verifier(prompts, responses), got {type(verifier).__name__}")
    if verifier_name is None:
        verifier_name = name_of_verifier(verifier)
    ids = [f"p{i}" for i in range(len(prompts))]

    files: dict[float, Path] = {}
    if cache_dir is not None:
        os.makedirs(cache_dir, exist_ok=True)
        m_hash, p_hash = model_fingerprint(model, tokenizer), prompts_fingerprint(prompts)
        for t in temps:
            files[float(t)] = cache_file(cache_dir, model_hash=m_hash, prompts_hash=p_hash, verifier=verifier_name,
                                         temperature=float(t), n=n, seed=seed, top_p=top_p, max_new_tokens=max_new_tokens,
                                         top_k=top_k)
    cols = {k: [] for k in ("prompt_keys", "scores", "rewards", "temperatures", "n_tokens")}
    info = {"sampled": [], "cached": [], "failed": 0, "no_rewards": False, "files": [str(f) for f in files.values()]}

    def add(tab):
        cols["prompt_keys"].append(np.asarray(tab.prompt_keys).astype(str))
        cols["scores"].append(tab.scores), cols["rewards"].append(tab.rewards)
        cols["temperatures"].append(tab.temperatures), cols["n_tokens"].append(tab.n_tokens)

    todo = []
    for t in temps:
        f = files.get(float(t))
        if f is not None and f.is_file():
            tab = read_samples(f, duplicates="allow")  # identical short responses are expected
            if len(tab) == len(prompts) * n and tab.n_tokens is not None:
                add(tab)
                info["cached"].append(float(t))
                continue
        todo.append(float(t))
    bar = tqdm(total=len(todo) * len(prompts) * n, unit="sample", desc="sampling", disable=not progress or not todo)
    for t in todo:
        rows = []
        for c in range(0, len(prompts), PROMPT_CHUNK):
            bar.set_description(f"sampling T={t:g}")
            part = prompts[c : c + PROMPT_CHUNK]
            out = sample(model, tokenizer, part, n=n, temperature=t, top_p=top_p, top_k=top_k, max_new_tokens=max_new_tokens,
                         seed=_seed_for(seed, t, c // PROMPT_CHUNK), batch_size=batch_size)
            flat_p = [p for p in part for _ in range(n)]  # (B, n) -> B*n rows, prompt-major
            flat_r = [txt for row in out.texts for txt in row]
            lengths = out.response_valid.sum(-1).reshape(-1).tolist()  # (B, n) generated tokens -> B*n
            v = score_batch(verifier, flat_p, flat_r)
            if v.n_failed == len(flat_p):  # stand-ins only: the plan would rank a temperature nothing was judged at
                cause = next((r for r in v.reasons if r), "failed")
                raise VerifierError(f"the verifier failed on every one of the {len(flat_p)} samples of prompts "
                                    f"{c + 1}-{c + len(part)} at temperature {t:g} ({cause}), so that temperature would "
                                    "be ranked on stand-in scores that judged nothing; fix the verifier (bonft "
                                    "check-verifier tests one on a few samples) and plan again")
            info["failed"] += v.n_failed
            rewards = v.rewards
            if rewards is None:  # a verifier without true rewards: plan on its scores
                info["no_rewards"], rewards = True, v.scores
            for i in range(len(flat_p)):
                rows.append({"prompt_id": ids[c + i // n], "sample": i % n, "score": float(v.scores[i]),
                             "reward": float(rewards[i]),
                             "temperature": t, "n_tokens": int(lengths[i]), "response": flat_r[i]})
            bar.update(len(part) * n)
        tab = SampleTable(
            prompt_keys=np.asarray([r["prompt_id"] for r in rows]),
            scores=np.asarray([r["score"] for r in rows], dtype=np.float64),
            rewards=np.asarray([r["reward"] for r in rows], dtype=np.float64),
            temperatures=np.full(len(rows), t),
            n_tokens=np.asarray([r["n_tokens"] for r in rows], dtype=np.int64),
        )
        if t in files:
            write_samples(files[t], rows)  # atomic: a crash leaves no half-written cache file
        add(tab)
        info["sampled"].append(t)
    bar.close()
    table = SampleTable(**{k: np.concatenate(v) for k, v in cols.items()})
    return table, info


def plan_model(
    model: Any,
    tokenizer: Any,
    prompts: Sequence[str],
    verifier: Callable,
    *,
    temperatures: Sequence[float] = (0.4, 0.7, 1.0, 1.3),
    n: int = 64,
    seed: int = 0,
    top_p: float = 1.0,
    top_k: int = 0,
    max_new_tokens: int = 32,
    batch_size: int | None = None,
    cache_dir: str | os.PathLike | None = None,
    verifier_name: str | None = None,
    progress: bool = True,
    **plan_kwargs: Any,
):
    """Draw pools from a model (see :func:`draw_samples`), then :func:`bonft.plan.sweep.plan_samples`.

    plan_kwargs: max_k, budget_samples, budget_tokens, confidence, n_boot, min_gain (seed is shared); each is
    checked, and an unknown keyword refused, before any sampling (:func:`check_model_plan`): a sample budget
    above max_k (or n), a token budget below 1, temperatures equal as float32 or n_boot x temperatures x max_k
    above the bootstrap table's bound are errors there.
    verifier_name: a str or None (see :func:`draw_samples`).
    -> (PlanResult, info).
    """
    check_model_plan(temperatures, n, verifier_name=verifier_name, seed=seed, **plan_kwargs)  # before any sampling
    table, info = draw_samples(model, tokenizer, prompts, verifier, temperatures=temperatures, n=n, seed=seed,
                               top_p=top_p, top_k=top_k, max_new_tokens=max_new_tokens, batch_size=batch_size,
                               cache_dir=cache_dir, verifier_name=verifier_name, progress=progress)
    res = plan_samples(table, temperatures=temperatures, seed=seed, **plan_kwargs)
    res.mode = "model"  # pools drawn here, not read from a samples file
    if info["no_rewards"]:
        res.notes.append("the verifier reported no true rewards: values are of its scores")
    if info["failed"]:
        res.notes.append(f"the verifier failed on {info['failed']} samples (scored as failures)")
    return res, info
