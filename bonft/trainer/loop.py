"""The trainer: an optional supervised warm start, then RL on any best-of-N-aware objective.

One run is a sequence of global optimizer steps ``0 .. warm_start_steps + rl_steps - 1`` in two stages::

    for stage in (warm start, RL):              # each stage starts with a fresh optimizer
        for step in stage:
            set lr; run the step (warm start: NLL of references;
                                  RL: sample n per prompt -> score -> credit -> loss -> backward)
            check loss and gradient are finite  (before anything changes the weights)
            clip; optimizer step; log; evaluate when due; save when due

Everything random in a step is drawn from seeds derived from ``(seed, step, rank)``
(each prompt's samples from ``(seed, step, global slot of the prompt)``), so a run
resumed from any checkpoint ends with the same weights as an uninterrupted one (the
optimizer state and the RNG states are in the checkpoint). A checkpoint labelled
``step-S`` always holds the weights after exactly S steps; an RL step with
``updates_per_batch = U`` is U optimizer updates on one sampled batch, each after the
finite check (a checkpoint is never written between them).

Under ``torchrun`` (see docs/scaling.md and :mod:`bonft.trainer.distributed`) the
trainer joins the process group, wraps the model in DDP and gives each rank a
contiguous block of whole prompts of the same global batch (a prompt's n
samples never leave its rank). Each prompt samples from a seed of its global
slot, losses use ``reduction="sum"`` times ``W / B`` (DDP averages gradients
over W ranks), logged numbers are reduced over ranks, and evaluation pools are
gathered on rank 0: W processes end with the weights one process ends with.
Only rank 0 writes; every rank resumes from the checkpoint rank 0 picks.

Caution: the RL stage optimises what the training verifier rewards. A proxy or
a user verifier that can be gamed (length, format, keywords) will be gamed;
compare best-of-k under the verifier with pass@k under true rewards (the
evaluation prints both). Verifiers that execute model-written code must run it
in a sandbox (see :mod:`bonft.verifiers`) and, better, in a disposable VM.
"""
from __future__ import annotations

import contextlib
import dataclasses
import json
import math
import os
import shutil
import warnings
from pathlib import Path
from typing import Iterator

import torch
from tqdm.auto import tqdm

from bonft._core.jsonl import decode_utf8, parse_object, replace_text
from bonft.trainer import steps  # steps.sft_step / steps.rl_step are looked up at each step (tests replace them)
from bonft.trainer.adapters import AdapterOff, is_adapter_model
from bonft.trainer.checkpoint import (
    CheckpointError,
    latest_checkpoint,
    list_checkpoints,
    load_state,
    prune_checkpoints,
    quiet_transformers,
    recover_checkpoints,
    save_checkpoint,
    save_model,
    set_rng_state,
)
from bonft.trainer.config import TrainConfig, load_config, resume_changes, to_toml
from bonft.trainer.distributed import (
    DistContext,
    all_gather_objects,
    barrier,
    broadcast_object,
    check_divisible,
    init_from_env,
    shutdown,
    step_guard,
    unwrap_model,
    wrap_model,
)
from bonft.trainer.evaluation import HELDOUT_SAMPLES, evaluate_run
from bonft.trainer.measure import Stopwatch
from bonft.trainer.memory import keep_freed_memory
from bonft.trainer.metrics import GRAD_CLIPPED, GRAD_NORM
from bonft.trainer.models import load_model, reload_policy
from bonft.trainer.run import Run, Stream, build_run, lr_at, make_optimizer
from bonft.trainer.rundir import RunDirBusy, WriteFailed, is_write_error, run_lock, write_failed
from bonft.trainer.zero_credit import ZeroCreditWatch


class NonFiniteStep(ValueError):
    """A step's loss or gradient is NaN or infinite; raised before the optimizer could apply it."""


