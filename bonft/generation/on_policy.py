"""Is a hand-written loop on-policy? Compare the policy that samples with the log-probs the loss sees.

The score-function losses are unbiased only when the log-probs they differentiate are those of the
policy that drew the responses (Williams 1992; Chow et al. 2024). A sampler that truncates
(transformers' ``generate(do_sample=True)`` keeps the 50 most likely tokens unless told
``top_k=0``), or samples at another temperature or top-p than the log-prob function assumes, trains
towards a different policy's gradient and nothing crashes. :func:`check_on_policy` draws a small
batch and measures the gap at every drawn step.
"""
from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field

import torch

from bonft._core.checks import check_fraction, check_int, check_nonnegative, check_positive

# generate() fills settings that neither the call nor model.generation_config sets with these
# (transformers' GenerationConfig defaults; top_k=50 is the trap)
_GENERATE_DEFAULTS = {"temperature": 1.0, "top_k": 50, "top_p": 1.0}
# generation_config settings that change the sampling distribution and that the check does not model
_UNMODELLED = {"repetition_penalty": 1.0, "no_repeat_ngram_size": 0, "min_p": None, "typical_p": 1.0,
               "epsilon_cutoff": 0.0, "eta_cutoff": 0.0, "top_h": None, "bad_words_ids": None,
               "suppress_tokens": None, "begin_suppress_tokens": None, "min_length": 0, "min_new_tokens": None,
               "forced_bos_token_id": None, "forced_eos_token_id": None, "sequence_bias": None}
ZERO_MASS = 1e-6  # a drawn token the loss gives less probability than this counts as "zero mass"
NORM_TOL = 1e-3  # the loss's probabilities over the vocabulary must sum to 1 within this


@dataclass
class OnPolicyReport:
    """What :func:`check_on_policy` found. Means are over the drawn steps (response positions up to
    and including the end-of-sequence token).

    * ``missing_mass`` -- mean over steps of the loss's probability on tokens the sampler can never draw;
    * ``kl`` -- mean over steps of KL(sampler || loss) in nats (``inf`` where the loss gives zero
      probability to a token the sampler can draw);
    * ``zero_mass_share`` -- share of drawn tokens to which the loss gives probability < ``ZERO_MASS``;
    * ``outside_support`` -- drawn tokens that the stated settings exclude (the sampler is not what
      its settings say);
    * ``first_step`` -- with ``support_draws``: the empirical first-step test, averaged over prompts
      (``unseen_loss_mass``; under the stated law its ``expected`` value and ``sd_bound``, an upper
      bound on its standard deviation; the number of ``flagged`` prompts);
    * ``draws`` -- per prompt: ``input_ids`` (n, P), ``response_ids`` (n, T), ``mask`` (n, T) and the
      per-step ``missing_mass``, ``kl``, ``loss_logprob`` (n, T) tensors.
    """

    ok: bool
    reasons: list[str]
    settings: dict
    missing_mass: float
    max_missing_mass: float
    kl: float
    max_kl: float
    zero_mass_share: float
    outside_support: int
    steps: int
    per_step: list[dict] = field(default_factory=list)
    first_step: dict | None = None
    draws: list[dict] = field(default_factory=list, repr=False)

    @property
    def verdict(self) -> str:
        return "ok" if self.ok else "off-policy"

    def to_dict(self) -> dict:
        """Plain numbers and strings (``kl`` may be ``inf``); the drawn tensors are left out."""
        keys = ("ok", "verdict", "reasons", "settings", "missing_mass", "max_missing_mass", "kl", "max_kl",
                "zero_mass_share", "outside_support", "steps", "per_step", "first_step")
        return {k: getattr(self, k) for k in keys}

    def __str__(self) -> str:
        s = self.settings
        head = (f"on-policy check: {self.verdict.upper()} (sampler {s['sampler']}: temperature={s['temperature']:g}, "
                f"top_k={s['top_k']}, top_p={s['top_p']:g}; loss log-probs: {s['logprob']}; "
                f"{s['prompts']} prompts x {s['n']} draws, {self.steps} steps)")
        rows = [f"{'step':>5} {'draws':>6} {'missing mass':>13} {'KL(sampler||loss)':>18} {'zero-mass draws':>16}"]
        for r in self.per_step:
            rows.append(f"{r['step']:>5} {r['draws']:>6} {r['missing_mass']:>13.4f} {r['kl']:>18.4f} "
                        f"{r['zero_mass_draws']:>16}")
        rows.append(f"{'all':>5} {self.steps:>6} {self.missing_mass:>13.4f} {self.kl:>18.4f} "
                    f"{round(self.zero_mass_share * self.steps):>16}")
        tail = [f"max per step: missing mass {self.max_missing_mass:.4f}, KL {self.max_kl:.4f}"]
        if self.first_step:
            f = self.first_step
            tail.append(f"first step, {f['draws']} draws per prompt: loss mass on tokens never drawn "
                        f"{f['unseen_loss_mass']:.4f} (stated law: {f['expected']:.4f} +- {f['sd_bound']:.4f}), "
                        f"{f['flagged']} of {self.settings['prompts']} prompts flagged")
        tail += [f"- {r}" for r in self.reasons] or ["- the loss's log-probs describe the sampler's policy"]
        return "\n".join([head, *rows, *tail])


