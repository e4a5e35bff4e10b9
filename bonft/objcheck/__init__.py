"""Check an objective before training on it: is its credit an unbiased gradient of the target it claims?

A credit function ``credit(scores, rewards, *, k) -> w`` (``(B, n), (B, n) -> (B, n)``) turns a pool of
``n`` scored samples into weights, and training follows ``sum_i w_i grad log pi(y_i)`` (the loss
``bonft.objectives.losses.policy_gradient_loss(logprobs, w)``). :func:`check_objective` computes what that estimate
has as its *mean*, exactly, and compares it with the gradient of the target:

1. **Small categorical policies** (softmax over ``V`` outcomes, random scores with ties, random rewards):
   every pool of ``n`` draws is enumerated as a multiset with its multinomial probability, so
   ``E[g] = sum_pools P(pool) sum_i w_i grad log pi(y_i)`` is exact (gradients w.r.t. the logits,
   ``grad log softmax(theta)_y = e_y - pi``). The exact target gradient comes from :mod:`bonft.bon` by
   autograd (built-in targets) or from enumerating k-tuples (a user payoff), and is itself checked
   against central finite differences of the target value.
2. **A tiny transformer** (``transformers`` GPT-2 from a config, vocabulary 4, 3 response tokens: all
   64 responses enumerated): exact ``V_k(theta)``, its finite-difference derivative along random
   parameter directions, against the expected loss gradient (exact: the credit only sees scores and
   rewards, so pools are enumerated over the few score/reward classes) and a Monte Carlo mean whose
   99.9% interval must cover the finite-difference value. See :mod:`bonft.objcheck.transformer`.
3. **Variance**: trace of the covariance of the pool's gradient estimate, exact over pools, against
   leave-one-out REINFORCE on the same target with the same ``n`` samples: ``n // k`` disjoint k-tuples,
   each paid its payoff, baseline the mean payoff of the other tuples (Kool et al. 2019).

Targets: ``"best_of_k"`` (``V_k``, the expected reward of the best-scored of k draws, ties broken at
random; Chow et al. 2024), ``"pass_at_k"`` (``1 - (1-p)^k``, Chen et al. 2021: 0/1 rewards and the
verifier is the reward, so the credit is called with ``scores = rewards``), ``"bon_sft"`` (``log
pi_bon(y*)`` of an expert outcome, Chow et al. 2024; the credit is called as
``credit(scores, reference_scores, *, k)`` with ``reference_scores: (B,)`` and the exact ``grad log pi(y*)``
term is added by the check), or a payoff ``payoff(scores, rewards) -> value`` of a set of k samples,
``(M, k), (M, k) -> (M,)`` numpy float64, which must not depend on the order of the k samples.

The credit receives numpy float64 arrays and may return numpy or torch. The enumeration assumes the
samples are exchangeable (credit permutes with the samples); when it does not, ordered pools are used.

Caution: a check on toy policies shows that the credit estimates the gradient of the target; it cannot
show that the target is what you want. A verifier that can be fooled is still exploited (reward
hacking): keep a held-out true reward, and run model-written code only in a sandbox.
"""
from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from types import SimpleNamespace
from typing import Any, Callable

import numpy as np
import torch
from scipy.special import gammaln

from bonft._core.checks import check_int, check_k, check_positive
from bonft.objcheck.report import ObjectiveReport
from bonft.bon import bon_success, bon_value, log_bon_distribution

__all__ = ["check_objective", "ObjectiveReport", "ToyPolicy", "TARGETS", "builtin"]

TARGETS = ("best_of_k", "pass_at_k", "bon_sft")
_MAX_ROWS = 1 << 18  # largest ordered enumeration (rows) the check will build


@dataclass
class ToyPolicy:
    """A categorical policy over V outcomes: ``logits, scores, rewards: (V,)``; ``expert``: outcome
    index of the expert response (target ``"bon_sft"`` only)."""

    logits: Any
    scores: Any
    rewards: Any
    expert: int | None = None


@dataclass
class _Target:
    name: str
    payoff: Callable | None = field(default=None, repr=False)


# ------------------------------------------------------------------ targets and payoffs

