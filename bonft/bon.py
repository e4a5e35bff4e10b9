"""Exact best-of-k calculus on a finite outcome set, differentiable.

Draw ``k`` outcomes i.i.d. from a policy ``pi`` over ``V`` outcomes, let a
verifier score them, keep the one with the highest score (ties broken
uniformly at random among the tied *samples*). The kept outcome follows the
best-of-k policy (Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N
Sampling in LLMs")::

    pi_bon(v) = pi(v) / P(G_v) * (F(s_v)^k - F_(s_v)^k)

with ``G_v = {u : s_u = s_v}``, ``F(s) = P(score <= s)`` and
``F_(s) = P(score < s)``. Every function here computes the gain
``D(v) = pi_bon(v) / pi(v)`` in log space, so k up to 10^4 and probabilities
down to 1e-30 stay finite, values and gradients alike.

Inputs are numpy arrays or torch tensors of any real dtype; the math runs in
float64 and results are float64 of the same kind as ``probs`` (numpy in ->
numpy out, torch in -> torch out on the same device, differentiable w.r.t.
``probs`` -- hence w.r.t. logits through :func:`softmax_policy` -- and
``rewards``). Scores are treated as constants: ``pi_bon`` is piecewise
constant in them.

Caution: best-of-k puts its weight on whatever the verifier ranks highest. A
policy fine-tuned to raise ``V_k`` against an imperfect verifier learns the
verifier's blind spots (reward hacking); watch :func:`best_of_k_kl` and evaluate
with a held-out check. If the verifier runs model-written code, run it
sandboxed.
"""
from __future__ import annotations

import math
import numbers
from typing import Any

import torch

from bonft._core.checks import check_finite, check_int, check_nonempty, check_positive, is_tensor
from bonft._core.outcomes import as_float64_tensor, check_outcome_values, check_policy_probs, returned_like
from bonft._core.passk import pass_at_k_prob
from bonft._core.ties import first_of_group, group_ids

__all__ = [
    "softmax_policy",
    "best_of_k_distribution",
    "log_best_of_k_distribution",
    "best_of_k_value",
    "best_of_k_success",
    "best_of_k_kl",
]

_LN2 = math.log(2.0)
_TINY = 1e-300  # keeps log(-expm1(x)) finite when x rounds to 0


# ----------------------------------------------------------------- validation


def _check_k(k: Any) -> int:
    return check_int("k", k, min=1)


# ----------------------------------------------------------------------- math


def _log1mexp(x: torch.Tensor) -> torch.Tensor:
    """log(1 - exp(x)) for x <= 0 (x may be -inf), both branches NaN-free in grads."""
    near0 = x > -_LN2
    xa = torch.where(near0, x, torch.full_like(x, -1.0)).clamp(max=-_TINY)
    xb = torch.where(near0, torch.full_like(x, -1.0), x)
    return torch.where(near0, torch.log(-torch.expm1(xa)), torch.log1p(-torch.exp(xb)))


def _log_gain(p: torch.Tensor, s: torch.Tensor, k: int) -> tuple[torch.Tensor, torch.Tensor]:
    """log D(v) = log pi_bon(v) - log pi(v), and the broadcast probs.

    p: (..., V), s: broadcastable to p -> both (L..., V) with L the broadcast
    leading shape. Where the whole tie group of v has mass 0, D(v) is the
    limit k F_^(k-1) (the one-sided derivative), so pi_bon = pi * D still
    holds and the gradient at pi(v) = 0 is right for that entry.
    """
    shape = torch.broadcast_shapes(p.shape, s.shape)
    p = p.expand(shape)
    if k == 1:  # best-of-1 is the policy itself: D = 1
        return torch.zeros(shape, dtype=torch.float64, device=p.device), p
    V = shape[-1]
    # flatten leading axes: (L..., V) -> (B, V)
    p2 = p.reshape(-1, V)
    s2 = s.detach().expand(shape).reshape(-1, V)
    B = p2.shape[0]

    ss, order = torch.sort(s2, dim=-1, stable=True)  # (B, V) ascending scores
    ps = p2.gather(-1, order)  # (B, V) probs in score order
    gid = group_ids(first_of_group(ss))  # (B, V) tie-group index of each sorted outcome
    mass = torch.zeros_like(ps).scatter_add(-1, gid, ps)  # (B, V) P(G_j), trailing groups 0
    below = torch.cat([mass.new_zeros(B, 1), mass.cumsum(-1)[:, :-1]], dim=-1)  # (B, V) F_ per group
    PG = mass.gather(-1, gid)  # (B, V) P(G_v) per outcome
    Fex = below.gather(-1, gid)  # (B, V) F_(s_v) per outcome

    pos = PG > 0
    PG_s = torch.where(pos, PG, torch.ones_like(PG))
    F_s = torch.where(pos, Fex + PG, torch.ones_like(PG))  # F(s_v) >= P(G_v)
    r = PG_s / F_s  # 1 - F_/F, in (0, 1]
    inner = r < 1
    r_s = torch.where(inner, r, torch.full_like(r, 0.5))
    # x = k log(F_/F); 1 - exp(x) = (F^k - F_^k) / F^k
    x = torch.where(inner, k * torch.log1p(-r_s), torch.full_like(r, -math.inf))
    log_gain_pos = k * torch.log(F_s) + _log1mexp(x) - torch.log(PG_s)
    # empty group: D = d/dq [(F_ + q)^k] at q = 0 = k F_^(k-1)
    fz = (~pos) & (Fex > 0)
    Fex_s = torch.where(fz, Fex, torch.ones_like(Fex))
    log_gain_zero = torch.where(
        fz, math.log(k) + (k - 1) * torch.log(Fex_s), torch.full_like(Fex, -math.inf)
    )
    lg_sorted = torch.where(pos, log_gain_pos, log_gain_zero)
    inv = torch.argsort(order, dim=-1)  # (B, V) undo the sort
    lg = lg_sorted.gather(-1, inv).reshape(shape)  # (B, V) -> (L..., V)
    return lg, p


