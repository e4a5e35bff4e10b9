"""``bonft check-verifier module:function --examples FILE.jsonl``: test a verifier before using it."""
from __future__ import annotations

HELP = "test a verifier for determinism, failures, agreement with labels and over-optimisation"
DESCRIPTION = (
    "Load a verifier ('module:function' or 'path/to/file.py:function', or with --recipe a name the recipe keys "
    "verifier / eval_verifier take: exact, proxy, unit_tests, reward_model), score the example pools in "
    "FILE.jsonl (one sample per line: {\"prompt\", \"response\", \"reward\"?, \"label\"?, \"row\"?}, or a samples "
    "file such as a run's heldout_samples.jsonl) several times "
    "and report determinism (within this one process), failure rate, whole-pool calls that fell back to one "
    "call per sample, score range, latency, accuracy / ROC AUC and the best-of-k "
    "vs pass@k curve (the best true reward among k). A verifier that reads each prompt's data row (a parameter "
    "named 'rows', or fields + bind) gets the rows of the lines' \"row\" objects, or with --recipe the rows of the "
    "recipe's data, bound as training binds them. Exit status 0 when no problem was found, 1 otherwise. Caution: "
    "this imports and runs the verifier's code."
)



def add_arguments(p) -> None:
    p.add_argument("verifier", help="'module:function' or 'path/to/file.py:function'; with --recipe also a built-in "
                                    "name (exact, proxy, unit_tests, reward_model) with the recipe's knobs for it "
                                    "(verifier_params where verifier names it, else eval_verifier_params)")
    p.add_argument("--examples", required=True, metavar="FILE.jsonl", help="example samples, one JSON object per line")
    p.add_argument("--recipe", default=None, metavar="RECIPE.toml",
                   help="bind a verifier that reads data rows to the rows of this recipe's task data (the prompts "
                        "the trainer builds from task, task_params, train_prompts, heldout_prompts and seed; a run's "
                        "config.toml works), so the prompts of the run's heldout_samples.jsonl find their rows")
    p.add_argument("--temperature", type=float, default=None, metavar="T",
                   help="keep only the samples drawn at this temperature (needed when a samples file holds several)")
    p.add_argument("--repeats", type=int, default=2, help="times each sample is scored (default 2)")
    p.add_argument("--threshold", type=float, default=0.5, help="score at or above which a sample counts as accepted")
    p.add_argument("--wall-time", type=float, default=None, help="seconds allowed per verifier call (default: no limit)")
    p.add_argument("--max-failure-rate", type=float, default=0.0, help="failure rate that still passes (default 0)")
    p.add_argument("--max-wrong-top", type=float, default=None,
                   help="share of the pools with right and wrong responses in which a wrong one may score at or above "
                        "every right one and still pass (default: 0 for a pass/fail checker, whose scores take two "
                        "values; no limit for graded scores)")
    p.add_argument("--plot-dir", metavar="DIR", default=None, help="write verifier_check.png (best-of-k vs pass@k) into this directory")
    p.add_argument("--json", metavar="PATH.json", default=None, help="write the report as JSON here")


def run(args) -> int:
    import os

    from bonft.cli.options import check_output_paths, make_plot_dir, write_json_atomic
    from bonft.testing import check_verifier, read_examples
    from bonft.verifiers import load_verifier

    check_output_paths(args)
    if not os.path.isfile(args.examples):
        raise FileNotFoundError(f"--examples must be an existing JSONL file, got {args.examples!r}")
    with open(args.examples, "rb") as fh:
        raw = fh.read()
    try:
        raw.decode("utf-8")
    except UnicodeDecodeError as e:
        line = raw.count(b"\n", 0, e.start) + 1
        raise ValueError(f"--examples file {args.examples} line {line}: not UTF-8 text "
                         f"(byte {raw[e.start]:#04x}); save the file as UTF-8") from None
    if args.recipe is not None and not os.path.isfile(args.recipe):
        raise FileNotFoundError(f"--recipe must be an existing TOML recipe, got {args.recipe!r}")
    examples = read_examples(args.examples, temperature=args.temperature)
    if ":" not in args.verifier and _builtin(args.verifier):
        if args.recipe is None:
            raise ValueError(f"verifier {args.verifier!r} is a built-in name, built from a recipe's task, data and knobs: "
                             "give --recipe RECIPE.toml (or name a 'module:function')")
        verifier = recipe_verifier(args.verifier, args.recipe, examples, args.examples)
    elif ":" not in args.verifier:
        from bonft.verifiers.roles import TASK_VERIFIERS, VERIFIER_KINDS

        names = ", ".join(TASK_VERIFIERS + tuple(VERIFIER_KINDS))
        raise ValueError(f"verifier must be 'module:function', 'path/to/file.py:function' or, with --recipe, one of "
                         f"{names}; got {args.verifier!r}")
    else:
        verifier = load_verifier(args.verifier)
        if args.recipe is not None:
            verifier = bind_recipe_rows(verifier, args.verifier, args.recipe, examples, args.examples)
    report = check_verifier(verifier, examples, repeats=args.repeats, threshold=args.threshold,
                            timeout=args.wall_time, max_failure_rate=args.max_failure_rate,
                            max_wrong_top=args.max_wrong_top)
    print(report)
    if args.plot_dir:
        print(f"plot: {report.plot(os.path.join(make_plot_dir(args.plot_dir), 'verifier_check.png'))}")
    if args.json:
        write_json_atomic(args.json, report.to_dict())  # atomic: never a half-written report
        print(f"json: {args.json}")
    return 0 if report.ok else 1


