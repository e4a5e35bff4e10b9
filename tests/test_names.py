"""One name per idea: the names a user types (every option of every ``bonft`` sub-command, every recipe key,
every ``bonft demo --set`` knob, every objective and strategy id) hold no retired spelling and no two
spellings of one idea; the command lines in README.md and docs/ use options the commands have.

Three checks, each tested on planted bad names below so that the checker itself is shown to fail:

- retired spellings (CHANGELOG.md, 0.3.0 and 0.2.0): an old option, key or id, or a retired word
  (``bon``, ``oracle``, ``reply``, ``expert``, ``sft`` in an option or key) in any name;
- near-duplicates: two options/keys whose words, after dropping dashes and underscores, are the
  same multiset in another order (``n_eval`` beside ``eval_n``); one spelling used in several
  places (``--n-boot`` and the key ``n_boot``) is the same name, not a duplicate;
- synonyms: both words of a pair in :data:`SYNONYMS` used by options/keys (``--timeout`` beside
  ``--wall-time``).

Common practice (no published source): a project keeps a list of retired names and a lint over its
command-line parser; argparse's own actions are the reference for what the parser accepts.
"""
from __future__ import annotations

import argparse
import dataclasses
import re
from collections import Counter, defaultdict
from pathlib import Path

import pytest

from bonft.cli.main import build_parser

# --------------------------------------------------------------------------- the lists we keep

# option -> commands where it is retired (None: every command)
RETIRED_OPTIONS = {
    "--boot": None,  # -> --n-boot
    "--timeout": None,  # -> --wall-time
    "--out": None,  # -> --output
    "--plot": None,  # -> --plot-dir DIR
    "--prompts": None,  # a count -> --n-prompts (eval, sample, plan); a file -> --prompts-file (plan)
    "--temperature": {"sample", "plan"},  # a list -> --temperatures (eval keeps its single --temperature)
}
RETIRED_KEYS = {
    # 0.3.0 (read with a warning: bonft.trainer.config.DEPRECATED_KEYS)
    "n_train", "n_eval", "eval_n", "sft_steps", "sft_batch_size", "sft_lr",
    # 0.2.0
    "init_from", "out_dir", "n_layer", "n_head", "d_model", "kl_coef",
}
RETIRED_IDS = {
    # objectives
    "loo_reinforce", "pass_at_k_positive_only", "bon_rl", "bon_sft",
    # strategies
    "best-of-k", "majority", "weighted", "pass", "oracle",
    # functions, fields and statistics renamed in 0.3.0 (a user-facing name must not bring them back)
    "bon_distribution", "log_bon_distribution", "bon_value", "bon_kl", "bon_success", "bon_at_k",
    "bon_at_k_per_prompt", "oracle_at_k_per_prompt", "n_min", "pool_min", "bon_rl_credit", "bon_rl_loss",
    "bon_sft_credit", "bon_sft_loss", "expert_scores", "expert_logprobs", "expert_mask", "reply_tokens",
    "reply_valid", "group_size",
}
# words no option or recipe key may use (bon and oracle: best_of_k and pass_at_k; reply: response;
# expert: reference; sft: warm_start)
RETIRED_WORDS = {"bon", "oracle", "reply", "expert", "sft"}
# two spellings of one idea: options/keys may use one side of a pair, never both
SYNONYMS = [
    ("boot", "n_boot"), ("out", "output"), ("timeout", "wall_time"), ("reply", "response"),
    ("expert", "reference"), ("bon", "best_of_k"), ("oracle", "pass_at_k"), ("sft", "warm_start"),
    ("group_size", "pool"),
]


# --------------------------------------------------------------------------- the checker
def words(name: str) -> tuple[str, ...]:
    """``--n-boot`` / ``n_boot`` -> ``("n", "boot")``."""
    return tuple(w for w in name.lstrip("-").lower().replace("-", "_").split("_") if w)


def cli_names(parser: argparse.ArgumentParser) -> list[tuple[str, str]]:
    """(command, option) for every option string of every sub-command (``-h``/``--help`` left out)."""
    out = []
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for command, sub in action.choices.items():
                for a in sub._actions:
                    out += [(command, o) for o in a.option_strings if o not in ("-h", "--help")]
    return out


