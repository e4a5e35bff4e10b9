"""Held-out evaluation of a policy: best-of-k and pass@k curves with CIs, length, diversity.

:func:`evaluate_policy` samples ``n`` responses for every held-out prompt,
scores them with each verifier it is given and summarises with
:func:`bonft.estimate.summarize`:

* ``pass@k`` -- any of k samples correct (true rewards; Chen et al. 2021),
* ``best-of-k[name]`` -- the true reward of the sample that verifier ``name``
  ranks highest among k (Chow et al. 2024), e.g. under the task's imperfect proxy,

both as U-statistics over all k-subsets of the pool with bootstrap CIs over prompts,
plus the mean response length, the number of distinct extracted answers per
prompt and an entropy estimate: the mean negative log-probability of a sampled
response at the sampling temperature, ``H ~= -(1/(P n)) sum_{b,i} log pi_T(y_bi | x_b)``
(a Monte-Carlo estimate of the sequence-level entropy, in nats).
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterator, Sequence

import numpy as np
import torch

from bonft.estimate import MIN_BOOT_PROMPTS, summarize
from bonft.generation import sample
from bonft.io import write_samples
from bonft.trainer.distributed import broadcast_object, gather_objects, shard_bounds
from bonft.trainer.run import Stream
from bonft.verifiers.roles import check_eval_rewards
from bonft.verifiers.scoring import VerifierError, score_batch

if TYPE_CHECKING:  # annotations only
    from bonft.trainer.run import Run

# the run directory's samples file of the final evaluation (every held-out sample, scored by every verifier)
HELDOUT_SAMPLES = "heldout_samples.jsonl"


@dataclass
class EvalReport:
    """One evaluation. Curves map a name to ``CurveSummary.to_dict()``-like dicts."""

    step: int
    ks: list[int]
    n_prompts: int
    n_samples: int
    temperature: float
    pass_at_k: dict  # {"mean": [...], "lo": [...], "hi": [...]} per k, true rewards
    best_of_k: dict = field(default_factory=dict)  # verifier name -> {"mean","lo","hi"}
    mean_reward: float = 0.0  # mean true reward of a single sample
    mean_length: float = 0.0  # tokens per response, EOS included
    distinct_answers: float = 0.0  # distinct extracted answers per prompt (None answers count as one)
    entropy: float = 0.0  # nats per response, mean -log pi_T(y|x)
    verifier_failures: int = 0
    by_group: dict = field(default_factory=dict)  # prompt group (e.g. task family) -> {"n_prompts", "pass_at_k" means}
    eval_verifier: str = "exact"  # the verifier whose rewards define pass@k (and every best-of-k row's reward)
    verifier: str = ""  # the training verifier: its best-of-k row is marked "[verifier]"
    top_p: float = 1.0  # the nucleus the samples were drawn from (1 = none)
    top_k: int = 0  # the most likely tokens kept (0 = all)

    def to_dict(self) -> dict:
        return {k: getattr(self, k) for k in self.__dataclass_fields__}

    def table(self) -> str:
        """A small text table: one row per curve, one column per k.

        ``pass@k [eval_verifier: NAME]`` is pass@k under the evaluation verifier's rewards
        (``[eval_verifier = verifier: NAME]`` when one verifier does both jobs); ``best-of-k NAME
        [verifier]`` the evaluation verifier's reward of the sample the training verifier ranks first
        among k (other ``best-of-k NAME`` rows: other verifiers selecting). A gap between the two is
        reward hacking.
        """
        labels = {name: f"best-of-k {name}" + (" [verifier]" if name == self.verifier else "") for name in self.best_of_k}
        same = self.verifier == self.eval_verifier  # one verifier trains and evaluates: no separate best-of-k row
        pass_label = f"pass@k [eval_verifier{' = verifier' if same else ''}: {self.eval_verifier}]"
        width = max([18, len(pass_label) + 2, *(len(v) + 2 for v in labels.values()),
                     *(len("pass@k " + g) + 2 for g in self.by_group)])
        head = f"{'':{width}}" + "".join(f"{'k=' + str(k):>20}" for k in self.ks)
        rows = [head]

        honest = self.n_prompts >= MIN_BOOT_PROMPTS  # a bootstrap over fewer prompts is no interval

        def row(label: str, c: dict) -> str:
            cells = [f"{m:.3f} [{lo:.3f},{hi:.3f}]" if honest else f"{m:.3f} [n/a]"
                     for m, lo, hi in zip(c["mean"], c["lo"], c["hi"])]
            return f"{label:{width}}" + "".join(f"{x:>20}" for x in cells)

        rows.append(row(pass_label, self.pass_at_k))
        for name, c in self.best_of_k.items():
            rows.append(row(labels[name], c))
        for g, d in self.by_group.items():
            rows.append(f"{'pass@k ' + g:{width}}" + "".join(f"{m:>20.3f}" for m in d["pass_at_k"]) + f"   ({d['n_prompts']} prompts)")
        rows.append(
            f"distinct answers/prompt {self.distinct_answers:.2f}   entropy {self.entropy:.2f} nats/response   "
            f"length {self.mean_length:.2f} tokens   ({self.n_prompts} prompts x {self.n_samples} samples, T={self.temperature:g}"
            + (f", top_k={self.top_k}" if self.top_k else "") + (f", top_p={self.top_p:g}" if self.top_p < 1 else "") + ")"
        )
        if not honest:
            rows.append(f"intervals n/a: {self.n_prompts} prompt(s); a bootstrap over prompts needs at least {MIN_BOOT_PROMPTS}")
        return "\n".join(rows)


def _curve(summary: Any, which: str) -> dict:
    return {
        "mean": [float(v) for v in getattr(summary, f"{which}_mean")],
        "lo": [float(v) for v in getattr(summary, f"{which}_lo")],
        "hi": [float(v) for v in getattr(summary, f"{which}_hi")],
    }


@torch.no_grad()
def evaluate_policy(
    model: Any,
    tokenizer: Any,
    prompts: Sequence[str],
    *,
    verifiers: dict[str, Callable],
    extract_answer: Callable[[str], Any] | None = None,
    n: int = 64,
    ks: Sequence[int] = (1, 4, 16, 32),
    temperature: float = 1.0,
    top_p: float = 1.0,
    top_k: int = 0,
    max_new_tokens: int = 8,
    seed: int = 0,
    step: int = 0,
    confidence: float = 0.95,
    n_boot: int = 1000,
    rows_per_chunk: int = 4096,
    groups: Sequence[str] | None = None,
    eval_verifier: str = "exact",
    verifier: str | None = None,
) -> tuple[EvalReport, dict]:
    """Sample ``n`` responses per prompt and summarise them.

    prompts: P strings. verifiers: name -> verifier; ``verifiers[eval_verifier]`` (default
    ``"exact"``) gives the rewards of pass@k and of every best-of-k row (its rewards,
    else its scores); every other verifier gives a best-of-k row, selecting by its
    scores (``verifier``, the training verifier's name, marks its row).

    Returns ``(report, raw)``; ``raw`` holds ``texts`` (P lists of n), the
    ``scores``/``rewards`` (P, n) arrays per verifier and ``n_tokens`` (P, n),
    which :mod:`bonft.cli.sample` writes out. ``groups`` (P labels, e.g. the
    task family of each prompt) adds pass@k means per group. Internal callers pass
    validated arguments (the trainer's config, the eval command's options).
    """
    raw = collect_pools(model, tokenizer, prompts, verifiers=verifiers, extract_answer=extract_answer, n=n,
                        temperature=temperature, top_p=top_p, top_k=top_k, max_new_tokens=max_new_tokens, seed=seed,
                        rows_per_chunk=rows_per_chunk, eval_verifier=eval_verifier)
    check_verdicts(raw)
    report = report_from_pools(raw, ks=ks, temperature=temperature, seed=seed, step=step, confidence=confidence,
                               n_boot=n_boot, groups=groups, eval_verifier=eval_verifier, verifier=verifier,
                               top_p=top_p, top_k=top_k)
    return report, raw


@torch.no_grad()
def collect_pools(model: Any, tokenizer: Any, prompts: Sequence[str], *, verifiers: dict[str, Callable],
                  extract_answer: Callable[[str], Any] | None = None, n: int = 64, temperature: float = 1.0,
                  top_p: float = 1.0, top_k: int = 0, max_new_tokens: int = 8, seed: int = 0, rows_per_chunk: int = 4096,
                  seeds: Sequence[int] | None = None, eval_verifier: str = "exact") -> dict:
    """The sampling and scoring half of :func:`evaluate_policy`: P prompts -> pools of n.

    Returns ``raw`` with ``texts`` (P lists of n), ``n_tokens``, ``seq_logp``
    (P, n), ``scores`` (verifier name -> (P, n)), ``rewards`` (P, n) of the
    ``eval_verifier`` verifier (its rewards, else its scores), ``distinct`` (P,) and ``failures``. ``seeds`` (one per
    prompt) draws each prompt from its own generator (``sample(..., seeds=...)``), so
    pools collected on different ranks are those one process would collect; else one draw from ``seed``.
    """
    if eval_verifier not in verifiers:
        raise ValueError(f"verifiers must hold the evaluation verifier {eval_verifier!r} (its rewards define pass@k), got {sorted(verifiers)}")
    P = len(prompts)
    if seeds is not None:
        smp = sample(model, tokenizer, list(prompts), seeds=seeds, n=n, temperature=temperature, top_p=top_p,
                     top_k=top_k, max_new_tokens=max_new_tokens)
    else:
        smp = sample(model, tokenizer, list(prompts), n=n, temperature=temperature, top_p=top_p, top_k=top_k,
                     max_new_tokens=max_new_tokens, seed=seed, batch_size=rows_per_chunk)
    flat_prompts = [p for p in prompts for _ in range(n)]  # row b*n + i is sample i of prompt b
    flat_texts = [t for row in smp.texts for t in row]
    raw: dict = {"texts": smp.texts, "n_tokens": smp.response_valid.sum(-1).cpu().numpy(),  # (P, n)
                 "seq_logp": (smp.token_logprobs * smp.response_valid).sum(-1).cpu().double().numpy(),  # (P, n)
                 "scores": {}, "rewards": None, "failures": 0, "failed_by": {}, "cause": {}, "failed": {}}
    for name, ver in verifiers.items():
        v = score_batch(ver, flat_prompts, flat_texts)
        raw["failures"] += v.n_failed
        raw["failed_by"][name] = int(v.n_failed)
        raw["failed"][name] = v.failed.reshape(P, n)  # a stand-in score (0 or the batch's lowest): judged nothing
        raw["cause"][name] = next((r for r in v.reasons if r), None)
        raw["scores"][name] = v.scores.reshape(P, n)
        if name == eval_verifier:
            raw["rewards"] = (v.rewards if v.rewards is not None else v.scores).reshape(P, n)
    if extract_answer is not None:
        read = answer_reader(extract_answer)
        raw["distinct"] = np.array([len({read(t) for t in row}) for row in smp.texts], dtype=float)
    else:
        raw["distinct"] = np.array([len(set(row)) for row in smp.texts], dtype=float)
    return raw


def sample_rows(raw: dict, prompts: Sequence[str], *, temperature: float, score: str,
                extract_answer: Callable[[str], Any] | None = None, every_score: bool = False) -> Iterator[dict]:
    """Pools of :func:`collect_pools` as the rows of a samples file (:mod:`bonft.io`), prompt-major, one at a
    time (a large evaluation is written without holding every row in memory; the arguments are checked first).

    One row per response: ``prompt_id`` (the prompt's position in ``prompts``), ``prompt``, ``sample``
    (its index in the pool), ``score`` (verifier ``score``'s), ``reward`` (the evaluation verifier's),
    ``temperature``, ``response``, ``n_tokens`` and, given ``extract_answer``, ``answer`` (a str, an int or
    null; another value by its ``str``), and ``failed`` (the names of the verifiers that failed on it, whose
    score there is a stand-in, 0 or the lowest its verifier gave that evaluation, that judged nothing) on a response
    where one did.
    ``every_score``: also ``score_<name>`` for every verifier in ``raw["scores"]`` (``bonft estimate
    --score-field score_proxy`` then ranks by that verifier).
    """
    P, n = raw["rewards"].shape
    if len(prompts) != P:
        raise ValueError(f"prompts must hold the pools' P = {P} prompts, got {len(prompts)}")
    if score not in raw["scores"]:
        raise ValueError(f"score must name one of the pools' verifiers {sorted(raw['scores'])}, got {score!r}")
    names = sorted(raw["scores"]) if every_score else []
    read = answer_reader(extract_answer)

    def rows() -> Iterator[dict]:
        for b in range(P):
            for i in range(n):
                text = raw["texts"][b][i]
                row = {"prompt_id": b, "prompt": prompts[b], "sample": i, "score": float(raw["scores"][score][b, i]),
                       "reward": float(raw["rewards"][b, i]), "temperature": float(temperature), "response": text,
                       "n_tokens": int(raw["n_tokens"][b, i])}
                if read is not None:
                    row["answer"] = _answer_key(read(text))
                for name in names:
                    row[f"score_{name}"] = float(raw["scores"][name][b, i])
                failed = [name for name in sorted(raw.get("failed", {})) if raw["failed"][name][b, i]]
                if failed:
                    row["failed"] = failed
                yield row

    return rows()


class ExtractAnswerWarning(UserWarning):
    """A task's ``extract_answer`` raised on a model's response: that answer counts as missing (``None``)."""


_extract_warned: set[str] = set()


def answer_reader(extract: Callable[[str], Any] | None) -> Callable[[str], Any] | None:
    """``extract`` (a task's ``extract_answer``) made safe to call on any response, or None.

    A response is the model's text, so it can be anything: one that makes the extractor raise (a recursion
    limit, int's 4300-digit limit, a bug of a task's own) gives ``None``, a missing answer (a vote of its own),
    instead of ending a training run or an evaluation; the first such response per extractor is an
    :class:`ExtractAnswerWarning` naming the exception and the response's start, since a task whose extractor
    raises on most responses should be fixed, not trained on.
    """
    if extract is None:
        return None

    def read(text: str) -> Any:
        try:
            return extract(text)
        except Exception as e:  # noqa: BLE001 - a response must not end the run; said once below
            name = getattr(extract, "__qualname__", type(extract).__qualname__)
            if name not in _extract_warned:
                _extract_warned.add(name)
                warnings.warn(f"extract_answer ({name}) raised {type(e).__name__}: {str(e)[:120]} on a response "
                              f"starting {text[:60]!r}; such a response's answer counts as missing (shown once)",
                              ExtractAnswerWarning, stacklevel=2)
            return None

    return read


def _answer_key(answer: Any) -> str | int | None:
    """An extracted answer as the samples file keeps it: a str, an int or null (anything else by its ``str``,
    which keeps equal answers equal), so that :func:`bonft.io.read_samples` reads every file written here."""
    if answer is None or isinstance(answer, str) or (isinstance(answer, int) and not isinstance(answer, bool)):
        return answer
    return str(answer)


def merge_pools(parts: Sequence[dict]) -> dict:
    """Concatenate the ``raw`` pools of :func:`collect_pools` (e.g. gathered from ranks) along prompts."""
    parts = [p for p in parts if p is not None]
    cat = {key: np.concatenate([p[key] for p in parts]) for key in ("n_tokens", "seq_logp", "rewards", "distinct")}
    return {**cat, "texts": [row for p in parts for row in p["texts"]],
            "scores": {name: np.concatenate([p["scores"][name] for p in parts]) for name in parts[0]["scores"]},
            "failures": sum(p["failures"] for p in parts),
            "failed_by": {name: sum(p["failed_by"][name] for p in parts) for name in parts[0]["failed_by"]},
            "failed": {name: np.concatenate([p["failed"][name] for p in parts]) for name in parts[0]["failed"]},
            "cause": {name: next((p["cause"][name] for p in parts if p["cause"][name]), None) for name in parts[0]["cause"]}}


def check_verdicts(raw: dict) -> None:
    """A verifier that failed on every sample gives a row of zeros that reads as a policy that never succeeds:
    a ``VerifierError`` naming it and the first cause instead (a share of failures is counted in the report)."""
    total = int(np.asarray(raw["n_tokens"]).size)
    for name, failed in raw["failed_by"].items():
        if total and failed >= total:
            raise VerifierError(f"the verifier {name!r} failed on every one of the {total} evaluation samples "
                                f"({raw['cause'][name]}), so its row would read 0 for every prompt as if no response "
                                f"were right; fix it (bonft check-verifier tests one on a few samples) and evaluate again")


def report_from_pools(raw: dict, *, ks: Sequence[int], temperature: float, seed: int = 0, step: int = 0,
                      confidence: float = 0.95, n_boot: int = 1000, groups: Sequence[str] | None = None,
                      eval_verifier: str = "exact", verifier: str | None = None, top_p: float = 1.0,
                      top_k: int = 0) -> EvalReport:
    """The summarising half of :func:`evaluate_policy`: estimators and bootstrap CIs over all pools."""
    rewards, n_tokens = raw["rewards"], raw["n_tokens"]
    P, n = rewards.shape
    ks = [int(k) for k in ks]
    pass_sum = summarize(rewards, rewards, ks=ks, confidence=confidence, n_boot=n_boot, seed=seed)
    best = {}
    order = sorted(raw["scores"], key=lambda name: name != verifier)  # the training verifier's row first
    for name in order:
        sc = raw["scores"][name]
        if name == eval_verifier:  # the verifier that gives the rewards: its row is pass@k itself
            continue
        s = summarize(sc, rewards, ks=ks, confidence=confidence, n_boot=n_boot, seed=seed)
        best[name] = _curve(s, "best_of_k")
    by_group = {}
    if groups is not None:
        per = np.asarray(pass_sum.per_prompt_pass_at_k)  # (P, K)
        labels = np.asarray([str(g) for g in groups])
        for g in sorted(set(labels.tolist())):
            sel = labels == g
            by_group[g] = {"n_prompts": int(sel.sum()), "pass_at_k": [float(v) for v in per[sel].mean(0)]}
    return EvalReport(
        step=int(step), ks=ks, n_prompts=P, n_samples=n, temperature=float(temperature),
        pass_at_k=_curve(pass_sum, "pass_at_k"), best_of_k=best,
        mean_reward=float(rewards.mean()), mean_length=float(n_tokens.mean()),
        distinct_answers=float(raw["distinct"].mean()), entropy=float(-raw["seq_logp"].mean()) + 0.0,
        verifier_failures=int(raw["failures"]), by_group=by_group, eval_verifier=eval_verifier, verifier=verifier or "",
        top_p=float(top_p), top_k=int(top_k),
    )


def evaluate_run(run: Run, step: int, *, samples_to: Path | None = None) -> EvalReport | None:
    """Evaluate on the held-out prompts (same prompts and seeds at every evaluation); None on ranks > 0.

    Each rank samples and scores its block of the held-out prompts (prompt j from
    its own seed, so the pools do not depend on the number of ranks); rank 0
    gathers the pools and runs the estimators once on all of them. ``samples_to``:
    rank 0 also writes every sample there as a samples file (:func:`sample_rows`,
    ``score`` being the training verifier's, ``score_<name>`` every verifier's), atomically;
    a write that fails (a full disk, a row that is not JSON) is a ``RuntimeWarning`` naming the path and
    the cause, and the file is left as it was.
    """
    cfg = run.cfg
    held = run.eval[: cfg.eval_prompts or len(run.eval)]
    vers = {name: v for name, v in run.verifiers.items() if name != "train"}
    eval_verifier = run.roles.eval_verifier_name if run.roles is not None else "exact"
    verifier = run.roles.verifier_name if run.roles is not None else None
    a, b = shard_bounds(len(held), rank=run.rank, world_size=run.world, allow_uneven=True)
    raw = None
    if b > a:
        raw = collect_pools(run.module, run.tokenizer, [e.prompt for e in held[a:b]], verifiers=vers,
                            extract_answer=getattr(run.task, "extract_answer", None), n=cfg.eval_samples,
                            temperature=cfg.eval_temperature, top_p=cfg.eval_top_p, top_k=cfg.eval_top_k,
                            max_new_tokens=cfg.max_new_tokens, seeds=[Stream.EVALUATION.for_prompt(cfg.seed, step=0, slot=j) for j in range(a, b)],
                            eval_verifier=eval_verifier)
    pools = gather_objects(raw, run.ctx)
    merged, problem = (merge_pools(pools), None) if run.is_main else (None, None)
    if run.is_main:
        try:
            check_verdicts(merged)
            if run.roles is not None:  # the training verifier as the default evaluation verifier: 0/1 rewards only
                check_eval_rewards(merged["rewards"], run.roles)
        except ValueError as e:
            problem = e
    said = None if problem is None else (type(problem) is VerifierError, str(problem))
    said = broadcast_object(said, run.ctx)  # every rank stops, none waits for a peer that left
    if said is not None:
        raise (VerifierError if said[0] else ValueError)(said[1])
    if not run.is_main:
        return None
    report = report_from_pools(merged, eval_verifier=eval_verifier, verifier=verifier, ks=cfg.eval_ks, temperature=cfg.eval_temperature,
                             seed=Stream.EVALUATION.seed(cfg.seed, step=0), step=step, confidence=cfg.confidence,
                             n_boot=cfg.n_boot, groups=[(e.meta or {}).get("family", "all") for e in held],
                             top_p=cfg.eval_top_p, top_k=cfg.eval_top_k)
    if samples_to is not None:
        rows = sample_rows(merged, [e.prompt for e in held], temperature=cfg.eval_temperature,
                           score=verifier if verifier in merged["scores"] else eval_verifier,
                           extract_answer=getattr(run.task, "extract_answer", None), every_score=True)
        try:  # a by-product: a full disk or an odd row must not cost the run its final checkpoint, written next
            write_samples(samples_to, rows)
        except (OSError, ValueError, TypeError) as e:
            warnings.warn(f"the final evaluation's samples were not written to {samples_to} ({type(e).__name__}: {e}); "
                          "the evaluation and the checkpoints are not affected", RuntimeWarning, stacklevel=2)
    return report