def _kept_reward(S: np.ndarray, R: np.ndarray) -> np.ndarray:
    """Reward best-of-k keeps, averaged over tie-breaks: (M, k), (M, k) -> (M,)."""
    top = S == S.max(-1, keepdims=True)
    return (R * top).sum(-1) / top.sum(-1)


def _best_reward(S: np.ndarray, R: np.ndarray) -> np.ndarray:
    """pass@k payoff: 1 if any of the k samples is correct: (M, k) -> (M,)."""
    return R.max(-1)


def _resolve_target(target: Any) -> _Target:
    if callable(target):
        return _Target(getattr(target, "__name__", "payoff"), target)
    if target not in TARGETS:
        raise ValueError(f"target must be one of {TARGETS} or a payoff function, got {target!r}")
    return _Target(target, {"best_of_k": _kept_reward, "pass_at_k": _best_reward}.get(target))


def _call_payoff(t: _Target, S: np.ndarray, R: np.ndarray) -> np.ndarray:
    g = t.payoff(S, R)
    g = g.detach().cpu().numpy() if isinstance(g, torch.Tensor) else np.asarray(g, dtype=np.float64)
    if g.shape != (S.shape[0],):
        raise ValueError(f"target payoff must return shape (M,) = ({S.shape[0]},) for scores {S.shape}, got {g.shape}")
    if not np.isfinite(g).all():
        raise ValueError(f"target payoff must return finite values, got {g[~np.isfinite(g)][0]}")
    return g.astype(np.float64)


def _ordered(V: int, m: int) -> np.ndarray:
    """(V^m, m) every ordered m-tuple of outcomes."""
    return np.array(list(itertools.product(range(V), repeat=m)), dtype=np.int64).reshape(-1, m)