def check_on_policy(model, prompts, *, tokenizer=None, temperature=None, top_k=None, top_p=None, sample_fn=None,
                    logprob_fn=None, n: int = 8, max_new_tokens: int | None = None, seed: int = 0,
                    max_missing_mass: float = 1e-3, max_kl: float = 1e-3, probe_batch: int | None = None,
                    support_draws: int = 0) -> OnPolicyReport:
    """Draw ``n`` responses per prompt and compare, at every drawn step, the sampler's next-token
    distribution q with the distribution p whose log-probs the loss will differentiate.

    ``model``: a transformers causal LM (``model(input_ids).logits``). ``prompts``: token ids (a
    list of ints, a list of such lists, or a (B, P) LongTensor) or, with ``tokenizer``, a string or
    list of strings (encoded with ``tokenizer.encode``). Each prompt runs without padding.

    Sampler: ``sample_fn(model, input_ids) -> ids`` given (n, P) prompt ids returns (n, P + T) ids
    (the prompt followed by the response, as ``generate`` returns them). Without it the check calls
    ``model.generate(input_ids, do_sample=True, max_new_tokens=max_new_tokens (default 8), <your settings>)`` passing
    exactly the settings you give; a setting left as None is left to ``generate``, which takes it
    from ``model.generation_config`` or else its own default (temperature 1, **top_k 50**, top_p 1).

    q is *computed from the logits*, not estimated: one forward pass over the drawn sequences, then
    the warpers transformers applies when sampling, in its order (``TemperatureLogitsWarper``,
    ``TopKLogitsWarper``, ``TopPLogitsWarper``) with the effective settings. With a ``sample_fn``
    those are the settings you state for it (unstated: temperature 1, no top-k, no top-p); the check
    then verifies that every drawn token lies inside that support (``outside_support`` counts those
    that do not). A sampler *narrower* than its stated settings (say, a ``sample_fn`` that calls
    ``generate`` without ``top_k`` while you state none) draws only inside the stated support; to
    catch it, ``support_draws=m`` also *estimates* the first step's support empirically: m more
    draws per prompt (``generate`` with one new token, or ``sample_fn``), and the loss's mass on the
    tokens none of them drew is compared with its expectation had the sampler followed the stated law
    q, ``sum_v p(v) (1 - q(v))^m`` (the chance a token is missed by m independent draws). The
    variance is bounded by the sum of the per-token variances, since the multinomial's zero-count
    indicators are negatively associated (Joag-Dev & Proschan 1983); the step is flagged beyond the
    expectation plus ``max(max_missing_mass, 4 sd_bound)`` (a normal approximation). Its power depends on
    m: a tail spread thinly over a large vocabulary needs many draws. Other ``generation_config``
    options that change the distribution (repetition penalty, min-p, ...) are refused with a
    ValueError.

    Loss: ``logprob_fn(model, input_ids, response_ids)`` returns the per-token log-probs the loss
    will see, (n, T) for (n, P) prompt ids and (n, T) responses, or the log-probs of every vocabulary
    token at each step, (n, T, V). For an (n, T) function p is read by probing it with every token at
    each step (n * V * T rows, ``probe_batch`` rows a call, default 4096: fine for small vocabularies; return
    (n, T, V) for large ones). Default: the full softmax at the sampler's temperature,
    ``log_softmax(logits / temperature)`` -- what a loop that samples with ``top_k=0`` and ``top_p=1``
    should use.

    Verdict "off-policy" when the mean missing mass exceeds ``max_missing_mass``, the mean KL(q || p)
    exceeds ``max_kl``, a drawn token has p < ``ZERO_MASS``, a drawn token lies outside q's support,
    or p does not sum to 1; each with a one-line reason. The model runs in eval mode (dropout off)
    under ``torch.no_grad`` and is returned to its mode; torch's global RNG state is restored after.
    """
    if not callable(model):
        raise TypeError(f"model must be a callable causal LM (e.g. a transformers model), got {type(model).__name__}")
    if sample_fn is not None and not callable(sample_fn):
        raise TypeError(f"sample_fn must be callable (model, input_ids) -> ids, got {type(sample_fn).__name__}")
    if logprob_fn is not None and not callable(logprob_fn):
        raise TypeError(f"logprob_fn must be callable (model, input_ids, response_ids) -> log-probs, "
                        f"got {type(logprob_fn).__name__}")
    n = check_int("n", n, min=1)
    if max_new_tokens is not None and sample_fn is not None:
        raise ValueError(f"max_new_tokens={max_new_tokens!r} cannot take effect with sample_fn: "
                         f"the sampler decides the response length")
    max_new_tokens = check_int("max_new_tokens", 8 if max_new_tokens is None else max_new_tokens, min=1)
    seed = check_int("seed", seed)
    if probe_batch is not None and logprob_fn is None:
        raise ValueError(f"probe_batch={probe_batch!r} cannot take effect without logprob_fn "
                         f"(the default log-probs come from one forward pass)")
    probe_batch = None if probe_batch is None else check_int("probe_batch", probe_batch, min=1)
    support_draws = check_int("support_draws", support_draws, min=0)
    max_missing_mass = check_fraction("max_missing_mass", max_missing_mass)
    max_kl = check_nonnegative("max_kl", max_kl)
    gen_cfg = getattr(model, "generation_config", None)
    if sample_fn is None:
        if not callable(getattr(model, "generate", None)):
            raise TypeError(f"model has no generate method ({type(model).__name__}): pass sample_fn")
        for key, neutral in _UNMODELLED.items():
            value = getattr(gen_cfg, key, neutral)
            if value is not None and value != neutral:
                raise ValueError(f"model.generation_config sets {key}={value!r}, which changes the sampling "
                                 f"distribution in a way check_on_policy does not model; pass sample_fn instead")
    given = {"temperature": temperature, "top_k": top_k, "top_p": top_p}
    eff = {}
    for key, value in given.items():
        if value is None and sample_fn is None:
            value = getattr(gen_cfg, key, None)
            value = _GENERATE_DEFAULTS[key] if value is None else value
        elif value is None:
            value = {"temperature": 1.0, "top_k": 0, "top_p": 1.0}[key]
        eff[key] = value
    eff["temperature"] = check_positive("temperature", eff["temperature"])
    eff["top_k"] = check_int("top_k", eff["top_k"], min=0)
    eff["top_p"] = check_fraction("top_p", eff["top_p"], open_low=True)
    prompt_list = _prompt_ids(prompts, tokenizer)
    eos = _eos_ids(model, gen_cfg)
    pad = getattr(gen_cfg, "pad_token_id", None)
    pad = int(pad) if pad is not None else (eos[0] if eos else 0)

    settings = {"sampler": "sample_fn" if sample_fn else "model.generate", **eff,
                "given": {k: v for k, v in given.items() if v is not None},
                "logprob": "logprob_fn" if logprob_fn else f"full softmax at temperature {eff['temperature']:g}",
                "prompts": len(prompt_list), "n": n}
    device = _device(model)
    was_training = getattr(model, "training", False)
    if hasattr(model, "eval"):
        model.eval()
    try:
        with torch.no_grad(), torch.random.fork_rng(devices=[device] if device.type == "cuda" else []):
            torch.manual_seed(seed)
            sampler = _Sampler(model, sample_fn, given, pad, max_new_tokens)
            draws = [_one_prompt(model, torch.tensor([ids] * n, dtype=torch.long, device=device), sampler,
                                 logprob_fn, eff, eos, probe_batch, support_draws)
                     for ids in prompt_list]
    finally:
        if was_training and hasattr(model, "train"):
            model.train()
    return _summarise(draws, settings, max_missing_mass, max_kl)


