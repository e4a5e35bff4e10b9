"""A kit to unit-test verifiers before spending compute on best-of-N.

A verifier that crashes, is non-deterministic, or can be gamed silently ruins
every number downstream. :func:`check_verifier` measures, on example pools:

* determinism: every sample scored ``repeats`` times (middle runs in
  reverse batch order, the last one sample per call) must get the same score,
  within this one process: a score that depends on Python's ``hash()`` of a
  str (salted per process unless ``PYTHONHASHSEED`` is set) differs between
  processes and still passes;
* failures: exceptions, NaN and timeouts (through
  :func:`bonft.verifiers.score_batch`), in any run, as a rate;
* batch calls: a call on a whole pool that fails (or returns the wrong number
  of scores) while each sample scored alone passes is a problem: score_batch
  then scores every such batch one sample per call, in training too;
* score range and latency per call;
* agreement with labels: accuracy at ``threshold`` and ROC AUC, over the
  samples that did not fail; and "wrong at the top": pools in which a response
  labelled wrong scores at or above every response labelled right, where
  best-of-k picks a wrong response (a forged pass, or a tie with one) however
  large k is;
* over-optimisation: the true reward of the verifier's best-of-k as k grows,
  against pass@k (the best true reward among k). Where best-of-k bends down while
  pass@k keeps rising, larger N selects the verifier's errors -- it is
  being gamed (reward hacking).

Hypothesis strategies (:func:`prompts`, :func:`responses`,
:func:`sample_pools`) generate awkward inputs (empty, unicode, huge numbers,
markers, code fences) for property tests of your own verifier.

Example pools: a list of dicts, either one pool per prompt
``{"prompt": str, "responses": [str, ...], "rewards": [float, ...], "labels": [bool, ...]}``
or one sample per item ``{"prompt", "response", "reward", "label"}`` (grouped
by prompt); ``rewards`` and ``labels`` are optional. Any other key is an error
(a misspelt ``rewrd`` would otherwise drop the rewards), a pool needs at least
one response, and rewards come with every sample or with none (with only some,
labels and curves would silently rest on part of the data). :func:`read_examples`
reads the per-sample form from JSON Lines.

A verifier that reads each prompt's data row (a function with a parameter named
``rows``, or an object with ``fields`` and ``bind(rows)`` such as
:class:`~bonft.verifiers.fields.UnitTests`) is bound to the examples' rows with
:func:`~bonft.verifiers.fields.bind_rows`, as the trainer binds it to the data:
every example then carries ``"row"``, a dict of its prompt's data fields
(``{"prompt": "jars 3+4", "response": "7", "row": {"total": 7}}``). A
row-reading verifier with an example lacking its row, a ``row`` given to a
verifier that reads none, or two rows for one prompt is an error.
"""
from __future__ import annotations

import math
import numbers
import time
from typing import Any, Mapping, Sequence

import numpy as np

from bonft._core.checks import check_int, check_real
from bonft._core.jsonl import decode_utf8, parse_object
from bonft.estimate import best_of_k_per_prompt, default_ks, pass_at_k_per_prompt
from bonft.verifiers.base import Verdicts
from bonft.verifiers.fields import bind_rows, needed_fields, reads_rows
from bonft.verifiers.report import VerifierReport, roc_auc
from bonft.verifiers.scoring import score_batch

__all__ = ["check_verifier", "read_examples", "VerifierReport", "roc_auc", "prompts", "responses", "sample_pools"]

_TRICKY = [
    "", " ", "answer:", "answer: ", "answer: 42", "The answer is −7.", "answer: ４２", "#### 1,234",
    "1e309", "-0", "nan", "inf", "NaN answer: nan", "\x00", "\u200f\u202e42", "```python\nprint(1)\n```",
    "answer: 1\nanswer: 2", "9" * 400, "💥" * 20, "\\boxed{3}", "a" * 2000,
]


# ----------------------------------------------------------------------------- strategies
def prompts(*, max_size: int = 80):
    """Hypothesis strategy of prompt strings: random unicode text and a few tricky fixed ones."""
    from hypothesis import strategies as st

    return st.one_of(st.text(max_size=max_size), st.sampled_from(["", "What is 2+2?", "Q: ½ of 10?", "日本語の質問"]))