def config_names() -> list[tuple[str, str]]:
    from bonft.trainer.config import TrainConfig
    from bonft.trainer.demo import DemoConfig

    keys = [("recipe", f.name) for f in dataclasses.fields(TrainConfig)]
    return keys + [("demo --set", f.name) for f in dataclasses.fields(DemoConfig)
                   if f.name not in {k for _, k in keys}]


def id_names() -> list[tuple[str, str]]:
    from bonft.objcheck import TARGETS
    from bonft.strategies import STRATEGY_NAMES
    from bonft.trainer.objectives import OBJECTIVES

    return ([("objective", n) for n in OBJECTIVES] + [("strategy", n) for n in STRATEGY_NAMES]
            + [("check-objective --target", n) for n in TARGETS])


def retired(names: list[tuple[str, str]], ids: list[tuple[str, str]] = ()) -> list[str]:
    """Every retired spelling among options/keys (``names``) and ids."""
    bad = []
    for where, name in names:
        commands = RETIRED_OPTIONS.get(name, ())
        if name in RETIRED_OPTIONS and (commands is None or where in commands):
            bad.append(f"{where}: {name} is a retired option")
        if name in RETIRED_KEYS or name.lstrip("-").replace("-", "_") in RETIRED_IDS | RETIRED_KEYS:
            bad.append(f"{where}: {name} is a retired name")
        hit = RETIRED_WORDS & set(words(name))
        if hit:
            bad.append(f"{where}: {name} uses the retired word {sorted(hit)[0]!r}")
    for where, name in ids:
        if name in RETIRED_IDS or name.replace("-", "_") in RETIRED_IDS:
            bad.append(f"{where}: {name} is a retired id")
        hit = RETIRED_WORDS & set(words(name)) - {"sft"}  # best_of_k_sft: the objective keeps its name
        if hit:
            bad.append(f"{where}: {name} uses the retired word {sorted(hit)[0]!r}")
    return bad


def near_duplicates(names: list[tuple[str, str]]) -> list[str]:
    """Two spellings whose words are the same multiset (``eval_n`` / ``n_eval``, ``--n-boot`` / ``boot_n``)."""
    spellings: dict[tuple, dict[tuple, list[str]]] = defaultdict(lambda: defaultdict(list))
    for where, name in names:
        w = words(name)
        spellings[tuple(sorted(Counter(w).elements()))][w].append(f"{where} {name}")
    return [" vs ".join(v[0] for v in group.values()) for group in spellings.values() if len(group) > 1]


def _uses(w: tuple[str, ...], phrase: tuple[str, ...], inside: tuple[str, ...]) -> bool:
    """``phrase`` occurs in ``w`` as consecutive words, other than as part of ``inside``."""
    n, m = len(phrase), len(inside)
    covered = set()
    for i in range(len(w) - m + 1):
        if w[i:i + m] == inside:
            covered |= set(range(i, i + m))
    return any(w[i:i + n] == phrase and not set(range(i, i + n)) <= covered for i in range(len(w) - n + 1))


def synonyms(names: list[tuple[str, str]]) -> list[str]:
    """Pairs of :data:`SYNONYMS` whose two sides are both used."""
    bad = []
    for a, b in SYNONYMS:
        pa, pb = words(a), words(b)
        # the longer phrase may contain the shorter (n_boot holds boot): that use belongs to the longer one
        long_ = pb if len(pb) >= len(pa) else pa
        with_a = [f"{where} {n}" for where, n in names if _uses(words(n), pa, long_ if long_ != pa else ())]
        with_b = [f"{where} {n}" for where, n in names if _uses(words(n), pb, long_ if long_ != pb else ())]
        if with_a and with_b:
            bad.append(f"{a}/{b}: {with_a[0]} vs {with_b[0]}")
    return bad


# --------------------------------------------------------------------------- the project's names
def test_no_option_key_or_id_uses_a_retired_spelling():
    assert retired(cli_names(build_parser()) + config_names(), id_names()) == []


def api_names() -> list[tuple[str, str]]:
    """(module, name) for every name bonft's packages and top-level modules export in ``__all__``
    (a package's ``__init__`` re-exports its parts; the sandbox's worker scripts are not imported)."""
    import importlib
    import pkgutil

    import bonft

    out = []
    for info in pkgutil.walk_packages(bonft.__path__, "bonft."):
        if not (info.ispkg or info.name.count(".") == 1) or info.name.endswith("__main__"):
            continue
        mod = importlib.import_module(info.name)
        out += [(info.name, n) for n in getattr(mod, "__all__", ())]
    return out


