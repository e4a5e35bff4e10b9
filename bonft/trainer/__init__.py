"""The small CPU trainer: sample -> score -> credit -> loss -> step, with checkpoints.

Modules: :mod:`.config` (the run's dataclass config, TOML, ``--set``), :mod:`.run` (the
:class:`~.run.Run` the loop carries, its set-up, optimizer, schedules and named random
streams), :mod:`.loop` (``train``: the stages and the step loop), :mod:`.steps` (what one
warm-start or RL step does), :mod:`.objectives` (the registry: objective name -> credit
function; the placebo shuffle), :mod:`.metrics` (the names of the logged metrics),
:mod:`.measure` (the step's time split, the gradient SNR), :mod:`.evaluation` (held-out
pass@k / best-of-k with CIs), :mod:`.models` (tiny models from a transformers config,
loading), :mod:`.checkpoint` (checkpoints and every write of weights), :mod:`.rundir` (the
run directory's lock and failed writes), :mod:`.distributed` (torchrun), :mod:`.demo` (the
demo and the seed study). Sampling and the training forward are :mod:`bonft.generation`.
"""