def responses(*, max_size: int = 200):
    """Hypothesis strategy of response strings: random text, answer-like text and edge cases."""
    from hypothesis import strategies as st

    numberish = st.builds(lambda x, pre: f"{pre}{x}", st.one_of(st.integers(), st.floats(allow_nan=True)),
                          st.sampled_from(["", "answer: ", "The answer is ", "#### "]))
    return st.one_of(st.text(max_size=max_size), numberish, st.sampled_from(_TRICKY))


def sample_pools(n: int = 4, *, max_prompts: int = 3, rewards: bool = True):
    """Hypothesis strategy of example pools: 1..max_prompts dicts ``{"prompt", "responses", "rewards"}``,
    each with ``n`` responses (and 0/1 rewards when ``rewards``); ``n`` and ``max_prompts`` must be >= 1
    (:func:`check_verifier` refuses an empty pool)."""
    from hypothesis import strategies as st

    check_int("n", n, min=1)
    check_int("max_prompts", max_prompts, min=1)

    def pool(p: str):
        parts = {"prompt": st.just(p), "responses": st.lists(responses(), min_size=n, max_size=n)}
        if rewards:
            parts["rewards"] = st.lists(st.sampled_from([0.0, 1.0]), min_size=n, max_size=n)
        return st.fixed_dictionaries(parts)

    names = st.lists(prompts(), min_size=1, max_size=max_prompts, unique=True)
    return names.flatmap(lambda ps: st.tuples(*[pool(p) for p in ps]).map(list))


# ----------------------------------------------------------------------------- examples
def read_examples(path: str, *, temperature: float | None = None) -> list[dict]:
    """Per-sample JSON Lines ``{"prompt", "response", "reward"?, "label"?, "row"?}`` -> list of dicts.

    A line with ``prompt_id`` is a line of a samples file (``bonft sample``, a run's
    ``heldout_samples.jsonl``): its ``prompt``, ``response`` and ``reward`` are read; its other keys
    (``prompt_id``, ``sample``, ``score``, ``score_<name>``, ``temperature``, ``n_tokens``, ``answer``)
    describe the run and are left aside. Bytes that are not UTF-8, a line that is not one JSON object
    (or is nested too deeply), a key outside these, or a reward on some lines but not others is a
    ``ValueError`` naming the file and line.

    temperature: keep only the samples-file lines drawn at this temperature. A file holding several
                 temperatures needs it (pools mixing them would judge no one sampling setting); with it,
                 a line without ``temperature`` or a temperature the file lacks is a ``ValueError``.
    """
    if temperature is not None:
        temperature = check_real("temperature", temperature)
    with open(path, "rb") as f:
        text = decode_utf8(f.read(), str(path))
    out = []
    with_reward = without_reward = None  # first line of each kind
    temps: dict[float, int] = {}  # temperature -> number of lines
    for i, line in enumerate(text.split("\n"), 1):  # only "\n" ends a line: a JSON string may hold U+2028
        if not line.strip():
            continue
        row = parse_object(line, str(path), i, "an example")
        where = f"{path} line {i}"
        t = _line_temperature(row, where, temperature is not None)
        if t is not None:
            temps[t] = temps.get(t, 0) + 1
            if temperature is not None and t != temperature:
                continue
        row = _from_samples_file(row, where) if "prompt_id" in row else row
        _check_keys(row, where)
        if _has_rewards(row):
            with_reward = with_reward or i
        else:
            without_reward = without_reward or i
        out.append(row)
    listed = ", ".join(f"{t:g} ({c} lines)" for t, c in sorted(temps.items()))
    if temperature is None and len(temps) > 1:
        raise ValueError(f"{path} holds samples drawn at {len(temps)} temperatures, {listed}: pools mixing them "
                         "judge no one sampling setting; choose one with --temperature T (read_examples(path, "
                         "temperature=T))")
    if temperature is not None and temperature not in temps:
        raise ValueError(f"temperature={temperature:g} matches no line of {path}: its samples were drawn at {listed}")
    if not out:
        raise ValueError(f"examples file {path} must hold at least one example, got none")
    if with_reward and without_reward:
        raise ValueError(f"{path} line {without_reward} has no reward but line {with_reward} has one: give every "
                         f"sample a reward or none (the rewards give the labels and the best-of-k curve)")
    return out


