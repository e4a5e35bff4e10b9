"""The sampling policy pi_T (temperature, top-k, top-p) and one draw from it, shared by the sampler and the training
forward."""
from __future__ import annotations

import torch
import torch.nn.functional as F


def log_policy(logits: torch.Tensor, temperature: float, top_p: float, top_k: int = 0) -> torch.Tensor:
    """(..., V) logits -> (..., V) log pi_T, restricted to the top-k tokens, then to the top-p nucleus, renormalised.

    ``top_k`` (0 = off): tokens less likely than the k-th most likely get -inf (tokens tied with it stay),
    and the rest are renormalised. The nucleus is then the smallest set of most likely tokens whose mass
    reaches ``top_p`` (the most likely token is always kept); the others get -inf. Temperature, then
    top-k, then top-p is the order transformers' ``generate`` applies its warpers in (from memory of its
    logits-processor list; common practice).
    """
    logp = F.log_softmax(logits.float() / temperature, dim=-1)
    if 0 < top_k < logp.shape[-1]:
        with torch.no_grad():
            kth = logp.topk(top_k, dim=-1).values[..., -1:]  # (..., 1): the k-th largest log-prob
        logp = F.log_softmax(logp.masked_fill(logp < kth, float("-inf")), dim=-1)
    if top_p >= 1.0:
        return logp
    with torch.no_grad():
        sorted_logp, order = logp.sort(dim=-1, descending=True)
        mass_before = sorted_logp.exp().cumsum(-1) - sorted_logp.exp()  # mass of strictly more likely tokens
        drop_sorted = mass_before >= top_p
        drop = torch.zeros_like(drop_sorted).scatter(-1, order, drop_sorted)
    return F.log_softmax(logp.masked_fill(drop, float("-inf")), dim=-1)


@torch.no_grad()
def draw_tokens(logp: torch.Tensor, generator, generators, n: int) -> torch.Tensor:
    """One token per row from (R, V) log-probs: an inverse-CDF lookup of one uniform per row.

    Token i is drawn when u falls in (c_{i-1}, c_i], c the cumulative sum of the
    probabilities, normalised so that c_V = 1; tokens of zero mass are never drawn. The sum
    and u are float64: a token's mass is then off by at most ~V * 1e-16 beyond the float32
    round-off of its own probability, where a float32 sum could be off by ~V * 6e-8. One
    uniform per row costs far less than ``torch.multinomial``, which draws an exponential
    per (row, token) (``benchmarks/bench_sampling.py``). Uniforms come from ``generator``
    (torch's global RNG when None), or with ``generators`` (one per prompt, each owning
    ``n`` consecutive rows) from each prompt's own generator, so a prompt's samples do not
    depend on which prompts share the batch.
    """
    cdf = logp.exp().double().cumsum(-1)  # (R, V)
    total = cdf[:, -1:]  # (R, 1): 1 up to round-off (log-probs <= 0 sum to at most V), NaN when a logit is NaN or +inf
    ok = total > 0  # False for NaN
    if not bool(ok.all()):  # one read per step
        bad = (~ok).nonzero()[:, 0]
        raise ValueError(f"the model's next-token log-probs are not finite in {bad.numel()} of {logp.shape[0]} rows "
                         f"(first: row {int(bad[0])}, sample {int(bad[0]) % n} of prompt {int(bad[0]) // n} of this "
                         f"chunk): its logits hold NaN or inf; check the weights (torch.isfinite on each parameter) "
                         f"and the inputs")
    cdf = cdf / total  # last entry exactly 1
    if generators is None:
        u = 1.0 - torch.rand(logp.shape[0], generator=generator, device=logp.device, dtype=torch.float64)
    else:
        u = torch.cat([1.0 - torch.rand(n, generator=g, device=logp.device, dtype=torch.float64) for g in generators])
    idx = torch.searchsorted(cdf, u[:, None]).squeeze(-1)  # (R,) first token whose cumulative mass reaches u
    return idx.clamp(max=logp.shape[-1] - 1)
