"""What a rank reports when a peer stops in the middle of a training step (see :func:`step_guard`)."""
from __future__ import annotations

import contextlib
import time
import warnings
from typing import Any, Iterator

from torch.distributed import distributed_c10d

from bonft.trainer.checkpoint import CheckpointError, latest_checkpoint
from bonft.trainer.distributed.group import DistContext, PeerError


def _default_store() -> Any:
    return distributed_c10d._get_default_store()


def stopped_ranks(ctx: DistContext, *, tag: str, wait_s: float | None = None) -> list[int] | None:
    """After a failed collective: the ranks that did not answer a roll call on the rendezvous store.

    Every surviving rank writes ``bonft/alive/TAG/RANK`` and waits up to ``wait_s``
    (default ``min(timeout_s, 5)``) for the others' keys. Returns the ranks whose
    key never came (``[]``: every rank is alive, so the failure was not a lost
    peer), or None when the store itself does not answer (its host stopped:
    rank 0 when bonft served the store, the launcher under torchrun).
    """
    wait_s = min(ctx.timeout_s, 5.0) if wait_s is None else wait_s
    keys = [f"bonft/alive/{tag}/{r}" for r in range(ctx.world_size)]
    try:
        store = _default_store()
        store.set(keys[ctx.rank], "1")
        deadline = time.monotonic() + wait_s
        while True:
            missing = [r for r, k in enumerate(keys) if not store.check([k])]
            if not missing or time.monotonic() > deadline:
                return missing
            time.sleep(0.05)
    except Exception:  # noqa: BLE001 - a dead store host shows as any of several errors
        return None


def _last_checkpoint_note(run_dir: Any) -> str:
    if run_dir is None:
        return ""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ckpt = latest_checkpoint(run_dir)
    except CheckpointError as e:
        return f" No intact checkpoint: {e}."
    if ckpt is None:
        return f" No checkpoint was written yet in {run_dir}; restart the run."
    return (f" The last checkpoint {ckpt} is intact (checked against its manifest); restart every rank with "
            f"--resume to continue from it.")


@contextlib.contextmanager
def step_guard(ctx: DistContext, *, step: int, run_dir: Any = None, evaluation: bool = False) -> Iterator[None]:
    """Around one training step (or, ``evaluation=True``, the evaluation of the weights of ``step``): a peer lost
    in it becomes a :class:`PeerError` saying what happened.

    A rank that dies during a step surfaces on the others as a communication
    error, often from inside ``backward()`` (DDP's gradient all-reduce). On any
    ``RuntimeError`` here the survivors hold a roll call (:func:`stopped_ranks`);
    when a rank is missing the error names it, the step (1-based, as in
    metrics.jsonl) and the newest checkpoint of ``run_dir``, verified intact.
    When every rank answers, the original error is re-raised unchanged. One process: no-op.
    """
    if not ctx.enabled or ctx.world_size == 1:
        yield
        return
    try:
        yield
    except RuntimeError as e:
        gone = stopped_ranks(ctx, tag=f"{'eval' if evaluation else 'step'}-{step}")
        if gone == []:
            raise
        who = (f"rank {', '.join(map(str, gone))} of {ctx.world_size}" if gone else
               f"rank 0 of {ctx.world_size} (or the launcher: the rendezvous store they serve no longer answers)")
        during = f"the evaluation of step {step}" if evaluation else f"training step {step}"
        raise PeerError(f"{who} stopped during {during}; rank {ctx.rank} noticed it and stops too."
                        f"{_last_checkpoint_note(run_dir)} Cause: "
                        f"{str(e).strip().splitlines()[0] if str(e).strip() else type(e).__name__}") from e