def train(cfg: TrainConfig, *, resume: bool = False, progress: bool = True) -> dict:
    """Run (or resume) a training run; returns the summary also written to ``RUN/summary.json``.

    Ctrl-C writes a checkpoint of the last completed step before re-raising ``KeyboardInterrupt``.
    ``resume`` on a ``run_dir`` that does not exist is a ``ValueError`` (a typo, nothing to continue); on one
    whose run stopped before its first checkpoint it starts that run again from step 0, with a warning, and
    keeps the metrics lines it had in ``metrics.stopped.jsonl``; on an existing folder that holds no run it
    starts a new one, with a warning.
    A non-finite loss or gradient stops the run with ``ValueError`` before the optimizer step;
    the checkpoint then written holds the weights of the last good step (the failed step is not applied).

    The run holds the lock of its run directory throughout (:mod:`bonft.trainer.rundir`): a second
    run on the same directory raises :class:`~bonft.trainer.rundir.RunDirBusy` at once. A file that
    cannot be written (a full disk) stops the run with :class:`~bonft.trainer.rundir.WriteFailed`,
    one line naming the path, the space and the last verified checkpoint to resume from.

    Process-wide settings: torch's intra-op threads (``cfg.threads``) and, on glibc, the allocator's
    mmap threshold (:func:`bonft.trainer.memory.keep_freed_memory`: freed tensors are reused, not
    page-faulted in again at every step; results are unchanged).
    """
    if not isinstance(cfg, TrainConfig):
        raise TypeError(f"cfg must be a TrainConfig, got {type(cfg).__name__}")
    if Path(cfg.run_dir).exists() and not Path(cfg.run_dir).is_dir():
        raise ValueError(f"run_dir {cfg.run_dir!r} is a file, not a directory; choose another --output (or run_dir)")
    if resume and not Path(cfg.run_dir).is_dir():
        raise ValueError(f"--resume: run_dir {cfg.run_dir!r} does not exist; check --output (or run_dir), "
                         f"or drop --resume to start a new run")
    torch.set_num_threads(cfg.threads)
    keep_freed_memory()  # a step's large tensors come back from the heap, not as fresh page-faulting mmaps
    owns_group = not torch.distributed.is_initialized()
    ctx = init_from_env(device=cfg.device)  # a process group under torchrun, else one process
    _check_same_config(cfg, ctx)
    with _locked(Path(cfg.run_dir), ctx):  # before the set-up: a busy directory is refused at once
        run = build_run(cfg)  # joins nothing new: init_from_env returns the group joined above
        _check_shares(cfg, run.world)
        return _train(run, resume, progress, owns_group)


def _check_same_config(cfg: TrainConfig, ctx: DistContext) -> None:
    """Every rank trains with rank 0's configuration: ranks started with different recipes or ``--set`` options
    (a seed, a learning rate) would train different models under one name while rank 0 saves its own."""
    if ctx.world_size == 1:
        return
    every = all_gather_objects(dataclasses.asdict(cfg), ctx)  # the same list on every rank: all raise, or none
    for r, other in enumerate(every[1:], 1):
        diff = [k for k in every[0] if every[0][k] != other.get(k)]
        if diff:
            shown = "; ".join(f"{k} = {every[0][k]!r} on rank 0, {other.get(k)!r} on rank {r}" for k in diff[:5])
            raise ValueError(f"every rank must run the same configuration, but rank {r} of {ctx.world_size} differs from "
                             f"rank 0 in {len(diff)} key(s): {shown}; start every rank with the same recipe and --set "
                             "options")