def _line_temperature(row: dict, where: str, chosen: bool) -> float | None:
    """A samples-file line's temperature (None on other lines); with a temperature chosen, every line needs one."""
    t = row.get("temperature") if "prompt_id" in row else None
    if t is None:
        if chosen:
            raise ValueError(f"{where} has no temperature, so choosing a temperature cannot take effect: it applies "
                             "to a samples file (bonft sample, a run's heldout_samples.jsonl); drop it")
        return None
    if isinstance(t, bool) or not isinstance(t, numbers.Real) or not math.isfinite(t):
        raise ValueError(f"{where} has temperature {t!r}: a samples file gives a finite number")
    return float(t)


_SAMPLES_FILE_KEYS = ("prompt_id", "prompt", "response", "reward", "sample", "score", "temperature", "n_tokens", "answer")


def _from_samples_file(row: dict, where: str) -> dict:
    """A samples-file line (it has ``prompt_id``) -> an example ``{"prompt", "response", "reward"?}``."""
    unknown = [k for k in row if k not in _SAMPLES_FILE_KEYS and not k.startswith("score_")]
    if unknown:
        raise ValueError(f"{where} has unknown key {unknown[0]!r}: a samples-file line (it has 'prompt_id') takes "
                         f"the keys {', '.join(_SAMPLES_FILE_KEYS)} and score_<verifier>")
    for key in ("prompt", "response"):
        if key not in row:
            raise ValueError(f"{where} is a samples-file line (it has 'prompt_id') without {key!r}: the verifier is "
                             f"called with each sample's prompt and response text, so both are needed")
    return {k: row[k] for k in ("prompt", "response", "reward") if k in row}


_POOL_KEYS = ("prompt", "responses", "rewards", "labels", "row")
_SAMPLE_KEYS = ("prompt", "response", "reward", "label", "row")


def _check_keys(ex: Mapping, where: str) -> None:
    """``ex`` is a pool (has ``responses``) or a sample (has ``response``) with only that form's keys."""
    form = _POOL_KEYS if "responses" in ex else _SAMPLE_KEYS if "response" in ex else None
    if form is None:
        raise ValueError(f"{where} must have a 'responses' list or a 'response', got keys {sorted(map(str, ex))}")
    unknown = [key for key in ex if key not in form]
    if unknown:
        pool = form is _POOL_KEYS
        other = _SAMPLE_KEYS if pool else _POOL_KEYS
        raise ValueError(f"{where} has unknown key {unknown[0]!r}: a {'pool' if pool else 'sample'} takes only the keys "
                         f"{', '.join(form)} (a {'sample' if pool else 'pool'} takes {', '.join(other)})")


def _has_rewards(ex: Mapping) -> bool:
    return ex.get("rewards" if "responses" in ex else "reward") is not None


