"""``bonft plan``: choose a sampling temperature and N from a samples file, a model, or an exact outcome set."""
from __future__ import annotations

import argparse
import contextlib
import json
import os
from pathlib import Path

from bonft._core.checks import check_choice, check_int
from bonft.cli.options import add_duplicates_flag, check_sizes, parse_list, write_json_atomic
from bonft.cli.strategy_tables import VOTES, add_strategy_arguments, check_strategy_options
from bonft.cli.strategy_tables import run_plan as _run_strategies
from bonft.tasks import TASKS, exact_match_verifier, get_task, load_prompts_jsonl
from bonft.verifiers import load_verifier

HELP = "choose temperature and N: best-of-k value over a temperature x k grid, budgets, doubling gains"
DESCRIPTION = (
    "Measure the best-of-k value V_k(T) for every k <= n at each temperature of a grid, with bootstrap "
    "confidence intervals over prompts (paired across temperatures when the prompts are the same). "
    "Reports the best temperature at each k and those not significantly worse, the best (T, k) for a "
    "budget of samples or generated tokens per prompt, the gain of doubling N, and a fit of how the best "
    "temperature moves with k (a fit of this data, not a law). Input: --samples FILE.jsonl (with a "
    "temperature column), or --model DIR with --task/--prompts-file and --verifier (sampled and cached), "
    "or --exact FILE.json (a finite outcome set: logits or probs, scores, rewards)."
)

DEFAULT_TEMPERATURES = "0.4,0.7,1.0,1.3"
PLAIN_MAX_NEW_TOKENS = 32  # --max-new-tokens for a model directory that records none (not a bonft checkpoint)

def add_arguments(p: argparse.ArgumentParser) -> None:
    src = p.add_argument_group("input (one of)")
    src.add_argument("--samples", metavar="FILE.jsonl", help="samples file with a temperature column")
    src.add_argument("--model", metavar="DIR", help="bonft checkpoint or local transformers model directory to sample from")
    src.add_argument("--exact", metavar="FILE.json",
                     help='finite outcome set: {"logits" or "probs", "scores", "rewards", optional "lengths", "temperatures"}')
    m = p.add_argument_group("model mode")
    m.add_argument("--task", default=None, help="built-in task whose held-out prompts to use (e.g. ledger, restock)")
    m.add_argument("--prompts-file", metavar="FILE.jsonl", help="your prompts: JSONL with a 'prompt' (and 'answer') field")
    m.add_argument("--n-prompts", type=int, default=None,
                   help="prompts to sample: held-out prompts drawn from --task (default: 100), or the first this many "
                        "of --prompts-file (default: all)")
    m.add_argument("--verifier", default="exact",
                   help="exact, proxy (built-in task's imperfect verifier) or module:function (default: exact)")
    m.add_argument("--n", type=int, default=64, help="samples per prompt at each temperature (default: 64)")
    m.add_argument("--max-new-tokens", type=int, default=None,
                   help="longest response in tokens (default: a bonft checkpoint's or run's own max_new_tokens, "
                        f"else {PLAIN_MAX_NEW_TOKENS})")
    m.add_argument("--top-p", type=float, default=1.0, help="nucleus mass, 1 = none (default: 1.0)")
    m.add_argument("--top-k", type=int, default=0, help="keep the k most likely tokens, before --top-p; 0 = all (default: 0)")
    m.add_argument("--batch-size", type=int, default=None, help="rows per generation chunk (default: all)")
    m.add_argument("--cache", metavar="DIR", default=None,
                   help="cache of sampled pools, one samples JSONL per (model, prompts, verifier, T, n, seed)")
    m.add_argument("--device", default="cpu", help="cpu, cuda or auto (default: cpu)")
    f = p.add_argument_group("samples-file fields")
    f.add_argument("--prompt-field", default="prompt_id", help="default: prompt_id")
    f.add_argument("--score-field", default="score", help="default: score")
    f.add_argument("--reward-field", default="reward", help="default: reward")
    f.add_argument("--temperature-field", default=None,
                   help="default: temperature (a field named here must be on every line)")
    f.add_argument("--tokens-field", default="n_tokens", help="response length field, for --budget-tokens (default: n_tokens)")
    f.add_argument("--sample-field", default="sample",
                   help="sample index field, optional; identical samples with distinct indices are not repeats (default: sample)")
    add_duplicates_flag(f)
    p.add_argument("--temperatures", default=None,
                   help=f"comma-separated grid (default: all in the file; model mode {DEFAULT_TEMPERATURES})")
    p.add_argument("--max-k", type=int, default=None, help="largest k (default: the smallest pool; exact mode 64)")
    p.add_argument("--budget-samples", default=None, help="samples per prompt, comma-separated budgets, e.g. 16")
    p.add_argument("--budget-tokens", default=None, help="generated tokens per prompt, comma-separated budgets")
    p.add_argument("--min-gain", type=float, default=0.0, help="doubling N pays while its gain is significantly above this")
    p.add_argument("--confidence", type=float, default=0.95, help="confidence level (default: 0.95)")
    p.add_argument("--n-boot", type=int, default=2000, help="bootstrap replicates (default: 2000)")
    p.add_argument("--seed", type=int, default=0, help="bootstrap and sampling seed (default: 0)")
    p.add_argument("--json", metavar="OUT.json", default=None, help="write the full result as JSON")
    p.add_argument("--plot-dir", metavar="DIR", default=None, help="write plan_heatmap.png and plan_curves.png here")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bars while loading and sampling (model mode) or estimating votes (--samples with "
                        "--strategy)")
    add_strategy_arguments(p)