def _train(run: Run, resume: bool, progress: bool, owns_group: bool) -> dict:
    """The stages and the step loop of :func:`train`, inside the run directory's lock."""
    cfg = run.cfg
    start, state, evaluated = _restore(run, resume)
    run.model = wrap_model(run.model, run.ctx)  # several ranks: DDP (copies rank 0's weights to all)
    bar = tqdm(total=cfg.total_steps, initial=start, desc=cfg.name, disable=not (progress and run.is_main), dynamic_ncols=True)
    s = start  # optimizer steps completed = the weights' step label
    watch = ZeroCreditWatch(cfg.rl_steps, cfg.objective, cfg.correct_threshold, k=cfg.k)  # warns once if RL starts with no signal
    rec = None
    try:
        if _eval_due(cfg, start) and not evaluated:  # a fresh run's first one, or one a resumed run's interrupt cut short
            _evaluate(run, start, progress)
        for stage, end in (("sft", cfg.warm_start_steps), ("rl", cfg.total_steps)):
            if s >= end:
                continue
            _enter_stage(run, stage, state if s == start else None)
            for step in range(s, end):
                with step_guard(run.ctx, step=step + 1, run_dir=run.out):  # a peer lost mid-step -> PeerError
                    rec = _one_step(run, stage, step)
                s = step + 1  # the weights are now those of step s
                run.partial_step = False
                if stage == "rl" and run.is_main:
                    watch.update(step - cfg.warm_start_steps, rec)
                if _log_due(cfg, s):
                    _log(run, rec)
                bar.update(1)
                bar.set_postfix({key: f"{rec[key]:.3g}" for key in ("loss", "reward", "k") if key in rec}, refresh=False)
                if _eval_due(cfg, s):
                    _evaluate(run, s, progress)
                if s == cfg.total_steps or s == cfg.warm_start_steps or (cfg.save_every and s % cfg.save_every == 0):
                    _save(run, s)
    except NonFiniteStep as err:  # nothing was applied: the weights are still those of step s
        bar.close()
        if run.partial_step:  # a later update of a reused batch: the step's first updates are in the weights
            raise ValueError(f"{err}; the update was not applied, but earlier updates of the same batch were: "
                             f"no checkpoint was written, the last one on disk holds the last whole step") from None
        if s > start and _finite_weights(run):
            raise ValueError(f"{err}; the update was not applied, {_save(run, s)} holds the last good weights") from None
        raise ValueError(f"{err}; the update was not applied, no checkpoint was written or changed") from None
    except WriteFailed:
        bar.close()
        raise
    except KeyboardInterrupt:
        bar.close()
        if s > start and not run.updating and not run.partial_step:  # half-updated weights, or part of a step's updates: do not save
            if rec is not None and rec["step"] == s and _log_due(cfg, s):
                _log_missing(run, rec)  # the interrupt came between the step and its metrics line
            _save(run, s)
            if run.is_main:
                print(f"\ninterrupted: checkpoint of step {s} written to {run.out}/checkpoints; continue with --resume")
        raise
    bar.close()
    summary = _finish(run, progress)
    if owns_group:
        run.model = unwrap_model(run.model)  # no DDP wrapper may outlive the group (see shutdown)
        shutdown(run.ctx)
    return summary


# ----------------------------------------------------------------------------- one step
def _one_step(run: Run, stage: str, s: int) -> dict:
    """Step ``s``: lr, the stage's step (through backward), finite check, clip, optimizer step; its metrics."""
    cfg, clock = run.cfg, Stopwatch(run.device)
    lr = lr_at(cfg, s)
    for g in run.optimizer.param_groups:
        g["lr"] = lr
    torch.manual_seed(Stream.STEP.seed(cfg.seed, step=s, rank=run.rank))  # anything else random in the step
    run.model.train()
    run.optimizer.zero_grad(set_to_none=True)
    run.apply_update = lambda loss, what="": _apply_update(run, s, lr, loss, clock, what)  # reused batches (rl_step)
    try:
        with clock("step"):
            rec = (steps.sft_step if stage == "sft" else steps.rl_step)(run, s, clock)  # gradients: the global-batch mean (DDP)
            U = cfg.updates_per_batch if stage == "rl" else 1
            last = f" (update {U} of {U} on its sampled batch)" if U > 1 else ""
            grad_norm, clipped = _apply_update(run, s, lr, rec["loss"], clock, last)
    finally:
        run.apply_update = None
    run.model.eval()  # run.partial_step stays set until the loop counts the step
    times = clock.metrics()
    rec.update({"kind": "train", "stage": stage, "step": s + 1, "lr": lr, GRAD_NORM: grad_norm,
                GRAD_CLIPPED: int(clipped), **times})
    if stage == "rl":
        rec["samples_per_s"] = cfg.prompts_per_step * cfg.n / times["time/step"]
    return rec