# ---------------------------------------------------------------- one prompt


class _Sampler:
    """The user's sampler, or generate with exactly the settings the user gave."""

    def __init__(self, model, sample_fn, given, pad, max_new_tokens):
        self.model, self.sample_fn, self.pad, self.max_new_tokens = model, sample_fn, pad, max_new_tokens
        self.kwargs = {k: v for k, v in given.items() if v is not None}
        self.name = "sample_fn" if sample_fn else "model.generate"

    def __call__(self, input_ids, max_new_tokens=None) -> torch.Tensor:
        if self.sample_fn is not None:
            out = self.sample_fn(self.model, input_ids.clone())
        else:
            out = self.model.generate(input_ids, attention_mask=torch.ones_like(input_ids), do_sample=True,
                                      max_new_tokens=max_new_tokens or self.max_new_tokens, pad_token_id=self.pad,
                                      **self.kwargs)
        return _check_ids(self.name, out, input_ids)


def _one_prompt(model, input_ids, sampler, logprob_fn, eff, eos, probe_batch, support_draws) -> dict:
    n, P = input_ids.shape
    out = sampler(input_ids)
    response = out[:, P:]
    T = response.shape[1]
    mask = torch.ones_like(response, dtype=torch.bool)
    if eos:
        is_eos = torch.isin(response, torch.tensor(eos, device=response.device))
        mask = (is_eos.long().cumsum(1) - is_eos.long()) == 0  # up to and including the first end token
    logits = _logits(model, out)[:, P - 1:P - 1 + T].float()  # (n, T, V): logits at t predict response token t
    V = logits.shape[-1]
    if int(response.max()) >= V or int(response.min()) < 0:
        raise ValueError(f"the sampler returned token ids outside the vocabulary [0, {V}): "
                         f"min {int(response.min())}, max {int(response.max())}")
    log_q = _warp(logits.double(), eff)  # (n, T, V) log q, -inf outside the sampler's support
    if logprob_fn is None:
        log_p = torch.log_softmax(logits.double() / eff["temperature"], -1)
    else:
        log_p = _loss_table(logprob_fn, model, input_ids, response, V, probe_batch)
    q, p = log_q.exp(), log_p.exp()
    in_support = q > 0
    missing = torch.where(in_support, 0.0, p).sum(-1)  # (n, T)
    diff = torch.where(in_support, log_q - log_p, torch.zeros_like(log_q))  # inf where p = 0 < q
    kl = (q * diff).sum(-1).clamp(min=0.0)  # >= 0 exactly; the clamp only removes round-off below 0
    loss_lp = log_p.gather(-1, response[..., None])[..., 0]
    outside = ~in_support.gather(-1, response[..., None])[..., 0]
    norm = p.sum(-1)
    first = _first_step_support(sampler, input_ids[:1], q[0, 0], p[0, 0], support_draws) if support_draws else None
    return {"input_ids": input_ids, "response_ids": response, "mask": mask, "missing_mass": missing, "kl": kl,
            "loss_logprob": loss_lp, "outside_support": outside, "loss_total": norm, "first_step": first}