def _prompts_and_verifier(args):
    """(prompt strings, verifier, verifier name for the cache key) for model mode."""
    if (args.task is None) == (args.prompts_file is None):
        raise ValueError("model mode needs exactly one of --task NAME or --prompts-file FILE.jsonl, got "
                         + ("both" if args.task else "neither"))
    if args.n_prompts is not None:
        check_int("--n-prompts", args.n_prompts, min=1)
    if args.prompts_file is not None:
        examples, task = load_prompts_jsonl(args.prompts_file), None
        if args.n_prompts is not None:
            if args.n_prompts > len(examples):
                raise ValueError(f"--n-prompts must be <= the {len(examples)} prompts of {args.prompts_file}, "
                                 f"got {args.n_prompts}")
            examples = examples[: args.n_prompts]
    else:
        task = get_task(check_choice("--task", args.task, tuple(TASKS)))
        _, examples = task.split(n_train=0, n_eval=100 if args.n_prompts is None else args.n_prompts, seed=args.seed)
    prompts = [e.prompt for e in examples]
    v = args.verifier
    if v == "exact":
        if task is not None:
            return prompts, task.verifier(examples), f"task:{args.task}:exact"
        if any(e.answer is None for e in examples):
            raise ValueError("--verifier exact needs an 'answer' field in --prompts-file; give --verifier module:function")
        return prompts, exact_match_verifier(examples), "prompts:exact"
    if v == "proxy":
        proxy = None if task is None else task.proxy_verifier(examples)
        if proxy is None:
            raise ValueError(f"--verifier proxy needs a built-in task that ships a proxy verifier, got task {args.task!r}")
        return prompts, proxy, f"task:{args.task}:proxy"
    if ":" not in v:
        raise ValueError(f"--verifier must be exact, proxy or module:function, got {v!r}")
    return prompts, load_verifier(v), v


def _max_new_tokens(args) -> tuple[int, str]:
    """--max-new-tokens, else the one a bonft checkpoint (or a run's newest) was trained and evaluated with, as
    ``bonft sample`` and ``bonft eval`` use it, else :data:`PLAIN_MAX_NEW_TOKENS`; and where it came from."""
    from bonft.trainer.checkpoint import latest_checkpoint  # loads torch: only when a command runs
    from bonft.trainer.config import FIELDS, read_recipe

    if args.max_new_tokens is not None:
        return check_int("--max-new-tokens", args.max_new_tokens, min=1), "--max-new-tokens"
    path = Path(args.model)
    ckpt = path if (path / "model").is_dir() else latest_checkpoint(path)  # load_model verifies it, once
    recipe = None if ckpt is None else ckpt / "config.toml"
    if recipe is None or not recipe.is_file():  # a plain model or adapter directory, or a bare save_model
        return PLAIN_MAX_NEW_TOKENS, "the default for a model directory that records none"
    return int(read_recipe(recipe).get("max_new_tokens", FIELDS["max_new_tokens"].default)), f"the run's, from {recipe}"