def _apply_update(run: Run, s: int, lr: float, loss: float, clock: Stopwatch, what: str = "") -> tuple[float, bool]:
    """Check the loss and gradient are finite (before anything changes the weights), clip, ``optimizer.step()``.

    -> (gradient norm before clipping, whether it was clipped). ``what`` names an update of a reused
    batch in the error (``rl_step`` calls this between the updates of one sampled batch).
    """
    cfg = run.cfg
    with clock("optimizer"):
        grads = [p.grad for p in run.module.parameters() if p.grad is not None]
        norm = torch.nn.utils.get_total_norm(grads)  # one device sync per update, for the check
        grad_norm = float(norm)
        if not (math.isfinite(loss) and math.isfinite(grad_norm)):
            run.optimizer.zero_grad(set_to_none=True)
            head = f"step {s + 1}{what} has a non-finite {'loss' if not math.isfinite(loss) else 'gradient'} " \
                   f"(loss {loss}, gradient norm {grad_norm})"
            broken = [name for name, p in run.module.named_parameters() if not bool(torch.isfinite(p).all())]
            if broken:  # no update has made them so (each is checked first): the model was loaded that way
                raise NonFiniteStep(f"{head}: the model's weights already hold NaN or inf before this update, in "
                                    f"{len(broken)} tensor(s) ({', '.join(broken[:3])}{', ...' if len(broken) > 3 else ''}); "
                                    f"the starting model is broken (start_from, or the checkpoint resumed)")
            raise NonFiniteStep(f"{head}; lower lr (now {lr:.3g}) or check the verifier")
        clipped = 0 < cfg.clip_grad_norm < grad_norm
        if clipped:
            torch.nn.utils.clip_grads_with_norm_(grads, cfg.clip_grad_norm, norm)
        run.updating = True  # an interrupt inside optimizer.step() leaves half-updated weights
        run.optimizer.step()
        run.partial_step = True  # the weights are past step s until the loop counts the step (then cleared)
        run.updating = False
    return grad_norm, clipped


# ----------------------------------------------------------------------------- setup and restore
def _check_shares(cfg: TrainConfig, world: int) -> None:
    """Whole prompts, equal shares, equal micro-batches on every rank."""
    if cfg.rl_steps:
        share = check_divisible("prompts_per_step", cfg.prompts_per_step, world)
        if share % cfg.grad_accum:
            raise ValueError(f"prompts_per_step must be divisible by world_size * grad_accum (world_size={world}, "
                             f"grad_accum={cfg.grad_accum}), got prompts_per_step={cfg.prompts_per_step}")
    if cfg.warm_start_steps:
        check_divisible("warm_start_batch_size", cfg.warm_start_batch_size, world)


STOPPED_METRICS = "metrics.stopped.jsonl"  # the lines of a run that stopped before its first checkpoint
# the stems of the files a run replaces whole (bonft._core.jsonl.replacing writes ".NAME.<random>.tmp" beside them)
RUN_FILES = ("config", "metrics", "summary", "curves", "heldout_samples")