def test_no_exported_python_name_uses_a_retired_word():
    # ids rules: best_of_k_sft keeps its published name; "bon" and "oracle" are retired everywhere
    names = api_names()
    assert len(names) > 100  # the walk reached the packages
    assert retired([], names) == []


def test_checker_finds_a_planted_retired_python_name():
    assert retired([], [("bonft.viz", "plot_bon_curves")]) == [
        "bonft.viz: plot_bon_curves uses the retired word 'bon'"]


def test_no_two_options_or_keys_spell_one_idea_two_ways():
    names = cli_names(build_parser()) + config_names()
    assert near_duplicates(names) == []
    assert synonyms(names) == []


def test_old_key_spellings_are_deprecated_aliases_of_current_keys():
    from bonft.trainer.config import DEPRECATED_KEYS, DEPRECATED_OBJECTIVES, FIELDS
    from bonft.trainer.objectives import OBJECTIVES

    assert set(DEPRECATED_KEYS) <= RETIRED_KEYS and set(DEPRECATED_KEYS.values()) <= set(FIELDS)
    assert set(DEPRECATED_OBJECTIVES) <= RETIRED_IDS and set(DEPRECATED_OBJECTIVES.values()) <= set(OBJECTIVES)


@pytest.mark.parametrize("argv", [["estimate", "--example", "--boot", "10"], ["estimate", "--example", "--plot", "x.png"],
                                  ["train", "r.toml", "--out", "d"], ["eval", "ckpt", "--prompts", "5"],
                                  ["sample", "ckpt", "-o", "s.jsonl", "--temperature", "0.7"],
                                  ["check-verifier", "m:f", "--examples", "e.jsonl", "--timeout", "1"],
                                  # a prefix of the new spelling is no way back either
                                  ["estimate", "--example", "--n-bo", "10"], ["demo", "--out", "d"]])
def test_retired_options_are_refused_by_the_parser(argv, capsys):
    with pytest.raises(SystemExit) as e:
        build_parser().parse_args(argv)
    assert e.value.code == 2 and "unrecognized arguments" in capsys.readouterr().err


# --------------------------------------------------------------------------- the checker fails on planted names
def test_checker_finds_a_planted_retired_option_key_and_word():
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    sub.choices["estimate"].add_argument("--boot", type=int)
    sub.choices["sample"].add_argument("--temperature")
    sub.choices["plan"].add_argument("--oracle-field")
    found = retired(cli_names(parser) + [("recipe", "sft_lr")], [("objective", "loo_reinforce"), ("strategy", "majority")])
    assert found == ["estimate: --boot is a retired option", "plan: --oracle-field uses the retired word 'oracle'",
                     "sample: --temperature is a retired option", "recipe: sft_lr is a retired name",
                     "recipe: sft_lr uses the retired word 'sft'", "objective: loo_reinforce is a retired id",
                     "strategy: majority is a retired id"]
    # eval keeps its single --temperature; best_of_k_sft keeps its name
    assert retired([("eval", "--temperature")], [("objective", "best_of_k_sft")]) == []


def test_checker_finds_a_planted_near_duplicate():
    names = config_names() + [("recipe", "prompts_heldout")]  # the words of heldout_prompts in another order
    assert near_duplicates(names) == ["recipe heldout_prompts vs recipe prompts_heldout"]
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    sub.choices["plan"].add_argument("--boot-n", type=int)
    assert near_duplicates(cli_names(parser)) == ["estimate --n-boot vs plan --boot-n"]
    assert near_duplicates([("recipe", "n_boot"), ("estimate", "--n-boot")]) == []  # one spelling, two places


@pytest.mark.parametrize("planted, pair", [
    (("check-tests", "--timeout"), "timeout/wall_time"), (("demo --set", "out_dir"), "out/output"),
    (("recipe", "pool_width"), "group_size/pool"), (("recipe", "group_size"), "group_size/pool"),
    (("recipe", "reference_weight"), None), (("recipe", "boot_seed"), "boot/n_boot"),
])
def test_checker_finds_a_planted_synonym(planted, pair):
    base = cli_names(build_parser()) + config_names()
    assert synonyms(base) == []
    found = synonyms(base + [planted])
    if pair is None:  # 'reference' alone: no 'expert' is in use
        assert found == []
    elif pair == "group_size/pool":  # neither side is in use by the project: the pair needs both
        both = synonyms(base + [("recipe", "pool_width"), ("recipe", "group_size")])
        assert found == [] and both == ["group_size/pool: recipe group_size vs recipe pool_width"]
    else:
        assert len(found) == 1 and found[0].startswith(pair + ":") and f"{planted[0]} {planted[1]}" in found[0]


