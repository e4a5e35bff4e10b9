"""Running one recipe on many processes and machines with ``torch.distributed``.

The same script runs alone or under ``torchrun`` (``python -m torch.distributed.run``):
:func:`init_from_env` reads ``RANK`` / ``WORLD_SIZE`` / ``LOCAL_RANK`` /
``MASTER_ADDR`` / ``MASTER_PORT`` and joins the process group (``gloo`` on CPU,
``nccl`` on CUDA); without them it returns a single-process context and every
helper below becomes a no-op, so callers never branch on "am I distributed".

The pieces a best-of-N trainer needs:

* :func:`shard_bounds` / :func:`shard_prompts` -- split a step's global batch by
  *prompt*: the n samples of a prompt stay on one rank, because their credit
  (leave-one-out baselines, best-of-k / pass@k weights) needs the whole group.
  Contiguous blocks: rank r holds prompts ``[r*B/W, (r+1)*B/W)``. A global batch
  that the world size does not divide is refused (``allow_uneven=True`` gives the
  first ``B % W`` ranks one prompt more, for evaluation where nothing is averaged).
* :func:`global_mean_scale` -- the constant that makes W ranks take the same
  step as one process with the same global batch: a loss summed over a rank's
  prompts times ``W / B`` under DDP (which *averages* gradients over W ranks)
  gives ``(1/B) * sum over all B prompts`` of the per-prompt gradients.
* :func:`derive_seed` / :func:`prompt_seed` -- seeds from ``(seed, step, rank)``
  or ``(seed, step, global prompt slot)``: reproducible, and different across
  ranks; a per-slot seed makes a prompt's samples independent of which rank holds it.
* :func:`wrap_model`, :func:`unwrap_model`, :func:`reduce_metrics`,
  :func:`gather_objects`, :func:`broadcast_object`, :func:`barrier`.

Parts: :mod:`.group` (the process group: :class:`DistContext`, :func:`init_from_env`,
:func:`shutdown`, :func:`session`), :mod:`.collectives` (the DDP wrapper and the
collectives), :mod:`.sharding` (prompts per rank, the loss scale, seeds; no process
group), :mod:`.stopping` (what a rank reports when a peer stops mid-step). This module
only re-exports them.

A dead or stuck peer must not hang the others: the process group gets a
timeout (``timeout_s``, default 60 s) and every collective here turns a failure
into :class:`PeerError`, which names the rank, the operation and the timeout.
With gloo a killed peer is noticed at the next collective (its sockets close);
a stopped one after ``timeout_s``. With nccl the watchdog aborts the process
after the timeout (``TORCH_NCCL_ASYNC_ERROR_HANDLING``, on by default).

Network caution: when this module creates the rendezvous store itself (manual
launch, no torchrun) rank 0 binds it to ``MASTER_ADDR`` only, not to every
interface; with ``MASTER_ADDR=127.0.0.1`` gloo is also kept on the loopback
device. Under torchrun the launcher's store is used as torchrun made it. The
store and the process group are unauthenticated: keep ``MASTER_PORT`` on a
private network or behind a firewall (common practice).
"""
from bonft.trainer.distributed.collectives import (
    all_gather_objects,
    all_reduce_,
    barrier,
    broadcast_object,
    gather_objects,
    reduce_metrics,
    unwrap_model,
    wrap_model,
)
from bonft.trainer.distributed.group import DistContext, PeerError, init_from_env, session, shutdown
from bonft.trainer.distributed.sharding import (
    check_divisible,
    derive_seed,
    global_mean_scale,
    prompt_seed,
    shard_bounds,
    shard_prompts,
)
from bonft.trainer.distributed.stopping import step_guard, stopped_ranks

__all__ = [
    "DistContext", "PeerError", "init_from_env", "shutdown", "session", "shard_bounds", "shard_prompts",
    "check_divisible", "step_guard", "stopped_ranks", "global_mean_scale", "derive_seed", "prompt_seed", "wrap_model",
    "unwrap_model", "reduce_metrics", "all_reduce_", "gather_objects", "all_gather_objects", "broadcast_object", "barrier",
]
