"""What the categorical and the transformer checks share: targets and payoffs, enumerated pools, exact
target values, and calling the user's credit.

* a **target** (:class:`Target`) is a built-in name (``best_of_k``, ``pass_at_k``, ``best_of_k_sft``) or a
  user payoff ``(M, k) scores, (M, k) rewards -> (M,)``;
* **pools** are every multiset of ``n`` draws (with its log multinomial coefficient) or, for a credit that
  depends on the order of the samples, every ordered n-tuple;
* :func:`value_fn` gives the exact target as a differentiable function of the outcome probabilities
  (:mod:`bonft.bon` for the built-in targets, k-tuple enumeration for a payoff);
* :func:`call_credit` calls the user's credit and checks what it returns; :func:`check_credit_rows` refuses
  (:class:`CreditRefused`) a credit whose numbers the enumeration cannot stand for: one that differs between
  two calls on the same pools, or one whose row of a pool depends on the other pools of the batch;
  :class:`Progress` records where the check is, so that a credit stopped by the time limit can be named
  with its policy and pools.

References: Chow et al. 2024 (best-of-k targets); Chen et al. 2021 (pass@k).
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import torch
from scipy.special import gammaln

from bonft.bon import best_of_k_success, best_of_k_value, log_best_of_k_distribution

__all__ = ["TARGETS", "MAX_ROWS", "Target", "Progress", "CreditRefused", "resolve_target", "call_payoff",
           "ordered_tuples", "multisets", "multiset_count", "check_pool_count", "pools", "value_fn", "call_credit",
           "check_credit_rows", "is_equivariant"]

TARGETS = ("best_of_k", "pass_at_k", "best_of_k_sft")
MAX_ROWS = 1 << 18  # largest enumeration (rows: ordered tuples or multisets) the check will build


class CreditRefused(Exception):
    """The credit has a property that makes its enumerated mean meaningless (the check reports the message)."""


@dataclass
class Target:
    """A resolved target: its name and the payoff of a set of k samples (None for ``best_of_k_sft``)."""

    name: str
    payoff: Callable | None = field(default=None, repr=False)


@dataclass
class Progress:
    """Where the check is: the policy it works on and the last batch of pools handed to the user's code."""

    policy: str = "before the first policy"
    pools: str = ""
    function: str = "credit"

    def describe(self) -> str:
        return f"{self.policy}{', ' + self.pools if self.pools else ''}"


def _kept_reward(S: np.ndarray, R: np.ndarray) -> np.ndarray:
    """Reward best-of-k keeps, averaged over tie-breaks: (M, k), (M, k) -> (M,)."""
    top = S == S.max(-1, keepdims=True)
    return (R * top).sum(-1) / top.sum(-1)


def _best_reward(S: np.ndarray, R: np.ndarray) -> np.ndarray:
    """pass@k payoff: 1 if any of the k samples is correct: (M, k) -> (M,)."""
    return R.max(-1)


def resolve_target(target: Any) -> Target:
    """A target name or a payoff function -> :class:`Target` (a ``ValueError`` naming the choices otherwise)."""
    if callable(target):
        return Target(getattr(target, "__name__", "payoff"), target)
    if target not in TARGETS:
        raise ValueError(f"target must be one of {TARGETS} or a payoff function, got {target!r}")
    return Target(target, {"best_of_k": _kept_reward, "pass_at_k": _best_reward}.get(target))


def call_payoff(t: Target, S: np.ndarray, R: np.ndarray, progress: Progress | None = None) -> np.ndarray:
    """The payoff of ``M`` sets of k samples, ``(M, k), (M, k) -> (M,)`` float64, checked for shape and finiteness."""
    if progress is not None:
        progress.function, progress.pools = "target payoff", f"on {S.shape[0]} sets of k={S.shape[1]} samples"
    g = t.payoff(S, R)
    g = g.detach().cpu().numpy() if isinstance(g, torch.Tensor) else np.asarray(g, dtype=np.float64)
    if g.shape != (S.shape[0],):
        raise ValueError(f"target payoff must return shape (M,) = ({S.shape[0]},) for scores {S.shape}, got {g.shape}")
    if not np.isfinite(g).all():
        raise ValueError(f"target payoff must return finite values, got {g[~np.isfinite(g)][0]}")
    return g.astype(np.float64)