def _restore(run: Run, resume: bool) -> tuple[int, dict | None, bool]:
    """Rank 0 picks the checkpoint (or refuses); every rank loads it. Writes config.toml, trims metrics.jsonl.

    -> (step, the checkpoint's state or None, whether metrics.jsonl holds an evaluation of that step).
    Both files are replaced atomically: a kill at any moment leaves the old file or the new one.
    """
    out, ckpt, problem, rows, kept, evaluated, stopped = run.out, None, None, [], [], False, False
    path = out / "metrics.jsonl"
    if run.is_main:
        try:  # a checkpoint error goes to every rank, so none waits out the process-group timeout
            recover_checkpoints(out)  # a re-save cut between its renames, unfinished folders
            for leftover in out.glob(".*.tmp"):  # a kill during an atomic write leaves its temporary file
                if leftover.is_file() and leftover.name.split(".")[1] in RUN_FILES:
                    leftover.unlink(missing_ok=True)
            ckpt = latest_checkpoint(out) if resume else None
            changed, step_sizes = resume_changes(_saved_config(ckpt), run.cfg) if ckpt is not None else ([], [])
            if step_sizes and not changed:
                warnings.warn(f"--resume continues {out} from {ckpt.name} with changed step sizes: "
                              + "; ".join(step_sizes) + " (the steps from the checkpoint on use them)", stacklevel=2)
            total = run.cfg.warm_start_steps + run.cfg.rl_steps
            if ckpt is not None and not changed and _step_of(ckpt) > total:
                changed = [f"rl_steps = {run.cfg.rl_steps} ends the run at step {total}, but its newest checkpoint "
                           f"{ckpt.name} is at step {_step_of(ckpt)}"]
            if changed:
                problem = (f"--resume continues the run in {out} with its own settings, but the recipe changes "
                           f"{len(changed)} key(s) that shape the training: " + "; ".join(changed) + ". Resume with "
                           f"the run's recipe ({out / 'config.toml'}), or start a new run from this checkpoint: "
                           f"start_from = {str(ckpt)!r} and another --output")
            rows = read_metrics(path) if resume and path.exists() else []
            if ckpt is not None:  # drop lines of work after the checkpoint (it is redone)
                kept = [(ln, row) for ln, row in rows if row["step"] <= _step_of(ckpt)]
                evaluated = any(row.get("kind") == "eval" and row["step"] == _step_of(ckpt) for _, row in kept)
        except (CheckpointError, ValueError, OSError) as e:  # to every rank, as the problems above
            problem = str(e)
        if resume and ckpt is None and not problem and (out / "summary.json").exists():
            problem = f"--resume: {out} holds a finished run without checkpoints"
        elif resume and ckpt is None and not problem and rows:
            stopped = True  # a run stopped before its first checkpoint: it starts again, its lines kept aside
        elif resume and ckpt is None and not problem:  # an existing folder without a run in it
            warnings.warn(f"--resume: {out} holds no run to continue (no checkpoint, no metrics line): it starts a "
                          f"new run from step 0", stacklevel=3)
        elif not resume and list_checkpoints(out):  # unfinished checkpoint folders were removed above
            problem = f"run_dir {str(out)!r} already holds checkpoints; pass --resume or choose another --output"
    ckpt, problem, evaluated = broadcast_object((ckpt, problem, evaluated), run.ctx)
    if problem:
        raise ValueError(problem)
    start, state = 0, None
    if ckpt is not None:
        state = load_state(ckpt)
        start = state["step"]
        with quiet_transformers():
            run.model, run.tokenizer = reload_policy(run.model, ckpt, device=run.device)  # an adapter run: its weights only
        set_rng_state(state["rng"])
    if run.is_main and stopped:
        aside = out / STOPPED_METRICS
        with _writing(run, aside, "the stopped run's metrics to"):
            os.replace(path, aside)
        warnings.warn(f"--resume: {out} has no checkpoint to continue from (its run stopped before the first one): "
                      f"it starts again from step 0; the {len(rows)} metrics line(s) it had are kept in {aside}",
                      stacklevel=3)
    if run.is_main:
        with _writing(run, out / "config.toml", "the configuration"):
            replace_text(out / "config.toml", to_toml(run.cfg))
        with _writing(run, path, "the metrics file"):
            replace_text(path, "".join(ln + "\n" for ln, _ in kept))
    return start, state, evaluated


