"""Sampling n responses per prompt and the log-probs of responses, with their engine.

* :mod:`~bonft.generation.sampling` -- :func:`sample`, :class:`Samples`;
* :mod:`~bonft.generation.logprobs` -- :func:`sequence_logprobs` (the training forward) and
  :func:`encode_responses` (given texts in the sampler's layout);
* :mod:`~bonft.generation.inputs` -- checks of the sampler's inputs;
* :mod:`~bonft.generation.policy` -- the tempered / nucleus policy pi_T and its inverse-CDF draw;
* :mod:`~bonft.generation.kvcache` -- the prompts' forward pass and the caches built from it;
* :mod:`~bonft.generation.prefix_attention` -- decoding attention over one shared prompt cache;
* :mod:`~bonft.generation.decode_step` -- bonft's own decoding forward for stock GPT-2 and Llama;
* :mod:`~bonft.generation.on_policy` -- :func:`check_on_policy` (also in :mod:`bonft.testing`): do a loop's
  log-probs describe the policy that sampled?

Used by the trainer and the planner; imports nothing from either.
"""
from bonft.generation.logprobs import encode_responses, sequence_logprobs
from bonft.generation.sampling import Samples, sample

__all__ = ["Samples", "sample", "encode_responses", "sequence_logprobs"]
