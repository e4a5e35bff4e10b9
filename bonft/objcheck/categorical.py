"""The categorical part of :func:`bonft.objcheck.check_objective`: small softmax policies, every pool enumerated.

A policy over ``V`` outcomes (``softmax(logits)``, scores with ties, rewards); every pool of ``n`` draws is
enumerated as a multiset with its multinomial probability, so the mean of the credit's gradient estimate
``E[g] = sum_pools P(pool) sum_i w_i grad log pi(y_i)`` is exact (gradients w.r.t. the logits,
``grad log softmax(theta)_y = e_y - pi``). The target's gradient comes from autograd through
:func:`bonft.objcheck.enumeration.value_fn` and is checked against central finite differences. The
variance is set against leave-one-out REINFORCE on the same target with the same ``n`` samples:
``n // k`` disjoint k-tuples, each paid its payoff, baseline the mean payoff of the other tuples
(Kool et al. 2019).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np
import torch

from bonft._core.checks import check_int
from bonft.objcheck.enumeration import (
    MAX_ROWS,
    Progress,
    Target,
    call_credit,
    call_payoff,
    check_credit_rows,
    is_equivariant,
    ordered_tuples,
    pools,
    value_fn,
)

__all__ = ["ToyPolicy", "random_policy", "check_policy", "softmax", "target_gradient", "categorical_case", "reuse_bias"]


@dataclass
class ToyPolicy:
    """A categorical policy over V outcomes: ``logits, scores, rewards: (V,)``; ``reference``: outcome
    index of the reference (gold) response (target ``"best_of_k_sft"`` only; an error with another target)."""

    logits: Any
    scores: Any
    rewards: Any
    reference: int | None = None


def random_policy(rng: np.random.Generator, V: int, t: Target) -> ToyPolicy:
    """A random policy for target ``t``: normal logits, 3 score levels (ties once V >= 4), rewards to suit."""
    logits = rng.normal(size=V)
    if t.name == "pass_at_k":
        r = rng.permutation(np.arange(V) % 2).astype(float)  # both kinds present
        return ToyPolicy(logits, r.copy(), r)
    scores = rng.permutation(np.arange(V) % 3).astype(float)  # 3 levels: ties once V >= 4
    sft = t.name == "best_of_k_sft"
    rewards = np.zeros(V) if sft else np.round(rng.normal(size=V), 2)
    return ToyPolicy(logits, scores, rewards, int(rng.integers(V)) if sft else None)


def check_policy(j: int, c: Any, t: Target) -> ToyPolicy:
    """A user's ``policies[j]`` checked and converted to float64 arrays."""
    if not isinstance(c, ToyPolicy):
        raise TypeError(f"policies[{j}] must be a ToyPolicy, got {type(c).__name__}")
    arrs = [np.asarray(x, dtype=np.float64).reshape(-1) for x in (c.logits, c.scores, c.rewards)]
    if len({a.size for a in arrs}) != 1 or arrs[0].size < 2 or not all(np.isfinite(a).all() for a in arrs):
        raise ValueError(f"policies[{j}] must have finite logits, scores, rewards of one length V >= 2, "
                         f"got lengths {[a.size for a in arrs]}")
    if t.name == "pass_at_k" and not np.isin(arrs[2], (0.0, 1.0)).all():
        raise ValueError(f"policies[{j}].rewards must be 0/1 for target 'pass_at_k', got {arrs[2].tolist()}")
    reference = c.reference
    if t.name == "best_of_k_sft":
        reference = check_int(f"policies[{j}].reference", reference, min=0, max=arrs[0].size - 1)
    elif reference is not None:
        raise ValueError(f"policies[{j}].reference={reference!r} has no effect with target {t.name!r}: only target "
                         f"'best_of_k_sft' uses a reference outcome (log pi_bon(y*)); leave it None")
    return ToyPolicy(*arrs, reference)


def softmax(logits: np.ndarray) -> np.ndarray:
    p = np.exp(logits - logits.max())
    return p / p.sum()


