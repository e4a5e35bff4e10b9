"""The report of :func:`bonft.testing.check_verifier`, and the ROC AUC it uses."""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np
from scipy.stats import rankdata

from bonft.viz import plot_verifier_check


def roc_auc(scores: Any, labels: Any) -> float | None:
    """Area under the ROC curve: ``(N,), (N,) bool -> float``, None if a class is empty.

    The Mann-Whitney form (Mann & Whitney 1947): the chance that a random
    positive scores above a random negative, ties counting one half::

        AUC = (sum of the positives' average ranks - n1 (n1 + 1) / 2) / (n1 * n0)
    """
    s = np.asarray(scores, dtype=np.float64).reshape(-1)
    y = np.asarray(labels, dtype=bool).reshape(-1)
    n1 = int(y.sum())
    n0 = y.size - n1
    if n1 == 0 or n0 == 0:
        return None
    ranks = rankdata(s)  # average ranks: ties share the mean of their positions
    return float((ranks[y].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


@dataclass
class VerifierReport:
    """What :func:`bonft.testing.check_verifier` found. ``ok`` is ``not problems``.

    Failures count every sample that failed in any run (``failure_examples`` name the run where it failed only
    there, e.g. ``"failed when scored alone: RuntimeError: ..."``). Determinism compares the scores of samples
    that every run scored, within this one process. The score range, constant scores and agreement with the
    labels use the ``n_scored`` samples the first run scored (a failed sample holds the stand-in failure score).
    ``n_batch_fallbacks`` of the ``n_batch_calls`` whole-pool calls failed though each of their samples
    scored alone passed (``batch_fallback_samples`` calls were made for them, one per sample).

    Curves: ``best_of_k[j]`` is the mean true reward of the verifier's pick among
    ``ks[j]`` samples, ``pass_at_k[j]`` the best true reward among ``ks[j]``
    (pass@k for 0/1 rewards), both averaged over prompts.
    """

    n_prompts: int
    n_samples: int
    repeats: int
    n_nondeterministic: int
    nondeterministic_examples: list[dict] = field(default_factory=list)
    n_exceptions: int = 0
    n_nan: int = 0
    n_timeouts: int = 0
    failure_examples: list[str] = field(default_factory=list)
    n_scored: int = 0
    n_batch_calls: int = 0
    n_batch_fallbacks: int = 0
    batch_fallback_samples: int = 0
    batch_failure_examples: list[str] = field(default_factory=list)
    score_min: float = math.nan
    score_max: float = math.nan
    score_mean: float = math.nan
    latency_ms_per_call: float = math.nan
    latency_ms_p95: float = math.nan
    latency_ms_per_sample: float = math.nan
    n_labelled: int = 0
    n_positive: int = 0
    threshold: float = 0.5
    accuracy: float | None = None
    auc: float | None = None
    pass_fail: bool = False
    n_pools_mixed: int = 0
    n_wrong_top: int = 0
    wrong_top_examples: list[dict] = field(default_factory=list)
    ks: list[int] = field(default_factory=list)
    best_of_k: list[float] = field(default_factory=list)
    pass_at_k: list[float] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)

    @property
    def ok(self) -> bool:
        return not self.problems

    @property
    def failure_rate(self) -> float:
        return (self.n_exceptions + self.n_nan + self.n_timeouts) / max(self.n_samples, 1)

    def to_dict(self) -> dict:
        """Plain JSON-able dict (None where a figure could not be computed)."""
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, float) and not math.isfinite(v):
                d[k] = None
        d["ok"] = self.ok
        d["failure_rate"] = self.failure_rate
        return d

    def __str__(self) -> str:
        def f(x: float | None, spec: str = ".4g") -> str:
            return "n/a" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, spec)

        n = self.n_samples
        rows = [
            ("prompts / samples", f"{self.n_prompts} / {n}"),
            ("determinism", f"{self.n_nondeterministic} of {n * (self.repeats - 1)} re-scored samples differ over "
                            f"{self.repeats} runs within one process"),
            ("failures", f"{self.failure_rate:.1%} (exceptions {self.n_exceptions}, NaN {self.n_nan}, timeouts {self.n_timeouts})"),
            ("batch calls", f"{self.n_batch_fallbacks} of {self.n_batch_calls} fell back to one call per sample"),
            ("score range", "n/a (every sample failed)" if self.n_scored == 0 and n else
                            f"[{f(self.score_min)}, {f(self.score_max)}], mean {f(self.score_mean)}"
                            + ("" if self.n_scored == n else f" over the {self.n_scored} samples that did not fail")),
            ("latency", f"{f(self.latency_ms_per_call, '.3g')} ms/call (p95 {f(self.latency_ms_p95, '.3g')}), "
                        f"{f(self.latency_ms_per_sample, '.3g')} ms/sample"),
            ("labelled", f"{self.n_labelled} ({self.n_positive} correct)"
                         + ("" if self.n_scored == n else ", samples that failed left out")),
            (f"accuracy @ {self.threshold:g}", f(self.accuracy, ".3f")),
            ("ROC AUC", f(self.auc, ".3f")),
            ("wrong at the top", f"{self.n_wrong_top} of {self.n_pools_mixed} pools with right and wrong responses"
                                 if self.n_pools_mixed else "n/a (no pool with both right and wrong labelled responses)"),
        ]
        w = max(len(k) for k, _ in rows)
        lines = ["verifier check: " + ("OK" if self.ok else f"{len(self.problems)} problem(s)")]
        lines += [f"  {k:<{w}}  {v}" for k, v in rows]
        if self.ks:
            lines.append(f"  {'k':>6}  {'best-of-k':>10}  {'pass@k':>8}  {'gap':>7}")
            for k, b, o in zip(self.ks, self.best_of_k, self.pass_at_k):
                lines.append(f"  {k:>6}  {b:>10.4f}  {o:>8.4f}  {o - b:>7.4f}")
        lines += [f"  PROBLEM: {p}" for p in self.problems]
        return "\n".join(lines)

    def plot(self, path: str) -> str:
        """Plot best-of-k (verifier's pick) against pass@k as k grows, to ``path`` (PNG); returns ``path``."""
        return plot_verifier_check(self, path)
