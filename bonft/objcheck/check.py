"""Check an objective before training on it: is its credit an unbiased gradient of the target it claims?

A credit function ``credit(scores, rewards, *, k) -> w`` (``(B, n), (B, n) -> (B, n)``) turns a pool of
``n`` scored samples into weights, and training follows ``sum_i w_i grad log pi(y_i)`` (the loss
``bonft.objectives.losses.policy_gradient_loss(logprobs, w)``). :func:`check_objective` computes what that
estimate has as its *mean*, exactly, and compares it with the gradient of the target:

1. **Small categorical policies** (:mod:`bonft.objcheck.categorical`): every pool of ``n`` draws enumerated,
   the exact target gradient by autograd, checked against central finite differences. Random policies are
   drawn until the requested number have a non-zero target gradient (a flat target shows no bias).
2. **A tiny transformer** (:mod:`bonft.objcheck.transformer`): a GPT-2 from a config with all 64 responses
   enumerated, finite differences along random parameter directions, the exact expected loss gradient and a
   Monte Carlo interval.
3. **Variance** against leave-one-out REINFORCE on the same target with the same ``n`` samples.

Targets: ``"best_of_k"`` (``V_k``, the expected reward of the best-scored of k draws, ties broken at
random; Chow et al. 2024), ``"pass_at_k"`` (``1 - (1-p)^k``, Chen et al. 2021: 0/1 rewards and the
verifier is the reward, so the credit is called with ``scores = rewards``), ``"best_of_k_sft"``
(``log pi_bon(y*)`` of a reference outcome, Chow et al. 2024; the credit is called as
``credit(scores, reference_scores, *, k)`` with ``reference_scores: (B,)`` and the exact
``grad log pi(y*)`` term is added by the check), or a payoff ``payoff(scores, rewards) -> value`` of a set
of k samples, ``(M, k), (M, k) -> (M,)`` numpy float64, which must not depend on the order of the k samples.

The credit receives numpy float64 arrays and may return numpy or torch. The enumeration assumes the
samples are exchangeable (credit permutes with the samples); when it does not, ordered pools are used.

Caution: a check on toy policies shows that the credit estimates the gradient of the target; it cannot
show that the target is what you want. A verifier that can be fooled is still exploited (reward
hacking): keep a held-out true reward, and run model-written code only in a sandbox. The check runs the
credit (and a payoff) you hand it, in this process: load only code you have read.
"""
from __future__ import annotations

import contextlib
import signal
import threading
import time

import numpy as np

from bonft._core.checks import check_int, check_k, check_positive
from bonft.objcheck.categorical import categorical_case, check_policy, random_policy, target_gradient
from bonft.objcheck.enumeration import CreditRefused, Progress, check_pool_count, resolve_target
from bonft.objcheck.report import ObjectiveReport
from bonft.objcheck.transformer import class_scores, transformer_check

__all__ = ["check_objective", "CheckTimeout", "DRAWS_PER_POLICY", "FLAT_GRADIENT"]

DRAWS_PER_POLICY = 10  # random policies drawn per requested one before the check gives up on finding signal
FLAT_GRADIENT = 1e-12  # a target gradient with a smaller norm counts as zero (the policy is not informative)


class CheckTimeout(BaseException):
    """Raised inside the user's code when the time limit passes (a BaseException, so ``except Exception``
    in the user's credit does not swallow it)."""


@contextlib.contextmanager
def _time_limit(seconds: float | None):
    """Raise :class:`CheckTimeout` in the main thread after ``seconds`` (SIGALRM and an interval timer).

    A timer already running (a test runner's, say) is saved and re-armed with its remaining time afterwards.
    """
    if seconds is None:
        yield
        return
    start = time.monotonic()

    def fire(signum, frame):
        raise CheckTimeout()

    old_handler = signal.signal(signal.SIGALRM, fire)
    old_delay, old_interval = signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old_handler)
        if old_delay > 0:  # the earlier timer, less the time this check took (at least a moment)
            signal.setitimer(signal.ITIMER_REAL, max(old_delay - (time.monotonic() - start), 1e-3), old_interval)


def _check_time_limit(time_limit) -> float | None:
    if time_limit is None:
        return None
    time_limit = check_positive("time_limit", time_limit)  # finite and > 0
    if not hasattr(signal, "SIGALRM") or threading.current_thread() is not threading.main_thread():
        raise ValueError("time_limit needs the main thread of a process with SIGALRM (a POSIX system), got "
                         f"thread {threading.current_thread().name!r}; pass time_limit=None to check without a limit")
    return time_limit