def _multisets(V: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Every multiset of n draws from V outcomes, sorted rows (M, n), and log multinomial coefficients (M,)."""
    Y = np.array(list(itertools.combinations_with_replacement(range(V), n)), dtype=np.int64).reshape(-1, n)
    counts = np.zeros((len(Y), V))
    np.add.at(counts, (np.repeat(np.arange(len(Y)), n), Y.ravel()), 1)
    return Y, gammaln(n + 1) - gammaln(counts + 1).sum(-1)


def _pools(V: int, n: int, ordered: bool) -> tuple[np.ndarray, np.ndarray]:
    if ordered:
        if V**n > _MAX_ROWS:
            raise ValueError(f"credit depends on the order of the samples and V^n = {V}^{n} ordered pools are too many"
                             f" to enumerate (at most {_MAX_ROWS}); use fewer outcomes or a smaller n")
        Y = _ordered(V, n)
        return Y, np.zeros(len(Y))
    return _multisets(V, n)


def value_fn(t: _Target, scores: np.ndarray, rewards: np.ndarray, expert: int | None, k: int) -> Callable:
    """The exact target as a differentiable function of the outcome probabilities ``p: (N,) -> ()``."""
    s, r = torch.from_numpy(scores), torch.from_numpy(rewards)
    if t.name == "best_of_k" and t.payoff is _kept_reward:
        return lambda p: bon_value(p, s, r, k=k)
    if t.name == "pass_at_k" and t.payoff is _best_reward:
        return lambda p: bon_success((p * r).sum(), k=k)
    if t.payoff is None:  # bon_sft
        return lambda p: log_bon_distribution(p, s, k=k)[expert]
    # a user payoff: enumerate k-tuples of the distinct (score, reward) classes
    keys, inv = np.unique(np.stack([scores, rewards], 1), axis=0, return_inverse=True)
    inv = torch.from_numpy(inv.reshape(-1))
    C = len(keys)
    if C**k > _MAX_ROWS:
        raise ValueError(f"k-tuples of {C} score/reward classes are too many to enumerate (C^k = {C}^{k} > {_MAX_ROWS})")
    Y = _ordered(C, k)
    g = torch.from_numpy(_call_payoff(t, keys[Y, 0], keys[Y, 1]))
    Yt = torch.from_numpy(Y)

    def value(p):
        q = torch.zeros(C, dtype=p.dtype).index_add(0, inv, p)
        return (q[Yt].prod(-1) * g).sum()

    return value


def call_credit(credit: Callable, t: _Target, S: np.ndarray, R: np.ndarray, s_star: float | None, k: int) -> np.ndarray:
    """Credit of pools ``S, R: (M, n) -> (M, n)`` float64, checked for shape and finiteness."""
    second = np.full(S.shape[0], s_star) if t.name == "bon_sft" else R
    w = credit(S.copy(), second.copy(), k=k)
    w = w.detach().cpu().numpy() if isinstance(w, torch.Tensor) else np.asarray(w, dtype=np.float64)
    if w.shape != S.shape:
        raise ValueError(f"credit must return shape (B, n) = {S.shape}, got {w.shape}")
    if not np.isfinite(w).all():
        i = tuple(int(j) for j in np.argwhere(~np.isfinite(w))[0])
        raise ValueError(f"credit returned {w[i]} at pool {i[0]} (scores {S[i[0]].tolist()}, "
                         f"{'expert score ' + str(s_star) if t.name == 'bon_sft' else 'rewards ' + str(R[i[0]].tolist())})")
    return w.astype(np.float64)


def is_equivariant(credit, t, S, R, s_star, k, w, seed) -> bool:
    """Does the credit permute with the samples? (M, n) pools, their credit w."""
    perm = np.argsort(np.random.default_rng(seed).random(S.shape), axis=1)
    take = lambda x: np.take_along_axis(x, perm, 1)  # noqa: E731
    w2 = call_credit(credit, t, take(S), take(R), s_star, k)
    return bool(np.allclose(w2, take(w), rtol=1e-9, atol=1e-12 * max(1.0, np.abs(w).max())))


# ------------------------------------------------------------------ one categorical policy

def _random_policy(rng: np.random.Generator, V: int, t: _Target) -> ToyPolicy:
    logits = rng.normal(size=V)
    if t.name == "pass_at_k":
        r = rng.permutation(np.arange(V) % 2).astype(float)  # both kinds present
        return ToyPolicy(logits, r.copy(), r)
    scores = rng.permutation(np.arange(V) % 3).astype(float)  # 3 levels: ties once V >= 4
    rewards = np.zeros(V) if t.name == "bon_sft" else np.round(rng.normal(size=V), 2)
    return ToyPolicy(logits, scores, rewards, int(rng.integers(V)) if t.name == "bon_sft" else None)


def _check_policy(j: int, c: Any, t: _Target) -> ToyPolicy:
    if not isinstance(c, ToyPolicy):
        raise TypeError(f"policies[{j}] must be a ToyPolicy, got {type(c).__name__}")
    arrs = [np.asarray(x, dtype=np.float64).reshape(-1) for x in (c.logits, c.scores, c.rewards)]
    if len({a.size for a in arrs}) != 1 or arrs[0].size < 2 or not all(np.isfinite(a).all() for a in arrs):
        raise ValueError(f"policies[{j}] must have finite logits, scores, rewards of one length V >= 2, "
                         f"got lengths {[a.size for a in arrs]}")
    if t.name == "pass_at_k" and not np.isin(arrs[2], (0.0, 1.0)).all():
        raise ValueError(f"policies[{j}].rewards must be 0/1 for target 'pass_at_k', got {arrs[2].tolist()}")
    expert = c.expert
    if t.name == "bon_sft":
        expert = check_int(f"policies[{j}].expert", expert, min=0, max=arrs[0].size - 1)
    return ToyPolicy(*arrs, expert)


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


def _pool_estimates(Y: np.ndarray, w: np.ndarray, p: np.ndarray) -> np.ndarray:
    """Per-pool gradient estimate w.r.t. the logits: sum_i w_i (e_{y_i} - p): (M, n) -> (M, V)."""
    a = np.zeros((len(Y), len(p)))
    np.add.at(a, (np.repeat(np.arange(len(Y)), Y.shape[1]), Y.ravel()), w.ravel())
    return a - a.sum(1, keepdims=True) * p


def _reinforce(t: _Target, pol: ToyPolicy, p: np.ndarray, k: int, n: int) -> tuple[np.ndarray, float] | None:
    """Mean and variance of leave-one-out REINFORCE over n // k disjoint k-tuples (exact, ordered pools)."""
    m = n // k
    V = len(p)
    if t.payoff is None or V ** (m * k) > _MAX_ROWS:
        return None
    Y = _ordered(V, m * k)
    S, R = pol.scores[Y], pol.rewards[Y]
    G = np.stack([_call_payoff(t, S[:, j * k:(j + 1) * k], R[:, j * k:(j + 1) * k]) for j in range(m)], 1)
    c = (G - (G.sum(1, keepdims=True) - G) / (m - 1)) / m if m > 1 else G
    g = _pool_estimates(Y, np.repeat(c, k, axis=1), p)
    P = np.exp(np.log(p)[Y].sum(1))
    mean = P @ g
    return mean, float(P @ ((g - mean) ** 2).sum(1))


def categorical_case(credit, t: _Target, pol: ToyPolicy, k: int, n: int, seed: int) -> dict:
    """Everything the check measures on one categorical policy (a dict of numbers and vectors)."""
    logits = pol.logits
    p = np.exp(logits - logits.max())
    p /= p.sum()
    V = len(p)
    s_star = float(pol.scores[pol.expert]) if t.name == "bon_sft" else None
    Y, logc = _pools(V, n, ordered=False)
    w = call_credit(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k)
    ordered = not is_equivariant(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k, w, seed)
    if ordered:
        Y, logc = _pools(V, n, ordered=True)
        w = call_credit(credit, t, pol.scores[Y], pol.rewards[Y], s_star, k)
    g = _pool_estimates(Y, w, p)
    if t.name == "bon_sft":
        g = g + (np.eye(V)[pol.expert] - p)  # the exact expert term of log pi_bon(y*)
    P = np.exp(logc + np.log(p)[Y].sum(1))
    est = P @ g
    exact, fd = _exact_grads(value_fn(t, pol.scores, pol.rewards, pol.expert, k), logits)
    scale = max(float(np.linalg.norm(exact)), 1e-9)  # a zero gradient: errors below 1e-15 still pass
    err = est - exact
    ref = _reinforce(t, pol, p, k, n)
    return {
        "outcomes": V, "pools": int(len(Y)), "ordered_pools": ordered,
        "rel_error": float(np.linalg.norm(err)) / scale, "max_abs_error": float(np.abs(err).max()),
        "projection": float(est @ exact) / scale**2, "cosine": float(est @ exact) / scale / max(float(np.linalg.norm(est)), 1e-300),
        "fd_error": float(np.abs(fd - exact).max()) / max(scale, 1e-3),
        "variance": float(P @ ((g - est) ** 2).sum(1)),
        "reinforce_variance": None if ref is None else ref[1],
        "reinforce_rel_error": None if ref is None else float(np.linalg.norm(ref[0] - exact)) / scale,
        "exact": exact.tolist(), "estimate": est.tolist(), "finite_diff": fd.tolist(),
    }


# ------------------------------------------------------------------ public entry point

def check_objective(credit, *, target, k, n, policies=4, outcomes=4, seed=0, transformer=True,
                    tolerance=1e-6, directions=3, mc_pools=400) -> ObjectiveReport:
    r"""Check that ``credit`` estimates the gradient of ``target`` without bias; report bias and variance.

    credit: ``(scores, rewards, *, k) -> w``, ``(B, n), (B, n) -> (B, n)`` (``"bon_sft"``:
    ``(scores, reference_scores, *, k)`` with ``reference_scores: (B,)``); target: ``"best_of_k"``,
    ``"pass_at_k"``, ``"bon_sft"`` or a payoff ``(M, k), (M, k) -> (M,)``; policies: how many random
    categorical policies over ``outcomes`` outcomes, or a list of :class:`ToyPolicy`.

    .. math:: \mathrm{bias} = \sum_{\text{pools}} P(\text{pool}) \sum_i w_i \nabla\log\pi(y_i) - \nabla V_k(\theta)

    The credit passes when the relative bias ``|bias| / |grad V_k|`` stays within ``tolerance`` on every
    policy and on the transformer, the exact gradient agrees with finite differences, and the Monte Carlo
    interval on the transformer covers the finite-difference derivative. Problems are sentences with the
    numbers in ``report.problems``; ``report.ok`` is ``not problems``. Best-of-k targets: Chow et al. 2024;
    pass@k: Chen et al. 2021; leave-one-out REINFORCE: Kool et al. 2019.
    """
    if not callable(credit):
        raise TypeError(f"credit must be callable (scores, rewards, *, k) -> credit, got {type(credit).__name__}")
    t = _resolve_target(target)
    n = check_int("n", n, min=1)
    k = check_k(k, n)
    seed = check_int("seed", seed, min=0)
    tolerance = check_positive("tolerance", tolerance)
    directions = check_int("directions", directions, min=1)
    mc_pools = check_int("mc_pools", mc_pools, min=2)
    if not isinstance(transformer, bool):
        raise TypeError(f"transformer must be a bool, got {type(transformer).__name__} {transformer!r}")
    rng = np.random.default_rng(seed)
    if isinstance(policies, (list, tuple)):
        if not policies:
            raise ValueError("policies must not be empty")
        pols = [_check_policy(j, c, t) for j, c in enumerate(policies)]
    else:
        count = check_int("policies", policies, min=1)
        V = check_int("outcomes", outcomes, min=2, max=12)
        pols = [_random_policy(rng, V, t) for _ in range(count)]
    report = ObjectiveReport(target=t.name, k=k, n=n, tolerance=tolerance)
    try:
        for j, pol in enumerate(pols):
            report.cases.append(categorical_case(credit, t, pol, k, n, seed + j))
        if transformer:
            from bonft.objcheck.transformer import transformer_check

            ordered = any(c["ordered_pools"] for c in report.cases)
            report.transformer = transformer_check(credit, t, k, n, ordered=ordered, seed=seed, tolerance=tolerance,
                                                   directions=directions, mc_pools=mc_pools)
    except Exception as e:  # the user's credit or payoff failed: a finding, reported with what it said
        report.problems.append(f"the check could not run: {type(e).__name__}: {e}")
    report.judge()
    return report


# ------------------------------------------------------------------ bonft's own objectives, in the checked signature

def _bon_rl(scores, rewards, *, k):
    from bonft.objectives.credit import best_of_k_credit

    return best_of_k_credit(scores, rewards, k=k)


def _bon_rl_no_baseline(scores, rewards, *, k):
    from bonft.objectives.credit import best_of_k_credit

    return best_of_k_credit(scores, rewards, k=k, baseline="none")


def _pass_at_k(scores, rewards, *, k):
    from bonft.objectives.credit import pass_at_k_credit

    return pass_at_k_credit(rewards, k=k)


def _pass_at_k_plugin(scores, rewards, *, k):
    from bonft.objectives.credit import pass_at_k_credit

    return pass_at_k_credit(rewards, k=k, estimator="plugin")


def _pass_at_k_positive_only(scores, rewards, *, k):
    from bonft.objectives.credit import pass_at_k_credit

    return pass_at_k_credit(rewards, k=k, positive_only=True)


def _bon_sft(scores, reference_scores, *, k):
    from bonft.objectives.credit import best_of_k_sft_credit

    return best_of_k_sft_credit(scores, reference_scores, k=k)


def _reinforce_loo(scores, rewards, *, k):
    from bonft.objectives.credit import reinforce_credit

    return reinforce_credit(rewards)


#: bonft's built-in credit functions in the ``(scores, rewards, *, k)`` signature, e.g.
#: ``bonft check-objective bonft.objcheck:builtin.pass_at_k_plugin --target pass_at_k``.
builtin = SimpleNamespace(
    bon_rl=_bon_rl, bon_rl_no_baseline=_bon_rl_no_baseline, pass_at_k=_pass_at_k,
    pass_at_k_plugin=_pass_at_k_plugin, pass_at_k_positive_only=_pass_at_k_positive_only,
    bon_sft=_bon_sft, reinforce=_reinforce_loo,
)