# ------------------------------------------------------------------ public API


def _check_scaled(top: torch.Tensor, T: float) -> None:
    """Each row's largest logit over the temperature must stay finite: past float64's range softmax is NaN."""
    bad = ~torch.isfinite(top / T)
    if bool(bad.any()):
        worst = float(top[bad].abs().max())
        raise ValueError(f"temperature must keep logits / temperature finite in float64 (|value| <= 1.8e308), got "
                         f"temperature={T!r} with a row's largest logit {worst:g}: raise the temperature or shift the logits")


def softmax_policy(logits, *, temperature=1.0):
    r"""Sampling policy of a softmax at a temperature.

    Shape: ``logits (..., V) -> (..., V)``.

    .. math:: \pi(v) = \frac{\exp(l_v / T)}{\sum_u \exp(l_u / T)}

    Entries of ``-inf`` (masked outcomes) get probability 0; each row needs at
    least one finite logit, and its largest logit / temperature must stay within
    float64 (a ``ValueError`` otherwise). float64, numpy in -> numpy out, torch in -> torch
    out (differentiable).

    References: Bridle 1990 (softmax); temperature sampling is common practice.
    """
    T = check_positive("temperature", temperature)
    z = as_float64_tensor("logits", logits, None)
    if z.ndim < 1:
        raise ValueError(f"logits must have at least 1 dimension (..., V), got shape {tuple(z.shape)}")
    check_nonempty("logits", z)
    zd = z.detach()
    if bool(torch.isnan(zd).any()) or bool((zd == math.inf).any()):
        bad = torch.nonzero(torch.isnan(zd) | (zd == math.inf))[0].tolist()
        raise ValueError(f"logits must be finite or -inf, got {float(zd[tuple(bad)])} at index {tuple(bad)}")
    if bool((zd == -math.inf).all(-1).any()):
        raise ValueError("logits must have at least one finite entry per row, got a row of all -inf")
    _check_scaled(zd.max(-1).values, T)
    probs = torch.softmax(z / T, dim=-1)
    return returned_like(probs, not is_tensor(logits))


def best_of_k_distribution(probs, scores, *, k):
    r"""Distribution of the outcome best-of-k keeps.

    Shape: ``probs (..., V), scores (..., V) or (V,) -> (..., V)`` (leading axes broadcast).

    .. math:: \pi_{bon}(v) = \frac{\pi(v)}{P(G_v)}\big(F(s_v)^k - F_<(s_v)^k\big)

    with ties broken uniformly among the tied samples; ``pi(v) = 0`` gives 0.

    References: Chow et al. 2024, "Inference-Aware Fine-Tuning for Best-of-N Sampling in LLMs".
    """
    p, as_np = check_policy_probs(probs)
    s = check_outcome_values("scores", scores, p)
    k = _check_k(k)
    lg, pb = _log_gain(p, s, k)
    return returned_like(pb * torch.exp(lg), as_np)


def log_best_of_k_distribution(probs, scores, *, k):
    r"""``log pi_bon``, ``-inf`` where ``pi_bon = 0``.

    Shape: ``probs (..., V), scores (..., V) or (V,) -> (..., V)``.

    .. math:: \log\pi_{bon}(v) = \log\pi(v) + k\log F(s_v) + \log\big(1 - (F_<(s_v)/F(s_v))^k\big) - \log P(G_v)

    finite for k up to 10^4 where :func:`best_of_k_distribution` underflows to 0.

    References: Chow et al. 2024.
    """
    p, as_np = check_policy_probs(probs)
    s = check_outcome_values("scores", scores, p)
    k = _check_k(k)
    lg, pb = _log_gain(p, s, k)
    nz = pb > 0
    logp = torch.log(torch.where(nz, pb, torch.ones_like(pb)))
    lg_s = torch.where(nz, lg, torch.zeros_like(lg))
    out = torch.where(nz, logp + lg_s, torch.full_like(pb, -math.inf))
    return returned_like(out, as_np)