def _check_reuse(reuse_shift, clip_ratio) -> tuple[float | None, float | None]:
    """``reuse_shift``: a finite number > 0 or None; ``clip_ratio``: > 0 or None, and only with a shift."""
    if reuse_shift is not None:
        reuse_shift = check_positive("reuse_shift", reuse_shift)
    if clip_ratio is not None:
        clip_ratio = check_positive("clip_ratio", clip_ratio)
        if reuse_shift is None:
            raise ValueError(f"clip_ratio={clip_ratio:g} needs reuse_shift (how far the sampling policy's logits are "
                             f"moved from the checked policy's): on-policy every ratio is 1 and nothing is clipped")
    return reuse_shift, clip_ratio


def _only_with(name: str, value, needs: str, why: str) -> None:
    """A setting given where it cannot take effect is an error, not ignored."""
    if value is not None:
        raise ValueError(f"{name}={value!r} has no effect {needs}: {why}; leave it unset")


def check_objective(credit, *, target, k, n, policies=4, outcomes=None, seed=0, transformer=True,
                    tolerance=1e-6, directions=None, mc_pools=None, time_limit=300.0, reuse_shift=None,
                    clip_ratio=None) -> ObjectiveReport:
    r"""Check that ``credit`` estimates the gradient of ``target`` without bias; report bias and variance.

    credit: ``(scores, rewards, *, k) -> w``, ``(B, n), (B, n) -> (B, n)`` (``"best_of_k_sft"``:
    ``(scores, reference_scores, *, k)`` with ``reference_scores: (B,)``); target: ``"best_of_k"``,
    ``"pass_at_k"``, ``"best_of_k_sft"`` or a payoff ``(M, k), (M, k) -> (M,)``; policies: how many
    informative random categorical policies over ``outcomes`` outcomes (default 4), or a list of
    :class:`bonft.objcheck.ToyPolicy` (then ``outcomes`` is an error: each policy has its own);
    directions, mc_pools: finite-difference directions (default 3) and Monte Carlo pools (default 400)
    of the transformer check, errors with ``transformer=False``.

    .. math:: \mathrm{bias} = \sum_{\text{pools}} P(\text{pool}) \sum_i w_i \nabla\log\pi(y_i) - \nabla V_k(\theta)

    The credit passes when the relative bias ``|bias| / |grad V_k|`` stays within ``tolerance`` on every
    policy and on the transformer, the exact gradient agrees with finite differences, and the Monte Carlo
    interval on the transformer covers the finite-difference derivative.

    Evidence: a policy whose target gradient is zero (norm below ``FLAT_GRADIENT``) cannot show bias.
    Random policies are drawn until ``policies`` of them are informative, at most ``DRAWS_PER_POLICY``
    times as many; finding fewer is a problem naming how many were found. Given policies are all checked,
    and a flat one is a problem too. The report states the counts.

    Time limit: the whole check may run ``time_limit`` seconds (None: no limit). A SIGALRM timer in the
    main thread interrupts the user's credit or payoff where it is; the check then reports a problem
    naming the policy and the pools the function was working on. Python code is interrupted at once; a
    long call inside a C extension only when it returns. Needs the main thread on a POSIX system.

    Problems are sentences with the numbers in ``report.problems``; ``report.ok`` is ``not problems``.

    Refused credits: the credit is called twice on the same pools and on a few pools alone; one whose
    numbers differ between the calls (random tie-breaking: seed it or average over ties) or whose row of a
    pool depends on the other pools of the batch (a baseline averaged over axis 0 or the whole batch) is a
    problem saying so, and the check stops there. Size: every policy's ``C(V + n - 1, n)`` pools are
    enumerated (the transformer's with V its 6 score/reward classes, 2 for pass@k, 3 for best_of_k_sft);
    more than :data:`bonft.objcheck.enumeration.MAX_ROWS` is a ``ValueError`` naming ``n`` and the outcomes.

    Sample reuse (``reuse_shift``, optionally ``clip_ratio``): on every categorical policy the pools are
    also enumerated under a sampling policy moved away from it, logits ``theta + reuse_shift * z`` with
    ``z`` standard normal (drawn from ``seed``), and the mean of the importance-weighted gradient
    ``sum_i w_i r_i grad log pi(y_i)``, ``r_i = pi(y_i)/pi_old(y_i)``, is compared exactly with the
    target's gradient at ``theta``; with ``clip_ratio = eps`` also the clipped surrogate's (Schulman et al.
    2017: a term is dropped once its ratio leaves ``[1 - eps, 1 + eps]`` in its credit's direction).
    The relative biases are reported per policy (``case["reuse"]``, :attr:`ObjectiveReport.clip_bias`),
    not judged: clipping is biased by design, and so is the per-sample ratio for credit with k > 1
    (see :mod:`bonft.objectives.losses`).

    References: Chow et al. 2024 (best-of-k targets); Chen et al. 2021 (pass@k); Kool et al. 2019
    (leave-one-out REINFORCE); Schulman et al. 2017 (the clipped surrogate).
    """
    if not callable(credit):
        raise TypeError(f"credit must be callable (scores, rewards, *, k) -> credit, got {type(credit).__name__}")
    t = resolve_target(target)
    n = check_int("n", n, min=1)
    k = check_k(k, n)
    seed = check_int("seed", seed, min=0)
    tolerance = check_positive("tolerance", tolerance)
    if not isinstance(transformer, bool):
        raise TypeError(f"transformer must be a bool, got {type(transformer).__name__} {transformer!r}")
    if transformer:
        directions = 3 if directions is None else check_int("directions", directions, min=1)
        mc_pools = 400 if mc_pools is None else check_int("mc_pools", mc_pools, min=2)
    else:
        why = "it sizes the transformer check, which is skipped"
        _only_with("directions", directions, "with transformer=False", why)
        _only_with("mc_pools", mc_pools, "with transformer=False", why)
    time_limit = _check_time_limit(time_limit)
    reuse_shift, clip_ratio = _check_reuse(reuse_shift, clip_ratio)
    reuse_rng = np.random.default_rng([seed, 1])  # its own stream: the rest of the check draws as without reuse
    rng = np.random.default_rng(seed)
    given = isinstance(policies, (list, tuple))
    if given:
        if not policies:
            raise ValueError("policies must not be empty")
        _only_with("outcomes", outcomes, "with a list of policies",
                   "it sizes the random policies, and each given ToyPolicy has its own outcomes")
        pols = [check_policy(j, c, t) for j, c in enumerate(policies)]
        requested, V = len(pols), None
    else:
        requested = check_int("policies", policies, min=1)
        V = 4 if outcomes is None else check_int("outcomes", outcomes, min=2, max=12)
        pols = []
    if given:
        j = max(range(len(pols)), key=lambda j: len(pols[j].logits))
        check_pool_count(len(pols[j].logits), n, f"policies[{j}]'s {len(pols[j].logits)} outcomes",
                         "lower n or give policies with fewer outcomes")
    else:
        check_pool_count(V, n, f"outcomes={V}", "lower n or outcomes")
    if transformer:
        C = len(class_scores(t.name))
        check_pool_count(C, n, f"the transformer's {C} score/reward classes",
                         "lower n, or pass transformer=False (--skip-transformer) to check the categorical policies only")
    report = ObjectiveReport(target=t.name, k=k, n=n, tolerance=tolerance, time_limit=time_limit,
                             policies_requested=requested, reuse_shift=reuse_shift, clip_ratio=clip_ratio)
    progress = Progress()
    flat: list[int] = []
    try:
        with _time_limit(time_limit):
            j = 0
            while (j < len(pols)) if given else (report.policies_informative < requested
                                                 and j < DRAWS_PER_POLICY * requested):
                pol = pols[j] if given else random_policy(rng, V, t)
                j += 1
                report.policies_drawn = j
                progress.policy = f"policy {j} ({len(pol.logits)} outcomes)"
                progress.pools = ""
                grads = target_gradient(t, pol, k, progress)
                informative = float(np.linalg.norm(grads[0])) > FLAT_GRADIENT
                report.policies_informative += informative
                if not informative:
                    flat.append(j)
                    if not given:
                        continue  # a drawn flat policy is skipped: it would pass any credit
                sampling = None
                if reuse_shift is not None:
                    sampling = np.asarray(pol.logits, np.float64) + reuse_shift * reuse_rng.normal(size=len(pol.logits))
                report.cases.append(categorical_case(credit, t, pol, k, n, seed + len(report.cases), grads=grads,
                                                     progress=progress, sampling_logits=sampling,
                                                     clip_ratio=clip_ratio))
            if transformer:
                progress.policy, progress.pools = "the transformer", ""
                ordered = any(c["ordered_pools"] for c in report.cases)
                report.transformer = transformer_check(credit, t, k, n, ordered=ordered, seed=seed, tolerance=tolerance,
                                                       directions=directions, mc_pools=mc_pools, progress=progress)
    except CheckTimeout:
        report.problems.append(
            f"the {progress.function} did not return within the time limit of {time_limit:g} s: it was working on "
            f"{progress.describe()} (stopped there; raise time_limit or make the {progress.function} faster)")
    except CreditRefused as e:  # not deterministic, or mixes the pools of a batch: no mean to compare
        report.problems.append(str(e))
    except Exception as e:  # the user's credit or payoff failed: a finding, reported with what it said
        report.problems.append(f"the check could not run: {type(e).__name__}: {e}")
    else:
        if given and flat:
            report.problems.append(
                f"only {report.policies_informative} of {requested} given policies have a non-zero gradient of the "
                f"target (flat: policy {', '.join(map(str, flat))}): a flat target cannot show bias")
        elif not given and report.policies_informative < requested:
            report.problems.append(
                f"only {report.policies_informative} of {report.policies_drawn} random policies had a non-zero "
                f"gradient of the target ({requested} requested): too little evidence; the target may be flat for "
                f"most policies (a thresholded reward?): pass policies=[ToyPolicy(...)] on which it varies")
    report.judge()
    return report
