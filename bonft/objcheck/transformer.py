"""The transformer part of :func:`bonft.objcheck.check_objective`.

A tiny GPT-2 (``transformers``, built from a config: nothing is downloaded) with a vocabulary of
``vocab`` tokens answers one fixed prompt token with ``length`` tokens; all ``vocab^length``
responses are enumerated, so ``pi(y) = prod_t softmax(logits_t)[y_t]`` sums to 1 and the target
``V(theta)`` is exact. Each response belongs to one of a few score/reward classes.

* exact ``grad V`` by autograd through the model, and central finite differences of ``V`` along
  random unit directions ``u`` in parameter space: ``(V(theta + h u) - V(theta - h u)) / 2h``;
* the expected loss gradient, exact: the credit only sees scores and rewards, so with class
  probabilities ``q_c`` and ``A_c = E[sum_{i: class(y_i) = c} w_i]`` (enumerated over multisets of
  classes) ``E[sum_i w_i grad log pi(y_i)] = sum_y pi(y) (A_c(y) / q_c(y)) grad log pi(y)``: the
  gradient of ``policy_gradient_loss`` on all responses with credit ``pi(y) A_c / q_c``;
* a Monte Carlo mean over pools drawn from the model, projected on each direction through
  ``d log pi(y) / du`` (central differences), with a 99.9% normal interval.
"""
from __future__ import annotations

import itertools

import numpy as np
import torch
from torch.func import functional_call

from bonft.objcheck.enumeration import MAX_ROWS, Progress, Target, call_credit, multisets, ordered_tuples, value_fn
from bonft.objcheck.report import MC_Z
from bonft.objectives.losses import policy_gradient_loss

__all__ = ["transformer_check", "class_scores"]


def class_scores(name: str) -> np.ndarray:
    """Scores of the score/reward classes of the responses for target ``name``: (C,)."""
    if name == "pass_at_k":
        return np.array([0.0, 1.0])
    if name == "best_of_k_sft":
        return np.array([0.0, 1.0, 2.0])
    return np.array([0.0, 0.0, 1.0, 1.0, 2.0, 2.0])  # ties across classes