def _first_step_support(sampler, prompt, q, p, m) -> dict:
    """m first tokens from the sampler; the loss's mass on the tokens none of them drew, and its
    expectation and standard deviation (an upper bound) had the sampler drawn from q."""
    P = prompt.shape[1]
    first = sampler(prompt.expand(m, P).contiguous(), max_new_tokens=1)[:, P]
    if int(first.max()) >= q.shape[0]:
        raise ValueError(f"the sampler returned token id {int(first.max())} outside the vocabulary [0, {q.shape[0]})")
    unseen = torch.bincount(first, minlength=q.shape[0]) == 0
    miss = (1.0 - q) ** m  # P(token v never among m independent draws from q)
    return {"draws": m, "unseen_loss_mass": p[unseen].sum().item(), "expected": (p * miss).sum().item(),
            "sd_bound": (p * p * miss * (1.0 - miss)).sum().sqrt().item(),
            "outside_support": int((q[first] == 0).sum()), "first_tokens": first}


def _warp(logits, eff) -> torch.Tensor:
    """log q: the warpers generate() applies when sampling, in its order, then log-softmax."""
    from transformers import TemperatureLogitsWarper, TopKLogitsWarper, TopPLogitsWarper

    n, T, V = logits.shape
    scores = logits.reshape(n * T, V)
    if eff["temperature"] != 1.0:
        scores = TemperatureLogitsWarper(eff["temperature"])(None, scores)
    if eff["top_k"] != 0:
        scores = TopKLogitsWarper(top_k=eff["top_k"], min_tokens_to_keep=1)(None, scores)
    if eff["top_p"] < 1.0:
        scores = TopPLogitsWarper(top_p=eff["top_p"], min_tokens_to_keep=1)(None, scores)
    return torch.log_softmax(scores, -1).reshape(n, T, V)


