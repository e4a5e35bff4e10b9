"""``bonft sample CHECKPOINT -o samples.jsonl``: draw responses and write the samples file of bonft estimate / plan."""
from __future__ import annotations

import argparse
import itertools
import os

from bonft.cli.evaluate import add_common, announce, load_for_eval
from bonft.cli.options import check_json_path, check_seed, parse_list

HELP = "sample responses from a checkpoint and write a samples JSONL (input of bonft estimate / bonft plan)"
DESCRIPTION = (
    "Draw --n responses per held-out prompt at one or more temperatures, score each with a verifier "
    "(score) and the evaluation verifier (reward: the exact checker for built-in tasks, see the eval_verifier key), "
    "and write one JSON line per response: prompt_id (the prompt's "
    "position among the run's held-out prompts), prompt (its text, to join rows back to your data), score, "
    "reward, temperature, response, n_tokens, answer (the task's extracted answer, for --strategy "
    "majority_vote/weighted_vote), and sample (its index in the prompt's pool, so that identical "
    "responses are not mistaken for repeated rows). Feed the file to `bonft estimate` or `bonft plan`."
)


def add_arguments(p: argparse.ArgumentParser) -> None:
    add_common(p)
    p.add_argument("--temperatures", default="1.0", metavar="T1,T2", help="comma-separated sampling temperatures (default: 1.0)")
    p.add_argument("--verifier", default="auto",
                   help="which verifier fills 'score': exact, proxy or a name of the run's verifiers "
                        "(default: proxy if the task has one, else the training verifier)")
    p.add_argument("-o", "--output", required=True,
                   help="samples JSONL to write (written atomically; an existing file is replaced)")


def run(args: argparse.Namespace) -> int:
    import torch

    from bonft._core.checks import check_int, check_positive
    from bonft.io import write_samples
    from bonft.trainer.evaluation import evaluate_policy, sample_rows
    from bonft.trainer.run import Stream

    check_output("--output", args.output)  # before the sampling: a wrong path found at the end wastes it
    n = check_int("--n", args.n, min=1)
    check_seed("--seed", args.seed)
    temps = [check_positive("--temperatures", t) for t in parse_list("--temperatures", args.temperatures, float)]
    torch.set_num_threads(1)  # tiny models: one thread is fastest
    ckpt, cfg, r = load_for_eval(args, n=n, ks=[1], temperature=temps[0])
    names = [k for k in r.verifiers if k != "train"]
    eval_verifier = r.roles.eval_verifier_name  # fills 'reward'
    which = args.verifier if args.verifier != "auto" else ("proxy" if "proxy" in names else r.roles.verifier_name)
    if which not in names:
        raise ValueError(f"--verifier must be one of {names}, got {args.verifier!r}")
    held = r.eval[: cfg.eval_prompts or len(r.eval)]
    announce(r, n=n, temperatures=temps)
    rows = []
    for t in temps:
        rep, raw = evaluate_policy(
            r.model, r.tokenizer, [e.prompt for e in held], verifiers={eval_verifier: r.verifiers[eval_verifier], which: r.verifiers[which]},
            eval_verifier=eval_verifier,
            extract_answer=getattr(r.task, "extract_answer", None), n=n, ks=[1], temperature=t, top_p=cfg.eval_top_p,
            top_k=cfg.eval_top_k, max_new_tokens=cfg.max_new_tokens, seed=Stream.SAMPLE_COMMAND.seed(args.seed, step=0), n_boot=10,
        )
        rows.append(sample_rows(raw, [e.prompt for e in held], temperature=t, score=which,
                                extract_answer=getattr(r.task, "extract_answer", None)))
        print(f"T={t:g}: pass@1 {rep.mean_reward:.3f}, {rep.distinct_answers:.1f} distinct answers/prompt")
    try:
        count = write_samples(args.output, itertools.chain(*rows))  # one row at a time
    except OSError as e:  # a full disk: the message names the file, not the temporary one beside it
        if not e.strerror:
            raise
        raise type(e)(e.errno, f"--output cannot be written: {e.strerror}", args.output) from None
    print(f"wrote {count} samples ({len(held)} prompts x {n} x {len(temps)} temperature(s), score = {which}) to {args.output}")
    return 0


def check_output(flag: str, path: str) -> None:
    """``path`` can become a file in an existing folder (the samples file's folder is not created)."""
    check_json_path(flag, path)
    folder = os.path.dirname(os.path.realpath(path))
    if not os.path.isdir(folder):
        raise FileNotFoundError(f"{flag}'s folder does not exist: {folder} ({flag}={path})")
