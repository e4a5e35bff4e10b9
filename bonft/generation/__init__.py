"""Sampling n responses per prompt and the log-probs of responses, with their engine.

* :mod:`~bonft.generation.sampling` -- :func:`sample`, :class:`Samples`, :func:`encode_responses`,
  :func:`sequence_logprobs` (the training forward);
* :mod:`~bonft.generation.inputs` -- checks of the sampler's inputs;
* :mod:`~bonft.generation.policy` -- the tempered / nucleus policy pi_T and its inverse-CDF draw;
* :mod:`~bonft.generation.kvcache` -- the prompts' forward pass and the caches built from it;
* :mod:`~bonft.generation.prefix_attention` -- decoding attention over one shared prompt cache;
* :mod:`~bonft.generation.decode_step` -- bonft's own decoding forward for stock GPT-2 and Llama;
* :mod:`~bonft.generation.on_policy` -- :func:`check_on_policy` (also in :mod:`bonft.testing`): do a loop's
  log-probs describe the policy that sampled?

Used by the trainer and the planner; imports nothing from either.
"""
from bonft.generation.sampling import Samples, encode_responses, sample, sequence_logprobs

__all__ = ["Samples", "sample", "encode_responses", "sequence_logprobs"]