def _classes(rng: np.random.Generator, N: int, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Class of each response (N,), class scores (C,), class rewards (C,)."""
    cs = class_scores(name)
    if name == "pass_at_k":
        cr = cs.copy()
    elif name == "best_of_k_sft":
        cr = np.zeros(3)
    else:
        cr = np.round(rng.normal(size=6), 2)
    C = len(cs)
    cls = np.concatenate([np.arange(C), rng.integers(0, C, N - C)])
    return rng.permutation(cls), cs, cr


def _tiny_gpt2(vocab: int, positions: int, seed: int):
    """A GPT-2 from a config (1 layer, width 16, 2 heads, no dropout), initialised from ``seed``; nothing is
    downloaded and the caller's torch RNG is left as it was."""
    # imported here: transformers takes seconds to load, and check_objective(transformer=False) never needs it
    from transformers import GPT2Config, GPT2LMHeadModel

    config = GPT2Config(vocab_size=vocab, n_positions=positions, n_embd=16, n_layer=1, n_head=2,
                        resid_pdrop=0.0, embd_pdrop=0.0, attn_pdrop=0.0, bos_token_id=None, eos_token_id=None)
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        model = GPT2LMHeadModel(config)
    return model.eval()


def _loss_value(lp: torch.Tensor, credit: torch.Tensor) -> torch.Tensor:
    out = policy_gradient_loss(lp, credit)
    return out[0] if isinstance(out, tuple) else out


def transformer_check(credit, t: Target, k: int, n: int, *, ordered: bool, seed: int, tolerance: float,
                      directions: int = 3, mc_pools: int = 400, vocab: int = 4, length: int = 3,
                      h: float = 1e-4, progress: Progress | None = None) -> dict:
    """Exact, finite-difference and Monte Carlo gradients of the target on a tiny transformer (a dict)."""
    model = _tiny_gpt2(vocab, length + 1, seed).double()
    resp = torch.tensor(list(itertools.product(range(vocab), repeat=length)), dtype=torch.long)  # (N, T)
    N = resp.shape[0]
    ids = torch.cat([torch.zeros(N, 1, dtype=torch.long), resp], 1)  # one fixed prompt token
    names, theta = zip(*[(nm, p.detach().clone()) for nm, p in model.named_parameters()])

    def logp_at(params) -> torch.Tensor:  # (N,) sequence log-probs of every response
        logits = functional_call(model, dict(zip(names, params)), (ids,)).logits[:, :-1]
        return torch.log_softmax(logits, -1).gather(-1, resp[..., None])[..., 0].sum(-1)

    rng = np.random.default_rng(seed)
    cls, cs, cr = _classes(rng, N, t.name)
    scores, rewards = cs[cls], cr[cls]
    reference = int(rng.integers(N)) if t.name == "best_of_k_sft" else None
    s_star = float(scores[reference]) if reference is not None else None
    value = value_fn(t, scores, rewards, reference, k, progress)

    # exact gradient of the target
    req = [p.clone().requires_grad_() for p in theta]
    lp = logp_at(req)
    gV = torch.cat([g.reshape(-1) for g in torch.autograd.grad(value(torch.exp(lp)), req)])
    lp = lp.detach()
    pi = torch.exp(lp)

    # random unit directions; finite differences of V and of every log pi(y) along them
    gen = torch.Generator().manual_seed(seed)
    U = torch.randn(directions, gV.numel(), generator=gen, dtype=torch.float64)
    U /= U.norm(dim=1, keepdim=True)
    fd, D = [], torch.empty(N, directions, dtype=torch.float64)
    sizes = [p.numel() for p in theta]
    with torch.no_grad():
        for d in range(directions):
            parts = U[d].split(sizes)
            lp_p = logp_at([p + h * u.view_as(p) for p, u in zip(theta, parts)])
            lp_m = logp_at([p - h * u.view_as(p) for p, u in zip(theta, parts)])
            fd.append((float(value(torch.exp(lp_p))) - float(value(torch.exp(lp_m)))) / (2 * h))
            D[:, d] = (lp_p - lp_m) / (2 * h)
    exact_dir = (U @ gV).tolist()
    scale = max(float(gV.norm()), 1e-9)

    # the expected loss gradient, exact over pools of classes
    q = np.bincount(cls, weights=pi.numpy(), minlength=len(cs))
    C = len(cs)
    gE = None
    if not ordered or C**n <= MAX_ROWS:
        Y, logc = (ordered_tuples(C, n), np.zeros(C**n)) if ordered else multisets(C, n)
        w = call_credit(credit, t, cs[Y], cr[Y], s_star, k, progress)
        P = np.exp(logc + np.log(q)[Y].sum(1))
        A = np.zeros(C)
        np.add.at(A, Y.ravel(), (P[:, None] * w).ravel())
        weights = torch.from_numpy(pi.numpy() * (A / q)[cls])[None]  # (1, N)
        req = [p.clone().requires_grad_() for p in theta]
        lp_r = logp_at(req)
        objective = -_loss_value(lp_r[None], weights)
        if reference is not None:
            objective = objective + lp_r[reference]  # exact reference term of log pi_bon(y*)
        gE = torch.cat([g.reshape(-1) for g in torch.autograd.grad(objective, req)])

    # Monte Carlo pools drawn from the model
    Ymc = torch.multinomial(pi, mc_pools * n, replacement=True, generator=gen).view(mc_pools, n).numpy()
    w = call_credit(credit, t, scores[Ymc], rewards[Ymc], s_star, k, progress)
    proj = np.einsum("mi,mid->md", w, D.numpy()[Ymc])
    if reference is not None:
        proj = proj + D[reference].numpy()
    mean, se = proj.mean(0), proj.std(0, ddof=1) / np.sqrt(mc_pools)
    rows = []
    for d in range(directions):
        lo, hi = mean[d] - MC_Z * se[d], mean[d] + MC_Z * se[d]
        slack = 1e-9 * scale
        rows.append({"finite_diff": fd[d], "exact": exact_dir[d],
                     "expected": None if gE is None else float(U[d] @ gE),
                     "mc_mean": float(mean[d]), "mc_lo": float(lo), "mc_hi": float(hi),
                     "covered": bool(lo - slack <= fd[d] <= hi + slack)})
    out = {"vocab": vocab, "length": length, "responses": N, "parameters": int(gV.numel()), "classes": C, "grad_norm": scale,
           "pools": None if gE is None else int(len(Y)), "mc_pools": mc_pools, "directions": rows,
           "fd_error": max(abs(a - b) for a, b in zip(fd, exact_dir)) / max(scale, 1e-3),
           "rel_error": None, "projection": None, "cosine": None}
    if gE is not None:
        out.update(rel_error=float((gE - gV).norm()) / scale, projection=float(gE @ gV) / scale**2,
                   cosine=float(gE @ gV) / scale / max(float(gE.norm()), 1e-300))
    return out