def _pools(examples: Any, labels: Any) -> list[dict]:
    """Normalise examples to pools ``{"prompt", "responses", "rewards" | None, "labels" | None}``."""
    if isinstance(examples, (str, bytes, Mapping)) or not isinstance(examples, Sequence):
        raise TypeError(f"examples must be a list of dicts (pools or samples), got {type(examples).__name__}")
    if not examples:
        raise ValueError("examples must not be empty")
    pools: dict[str, dict] = {}
    n_rewarded, first_without = 0, None  # first_without: (example index, prompt) of the first sample with no reward
    for i, ex in enumerate(examples):
        if not isinstance(ex, Mapping):
            raise TypeError(f"examples[{i}] must be a dict, got {type(ex).__name__}")
        _check_keys(ex, f"examples[{i}]")
        p = ex.get("prompt")
        if not isinstance(p, str):
            raise TypeError(f"examples[{i}]['prompt'] must be a str, got {type(p).__name__}")
        if "responses" in ex:
            rs = ex["responses"]
            if isinstance(rs, str) or not isinstance(rs, Sequence) or not all(isinstance(r, str) for r in rs):
                raise TypeError(f"examples[{i}]['responses'] must be a list of str")
            if not rs:
                raise ValueError(f"examples[{i}]['responses'] must hold at least one response, got an empty list "
                                 f"(prompt {p!r:.40})")
            rw, lb = ex.get("rewards"), ex.get("labels")
            for key, vals in (("rewards", rw), ("labels", lb)):
                if vals is not None and len(vals) != len(rs):
                    raise ValueError(f"examples[{i}]['{key}'] must have {len(rs)} entries like 'responses', got {len(vals)}")
            items = [(r, None if rw is None else rw[j], None if lb is None else lb[j]) for j, r in enumerate(rs)]
        else:
            if not isinstance(ex["response"], str):
                raise TypeError(f"examples[{i}]['response'] must be a str, got {type(ex['response']).__name__}")
            items = [(ex["response"], ex.get("reward"), ex.get("label"))]
        rewarded = _has_rewards(ex)
        if rewarded:
            n_rewarded += len(items)
        elif first_without is None:
            first_without = (i, p)
        pool = pools.setdefault(p, {"prompt": p, "responses": [], "rewards": [], "labels": []})
        for r, rw, lb in items:
            if rewarded and (isinstance(rw, str) or not isinstance(rw, numbers.Real) or not math.isfinite(rw)):
                raise ValueError(f"examples[{i}] rewards must be finite numbers, got {rw!r}")
            pool["responses"].append(r)
            pool["rewards"].append(None if rw is None else float(rw))
            pool["labels"].append(None if lb is None else bool(lb))
    out = list(pools.values())
    if n_rewarded and first_without is not None:
        i, p = first_without
        n = sum(len(pool["responses"]) for pool in out)
        raise ValueError(f"rewards must come with every sample or with none: {n_rewarded} of {n} samples have one, "
                         f"examples[{i}] (prompt {p!r:.40}) has none")
    if labels is not None:
        if len(labels) != len(out):
            raise ValueError(f"labels must have one list per prompt ({len(out)}), got {len(labels)}")
        for pool, lb in zip(out, labels):
            if len(lb) != len(pool["responses"]):
                raise ValueError(f"labels for prompt {pool['prompt']!r:.40} must have {len(pool['responses'])} entries, got {len(lb)}")
            pool["labels"] = [bool(x) for x in lb]
    return out


def _verifier_name(verifier: Any) -> str:
    return getattr(verifier, "__name__", None) or type(verifier).__name__


def _example_rows(examples: Sequence[Mapping]) -> tuple[dict[str, tuple[dict, int]], tuple[int, str] | None,
                                                        int | None]:
    """``(prompt -> (row, first example index), (index, prompt) of the first example without a row,
    index of the first example with one)``; a row that is not a dict, or two rows for one prompt, is an error."""
    rows: dict[str, tuple[dict, int]] = {}
    without = with_row = None
    for i, ex in enumerate(examples):
        p = ex["prompt"]
        if "row" not in ex:
            without = without or (i, p)
            continue
        with_row = i if with_row is None else with_row
        row = ex["row"]
        if not isinstance(row, Mapping) or not all(isinstance(k, str) for k in row):
            raise TypeError(f"examples[{i}]['row'] must be a dict of the prompt's data fields (field name -> value), "
                            f"got {type(row).__name__} {row!r:.60}")
        if p in rows and rows[p][0] != dict(row):
            raise ValueError(f"examples[{i}]['row'] differs from examples[{rows[p][1]}]['row'] for the same prompt "
                             f"{p!r:.40}: a prompt has one data row")
        rows.setdefault(p, (dict(row), i))
    return rows, without, with_row


def _bind_examples(verifier: Any, examples: Sequence[Mapping]) -> Any:
    """``verifier`` bound to the examples' rows when it reads rows (as the trainer binds it to the data), else itself."""
    rows, without, with_row = _example_rows(examples)
    name = _verifier_name(verifier)
    if not reads_rows(verifier):
        if with_row is not None:
            raise ValueError(f"examples[{with_row}] has a 'row', but verifier {name} reads no data rows (it has neither "
                             "a parameter named 'rows' nor fields + bind), so the row cannot take effect; drop 'row'")
        return verifier
    if without is not None:
        i, p = without
        need = list(needed_fields(verifier))
        like = ", ".join(f'"{f}": ...' for f in need) if need else '"field": ...'
        raise ValueError(f"verifier {name} reads each prompt's data row, but examples[{i}] (prompt {p!r:.40}) has no "
                         f"'row': give every example its prompt's data fields, \"row\": {{{like}}} (on every line of "
                         "an examples file), or bind the rows of a recipe's data: bonft check-verifier --recipe RECIPE.toml")
    return bind_rows(verifier, [(p, row, f"examples[{i}]") for p, (row, i) in rows.items()])


