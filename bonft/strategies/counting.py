"""Dynamic programmes over answer counts for majority vote (private; inputs are trusted).

Majority vote over ``k`` samples returns the answer held by the most samples,
ties broken uniformly among the tied answers. Two settings share one
generating-function identity:

* a **pool** of ``n`` samples, ``k`` of them drawn without replacement: answer
  ``a`` appears ``c`` times with weight ``C(n_a, c)`` (hypergeometric);
* a **policy** over answers with masses ``q_a``, ``k`` draws with replacement:
  weight ``q_a^c / c!`` and a final factor ``k!`` (multinomial).

For a threshold ``c`` (the winner's count), every other answer ``b`` holds at
most ``c`` samples; those holding exactly ``c`` are marked by a variable
``u``. Answer ``a`` wins with share ``1/(1 + T)`` when ``T`` others tie with
it, and ``1/(1 + T) = int_0^1 u^T du``:

.. math::
    P_k(a\\text{ wins}) \\propto \\sum_{c\\ge1} [x^k]\\; w_a(c)\\,x^c
        \\int_0^1 \\prod_{b\\ne a}\\Big(\\sum_{m<c} w_b(m)\\,x^m + u\\,w_b(c)\\,x^c\\Big)\\,du

The integrand's coefficient of ``x^j`` is a polynomial of degree at most
``min(A, j // c) - 1`` in ``u`` (``A`` the answers that can reach ``c``; each
tied answer takes ``c`` of the ``j`` slots), so Gauss-Legendre quadrature with
half as many nodes integrates it exactly (Abramowitz & Stegun 1964, 25.4.29);
at ``c = 1`` every sampled answer ties and the share is ``1/j``, no quadrature.
The coefficient of ``x^k`` gives every ``k`` at once. No k-tuple or k-subset is
enumerated.

Here: :func:`pool_vote_sums` (the pool estimator, every k), :func:`vote_credit_batched`
(the leave-one-out credit of many pools at once), :func:`policy_majority_value`
(the exact, differentiable value of a policy), :func:`weighted_slot_weights`
(the served-reward weights of a weighted vote, for enumeration or sampling).

References: Wang et al. 2023, "Self-Consistency Improves Chain of Thought
Reasoning in Language Models" (majority vote over sampled answers);
Hoeffding 1948 (U-statistics).
"""
from __future__ import annotations

import math
from functools import lru_cache

import numpy as np
import torch


@lru_cache(maxsize=256)
def _gauss_legendre(m: int) -> tuple[np.ndarray, np.ndarray]:
    """m nodes and weights on [0, 1]: exact for polynomials of degree <= 2m - 1."""
    x, w = np.polynomial.legendre.leggauss(max(m, 1))
    return (x + 1.0) / 2.0, w / 2.0


@lru_cache(maxsize=4096)
def _comb_row(d: int) -> np.ndarray:
    """(d+1,) binomials C(d, 0..d) as float64 (exact below 2^53, then correctly rounded)."""
    return np.array([float(math.comb(d, m)) for m in range(d + 1)])


def _pmul(a: np.ndarray, b: np.ndarray, K: int) -> np.ndarray:
    """Batched polynomial product truncated at degree K: (U, La), (U, Lb) -> (U, min(La+Lb-1, K+1))."""
    if a.shape[1] < b.shape[1]:
        a, b = b, a
    L = min(a.shape[1] + b.shape[1] - 1, K + 1)
    if b.shape[1] == 1:
        return a[:, :L] * b
    if b.shape[1] > a.shape[0]:  # long factors: one direct (non-FFT) convolution per row
        return np.stack([np.convolve(x, y)[:L] for x, y in zip(a, b)])
    out = np.zeros((a.shape[0], L))
    for j in range(min(b.shape[1], L)):
        span = min(a.shape[1], L - j)
        out[:, j : j + span] += a[:, :span] * b[:, j : j + 1]
    return out


def _ppow(f: np.ndarray, m: int, K: int) -> np.ndarray:
    """f^m by repeated squaring, truncated at degree K; f^0 = 1."""
    out = np.ones((f.shape[0], 1))
    base = f
    while m:
        if m & 1:
            out = _pmul(out, base, K)
        m >>= 1
        if m:
            base = _pmul(base, base, K)
    return out