# --------------------------------------------------------------------------- command lines in the docs
ROOT = Path(__file__).resolve().parent.parent
DOCS = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md")), *sorted((ROOT / "docs").glob("*.py")),
        ROOT / "recipes" / "study.py"]


def unknown_options(texts: dict[str, str], parser: argparse.ArgumentParser) -> list[str]:
    """``--option`` after ``bonft COMMAND`` (same line, continuation lines joined, up to a closing backtick or the
    next ``bonft``) that COMMAND does not have."""
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    opts = {c: {o for a in sp._actions for o in a.option_strings} for c, sp in sub.choices.items()}
    command = re.compile(r"\bbonft (" + "|".join(map(re.escape, sorted(opts, key=len, reverse=True))) + r")\b(.*)")
    bad = []
    for name, text in texts.items():
        lines, i = text.split("\n"), 0
        while i < len(lines):
            start, line = i + 1, lines[i]
            while line.endswith("\\") and i + 1 < len(lines):  # a shell continuation: one command line
                i += 1
                line = line[:-1] + " " + lines[i].strip()
            i += 1
            for m in command.finditer(line):
                rest = re.split(r"`|\bbonft ", m.group(2))[0]
                bad += [f"{name}:{start}: bonft {m.group(1)} {o}"
                        for o in re.findall(r"(?<![\w-])(--[a-z][a-z0-9-]*)", rest) if o not in opts[m.group(1)]]
    return bad


def test_command_lines_in_the_docs_use_existing_options():
    texts = {str(p.relative_to(ROOT)): p.read_text(encoding="utf-8") for p in DOCS if p.is_file()}
    assert len(texts) >= 10 and sum(t.count("bonft ") for t in texts.values()) > 50  # the docs were read
    assert unknown_options(texts, build_parser()) == []


def test_docs_checker_finds_a_planted_old_option():
    texts = {"a.md": "run `bonft estimate x.jsonl --boot 10` then `bonft plan --samples x.jsonl --n-boot 10`\n"
                     "$ bonft sample run --n 4 \\\n    --temperature 0.7,1.0 -o s.jsonl\n"
                     "bonft eval run --n-prompts 5 --plot-dir d --out x"}
    assert unknown_options(texts, build_parser()) == ["a.md:1: bonft estimate --boot", "a.md:2: bonft sample --temperature",
                                                       "a.md:4: bonft eval --out"]


def old_set_keys(texts: dict[str, str]) -> list[str]:
    """``--set KEY=`` in the docs whose KEY is not a current recipe key or demo knob (an old spelling, a typo)."""
    keys = {k for _, k in config_names()} | {"key"}  # ``--set key=value``: the placeholder
    return [f"{name}: --set {k}=" for name, text in texts.items() for k in re.findall(r"--set ([\w.]+)=", text)
            if k not in keys and not k.startswith("task_params.")]


def test_set_overrides_in_the_docs_use_current_keys():
    texts = {str(p.relative_to(ROOT)): p.read_text(encoding="utf-8") for p in DOCS if p.is_file()}
    assert sum(t.count("--set ") for t in texts.values()) > 10
    assert old_set_keys(texts) == []
    planted = {"b.md": "bonft train r.toml --set sft_steps=100 --set task_params.hard_share=0.3 --set rl_steps=5"}
    assert old_set_keys(planted) == ["b.md: --set sft_steps="]


def test_recipes_use_current_keys_and_objectives():
    from bonft.trainer.config import FIELDS, tomllib  # tomllib, or tomli on Python 3.10
    from bonft.trainer.objectives import OBJECTIVES

    recipes = sorted((ROOT / "recipes").glob("*.toml"))
    assert len(recipes) >= 8
    for path in recipes:
        values = tomllib.loads(path.read_text(encoding="utf-8"))
        assert sorted(set(values) - set(FIELDS)) == [], path.name  # no old spelling (it would load with a warning)
        assert values.get("objective", "pass_at_k") in OBJECTIVES, path.name
