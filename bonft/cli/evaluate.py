"""``bonft eval CHECKPOINT``: best-of-k / pass@k curves with CIs of a checkpoint (or a model directory) on held-out prompts."""
from __future__ import annotations

import argparse
from pathlib import Path

from bonft._core.checks import check_fraction, check_int, check_positive
from bonft.cli.options import check_output_paths, check_seed, make_plot_dir, parse_list, write_json_atomic

HELP = "evaluate a checkpoint: pass@k and best-of-k (per verifier) with CIs on held-out prompts"
DESCRIPTION = (
    "Sample --n responses for each held-out prompt of the checkpoint's task (the split its run used), "
    "score them with the evaluation verifier and the training verifier (and a built-in task's proxy), and print pass@k "
    "under the evaluation verifier and verifier-selected best-of-k with bootstrap CIs, plus length and diversity. "
    "CHECKPOINT is a checkpoint directory, a run directory (its newest checkpoint), a plain transformers "
    "model directory (config.json, weights and tokenizer saved with save_pretrained; its task, verifier and "
    "eval_verifier then come from --recipe and --set) or a LoRA adapter directory (adapter_config.json; its base "
    "model is loaded from the directory the adapter records; needs pip install 'bonft[peft]')."
)

def add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("checkpoint", help="checkpoint directory (CKPT/model, CKPT/tokenizer), run directory, transformers model "
                                      "directory or LoRA adapter directory")
    p.add_argument("--recipe", default=None, metavar="RECIPE.toml",
                   help="read the task, verifier and eval_verifier keys from this recipe (default: the checkpoint's config.toml; "
                        "its model keys are ignored: the model is CHECKPOINT's)")
    p.add_argument("--n", type=int, default=64, help="samples per prompt (default: 64)")
    p.add_argument("--n-prompts", type=int, default=0, help="use the first this many held-out prompts (default: all)")
    p.add_argument("--seed", type=int, default=0, help="sampling seed (default: 0)")
    p.add_argument("--top-p", type=float, default=None,
                   help="nucleus of the samples, as served (default: the run's eval_top_p, else 1 = none)")
    p.add_argument("--top-k", type=int, default=None,
                   help="most likely tokens kept, before --top-p, as served (default: the run's eval_top_k, else 0 = all)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="KEY=VALUE",
                   help="override a key of the checkpoint's config, e.g. --set heldout_prompts=500 (repeatable)")


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_common(p)
    p.add_argument("--ks", default="1,4,16,32", help="comma-separated k values, each <= --n (default: 1,4,16,32)")
    p.add_argument("--temperature", type=float, default=1.0, help="sampling temperature (default: 1.0)")
    p.add_argument("--json", metavar="OUT.json", default=None, help="also write the report as JSON")
    p.add_argument("--plot-dir", metavar="DIR", default=None, help="also write eval_curves.png into this directory")


def load_for_eval(args: argparse.Namespace, *, n: int, ks: list[int], temperature: float):
    """The checkpoint's config (its config.toml, else defaults) pointed at the checkpoint, and the Run."""
    from bonft.trainer.checkpoint import resolve_checkpoint  # loads torch: only when a command runs
    from bonft.trainer.config import (  # loads torch: only when a command runs
        FIELDS,
        MODEL_KEYS,
        TRAINING_MODEL_KEYS,
        apply_overrides,
        from_dict,
        read_recipe,
    )
    from bonft.trainer.run import build_run  # loads torch: only when a command runs

    path = Path(args.checkpoint)
    plain = (path / "config.json").is_file() or (path / "adapter_config.json").is_file()
    if plain and not (path / "model").is_dir():  # a plain transformers model directory, or a LoRA adapter directory
        ckpt, base = path, {}
    else:
        ckpt = resolve_checkpoint(args.checkpoint)
        base = read_recipe(ckpt / "config.toml") if (ckpt / "config.toml").is_file() else {}
    if args.recipe is not None:
        base = read_recipe(args.recipe)
    base = {key: v for key, v in base.items() if key not in (*MODEL_KEYS, *TRAINING_MODEL_KEYS)}  # the model is the checkpoint's
    check_eval_overrides(args.overrides)
    values = apply_overrides(base, list(args.overrides))
    heldout = values.get("heldout_prompts", FIELDS["heldout_prompts"].default)
    if args.n_prompts > heldout:
        raise ValueError(f"--n-prompts must be <= the held-out prompts of the split ({heldout}), got {args.n_prompts}; "
                         f"--set heldout_prompts={args.n_prompts} draws more")
    values.update(start_from=str(ckpt), eval_samples=n, eval_ks=ks, eval_temperature=temperature,
                  eval_prompts=args.n_prompts, seed=values.get("seed", FIELDS["seed"].default))
    if args.top_p is not None:
        values["eval_top_p"] = check_fraction("--top-p", args.top_p, open_low=True)
    if args.top_k is not None:
        values["eval_top_k"] = check_int("--top-k", args.top_k, min=0)
    cfg = from_dict(values)
    return ckpt, cfg, build_run(cfg, training=False)


