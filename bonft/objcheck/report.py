"""The report of :func:`bonft.objcheck.check_objective`: verdict, table, dict, plot."""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

FD_TOLERANCE = 1e-5  # relative disagreement of the exact gradient with central finite differences
MC_Z = 3.2905  # two-sided 99.9% normal quantile (standard normal table)


def _direction(proj: float, cos: float) -> str:
    if proj < 0:
        way = f"points against the exact gradient (projection {proj:.3f}: wrong sign)"
    elif proj < 1:
        way = f"shrinks the exact gradient to {proj:.3f} x along it"
    else:
        way = f"inflates the exact gradient to {proj:.3f} x along it"
    return way + (f" and turns away from it (cosine {cos:.4f})" if cos < 0.9999 else f" (cosine {cos:.4f})")


@dataclass
class ObjectiveReport:
    """What :func:`bonft.testing.check_objective` found; ``ok`` is ``not problems``.

    ``cases``: one dict per categorical policy (``rel_error`` = |E[g] - grad V| / |grad V|,
    ``max_abs_error``, ``projection`` = <E[g], grad V> / |grad V|^2, ``cosine``, ``fd_error``,
    ``variance`` = trace Cov(g) over pools, ``reinforce_variance`` of leave-one-out REINFORCE on
    the same target and n, and the vectors ``exact``, ``estimate``, ``finite_diff``).
    ``transformer``: the same figures on a tiny causal LM, with per-direction derivatives.
    ``policies_requested`` / ``policies_drawn`` / ``policies_informative``: how many categorical policies were
    asked for, drawn (random ones until enough are informative) and informative (a non-zero target gradient;
    only those are checked when drawn at random). ``time_limit``: seconds the check may run (None: no limit).
    """

    target: str
    k: int
    n: int
    tolerance: float
    time_limit: float | None = None
    policies_requested: int = 0
    policies_drawn: int = 0
    policies_informative: int = 0
    cases: list[dict] = field(default_factory=list)
    transformer: dict | None = None
    problems: list[str] = field(default_factory=list)
    reuse_shift: float | None = None
    clip_ratio: float | None = None

    @property
    def ok(self) -> bool:
        return not self.problems

    @property
    def clip_bias(self) -> float:
        """Largest relative bias ``|E_old[g_clipped] - grad V| / |grad V|`` of the clipped importance-weighted
        gradient over the policies (``check_objective(..., reuse_shift=..., clip_ratio=...)``); NaN if not measured."""
        vals = [c["reuse"]["rel_bias_clipped"] for c in self.cases if c.get("reuse") and "rel_bias_clipped" in c["reuse"]]
        return max(vals) if vals else math.nan

    @property
    def reuse_bias(self) -> float:
        """Largest relative bias of the unclipped importance-weighted gradient (with ``reuse_shift``); NaN if not measured."""
        vals = [c["reuse"]["rel_bias_unclipped"] for c in self.cases if c.get("reuse")]
        return max(vals) if vals else math.nan

    @property
    def max_rel_error(self) -> float:
        vals = [c["rel_error"] for c in self.cases]
        if self.transformer and self.transformer.get("rel_error") is not None:
            vals.append(self.transformer["rel_error"])
        return max(vals) if vals else math.nan

    @property
    def max_abs_error(self) -> float:
        return max((c["max_abs_error"] for c in self.cases), default=math.nan)

    @property
    def worst_case(self) -> dict | None:
        return max(self.cases, key=lambda c: c["rel_error"]) if self.cases else None

    @property
    def variance_ratio(self) -> float:
        """Mean gradient variance of the credit over that of leave-one-out REINFORCE (NaN if unknown)."""
        pairs = [(c["variance"], c["reinforce_variance"]) for c in self.cases if c["reinforce_variance"]]
        if not pairs:
            return math.nan
        return sum(a for a, _ in pairs) / sum(b for _, b in pairs)

    def judge(self) -> None:
        """Turn the measured figures into problem sentences (called once by check_objective)."""
        what = {"best_of_k": f"the best-of-{self.k} value V_{self.k}", "pass_at_k": f"pass@{self.k}",
                "best_of_k_sft": f"log pi_bon(y*) at k={self.k}"}.get(self.target, f"the payoff {self.target!r} at k={self.k}")
        bad = [c for c in self.cases if c["rel_error"] > self.tolerance]
        if bad:
            c = max(bad, key=lambda c: c["rel_error"])
            j = self.cases.index(c) + 1
            self.problems.append(
                f"biased for {what} with n={self.n}: on {len(bad)} of {len(self.cases)} policies the mean estimate "
                f"misses the exact gradient; worst on policy {j} ({c['outcomes']} outcomes): relative error "
                f"{c['rel_error']:.3g} (largest component error {c['max_abs_error']:.3g}, tolerance "
                f"{self.tolerance:g}); the mean estimate {_direction(c['projection'], c['cosine'])}")
        fd = [c for c in self.cases if c["fd_error"] > FD_TOLERANCE]
        if fd:
            c = max(fd, key=lambda c: c["fd_error"])
            self.problems.append(
                f"the exact gradient of the target disagrees with central finite differences by {c['fd_error']:.3g} "
                f"(relative, > {FD_TOLERANCE:g}) on policy {self.cases.index(c) + 1}: the payoff may not be a smooth, "
                f"deterministic function of the scores and rewards")
        tr = self.transformer
        if not tr:
            return
        if tr.get("rel_error") is not None and tr["rel_error"] > self.tolerance:
            self.problems.append(
                f"biased on the transformer ({tr['responses']} responses, {tr['parameters']} parameters): the "
                f"expected loss gradient misses the exact gradient of {what} by {tr['rel_error']:.3g} of its norm; "
                f"it {_direction(tr['projection'], tr['cosine'])}")
        if tr["fd_error"] > FD_TOLERANCE:
            self.problems.append(f"on the transformer the exact gradient disagrees with finite differences by "
                                 f"{tr['fd_error']:.3g} (relative, > {FD_TOLERANCE:g})")
        for d, row in enumerate(tr["directions"], 1):
            if not row["covered"]:
                self.problems.append(
                    f"on the transformer, direction {d}: the Monte Carlo mean {row['mc_mean']:.5g} over "
                    f"{tr['mc_pools']} pools, 99.9% interval [{row['mc_lo']:.5g}, {row['mc_hi']:.5g}], does not "
                    f"cover the finite-difference derivative {row['finite_diff']:.5g}")

    def to_dict(self) -> dict:
        """Plain JSON-able dict with the verdict and the summary figures (None where not computed)."""
        d = asdict(self)
        d.update(ok=self.ok, max_rel_error=self.max_rel_error, max_abs_error=self.max_abs_error,
                 variance_ratio=self.variance_ratio, clip_bias=self.clip_bias, reuse_bias=self.reuse_bias)
        for key in ("max_rel_error", "max_abs_error", "variance_ratio", "clip_bias", "reuse_bias"):
            if isinstance(d[key], float) and not math.isfinite(d[key]):
                d[key] = None
        return d

    def __str__(self) -> str:
        def f(x, spec=".3g"):
            return "n/a" if x is None or (isinstance(x, float) and not math.isfinite(x)) else format(x, spec)

        head = f"objective check: target {self.target}, k={self.k}, n={self.n}: "
        lines = [head + ("OK" if self.ok else f"{len(self.problems)} problem(s)")]
        lines.append(f"  informative policies (non-zero target gradient): {self.policies_informative} of "
                     f"{self.policies_drawn} drawn ({self.policies_requested} requested)")
        cols = f"  {'policy':>6} {'outcomes':>8} {'pools':>6} {'relative bias':>13} {'max|bias|':>9} {'projection':>10} " \
               f"{'cosine':>7} {'finite-difference error':>23} {'variance':>9} " \
               f"{'leave-one-out REINFORCE variance':>32} {'ratio':>6}"
        lines.append(cols)
        for j, c in enumerate(self.cases, 1):
            rv = c["reinforce_variance"]
            ratio = c["variance"] / rv if rv else None
            lines.append(f"  {j:>6} {c['outcomes']:>8} {c['pools']:>6} {c['rel_error']:>13.2e} {c['max_abs_error']:>9.2e} "
                         f"{c['projection']:>10.4f} {c['cosine']:>7.4f} {c['fd_error']:>23.1e} {c['variance']:>9.3g} "
                         f"{f(rv):>32} {f(ratio):>6}")
        if self.reuse_shift is not None:
            clip = f", clipped at clip_ratio={self.clip_ratio:g}" if self.clip_ratio is not None else ""
            lines.append(f"  sample reuse: pools drawn from a policy whose logits are moved by {self.reuse_shift:g} x "
                         f"N(0, 1), importance-weighted{clip} (exact, every pool enumerated)")
            lines.append(f"  {'policy':>6} {'ratio range':>17} {'relative bias, unclipped':>24} "
                         f"{'relative bias, clipped':>22} {'clipped share':>13}")
            for j, c in enumerate(self.cases, 1):
                u = c.get("reuse")
                if not u:
                    continue
                rng = f"[{u['min_ratio']:.3g}, {u['max_ratio']:.3g}]"
                lines.append(f"  {j:>6} {rng:>17} {u['rel_bias_unclipped']:>24.3e} "
                             f"{f(u.get('rel_bias_clipped'), '.3e'):>22} {f(u.get('clip_frac'), '.3f'):>13}")
            if self.clip_ratio is not None:
                lines.append(f"  clipping's bias: largest relative bias of the clipped gradient {f(self.clip_bias, '.3g')} "
                             f"(unclipped: {f(self.reuse_bias, '.3g')})")
        tr = self.transformer
        if tr:
            exact = f"{tr['pools']} pools exact" if tr["rel_error"] is not None else "pools not enumerable"
            lines.append(f"  transformer: vocabulary {tr['vocab']}, {tr['length']} response tokens ({tr['responses']} "
                         f"responses), {tr['parameters']} parameters, {tr['classes']} score/reward classes, {exact}; "
                         f"relative bias {f(tr['rel_error'], '.2e')}")
            lines.append(f"  {'dir':>4} {'finite diff':>12} {'exact grad':>12} {'E[estimate]':>12} "
                         f"{'MC mean':>12} {'99.9% interval':>26}")
            for d, r in enumerate(tr["directions"], 1):
                lines.append(f"  {d:>4} {r['finite_diff']:>12.5g} {r['exact']:>12.5g} {f(r['expected'], '.5g'):>12} "
                             f"{r['mc_mean']:>12.5g} [{r['mc_lo']:>11.5g}, {r['mc_hi']:>11.5g}]")
        lines += [f"  PROBLEM: {p}" for p in self.problems]
        return "\n".join(lines)

    def plot(self, path) -> str:
        """Estimated against exact gradient components, to ``path`` (PNG); returns ``path``."""
        from bonft.viz import plot_objective_check  # loads matplotlib: only when a plot is asked for

        return plot_objective_check(self, path)