def _check_kw(threshold, repeats, timeout, max_failure_rate, min_auc, bend_tol, rtol, pool_size) -> None:
    check_real("threshold", threshold)
    check_real("max_failure_rate", max_failure_rate, min=0.0, max=1.0)
    check_real("min_auc", min_auc, min=0.0, max=1.0)  # an AUC lies in [0, 1]: outside, every verifier passes or fails
    check_real("bend_tol", bend_tol, min=0.0)  # below 0 any peak before the largest k would count as a bend
    check_real("rtol", rtol, min=0.0)  # below 0 or NaN no two scores would agree
    if check_int("repeats", repeats) < 2:
        raise ValueError(f"repeats must be >= 2 to test determinism, got repeats={repeats}")
    if pool_size is not None:
        check_int("pool_size", pool_size, min=1)


# ----------------------------------------------------------------------------- the check
def check_verifier(
    verifier: Any,
    examples: Sequence[Mapping[str, Any]],
    *,
    labels: Sequence[Sequence[bool]] | None = None,
    threshold: float = 0.5,
    repeats: int = 2,
    ks: Sequence[int] | None = None,
    pool_size: int | None = None,
    timeout: float | None = None,
    max_failure_rate: float = 0.0,
    min_auc: float = 0.6,
    bend_tol: float = 0.02,
    rtol: float = 1e-5,
    max_wrong_top: float | None = None,
) -> VerifierReport:
    """Test ``verifier`` on example pools; returns a :class:`VerifierReport` (``.ok``, ``.problems``).

    examples:   pools per prompt (see the module docstring); an unknown key, an empty pool or
                rewards on only some samples is a ValueError. With a verifier that reads data rows,
                every example needs its ``row`` (a dict of fields); a ``row`` for any other verifier is
                a ValueError.
    labels:     one list of bools per pool (in order of first appearance);
                default the examples' labels, else ``reward > 0.5``.
    threshold:  a sample is predicted correct when its score is >= threshold.
    repeats:    times each sample is scored (>= 2): the first run scores each pool in one call, the
                runs between reverse the batch order, the last scores each sample alone, so scores
                that depend on the batch's order or make-up (padding) show up. All runs share one
                process: scores built on the per-process salt of ``hash()`` are not caught.
    ks:         best-of-k curve points; default 1, 2, 4, ... up to the smallest pool.
    pool_size:  use at most this many responses per prompt (the first ones).
    timeout:    seconds per verifier call, passed to :func:`bonft.verifiers.score_batch`.
    max_failure_rate, min_auc, bend_tol, rtol, max_wrong_top: what counts as a problem --
                failure rate above ``max_failure_rate``; AUC below ``min_auc``; a share above
                ``max_wrong_top`` (in [0, 1]) of the pools holding responses labelled right and
                wrong in which a wrong one scores at or above every right one. ``None`` (default):
                0 for a pass/fail checker (its scores take two values or fewer: a wrong response
                at its top is a false pass), no limit for graded scores (a reward model ranks some
                wrong responses first; AUC and the curve judge it), the count shown either way;
                best-of-k true reward falling more than ``bend_tol`` below its
                peak at the largest k; scores differing between runs by more than
                ``rtol`` relative to the score, or to the median |score| of its pool in the
                first run (at least 1e-12): a float32 model's score rounds differently in a padded
                batch than alone (RewardModel: up to 3e-7 on scores near 0.06, found
                "non-deterministic" by a purely relative 1e-6). ``min_auc`` must lie in
                [0, 1], ``max_failure_rate`` in [0, 1], ``bend_tol`` and ``rtol`` be >= 0.

    True rewards are the examples' rewards, else the rewards the verifier
    reports (e.g. :class:`~bonft.verifiers.NoisyProxy`); without either there
    are no curves. The curve uses ``bonft.estimate.best_of_k_per_prompt`` and
    ``pass_at_k_per_prompt`` (all k-subsets of each pool, exactly).
    """
    if not callable(verifier) and not hasattr(verifier, "bind"):
        raise TypeError(f"verifier must be callable as verifier(prompts, responses), got {type(verifier).__name__}")
    _check_kw(threshold, repeats, timeout, max_failure_rate, min_auc, bend_tol, rtol, pool_size)
    if max_wrong_top is not None:
        check_real("max_wrong_top", max_wrong_top, min=0.0, max=1.0)  # a share of pools
    pools = _pools(examples, labels)
    verifier = _bind_examples(verifier, examples)
    if pool_size is not None:
        for pool in pools:
            for key in ("responses", "rewards", "labels"):
                pool[key] = pool[key][:pool_size]

    # 1) score every pool `repeats` times: the first run one call per pool, the runs between in reverse order,
    #    the last one sample per call (a batch of one), so order- and batch-dependent scores both show up
    runs: list[list[Any]] = []
    latencies: list[float] = []  # of the whole-pool calls
    batch_calls: list[tuple[Verdicts, int]] = []  # (verdicts, pool size) of the whole-pool calls of 2 or more
    for rep in range(repeats):
        per_pool = []
        for pool in pools:
            if rep == repeats - 1:
                per_pool.append(_score_alone(verifier, pool, timeout))
                continue
            rs = pool["responses"] if rep == 0 else pool["responses"][::-1]
            t0 = time.perf_counter()
            v = score_batch(verifier, [pool["prompt"]] * len(rs), rs, timeout=timeout)
            latencies.append(time.perf_counter() - t0)
            if len(rs) > 1:
                batch_calls.append((v, len(rs)))
            if rep > 0:  # back to the original order
                v.scores, v.failed = v.scores[::-1], v.failed[::-1]
                v.rewards = None if v.rewards is None else v.rewards[::-1]
                v.reasons = v.reasons[::-1]
            per_pool.append(v)
        runs.append(per_pool)
    first = runs[0]
    n = sum(len(p["responses"]) for p in pools)
    rep = VerifierReport(n_prompts=len(pools), n_samples=n, repeats=repeats, n_nondeterministic=0, threshold=float(threshold))

    # 2) failures of the first run, then determinism: scores compared where both runs scored the sample; a
    #    sample that failed in a later run only is a failure of that run, named as such
    for v in first:
        for j in np.flatnonzero(v.failed):
            _count_failure(rep, v.reasons[j] or "failed")
    failed_later = [np.zeros(len(v), dtype=bool) for v in first]
    # rounding scales with the size of the scores a sample is batched with: its pool's median |score| (one outlier,
    # in the pool or elsewhere, must not hide scores that change from call to call)
    atols = [max(1e-12, rtol * (float(np.median(np.abs(v.scores[~v.failed]))) if (~v.failed).any() else 0.0))
             for v in first]
    for r, later in enumerate(runs[1:], 1):
        how = "alone" if r == repeats - 1 else "in the batch reversed"
        for i, (pool, a, b) in enumerate(zip(pools, first, later)):
            both = ~a.failed & ~b.failed
            same = np.isclose(a.scores, b.scores, rtol=rtol, atol=atols[i])
            for j in np.flatnonzero(both & ~same):
                rep.n_nondeterministic += 1
                if len(rep.nondeterministic_examples) < 3:
                    rep.nondeterministic_examples.append({"prompt": pool["prompt"][:80], "response": pool["responses"][j][:80],
                                                          "first": float(a.scores[j]), "again": float(b.scores[j]),
                                                          "again_scored": how})
            for j in np.flatnonzero(b.failed & ~a.failed & ~failed_later[i]):
                failed_later[i][j] = True
                _count_failure(rep, b.reasons[j] or "failed", f"failed when scored {how}: ")
    # 3) whole-pool calls that failed while each of their samples scored fine one per call: the batched call is
    #    broken, and score_batch (in training too) pays one call per sample on every such batch
    rep.n_batch_calls = len(batch_calls)
    for v, size in batch_calls:
        if v.batch_failure is not None and not v.failed.any():
            rep.n_batch_fallbacks += 1
            rep.batch_fallback_samples += size
            if len(rep.batch_failure_examples) < 3:
                rep.batch_failure_examples.append(v.batch_failure)
    # 4) scores and latency
    # (over the samples the first run scored: a failed sample's score is the stand-in failure_score)
    scores = [v.scores for v in first]
    flat = np.concatenate(scores)
    ok = ~np.concatenate([v.failed for v in first])
    rep.n_scored = int(ok.sum())
    if ok.any():
        good = flat[ok]
        rep.score_min, rep.score_max, rep.score_mean = float(good.min()), float(good.max()), float(good.mean())
        rep.pass_fail = bool(np.unique(good).size <= 2)  # a checker: its top is "pass"
    lat = np.array(latencies) * 1000.0
    rep.latency_ms_per_call = float(lat.mean())
    rep.latency_ms_p95 = float(np.percentile(lat, 95))
    rep.latency_ms_per_sample = float(lat.sum() / (n * (repeats - 1)))

    # true rewards: the examples', else the verifier's own
    true: list[np.ndarray] | None = []
    for pool, v in zip(pools, first):
        if all(r is not None for r in pool["rewards"]):
            true.append(np.array(pool["rewards"], dtype=np.float64))
        elif v.rewards is not None:
            true.append(v.rewards)
        else:
            true = None
            break

    # 5) agreement with labels
    lab_s, lab_y = [], []
    for i, pool in enumerate(pools):
        for j, lb in enumerate(pool["labels"]):
            if lb is None and true is not None:
                lb = bool(true[i][j] > 0.5)
            if lb is not None and not first[i].failed[j]:
                lab_s.append(scores[i][j])
                lab_y.append(lb)
    for i, pool in enumerate(pools):  # wrong at the top: best-of-k can pick a wrong response however large k is
        lb = [bool(true[i][j] > 0.5) if x is None and true is not None else x for j, x in enumerate(pool["labels"])]
        right = [j for j, x in enumerate(lb) if x is True and not first[i].failed[j]]
        wrong = [j for j, x in enumerate(lb) if x is False and not first[i].failed[j]]
        if right and wrong:
            rep.n_pools_mixed += 1
            best_right = max(scores[i][j] for j in right)
            top = max(wrong, key=lambda j: scores[i][j])
            if scores[i][top] >= best_right:
                rep.n_wrong_top += 1
                if len(rep.wrong_top_examples) < 3:
                    rep.wrong_top_examples.append({"prompt": pool["prompt"][:80], "response": pool["responses"][top][:80],
                                                   "score": float(scores[i][top]), "best_right": float(best_right)})
    if lab_y:
        s_arr, y_arr = np.array(lab_s), np.array(lab_y, dtype=bool)
        rep.n_labelled, rep.n_positive = len(y_arr), int(y_arr.sum())
        rep.accuracy = float(((s_arr >= threshold) == y_arr).mean())
        rep.auc = roc_auc(s_arr, y_arr)

    # 6) over-optimisation curve
    if true is not None:
        n_min = min(len(t) for t in true)
        kk = default_ks(n_min) if ks is None else list(ks)
        bok = best_of_k_per_prompt(scores, true, ks=kk).mean(axis=0)
        pak = pass_at_k_per_prompt(true, ks=kk).mean(axis=0)
        rep.ks, rep.best_of_k, rep.pass_at_k = [int(k) for k in kk], [float(x) for x in bok], [float(x) for x in pak]

    _problems(rep, max_failure_rate=max_failure_rate, min_auc=min_auc, bend_tol=bend_tol, max_wrong_top=max_wrong_top)
    return rep