def bind_recipe_rows(verifier, spec: str, recipe: str, examples: list[dict], examples_path: str):
    """``verifier`` bound to the rows of ``recipe``'s task data, as the trainer binds it (``build_run``):
    the task from ``task`` / ``task_params`` (with start_from's tokenizer when ``chat_template`` is true),
    split by ``train_prompts``, ``heldout_prompts`` and ``seed``, then ``task.bind_verifier(verifier, train + held)``.

    An example carrying its own ``row``, a task without data rows, a verifier that reads no rows and a
    prompt of the examples missing from the split are errors.
    """
    from bonft.trainer.config import load_config  # loads torch: only with --recipe
    from bonft.trainer.run import task_split  # loads torch: only with --recipe
    from bonft.verifiers.fields import reads_rows

    _refuse_own_rows(examples, examples_path)
    cfg = load_config(recipe)
    if cfg.task != "user":
        raise ValueError(f"--recipe binds the data rows of task = 'user', but recipe {recipe} has task = {cfg.task!r}, "
                         "which has no rows: drop --recipe")
    if not reads_rows(verifier):
        raise ValueError(f"--recipe cannot take effect: verifier {spec} reads no data rows (it has neither a parameter "
                         "named 'rows' nor fields + bind); drop --recipe")
    task, train, held = task_split(cfg, _recipe_tokenizer(cfg))
    everything = list(train) + list(held)
    bound = task.bind_verifier(verifier, everything)
    _check_known(examples, everything, recipe, cfg, examples_path)
    return bound


def _builtin(spec: str) -> bool:
    from bonft.verifiers.roles import TASK_VERIFIERS, VERIFIER_KINDS  # the command's modules load when it runs

    return spec in TASK_VERIFIERS or spec in VERIFIER_KINDS


def recipe_verifier(spec: str, recipe: str, examples: list[dict], examples_path: str):
    """The built-in verifier ``spec`` as a run of ``recipe`` builds it (:func:`bonft.verifiers.roles.named_verifier`
    on the recipe's task split): its knobs are the recipe's ``verifier_params`` when ``verifier`` names ``spec``,
    else ``eval_verifier_params`` when ``eval_verifier`` does, else none. An example with its own ``row`` and a
    prompt missing from the split are errors."""
    from bonft.trainer.config import load_config  # loads torch: only with --recipe
    from bonft.trainer.run import task_split  # loads torch: only with --recipe
    from bonft.verifiers.roles import named_verifier  # only with --recipe

    _refuse_own_rows(examples, examples_path)
    cfg = load_config(recipe)
    key, params = recipe_knobs(cfg, spec)
    task, train, held = task_split(cfg, _recipe_tokenizer(cfg))
    everything = list(train) + list(held)
    verifier = named_verifier(task, everything, spec, params, key=key)
    _check_known(examples, everything, recipe, cfg, examples_path)
    return verifier


def recipe_knobs(cfg, spec: str) -> tuple[str, dict]:
    """The recipe key that names the built-in verifier ``spec`` and its knobs: ``verifier_params`` where
    ``verifier`` names it, else ``eval_verifier_params`` where ``eval_verifier`` does, else none."""
    if cfg.verifier == spec:
        return "verifier", dict(cfg.verifier_params)
    if cfg.eval_verifier == spec:
        return "eval_verifier", dict(cfg.eval_verifier_params)
    return "verifier", {}


def _refuse_own_rows(examples: list[dict], examples_path: str) -> None:
    with_row = next((i for i, ex in enumerate(examples) if "row" in ex), None)
    if with_row is not None:
        raise ValueError(f"--recipe binds the rows of the recipe's data, but {examples_path} gives rows of its own "
                         f"(example {with_row + 1} has 'row'): use one or the other")


def _check_known(examples: list[dict], everything: list, recipe: str, cfg, examples_path: str) -> None:
    known = {e.prompt for e in everything}
    for i, ex in enumerate(examples):
        if ex["prompt"] not in known:
            raise ValueError(f"{examples_path}: the prompt {ex['prompt']!r:.80} (example {i + 1}) has no row in recipe "
                             f"{recipe}'s data: it is not among the {len(everything)} prompts its task, "
                             f"train_prompts + heldout_prompts and seed = {cfg.seed} give (with chat_template, as "
                             "rendered); check the examples of a run against that run's recipe")


def _recipe_tokenizer(cfg):
    """The tokenizer ``build_run`` hands the task when ``chat_template`` is true (start_from's, read without the
    weights; bonft's own without start_from); None when no template renders the prompts."""
    if cfg.task_params.get("chat_template") is not True or "tokenizer" in cfg.task_params:
        return None
    if not cfg.start_from:
        from bonft.tasks import build_tokenizer  # the tiny model's tokenizer: only with --recipe

        return build_tokenizer()
    from bonft.trainer.models import load_tokenizer  # loads torch: only with --recipe

    return load_tokenizer(cfg.start_from)