def best_of_k_value(probs, scores, rewards, *, k):
    r"""Expected reward of the outcome best-of-k keeps.

    Shape: ``probs (..., V), scores, rewards (..., V) or (V,) -> (...)``.

    .. math:: V_k = \sum_v \pi_{bon}(v) R_v

    k = 1 gives ``E_pi[R]``. When the verifier knows the reward (scores =
    rewards in {0, 1}) this is ``best_of_k_success(P(R = 1), k=k)``.

    References: Chow et al. 2024.
    """
    p, as_np = check_policy_probs(probs)
    s = check_outcome_values("scores", scores, p)
    R = check_outcome_values("rewards", rewards, p, s)
    k = _check_k(k)
    lg, pb = _log_gain(p, s, k)
    return returned_like(_mean_in_range(pb * torch.exp(lg), R), as_np)


_HUGE = 2.0**960  # rewards above this in magnitude are summed at 2^-64 scale (exact: a power of two)


def _mean_in_range(w: torch.Tensor, R: torch.Tensor) -> torch.Tensor:
    """``sum_v w_v R_v`` for weights ``w`` summing to 1 (up to rounding) -> a value inside ``[min R, max R]``.

    The value is ``min R + sum_v w_v (R_v - min R)`` clipped into the range, so equal rewards give that reward
    exactly; the gradient is the plain sum's, with respect to ``w`` and ``R``. Rewards near float64's edge are
    scaled by 2^-64 first, so neither ``R_v - min R`` nor the sum overflows.
    """
    Rd = R.detach()
    scale = 2.0**-64 if Rd.numel() and float(Rd.abs().max()) > _HUGE else 1.0
    Rs = R * scale
    plain = (w * Rs).sum(-1)  # carries the gradient
    Rs_d, wd = Rs.detach(), w.detach()
    lo = Rs_d.min(-1, keepdim=True).values
    shifted = lo.squeeze(-1) + (wd * (Rs_d - lo)).sum(-1)
    kept = torch.minimum(torch.maximum(shifted, lo.squeeze(-1)), Rs_d.max(-1).values)
    return (plain + (kept - plain.detach())) / scale


def best_of_k_success(p, *, k):
    r"""Chance that at least one of k independent tries succeeds.

    Shape: ``p (...) -> (...)``.

    .. math:: 1 - (1 - p)^k = -\mathrm{expm1}(k\,\mathrm{log1p}(-p))

    (pass@k of a problem solved with chance p). Scalars give a float,
    numpy gives numpy, torch gives a differentiable float64 tensor.

    References: Chen et al. 2021, "Evaluating Large Language Models Trained on Code".
    """
    k = _check_k(k)
    scalar = isinstance(p, numbers.Real) and not isinstance(p, bool)
    if isinstance(p, bool):
        raise TypeError("p must be a probability (number or array), got bool")
    t = as_float64_tensor("p", p, None)
    check_finite("p", t)
    td = t.detach()
    if t.numel() and bool(((td < 0) | (td > 1)).any()):
        bad = torch.nonzero((td < 0) | (td > 1))[0].tolist()
        raise ValueError(f"p must be in [0, 1], got {float(td[tuple(bad)])} at index {tuple(bad)}")
    out = t if k == 1 else pass_at_k_prob(t, k, torch)
    if scalar:
        return float(out)
    return returned_like(out, not is_tensor(p))


def best_of_k_kl(probs, scores, *, k):
    r"""KL divergence of the best-of-k policy from the policy, in nats.

    Shape: ``probs (..., V), scores (..., V) or (V,) -> (...)``.

    .. math:: \mathrm{KL}(\pi_{bon}\,\|\,\pi) = \sum_v \pi_{bon}(v)\log\frac{\pi_{bon}(v)}{\pi(v)}

    Never above ``log k - (k - 1)/k``, reached as the policy spreads over many
    distinct scores.

    References: Beirami et al. 2024, "Theoretical guarantees on the best-of-n
    alignment policy"; Chow et al. 2024 for ``pi_bon``.
    """
    p, as_np = check_policy_probs(probs)
    s = check_outcome_values("scores", scores, p)
    k = _check_k(k)
    lg, pb = _log_gain(p, s, k)
    nz = pb > 0
    lg_s = torch.where(nz, lg, torch.zeros_like(lg))  # D's log only where pi > 0 (finite there)
    return returned_like((pb * torch.exp(lg_s) * lg_s).sum(-1), as_np)