def pool_vote_sums(d: np.ndarray, m: np.ndarray, R: np.ndarray, K: int) -> np.ndarray:
    """Reward of majority vote summed over the k-subsets of a pool, for every k <= K.

    ``d: (J,)`` distinct answer counts, ``m: (J,)`` answers with each count, ``R: (J,)`` sum of
    the mean rewards of those answers -> ``(K+1,)``: entry ``k`` is
    ``sum_{|S|=k} sum_a share_a(S) rbar_a``; divide by ``C(n, k)`` for the estimate.

    Per threshold ``c`` one product over the count classes carries a dual part
    ``d/de prod_a (f_a + e rbar_a h_a)``; answers of one class are exchangeable, so a class
    contributes ``(f^m, R h f^(m-1))``. Answers that cannot reach ``c`` give ``(1+x)^below``;
    at ``c = 1`` every answer of the subset ties (share ``1/k``), so no quadrature is needed.
    Cost: ``O(sum_c J_c n c)`` flops.
    """
    d = np.asarray(d, dtype=np.int64)
    m = np.asarray(m, dtype=np.int64)
    R = np.asarray(R, dtype=np.float64)
    n = int((d * m).sum())
    out = np.zeros(K + 1)
    top = int(np.argmax(d))
    # above the second-largest count only a lone top answer can reach c: it wins iff it holds c
    second = int(np.sort(np.repeat(d, m))[-2]) if m.sum() > 1 else 0
    c_dp = min(second, K) if m[top] == 1 else min(int(d[top]), K)
    if c_dp < min(int(d[top]), K):
        c0, c1 = c_dp + 1, min(int(d[top]), K)
        head = np.zeros(K + 1)
        head[c0 : c1 + 1] = _comb_row(int(d[top]))[c0 : c1 + 1]
        out += R[top] * np.convolve(head, _comb_row(n - int(d[top])))[: K + 1]
    for c in range(1, c_dp + 1):
        act = np.flatnonzero(d >= c)
        below = int((d[d < c] * m[d < c]).sum())
        if c == 1:  # every sampled answer appears once: all tie, share 1/k, no u needed
            u, g = np.ones(1), np.ones(1)
        else:
            A = min(int(m[act].sum()), K // c)  # u-degree of [x^j] <= min(A, K // c) - 1
            u, g = _gauss_legendre((A + 1) // 2)
        U = len(u)
        val = np.ones((U, 1))
        der = np.zeros((U, 1))
        for j in act:
            row = _comb_row(int(d[j]))
            f = np.empty((U, c + 1))
            f[:, :c] = row[:c]
            f[:, c] = (u if c > 1 else 1.0) * row[c]
            p1 = _ppow(f, int(m[j]) - 1, K)  # f^(m-1)
            hp = np.zeros((U, min(p1.shape[1] + c, K + 1)))
            hp[:, c:] = R[j] * row[c] * p1[:, : hp.shape[1] - c]  # R h f^(m-1), h = C(d, c) x^c
            fm = _pmul(p1, f, K)
            der = _pmul(der, fm, K)
            tmp = _pmul(val, hp, K)
            if tmp.shape[1] > der.shape[1]:
                der = np.pad(der, ((0, 0), (0, tmp.shape[1] - der.shape[1])))
            der[:, : tmp.shape[1]] += tmp
            val = _pmul(val, fm, K)
        poly = np.convolve(g @ der, _comb_row(below))[: K + 1]
        if c == 1:  # share 1/k of the k tied answers
            poly = poly / np.maximum(np.arange(len(poly)), 1)
        out[: len(poly)] += poly
    return out


# ---------------------------------------------------------------------------- finite policy (torch)


def _tmul(a: torch.Tensor, b: torch.Tensor, K: int) -> torch.Tensor:
    """Polynomial product on the last axis, both of length K+1, truncated at degree K."""
    out = a * b[..., :1]
    parts = [out]
    for j in range(1, K + 1):
        parts.append(torch.nn.functional.pad(a[..., : K + 1 - j] * b[..., j : j + 1], (j, 0)))
    return torch.stack(parts, 0).sum(0)


def policy_majority_value(q: torch.Tensor, qr: torch.Tensor, k: int) -> torch.Tensor:
    """Exact majority-vote value of a policy over answers, differentiable.

    ``q: (L, A)`` answer masses, ``qr: (L, A)`` their reward mass
    ``sum_{v in a} pi(v) R_v`` -> ``(L,)``:

    .. math:: V_k = \\sum_a P_k(a\\text{ wins})\\,\\bar R_a,\\quad
              \\bar R_a = qr_a / q_a

    computed as ``k! [x^k] sum_c int_0^1 d/de prod_b (f_b(x, u) + e h_b(x))``
    with ``f_b = sum_{m<c} q_b^m x^m/m! + u q_b^c x^c/c!`` and
    ``h_b = qr_b q_b^(c-1) x^c / c!``, so no division by ``q_a``.
    """
    L, A = q.shape
    dt = q.dtype
    u_np, g_np = _gauss_legendre((min(A, k) + 1) // 2)  # at most k answers can tie
    u = torch.as_tensor(u_np, dtype=dt, device=q.device)
    g = torch.as_tensor(g_np, dtype=dt, device=q.device)
    U = len(u_np)
    mpow = torch.arange(k + 1, dtype=dt, device=q.device)
    steps = q[..., None] / mpow[1:]  # (L, A, k): q/1, q/2, ..., q/k
    qpow = torch.cat([torch.ones_like(q[..., None]), torch.cumprod(steps, -1)], -1)  # (L, A, k+1) q^m/m!
    cs = torch.arange(1, k + 1, device=q.device)  # thresholds (C,)
    below = (mpow[None, :] < cs[:, None]).to(dt)  # (C, k+1)
    at = (mpow[None, :] == cs[:, None]).to(dt)  # (C, k+1)
    # f[l, a, c, u, m] = q^m/m! for m < c, u q^c/c! for m = c
    f = qpow[:, :, None, None, :] * (below[:, None, :] + at[:, None, :] * u[None, :, None])
    hcoef = qr[..., None] * qpow[..., :k] / cs.to(dt)  # (L, A, C): qr q^(c-1)/c!
    h = (hcoef[..., None] * at[None, None]).unsqueeze(3)  # (L, A, C, 1, k+1)
    C = len(cs)
    val = torch.zeros(L, C, U, k + 1, dtype=dt, device=q.device)
    val[..., 0] = 1.0
    der = torch.zeros_like(val)
    for b in range(A):
        fb, hb = f[:, b], h[:, b].expand(L, C, U, k + 1)
        der = _tmul(der, fb, k) + _tmul(val, hb, k)
        val = _tmul(val, fb, k)
    coef = der[..., k]  # (L, C, U)
    return float(math.factorial(k)) * (coef * g).sum(-1).sum(-1)  # k! as a float: a Python int above 2^63 is no tensor scalar


# ---------------------------------------------------------------------------- weighted vote


def weighted_slot_weights(a: np.ndarray, s: np.ndarray) -> np.ndarray:
    """Weight of each drawn sample in the served reward of a weighted vote.

    ``a: (M, k)`` answer ids and ``s: (M, k)`` scores of ``M`` draws of ``k`` samples ->
    ``(M, k)`` weights ``w`` with served expected reward ``sum_j w_j R_j``: the answers with
    the largest total score (equal to 1e-12 relative) share the win, and the winner's samples
    share it evenly.
    """
    M, k = a.shape
    A = int(a.max()) + 1
    flat = (a + A * np.arange(M)[:, None]).ravel()
    num = np.bincount(flat, minlength=M * A).reshape(M, A).astype(np.float64)  # samples per answer
    present = num > 0
    tot = np.where(present, np.bincount(flat, weights=s.ravel(), minlength=M * A).reshape(M, A), -np.inf)
    # relative only: any positive rescale of the scores ties the same totals (an absolute floor tied all small ones)
    win = present & np.isclose(tot, tot.max(1, keepdims=True), rtol=1e-12, atol=0.0)
    share = win / np.where(present, num, 1.0) / win.sum(1, keepdims=True)  # (M, A) per sample of each answer
    return np.take_along_axis(share, a, 1)


def weighted_vote_weights(cnt: np.ndarray, codes: np.ndarray, s: np.ndarray) -> np.ndarray:
    """:func:`weighted_slot_weights` for count vectors: ``cnt (N, V)`` draws of the ``V`` outcomes
    (each row sums to k), ``codes (V,)`` answers, ``s (V,)`` scores -> ``(N, V)`` weight per outcome."""
    N, V = cnt.shape
    ids = np.repeat(np.tile(np.arange(V), N), cnt.ravel()).reshape(N, -1)  # (N, k) outcome of each draw
    w = weighted_slot_weights(codes[ids], s[ids])
    return np.bincount((ids + V * np.arange(N)[:, None]).ravel(), weights=w.ravel(), minlength=N * V).reshape(N, V)


# ---------------------------------------------------------------------------- credit, batched over pools


def _credit_terms(cnt: np.ndarray, rbar: np.ndarray, cs, u_np, g_np, K: int, k: int, kb: int):
    """Thresholds ``cs`` of the batched credit: numerators of V_k (B,), and per answer (B, A) of
    the others' reward-weighted wins and the answer's own wins once it loses one sample."""
    u, g = torch.as_tensor(u_np), torch.as_tensor(g_np)
    dt = torch.float64
    m = torch.arange(K + 1, dtype=dt)
    cs = torch.as_tensor(cs, dtype=dt)  # the thresholds of this group
    B, A = cnt.shape

    def binom(N: torch.Tensor) -> torch.Tensor:  # (B, A) counts -> (B, A, K+1) C(N, m), 0 for m > N
        N1 = N[..., None]
        val = torch.exp(torch.lgamma(N1 + 1) - torch.lgamma(m + 1) - torch.lgamma((N1 - m).clamp(min=0) + 1))
        return torch.where(m <= N1, torch.round(val), torch.zeros_like(val))

    def factors(N: torch.Tensor):
        """f (B, A, C, U, K+1) and the win term h (B, A, C, K+1) of answers with counts N."""
        bc = binom(N)  # (B, A, K+1)
        below = (m[None, :] < cs[:, None]).to(dt)  # (C, K+1)
        at = (m[None, :] == cs[:, None]).to(dt)
        f = bc[:, :, None, None, :] * (below[:, None, :] + at[:, None, :] * u[None, :, None])
        return f, bc[:, :, cs.long()]  # (B, A, C, U, K+1) factors, (B, A, C) C(N, c): win term C(N, c) x^c

    N = torch.as_tensor(cnt)
    f, h = factors(N)  # (B, A, C, U, K+1), (B, A, C, K+1)
    f_red, h_red = factors((N - 1).clamp(min=0))  # one sample of the answer removed
    rb = torch.as_tensor(rbar)
    U, K1 = len(u_np), K + 1
    hr = (rb[:, :, None] * h)[..., None, None]  # (B, A, C, 1, 1) reward-weighted win coefficients
    top = int(cs.max())  # factors have no coefficient above the largest threshold
    idx = torch.arange(K1)[None, :] - cs.long()[:, None]  # (C, K+1): x^c shifts coefficient j - c to j
    keep = (idx >= 0).to(dt)[:, None, :]
    idx = idx.clamp(min=0)[:, None, :]  # (C, 1, K+1)
    one = torch.zeros(B, len(cs), U, K1, dtype=dt)
    one[..., 0] = 1.0
    zero = torch.zeros_like(one)

    def mul(x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
        """Polynomial product on the last axis truncated at degree K (y broadcasts, degree <= top)."""
        out = x * y[..., :1]
        for j in range(1, top + 1):
            out[..., j:] += x[..., : K1 - j] * y[..., j : j + 1]
        return out

    def shift(x: torch.Tensor, w: torch.Tensor) -> torch.Tensor:
        """x times w x^c for each threshold c (axis -3 of x), truncated at degree K."""
        return torch.gather(x, -1, idx.expand(x.shape)) * keep * w

    pv, pd = [one], [zero]  # prefix products over answers: value and dual (reward-weighted wins) parts
    for a in range(A):
        pd.append(mul(pd[-1], f[:, a]) + shift(pv[-1], hr[:, a]))
        pv.append(mul(pv[-1], f[:, a]))
    sv, sd = [one], [zero]  # suffix products, built from the last answer back
    for a in range(A - 1, -1, -1):
        sd.append(mul(sd[-1], f[:, a]) + shift(sv[-1], hr[:, a]))
        sv.append(mul(sv[-1], f[:, a]))
    full_d = pd[-1]  # the whole pool's dual part
    pv, pd = torch.stack(pv[:-1], 1), torch.stack(pd[:-1], 1)  # (B, A, C, U, K+1): answers before a
    sv, sd = torch.stack(sv[:-1][::-1], 1), torch.stack(sd[:-1][::-1], 1)  # answers after a
    gw = g[None, :]
    vk = (full_d[..., k] * gw).sum((1, 2)).numpy()  # (B,) numerator of V_k
    flip = lambda x: x[..., : kb + 1].flip(-1)  # noqa: E731  [x^kb](p * q) = sum_j p[j] q[kb - j]
    sv_fr, sd_fr = mul(sv, f_red), mul(sd, f_red)  # suffix times the reduced factor
    phi = ((pd[..., : kb + 1] * flip(sv_fr) + pv[..., : kb + 1] * flip(sd_fr)).sum(-1) * gw).sum((2, 3))
    sv_hr = shift(sv, h_red[..., None, None])
    psi = ((pv[..., : kb + 1] * flip(sv_hr)).sum(-1) * gw).sum((2, 3))
    return vk, phi.numpy(), psi.numpy()  # (B, A): others' wins / a's own wins, with a reduced


def vote_credit_batched(codes: np.ndarray, rewards: np.ndarray, k: int) -> np.ndarray:
    """Majority-vote credit ``w_i = V_k(pool) - V_kb(pool - i)`` for B pools at once: (B, n) -> (B, n).

    ``codes``: answer ids ``0..A_b-1`` per row. Every answer ``a`` has a factor
    ``f_a(x, u)`` per threshold ``c`` (module docstring); the pools' generating function
    ``prod_a f_a`` is multilinear in the factors, so removing one sample of answer ``a``
    (binomials ``C(n_a, m) -> C(n_a - 1, m)``) only swaps ``f_a`` for its reduced factor:
    prefix and suffix products over the answers give every leave-one-out value, a dual part
    carries the reward-weighted wins. Thresholds, quadrature nodes and pools are batch axes;
    memory ``O(B A k^3)``.
    """
    B, n = codes.shape
    kb = min(k, n - 1)
    K = k
    A = int(codes.max()) + 1
    flat = (codes + A * np.arange(B)[:, None]).ravel()  # (B*n,) pool-and-answer slots
    cnt = np.bincount(flat, minlength=B * A).reshape(B, A).astype(np.float64)
    rsum = np.bincount(flat, weights=rewards.ravel(), minlength=B * A).reshape(B, A)
    rbar = np.where(cnt > 0, rsum / np.where(cnt > 0, cnt, 1), 0.0)
    # thresholds grouped by the quadrature they need: at c = 1 all j answers of a j-subset tie
    # (share 1/j, no u); above, min(A, K // c) answers can tie at c, so ceil(of that / 2) nodes
    top = int(min(K, cnt.max()))
    vk_num, phi, psi = np.zeros(B), np.zeros((B, A)), np.zeros((B, A))
    groups: dict[int, list[int]] = {}
    for c in range(2, top + 1):
        groups.setdefault((min(A, K // c) + 1) // 2, []).append(c)
    parts = [([1], np.ones(1), np.ones(1), True)]
    parts += [(cs, *_gauss_legendre(nodes), False) for nodes, cs in groups.items()]
    for cs, u_np, g_np, tie_all in parts:
        v, f_, s_ = _credit_terms(cnt, rbar, cs, u_np, g_np, K, k, kb)
        if tie_all:
            v, f_, s_ = v / k, f_ / kb, s_ / kb
        vk_num, phi, psi = vk_num + v, phi + f_, psi + s_
    Vk = vk_num / float(math.comb(n, k))
    rows = np.arange(B)[:, None]
    d = cnt[rows, codes]  # (B, n) count of each sample's answer
    r_minus = np.where(d > 1, (rsum[rows, codes] - rewards) / np.where(d > 1, d - 1, 1), 0.0)
    loo = (phi[rows, codes] + r_minus * psi[rows, codes]) / float(math.comb(n - 1, kb))
    return Vk[:, None] - loo
