"""The one home of pass@k and of every ratio of binomials the library uses.

``miss(n, c, k) = C(n-c, k) / C(n, k)`` is the chance that a uniform k-subset
of n items misses all c marked ones. pass@k is ``1 - miss`` (Chen et al. 2021,
"Evaluating Large Language Models Trained on Code"); the best-of-k rank
weights of :mod:`bonft._core.ustat` and the credit tables of :mod:`bonft.objectives.credit`
are ``miss`` at shifted arguments (``C(i, k-1) / C(n, k) = (k/n) miss(n-1,
n-1-i, k-1)``), so every binomial ratio in bon/estimate/credit goes through
:func:`log_miss`.

Accuracy. The textbook route ``lgamma(n-c+1) - lgamma(n-c-k+1) - lgamma(n+1)
+ lgamma(n-k+1)`` subtracts numbers of size ``n log n``: with n = 10^18 its
absolute error is ~10^3 (``pass_at_k(10**15, 1, k=10**14)`` came out as
-2980). Here ``lgamma(x) = (x - 1/2) log x - x + log(2 pi)/2 + rho(x)`` is
split into its Stirling part and the small remainder ``rho``; with
``A = n+1, B = n-c-k+1, C = n-k+1, D = n-c+1`` (``A + B = C + D`` and
``C D - c k = A B``) the Stirling parts combine exactly into

.. math::
    \\log \\mathrm{miss} = c\\,\\mathrm{log1p}(-k/A) + k\\,\\mathrm{log1p}(-c/A)
        - (B - \\tfrac12)\\,\\mathrm{log1p}\\!\\big(-\\tfrac{ck}{CD}\\big)
        + \\rho(C) + \\rho(D) - \\rho(A) - \\rho(B)

whose three main terms have the size of the result (about ``-ck/A``), so no
digits cancel. Measured against exact rational arithmetic (``fractions``,
``math.comb``) on a grid up to n = 10^18: relative error below 1e-12 for
pass@k (``tests/test_passk.py``). Integers must fit in int64; larger ones are
refused with a clear message rather than wrapped.
"""
from __future__ import annotations

import math

import numpy as np

INT64_MAX = np.iinfo(np.int64).max
_HALF_LOG_2PI = 0.5 * math.log(2.0 * math.pi)
# Stirling series of rho(x) = lgamma(x) - (x - 1/2) log x + x - log(2 pi)/2 (Abramowitz & Stegun 6.1.40)
_RHO = (1.0 / 12, -1.0 / 360, 1.0 / 1260, -1.0 / 1680, 1.0 / 1188, -691.0 / 360360, 1.0 / 156)
_RHO_MIN = 16.0  # the series above is exact to < 1e-18 from here on


def _rho(x, xp):
    """Stirling remainder rho(x) for x >= 1 (float64 array of numpy or torch)."""
    big = x >= _RHO_MIN
    xs = xp.where(big, x, xp.full_like(x, _RHO_MIN))
    inv = 1.0 / xs
    inv2 = inv * inv
    acc = xp.zeros_like(x) + _RHO[-1]
    for c in _RHO[-2::-1]:
        acc = acc * inv2 + c
    series = acc * inv
    if not bool(xp.any(~big)):
        return series
    xl = xp.where(big, xp.ones_like(x), x)  # small x: from lgamma itself (values are small, so is the error)
    direct = _lgamma(xl, xp) - (xl - 0.5) * xp.log(xl) + xl - _HALF_LOG_2PI
    return xp.where(big, series, direct)


def _lgamma(x, xp):
    if xp is np:
        from scipy.special import gammaln

        return gammaln(x)
    return xp.lgamma(x)


def log_miss(n, c, k, xp=np):
    """``log C(n-c, k) / C(n, k)`` elementwise; ``-inf`` where ``c + k > n``.

    n, c, k: int64 arrays (numpy, or torch with ``xp=torch``), broadcast,
    trusted: ``0 <= c <= n``, ``0 <= k <= n``. Returns float64.
    """
    if xp is np:
        n, c, k = np.broadcast_arrays(np.asarray(n, np.int64), np.asarray(c, np.int64), np.asarray(k, np.int64))
        with np.errstate(divide="ignore", invalid="ignore"):  # the branch a `where` drops may divide by 0
            return _log_miss(n, c, k, np, lambda v: v.astype(np.float64))
    n, c, k = xp.broadcast_tensors(xp.as_tensor(n).to(xp.int64), xp.as_tensor(c).to(xp.int64),
                                   xp.as_tensor(k).to(xp.int64))
    return _log_miss(n, c, k, xp, lambda v: v.to(xp.float64))


def _log_miss(n, c, k, xp, f):
    zero = (c == 0) | (k == 0)
    empty = (n - c) < k  # every k-subset holds a marked item
    ok = ~(zero | empty)
    one = xp.ones_like(n)
    # exact int64 differences (no overflow: each is <= n), then float64
    A = f(n) + 1.0
    B = f(xp.where(ok, n - c - k, one)) + 1.0
    C = f(n - k) + 1.0
    D = f(n - c) + 1.0
    cf, kf = f(xp.where(ok, c, one)), f(xp.where(ok, k, one))  # 1 in the lanes set at the end
    x = cf * kf / (C * D)  # ck / (CD) < 1 where ok
    small = x <= 0.5
    xs = xp.where(small & ok, x, xp.zeros_like(x))
    # log(1 - a/b) = log((b - a)/b) with b - a an exact integer: log1p for a/b <= 1/2, else the log of the quotient
    ln1m = lambda a, b, rest: xp.where(a <= 0.5 * b, xp.log1p(-a / b), xp.log(rest / b))  # noqa: E731
    lk, lc = ln1m(kf, A, C), ln1m(cf, A, D)  # log(C/A), log(D/A)
    # log1p(-x) = log(AB/(CD)) = log(B/D) - log(C/A); for x > 1/2 that difference has no cancellation to fear
    L = xp.where(small, xp.log1p(-xs), ln1m(kf, D, B) - lk)
    main = cf * lk + kf * lc - (B - 0.5) * L
    out = main + _rho(C, xp) + _rho(D, xp) - _rho(A, xp) - _rho(B, xp)
    out = xp.where(zero, xp.zeros_like(out), out)
    out = xp.where(empty & ~zero, xp.full_like(out, -math.inf), out)
    return xp.minimum(out, xp.zeros_like(out))


def pass_at_k_counts(n, c, k, xp=np):
    """Unbiased pass@k ``1 - C(n-c, k)/C(n, k)`` (Chen et al. 2021) as ``0 - expm1(log_miss)``; trusted ints
    (``0 -``, not a negation: ``-expm1(0)`` is -0.0)."""
    return 0.0 - xp.expm1(log_miss(n, c, k, xp))


def pass_at_k_prob(p, k: int, xp=np):
    """pass@k of a problem solved with chance p: ``1 - (1 - p)^k = -expm1(k log1p(-p))``, p in [0, 1]."""
    below1 = p < 1
    ps = xp.where(below1, p, xp.zeros_like(p))
    return xp.where(below1, -xp.expm1(k * xp.log1p(-ps)), xp.ones_like(p))