def ordered_tuples(V: int, m: int) -> np.ndarray:
    """(V^m, m) every ordered m-tuple of outcomes."""
    return np.array(list(itertools.product(range(V), repeat=m)), dtype=np.int64).reshape(-1, m)


def multisets(V: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Every multiset of n draws from V outcomes, sorted rows (M, n), and log multinomial coefficients (M,)."""
    Y = np.array(list(itertools.combinations_with_replacement(range(V), n)), dtype=np.int64).reshape(-1, n)
    counts = np.zeros((len(Y), V))
    np.add.at(counts, (np.repeat(np.arange(len(Y)), n), Y.ravel()), 1)
    return Y, gammaln(n + 1) - gammaln(counts + 1).sum(-1)


def multiset_count(V: int, n: int) -> int:
    """Number of multisets of n draws from V outcomes, C(V + n - 1, n)."""
    return math.comb(V + n - 1, n)


def check_pool_count(V: int, n: int, what: str, fix: str) -> None:
    """A ``ValueError`` when the multisets of n draws from V outcomes are more than :data:`MAX_ROWS`.

    ``what`` names where V comes from (``"outcomes=12"``), ``fix`` says what to lower."""
    count = multiset_count(V, n)
    if count > MAX_ROWS:
        raise ValueError(f"n={n} with {what} gives C(V+n-1, n) = C({V + n - 1}, {n}) = {count:,} pools to enumerate, "
                         f"more than the check builds (at most {MAX_ROWS:,}); {fix}")


def pools(V: int, n: int, ordered: bool) -> tuple[np.ndarray, np.ndarray]:
    """Every pool of n draws from V outcomes, (M, n), with its log multiplicity (M,): multisets or ordered tuples."""
    if ordered:
        if V**n > MAX_ROWS:
            raise ValueError(f"credit depends on the order of the samples and V^n = {V}^{n} ordered pools are too many"
                             f" to enumerate (at most {MAX_ROWS}); use fewer outcomes or a smaller n")
        Y = ordered_tuples(V, n)
        return Y, np.zeros(len(Y))
    check_pool_count(V, n, f"{V} outcomes", "use fewer outcomes or a smaller n")
    return multisets(V, n)


def value_fn(t: Target, scores: np.ndarray, rewards: np.ndarray, reference: int | None, k: int,
             progress: Progress | None = None) -> Callable:
    """The exact target as a differentiable function of the outcome probabilities ``p: (N,) -> ()``."""
    s, r = torch.from_numpy(scores), torch.from_numpy(rewards)
    if t.name == "best_of_k" and t.payoff is _kept_reward:
        return lambda p: best_of_k_value(p, s, r, k=k)
    if t.name == "pass_at_k" and t.payoff is _best_reward:
        return lambda p: best_of_k_success((p * r).sum(), k=k)
    if t.payoff is None:  # best_of_k_sft
        return lambda p: log_best_of_k_distribution(p, s, k=k)[reference]
    # a user payoff: enumerate k-tuples of the distinct (score, reward) classes
    keys, inv = np.unique(np.stack([scores, rewards], 1), axis=0, return_inverse=True)
    inv = torch.from_numpy(inv.reshape(-1))
    C = len(keys)
    if C**k > MAX_ROWS:
        raise ValueError(f"k-tuples of {C} score/reward classes are too many to enumerate (C^k = {C}^{k} > {MAX_ROWS})")
    Y = ordered_tuples(C, k)
    g = torch.from_numpy(call_payoff(t, keys[Y, 0], keys[Y, 1], progress))
    Yt = torch.from_numpy(Y)

    def value(p):
        q = torch.zeros(C, dtype=p.dtype).index_add(0, inv, p)
        return (q[Yt].prod(-1) * g).sum()

    return value


def call_credit(credit: Callable, t: Target, S: np.ndarray, R: np.ndarray, s_star: float | None, k: int,
                progress: Progress | None = None) -> np.ndarray:
    """Credit of pools ``S, R: (M, n) -> (M, n)`` float64, checked for shape and finiteness."""
    sft = t.name == "best_of_k_sft"
    if progress is not None:
        second = f"reference score {s_star:g}" if sft else f"rewards {R[0].tolist()}"
        progress.function = "credit"
        progress.pools = f"a batch of {S.shape[0]} pools of n={S.shape[1]} (the first: scores {S[0].tolist()}, {second})"
    second = np.full(S.shape[0], s_star) if sft else R
    w = credit(S.copy(), second.copy(), k=k)
    w = w.detach().cpu().numpy() if isinstance(w, torch.Tensor) else np.asarray(w, dtype=np.float64)
    if w.shape != S.shape:
        raise ValueError(f"credit must return shape (B, n) = {S.shape}, got {w.shape}")
    if not np.isfinite(w).all():
        i = tuple(int(j) for j in np.argwhere(~np.isfinite(w))[0])
        raise ValueError(f"credit returned {w[i]} at pool {i[0]} (scores {S[i[0]].tolist()}, "
                         f"{'reference score ' + str(s_star) if sft else 'rewards ' + str(R[i[0]].tolist())})")
    return w.astype(np.float64)


def _differs(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Rows of two credits (M, n) that differ beyond rounding: (M,) bool."""
    scale = max(1.0, float(np.abs(a).max(initial=0.0)), float(np.abs(b).max(initial=0.0)))
    return ~np.isclose(a, b, rtol=1e-9, atol=1e-12 * scale).all(-1)


def _nums(x: np.ndarray) -> str:
    return "[" + ", ".join(f"{v:.4g}" for v in x) + "]"


def _pool(t: Target, S: np.ndarray, R: np.ndarray, s_star: float | None, i: int) -> str:
    second = f"reference score {s_star:g}" if t.name == "best_of_k_sft" else f"rewards {R[i].tolist()}"
    return f"pool {i} (scores {S[i].tolist()}, {second})"


def check_credit_rows(credit: Callable, t: Target, S: np.ndarray, R: np.ndarray, s_star: float | None, k: int,
                      w: np.ndarray, progress: Progress | None = None, alone: int = 3) -> None:
    """Refuse (:class:`CreditRefused`) a credit whose enumerated mean would not be that of training.

    ``S, R: (M, n)`` the pools, ``w`` their credit from one call. The credit is called once more on the same
    pools (a credit that draws random numbers differs: the check would average one draw, not its mean), then
    on ``alone`` of the pools one at a time: the row of a pool must not depend on the other pools of the
    batch (a mean or standard deviation over axis 0 mixes prompts, which training does not average away).
    """
    w2 = call_credit(credit, t, S, R, s_star, k, progress)
    bad = np.flatnonzero(_differs(w, w2))
    if len(bad):
        i = int(bad[0])
        raise CreditRefused(
            f"credit is not deterministic: two calls on the same {len(S)} pools differ ({len(bad)} of them; "
            f"{_pool(t, S, R, s_star, i)}: {_nums(w[i])}, then {_nums(w2[i])}); seed it or average over ties, "
            f"since the check computes the mean of one credit per pool")
    M = len(S)
    for i in sorted({int(j) for j in np.linspace(0, M - 1, min(alone, M)).round()}):
        try:
            wi = call_credit(credit, t, S[i:i + 1], R[i:i + 1], s_star, k, progress)[0]
            alone_gives = None if not _differs(wi[None], w[i:i + 1])[0] else f"gives {_nums(wi)}"
        except Exception as e:  # it ran on the whole batch: failing on one pool is a dependence on the others
            alone_gives = f"fails ({type(e).__name__}: {e})"
        if alone_gives is not None:
            raise CreditRefused(
                f"the credit of a pool depends on the other pools of the batch ({_pool(t, S, R, s_star, i)} alone "
                f"{alone_gives}, in a batch of {M} pools {_nums(w[i])}): a statistic across the batch (a mean "
                f"over axis 0, a batch mean or standard deviation) mixes prompts and biases training; compute each "
                f"pool's credit from its own row")


def is_equivariant(credit, t, S, R, s_star, k, w, seed, progress: Progress | None = None) -> bool:
    """Does the credit permute with the samples? (M, n) pools, their credit w."""
    perm = np.argsort(np.random.default_rng(seed).random(S.shape), axis=1)
    take = lambda x: np.take_along_axis(x, perm, 1)  # noqa: E731
    w2 = call_credit(credit, t, take(S), take(R), s_star, k, progress)
    return bool(np.allclose(w2, take(w), rtol=1e-9, atol=1e-12 * max(1.0, np.abs(w).max())))