def _loss_table(logprob_fn, model, input_ids, response, V, probe_batch) -> torch.Tensor:
    """(n, T, V) log p from the user's function: its own table, or probed token by token."""
    n, T = response.shape
    first = _check_logprobs(logprob_fn(model, input_ids, response), (n, T), V)
    if first.ndim == 3:
        if probe_batch is not None:
            raise ValueError(f"probe_batch={probe_batch} cannot take effect: logprob_fn returns the whole "
                             f"(n, T, V) table, nothing is probed")
        return first
    probe_batch = probe_batch or 4096
    table = torch.empty(n, T, V, dtype=torch.float64, device=response.device)
    vocab = torch.arange(V, device=response.device)
    for t in range(T):
        rows = response[:, :t + 1].repeat_interleave(V, 0)  # (n*V, t+1): row i*V + v puts token v at step t
        rows[:, t] = vocab.repeat(n)
        prompts = input_ids.repeat_interleave(V, 0)
        col = []
        for s in range(0, n * V, probe_batch):
            out = _check_logprobs(logprob_fn(model, prompts[s:s + probe_batch], rows[s:s + probe_batch]),
                                  (min(probe_batch, n * V - s), t + 1), None)
            col.append(out[:, t])
        table[:, t] = torch.cat(col).view(n, V)
    return table


# ---------------------------------------------------------------- checks and helpers


def _check_logprobs(out, shape, V) -> torch.Tensor:
    if not isinstance(out, torch.Tensor) or not out.is_floating_point():
        raise TypeError(f"logprob_fn must return a float tensor of per-token log-probs, got {type(out).__name__}"
                        + (f" of dtype {out.dtype}" if isinstance(out, torch.Tensor) else ""))
    full = (*shape, V) if V is not None else None
    if tuple(out.shape) != shape and tuple(out.shape) != full:
        want = f"{shape}" + (f" or {full}" if full else "")
        raise ValueError(f"logprob_fn must return log-probs of shape {want} for response_ids of shape {shape}, "
                         f"got {tuple(out.shape)}")
    out = out.detach().double()
    if torch.isnan(out).any() or (out == float("inf")).any():
        raise ValueError(f"logprob_fn returned {int(torch.isnan(out).sum())} NaN and "
                         f"{int((out == float('inf')).sum())} +inf values")
    if (out > 1e-4).any():
        raise ValueError(f"logprob_fn must return log-probs (<= 0), got a maximum of {out.max().item():.4g}")
    return out.clamp(max=0.0)


