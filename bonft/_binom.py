"""Log-binomial coefficients for numpy and torch, safe for n up to 10^6.

``log_comb(n, k) = lgamma(n+1) - lgamma(k+1) - lgamma(n-k+1)`` and ``-inf``
where ``k < 0`` or ``k > n`` (so that ``exp`` gives the combinatorial 0).
Ratios of binomials are formed as ``exp(log_comb(a, b) - log_comb(c, d))``,
which stays finite where ``math.comb`` would produce numbers with 10^4 digits.
"""
from __future__ import annotations

import numpy as np
from scipy.special import gammaln


def log_comb(n, k) -> np.ndarray:
    """Elementwise log C(n, k) as float64; -inf outside 0 <= k <= n."""
    n = np.asarray(n, dtype=np.float64)
    k = np.asarray(k, dtype=np.float64)
    valid = (k >= 0) & (k <= n)
    nn, kk = np.broadcast_arrays(n, k)
    out = np.full(nn.shape, -np.inf)
    v = np.broadcast_to(valid, nn.shape)
    out[v] = gammaln(nn[v] + 1) - gammaln(kk[v] + 1) - gammaln(nn[v] - kk[v] + 1)
    return out if out.ndim else out[()]


def log_comb_torch(n, k):
    """Torch version of :func:`log_comb` (float64 unless inputs are floating)."""
    import torch

    n = torch.as_tensor(n, dtype=torch.float64)
    k = torch.as_tensor(k, dtype=torch.float64, device=n.device)
    n, k = torch.broadcast_tensors(n, k)
    valid = (k >= 0) & (k <= n)
    safe_k = torch.where(valid, k, torch.zeros_like(k))
    safe_nk = torch.where(valid, n - k, torch.zeros_like(k))
    val = torch.lgamma(n + 1) - torch.lgamma(safe_k + 1) - torch.lgamma(safe_nk + 1)
    return torch.where(valid, val, torch.full_like(val, float("-inf")))