def read_metrics(path: Path) -> list[tuple[str, dict]]:
    """The lines of a run's ``metrics.jsonl`` with their records, in order.

    A cut-off last line (no newline at its end and not valid JSON: the run was stopped while writing
    it) is dropped with a warning naming the file and the line; any other line that is not a JSON
    object with a ``step`` is a ``ValueError`` naming the file and the line.
    """
    name = str(path)
    pieces = decode_utf8(path.read_bytes(), name).split("\n")  # the last piece: "" after a final newline
    rows = []
    for no, ln in enumerate(pieces, 1):
        if not ln.strip():
            continue
        try:
            row = parse_object(ln, name, no, "a metrics record")
        except ValueError as e:
            if no == len(pieces):
                detail = str(e).removeprefix(f"{name} line {no}: ")
                warnings.warn(f"{name} line {no}: dropped a cut-off last line (no newline at its end, {detail}); "
                              f"it was being written when the run stopped", stacklevel=3)
                continue
            raise ValueError(f"{e}; repair or delete that line of the metrics file and rerun with --resume") from None
        if not isinstance(row.get("step"), int):
            raise ValueError(f"{name} line {no}: a metrics record must have an integer 'step', got "
                             f"{row.get('step')!r}; repair or delete that line and rerun with --resume")
        rows.append((ln, row))
    return rows


def _step_of(ckpt: Path) -> int:
    """The optimizer steps behind a checkpoint, from its name (``step-00000181``)."""
    return int(ckpt.name.rsplit("-", 1)[1])


def _saved_config(ckpt: Path) -> TrainConfig:
    """The configuration a checkpoint was written with (its config.toml)."""
    try:
        return load_config(ckpt / "config.toml")
    except (ValueError, OSError) as e:
        raise ValueError(f"--resume: cannot read the run's configuration {ckpt / 'config.toml'}: {e}") from None


def _enter_stage(run: Run, stage: str, state: dict | None) -> None:
    """A fresh optimizer (its saved state when resuming inside the stage); RL with an anchor: load it."""
    run.optimizer = make_optimizer(run, stage)
    if state is not None and state["extra"].get("stage") == stage:
        run.optimizer.load_state_dict(state["optimizer"])
    if stage == "rl" and run.cfg.anchor_weight > 0 and is_adapter_model(run.module):
        run.anchor_model = AdapterOff(run.module)  # the base model, the adapter switched off: no second model
    elif stage == "rl" and run.cfg.anchor_weight > 0:  # the anchor = the policy at the start of RL, kept on disk
        ref_dir = run.out / "rl_start"
        starts = state is None or state["extra"].get("stage") != "rl"  # RL begins here (not resumed inside it)
        if run.is_main:
            _tidy_anchor(ref_dir)
            if starts:  # written anew: a folder left by an earlier run in this directory is not this run's anchor
                with _writing(run, ref_dir, "the anchor model", need=_weight_bytes(run)):
                    save_model(run.module, run.tokenizer, ref_dir)
        barrier(run.ctx, what=f"waiting for rank 0 to write {ref_dir}")
        if not (ref_dir / "model").is_dir():
            raise ValueError(f"--resume: the run's KL anchor {ref_dir} (the policy at the start of RL, read while "
                             f"anchor_weight > 0) is missing; it cannot be rebuilt from a later checkpoint: restore the "
                             f"folder, or start a new run")
        with quiet_transformers():
            run.anchor_model, _ = load_model(ref_dir, device=run.device)
        run.anchor_model.requires_grad_(False)