def _exact_grads(value: Callable, logits: np.ndarray, h: float = 1e-5) -> tuple[np.ndarray, np.ndarray]:
    """Autograd gradient of value(softmax(theta)) and its central finite differences: (V,) each."""
    th = torch.tensor(logits, requires_grad=True)
    (g,) = torch.autograd.grad(value(torch.softmax(th, -1)), th)
    fd = np.empty_like(logits)
    with torch.no_grad():
        for v in range(len(logits)):
            e = torch.zeros(len(logits), dtype=torch.float64)
            e[v] = h
            base = torch.from_numpy(logits)
            fd[v] = (float(value(torch.softmax(base + e, -1))) - float(value(torch.softmax(base - e, -1)))) / (2 * h)
    return g.numpy(), fd


def target_gradient(t: Target, pol: ToyPolicy, k: int, progress: Progress | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The exact gradient of the target w.r.t. the logits (autograd) and its central finite differences: (V,) each."""
    return _exact_grads(value_fn(t, pol.scores, pol.rewards, pol.reference, k, progress), pol.logits)


def _pool_estimates(Y: np.ndarray, w: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Per-pool gradient estimate w.r.t. the logits: sum_i w_i (e_{y_i} - p): (M, n) -> (M, V)."""
    a = np.zeros((len(Y), len(p)))
    np.add.at(a, (np.repeat(np.arange(len(Y)), Y.shape[1]), Y.ravel()), w.ravel())
    return a - a.sum(1, keepdims=True) * p


def _reinforce(t: Target, pol: ToyPolicy, p: np.ndarray, k: int, n: int,
               progress: Progress | None) -> tuple[np.ndarray, float] | None:
    """Mean and variance of leave-one-out REINFORCE over n // k disjoint k-tuples (exact, ordered pools)."""
    m = n // k
    V = len(p)
    if t.payoff is None or V ** (m * k) > MAX_ROWS:
        return None
    Y = ordered_tuples(V, m * k)
    S, R = pol.scores[Y], pol.rewards[Y]
    G = np.stack([call_payoff(t, S[:, j * k:(j + 1) * k], R[:, j * k:(j + 1) * k], progress) for j in range(m)], 1)
    c = (G - (G.sum(1, keepdims=True) - G) / (m - 1)) / m if m > 1 else G
    g = _pool_estimates(Y, np.repeat(c, k, axis=1), p)
    P = np.exp(np.log(p)[Y].sum(1))
    mean = P @ g
    return mean, float(P @ ((g - mean) ** 2).sum(1))


def reuse_bias(Y: np.ndarray, logc: np.ndarray, w: np.ndarray, p: np.ndarray, q: np.ndarray, exact: np.ndarray,
               clip_ratio: float | None, extra: np.ndarray | None = None) -> dict:
    """Bias of the importance-weighted (and clipped) gradient when the pools come from ``q``, not ``p``.

    Y: (M, n) every pool, logc: (M,) log multiplicities, w: (M, n) the credit, p: (V,) the current policy,
    q: (V,) the policy that sampled, exact: (V,) the target's gradient at ``p`` (w.r.t. the logits);
    extra: a term added to every pool's estimate exactly (the reference term of best_of_k_sft).

    Each sample's credit is weighted by its ratio ``r_i = p(y_i)/q(y_i)`` (one draw: sequence = token level),
    and with ``clip_ratio = eps`` a term is dropped when ``r_i > 1 + eps`` with ``w_i > 0`` or ``r_i < 1 - eps``
    with ``w_i < 0``: the gradient of the clipped surrogate ``min(r w, clip(r, 1 - eps, 1 + eps) w)``
    (Schulman et al. 2017). The mean over pools drawn from ``q^n`` is exact (every pool enumerated).
    -> relative biases ``|E_q[g] - grad V| / |grad V|`` clipped and unclipped, the clipped share of terms
    (probability-weighted) and the mean estimates.
    """
    r = p[Y] / q[Y]  # (M, n)
    P = np.exp(logc + np.log(q)[Y].sum(1))
    unclipped = _pool_estimates(Y, w * r, p)
    out = {"clip_ratio": clip_ratio}
    if extra is not None:
        unclipped = unclipped + extra
    scale = max(float(np.linalg.norm(exact)), 1e-9)
    mean_u = P @ unclipped
    out["rel_bias_unclipped"] = float(np.linalg.norm(mean_u - exact)) / scale
    out["estimate_unclipped"] = mean_u.tolist()
    out["max_ratio"] = float(r.max())
    out["min_ratio"] = float(r.min())
    if clip_ratio is not None:
        dropped = ((w > 0) & (r > 1 + clip_ratio)) | ((w < 0) & (r < 1 - clip_ratio))
        clipped = _pool_estimates(Y, np.where(dropped, 0.0, w * r), p)
        if extra is not None:
            clipped = clipped + extra
        mean_c = P @ clipped
        out["rel_bias_clipped"] = float(np.linalg.norm(mean_c - exact)) / scale
        out["max_abs_bias_clipped"] = float(np.abs(mean_c - exact).max())
        out["clip_frac"] = float(P @ dropped.mean(1))
        out["estimate_clipped"] = mean_c.tolist()
    return out


def categorical_case(credit, t: Target, pol: ToyPolicy, k: int, n: int, seed: int, *,
                     grads: tuple[np.ndarray, np.ndarray] | None = None, progress: Progress | None = None,
                     sampling_logits: np.ndarray | None = None, clip_ratio: float | None = None) -> dict:
    """Everything the check measures on one categorical policy (a dict of numbers and vectors).

    A credit that is not deterministic or mixes the pools of a batch raises
    :class:`bonft.objcheck.enumeration.CreditRefused` (:func:`bonft.objcheck.enumeration.check_credit_rows`).

    ``grads``: the target's exact and finite-difference gradients when already computed (:func:`target_gradient`).
    ``sampling_logits``: the logits of a policy that sampled the pools instead (sample reuse): adds ``"reuse"``,
    :func:`reuse_bias` of the importance-weighted gradient, clipped at ``clip_ratio`` if given.
    """
    p = softmax(pol.logits)
    V = len(p)
    s_star = float(pol.scores[pol.reference]) if t.name == "best_of_k_sft" else None
    Y, logc = pools(V, n, ordered=False)
    w = call_credit(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k, progress)
    check_credit_rows(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k, w, progress)
    ordered = not is_equivariant(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k, w, seed, progress)
    if ordered:
        Y, logc = pools(V, n, ordered=True)
        w = call_credit(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k, progress)
    g = _pool_estimates(Y, w, p)
    if t.name == "best_of_k_sft":
        g = g + (np.eye(V)[pol.reference] - p)  # the exact reference term of log pi_bon(y*)
    P = np.exp(logc + np.log(p)[Y].sum(1))
    est = P @ g
    exact, fd = grads if grads is not None else target_gradient(t, pol, k, progress)
    scale = max(float(np.linalg.norm(exact)), 1e-9)  # a zero gradient: errors below 1e-15 still pass
    err = est - exact
    ref = _reinforce(t, pol, p, k, n, progress)
    reuse = None
    if sampling_logits is not None:
        extra = (np.eye(V)[pol.reference] - p) if t.name == "best_of_k_sft" else None
        reuse = reuse_bias(Y, logc, w, p, softmax(sampling_logits), exact, clip_ratio, extra)
        reuse["sampling_logits"] = np.asarray(sampling_logits, dtype=np.float64).tolist()
    return {
        **({"reuse": reuse} if reuse is not None else {}),
        "outcomes": V, "pools": int(len(Y)), "ordered_pools": ordered,
        "rel_error": float(np.linalg.norm(err)) / scale, "max_abs_error": float(np.abs(err).max()),
        "projection": float(est @ exact) / scale**2, "cosine": float(est @ exact) / scale / max(float(np.linalg.norm(est)), 1e-300),
        "fd_error": float(np.abs(fd - exact).max()) / max(scale, 1e-3),
        "variance": float(P @ ((g - est) ** 2).sum(1)),
        "reinforce_variance": None if ref is None else ref[1],
        "reinforce_rel_error": None if ref is None else float(np.linalg.norm(ref[0] - exact)) / scale,
        "exact": exact.tolist(), "estimate": est.tolist(), "finite_diff": fd.tolist(),
    }
