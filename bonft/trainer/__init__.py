"""The small CPU trainer: sample -> score -> credit -> loss -> step, with checkpoints.

Modules: :mod:`.config` (the run's dataclass config, TOML, ``--set``), :mod:`.loop`
(``train``: the stages and the step loop), :mod:`.steps` (what one warm-start or
RL step does), :mod:`.objectives` (the registry: objective name -> credit function;
the placebo shuffle), :mod:`.measure` (the step's time split, the gradient SNR),
:mod:`.evaluation` (held-out pass@k / best-of-k with CIs), :mod:`.generation`
(n samples per prompt with a KV cache, and the training forward), :mod:`.models`
(tiny models from a transformers config, loading and saving), :mod:`.checkpoint`,
:mod:`.distributed` (torchrun), :mod:`.demo` (the demo and the seed study).
"""
