"""Names of the metrics a training step logs to ``metrics.jsonl``, grouped by what they measure.

Plain names are the step itself: ``loss``, ``reward``, ``score``, ``k``, ``lr``, ``verifier_failures``,
``nll_per_token`` (warm start), ``samples_per_s`` and ``time/...`` (seconds per phase). The rest
carry a prefix saying what they describe:

- ``credit/...``: statistics of the per-sample credit (``credit/mean``, ``credit/abs_mean``);
- ``pool/...``: the pools of samples: ``pool/value`` (the pools' own estimate of the target: mean
  reward, best-of-k or pass@k), ``pool/with_signal`` / ``pool/without_signal`` (share of pools whose
  credit is not / is all zero);
- ``grad/...``: the gradient: ``grad/norm`` (before clipping), ``grad/clipped`` (0/1), ``grad/snr``;
- ``tokens/...``: token statistics (``tokens/masked_frac``: share of padding positions);
- ``anchor/kl``: the KL to the anchor (with ``anchor_weight > 0``);
- ``reference/...``: the reference response (``best_of_k_sft``): ``reference/logprob``,
  ``reference/beaten_frac`` (share of samples the verifier scores above it);
- ``ratio/...``: importance-ratio statistics of the ratio losses.
"""
from __future__ import annotations

# key of a loss's ``info`` dict -> metric name
LOSS_INFO = {
    "credit_mean": "credit/mean",
    "credit_abs_mean": "credit/abs_mean",
    "pool_value": "pool/value",
    "pools_with_signal": "pool/with_signal",
    "zero_credit_frac": "pool/without_signal",
    "masked_frac": "tokens/masked_frac",
    "kl": "anchor/kl",
    "reference_logprob": "reference/logprob",
    "expert_logprob": "reference/logprob",
    "beaten_frac": "reference/beaten_frac",
    "clip_frac": "ratio/clip_frac",
    "ratio_ess": "ratio/ess",
}
GRAD_NORM, GRAD_CLIPPED, GRAD_SNR = "grad/norm", "grad/clipped", "grad/snr"


def info_metric(key: str) -> str:
    """The metric name of a loss's ``info[key]``; a key not listed here is logged as ``loss/<key>``."""
    return LOSS_INFO.get(key, f"loss/{key}")