# the config keys a --set can change in bonft eval / sample: which prompts (the task and its split), how they are
# scored, how long and on what device the responses are drawn, and the intervals; the rest only shape training
EVAL_KEYS = ("task", "task_params", "prompts_file", "train_prompts", "heldout_prompts", "verifier", "verifier_params",
             "eval_verifier", "eval_verifier_params", "seed", "device", "max_new_tokens", "confidence", "n_boot")
_FLAG_KEYS = {"eval_samples": "--n", "eval_ks": "--ks", "eval_temperature": "--temperature(s)", "eval_prompts": "--n-prompts",
              "eval_top_p": "--top-p", "eval_top_k": "--top-k",
              "threads": "the command itself (one thread)"}


def check_eval_overrides(overrides) -> None:
    """Each ``--set KEY=VALUE`` of bonft eval / sample must name a key that takes effect there (:data:`EVAL_KEYS`)."""
    from bonft.trainer.config import current_key  # loads torch: only when a command runs

    for item in overrides:
        if "=" not in item:
            continue  # apply_overrides names the missing '='
        key = current_key(item.split("=", 1)[0].strip(), "--set ")
        table = key.partition(".")[0]
        if table in EVAL_KEYS:
            continue
        if key in _FLAG_KEYS:
            raise ValueError(f"--set {key} has no effect here: {_FLAG_KEYS[key]} sets it, got --set {item}")
        raise ValueError(f"--set {key} cannot take effect when sampling a checkpoint (it shapes training only); the keys "
                         f"that do are {', '.join(EVAL_KEYS)}; got --set {item}")


def announce(r, *, n: int, temperatures: list[float]) -> None:
    """One line on stderr before the sampling starts: what is drawn, so a long run is not silent."""
    import sys

    held = len(r.eval[: r.cfg.eval_prompts or len(r.eval)])
    temps = ", ".join(f"{t:g}" for t in temperatures)
    print(f"sampling {n} responses for each of {held} held-out prompts at temperature {temps} "
          f"({n * held * len(temperatures):,} samples)...", file=sys.stderr, flush=True)


def run(args: argparse.Namespace) -> int:
    import torch

    from bonft.trainer.evaluation import evaluate_run  # loads torch: only when a command runs

    check_output_paths(args)  # before the sampling: a wrong --json or --plot-dir found at the end wastes it
    n = check_int("--n", args.n, min=1)
    check_seed("--seed", args.seed)
    ks = parse_list("--ks", args.ks)
    if max(ks) > n:
        raise ValueError(f"--ks must be <= --n (n={n}), got --ks={args.ks}")
    temperature = check_positive("--temperature", args.temperature)
    torch.set_num_threads(1)  # tiny models: one thread is fastest
    ckpt, cfg, r = load_for_eval(args, n=n, ks=ks, temperature=temperature)
    announce(r, n=n, temperatures=[temperature])
    rep = evaluate_run(r, step=-1) if args.seed == 0 else _eval_seeded(r, args.seed)
    print(f"{ckpt}\n{rep.table()}")
    if args.json:
        write_json_atomic(args.json, {"checkpoint": str(ckpt), **rep.to_dict()})
    if args.plot_dir:
        from bonft.viz import plot_evaluations

        out = Path(make_plot_dir(args.plot_dir)) / "eval_curves.png"
        print(f"wrote {plot_evaluations([rep.to_dict()], out, title=str(ckpt))}")
    return 0


def _eval_seeded(r, seed: int):
    from dataclasses import replace

    from bonft.trainer.evaluation import evaluate_run  # loads torch: only when a command runs

    r.cfg = replace(r.cfg, seed=seed)
    return evaluate_run(r, step=-1)