def _tidy_anchor(ref_dir: Path) -> None:
    """Leftovers of a kill while the anchor was written (:func:`save_model`'s temporary and moved-aside folders)."""
    for tmp in ref_dir.parent.glob(f".{ref_dir.name}.tmp-*"):
        shutil.rmtree(tmp, ignore_errors=True)
    for old in sorted(ref_dir.parent.glob(f".{ref_dir.name}.old-*")):
        if not ref_dir.exists():  # cut between the two renames of a rewrite: the previous copy goes back
            os.replace(old, ref_dir)
        else:
            shutil.rmtree(old, ignore_errors=True)


# ----------------------------------------------------------------------------- log, evaluate, save
def _log_due(cfg: TrainConfig, s: int) -> bool:
    """Step s's metrics line is written: every log_every steps, at the end of the warm start and of the run."""
    return s % cfg.log_every == 0 or s == cfg.total_steps or s == cfg.warm_start_steps


def _log(run: Run, rec: dict) -> None:
    """One line of metrics.jsonl (rank 0), whole or not at all.

    A write that fails part-way (a full disk) takes its part back; Ctrl-C during the write completes
    the line (the step is done and its checkpoint is written next), and keeps a line written whole.
    """
    if not run.is_main:
        return
    path, data = run.out / "metrics.jsonl", (json.dumps(rec) + "\n").encode()
    with _writing(run, path, "a metrics line to", need=len(data)):
        fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            size = os.fstat(fd).st_size
            try:
                _write_all(fd, data)
            except KeyboardInterrupt:
                done = os.fstat(fd).st_size - size
                try:
                    _write_all(fd, data[done:])
                except BaseException:  # a full disk, a second Ctrl-C: no half line
                    os.ftruncate(fd, size)
                    raise
                raise
            except BaseException:
                if os.fstat(fd).st_size - size != len(data):
                    os.ftruncate(fd, size)  # no half line: resuming reads every line as JSON
                raise
        finally:
            os.close(fd)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _log_missing(run: Run, rec: dict) -> None:
    """Write step ``rec['step']``'s line unless metrics.jsonl already ends with it (or a later one)."""
    if not run.is_main:
        return
    path = run.out / "metrics.jsonl"
    try:
        with open(path, "rb") as fh:
            fh.seek(max(0, os.fstat(fh.fileno()).st_size - (1 << 16)))
            last = fh.read().rstrip(b"\n").rsplit(b"\n", 1)[-1]
        logged = json.loads(last)["step"] >= rec["step"] if last else False
    except (OSError, ValueError, KeyError, TypeError):
        logged = False
    if not logged:
        _log(run, rec)


def _eval_due(cfg: TrainConfig, s: int) -> bool:
    """Evaluate the weights of step s: at the end, before RL (eval_at_start), every eval_every RL steps.

    A run of no steps (``start_from`` with ``warm_start_steps = rl_steps = 0``) evaluates the starting policy.
    """
    if cfg.total_steps == 0:
        return s == 0
    if s == cfg.total_steps:
        return True
    if cfg.rl_steps == 0 or s < cfg.warm_start_steps:
        return False
    if s == cfg.warm_start_steps:
        return cfg.eval_at_start
    return bool(cfg.eval_every) and (s - cfg.warm_start_steps) % cfg.eval_every == 0


def _evaluate(run: Run, s: int, progress: bool) -> None:
    """Evaluate the weights of step s; the final one also writes its samples (``heldout_samples``, rank 0)."""
    final = s == run.cfg.total_steps and run.cfg.heldout_samples and run.is_main
    with step_guard(run.ctx, step=s, run_dir=run.out, evaluation=True):  # a peer lost while pools are gathered
        rep = evaluate_run(run, s, samples_to=run.out / HELDOUT_SAMPLES if final else None)  # the report is rank 0's
    if rep is not None:
        _log(run, {"kind": "eval", **rep.to_dict()})
        if progress:
            tqdm.write(f"[eval @ step {s}]\n{rep.table()}")