def _check_lengths(args, table) -> None:
    """--budget-tokens needs positive mean response lengths at every temperature of the file."""
    import numpy as np

    if table.n_tokens is None:
        raise ValueError(f"--budget-tokens needs response lengths: {args.samples} has no {args.tokens_field!r} field "
                         f"(name it with --tokens-field)")
    temps = table.temperatures if table.temperatures is not None else np.zeros(len(table))
    for t in np.unique(temps):
        mean = float(table.n_tokens[temps == t].mean())
        if not mean > 0:
            at = f" at temperature {t:g}" if table.temperatures is not None else ""
            raise ValueError(f"--budget-tokens needs positive response lengths, but field {args.tokens_field!r} of "
                             f"{args.samples} averages {mean:g} tokens{at}")


_MODEL_ONLY = ("verifier", "n", "max_new_tokens", "top_p", "top_k", "batch_size", "cache", "device", "quiet")  # sampling from a model
_FILE_FIELDS = ("prompt_field", "score_field", "reward_field", "temperature_field", "tokens_field", "sample_field",
                "allow_duplicates")
_INTERVALS = ("confidence", "n_boot", "seed")


def _refuse_inert(args, mode: str, strategies: bool) -> None:
    """An option given (other than its default) that cannot take effect with this input or --strategy is an error."""
    p = argparse.ArgumentParser()
    add_arguments(p)
    inert = {}
    if mode != "model":
        inert.update({d: "applies to --model only (sampling from a model)" for d in _MODEL_ONLY})
        if mode == "samples" and strategies:
            del inert["quiet"]  # hides the vote estimators' progress bars
    if mode != "samples":
        inert.update({d: "applies to reading a --samples file" for d in _FILE_FIELDS})
    if mode == "exact":
        inert.update({d: "has no effect with --exact (exact values have no bootstrap intervals)" for d in _INTERVALS})
    if strategies:
        why = "has no effect with --strategy (its table picks by sample budget only)"
        inert.update({"budget_tokens": why, "min_gain": why})
        if mode == "exact":
            inert["plot_dir"] = "has no effect with --exact --strategy (it prints and writes --json only)"
    for dest, why in inert.items():
        val = getattr(args, dest)
        if val != p.get_default(dest):
            flag = "--" + dest.replace("_", "-")
            raise ValueError(f"{flag} {why}, got {flag if isinstance(val, bool) else f'{flag} {val}'} with --{mode}")


def _plan_kwargs(args) -> dict:
    return dict(max_k=args.max_k, budget_samples=parse_list("--budget-samples", args.budget_samples),
                budget_tokens=parse_list("--budget-tokens", args.budget_tokens, float), min_gain=args.min_gain)