def _check_ids(name, out, input_ids) -> torch.Tensor:
    out = getattr(out, "sequences", out)
    if not isinstance(out, torch.Tensor) or out.dtype not in (torch.long, torch.int, torch.int32):
        raise TypeError(f"{name} must return a tensor of token ids, got {type(out).__name__}"
                        + (f" of dtype {out.dtype}" if isinstance(out, torch.Tensor) else ""))
    n, P = input_ids.shape
    if out.ndim != 2 or out.shape[0] != n or out.shape[1] <= P:
        raise ValueError(f"{name} must return (n, P + T) ids with T >= 1, the prompt followed by the response, "
                         f"for input_ids of shape {(n, P)}; got shape {tuple(out.shape)}")
    out = out.long().to(input_ids.device)
    if not torch.equal(out[:, :P], input_ids):
        raise ValueError(f"{name} must return the prompt ids followed by the response (as generate does); "
                         f"its first {P} columns differ from input_ids")
    return out


def _prompt_ids(prompts, tokenizer) -> list[list[int]]:
    if isinstance(prompts, str):
        prompts = [prompts]
    if isinstance(prompts, torch.Tensor):
        if prompts.ndim not in (1, 2) or prompts.dtype.is_floating_point:
            raise ValueError(f"prompts as a tensor must be 1-D or 2-D integer token ids, "
                             f"got shape {tuple(prompts.shape)} dtype {prompts.dtype}")
        prompts = prompts.tolist() if prompts.ndim == 2 else [prompts.tolist()]
    if not isinstance(prompts, (list, tuple)) or not prompts:
        raise ValueError(f"prompts must be a non-empty list of strings or token-id lists, got {prompts!r:.80}")
    if all(isinstance(p, numbers.Integral) and not isinstance(p, bool) for p in prompts):
        prompts = [list(prompts)]
    result, encoded = [], False
    for i, p in enumerate(prompts):
        if isinstance(p, str):
            if tokenizer is None:
                raise ValueError(f"prompts[{i}] is a string: pass tokenizer (with an encode method) or token ids")
            if not callable(getattr(tokenizer, "encode", None)):
                raise TypeError(f"tokenizer must have an encode method, got {type(tokenizer).__name__}")
            enc = tokenizer.encode(p)
            p, encoded = list(getattr(enc, "ids", enc)), True
        if isinstance(p, torch.Tensor):
            p = p.tolist()
        if not isinstance(p, (list, tuple)) or not all(isinstance(t, numbers.Integral) and not isinstance(t, bool)
                                                       for t in p):
            raise TypeError(f"prompts[{i}] must be a string or a list of int token ids, got {p!r:.80}")
        if not p:
            raise ValueError(f"prompts[{i}] has no tokens: each prompt needs at least one to predict from")
        if min(p) < 0:
            raise ValueError(f"prompts[{i}] has a negative token id {min(p)}")
        result.append([int(t) for t in p])
    if tokenizer is not None and not encoded:
        raise ValueError("tokenizer cannot take effect: prompts are token ids, not strings")
    return result


def _eos_ids(model, gen_cfg) -> list[int]:
    eos = getattr(gen_cfg, "eos_token_id", None)
    if eos is None:
        eos = getattr(getattr(model, "config", None), "eos_token_id", None)
    if eos is None:
        return []
    return [int(e) for e in (eos if isinstance(eos, (list, tuple)) else [eos])]


def _logits(model, ids) -> torch.Tensor:
    out = model(ids)
    return out if isinstance(out, torch.Tensor) else out.logits


def _device(model) -> torch.device:
    try:
        return next(model.parameters()).device
    except (AttributeError, StopIteration):
        return torch.device("cpu")