def _score_alone(verifier: Any, pool: Mapping, timeout: float | None):
    """The pool's samples scored one per call, as a Verdicts of the pool (a score must not depend on its batch)."""
    vs = [score_batch(verifier, [pool["prompt"]], [r], timeout=timeout) for r in pool["responses"]]
    rewards = None if any(v.rewards is None for v in vs) else np.concatenate([v.rewards for v in vs])
    return Verdicts(scores=np.concatenate([v.scores for v in vs]), rewards=rewards,
                    failed=np.concatenate([v.failed for v in vs]), reasons=[v.reasons[0] for v in vs])


def _count_failure(rep: VerifierReport, reason: str, where: str = "") -> None:
    """Count one failed sample by its reason (score_batch's: ``"timeout after ..."``, ``"score is nan"``, ...)."""
    if reason.startswith("timeout"):
        rep.n_timeouts += 1
    elif reason.startswith(("score is", "reward is")):
        rep.n_nan += 1
    else:
        rep.n_exceptions += 1
    if len(rep.failure_examples) < 3:
        rep.failure_examples.append(where + reason)


def _problems(rep: VerifierReport, *, max_failure_rate: float, min_auc: float, bend_tol: float,
              max_wrong_top: float | None) -> None:
    n = rep.n_samples
    if rep.n_nondeterministic:
        e = rep.nondeterministic_examples[0]
        rep.problems.append(
            f"non-deterministic: {rep.n_nondeterministic} of {n * (rep.repeats - 1)} re-scored samples "
            f"({rep.n_nondeterministic / (n * (rep.repeats - 1)):.1%}) changed score within one process, e.g. "
            f"{e['first']:.6g} in the first batch then {e['again']:.6g} {e['again_scored']}"
        )
    if rep.n_batch_fallbacks:
        which = ("every" if rep.n_batch_fallbacks == rep.n_batch_calls
                 else f"{rep.n_batch_fallbacks} of {rep.n_batch_calls}")
        rep.problems.append(
            f"batch calls: the call on the whole pool failed though each sample scored alone passed, e.g. "
            f"{rep.batch_failure_examples[0]}: {which} pool call fell back to one call per sample "
            f"({rep.batch_fallback_samples / rep.n_batch_fallbacks:.3g} times the calls); training scores such "
            "batches the same way, that much slower"
        )
    if rep.failure_rate > max_failure_rate:
        rep.problems.append(
            f"failures: {rep.failure_rate:.1%} of {n} samples > max_failure_rate={max_failure_rate:g} "
            f"(exceptions {rep.n_exceptions}, NaN {rep.n_nan}, timeouts {rep.n_timeouts}), e.g. {rep.failure_examples[0]}"
        )
    if rep.n_scored > 1 and rep.score_min == rep.score_max:
        which = f"all {n} samples" if rep.n_scored == n else f"all {rep.n_scored} samples that did not fail"
        rep.problems.append(f"constant scores: {which} score {rep.score_min:g}, so best-of-k cannot select")
    if rep.n_labelled and rep.n_positive in (0, rep.n_labelled):
        which = "none" if rep.n_positive == 0 else "all"
        rep.problems.append(
            f"one-sided labels: {which} of the {rep.n_labelled} labelled samples are correct, so "
            "agreement with the labels (ROC AUC) and over-optimisation (best-of-k against pass@k) cannot be judged; "
            "give examples with both correct and wrong responses"
        )
    if rep.auc is not None and rep.auc < min_auc:
        rep.problems.append(
            f"low agreement: ROC AUC {rep.auc:.3f} < min_auc={min_auc:g} on {rep.n_labelled} labelled samples"
            f"{'' if rep.n_scored == n else ' that did not fail'} "
            f"({rep.n_positive} correct), accuracy {rep.accuracy:.3f} at threshold {rep.threshold:g}"
        )
    if len(rep.ks) >= 2:
        peak = int(np.argmax(rep.best_of_k))
        drop = rep.best_of_k[peak] - rep.best_of_k[-1]
        if peak < len(rep.ks) - 1 and drop > bend_tol:
            rep.problems.append(
                f"over-optimisation: best-of-k true reward peaks at k={rep.ks[peak]} ({rep.best_of_k[peak]:.3f}) and falls to "
                f"{rep.best_of_k[-1]:.3f} at k={rep.ks[-1]} while pass@k goes {rep.pass_at_k[peak]:.3f} -> {rep.pass_at_k[-1]:.3f}: "
                "larger N selects the verifier's errors (it is being gamed)"
            )
    limit = max_wrong_top if max_wrong_top is not None else (0.0 if rep.pass_fail else None)
    if limit is not None and rep.n_pools_mixed and rep.n_wrong_top / rep.n_pools_mixed > limit:
        e = rep.wrong_top_examples[0]
        why = (f"max_wrong_top={limit:g}" if max_wrong_top is not None else
               "a pass/fail checker: its scores take two values, so each is a false pass")
        rep.problems.append(
            f"wrong at the top: in {rep.n_wrong_top} of {rep.n_pools_mixed} pools with responses labelled right and "
            f"wrong, a wrong one scores at or above every right one ({why}), e.g. {e['response']!r} scores "
            f"{e['score']:.6g} for prompt {e['prompt']!r}, the best right response {e['best_right']:.6g}: there "
            "best-of-n over the whole pool picks the wrong response (on a tie, it may)"
        )