def run(args) -> int:
    from bonft.plan import plan_exact, plan_samples
    from bonft.plan.sweep import check_plan_options

    given = [x for x in ("samples", "model", "exact") if getattr(args, x)]
    if len(given) != 1:
        raise ValueError(f"give exactly one of --samples, --model or --exact, got {len(given)}"
                         + (f" ({', '.join('--' + g for g in given)})" if given else ""))
    temps = parse_list("--temperatures", args.temperatures, float)
    if not args.model:
        for flag in ("task", "prompts_file", "n_prompts"):
            if getattr(args, flag) is not None:
                raise ValueError(f"--{flag.replace('_', '-')} applies to --model only (the prompts to sample), "
                                 f"got it with --{given[0]}")
    names = check_strategy_options(args, exact=bool(args.exact))
    if names and args.model:
        raise ValueError("--strategy needs --samples FILE.jsonl or --exact FILE.json, got --model")
    _refuse_inert(args, given[0], bool(names))
    check_sizes(args)
    # every planner option before any file is read or any model loaded and sampled
    check_plan_options(confidence=args.confidence, n_boot=args.n_boot, seed=args.seed, **_plan_kwargs(args))
    info = None
    if args.samples:
        from bonft.io import read_samples

        if not os.path.isfile(args.samples):
            raise FileNotFoundError(f"--samples file not found: {args.samples}")
        table = read_samples(args.samples, prompt_field=args.prompt_field, score_field=args.score_field,
                             reward_field=args.reward_field, temperature_field=args.temperature_field or "temperature",
                             temperature_required=args.temperature_field is not None,  # a field named must be there
                             tokens_field=args.tokens_field, duplicates="allow" if args.allow_duplicates else "warn",
                             answer_field=args.answer_field, sample_field=args.sample_field)
        if names:
            print(f"samples: {args.samples} ({len(table)} rows)")
            from bonft.strategies.estimators import VoteProgress  # loads torch: only with --strategy

            with VoteProgress(not args.quiet):  # the vote estimators take minutes on large files
                return _run_strategies(args, table, temps)
        if args.budget_tokens is not None:
            _check_lengths(args, table)
        print(f"samples: {args.samples} ({len(table)} rows)")
        res = plan_samples(table, temperatures=temps, confidence=args.confidence, n_boot=args.n_boot, seed=args.seed,
                           **_plan_kwargs(args))
    elif args.exact:
        if not os.path.isfile(args.exact):
            raise FileNotFoundError(f"--exact file not found: {args.exact}")
        try:
            with open(args.exact, encoding="utf-8") as fh:
                spec = json.load(fh)
        except (UnicodeDecodeError, json.JSONDecodeError, RecursionError) as e:
            where = f" (line {e.lineno}, column {e.colno}: {e.msg})" if isinstance(e, json.JSONDecodeError) else ""
            raise ValueError(f"--exact file {args.exact} must hold one JSON object in UTF-8{where}") from None
        if not isinstance(spec, dict):
            raise TypeError(f"--exact must hold a JSON object, got {type(spec).__name__}")
        unknown = set(spec) - {"logits", "probs", "scores", "rewards", "lengths", "temperatures", "answers"}
        if unknown:
            raise ValueError(f"--exact file has unknown fields {sorted(unknown)}")
        for key in ("scores", "rewards"):
            if key not in spec:
                raise ValueError(f"--exact file must have a {key!r} field")
        if temps is not None and spec.get("temperatures") is not None:
            raise ValueError(f"--exact takes the temperatures once: --temperatures or the file's 'temperatures' field, "
                             f"got both (--temperatures {args.temperatures}, file {spec['temperatures']})")
        temps = temps or spec.get("temperatures")
        if temps is None:
            raise ValueError("--exact needs temperatures: --temperatures or a 'temperatures' field")
        if "answers" in spec and not any(n in VOTES for n in names or []):
            raise ValueError("--exact file's 'answers' field is read only by --strategy majority_vote or weighted_vote, "
                             f"got it {'with --strategy ' + args.strategy if names else 'without --strategy'}")
        if names:
            from bonft.cli.strategy_tables import run_plan_exact

            return run_plan_exact(args, spec, temps)
        kw = _plan_kwargs(args)
        kw["max_k"] = kw["max_k"] or 64
        res = plan_exact(logits=spec.get("logits"), probs=spec.get("probs"), scores=spec["scores"],
                         rewards=spec["rewards"], lengths=spec.get("lengths"), temperatures=temps, **kw)
    else:
        from bonft.plan.from_model import check_model_plan, plan_model
        from bonft.trainer.checkpoint import quiet_transformers  # loads torch: only in model mode
        from bonft.trainer.models import load_model, pick_device

        check_choice("--device", args.device, ("auto", "cpu", "cuda"))
        temps = temps or parse_list("--temperatures", DEFAULT_TEMPERATURES, float)
        # the options that depend on the grid and --n (a budget the grid cannot reach, the bootstrap table's size)
        check_model_plan(temps, args.n, seed=args.seed, confidence=args.confidence, n_boot=args.n_boot,
                         **_plan_kwargs(args))
        prompts, verifier, vname = _prompts_and_verifier(args)  # the user's files first: errors before a slow load
        max_new_tokens, whence = _max_new_tokens(args)
        print(f"max_new_tokens {max_new_tokens} ({whence})")
        with quiet_transformers() if args.quiet else contextlib.nullcontext():  # --quiet: no loading bar either
            model, tokenizer = load_model(args.model, device=pick_device(args.device))
        res, info = plan_model(model, tokenizer, prompts, verifier, temperatures=temps, n=args.n, seed=args.seed,
                               top_p=args.top_p, top_k=args.top_k, max_new_tokens=max_new_tokens, batch_size=args.batch_size,
                               cache_dir=args.cache, verifier_name=vname, progress=not args.quiet,
                               confidence=args.confidence, n_boot=args.n_boot, **_plan_kwargs(args))
        if args.cache:
            print(f"cache {args.cache}: sampled T={info['sampled']}, reused T={info['cached']}")
    print(res.table())
    if args.json:
        out = res.to_dict()
        if info is not None:
            out["sampling"] = {k: info[k] for k in ("sampled", "cached", "failed", "files")}
        write_json_atomic(args.json, out)
        print(f"wrote {args.json}")
    if args.plot_dir:
        for path in (res.plot_heatmap(os.path.join(args.plot_dir, "plan_heatmap.png")),
                     res.plot_curves(os.path.join(args.plot_dir, "plan_curves.png"))):
            print(f"wrote {path}")
    return 0