def _summarise(draws, settings, max_missing_mass, max_kl) -> OnPolicyReport:
    m = torch.cat([d["mask"].reshape(-1) for d in draws])
    pick = {k: torch.cat([d[k].reshape(-1) for d in draws])[m] for k in
            ("missing_mass", "kl", "loss_logprob", "outside_support", "loss_total")}
    step = torch.cat([torch.arange(d["mask"].shape[1]).expand_as(d["mask"]).reshape(-1) for d in draws])[m.cpu()]
    zero = pick["loss_logprob"] < math.log(ZERO_MASS)
    per_step = []
    for t in sorted(set(step.tolist())):
        sel = (step == t).to(zero.device)
        per_step.append({"step": t + 1, "draws": int(sel.sum()), "missing_mass": pick["missing_mass"][sel].mean().item(),
                         "kl": pick["kl"][sel].mean().item(), "zero_mass_draws": int(zero[sel].sum())})
    missing, kl = pick["missing_mass"].mean().item(), pick["kl"].mean().item()
    zero_share, outside = zero.double().mean().item(), int(pick["outside_support"].sum())
    norm_err = (pick["loss_total"] - 1).abs().max().item()
    first = None
    if draws[0]["first_step"] is not None:
        fs = [d["first_step"] for d in draws]
        flagged = sum(f["unseen_loss_mass"] > f["expected"] + max(max_missing_mass, 4 * f["sd_bound"]) for f in fs)
        first = {"draws": fs[0]["draws"], "flagged": flagged,
                 **{k: sum(f[k] for f in fs) / len(fs) for k in ("unseen_loss_mass", "expected", "sd_bound")}}
        outside += sum(f["outside_support"] for f in fs)
    reasons = []
    if missing > max_missing_mass:
        hint = ""
        if settings["top_k"] and "top_k" not in settings["given"] and settings["sampler"] == "model.generate":
            hint = f" (generate keeps the top {settings['top_k']} tokens when top_k is not given: pass top_k=0)"
        reasons.append(f"the sampler never draws {missing:.2%} of the loss's probability mass per step on average "
                       f"(> {max_missing_mass:g}); top_k={settings['top_k']}, top_p={settings['top_p']:g}{hint}")
    if kl > max_kl:
        reasons.append(f"mean KL(sampler || loss) per step is {kl:.4g} nats (> {max_kl:g}): the loss's log-probs are "
                       f"not the sampler's; compare their temperature and truncation with the sampler's "
                       f"(temperature={settings['temperature']:g}, top_k={settings['top_k']}, top_p={settings['top_p']:g})")
    if zero_share > 0:
        reasons.append(f"{zero_share:.2%} of drawn tokens get probability < {ZERO_MASS:g} from the loss")
    if outside:
        reasons.append(f"{outside} drawn tokens lie outside the support the stated settings give: the sampler "
                       f"does not sample with temperature={settings['temperature']:g}, top_k={settings['top_k']}, "
                       f"top_p={settings['top_p']:g}")
    if first and first["flagged"]:
        reasons.append(f"{first['draws']} first tokens per prompt left {first['unseen_loss_mass']:.2%} of the loss's "
                       f"mass undrawn where the stated law leaves {first['expected']:.2%}: the sampler is narrower "
                       f"than temperature={settings['temperature']:g}, top_k={settings['top_k']}, "
                       f"top_p={settings['top_p']:g} (generate, when not given top_k, keeps the top "
                       f"model.generation_config.top_k tokens, else 50)")
    if norm_err > NORM_TOL:
        reasons.append(f"the loss's probabilities over the vocabulary sum to 1 +- {norm_err:.3g} (> {NORM_TOL:g}): "
                       f"logprob_fn does not return normalised log-probs")
    return OnPolicyReport(ok=not reasons, reasons=reasons, settings=settings, missing_mass=missing,
                          max_missing_mass=pick["missing_mass"].max().item(), kl=kl, max_kl=pick["kl"].max().item(),
                          zero_mass_share=zero_share, outside_support=outside, steps=int(m.sum()),
                          per_step=per_step, first_step=first, draws=draws)
