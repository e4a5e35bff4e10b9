"""``bonft check-tests TESTS.jsonl``: can these unit tests be passed without solving the task?"""
from __future__ import annotations

HELP = "run gaming probes against unit tests used as a reward; exit 1 when any probe passes"
DESCRIPTION = (
    "Read the unit tests of each prompt and run every probe of bonft.testing.probe_code_tests through the "
    "sandboxed CodeRunner; print one line per prompt (which probes passed, what to change) and a summary table. "
    "The tests come from TESTS.jsonl (one {\"prompt\": str, \"tests\": str} per line), from a data file as "
    "task = 'user' reads it (.jsonl, .csv, .json, .parquet or a saved datasets directory: --prompt-field and "
    "--tests-field name its columns, default prompt and tests), or with --recipe from a recipe's data, split and "
    "tests column as bonft train binds unit_tests. Exit status 0 when no probe passed, 1 when one did. Caution: "
    "your tests run as written (in the trusted process); the probes are our own code, not model output. A clean "
    "result means these generic probes fail, not that the tests cannot be gamed."
)


def add_arguments(p) -> None:
    p.add_argument("tests", metavar="TESTS.jsonl", nargs="?", default=None,
                   help="one {\"prompt\", \"tests\"} object per line, or a data file with --prompt-field / "
                        "--tests-field (any file not ending in .jsonl is read as a data file)")
    p.add_argument("--prompt-field", default=None, metavar="NAME",
                   help="read TESTS as a data file whose column NAME holds the prompts (default prompt)")
    p.add_argument("--tests-field", default=None, metavar="NAME",
                   help="read TESTS as a data file whose column NAME holds the unit tests (default tests)")
    p.add_argument("--recipe", default=None, metavar="RECIPE.toml",
                   help="probe the tests of this recipe's data instead of TESTS: task = 'user', its task_params "
                        "(data, prompt_field, tests_field, chat_template), train_prompts + heldout_prompts and seed, "
                        "and the field knob of its unit_tests verifier, as bonft train reads them")
    p.add_argument("--probes", default=None, metavar="A,B",
                   help="probes to run (default: all but lying_operators, which runs the tests in process "
                        "beside a lying object and is run only when named)")
    p.add_argument("--wall-time", type=float, default=5.0, help="seconds per probe candidate (default 5)")
    p.add_argument("--memory-mb", type=int, default=512, help="memory limit per process (default 512)")
    p.add_argument("--workers", type=int, default=None, help="candidates run in parallel (default: up to 4)")
    p.add_argument("--json", metavar="PATH.json", default=None, help="write the report as JSON here")


def run(args) -> int:
    from bonft.cli.options import check_output_paths, parse_list, write_json_atomic
    from bonft.testing import PROBES, probe_code_tests

    check_output_paths(args)
    probes = parse_list("--probes", args.probes, cast=str) or list(PROBES)
    options = {"wall_time": args.wall_time, "memory_mb": args.memory_mb, "workers": args.workers}
    runner = tests_runner(args, options)
    report = probe_code_tests(runner, probes=probes)
    print(report)
    if args.json:
        write_json_atomic(args.json, report.to_dict())
        print(f"json: {args.json}")
    return 0 if report.ok else 1


def tests_runner(args, options: dict):
    """The CodeRunner holding the tests the arguments name (TESTS.jsonl, a data file or --recipe)."""
    import os

    from bonft.verifiers import CodeRunner  # the command's modules load when it runs, not at `bonft --help`
    from bonft.verifiers.probes import read_code_tests  # (as above)

    fields = [f"--{k}" for k in ("prompt-field", "tests-field") if getattr(args, k.replace("-", "_")) is not None]
    if args.recipe is not None:
        if args.tests is not None:
            raise ValueError(f"TESTS and --recipe are two sources of tests, got both ({args.tests!r} and {args.recipe!r}): "
                             "give one")
        if fields:
            raise ValueError(f"{' and '.join(fields)} cannot take effect with --recipe: the recipe's task_params name the "
                             "columns (prompt_field, tests_field); drop them or drop --recipe")
        if not os.path.isfile(args.recipe):
            raise FileNotFoundError(f"--recipe must be an existing TOML recipe, got {args.recipe!r}")
        return recipe_runner(args.recipe, options)
    if args.tests is None:
        raise ValueError("check-tests needs tests: give TESTS.jsonl (or a data file) or --recipe RECIPE.toml")
    if fields or not args.tests.endswith(".jsonl"):
        if not os.path.exists(args.tests):
            raise FileNotFoundError(f"TESTS must be an existing data file or saved datasets directory, got {args.tests!r}")
        return data_runner(args.tests, args.prompt_field or "prompt", args.tests_field or "tests", options)
    if not os.path.isfile(args.tests):
        raise FileNotFoundError(f"TESTS.jsonl must be an existing file, got {args.tests!r}")
    tests = read_code_tests(args.tests)
    if not tests:
        raise ValueError(f"TESTS.jsonl must hold at least one prompt, got an empty file {args.tests!r}")
    return CodeRunner(tests, **options)


def data_runner(path: str, prompt_field: str, tests_field: str, options: dict):
    """The tests of a data file read as task = 'user' reads it (other columns are the data's own), bound as
    bonft train binds unit_tests: a row without tests, or with tests no code can fail, names its line."""
    from bonft.tasks.user import UserTask  # reads datasets' formats: only for a data file
    from bonft.verifiers.fields import UnitTests  # (as above)

    try:
        task = UserTask(data=path, prompt_field=prompt_field, tests_field=tests_field)
    except ValueError as e:  # the task names its keys; on the command line they are options
        text = str(e)
        key = next((k for k in ("prompt_field", "tests_field") if text.startswith(k)), None)
        if key is None:
            raise
        raise ValueError(f"--{key.replace('_', '-')}{text[len(key):]}") from None
    return task.bind_verifier(UnitTests(field=tests_field, **options), task.examples)


def recipe_runner(recipe: str, options: dict):
    """The tests of ``recipe``'s training and held-out prompts, as a run binds its unit_tests verifier: the column
    is the ``field`` knob of the recipe's unit_tests verifier (verifier, else eval_verifier), else the task's
    tests_field, else ``tests``."""
    from bonft.cli.check_verifier import _recipe_tokenizer, recipe_knobs  # with the trainer's: only with --recipe
    from bonft.trainer.config import load_config  # loads torch: only with --recipe
    from bonft.trainer.run import task_split  # loads torch: only with --recipe
    from bonft.verifiers.roles import named_verifier  # only with --recipe

    cfg = load_config(recipe)
    if cfg.task != "user":
        raise ValueError(f"--recipe reads the unit tests of task = 'user' data, but recipe {recipe} has task = "
                         f"{cfg.task!r}, which has no tests column: drop --recipe")
    _, knobs = recipe_knobs(cfg, "unit_tests")
    params = {**({"field": knobs["field"]} if "field" in knobs else {}), **options}
    task, train, held = task_split(cfg, _recipe_tokenizer(cfg))
    return named_verifier(task, list(train) + list(held), "unit_tests", params)