def _save(run: Run, s: int) -> str:
    """Checkpoint ``step-s``: the weights after s optimizer steps (rank 0 writes)."""
    if run.is_main:
        stage = "sft" if s == 0 or s - 1 < run.cfg.warm_start_steps else "rl"
        tmp = run.out / "checkpoints" / f"step-{s:08d}.tmp-{os.getpid()}"  # save_checkpoint's folder, removed on failure
        with _writing(run, run.out / "checkpoints" / f"step-{s:08d}", "the checkpoint", need=_checkpoint_bytes(run),
                      removed=tmp):
            save_checkpoint(run.out, step=s, model=run.module, tokenizer=run.tokenizer, optimizer=run.optimizer,
                            config_toml=to_toml(run.cfg), extra={"stage": stage}, keep=run.cfg.keep_checkpoints)
    return f"checkpoint step-{s:08d}"


def _weight_bytes(run: Run) -> int:
    return sum(p.numel() * p.element_size() for p in run.module.parameters())


def _checkpoint_bytes(run: Run) -> int:
    """About what a checkpoint takes: the weights and the optimizer's tensors (the tokenizer and the rest are small)."""
    state = run.optimizer.state.values() if run.optimizer is not None else ()
    return _weight_bytes(run) + sum(v.numel() * v.element_size() for st in state for v in st.values() if torch.is_tensor(v))


@contextlib.contextmanager
def _writing(run: Run, path: Path, what: str, *, need: int | None = None, removed: Path | None = None) -> Iterator[None]:
    """A write of the run: any failure (a full disk, a quota, a vanished directory) becomes one :class:`WriteFailed` line."""
    try:
        yield
    except BaseException as e:
        if not is_write_error(e):
            raise
        gone = removed if removed is not None and not removed.exists() else None
        raise write_failed(e, path=path, run_dir=run.out, what=what, need_bytes=need, removed=gone) from e


@contextlib.contextmanager
def _locked(run_dir: Path, ctx: DistContext) -> Iterator[None]:
    """Rank 0 holds the run directory's lock for the whole run; when it cannot, every rank fails at once."""
    with contextlib.ExitStack() as stack:
        problem: Exception | None = None
        if ctx.is_main:
            try:
                stack.enter_context(run_lock(run_dir))
            except (RunDirBusy, WriteFailed) as e:
                problem = e
        text = broadcast_object(None if problem is None else str(problem), ctx)
        if problem is not None:
            raise problem
        if text is not None:
            raise RunDirBusy(text)
        yield


def _finite_weights(run: Run) -> bool:
    return all(bool(torch.isfinite(p).all()) for p in run.module.parameters())


def _finish(run: Run, progress: bool) -> dict:
    """summary.json (every evaluation, including those before a resume) and the curves plot."""
    cfg = run.cfg
    summary = {"name": cfg.name, "steps": cfg.total_steps, "run_dir": str(run.out), "evaluations": []}
    if run.is_main:
        lines = (run.out / "metrics.jsonl").read_text().splitlines()
        summary["evaluations"] = evals = [json.loads(ln) for ln in lines if ln and '"kind": "eval"' in ln]
        text = json.dumps(summary, indent=1)
        with _writing(run, run.out / "summary.json", "the summary", need=len(text)):
            replace_text(run.out / "summary.json", text)
        prune_checkpoints(run.out, keep=cfg.keep_checkpoints, upto=cfg.total_steps)  # a kill before the last prune
        if cfg.plots and evals:
            from bonft.viz import plot_evaluations  # matplotlib: a heavy import, only when a plot is drawn

            with _writing(run, run.out / "curves.png", "the plot"):
                plot_evaluations(evals, run.out / "curves.png", title=cfg.name)
        if progress:
            print(f"{cfg.name}: {cfg.total_steps} steps done; metrics, checkpoints and summary.json in {run.out}")
    return summary
